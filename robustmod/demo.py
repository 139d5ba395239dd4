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
