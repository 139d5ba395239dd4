"""The built-in demo scenario. INVENTED DATA — no real trial, farm or person.

An imaginary field trial: 240 plots receive a fertiliser dose (0–12 units), soil
moisture is measured (10–40 %), and grain yield (t/ha) is recorded. The yield response
to fertiliser grows with soil moisture (the moderation effect), and plot-to-plot spread
grows with the dose (the fan-out a reviewer worries about). Generated from a seed, so
the demo needs no files.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

DEMO_FORMULA = "grain_yield ~ fertiliser * soil_moisture + field_slope"
DEMO_FOCAL = "fertiliser"
DEMO_MODERATOR = "soil_moisture"
DEMO_SEED = 20240917


def demo_data(n: int = 240, seed: int = DEMO_SEED) -> pd.DataFrame:
    """Invented field-trial data: yield = 3 − 0.12·dose + 0.03·moisture + 0.009·dose·moisture − 0.4·slope + ε,
    with SD(ε) = 0.2 + 0.15·dose (spread grows with the dose)."""
    rng = np.random.default_rng(seed)
    fertiliser = rng.uniform(0, 12, n).round(1)
    soil_moisture = rng.uniform(10, 40, n).round(1)
    field_slope = rng.gamma(2.0, 1.0, n).round(2)
    sd = 0.2 + 0.15 * fertiliser
    grain_yield = (3.0 - 0.12 * fertiliser + 0.03 * soil_moisture + 0.009 * fertiliser * soil_moisture
                   - 0.4 * field_slope + rng.normal(0, 1, n) * sd)
    return pd.DataFrame({
        "plot": np.arange(1, n + 1),
        "grain_yield": grain_yield.round(3),
        "fertiliser": fertiliser,
        "soil_moisture": soil_moisture,
        "field_slope": field_slope,
    })


# ---- a second invented scenario: clustered rows -------------------------------------------------
TEAM_FORMULA = "wellbeing ~ workload * team_support"
TEAM_FOCAL = "workload"
TEAM_MODERATOR = "team_support"
TEAM_CLUSTER = "team"
#: The seed of the invented sample; chosen so that the sample shows the verdict change the scenario
#: is about (HC3 supports the product term, CR2 with Satterthwaite df does not).
TEAM_SEED = 167


def team_data(n_teams: int = 36, n: int = 673, seed: int = TEAM_SEED) -> pd.DataFrame:
    """INVENTED DATA — no real organisation or person. Employees nested in teams.

    Each of ``n_teams`` teams (8 or more members, ``n`` in all) has a team-level support score;
    each employee a workload score (person level, with a team component). Wellbeing =
    3 − 0.3·workload + 0.2·support + 0.12·workload·support + u_team + v_team·workload + ε with a
    team intercept u (SD 0.5), a team-specific workload slope v (SD 0.22) and
    SD(ε) = 0.8·(1 + 0.2·|workload|). The team slopes make rows of a team dependent, so
    row-level (HC) standard errors of the product term are too small and cluster-robust ones
    (CR2) are not.
    """
    rng = np.random.default_rng(seed)
    sizes = 8 + rng.multinomial(n - 8 * n_teams, np.full(n_teams, 1.0 / n_teams))
    team = np.repeat(np.arange(n_teams), sizes)
    support = rng.normal(0, 1, n_teams).round(2)[team]
    workload = (rng.normal(0, 1, n) + rng.normal(0, 0.5, n_teams)[team]).round(2)
    intercept = rng.normal(0, 0.5, n_teams)[team]
    slope = rng.normal(0, 0.22, n_teams)[team]
    noise = rng.normal(0, 0.8, n) * (1 + 0.2 * np.abs(workload))
    wellbeing = 3 - 0.3 * workload + 0.2 * support + 0.12 * workload * support + intercept + slope * workload + noise
    return pd.DataFrame({
        "team": [f"T{t + 1:02d}" for t in team],
        "wellbeing": wellbeing.round(3),
        "workload": workload,
        "team_support": support,
    })
