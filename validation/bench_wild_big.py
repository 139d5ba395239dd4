"""Benchmark of the wild bootstrap on a large frame: ``compare(..., backends=["wild"])`` at n = 10⁶.

    nice -n 10 python validation/bench_wild_big.py            # n = 10⁶, B = 9999 (default)
    python validation/bench_wild_big.py --n 200000            # a smaller run

Times the whole user call, ``compare(frame, "y ~ x * w + a + b + c", focal="x", moderator="w",
backends=["wild"])`` with the default B = 9999 replications (k = 7: intercept, x, w, x·w and three
covariates; invented data with SD growing with the moderator, the design of bench_user_path.py),
and numpy's lstsq on the same X in the same run for scale. Goals (issue 15): at most 60 s on 2
cores and a peak resident memory at most 1 GB above what the process held with the frame loaded
(the kernel's high-water mark reset first; Linux /proc figures). The load average before and after
and the process CPU time are printed, because on a shared machine other work slows every figure.
"""
from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_user_path import FORMULA, SEED, simulate  # noqa: E402
from measure import _status_kib  # noqa: E402  (the one /proc reader of the benchmarks)

from robustmod.compare import compare  # noqa: E402

REPLICATIONS = 9999
GOAL_SECONDS = 60.0
GOAL_MEMORY_MB = 1024.0


def _peak_above(fn: Any) -> tuple[Any, float, float, float]:
    """(result, wall seconds, CPU seconds, peak resident MB above the resident set before the call)."""
    try:
        Path("/proc/self/clear_refs").write_text("5")  # reset the high-water mark
    except OSError:
        pass
    before = _status_kib("VmRSS")
    c0, t0 = time.process_time(), time.perf_counter()
    out = fn()
    wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    hwm = _status_kib("VmHWM")
    peak = float("nan") if before is None or hwm is None else (hwm - before) / 1024
    return out, wall, cpu, peak


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--n", type=int, default=10**6)
    p.add_argument("--replications", type=int, default=REPLICATIONS)
    args = p.parse_args(argv)
    load0 = os.getloadavg()[0]
    df = simulate(args.n)
    X = np.column_stack([np.ones(len(df)), df.x, df.w, df.x * df.w, df.a, df.b, df.c])
    t0 = time.perf_counter()
    np.linalg.lstsq(X, df.y.to_numpy(), rcond=None)
    t_lstsq = time.perf_counter() - t0
    x_mb = X.nbytes / 2**20
    del X
    steps: dict[str, float] = {}
    res, wall, cpu, peak = _peak_above(lambda: compare(
        df, formula=FORMULA, focal="x", moderator="w", backends=["wild"], seed=SEED,
        options={"wild": {"replications": args.replications}},
        on_step=steps.__setitem__))
    load1 = os.getloadavg()[0]
    wild = res.results["wild"]
    if not wild.available:
        raise RuntimeError(f"the wild bootstrap was unavailable in the benchmark run: {wild.reason}")
    ex = wild.extras
    print(f"wild bootstrap through compare(), n = {args.n:,}, k = 7, B = {ex['replications']}; "
          f"{os.cpu_count()} CPUs, load average {load0:.1f} before, {load1:.1f} after")
    print(f"  numpy lstsq on the same X:   {t_lstsq:8.2f} s  (X: {x_mb:.0f} MB)")
    print(f"  compare(backends=['wild']):  {wall:8.2f} s  ({wall / t_lstsq:.0f}x lstsq; process CPU {cpu:.1f} s; "
          f"goal <= {GOAL_SECONDS:g} s: {'met' if wall <= GOAL_SECONDS else 'NOT met'})")
    print(f"    of which the bootstrap fit {ex['seconds']:.2f} s (replicate batches of {ex['replicate_batch']}, "
          f"{ex['row_blocks']} row blocks, kernel {ex['kernel']})")
    if steps:
        print("    steps: " + ", ".join(f"{k} {v:.2f} s" for k, v in steps.items()))
    print(f"  peak resident memory above the loaded frame: {peak:8.0f} MB "
          f"(frame {df.memory_usage(deep=True).sum() / 2**20:.0f} MB; goal <= {GOAL_MEMORY_MB:g} MB: "
          f"{'met' if peak <= GOAL_MEMORY_MB else 'NOT met'})")
    print(f"  product-term p (null imposed): {ex['interaction_p']:.4g}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
