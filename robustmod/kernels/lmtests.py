"""Breusch–Pagan (Koenker) and White tests from moments accumulated during the OLS residual pass.

Both are n·R² of the auxiliary regression of uᵢ = êᵢ² on a constant and Z (the regressors for
Breusch–Pagan; the regressors, their squares and cross-products for White), χ² with
rank(Z) − 1 df (Breusch & Pagan 1979; Koenker 1981; White 1980).

Cross-product route (the default). Per chunk the centred cross-products of [Z u] are merged
(:class:`~robustmod.kernels.accumulate.CrossProducts`), so White's k(k+1)/2 products exist for one
chunk at a time and the cost per row is one p × p rank update. At the end the centred Gram
matrix of Z is scaled to unit diagonal, K = D C_ZZ D, and factored by pivoted Cholesky (LAPACK
dpstrf): columns whose pivot falls below :data:`GRAM_DROP` are linearly dependent on the others
and dropped (squared dummies, the intercept's products), df is the number kept, and
R² = bᵀK⁻¹b / C_uu with b = D C_Zu, solved with the triangular factor. When the kept columns'
scaled Gram matrix has a condition number beyond :data:`MAX_CONDITION` (the solve would lose
more than about κ·ε ≈ 2e-10 of relative accuracy) the answer comes from the TSQR route instead.

TSQR route. Per chunk the TSQR factor of [1 Z u − c] is updated, c being the mean of u in the
first chunk (a shift that keeps the sums of squares free of cancellation; the regression has a
constant, so the shift changes nothing). The independent columns are chosen by a pivoted QR of
the factor with its columns scaled to unit norm — the pivots a pivoted QR of the scaled n-row
matrix gives, since both share their R; the factor of the kept columns and u − c gives Qᵀ(u − c),
and the explained sum of squares is ‖Qᵀ(u − c)‖² − n(ū − c)².
"""
from __future__ import annotations

import copy
import functools
from collections.abc import Callable, Iterable
from typing import Any

import numpy as np
from scipy import linalg, stats
from scipy.linalg import lapack

from ..blas_threads import one_blas_thread
from ..jsonvalues import num
from .accumulate import TSQR, CrossProducts, RunningMoments
from .chunks import Chunk, ChunkSource

#: A pass over (chunk, residuals of its rows) pairs, started anew on each call.
ResidualPasses = Callable[[], Iterable[tuple[Chunk, np.ndarray]]]

#: Relative pivot size below which a column counts as dependent (TSQR route, on the R scale).
DEPENDENT_TOL = 1e-10
#: Pivot of the unit-diagonal Gram matrix below which a column counts as dependent (the square
#: of a relative residual norm of about 3e-5; exact dependencies give pivots near 1e-16).
GRAM_DROP = 1e-9
#: Largest condition number of the kept scaled Gram matrix the Cholesky route accepts.
MAX_CONDITION = 1e6
#: A column whose SD is below this share of its mean magnitude is constant (spanned by the intercept).
CONSTANT_TOL = 1e-12
METHODS = ("cholesky", "tsqr")
#: Rows of the auxiliary block built at a time: a block that stays in the processor's cache makes
#: its cross-product an order of magnitude faster than one of a whole large chunk (measured).
CACHE_ROWS = 1 << 14


def white_columns(X: np.ndarray) -> np.ndarray:
    """[X, XᵢXⱼ for i ≤ j]: levels, squares and cross-products of the regressors (m × (k + k(k+1)/2))."""
    iu, ju = np.triu_indices(X.shape[1])
    return np.column_stack([X, X[:, iu] * X[:, ju]])


def product_pairs(k: int, constant_column: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """(i, j), i ≤ j, of White's products XᵢXⱼ; products with ``constant_column`` (a column equal to 1
    in every row, the intercept) are left out, as they repeat the levels or the constant."""
    iu, ju = np.triu_indices(k)
    if constant_column is None:
        return iu, ju
    keep = (iu != constant_column) & (ju != constant_column)
    return iu[keep], ju[keep]


def _product_runs(iu: np.ndarray, ju: np.ndarray) -> list[tuple[int, int, int]]:
    """(i, first j, count) of each run of pairs (i, j), (i, j + 1), … in the order given."""
    runs: list[tuple[int, int, int]] = []
    for i, j in zip(iu.tolist(), ju.tolist(), strict=True):
        if runs and runs[-1][0] == i and runs[-1][1] + runs[-1][2] == j:
            runs[-1] = (i, runs[-1][1], runs[-1][2] + 1)
        else:
            runs.append((i, j, 1))
    return runs


@functools.lru_cache(maxsize=64)
def _runs(k: int, white: bool, constant_column: int | None) -> tuple[int, tuple[tuple[int, int, int], ...]]:
    """(number of products, runs of :func:`_product_runs`) of White's products of k columns."""
    if not white:
        return 0, ()
    iu, ju = product_pairs(k, constant_column)
    return int(iu.size), tuple(_product_runs(iu, ju))


def auxiliary_block(X: np.ndarray, u: np.ndarray, white: bool, constant_column: int | None = None,
                    shift: np.ndarray | None = None) -> np.ndarray:
    """[X − shift, (products XᵢXⱼ, i ≤ j, of those columns if white), u] as one Fortran-ordered array
    (without the products of ``constant_column``, see :func:`product_pairs`; ``shift`` defaults to 0)."""
    k = X.shape[1]
    n_products, runs = _runs(k, white, constant_column)
    # Filled through its C-ordered transpose, one row of products XᵢXⱼ, Xᵢ₊₁… per call: the same
    # products as column by column, in a fifth of the numpy calls (each call hands the GIL over
    # once, which is what two lanes pay for; see robustmod.lanes).
    outT = np.empty((k + n_products + 1, X.shape[0]))
    if shift is None:
        np.copyto(outT[:k], X.T)
    else:
        np.subtract(X.T, shift[:, None], out=outT[:k])
    c = k
    for i, first, count in runs:
        np.multiply(outT[i], outT[first:first + count], out=outT[c:c + count])
        c += count
    outT[-1] = u
    out = outT.T
    return out


def _lm(stat: float, df: int, method: str) -> dict[str, Any]:
    return {"statistic": num(stat), "df": int(df), "p": num(stats.chi2.sf(stat, df)) if df > 0 else None,
            "solved_by": method}


class AuxiliaryRegression:
    """Accumulates n·R² of êᵢ² on a constant and ``columns(X)``; give it to the OLS residual pass.

    ``method`` is 'cholesky' (cross-products, the cheap route) or 'tsqr'. :meth:`result` of the
    Cholesky route falls back to a TSQR pass over ``redo`` when the scaled Gram matrix is
    ill-conditioned.
    """

    def __init__(self, white: bool = False, method: str = "cholesky", *, constant_column: int | None = None,
                 level_shift: np.ndarray | None = None) -> None:
        if method not in METHODS:
            raise ValueError(f"method must be one of {METHODS}; got {method!r}")
        self.white, self.method = white, method
        self.constant_column = constant_column  # a column of X equal to 1 in every row (the caller vouches)
        self.k: int | None = None
        self.tsqr: TSQR | None = None
        self.cross: CrossProducts | None = None
        self.shift: float | None = None
        self.u = RunningMoments(1)
        # Shifted route: with a constant column, raw cross-products of [X − s, products of X − s, u]
        # are summed (the constant column gives the count and the sums), centred once at the end.
        self.level_shift: np.ndarray | None = None
        self._raw: np.ndarray | None = None
        if level_shift is not None and method == "cholesky" and constant_column is not None:
            self.level_shift = np.array(level_shift, dtype=float)
            self.level_shift[constant_column] = 0.0  # the constant column stays 1

    @property
    def rows(self) -> int:
        """Rows accumulated so far."""
        return int(self.u.n)

    def add(self, chunk: Chunk, resid: np.ndarray) -> None:
        u = resid * resid
        if u.size == 0:
            return
        self.k = chunk.X.shape[1]
        if self.level_shift is not None:
            with one_blas_thread():
                for a in range(0, u.size, CACHE_ROWS):
                    block = auxiliary_block(chunk.X[a:a + CACHE_ROWS], u[a:a + CACHE_ROWS], self.white,
                                            self.constant_column, self.level_shift)
                    gram = np.dot(block.T, block)  # see robustmod.lanes on np.dot
                    self._raw = gram if self._raw is None else self._raw + gram
        elif self.method == "cholesky":
            with one_blas_thread():
                for a in range(0, u.size, CACHE_ROWS):
                    block = auxiliary_block(chunk.X[a:a + CACHE_ROWS], u[a:a + CACHE_ROWS], self.white,
                                            self.constant_column)
                    self.cross = self.cross or CrossProducts(block.shape[1])
                    self.cross.add(block, overwrite=True)
        else:
            Z = auxiliary_block(chunk.X, u, self.white, self.constant_column)[:, :-1] if self.white else chunk.X
            if self.shift is None:
                self.shift = float(u.mean())
            block = np.column_stack([np.ones(u.size), Z, u - self.shift])
            self.tsqr = self.tsqr or TSQR(block.shape[1])
            self.tsqr.add(block)
        self.u.add(u)

    def _settle(self) -> None:
        """Centre the shifted route's raw cross-products S and merge them into ``cross``: with the
        constant column c, n = S_cc and the sums are S_c·, so C = S − n·m mᵀ with m = S_c· / n (the
        levels' means given back their shift; C does not change with the shift)."""
        if self._raw is None or self.constant_column is None or self.level_shift is None:
            return
        S, c, k = self._raw, self.constant_column, self.level_shift.size
        n = float(S[c, c])
        mean = S[c] / n
        settled = CrossProducts(S.shape[0])
        settled.n = round(n)
        settled.C = S - n * np.outer(mean, mean)
        settled.C[c, :] = 0.0  # the constant column: exactly no spread
        settled.C[:, c] = 0.0
        mean = mean.copy()
        mean[:k] += self.level_shift
        settled.mean = mean
        self.cross = settled if self.cross is None else self.cross.merge(settled)
        self._raw = None

    def merge(self, other: AuxiliaryRegression) -> AuxiliaryRegression:
        """Self updated with what ``other`` gathered from later rows; returns self. The TSQR route's
        shifts differ between copies: [1 Z u − c₂] becomes [1 Z u − c₁] by adding (c₂ − c₁) times the
        constant column to the last one, i.e. R's first column to R's last (R stays triangular)."""
        if other.u.n == 0:
            return self
        self._settle()
        other._settle()
        self.k = other.k if self.k is None else self.k
        if other.cross is not None:
            self.cross = copy.deepcopy(other.cross) if self.cross is None else self.cross.merge(other.cross)
        if other.tsqr is not None and other.shift is not None:
            if self.tsqr is None or self.shift is None:
                self.tsqr, self.shift = copy.deepcopy(other.tsqr), other.shift
            else:
                moved = copy.deepcopy(other.tsqr)
                moved.R[:, -1] += (other.shift - self.shift) * moved.R[:, 0]
                self.tsqr.merge(moved)
        self.u.merge(other.u)
        return self

    def result(self, redo: ResidualPasses | None = None) -> dict[str, Any]:
        """{statistic, df, p, solved_by}: n·R², its df and χ² p-value, and the route that solved it.

        ``redo`` (e.g. :func:`ols_residual_passes`) allows the TSQR fallback of the Cholesky route;
        without it an ill-conditioned Gram matrix is solved anyway and ``solved_by`` says so."""
        if self.method == "tsqr":
            return self._tsqr_result()
        self._settle()
        if self.cross is None:
            return {"statistic": None, "df": 0, "p": None, "solved_by": self.method}
        out = self._gram_result()
        if out is not None:
            return out
        if redo is None:
            return self._gram_result(force=True) or {}
        again = AuxiliaryRegression(self.white, method="tsqr")
        for c, e in redo():
            again.add(c, e)
        return again.result()

    def levels_result(self, redo: ResidualPasses | None = None) -> dict[str, Any]:
        """Breusch–Pagan (êᵢ² on the levels X only) from a White accumulation: the levels' and ê²'s
        block of the same centred cross-products, so one pass gives both tests; a TSQR pass over
        ``redo`` when that block is ill-conditioned (as :meth:`result`)."""
        self._settle()
        if not self.white or self.cross is None or self.k is None:
            raise ValueError("levels_result needs a White accumulation (white=True, Cholesky route) with rows")
        cols = [*range(self.k), self.cross.C.shape[0] - 1]
        out = self._gram_result(C=self.cross.C[np.ix_(cols, cols)], mean=self.cross.mean[cols])
        if out is not None:
            return out
        if redo is None:
            return self._gram_result(force=True, C=self.cross.C[np.ix_(cols, cols)], mean=self.cross.mean[cols]) or {}
        again = AuxiliaryRegression(False, method="tsqr")
        for c, e in redo():
            again.add(c, e)
        return again.result()

    def _gram_result(self, force: bool = False, C: np.ndarray | None = None,
                     mean: np.ndarray | None = None) -> dict[str, Any] | None:
        assert self.cross is not None
        n = self.cross.n
        if C is None or mean is None:
            C, mean = self.cross.C, self.cross.mean
        p = C.shape[0] - 1
        s = np.sqrt(np.maximum(np.diag(C)[:p], 0.0))
        varying = np.flatnonzero(s > CONSTANT_TOL * np.maximum(np.abs(mean[:p]), 1e-300))
        cuu = float(C[p, p])
        if varying.size == 0 or cuu <= 0:
            return _lm(0.0, 0, "cholesky")
        sv = s[varying]
        K = C[np.ix_(varying, varying)] / np.outer(sv, sv)
        U, piv, rank, info = lapack.dpstrf(K, lower=0, tol=GRAM_DROP)
        if info < 0:  # pragma: no cover - LAPACK argument errors only
            raise RuntimeError(f"dpstrf failed with info {info}")
        kept = piv[:rank] - 1
        Uk = np.triu(U[:rank, :rank])
        d = np.abs(np.diag(Uk))
        condition = float((d.max() / d.min()) ** 2) if rank else 1.0
        if rank and condition > MAX_CONDITION and not force:
            return None
        b = C[varying[kept], p] / sv[kept]
        z = linalg.solve_triangular(Uk, b, trans="T", lower=False) if rank else np.zeros(0)
        r2 = float(z @ z) / cuu
        label = "cholesky" if condition <= MAX_CONDITION else "cholesky (ill-conditioned)"
        return _lm(n * r2, rank, label)

    def _tsqr_result(self) -> dict[str, Any]:
        if self.tsqr is None or self.shift is None:
            return {"statistic": None, "df": 0, "p": None, "solved_by": "tsqr"}
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
        return _lm(n * r2, rank - 1, "tsqr")


def ols_residual_passes(chunks: ChunkSource, beta: np.ndarray) -> ResidualPasses:
    """Passes over (chunk, yᵢ − xᵢᵀβ̂) for the TSQR fallback."""
    def passes() -> Iterable[tuple[Chunk, np.ndarray]]:
        return ((c, c.y - c.X @ beta) for c in chunks())
    return passes
