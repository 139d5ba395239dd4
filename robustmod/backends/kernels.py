"""Numerical pieces shared by several back-ends, each written once and batched over datasets.

A single fit is a batch of one: the functions take a leading dataset axis D (or broadcast
over it), so a fit and a calibration study of D simulated outcomes run the same code.

* :func:`wald_test` — the Wald decision: t test for one restriction, F (or χ²) for several;
* :func:`leverage_one_reason` — the one message for rows whose leverage is one.
"""
from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING, Any

import numpy as np
from scipy import stats

from .hc import leverage_one_rows

if TYPE_CHECKING:  # pragma: no cover
    from ..design import Design


def batched_quadratic(r: np.ndarray, S: np.ndarray) -> np.ndarray:
    """rᵀ S⁻¹ r for a batch (… × q and … × q × q): Cholesky solves, least squares if S is not
    positive definite (a singular covariance of the restrictions)."""
    r = np.asarray(r, dtype=float)
    S = np.asarray(S, dtype=float)
    try:
        c = np.linalg.cholesky(S)
        z = np.linalg.solve(c, r[..., None])[..., 0]
        return np.einsum("...i,...i->...", z, z)
    except np.linalg.LinAlgError:
        x = (np.linalg.pinv(S) @ r[..., None])[..., 0]
        return np.einsum("...i,...i->...", r, x)


def wald_test(r: np.ndarray, S: np.ndarray, df: float | None) -> tuple[np.ndarray, np.ndarray]:
    """Statistic and p of H0: Lβ = 0 from r = Lβ̂ (D × q) and S = L V Lᵀ (D × q × q).

    One restriction: the two-sided t test, statistic t = r / √S with ``df`` degrees of freedom
    (normal when df is None). Several: the Wald F = rᵀS⁻¹r / q on (q, df) degrees of freedom,
    or χ²_q of q·F when df is None. Returns (statistic (D,), p (D,)).
    """
    r = np.atleast_2d(np.asarray(r, dtype=float))
    S = np.asarray(S, dtype=float).reshape(r.shape[0], r.shape[1], r.shape[1])
    q = r.shape[1]
    if q == 1:
        se = np.sqrt(np.maximum(S[:, 0, 0], 0.0))
        with np.errstate(divide="ignore", invalid="ignore"):
            t = np.where(se > 0, r[:, 0] / np.where(se > 0, se, 1.0), 0.0)
        dist: Any = stats.norm if df is None else stats.t(df)
        return t, 2 * dist.sf(np.abs(t))
    F = batched_quadratic(r, S) / q
    p = stats.chi2.sf(F * q, q) if df is None else stats.f.sf(F, q, df)
    return F, p


def leverage_one_reason(h: np.ndarray, what: str, row_numbers: Sequence[int] | np.ndarray | None,
                        remedy: str) -> str | None:
    """The message for rows with leverage one (hᵢ ≥ 1 − LEVERAGE_ONE_TOL), or None if there are none.

    ``what`` names the estimator that is undefined there (e.g. "HC3"); ``row_numbers`` are the
    1-based data row numbers of the design rows (default 1 … n); ``remedy`` says what to do.
    """
    ones = leverage_one_rows(h)
    if ones.size == 0:
        return None
    rows = np.asarray(row_numbers)[ones] if row_numbers is not None else ones + 1
    shown = ", ".join(str(int(r)) for r in rows[:10]) + (" …" if rows.size > 10 else "")
    return (f"{what} is undefined: data row(s) {shown} have leverage 1 "
            f"(each alone determines a coefficient); {remedy}.")


def design_row_numbers(design: Design) -> np.ndarray:
    """1-based data row numbers of the design rows (positions in the user's data), for messages."""
    return np.asarray(design.data.frame.index, dtype=int) + 1
