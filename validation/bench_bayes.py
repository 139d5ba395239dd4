"""Benchmark of the ``bayes`` back-end (n = 1000, default sampling unless --draws/--tune given).

Prints, all measured in the same run on the same simulated data (invented, known truth):

1. bulk ESS per second of the product-term coefficient β₃ for
   (a) a straightforward PyMC model written on the raw, unstandardised columns,
   (b) the back-end's standardised model without and (c) with the QR reparameterisation;
   goal: (c)/(a) ≥ 2. Seconds include building/compiling and sampling.
2. wall time of a warm refit (prior sensitivity: new prior scale through the shared
   variable, the compiled step reused) against the first fit; goal ≤ 0.5.

Run: python validation/bench_bayes.py [--draws 1000 --tune 1000 --chains 4]
"""
from __future__ import annotations

import argparse
import os
import time
import warnings

import numpy as np

warnings.filterwarnings("ignore")


def simulate(n: int = 1000, seed: int = 11) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    x, w = rng.uniform(0, 10, n), rng.uniform(20, 60, n)
    X = np.column_stack([np.ones(n), x, w, x * w])
    sd = np.exp(0.2 + 0.12 * x + 0.01 * w)
    y = 50 + 2 * x + 0.5 * w + 0.05 * x * w + sd * rng.normal(size=n)
    return X, y


def raw_model_fit(X: np.ndarray, y: np.ndarray, *, draws: int, tune: int, chains: int, cores: int, seed: int):
    """A plain PyMC location–scale model on the raw columns (wide priors, no rescaling)."""
    import pymc as pm

    t0 = time.perf_counter()
    with pm.Model():
        beta = pm.Normal("beta", 0.0, 100.0, shape=X.shape[1])
        gamma = pm.Normal("gamma", 0.0, 10.0, shape=3)
        pm.Normal("y", mu=pm.math.dot(X, beta), sigma=pm.math.exp(pm.math.dot(X[:, :3], gamma)), observed=y)
        idata = pm.sample(draws=draws, tune=tune, chains=chains, cores=cores, random_seed=seed,
                          target_accept=0.9, progressbar=False, quiet=True, compute_convergence_checks=False)
    return idata, time.perf_counter() - t0


def ours(X: np.ndarray, y: np.ndarray, *, qr: bool, draws: int, tune: int, chains: int, cores: int, seed: int):
    from robustmod.backends.bayes import (
        AUX_DRAWS,
        AUX_TUNE,
        _stack,
        build_model,
        coefficients_to_user,
        column_scaling,
        run_sampler,
    )

    t0 = time.perf_counter()
    xs, zs = column_scaling(X), column_scaling(X[:, :3])
    yc, ysd = y.mean(), y.std(ddof=1)
    cm = build_model(xs.apply(X), (y - yc) / ysd, zs.apply(X[:, :3]), qr=qr)
    idata = run_sampler(cm, draws=draws, tune=tune, chains=chains, cores=cores, seed=seed, progress=False)
    first = time.perf_counter() - t0
    beta = coefficients_to_user(_stack(idata, cm.mean_names), xs, yc, ysd)
    t1 = time.perf_counter()
    warm = run_sampler(cm, draws=min(draws, AUX_DRAWS), tune=min(tune, AUX_TUNE), chains=chains, cores=cores, seed=seed + 1,
                       progress=False, prior_scale=2.0, previous=idata)
    refit = time.perf_counter() - t1
    return idata, beta, first, refit, warm


def main() -> None:
    import arviz as az

    from robustmod.backends.bayes import AUX_DRAWS, AUX_TUNE

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=1000)
    ap.add_argument("--draws", type=int, default=1000)
    ap.add_argument("--tune", type=int, default=1000)
    ap.add_argument("--chains", type=int, default=4)
    ap.add_argument("--seed", type=int, default=3)
    a = ap.parse_args()
    cores = min(a.chains, os.cpu_count() or 1)
    X, y = simulate(a.n)
    kw = dict(draws=a.draws, tune=a.tune, chains=a.chains, cores=cores, seed=a.seed)
    shape = (a.chains, a.draws)

    idata_raw, t_raw = raw_model_fit(X, y, **kw)
    ess_raw = float(az.ess(idata_raw.posterior["beta"].values[..., 3], method="bulk"))
    div_raw = int(idata_raw.sample_stats["diverging"].values.sum())
    rows = [("raw columns, plain PyMC", ess_raw, t_raw, div_raw)]
    refits = {}
    for qr in (False, True):
        idata, beta, first, refit, _ = ours(X, y, qr=qr, **kw)
        ess = float(az.ess(beta[:, 3].reshape(shape), method="bulk"))
        rows.append((f"standardised{' + QR' if qr else ''}", ess, first, int(idata.sample_stats["diverging"].values.sum())))
        refits[qr] = (first, refit)
    print(f"n = {a.n}, {a.chains} chains x {a.draws} draws after {a.tune} tuning steps, {cores} cores")
    print(f"{'model':28s} {'bulk ESS b3':>12s} {'seconds':>9s} {'ESS/s':>8s} {'divergences':>12s}")
    for name, ess, sec, div in rows:
        print(f"{name:28s} {ess:12.0f} {sec:9.2f} {ess / sec:8.1f} {div:12d}")
    base = rows[0][1] / rows[0][2]
    for name, ess, sec, _ in rows[1:]:
        print(f"ESS/s ratio {name} vs raw: {ess / sec / base:.2f}  (goal >= 2)")
    for qr, (first, refit) in refits.items():
        print(f"warm refit ({min(a.draws, AUX_DRAWS)} draws after {min(a.tune, AUX_TUNE)} tuning steps, warm start) "
              f"/ first fit ({'QR' if qr else 'no QR'}): {refit:.2f} s / {first:.2f} s = "
              f"{refit / first:.2f}  (goal <= 0.5)")


if __name__ == "__main__":
    main()
