"""Effects every back-end answers through its Fit: the interaction test, conditional
slopes of the focal predictor at probe values, and the Johnson–Neyman significance
region along a moderator (Johnson & Neyman 1936; Bauer & Curran 2005).

For a Wald fit whose slope is linear in the moderator, θ(w) = a + b·w with
Var θ(w) = v₀₀ + 2w·v₀₁ + w²·v₁₁, the boundaries solve the quadratic
(a + bw)² = c²·Var θ(w) with c = t_{1−α/2, df} (pointwise) or the Scheffé-type
c = sqrt(2·F_{2, df; 1−α}) for a simultaneous band (Potthoff 1964). Every other fit
kind (and non-linear slopes) uses a grid plus Brent root refinement of the margin
max(lower, −upper), which is positive exactly where the interval excludes zero. Both report
boundaries inside one search window, the observed range widened by half its width on each side
(docs/methods.md), so back-ends that agree look as if they agree.
"""
from __future__ import annotations

import math
from typing import Any

import numpy as np
from scipy import optimize

from .backends.base import Fit, WaldFit
from .defaults import CURVE_POINTS
from .design import Design
from .jsonvalues import num

#: Grid points of the general region search.
GRID_POINTS = 241
#: Every back-end looks for region boundaries over the observed moderator range widened by this
#: share of its width on each side (:func:`search_window`); beyond it a region is extrapolation.
SEARCH_EXTENSION = 0.5
GRID_2D = 41


def _point(est: Any, i: int) -> dict[str, Any]:
    out: dict[str, Any] = {
        "estimate": num(est.estimate[i]),
        "se": num(est.se[i]),
        "ci": [num(est.lower[i]), num(est.upper[i])],
        "p": None if est.p is None else num(est.p[i]),
    }
    if "df" in est.extra:  # per-row degrees of freedom (e.g. Satterthwaite)
        out["df"] = num(est.extra["df"][i])
    if "prob_positive" in est.extra:
        out["prob_positive"] = num(est.extra["prob_positive"][i])
    return out


def interaction(fit: Fit, design: Design, alpha: float) -> dict[str, Any]:
    """The product term: its estimate and interval (one term) or the joint test (several).

    The test is asked for by name (H0: every product-term coefficient is zero), so a back-end
    that imposes the null (the wild bootstrap) answers with that test; its p decides, and a
    posterior (no p) decides by its interval.
    """
    terms = list(design.interaction_terms)
    test = fit.test_coefficients(design.interaction_columns, alpha)
    if len(terms) == 1:
        est = fit.estimate(design.interaction_rows(), alpha)
        out = {"terms": terms, **_point(est, 0)}
        out["p"] = num(test.p) if test.p is not None else out["p"]
        return {**out, "supported": test.supported, "interval": est.interval, "level": est.level}
    return {"terms": terms, "estimate": None, "se": None, "ci": None, "p": num(test.p),
            "supported": test.supported, "joint_test": {"statistic": num(test.statistic), "df_num": test.df_num,
                                                          "df_den": num(test.df_den), "method": test.method}}


def conditional_effects(fit: Fit, design: Design, alpha: float) -> list[dict[str, Any]]:
    """Conditional effect of the focal predictor at each probe point (raw moderator scale)."""
    points = list(design.probe_points)
    est = fit.estimate(design.slope_rows(points), alpha)
    out = []
    for i, pt in enumerate(points):
        row = {"at": {k: (num(v) if isinstance(v, (int, float)) and not isinstance(v, bool) else v) for k, v in pt.items()},
               **_point(est, i), "significant": bool(est.significant[i])}
        row["within_observed"] = all(
            design.moderators[m].categorical or design.moderators[m].minimum <= v <= design.moderators[m].maximum
            for m, v in pt.items()
        )
        out.append(row)
    return out


def _intervals_from_mask(grid: np.ndarray, sig: np.ndarray, roots: list[float]) -> list[list[float | None]]:
    """Significant stretches of the grid; stretches touching the search edge stay open (None)."""
    intervals: list[list[float | None]] = []
    i = 0
    n = len(grid)
    while i < n:
        if not sig[i]:
            i += 1
            continue
        j = i
        while j + 1 < n and sig[j + 1]:
            j += 1
        lo = None if i == 0 else _nearest(roots, grid[i - 1], grid[i])
        hi = None if j == n - 1 else _nearest(roots, grid[j], grid[j + 1])
        intervals.append([lo, hi])
        i = j + 1
    return intervals


def _nearest(roots: list[float], a: float, b: float) -> float:
    inside = [r for r in roots if a <= r <= b]
    return float(inside[0]) if inside else float(0.5 * (a + b))


def _closed_form(fit: WaldFit, L0: np.ndarray, L1: np.ndarray, crit: float, centre: float = 0.0,
                 span: float = 1.0) -> tuple[list[float], list[list[float | None]]]:
    """Roots of (a + bw)² = c²·Var θ(w), solved in u = (w − centre)/span so that the three
    coefficients have comparable magnitudes whatever the scale of w."""
    L0 = L0 + centre * L1
    L1 = span * L1
    a, b = float(L0 @ fit.params), float(L1 @ fit.params)
    V = fit.cov
    v00, v01, v11 = float(L0 @ V @ L0), float(L0 @ V @ L1), float(L1 @ V @ L1)
    c2 = crit * crit
    A, B, C = b * b - c2 * v11, 2 * (a * b - c2 * v01), a * a - c2 * v00
    back = lambda u: centre + span * u  # noqa: E731
    if abs(A) <= 1e-12 * (b * b + c2 * v11):  # linear: B u + C > 0
        if abs(B) <= 1e-12 * (abs(a * b) + c2 * abs(v01)) or B == 0:
            return [], ([[None, None]] if C > 0 else [])
        r = back(-C / B)
        return [r], ([[r, None]] if B > 0 else [[None, r]])
    disc = B * B - 4 * A * C
    if disc <= 0:
        return [], ([[None, None]] if A > 0 else [])
    sq = math.sqrt(disc)
    # Numerically stable roots of A u² + B u + C.
    qv = -0.5 * (B + math.copysign(sq, B))
    r1, r2 = sorted(back(u) for u in ([qv / A, C / qv] if qv != 0 else [-B / (2 * A)] * 2))
    if A > 0:
        return [r1, r2], [[None, r1], [r2, None]]
    return [r1, r2], [[r1, r2]]


def search_window(info: Any) -> tuple[float, float]:
    """The moderator values every back-end searches for region boundaries: the observed range
    widened by SEARCH_EXTENSION of its width on each side (one unit each side if constant)."""
    span = (info.maximum - info.minimum) or 1.0
    return info.minimum - SEARCH_EXTENSION * span, info.maximum + SEARCH_EXTENSION * span


def _clip_to_window(intervals: list[list[float | None]], window: tuple[float, float]) -> list[list[float | None]]:
    """Significant intervals restricted to the window; an end at or beyond the window edge stays open (None)."""
    out: list[list[float | None]] = []
    for lo, hi in intervals:
        lo_v = -np.inf if lo is None else lo
        hi_v = np.inf if hi is None else hi
        if hi_v < window[0] or lo_v > window[1]:
            continue
        out.append([None if lo_v <= window[0] else lo, None if hi_v >= window[1] else hi])
    return out


def _grid_region(fit: Fit, design: Design, alpha: float, moderator: str, fixed: dict[str, Any],
                 band: str, window: tuple[float, float], lin: tuple[np.ndarray, np.ndarray] | None
                 ) -> tuple[list[float], list[list[float | None]], str]:
    """Roots of the margin on a grid over the window: Brent-refined (pointwise) or interpolated (band).

    A slope linear in the moderator is answered along the fit's :meth:`Fit.along` line, so a
    bootstrap reads its replicates once for the grid and every refinement step.
    """
    grid = np.linspace(window[0], window[1], GRID_POINTS)
    line = fit.along(*lin) if lin is not None else None

    def rows_estimate(w: np.ndarray, simultaneous: bool = False) -> Any:
        if line is not None:
            return line.estimate(w, alpha, simultaneous=simultaneous)
        return fit.estimate(design.slope_rows_along(moderator, w, fixed), alpha, simultaneous=simultaneous)

    roots: list[float] = []
    est = rows_estimate(grid, band == "simultaneous")
    margin = np.maximum(est.lower, -est.upper)
    if band == "simultaneous":
        for i in np.flatnonzero(np.sign(margin[:-1]) != np.sign(margin[1:])):
            t = margin[i] / (margin[i] - margin[i + 1])
            roots.append(float(grid[i] + t * (grid[i + 1] - grid[i])))
        method = "grid, simultaneous band, linear interpolation"
    else:
        def f(w: float) -> float:
            e = rows_estimate(np.array([w]))
            return float(max(e.lower[0], -e.upper[0]))

        xtol = 1e-10 * max(1.0, abs(window[1] - window[0]))
        for i in np.flatnonzero(np.sign(margin[:-1]) != np.sign(margin[1:])):
            if margin[i] == 0:
                roots.append(float(grid[i]))
                continue
            try:
                roots.append(float(optimize.brentq(f, grid[i], grid[i + 1], xtol=xtol)))
            except ValueError:
                roots.append(float(0.5 * (grid[i] + grid[i + 1])))
        method = "grid with Brent root refinement"
    return roots, _intervals_from_mask(grid, margin > 0, roots), method


def significance_region(fit: Fit, design: Design, alpha: float, *, moderator: str | None = None,
                        fixed: dict[str, Any] | None = None, band: str = "pointwise",
                        linear: tuple[tuple[np.ndarray, np.ndarray] | None] | None = None) -> dict[str, Any] | None:
    """Johnson–Neyman region of the focal slope along ``moderator`` (first continuous one by default).

    ``band`` is "pointwise" (each w tested alone) or "simultaneous" (a band over all w).
    ``linear`` may carry ``(design.slope_is_linear_in(moderator, fixed),)`` already computed, for
    callers that ask several fits about one design (the grid).
    Every back-end reports boundaries inside the same :func:`search_window`; closed-form roots
    beyond it are listed under ``boundaries_outside_window``. Returns None when no moderator is
    continuous.
    """
    conts = design.continuous_moderators
    if moderator is None:
        if not conts:
            return None
        moderator = conts[0]
    info = design.moderators[moderator]
    if info.categorical:
        return None
    assert info.minimum is not None and info.maximum is not None  # a continuous moderator has its range
    fixed = dict(fixed or {})
    window = search_window(info)
    lin = design.slope_is_linear_in(moderator, fixed) if linear is None else linear[0]
    outside: list[float] = []
    if isinstance(fit, WaldFit) and lin is not None:
        crit = fit.critical_value(alpha, rank=2 if band == "simultaneous" else 1)
        span = (info.maximum - info.minimum) or 1.0
        roots, intervals = _closed_form(fit, lin[0], lin[1], crit, 0.5 * (info.minimum + info.maximum), span)
        outside = [r for r in roots if not window[0] <= r <= window[1]]
        roots = [r for r in roots if window[0] <= r <= window[1]]
        intervals = _clip_to_window(intervals, window)
        method = "closed form (quadratic)"
    else:
        roots, intervals, method = _grid_region(fit, design, alpha, moderator, fixed, band, window, lin)
    roots = sorted(roots)
    obs = (info.minimum, info.maximum)
    return {
        "moderator": moderator,
        "band": band,
        "level": 1 - alpha,
        "boundaries": [num(r) for r in roots],
        "boundaries_detail": [{"value": num(r), "within_observed": bool(obs[0] <= r <= obs[1]),
                               "inside_observed": bool(obs[0] <= r <= obs[1])} for r in roots],
        "boundaries_outside_window": [num(r) for r in sorted(outside)],
        "significant_intervals": [[num(lo) if lo is not None else None, num(hi) if hi is not None else None]
                                  for lo, hi in intervals],
        "observed_range": [num(obs[0]), num(obs[1])],
        "search_window": [num(window[0]), num(window[1])],
        "search_window_rule": f"observed range widened by {SEARCH_EXTENSION:.0%} of its width on each side",
        "search_range": [num(window[0]), num(window[1])],
        "share_of_observed_significant": num(_share_observed(intervals, info.values)),
        "fixed": {k: (num(v) if isinstance(v, float) else v) for k, v in fixed.items()},
        "method": method,
    }


def _share_observed(intervals: list[list[float | None]], values: np.ndarray | None) -> float | None:
    """Share of observed moderator values that fall inside a significant interval."""
    if values is None or len(values) == 0:
        return None
    inside = np.zeros(len(values), dtype=bool)
    for lo, hi in intervals:
        lo_v = -np.inf if lo is None else lo
        hi_v = np.inf if hi is None else hi
        inside |= (values >= lo_v) & (values <= hi_v)
    return float(inside.mean())


def regions_by_other(fit: Fit, design: Design, alpha: float, band: str = "pointwise") -> list[dict[str, Any]]:
    """With two moderators: the region along the first continuous one at each probe value of the other."""
    conts = design.continuous_moderators
    if len(design.moderators) < 2 or not conts:
        return []
    along = conts[0]
    other = next(m for m in design.moderators if m != along)
    values = sorted({pt[other] for pt in design.probe_points}, key=lambda v: (str(type(v)), v))
    return [r for v in values if (r := significance_region(fit, design, alpha, moderator=along, fixed={other: v}, band=band))]


def slope_grid(fit: Fit, design: Design, alpha: float, points: int = GRID_2D) -> dict[str, Any] | None:
    """Conditional slope over a grid of two continuous moderators, with the significant cells."""
    conts = design.continuous_moderators
    if len(conts) < 2:
        return None
    m1, m2 = conts[:2]
    i1, i2 = design.moderators[m1], design.moderators[m2]
    g1 = np.linspace(*i1.observed_range(), points)
    g2 = np.linspace(*i2.observed_range(), points)
    W1, W2 = np.meshgrid(g1, g2, indexing="ij")
    pts = [{m1: float(a), m2: float(b)} for a, b in zip(W1.ravel(), W2.ravel(), strict=False)]
    est = fit.estimate(design.slope_rows(pts), alpha)
    shape = (points, points)
    return {
        "moderators": [m1, m2],
        "values": [[num(v) for v in g1], [num(v) for v in g2]],
        "estimate": np.round(est.estimate.reshape(shape), 12).tolist(),
        "significant": est.significant.reshape(shape).tolist(),
        "level": 1 - alpha,
    }


def slope_curve(fit: Fit, design: Design, alpha: float, points: int = CURVE_POINTS) -> dict[str, Any] | None:
    """Conditional slope with pointwise interval along the first continuous moderator over its
    observed range (other moderators at reference) — the table the slope figure draws."""
    conts = design.continuous_moderators
    if not conts:
        return None
    m = conts[0]
    info = design.moderators[m]
    grid = np.linspace(*info.observed_range(), points)
    lin = design.slope_is_linear_in(m)
    est = fit.along(*lin).estimate(grid, alpha) if lin is not None else fit.estimate(design.slope_rows_along(m, grid), alpha)
    return {"moderator": m, "values": [num(v) for v in grid], "estimate": [num(v) for v in est.estimate],
            "lower": [num(v) for v in est.lower], "upper": [num(v) for v in est.upper], "level": 1 - alpha}
