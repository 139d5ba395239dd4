"""The Bayesian back-end with cluster intercepts against ML fits of the same mixed models."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf

from robustmod.backends.bayes import BayesBackend
from robustmod.demo import TEAM_CLUSTER, TEAM_FOCAL, TEAM_FORMULA, TEAM_MODERATOR, team_data
from robustmod.design import build_design
from robustmod.spec import ModelSpec

#: R 4.2.2, nlme 3.1.162; produced by tests/reference/bayes_cluster_reference.R from team_data().
REFERENCE = Path(__file__).parent / "reference" / "bayes_cluster_reference.csv"
PRODUCT = f"{TEAM_FOCAL}:{TEAM_MODERATOR}"


def _reference(model: str, quantity: str, term: str) -> float:
    ref = pd.read_csv(REFERENCE, comment="#")
    row = ref[(ref.model == model) & (ref.quantity == quantity) & (ref.term == term)]
    return float(row.value.iloc[0])


def _mixedlm():
    # Invented data (team demo) fitted by statsmodels MixedLM, ML, team random intercepts, constant variance.
    return smf.mixedlm(TEAM_FORMULA, team_data(), groups=team_data()[TEAM_CLUSTER]).fit(reml=False)


def test_stored_nlme_constant_fit_agrees_with_statsmodels():
    # Source: R nlme::lme(method = "ML") (stored) against statsmodels MixedLM (ML): the same model, so the
    # stored reference is read as intended before the sampler is checked against it.
    m = _mixedlm()
    assert m.fe_params[PRODUCT] == pytest.approx(_reference("constant", "estimate", PRODUCT), rel=1e-4)
    assert np.sqrt(float(m.cov_re.iloc[0, 0])) == pytest.approx(_reference("constant", "intercept_sd", "team"),
                                                                 rel=1e-3)


@pytest.mark.slow
def test_cluster_intercepts_sit_near_the_ml_mixed_model():
    # Sources: R nlme::lme with team intercepts and the exponential variance function
    # varComb(varExp(~workload), varExp(~team_support)) — the back-end's log-linear variance function —
    # fitted by ML (stored), and statsmodels MixedLM for the constant-variance fit. With 673 rows the
    # posterior mean of the product term should sit within a fraction of a posterior SD of the ML estimate.
    design = build_design(team_data(), ModelSpec(TEAM_FORMULA, TEAM_FOCAL, (TEAM_MODERATOR,), cluster=TEAM_CLUSTER))
    fit = BayesBackend(draws=500, tune=500, chains=2).fit(design, seed=3)
    j = design.term_names.index(PRODUCT)
    est = fit.coefficients(0.05)
    post_mean, post_sd = est.estimate[j], est.se[j]
    assert abs(post_mean - _reference("exponential", "estimate", PRODUCT)) < 0.3 * post_sd
    assert abs(post_mean - _mixedlm().fe_params[PRODUCT]) < 0.3 * post_sd
    assert post_sd == pytest.approx(_reference("exponential", "se", PRODUCT), rel=0.15)
    ci = fit.extras["cluster_intercepts"]
    assert ci["intercept_sd"]["ci"][0] < _reference("exponential", "intercept_sd", "team") < ci["intercept_sd"]["ci"][1]
    assert 0 < ci["icc"]["ci"][0] < ci["icc"]["mean"] < ci["icc"]["ci"][1] < 1
    assert fit.extras["n_clusters"] == 36 and fit.label.endswith("+ cluster intercepts")
    keys = {t.key for t in fit.report_tables()}
    assert {"bayes.clusters", "bayes.convergence", "bayes.sampler"} <= keys
    assert fit.extras["diagnostics"]["max_rhat"] is not None
