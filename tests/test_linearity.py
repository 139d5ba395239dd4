"""The binning check of the interaction's linearity (Hainmueller, Mummolo & Xu 2019)."""
from __future__ import annotations

import dataclasses
import json

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from robustmod.design import build_design
from robustmod.errors import InputError
from robustmod.linearity import binning_check
from robustmod.spec import ModelSpec


def _frame(rng: np.random.Generator, n: int, slope_of_w) -> pd.DataFrame:
    """Invented data for simulations with a known truth: the focal slope is slope_of_w(w)."""
    x = rng.normal(size=n)
    w = rng.uniform(-2, 2, n)
    z = rng.normal(size=n)
    y = 1 + 0.5 * w + 0.3 * z + slope_of_w(w) * x + rng.normal(size=n)
    return pd.DataFrame({"y": y, "x": x, "w": w, "z": z})


def _design(df: pd.DataFrame, formula: str = "y ~ x * w + z"):
    return build_design(df, ModelSpec(formula=formula, focal="x", moderators=("w",)))


def _binning_regression(df: pd.DataFrame):
    """The binning model written out by hand with pandas and fitted by statsmodels (HC3)."""
    b = pd.qcut(df["w"], 3, labels=False).to_numpy()
    med = df.groupby(b)["w"].median().to_numpy()
    G = np.eye(3)[b]
    wc = df["w"].to_numpy() - med[b]
    x = df["x"].to_numpy()
    X = np.column_stack([G, G * x[:, None], G * wc[:, None], G * (wc * x)[:, None], df["z"]])
    return sm.OLS(df["y"].to_numpy(), X).fit(cov_type="HC3"), med


def test_per_bin_slopes_and_wald_test_match_statsmodels():
    df = _frame(np.random.default_rng(1), 300, lambda w: 1 + 0.3 * w**2)
    out = binning_check(_design(df))
    res, med = _binning_regression(df)
    # Reference library: statsmodels OLS with HC3 covariance on the hand-built binning model.
    np.testing.assert_allclose([b["median"] for b in out["bins"]], med, rtol=1e-12)
    np.testing.assert_allclose([b["estimate"] for b in out["bins"]], res.params[3:6], rtol=1e-9)
    np.testing.assert_allclose([b["se"] for b in out["bins"]], res.bse[3:6], rtol=1e-8)
    # The linear model as restrictions on the binning model (mu_j and alpha_j linear in x_j
    # with slopes eta and beta, eta_j and beta_j equal), tested with statsmodels' wald_test.
    R = np.zeros((8, 13))
    for r, (a, b) in enumerate([(7, 6), (8, 6), (10, 9), (11, 9)]):
        R[r, a], R[r, b] = 1, -1
    for r, j in enumerate([1, 2]):
        dx = med[j] - med[0]
        R[4 + r, [j, 0, 6]] = [1, -1, -dx]      # mu_j − mu_1 − eta_1 (x_j − x_1)
        R[6 + r, [3 + j, 3, 9]] = [1, -1, -dx]  # alpha_j − alpha_1 − beta_1 (x_j − x_1)
    wt = res.wald_test(R, use_f=True, scalar=True)
    assert out["wald"]["df"][0] == 8  # 4(J − 1) restrictions for J = 3 bins
    assert out["wald"]["statistic"] == pytest.approx(float(wt.statistic), rel=1e-7)
    assert out["wald"]["p"] == pytest.approx(float(wt.pvalue), rel=1e-6)


def test_linear_prediction_matches_statsmodels_hc3():
    df = _frame(np.random.default_rng(2), 250, lambda w: 1 + 0.5 * w)
    out = binning_check(_design(df))
    # Reference library: statsmodels OLS of the linear-interaction model, slope b_x + b_xw·w at the medians.
    res = sm.OLS.from_formula("y ~ x * w + z", df).fit(cov_type="HC3", use_t=True)
    for b in out["bins"]:
        L = np.zeros(len(res.params))
        L[list(res.params.index).index("x")] = 1.0
        L[list(res.params.index).index("x:w")] = b["median"]
        assert b["linear_prediction"] == pytest.approx(float(L @ res.params), rel=1e-9)
        ci = np.asarray(res.t_test(L).conf_int())[0]  # t(n − k) interval, as robustmod's HC3
        np.testing.assert_allclose(b["linear_ci"], ci, rtol=1e-8)


@pytest.mark.slow
def test_flags_quadratic_but_not_linear_interactions_over_repeated_datasets():
    # Simulation with a known truth (invented data), seeded: 100 datasets of n = 300 each, the
    # predictors drawn once and y redrawn (the binning check only reads y anew).
    rng = np.random.default_rng(20190101)
    base = _frame(rng, 300, lambda w: 0 * w)
    d = _design(base)
    mean = 1 + 0.5 * base.w + 0.3 * base.z
    flagged = {"linear": 0, "quadratic": 0}
    truths = {"linear": lambda w: 1 + 0.5 * w, "quadratic": lambda w: 1 + 0.5 * w**2}
    reps = 100
    for name, slope in truths.items():
        Y = (mean + slope(base.w) * base.x).to_numpy()[:, None] + rng.normal(size=(300, reps))
        for j in range(reps):  # one dataset per pass
            out = binning_check(dataclasses.replace(d, y=Y[:, j]))
            flagged[name] += bool(out["nonlinear"])
    # A level-0.05 test: under linearity about 5 of 100 flags (P(X > 11) < 0.5% for Binomial(100, .05));
    # the quadratic slope differs from the linear fit by about 0.7 at the outer bin medians.
    print("binning flags over 100 datasets:", flagged)
    assert flagged["linear"] <= 11, flagged
    assert flagged["quadratic"] >= 90, flagged


def test_thin_bins_and_lack_of_common_support_are_flagged():
    rng = np.random.default_rng(3)
    n = 300
    w = rng.uniform(0, 10, n)
    x = np.where(w > np.quantile(w, 2 / 3), rng.normal(0, 0.05, n), rng.normal(0, 1, n))
    y = 1 + x + 0.2 * w + 0.1 * x * w + rng.normal(size=n)
    d = _design(pd.DataFrame({"y": y, "x": x, "w": w, "z": rng.normal(size=n)}))
    out = binning_check(d)
    assert [b["low_focal_variation"] for b in out["bins"]] == [False, False, True]
    assert out["low_focal_variation"] and not out["thin_bins"]
    assert any("common support" in note for note in out["notes"])
    cuts = [float(np.quantile(w, 0.4)), float(np.quantile(w, 0.95))]
    thin = binning_check(d, bins=cuts)
    assert [b["thin"] for b in thin["bins"]] == [False, False, True]
    assert thin["bins"][2]["n"] == int((w > cuts[1]).sum())
    json.dumps(thin.to_dict(), allow_nan=False)


def test_a_clean_linear_design_raises_no_flags():
    d = _design(_frame(np.random.default_rng(4), 400, lambda w: 1 + 0.5 * w))
    out = binning_check(d)
    assert not out["thin_bins"] and not out["low_focal_variation"]
    assert all(not b["outside"] for b in out["bins"])
    # Tercile cut points as numpy's default (linear) quantiles; common practice, no source.
    assert out["cut_points"] == pytest.approx(list(np.quantile(d.moderators["w"].values, [1 / 3, 2 / 3])))


def test_more_bins_give_more_restrictions():
    d = _design(_frame(np.random.default_rng(5), 400, lambda w: 1 + 0.5 * w))
    out = binning_check(d, bins=4)
    assert len(out["bins"]) == 4 and out["wald"]["df"][0] == 12
    assert sum(b["n"] for b in out["bins"]) == d.n_obs


def test_categorical_moderator_gives_none_and_bad_bins_give_input_errors():
    rng = np.random.default_rng(6)
    df = pd.DataFrame({"x": rng.normal(size=60), "g": np.tile(["a", "b"], 30)})
    df["y"] = df.x + rng.normal(size=60)
    dc = build_design(df, ModelSpec(formula="y ~ x * C(g)", focal="x", moderators=("g",)))
    assert binning_check(dc) is None
    with pytest.raises(InputError, match="continuous moderator"):
        binning_check(dc, moderator="g")
    d = _design(_frame(rng, 120, lambda w: 1 + w))
    with pytest.raises(InputError, match="'bins' option"):
        binning_check(d, bins=1)
    with pytest.raises(InputError, match="'bins' option"):
        binning_check(d, bins=[1.0, 0.0])
    with pytest.raises(InputError, match="inside the observed range"):
        binning_check(d, bins=[-50.0, 0.0])
    with pytest.raises(InputError, match="'alpha' option"):
        binning_check(d, alpha=0)
