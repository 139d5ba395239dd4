"""A reduced run of the size and coverage study (validation/size_study.py).

Long & Ervin (2000) found that HC3 keeps the nominal size of t tests under heteroscedasticity in
samples where the classical test over-rejects; the reduced study must show the same direction on a
design whose error SD rises with the moderator: the classical interval of the conditional slope where
the spread is large under-covers, the HC3 one holds 95 %, and the robust tests keep their size.
"""
from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "validation"))
import size_study  # noqa: E402

pytestmark = pytest.mark.slow


def test_reduced_size_and_coverage_study():
    backends = [("ols", "ols", {}), ("hc3", "hc3", {}), ("wls (robust SE)", "wls", {"se": "robust"})]
    D = 400
    rows = {r["backend"]: r for r in size_study.run_cell(100, "moderator", "normal", D, 31, backends)}
    mc = np.sqrt(0.05 * 0.95 / D)
    assert abs(rows["hc3"]["size"] - 0.05) < 3 * mc
    assert abs(rows["wls (robust SE)"]["size"] - 0.05) < 3 * mc
    assert abs(rows["hc3"]["coverage"] - 0.95) < 3 * np.sqrt(0.95 * 0.05 / D)
    assert rows["ols"]["coverage"] < 0.95 - 3 * np.sqrt(0.95 * 0.05 / D)
    md = size_study.to_markdown(__import__("pandas").DataFrame(list(rows.values())), "check", D)
    assert "| hc3 |" in md and "moderator" in md
