"""The invented team scenario: row-level (HC3) and cluster-robust (CR2) inference disagree as designed."""
from __future__ import annotations

import numpy as np

import robustmod
from robustmod.backends.cluster import ClusterBackend
from robustmod.backends.ols import OLSBackend
from robustmod.demo import (
    TEAM_CLUSTER,
    TEAM_FOCAL,
    TEAM_FORMULA,
    TEAM_MODERATOR,
    team_data,
)
from robustmod.design import build_design
from robustmod.spec import ModelSpec


def test_team_demo_verdict_changes_with_clustering():
    # Invented data (demo): HC3 supports the product term at 0.05, CR2 with Satterthwaite df does not.
    data = team_data()
    assert data.shape == (673, 4) and data[TEAM_CLUSTER].nunique() == 36
    res = robustmod.compare(data, TEAM_FORMULA, TEAM_FOCAL, TEAM_MODERATOR, backends=["hc3", "cr2", "wild"],
                            cluster=TEAM_CLUSTER, options={"wild": {"replications": 999}})
    hc3, cr2 = res.results["hc3"].interaction, res.results["cr2"].interaction
    assert hc3["supported"] and hc3["p"] < 0.05
    assert not cr2["supported"] and cr2["p"] > 0.05
    assert cr2["se"] > 1.1 * hc3["se"]
    assert not res.results["wild"].interaction["supported"]  # the wild cluster bootstrap agrees with CR2
    assert any("'team_support' is at the cluster level" in w for w in res.design.warnings)


def test_team_scenario_hc_standard_errors_are_too_small_on_average():
    # Known-truth simulation (invented data): with team-specific slopes the rows of a team are dependent,
    # so the CR2 SE of the product term exceeds the HC3 SE in most samples (common practice, no source).
    spec = ModelSpec(TEAM_FORMULA, TEAM_FOCAL, (TEAM_MODERATOR,), cluster=TEAM_CLUSTER)
    ratios = []
    for seed in range(30):
        design = build_design(team_data(seed=1000 + seed), spec)
        L = design.interaction_rows()
        h = OLSBackend(id="hc3").fit(design).estimate(L, 0.05)
        c = ClusterBackend(id="cr2").fit(design).estimate(L, 0.05)
        ratios.append(c.se[0] / h.se[0])
    assert np.median(ratios) > 1.2
    assert np.mean(np.array(ratios) > 1.0) > 0.8
