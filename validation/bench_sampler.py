"""Which NUTS implementation should the ``bayes`` back-end use? PyMC's, nutpie's or NumPyro's.

All three sample the back-end's own model (``robustmod.backends.bayes.build_model``, the
standardised location–scale model with the QR reparameterisation) on invented data with a
known truth (n = 1000 by default: y = 50 + 2x + 0.5w + 0.05xw + ε, log SD(ε) = 0.2 + 0.12x + 0.01w),
with the back-end's default chains, draws, tuning steps and target acceptance, on the cores the
back-end would use. Each sampler runs in a fresh process, one after another, so none profits from
another's compilation within the process (PyTensor's and numba's on-disk caches are shared by all;
run the script twice to see warm-cache figures). Per sampler:

- compile: PyMC, building its NUTS step (logp and gradient functions); nutpie,
  ``nutpie.compile_pymc_model`` (numba); NumPyro, the wall time of a run of 10 tuning steps and
  10 draws, which is almost all JAX compilation (repeated at every call: PyMC's JAX path turns the
  shared variables into constants).
- first run: build the model and call ``pm.sample(nuts_sampler=...)`` with the default settings
  (compilation included), as a one-off fit does.
- warm run: a second dataset of the same shape through the back-end's ``run_sampler`` on the model
  compiled for the first (``compiled_model``: PyMC reuses its step through ``pm.set_data``; nutpie its
  compiled functions through ``with_data``; NumPyro recompiles).
- ESS/s: bulk ESS of β₃ (product term) and of γ₁ (log-σ slope of the focal predictor) in the warm
  run, per second of that run.

Ratios are against PyMC's default sampler measured in the same run. Writes
validation/results/bench_sampler.md. Run: python validation/bench_sampler.py [--n 1000]
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
import warnings
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
SAMPLERS = ("pymc", "nutpie", "numpyro")


def simulate(n: int, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Invented data with a known truth; returns standardised X̃ (1, x, w, xw), ỹ and Z̃ (1, x, w)."""
    from robustmod.backends.bayes import column_scaling

    rng = np.random.default_rng(seed)
    x, w = rng.uniform(0, 10, n), rng.uniform(20, 60, n)
    X = np.column_stack([np.ones(n), x, w, x * w])
    y = 50 + 2 * x + 0.5 * w + 0.05 * x * w + np.exp(0.2 + 0.12 * x + 0.01 * w) * rng.normal(size=n)
    return column_scaling(X).apply(X), (y - y.mean()) / y.std(ddof=1), column_scaling(X[:, :3]).apply(X[:, :3])


def compile_seconds(sampler: str, cm, settings: dict[str, int]) -> float:
    """Seconds to compile what the sampler needs (see the module docstring)."""
    from robustmod.backends.bayes import run_sampler

    t0 = time.perf_counter()
    if sampler == "pymc":
        _ = cm.step
    elif sampler == "nutpie":
        import nutpie

        nutpie.compile_pymc_model(cm.model, backend="numba", freeze_model=False)
    else:
        run_sampler(cm, draws=10, tune=10, chains=settings["chains"], cores=settings["cores"], seed=1, progress=False,
                    sampler="numpyro")
    return time.perf_counter() - t0


def child(sampler: str, n: int) -> dict[str, float]:
    """One sampler in this fresh process: first run, compile, warm run on a new dataset."""
    import arviz as az
    import pymc as pm

    from robustmod.backends.bayes import (
        BayesBackend,
        build_model,
        compiled_model,
        run_sampler,
    )

    warnings.filterwarnings("ignore")
    default = BayesBackend()
    s = {"draws": default.draws, "tune": default.tune, "chains": default.chains,
         "cores": min(default.chains, os.cpu_count() or 1)}
    Xs, ys, Zs = simulate(n, seed=11)
    t0 = time.perf_counter()
    cm = build_model(Xs, ys, Zs, target_accept=default.target_accept)
    with cm.model, np.errstate(all="ignore"):
        pm.sample(draws=s["draws"], tune=s["tune"], chains=s["chains"], cores=s["cores"], random_seed=3,
                  nuts_sampler=sampler, target_accept=default.target_accept, progressbar=False,
                  compute_convergence_checks=False)
    first = time.perf_counter() - t0
    cm = compiled_model(Xs, ys, Zs, target_accept=default.target_accept)
    compile_s = compile_seconds(sampler, cm, s)
    run_sampler(cm, draws=20, tune=20, chains=s["chains"], cores=s["cores"], seed=4, progress=False, sampler=sampler)
    Xs2, ys2, Zs2 = simulate(n, seed=12)  # a new dataset of the same shape
    t0 = time.perf_counter()
    cm2 = compiled_model(Xs2, ys2, Zs2, target_accept=default.target_accept)
    idata = run_sampler(cm2, draws=s["draws"], tune=s["tune"], chains=s["chains"], cores=s["cores"], seed=5,
                        progress=False, sampler=sampler)
    warm = time.perf_counter() - t0
    ess_b3 = float(az.ess(idata.posterior["b_slopes"].values[..., 2], method="bulk"))
    ess_g1 = float(az.ess(idata.posterior["g_slopes"].values[..., 0], method="bulk"))
    return {"compile": compile_s, "first": first, "warm": warm, "ess_b3": ess_b3, "ess_g1": ess_g1,
            "divergences": int(idata.sample_stats["diverging"].values.sum()), **s}


def table(results: dict[str, dict[str, float]], n: int) -> list[str]:
    base = results["pymc"]
    r0 = base
    lines = [(f"n = {n}; {r0['chains']} chains x {r0['draws']} draws after {r0['tune']} tuning steps on {r0['cores']} "
              f"cores; load average {os.getloadavg()[0]:.1f} at the end (machine shared)."), "",
             "| sampler | compile s | first run s | warm run s | ESS/s β₃ | ESS/s γ₁ | divergences (warm) |",
             "|---|---|---|---|---|---|---|"]
    for name, r in results.items():
        eb, eg = r["ess_b3"] / r["warm"], r["ess_g1"] / r["warm"]
        lines.append(f"| {name} | {r['compile']:.2f} | {r['first']:.2f} | {r['warm']:.2f} | {eb:.0f} | {eg:.0f} | "
                     f"{r['divergences']} |")
    lines += ["", ("Ratios against PyMC's default sampler (same run; time ratios < 1 and ESS/s ratios > 1 favour "
                   "the sampler):"), "", "| sampler | compile | first run | warm run | ESS/s β₃ | ESS/s γ₁ |",
              "|---|---|---|---|---|---|"]
    b_eb, b_eg = base["ess_b3"] / base["warm"], base["ess_g1"] / base["warm"]
    for name, r in results.items():
        lines.append(f"| {name} | {r['compile'] / base['compile']:.2f} | {r['first'] / base['first']:.2f} | "
                     f"{r['warm'] / base['warm']:.2f} | {r['ess_b3'] / r['warm'] / b_eb:.2f} | "
                     f"{r['ess_g1'] / r['warm'] / b_eg:.2f} |")
    return lines


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=1000)
    ap.add_argument("--samplers", default=",".join(SAMPLERS))
    ap.add_argument("--child", help=argparse.SUPPRESS)
    ap.add_argument("--out", default=str(HERE / "results" / "bench_sampler.md"))
    a = ap.parse_args()
    if a.child:
        print(json.dumps(child(a.child, a.n)))
        return
    names = [s for s in a.samplers.split(",") if s]
    if "pymc" not in names:
        names.insert(0, "pymc")  # the baseline of every ratio
    results = {}
    for name in names:
        proc = subprocess.run([sys.executable, __file__, "--child", name, "--n", str(a.n)], capture_output=True,
                              text=True, env={**os.environ, "PYTHONWARNINGS": "ignore"}, check=False)
        if proc.returncode != 0:
            raise SystemExit(f"{name} failed: {proc.stderr.strip()[-1500:]}")
        results[name] = json.loads(proc.stdout.strip().splitlines()[-1])
        print(f"{name}: {results[name]}", flush=True)
    lines = table(results, a.n)
    print("\n".join(lines))
    out = Path(a.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text("# NUTS samplers for the bayes back-end\n\nGenerated by `validation/bench_sampler.py` on "
                   f"{time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}.\n\n" + "\n".join(lines) + "\n")


if __name__ == "__main__":
    main()
