"""Speed of the wild cluster bootstrap end to end, and its agreement with a statsmodels refit loop.

Problem: G = 50 clusters, n = 100,000 rows, B = 9999 replicates, model y ~ x * w with the focal
predictor x at row level and the moderator w at cluster level; invented data with a cluster
random intercept and SD growing with |x|. Timed: ``compare(..., backends=["wild"], cluster="team")``
as a user runs it (design, the primary HC3 fit, both bootstraps, slopes, the significance
region, diagnostics), median of three runs after a warm-up; goal ≤ 2 s on 2 cores. Beside it
the bootstrap fit alone and the variance diagnostics alone (they are part of every comparison).

Check: for B = 99 the null-imposed t* of the product term equals the t of a statsmodels refit
(``OLS(y*, X).fit(cov_type="cluster")``, CR1) on every y* = X β̃ + v_g ẽ, same weights; the
largest absolute difference is printed (goal ≤ 1e-10).

Run: ``python validation/bench_wild_cluster.py`` (under a minute on two cores).
"""
from __future__ import annotations

import time

import numpy as np
import pandas as pd

N_ROWS = 100_000
N_CLUSTERS = 50
REPLICATIONS = 9999
GOAL_SECONDS = 2.0
GOAL_AGREEMENT = 1e-10


def make_data(n: int = N_ROWS, G: int = N_CLUSTERS, seed: int = 7) -> pd.DataFrame:
    """Invented teams: y = 1 + 0.4x + 0.2w + 0.05xw + u_team + ε, SD(ε) = 0.5 + 0.5|x|."""
    rng = np.random.default_rng(seed)
    team = rng.integers(0, G, n)
    w = rng.normal(size=G)[team]
    x = rng.normal(size=n)
    y = 1 + 0.4 * x + 0.2 * w + 0.05 * x * w + rng.normal(size=G)[team] + rng.normal(size=n) * (0.5 + 0.5 * np.abs(x))
    return pd.DataFrame({"y": y, "x": x, "w": w, "team": team})


def time_compare(data: pd.DataFrame, repeats: int = 3) -> tuple[float, float, float]:
    import robustmod
    from robustmod.backends.wild import WildBootstrapBackend
    from robustmod.design import build_design
    from robustmod.diagnostics import variance_diagnostics
    from robustmod.spec import ModelSpec

    def run() -> object:
        return robustmod.compare(data, "y ~ x * w", "x", "w", backends=["wild"], cluster="team")

    run()  # warm-up (imports, BLAS threads)
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        run()
        times.append(time.perf_counter() - t0)
    design = build_design(data, ModelSpec("y ~ x * w", "x", ("w",), cluster="team"))
    fits = []
    for r in range(repeats):
        t0 = time.perf_counter()
        WildBootstrapBackend(replications=REPLICATIONS).fit(design, seed=r)
        fits.append(time.perf_counter() - t0)
    t0 = time.perf_counter()
    variance_diagnostics(design, alpha=0.05)
    return float(np.median(times)), float(np.median(fits)), time.perf_counter() - t0


def agreement(replications: int = 99) -> float:
    import statsmodels.api as sm

    from robustmod.backends.wild import WildBootstrapBackend, draw_weights
    from robustmod.design import build_design
    from robustmod.spec import ModelSpec

    data = make_data(n=5000, G=N_CLUSTERS, seed=3)
    design = build_design(data, ModelSpec("y ~ x * w", "x", ("w",), cluster="team"))
    fit = WildBootstrapBackend(replications=replications).fit(design, seed=5)
    j = design.interaction_columns[0]
    X, y = design.X, design.y
    X0 = np.delete(X, j, axis=1)
    restricted = sm.OLS(y, X0).fit()
    V = draw_weights("rademacher", design.clusters.max() + 1, replications, np.random.default_rng(5))
    t_ref = np.array([sm.OLS(restricted.fittedvalues + v[design.clusters] * restricted.resid, X)
                      .fit(cov_type="cluster", cov_kwds={"groups": design.clusters}).tvalues[j] for v in V])
    return float(np.max(np.abs(fit.null_t_star(j) - t_ref)))


def main() -> int:
    import os

    data = make_data()
    total, fit_only, diagnostics = time_compare(data)
    diff = agreement()
    print(f"wild cluster bootstrap, G = {N_CLUSTERS}, n = {N_ROWS}, B = {REPLICATIONS}; load {os.getloadavg()[0]:.2f}")
    print(f"compare(..., backends=['wild'], cluster='team'): {total:.2f} s (goal <= {GOAL_SECONDS:g} s)"
          f" {'ok' if total <= GOAL_SECONDS else 'MISSED'}")
    print(f"of which: bootstrap fit {fit_only:.2f} s; variance diagnostics (run for every comparison) {diagnostics:.2f} s")
    print(f"null t* against a statsmodels refit loop (B = 99): max |diff| = {diff:.2e} (goal <= {GOAL_AGREEMENT:g})"
          f" {'ok' if diff <= GOAL_AGREEMENT else 'MISSED'}")
    return 0 if diff <= GOAL_AGREEMENT else 1


if __name__ == "__main__":
    raise SystemExit(main())
