"""Benchmark: OLS + HC3 + conditional slopes + significance region at n = 1,000,000, 7 columns.

Prints the ratio of our full path to numpy's lstsq alone (goal ≤ 2×) and the speed-up
over statsmodels OLS(...).fit(cov_type="HC3") (goal ≥ 5×), all measured in this run.
Run: python validation/bench_ols.py
"""
from __future__ import annotations

import dataclasses
import time

import numpy as np
import pandas as pd
import statsmodels.api as sm

from robustmod import effects
from robustmod.backends.ols import OLSBackend
from robustmod.design import build_design
from robustmod.spec import ModelSpec
from robustmod.thin_qr import factor


def best_of(fn, repeats: int = 5) -> float:
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def main(n: int = 1_000_000) -> dict[str, float]:
    rng = np.random.default_rng(1)
    df = pd.DataFrame({"x": rng.normal(size=n), "w": rng.normal(size=n), "a": rng.normal(size=n),
                       "b": rng.normal(size=n), "c": rng.normal(size=n)})
    df["y"] = 1 + df.x + 0.2 * df.x * df.w + rng.normal(size=n) * (1 + 0.5 * np.abs(df.w))
    design = build_design(df, ModelSpec("y ~ x * w + a + b + c", "x", ("w",)))
    X, y = design.X, design.y
    assert X.shape == (n, 7)

    def ours() -> None:
        d = dataclasses.replace(design, qr=factor(design.X))  # time the QR too
        fit = OLSBackend("hc3").fit(d)
        effects.interaction(fit, d, 0.05)
        effects.conditional_effects(fit, d, 0.05)
        effects.significance_region(fit, d, 0.05)

    t_ours = best_of(ours)
    t_lstsq = best_of(lambda: np.linalg.lstsq(X, y, rcond=None))
    t_sm = best_of(lambda: sm.OLS(y, X).fit(cov_type="HC3"), repeats=3)
    r1, r2 = t_ours / t_lstsq, t_sm / t_ours
    print(f"n = {n:,}, k = 7")
    print(f"robustmod OLS+HC3+effects+region: {t_ours:.3f} s")
    print(f"numpy lstsq alone:               {t_lstsq:.3f} s   ratio ours/lstsq = {r1:.2f}  (goal <= 2)")
    print(f"statsmodels OLS HC3:             {t_sm:.3f} s   speed-up = {r2:.2f}x (goal >= 5)")
    return {"ours_over_lstsq": r1, "statsmodels_over_ours": r2}


if __name__ == "__main__":
    main()
