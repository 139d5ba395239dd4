"""Diagnostics of the variance pattern of the OLS residuals.

* Breusch–Pagan in Koenker's studentized form: LM = n·R² of êᵢ² on the regressors,
  χ² with (rank − 1) df (Breusch & Pagan 1979; Koenker 1981).
* White (1980): the same auxiliary regression on the regressors, their squares and
  cross-products, linearly dependent columns (e.g. squared dummies) dropped.
* Goldfeld–Quandt (1965): rows sorted by the moderator, the middle fifth dropped,
  F = s²(high) / s²(low), two-sided p.
"""
from __future__ import annotations

from typing import Any

import numpy as np
from scipy import linalg, stats

from .design import Design

#: Share of middle rows the Goldfeld–Quandt split drops.
GQ_DROP = 0.2


def _independent_columns(Z: np.ndarray, tol: float = 1e-10) -> np.ndarray:
    """Keep a linearly independent subset of Z's columns (pivoted QR, scale-free)."""
    norms = np.linalg.norm(Z, axis=0)
    keep = norms > 0
    Zs = Z[:, keep] / norms[keep]
    _, R, piv = linalg.qr(Zs, mode="economic", pivoting=True)
    d = np.abs(np.diag(R))
    rank = int((d > tol * d[0]).sum()) if d.size else 0
    idx = np.flatnonzero(keep)[np.sort(piv[:rank])]
    return Z[:, idx]


def _lm_test(u2: np.ndarray, Z: np.ndarray) -> dict[str, Any]:
    """n·R² of u2 on Z (Z contains a constant) and its χ² p-value."""
    n = u2.size
    Q, _ = np.linalg.qr(Z, mode="reduced")
    fitted = Q @ (Q.T @ u2)
    dev = u2 - u2.mean()
    ss_tot = float(dev @ dev)
    r2 = float(((fitted - u2.mean()) ** 2).sum() / ss_tot) if ss_tot > 0 else 0.0
    df = Z.shape[1] - 1
    stat = n * r2
    return {"statistic": stat, "df": df, "p": float(stats.chi2.sf(stat, df)) if df > 0 else None}


def ols_residuals(design: Design) -> np.ndarray:
    Q, _ = design.qr
    return design.y - Q @ (Q.T @ design.y)


def breusch_pagan(design: Design, resid: np.ndarray | None = None) -> dict[str, Any]:
    """Koenker's studentized Breusch–Pagan test on the model's own regressors."""
    e = ols_residuals(design) if resid is None else resid
    Z = _independent_columns(_with_constant(design.X))
    return {**_lm_test(e**2, Z), "form": "Koenker (studentized), n·R² of squared residuals on the regressors"}


def white(design: Design, resid: np.ndarray | None = None) -> dict[str, Any]:
    """White's test: squared residuals on levels, squares and cross-products of the regressors."""
    e = ols_residuals(design) if resid is None else resid
    X = design.X
    k = X.shape[1]
    iu, ju = np.triu_indices(k)
    Z = _independent_columns(_with_constant(X[:, iu] * X[:, ju] if k else X))
    Z = _independent_columns(np.column_stack([X, Z]))
    return {**_lm_test(e**2, Z), "form": "n·R² on levels, squares and cross-products (dependent columns dropped)"}


def goldfeld_quandt(design: Design, moderator: str | None = None) -> dict[str, Any] | None:
    """Split along a continuous moderator; F of residual variances high vs low, two-sided."""
    conts = design.continuous_moderators
    if moderator is None:
        if not conts:
            return None
        moderator = conts[0]
    w = design.moderators[moderator].values
    order = np.argsort(w, kind="stable")
    n, k = design.X.shape
    drop = int(round(GQ_DROP * n))
    n1 = (n - drop) // 2
    lo, hi = order[:n1], order[n - n1:]
    if n1 <= k + 1:
        return None
    s2 = []
    for idx in (lo, hi):
        Xs, ys = design.X[idx], design.y[idx]
        beta, *_ = linalg.lstsq(Xs, ys)
        r = ys - Xs @ beta
        s2.append(float(r @ r) / (len(idx) - k))
    F = s2[1] / s2[0] if s2[0] > 0 else np.inf
    d = n1 - k
    p = 2 * min(stats.f.sf(F, d, d), stats.f.cdf(F, d, d))
    return {"statistic": F, "df": [d, d], "p": float(min(1.0, p)), "moderator": moderator,
            "form": f"sorted by {moderator}, middle {int(100 * GQ_DROP)}% dropped, F = s²(high)/s²(low), two-sided"}


def _with_constant(Z: np.ndarray) -> np.ndarray:
    return np.column_stack([np.ones(Z.shape[0]), Z])


def variance_diagnostics(design: Design, alpha: float = 0.05) -> dict[str, Any]:
    """All variance diagnostics of the results contract."""
    e = ols_residuals(design)
    return {
        "breusch_pagan": breusch_pagan(design, e),
        "white": white(design, e),
        "goldfeld_quandt": goldfeld_quandt(design),
    }
