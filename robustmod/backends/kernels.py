"""Numerical pieces shared by several back-ends, each written once and batched over datasets.

A single fit is a batch of one: the functions take a leading dataset axis D (or broadcast
over it), so a fit and a calibration study of D simulated outcomes run the same code.

* :func:`wald_test` — the Wald decision: t test for one restriction, F (or χ²) for several;
* :func:`leverage_one_reason` — the one message for rows whose leverage is one;
* :func:`log_square_regression`, :func:`twostep_fgls` — the two-step variance regression
  log ê² on z (Harvey 1976), used by the ``wls`` back-end and the calibration's fallback model.
"""
from __future__ import annotations

import math
from collections.abc import Sequence
from typing import TYPE_CHECKING

import numpy as np
from scipy import linalg, special, stats

from .hc import leverage_one_rows

if TYPE_CHECKING:  # pragma: no cover
    from ..design import Design

#: −E[log χ²₁] = −(ψ(1/2) + log 2) ≈ 1.2704, the intercept correction of the log ê² regression.
LOG_CHI2_CORRECTION = float(-(special.digamma(0.5) + math.log(2.0)))
#: Squared residuals below this share of their mean are raised to it before the log.
ZERO_RESIDUAL_FLOOR = 1e-8
#: log-variances are clipped here so that exp() never overflows.
ETA_LIMIT = 600.0


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
        # The distributions' own sf: building a frozen distribution costs more than the tail areas.
        return t, 2 * (stats.norm.sf(np.abs(t)) if df is None else stats.t.sf(np.abs(t), df))
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


def floored_squares(E: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """ê² raised to ZERO_RESIDUAL_FLOOR·mean(ê²) per dataset (rows of E), and the count raised."""
    e2 = E**2
    floor = ZERO_RESIDUAL_FLOOR * np.maximum(e2.mean(axis=1, keepdims=True), np.finfo(float).tiny)
    return np.maximum(e2, floor), (e2 < floor).sum(axis=1)


def log_square_regression(ly: np.ndarray, Z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """OLS of log ê² (rows of ly, D × n) on z (n × p shared, or D × n × p per dataset) by QR,
    with −E[log χ²₁] added where z spans the constant (a with Z a = 1; Harvey 1976).

    Returns (γ̂ (D × p), SEs of the auxiliary regression (D × p)).
    """
    D, n = ly.shape
    Zb = np.broadcast_to(Z, (D, n, Z.shape[-1]))
    Qz, Rz = np.linalg.qr(Zb, mode="reduced")
    p = Rz.shape[-1]
    coef = np.linalg.solve(Rz, np.einsum("dnp,dn->dp", Qz, ly)[:, :, None])[:, :, 0]
    res = ly - np.einsum("dnp,dp->dn", Zb, coef)
    s2 = (res**2).sum(axis=1) / (n - p)
    Rinv = np.linalg.solve(Rz, np.broadcast_to(np.eye(p), Rz.shape))  # of the triangular p × p factor
    a = np.linalg.solve(Rz, Qz.sum(axis=1)[:, :, None])[:, :, 0]
    return coef + LOG_CHI2_CORRECTION * a, np.sqrt(s2[:, None] * (Rinv**2).sum(axis=2))


def twostep_fgls(X: np.ndarray, y: np.ndarray, Z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Two-step FGLS with log σᵢ² = zᵢᵀγ (Harvey 1976): OLS residuals, :func:`log_square_regression`,
    then the regression of y/σ̂ on X/σ̂ by QR. Returns (β̂, σ̂ of each row)."""
    Q, _ = np.linalg.qr(X, mode="reduced")
    e2, _ = floored_squares((y - Q @ (Q.T @ y))[None, :])
    gamma = log_square_regression(np.log(e2), Z)[0][0]
    sigma = np.exp(0.5 * np.clip(Z @ gamma, -ETA_LIMIT, ETA_LIMIT))
    Qw, Rw = np.linalg.qr(X / sigma[:, None], mode="reduced")
    beta = linalg.solve_triangular(Rw, Qw.T @ (y / sigma), check_finite=False)
    return beta, sigma
