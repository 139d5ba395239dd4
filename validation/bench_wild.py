"""Speed and memory of the wild bootstrap back-end against a per-replicate refit loop.

Problem: B = 9999 replicates, n = 10,000 rows, four mean-model columns
(intercept, x, w, x·w), invented data with SD growing with w. The reference is the
textbook loop doing the same work as one fit: for every replicate build the
unrestricted y* = Xβ̂ + ê⊙v and the null-imposed y* = X₀β̃ + ẽ⊙v and refit each with
statsmodels ``OLS(y*, X).fit(cov_type="HC3")`` (two refits per replicate). The loop is timed on a subset of replicates
(``--loop-replicates``, default 200) and scaled linearly to B, which is fair because
every refit costs the same. Our time is the median of three full ``WildBootstrapBackend.fit`` runs
(both the unrestricted and the null-imposed bootstrap, all B replicates); the loop's
time per replicate is the median over three blocks. The load average is printed
because other work on the machine slows the multi-threaded matrix products of the fit
more than the single-threaded refit loop. Peak resident memory of
the fit is measured in a fresh subprocess with ``resource.getrusage`` (ru_maxrss, which
includes the interpreter, numpy/pandas/formulaic and the data), so the reference loop
does not count against it; tracemalloc gives the peak of the fit's own allocations.

Run: ``python validation/bench_wild.py`` (about a minute on two cores).
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time
import tracemalloc

import numpy as np
import pandas as pd

N_ROWS = 10_000
REPLICATIONS = 9999
GOAL_RATIO = 50.0
GOAL_MEMORY_MB = 500.0


def make_design(n: int = N_ROWS, seed: int = 7):
    """Invented data: y = 1 + 0.5x + 0.3w + 0.1xw + ε, SD(ε) = exp(0.5w)."""
    from robustmod import ModelSpec, build_design

    rng = np.random.default_rng(seed)
    x, w = rng.normal(size=n), rng.normal(size=n)
    y = 1 + 0.5 * x + 0.3 * w + 0.1 * x * w + rng.normal(size=n) * np.exp(0.5 * w)
    frame = pd.DataFrame({"y": y, "x": x, "w": w})
    return build_design(frame, ModelSpec(formula="y ~ x * w", focal="x", moderators=("w",)))


def time_fit(replications: int, repeats: int = 3) -> tuple[float, object]:
    """Median seconds of ``repeats`` full fits (after one warm-up fit)."""
    from robustmod.backends.wild import WildBootstrapBackend

    design = make_design()
    backend = WildBootstrapBackend(replications=replications)
    backend.fit(design, seed=1)  # warm-up (imports, BLAS threads)
    times = []
    for r in range(repeats):
        t0 = time.perf_counter()
        fit = backend.fit(design, seed=2 + r)
        times.append(time.perf_counter() - t0)
    return float(np.median(times)), fit


def time_loop(replicates: int, blocks: int = 3) -> float:
    """Seconds per replicate of the refit loop (unrestricted and null-imposed, HC3), same weights;
    median over ``blocks`` equal blocks of replicates, like the median of our repeated fits."""
    import statsmodels.api as sm

    from robustmod.backends.hc import leverages
    from robustmod.backends.wild import draw_weights

    design = make_design()
    X, y = design.X, design.y
    base = sm.OLS(y, X).fit()
    e = base.resid / np.sqrt(1 - leverages(design.qr[0]))
    j = design.interaction_columns[0]
    X0 = np.delete(X, j, axis=1)
    restricted = sm.OLS(y, X0).fit()
    e0 = restricted.resid / np.sqrt(1 - leverages(np.linalg.qr(X0)[0]))
    V = draw_weights("rademacher", X.shape[0], replicates, np.random.default_rng(2))
    per_block = []
    for block in np.array_split(np.arange(replicates), blocks):
        t0 = time.perf_counter()
        for b in block:
            r = sm.OLS(base.fittedvalues + e * V[b], X).fit(cov_type="HC3")
            _ = (r.params - base.params) / r.bse
            r0 = sm.OLS(restricted.fittedvalues + e0 * V[b], X).fit(cov_type="HC3")
            _ = r0.params[j] / r0.bse[j]
        per_block.append((time.perf_counter() - t0) / block.size)
    return float(np.median(per_block))


def memory_child() -> None:
    """In a fresh process: peak RSS before and after one full fit (MB)."""
    design = make_design()
    before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    from robustmod.backends.wild import WildBootstrapBackend

    tracemalloc.start()
    WildBootstrapBackend(replications=REPLICATIONS).fit(design, seed=3)
    traced = tracemalloc.get_traced_memory()[1] / 2**20
    tracemalloc.stop()
    after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(json.dumps({"peak_mb": after, "before_fit_mb": before, "fit_allocations_mb": traced}))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--loop-replicates", type=int, default=200)
    ap.add_argument("--memory-child", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.memory_child:
        memory_child()
        return
    ours, fit = time_fit(REPLICATIONS)
    per = time_loop(args.loop_replicates)
    loop_total = per * REPLICATIONS
    ratio = loop_total / ours
    out = subprocess.run([sys.executable, __file__, "--memory-child"], capture_output=True, text=True, check=True)
    mem = json.loads(out.stdout.strip().splitlines()[-1])
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"wild bootstrap, n = {N_ROWS}, k = 4, B = {REPLICATIONS} (unrestricted + null-imposed, one fit); "
          f"{os.cpu_count()} CPUs, load average {load:.1f}")
    print(f"  our fit:                     {ours:8.2f} s  (median of 3; kernel: {fit.extras['kernel']})")
    print(f"  statsmodels refit loop:      {per * 1e3:8.2f} ms per replicate (2 refits), timed on {args.loop_replicates} "
          f"replicates, scaled to B: {loop_total:8.1f} s")
    print(f"  speed-up ratio:              {ratio:8.1f}x   (goal >= {GOAL_RATIO:g}x: {'met' if ratio >= GOAL_RATIO else 'NOT met'})")
    print(f"  peak resident memory:        {mem['peak_mb']:8.1f} MB (before the fit {mem['before_fit_mb']:.1f} MB; "
          f"goal <= {GOAL_MEMORY_MB:g} MB: {'met' if mem['peak_mb'] <= GOAL_MEMORY_MB else 'NOT met'})")
    print(f"  peak allocations of the fit: {mem['fit_allocations_mb']:8.1f} MB (tracemalloc, data and imports excluded)")


if __name__ == "__main__":
    main()
