"""Breusch–Pagan (Koenker) and White tests from moments accumulated during the OLS residual pass.

Both are n·R² of the auxiliary regression of uᵢ = êᵢ² on a constant and Z (the regressors for
Breusch–Pagan; the regressors, their squares and cross-products for White), χ² with
rank(Z) − 1 df (Breusch & Pagan 1979; Koenker 1981; White 1980). Per chunk the TSQR factor of
[1 Z  u − c] is updated, c being the mean of u in the first chunk (a shift that keeps the sums
of squares free of cancellation; the regression has a constant, so the shift changes nothing).
At the end:

* the independent columns are chosen by a pivoted QR of the factor with its columns scaled to
  unit norm: the same pivots a pivoted QR of the scaled n-row matrix gives, since both share
  their R (so the same columns are kept as in :mod:`robustmod.diagnostics`);
* the factor of the kept columns and u − c gives Qᵀ(u − c), and the explained sum of squares
  about the mean is ‖Qᵀ(u − c)‖² − n(ū − c)²; R² divides it by Σ(uᵢ − ū)², merged chunk by chunk.
"""
from __future__ import annotations

from typing import Any

import numpy as np
from scipy import linalg, stats

from ..jsonvalues import num
from .accumulate import TSQR, RunningMoments
from .chunks import Chunk

#: Relative pivot size below which a column counts as dependent (as robustmod.diagnostics).
DEPENDENT_TOL = 1e-10


def white_columns(X: np.ndarray) -> np.ndarray:
    """[X, XᵢXⱼ for i ≤ j]: levels, squares and cross-products of the regressors (m × (k + k(k+1)/2))."""
    iu, ju = np.triu_indices(X.shape[1])
    return np.column_stack([X, X[:, iu] * X[:, ju]])


class AuxiliaryRegression:
    """Accumulates n·R² of êᵢ² on a constant and ``columns(X)``; give it to the OLS residual pass."""

    def __init__(self, white: bool = False) -> None:
        self.white = white
        self.tsqr: TSQR | None = None
        self.shift: float | None = None
        self.u = RunningMoments(1)

    def add(self, chunk: Chunk, resid: np.ndarray) -> None:
        u = resid * resid
        if u.size == 0:
            return
        if self.shift is None:
            self.shift = float(u.mean())
        Z = white_columns(chunk.X) if self.white else chunk.X
        block = np.column_stack([np.ones(u.size), Z, u - self.shift])
        if self.tsqr is None:
            self.tsqr = TSQR(block.shape[1])
        self.tsqr.add(block)
        self.u.add(u)

    def result(self) -> dict[str, Any]:
        """{statistic, df, p} as :func:`robustmod.diagnostics.breusch_pagan_lm` / ``white_lm`` give them."""
        if self.tsqr is None or self.shift is None:
            return {"statistic": None, "df": 0, "p": None}
        Raug = self.tsqr.factor()
        p = Raug.shape[1] - 1
        RZ = Raug[:, :p]
        norms = np.linalg.norm(RZ, axis=0)
        keep = np.flatnonzero(norms > 0)
        _, Rp, piv = linalg.qr(RZ[:, keep] / norms[keep], mode="economic", pivoting=True)
        d = np.abs(np.diag(Rp))
        rank = int((d > DEPENDENT_TOL * d[0]).sum()) if d.size else 0
        idx = keep[np.sort(piv[:rank])]
        Rsub = np.asarray(np.linalg.qr(Raug[:, [*idx, p]], mode="r"))
        qtu = Rsub[:rank, rank]
        n = self.u.n
        ss_tot = float(self.u.m2[0])
        ess = float(qtu @ qtu) - n * (float(self.u.mean[0]) - self.shift) ** 2
        r2 = ess / ss_tot if ss_tot > 0 else 0.0
        df = rank - 1
        stat = n * r2
        return {"statistic": num(stat), "df": int(df), "p": num(stats.chi2.sf(stat, df)) if df > 0 else None}
