"""Numerical pieces shared by several back-ends, each written once and batched over datasets.

A single fit is a batch of one: the functions take a leading dataset axis D (or broadcast
over it), so a fit and a calibration study of D simulated outcomes run the same code.

* :func:`wald_test` — the Wald decision: t test for one restriction, F (or χ²) for several;
* :func:`leverage_one_reason` — the one message for rows whose leverage is one;
* :func:`exact_zeros`, :func:`floored_squares`, :func:`zero_residual_note` — residuals that are zero
  to machine precision, their floor before a log, and the warning saying why;
* :func:`log_square_regression`, :func:`twostep_fgls` — the two-step variance regression
  log ê² on z (Harvey 1976), used by the ``wls`` back-end and the calibration's fallback model;
* :func:`solve_triangular_2d` — a triangular solve in inner loops, without the checks around it.
"""
from __future__ import annotations

import math
from collections.abc import Sequence
from typing import TYPE_CHECKING

import numpy as np
from scipy import linalg, special, stats
from scipy.linalg import lapack

from .hc import design_leverages, leverage_one_rows

if TYPE_CHECKING:  # pragma: no cover
    from ..design import Design

#: −E[log χ²₁] = −(ψ(1/2) + log 2) ≈ 1.2704, the intercept correction of the log ê² regression.
LOG_CHI2_CORRECTION = float(-(special.digamma(0.5) + math.log(2.0)))
#: Exactly zero squared residuals are raised to this share of the mean ê² before the log.
ZERO_RESIDUAL_FLOOR = 1e-8
#: A residual counts as exactly zero when |êᵢ| ≤ ZERO_RESIDUAL_RTOL · max|y| (≈ 4500 ε: rounding
#: of the QR residual, not a small but genuine one).
ZERO_RESIDUAL_RTOL = 1e-12
#: log-variances are clipped here so that exp() never overflows.
ETA_LIMIT = 600.0


def solve_triangular_2d(a: np.ndarray, b: np.ndarray, *, lower: bool = False, trans: int = 0) -> np.ndarray:
    """x with a x = b (trans 0) or aᵀ x = b (trans 1), a triangular: the LAPACK trtrs call that
    ``scipy.linalg.solve_triangular(a, b, trans, lower, check_finite=False)`` makes for one 2-D float
    matrix (so the same digits), without the validation and batch wrapper around it, which cost
    more than the solve of a k × k system; other inputs go to scipy itself."""
    if (not isinstance(a, np.ndarray) or not isinstance(b, np.ndarray) or a.ndim != 2 or b.ndim not in (1, 2)
            or a.dtype != np.float64 or b.dtype != np.float64 or b.size == 0 or trans not in (0, 1)
            or a.shape[0] != a.shape[1] or a.shape[0] != b.shape[0]):
        return np.asarray(linalg.solve_triangular(a, b, trans=trans, lower=lower, check_finite=False))
    trtrs, = lapack.get_lapack_funcs(("trtrs",), (a, b))
    if a.flags.f_contiguous:
        x, info = trtrs(a, b, overwrite_b=False, lower=lower, trans=trans, unitdiag=False)
    else:  # trtrs expects Fortran order: solve the transposed system, as scipy does
        x, info = trtrs(a.T, b, overwrite_b=False, lower=not lower, trans=not trans, unitdiag=False)
    if info > 0:
        raise linalg.LinAlgError(f"singular matrix: resolution failed at diagonal {info - 1}")
    if info < 0:  # pragma: no cover - LAPACK argument errors only
        raise ValueError(f"illegal value in {-info}-th argument of internal trtrs")
    return np.asarray(x)


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


def leverage_one_note(design: Design) -> str | None:
    """Rows of the design with leverage one and their likely cause, or None if there are none.

    The cause named: a level (of a text, categorical or few-valued numeric column of the model)
    that occurs in such a row only, else the model terms that are non-zero in those rows only.
    There each row's residual is zero, so a standard error built from residuals is degenerate.
    """
    ones = leverage_one_rows(design_leverages(design))
    if ones.size == 0:
        return None
    rows = design_row_numbers(design)[ones]
    shown = ", ".join(str(int(r)) for r in rows[:10]) + (" …" if rows.size > 10 else "")
    causes = []
    frame = design.data.frame
    for name in frame.columns:
        col = frame[name]
        if col.nunique() > max(10, frame.shape[0] // 2):  # a measurement, not a category
            continue
        counts = col.map(col.value_counts()).to_numpy()
        causes += [f"the level {col.iloc[i]!r} of {name!r} occurs in data row {int(r)} only"
                   for i, r in zip(ones, rows, strict=True) if counts[i] == 1]
    if not causes:
        nonzero = np.abs(design.X) > 0
        others = np.setdiff1d(np.arange(design.n_obs), ones)
        alone = np.flatnonzero(nonzero[ones].any(axis=0) & ~nonzero[others].any(axis=0))
        causes = [f"the term {design.term_names[j]!r} is non-zero in those rows only" for j in alone]
    cause = "; ".join(causes[:5]) if causes else "each alone determines a combination of the coefficients"
    return (f"Data row(s) {shown} have leverage 1 ({cause}: a category or dummy with a single row); their "
            "residuals are zero, so standard errors built from residuals are degenerate there. Merge that "
            "level with another, drop the row(s) or the term.")


def design_row_numbers(design: Design) -> np.ndarray:
    """1-based data row numbers of the design rows (positions in the user's data), for messages."""
    return np.asarray(design.data.frame.index, dtype=int) + 1


def exact_zeros(E: np.ndarray, Y: np.ndarray) -> np.ndarray:
    """Residuals that are zero to machine precision: |êᵢ| ≤ ZERO_RESIDUAL_RTOL · max|y| per
    dataset (rows of E and Y, or one vector each)."""
    E = np.asarray(E, dtype=float)
    scale = np.max(np.abs(np.asarray(Y, dtype=float)), axis=-1, keepdims=True)
    return np.abs(E) <= ZERO_RESIDUAL_RTOL * np.maximum(scale, np.finfo(float).tiny)


def floored_squares(E: np.ndarray, Y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """ê² per dataset (rows of E; Y the outcomes), the exact zeros (:func:`exact_zeros`) raised to
    ZERO_RESIDUAL_FLOOR·mean(ê²) so that log ê² is finite; and the count raised. Small but genuine
    residuals keep their squares."""
    e2 = E**2
    floor = ZERO_RESIDUAL_FLOOR * np.maximum(e2.mean(axis=1, keepdims=True), np.finfo(float).tiny)
    zero = exact_zeros(E, Y)
    return np.where(zero, floor, e2), zero.sum(axis=1)


def zero_residual_note(X: np.ndarray, y: np.ndarray, row_numbers: Sequence[int] | np.ndarray) -> str | None:
    """The warning for exactly zero OLS residuals, with why when that is knowable (leverage one:
    the row alone determines a coefficient; a cell of identical rows fitted exactly), or None."""
    Q, _ = np.linalg.qr(X, mode="reduced")
    e = y - Q @ (Q.T @ y)
    zero = exact_zeros(e, y)
    if not zero.any():
        return None
    rows = np.asarray(row_numbers)[zero]
    shown = ", ".join(str(int(r)) for r in rows[:10]) + (" …" if rows.size > 10 else "")
    ones = leverage_one_rows(np.einsum("ij,ij->i", Q, Q))
    _, inverse, counts = np.unique(np.column_stack([X, y]), axis=0, return_inverse=True, return_counts=True)
    duplicated = counts[inverse.ravel()] > 1
    why = []
    if np.isin(np.flatnonzero(zero), ones).any():
        why.append("leverage 1 (a row alone determines a coefficient, e.g. a category with one row)")
    if (zero & duplicated).any():
        why.append("duplicated rows (identical rows fitted exactly)")
    cause = f"; likely cause: {' and '.join(why)}" if why else ""
    return (f"{int(zero.sum())} residual(s) are exactly zero (data row(s) {shown}){cause}; their squares were "
            f"raised to {ZERO_RESIDUAL_FLOOR:g} × mean(ê²) before taking logs.")


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
    e2, _ = floored_squares((y - Q @ (Q.T @ y))[None, :], y[None, :])
    gamma = log_square_regression(np.log(e2), Z)[0][0]
    sigma = np.exp(0.5 * np.clip(Z @ gamma, -ETA_LIMIT, ETA_LIMIT))
    Qw, Rw = np.linalg.qr(X / sigma[:, None], mode="reduced")
    beta = linalg.solve_triangular(Rw, Qw.T @ (y / sigma), check_finite=False)
    return beta, sigma
