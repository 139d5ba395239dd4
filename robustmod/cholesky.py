"""Cholesky of a Gram matrix with its columns scaled to unit length, and a condition check.

For G = XᵀX, D = diag(‖Xⱼ‖⁻¹) and Gs = D G D, the factor Rs of Gs = RsᵀRs gives R = Rs D⁻¹ with
RᵀR = G. Scaling first makes κ(Gs) the condition number that matters for the solve (van der Sluis
1969: a unit diagonal is within a factor p of the best diagonal scaling; recalled from memory); a solve
through R loses about κ(Gs)·ε of relative accuracy, so callers refuse the factor above their own bound
and fall back to Householder/TSQR.
"""
from __future__ import annotations

import numpy as np
from scipy import linalg


def scaled_cholesky(G: np.ndarray, max_condition: float) -> tuple[np.ndarray | None, float]:
    """(R with RᵀR = G, κ of the column-scaled G); R is None when a column has zero (or non-finite)
    length, κ is not finite or exceeds ``max_condition``, or the factorization fails."""
    norms = np.sqrt(np.diag(G))
    if not np.all(np.isfinite(norms)) or np.any(norms == 0):
        return None, float("inf")
    d = 1.0 / norms
    Gs = G * d[:, None] * d[None, :]
    condition = float(np.linalg.cond(Gs))
    if not np.isfinite(condition) or condition > max_condition:
        return None, condition
    try:
        Rs = linalg.cholesky(Gs, lower=False, check_finite=False)
    except linalg.LinAlgError:
        return None, condition
    return Rs * norms[None, :], condition
