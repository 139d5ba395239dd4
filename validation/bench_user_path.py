"""Benchmark of the user path: ``compare()`` with HC3 and every default diagnostic, in memory.

    python validation/bench_user_path.py                    # n = 10⁶ and 10⁷, k = 7
    python validation/bench_user_path.py --n 1000000        # one size only
    python validation/bench_user_path.py --repeat 3         # best of three timings per size

For each n the script times, in the same run, numpy's lstsq on the model matrix X (k = 7: intercept,
x, w, x·w and three covariates) and ``compare(..., backends=["hc3"])`` with its default diagnostics
(Breusch–Pagan, White, Goldfeld–Quandt, residual spread, SE gap, binning check). It reports the time
ratio (goal ≤ 3), the peak memory above the input frame as a multiple of the size of X (goal ≤ 3),
and, with two sizes, the time per row of the larger against the smaller (goal: within 20 %).
Times are the best of ``--repeat`` runs of each (lstsq and compare alike) without memory tracing;
the memory figure comes from one further traced run (tracemalloc slows the allocations it traces).
The data are invented (a known-truth simulation: SD growing with the moderator).
"""
from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from measure import measured  # noqa: E402

from robustmod.compare import compare  # noqa: E402

SEED = 20251202
FORMULA = "y ~ x * w + a + b + c"


def simulate(n: int, seed: int = SEED) -> pd.DataFrame:
    """Invented rows: y = 1 + x + 0.5w + 0.2xw + 0.3a + ε, SD(ε) = exp(0.2 + 0.3w)."""
    rng = np.random.default_rng(seed)
    x, w, a, b, c = (rng.normal(size=n) for _ in range(5))
    y = 1 + x + 0.5 * w + 0.2 * x * w + 0.3 * a + rng.normal(size=n) * np.exp(0.2 + 0.3 * w)
    return pd.DataFrame({"y": y, "x": x, "w": w, "a": a, "b": b, "c": c})


def _best(fn: Any, repeat: int) -> float:
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def _lstsq(df: pd.DataFrame, repeat: int) -> tuple[float, int]:
    """Seconds of numpy's lstsq on the model matrix (best of ``repeat``), and the bytes of that matrix."""
    X = np.column_stack([np.ones(len(df)), df.x, df.w, df.x * df.w, df.a, df.b, df.c])
    y = df.y.to_numpy()
    return _best(lambda: np.linalg.lstsq(X, y, rcond=None), repeat), X.nbytes


def one_size(n: int, repeat: int = 1) -> dict[str, float]:
    df = simulate(n)
    t_lstsq, x_bytes = _lstsq(df, repeat)

    def run() -> Any:
        return compare(df, formula=FORMULA, focal="x", moderator="w", backends=["hc3"], seed=SEED)

    t_cmp = _best(run, repeat)
    res, _, peak = measured(run)
    if not res.results["hc3"].available:
        raise RuntimeError("the HC3 fit failed in the benchmark run")
    return {"n": n, "lstsq_s": t_lstsq, "compare_s": t_cmp, "ratio": t_cmp / t_lstsq,
            "peak_mb": peak / 2**20, "x_mb": x_bytes / 2**20, "memory_ratio": peak / x_bytes}


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--n", type=int, nargs="*", default=[10**6, 10**7])
    p.add_argument("--repeat", type=int, default=1, help="timings per size; the best is reported")
    args = p.parse_args(argv)
    load = os.getloadavg()[0]
    rows = [one_size(n, args.repeat) for n in args.n]
    print(f"{os.cpu_count()} CPUs, load average {load:.1f} before, {os.getloadavg()[0]:.1f} after; "
          f"best of {args.repeat} timing(s)\n")
    print("| n | lstsq (s) | compare hc3 + diagnostics (s) | ratio (goal ≤ 3) | peak above frame (MB) | X (MB) "
          "| memory / X (goal ≤ 3) |")
    print("|---|---|---|---|---|---|---|")
    for r in rows:
        print(f"| {r['n']:,} | {r['lstsq_s']:.3f} | {r['compare_s']:.3f} | {r['ratio']:.2f} | {r['peak_mb']:.0f} "
              f"| {r['x_mb']:.0f} | {r['memory_ratio']:.2f} |")
    if len(rows) >= 2:
        a, b = rows[0], rows[-1]
        per_row = (b["compare_s"] / b["n"]) / (a["compare_s"] / a["n"])
        print(f"\nTime per row at n = {b['n']:,} over n = {a['n']:,}: {per_row:.2f} (goal: within 0.8–1.2).")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
