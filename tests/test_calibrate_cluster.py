"""Calibration on clustered rows: the simulated datasets keep the clusters and carry cluster intercepts."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from robustmod.calibrate import calibrate, cluster_intercept_model
from robustmod.demo import TEAM_CLUSTER, TEAM_FOCAL, TEAM_FORMULA, TEAM_MODERATOR, team_data
from robustmod.design import build_design
from robustmod.spec import ModelSpec


def _clustered(tau: float, seed: int = 3, G: int = 60, m: int = 12) -> pd.DataFrame:
    # Invented data with a known truth: cluster intercepts of SD tau, within-cluster SD 1.
    rng = np.random.default_rng(seed)
    g = np.repeat(np.arange(G), m)
    x, w = rng.normal(size=G * m), rng.normal(size=G)[g]
    y = 1 + 0.5 * x + 0.3 * w + tau * rng.normal(size=G)[g] + rng.normal(size=G * m)
    return pd.DataFrame({"y": y, "x": x, "w": w, "g": g})


@pytest.mark.parametrize("tau", [0.0, 0.7])
def test_cluster_intercept_sd_recovers_the_truth(tau):
    # Known-truth simulation (invented data): the moment estimate of the intercept SD is near the truth
    # and the total variance per row is kept (common practice, no source).
    design = build_design(_clustered(tau), ModelSpec("y ~ x * w", "x", ("w",), cluster="g"))
    beta = np.linalg.lstsq(design.X, design.y, rcond=None)[0]
    total = np.full(design.n_obs, np.sqrt(1 + tau**2))
    within, tau_hat = cluster_intercept_model(design, beta, total)
    assert tau_hat == pytest.approx(tau, abs=0.15)
    np.testing.assert_allclose(within**2 + tau_hat**2, total**2)


def test_clustered_calibration_separates_row_level_and_cluster_robust_tests():
    # Invented data (team demo). With cluster intercepts in the simulated data, HC3 treats the rows
    # as independent and rejects a true null more often than CR2 (Cameron & Miller 2015, the
    # cluster-level moderator case); CR2's rate stays within 3 Monte Carlo SEs of alpha.
    design = build_design(team_data(), ModelSpec(TEAM_FORMULA, TEAM_FOCAL, (TEAM_MODERATOR,), cluster=TEAM_CLUSTER))
    cal = calibrate(design, ["hc3", "cr2"], n_datasets=300, seed=11, workers=1, power=False)
    fp = cal["false_positive_rate"]
    assert "cluster intercepts" in cal["simulated_from"]
    assert fp["hc3"]["rate"] > fp["cr2"]["rate"]
    assert abs(fp["cr2"]["rate"] - 0.05) < 3 * cal["nominal_mc_se"]
    again = calibrate(design, ["cr2"], n_datasets=50, seed=11, workers=1, power=False)
    first = calibrate(design, ["cr2"], n_datasets=50, seed=11, workers=1, power=False)
    assert again["false_positive_rate"] == first["false_positive_rate"]  # seeded
