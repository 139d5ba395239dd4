"""Benchmark: batched calibration against one compare() per simulated dataset.

Calibrates ols, hc3, wls and wild (399 bootstrap replications) on 1,000 datasets of
n = 200 (the invented demo design), then times the naive alternative — a Python loop
calling ``robustmod.compare()`` once per dataset with the same back-ends — on a subset
of the datasets and scales that time to 1,000. Goal: the batched run is ≥ 20× faster.

    python validation/bench_calibrate.py [--datasets 1000] [--loop-subset 20] [--workers N]
"""
from __future__ import annotations

import argparse
import os
import time
import warnings

import numpy as np

import robustmod
from robustmod.backends.wild import WildBootstrapBackend
from robustmod.calibrate import calibrate, simulation_model
from robustmod.demo import DEMO_FOCAL, DEMO_FORMULA, DEMO_MODERATOR, demo_data
from robustmod.design import build_design
from robustmod.spec import ModelSpec

WILD_REPLICATIONS = WildBootstrapBackend.calibration_options["replications"]

IDS = ["ols", "hc3", "wls", "wild"]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--datasets", type=int, default=1000)
    ap.add_argument("--n", type=int, default=200)
    ap.add_argument("--loop-subset", type=int, default=20, help="datasets timed in the compare() loop")
    ap.add_argument("--workers", type=int, default=None)
    ap.add_argument("--seed", type=int, default=20240917)
    args = ap.parse_args()
    warnings.simplefilter("ignore")

    frame = demo_data(args.n)
    spec = ModelSpec(formula=DEMO_FORMULA, focal=DEMO_FOCAL, moderators=(DEMO_MODERATOR,), seed=args.seed)
    design = build_design(frame, spec)
    print(f"cores available: {len(os.sched_getaffinity(0))}; n = {design.n_obs}, k = {design.n_params}; "
          f"back-ends {', '.join(IDS)} (wild with {WILD_REPLICATIONS} replications)")

    t0 = time.perf_counter()
    out = calibrate(design, IDS, n_datasets=args.datasets, seed=args.seed, workers=args.workers)
    batched = time.perf_counter() - t0
    print(f"batched calibration, {args.datasets} datasets (null + power runs): {batched:.2f} s "
          f"on {out['workers']} worker(s)")
    for bid in IDS:
        fp, pw = out["false_positive_rate"][bid], out["power"][bid]
        print(f"  {bid:5s} false-positive rate {fp['rate']:.3f} (MC SE {fp['mc_se']:.3f})   "
              f"power {pw['rate']:.3f} (MC SE {pw['mc_se']:.3f})")

    # The naive loop: the same simulated datasets (null and power), one compare() each.
    beta, sigma, _, _ = simulation_model(design, seed=args.seed)
    beta0 = beta.copy()
    beta0[list(design.interaction_columns)] = 0.0
    rng = np.random.default_rng(args.seed)
    m = args.loop_subset
    Z = rng.standard_normal((design.n_obs, m))
    frames = []
    for mean in (design.X @ beta0, design.X @ beta):
        Y = mean[:, None] + sigma[:, None] * Z
        for j in range(m):  # the datasets the loop is timed on
            f = frame.copy()
            f.loc[design.data.frame.index, spec.response] = Y[:, j]
            frames.append(f)
    opts = {"wild": {"replications": WILD_REPLICATIONS}}
    t0 = time.perf_counter()
    for f in frames:  # the naive approach being measured: one full comparison per dataset
        robustmod.compare(f, DEMO_FORMULA, DEMO_FOCAL, DEMO_MODERATOR, backends=IDS, primary="hc3",
                          seed=args.seed, options=opts)
    loop = time.perf_counter() - t0
    per = loop / len(frames)
    scaled = per * 2 * args.datasets
    print(f"compare() loop: {loop:.2f} s for {len(frames)} datasets ({per * 1000:.0f} ms each); "
          f"scaled to {2 * args.datasets} datasets: {scaled:.0f} s")
    ratio = scaled / batched
    print(f"speed-up of the batched calibration: {ratio:.0f}x (goal >= 20x: {'met' if ratio >= 20 else 'NOT met'})")


if __name__ == "__main__":
    main()
