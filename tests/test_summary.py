"""The robustness summary: which back-ends support the product term and what the sentence claims.

The sentence must not overclaim (common practice of careful reporting, no source): a finding only the
classical test supports is called out as such, and a primary that is not supported gives no verdict of
robustness.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

import robustmod


def fanning_data(seed: int = 35, n: int = 60) -> pd.DataFrame:
    """Error SD growing with x·w; the seed gives a sample where only the classical test rejects."""
    rng = np.random.default_rng(seed)
    x, w = rng.uniform(0, 3, n), rng.uniform(0, 3, n)
    y = 1 + x + w + 0.15 * x * w + rng.normal(size=n) * (0.2 + x * w)
    return pd.DataFrame({"y": y, "x": x, "w": w})


def test_only_classical_support_is_called_out():
    res = robustmod.compare(fanning_data(), "y ~ x * w", "x", "w", backends=["ols", "hc3"])
    s = res.summary
    assert s["supported_by"] == ["ols"] and s["not_supported_by"] == ["hc3"]
    assert not s["survives"] and not s["primary_supported"]
    assert "Only ols, which assumes constant variance, supports it" in s["sentence"]
    assert "does not support it" in s["sentence"]
    assert "not to causation" in s["sentence"]


def test_primary_supported_but_not_everywhere_is_reported_as_sensitive():
    res = robustmod.compare(fanning_data(), "y ~ x * w", "x", "w", backends=["ols", "hc3"], primary="ols")
    s = res.summary
    assert s["primary_supported"] and not s["survives"]
    assert "sensitive to the variance assumption" in s["sentence"]


def test_unreliable_back_end_is_listed_not_counted():
    d = pd.DataFrame({"y": [1.0, 2.1, 2.9, 4.2, 5.1, 6.3, 9.0, 3.3], "x": [1.0, 2, 3, 4, 5, 6, 7, 2.5],
                      "w": [0.0, 1, 0, 1, 0, 1, 0, 1], "g": [0, 0, 0, 0, 0, 0, 1, 0]})
    # Row 7 alone has g = 1 (leverage 1): HC3 is undefined and HC0, built from that row's zero
    # residual, is degenerate there; neither is counted (common practice, no source).
    res = robustmod.compare(d, "y ~ x * w + g", "x", "w", backends=["hc0", "hc3"], primary="hc0")
    s = res.summary
    assert s["unreliable"] == ["hc0", "hc3"]
    assert not s["supported_by"] + s["not_supported_by"] and not s["survives"]
    assert "Not counted" in s["sentence"]
    assert set(s) >= {"relative_change_of_estimate", "relative_change_of_interval_width", "boundary_shift"}
