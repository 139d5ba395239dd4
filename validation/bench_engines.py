"""Benchmark: the calibration on a 2-worker Dask LocalCluster against the local engine, and the per-task costs.

1. Calibrates ols, hc3, wild (the calibration's replications) and wls on 1,000 datasets of n = 200 (the invented
   demo design) with the local engine (this machine's processes) and on a Dask LocalCluster of 2 workers
   bound to 127.0.0.1, in the same run. Goal: the Dask run is no slower than 1.3× the local one (cluster start
   and a warm-up run on its fresh workers reported apart). The rates must be identical.
2. The engine's own cost per task: a no-op task mapped 200 times on the cluster.
3. The sampler (bayes, at its calibration settings): compile time and cost per simulated dataset measured in this
   process, a short calibration on the cluster (one task per dataset), and the projected time on 10 and 100
   workers: compile + ceil(D / W) × (cost per dataset + cost per task).

    python validation/bench_engines.py [--datasets 1000] [--bayes-datasets 6] [--skip-bayes]
"""
from __future__ import annotations

import argparse
import math
import os
import time
import warnings
from typing import Any

from robustmod.backends.bayes import BayesBackend
from robustmod.calibrate import CHUNK, calibrate
from robustmod.demo import DEMO_FOCAL, DEMO_FORMULA, DEMO_MODERATOR, demo_data
from robustmod.design import build_design
from robustmod.engines import make_engine
from robustmod.spec import ModelSpec

IDS = ["ols", "hc3", "wild", "wls"]
GOAL = 1.3


def _noop(state: Any, i: int) -> int:
    return i


def _timed(fn: Any, *args: Any, **kw: Any) -> tuple[Any, float]:
    t0 = time.perf_counter()
    out = fn(*args, **kw)
    return out, time.perf_counter() - t0


def frequentist(design: Any, args: argparse.Namespace, eng: Any) -> float:
    # Fresh Dask workers import robustmod and its dependencies on their first task; local worker processes
    # are forked from this one with everything imported. Both engines get one warm-up run first.
    calibrate(design, IDS, n_datasets=2 * CHUNK, seed=args.seed + 1)
    _, t_cold = _timed(calibrate, design, IDS, n_datasets=2 * CHUNK, seed=args.seed + 1, engine=eng)
    print(f"warm-up: {2 * CHUNK} datasets on the fresh cluster took {t_cold:.2f} s (imports on every worker)")
    local, t_local = _timed(calibrate, design, IDS, n_datasets=args.datasets, seed=args.seed)
    on_dask, t_dask = _timed(calibrate, design, IDS, n_datasets=args.datasets, seed=args.seed, engine=eng)
    same = (local["false_positive_rate"] == on_dask["false_positive_rate"] and local["power"] == on_dask["power"])
    tasks = math.ceil(args.datasets / CHUNK)
    print(f"calibration of {', '.join(IDS)}, {args.datasets} datasets (null + power), {tasks} tasks of {CHUNK}:")
    print(f"  local engine, {local['workers']} worker process(es): {t_local:.2f} s")
    print(f"  Dask LocalCluster, {on_dask['workers']} workers:      {t_dask:.2f} s")
    print(f"  ratio Dask / local: {t_dask / t_local:.2f} (goal ≤ {GOAL}) — {'met' if t_dask <= GOAL * t_local else 'NOT met'}")
    print(f"  rates identical on both engines: {same}")
    per_chunk = t_local * local["workers"] / tasks
    print(f"  cost of one task (50 datasets, 4 back-ends), from the local run: {per_chunk:.2f} s of one core")
    return per_chunk


def per_task_overhead(eng: Any) -> float:
    eng.map(_noop, [(i,) for i in range(20)])  # warm-up
    _, t = _timed(eng.map, _noop, [(i,) for i in range(200)])
    print(f"engine cost per task (no-op, 200 tasks on {eng.workers} workers): {1000 * t / 200:.1f} ms")
    return t / 200


def bayes(design: Any, args: argparse.Namespace, eng: Any, overhead: float) -> None:
    opts = BayesBackend.calibration_options
    print(f"bayes at its calibration settings ({opts['chains']} chains × {opts['draws']} draws after "
          f"{opts['tune']} tuning steps):")
    _, t_first = _timed(calibrate, design, ["bayes"], n_datasets=10, seed=args.seed, costly_datasets=1, workers=1,
                        power=False)
    k = max(2, args.bayes_datasets // 2)
    _, t_warm = _timed(calibrate, design, ["bayes"], n_datasets=10, seed=args.seed, costly_datasets=k, workers=1,
                       power=False)
    per = t_warm / k
    compile_s = max(0.0, t_first - per)
    print(f"  in this process: first dataset {t_first:.1f} s (model compile ≈ {compile_s:.1f} s), then "
          f"{per:.2f} s per dataset (mean of {k}, warm)")
    m = args.bayes_datasets
    out, t_dask = _timed(calibrate, design, ["bayes"], n_datasets=max(10, m), seed=args.seed, costly_datasets=m,
                         engine=eng, power=False)
    proj = compile_s + math.ceil(m / eng.workers) * (per + overhead)
    print(f"  on the cluster: {m} datasets as {m} tasks on {eng.workers} workers in {t_dask:.1f} s "
          f"(projected {proj:.1f} s); false-positive rate {out['false_positive_rate']['bayes']['rate']}")
    for d in (20, 1000):
        cells = [f"{w} workers ≈ {compile_s + math.ceil(d / w) * (per + overhead):.0f} s" for w in (1, 10, 100)]
        print(f"  projected for {d} datasets: " + "; ".join(cells))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--datasets", type=int, default=1000)
    ap.add_argument("--n", type=int, default=200)
    ap.add_argument("--bayes-datasets", type=int, default=6)
    ap.add_argument("--skip-bayes", action="store_true")
    ap.add_argument("--seed", type=int, default=20240917)
    args = ap.parse_args()
    warnings.simplefilter("ignore")
    design = build_design(demo_data(args.n), ModelSpec(formula=DEMO_FORMULA, focal=DEMO_FOCAL,
                                                       moderators=(DEMO_MODERATOR,), seed=args.seed))
    print(f"cores available: {len(os.sched_getaffinity(0))}; n = {design.n_obs}, k = {design.n_params}")
    eng, t_start = _timed(make_engine, "dask", workers=2)
    try:
        print(f"Dask LocalCluster of 2 workers on 127.0.0.1 started in {t_start:.1f} s (not counted below)")
        frequentist(design, args, eng)
        overhead = per_task_overhead(eng)
        if not args.skip_bayes:
            bayes(design, args, eng, overhead)
    finally:
        eng.close()


if __name__ == "__main__":
    main()
