"""The thin QR factors of a model matrix X, with Q stored or read off X and R a block at a time.

R is upper triangular with RᵀR = XᵀX and Q = XR⁻¹ has orthonormal columns. Many rows, well
conditioned: Cholesky QR (R from Cholesky of the column-scaled XᵀX, :mod:`robustmod.cholesky`).
Its Q is not stored: what the in-memory fits need of it comes from X and R directly,

    Qᵀv = R⁻ᵀ(Xᵀv),   Q c = X (R⁻¹c),   hᵢ = ‖xᵢᵀR⁻¹‖²,   QᵀWQ = R⁻ᵀ(XᵀWX)R⁻¹,

one pass over X each (blocks of rows in cache), so no n × k array is written; the array Q itself is
made on first use, once, for the code that wants it. These agree with the stored Q's to about
κ·ε ≈ 1e-11 (κ ≤ :data:`CHOLESKY_QR_CONDITION`, the condition number of the scaled XᵀX). Otherwise
Householder (LAPACK geqrf, orgqr): Q is at hand and the same formulas read it.
"""
from __future__ import annotations

import threading
from collections.abc import Iterator
from typing import Any, NamedTuple

import numpy as np
from scipy import linalg
from scipy.linalg import lapack

from .blas_threads import one_blas_thread
from .cholesky import scaled_cholesky
from .lanes import map_rows

#: Rows from which :func:`thin_qr` tries Cholesky QR (below it Householder costs next to nothing).
CHOLESKY_QR_ROWS = 50_000
#: Largest condition number of the column-scaled XᵀX for Cholesky QR: Q = XR⁻¹ then departs from
#: orthonormal columns by about κ·ε ≈ 1e-11, and every quantity read off Q, R by as little.
CHOLESKY_QR_CONDITION = 1e5
#: Rows per block of the weighted cross-products and leverages: blocks that fit in cache beat one
#: pass over an n × k temporary (measured at n = 10⁶, k = 7: 13 ms with 8,192 rows, 23 ms with 65,536).
BLOCK_ROWS = 8192


def weighted_gram(A: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Aᵀ diag(w) A, summed over blocks of rows (the two halves of the rows on two lanes)."""
    k = A.shape[1]

    def half(rows: slice) -> np.ndarray:
        part = np.zeros((k, k))
        for start in range(rows.start, rows.stop, BLOCK_ROWS):
            stop = min(start + BLOCK_ROWS, rows.stop)
            a = A[start:stop]
            part += np.dot(a.T * w[start:stop], a)  # see robustmod.lanes on np.dot
        return part

    return sum(map_rows(half, A.shape[0]), np.zeros((k, k)))


def row_norms(A: np.ndarray, right: np.ndarray | None = None) -> np.ndarray:
    """‖aᵢ‖² of each row of A, or of A·right when ``right`` (k × k) is given, a block at a time."""
    n = A.shape[0]
    out = np.empty(n)
    if right is None:
        map_rows(lambda s: np.einsum("ij,ij->i", A[s], A[s], out=out[s]), n)
        return out

    def half(rows: slice) -> None:
        for start in range(rows.start, rows.stop, BLOCK_ROWS):
            stop = min(start + BLOCK_ROWS, rows.stop)
            q = np.dot(A[start:stop], right)
            np.einsum("ij,ij->i", q, q, out=out[start:stop])

    map_rows(half, n)
    return out


class FitRows(NamedTuple):
    """What one pass over the rows gives of the least-squares fit of y (:meth:`ThinQR.fit_rows`)."""

    qty: np.ndarray
    resid: np.ndarray
    leverage: np.ndarray
    hc3_meat: np.ndarray


class ThinQR:
    """(Q, R) of X: unpacks as ``Q, R = f``, ``f[1]`` is R; Q is made on first use when it came
    from Cholesky QR (``implicit``). :meth:`qt`, :meth:`fit_rows`, :meth:`leverages` and
    :meth:`weighted_gram` never make it."""

    def __init__(self, R: np.ndarray, *, Q: np.ndarray | None = None, X: np.ndarray | None = None,
                 xty: tuple[np.ndarray, np.ndarray] | None = None) -> None:
        if Q is None and X is None:
            raise ValueError("ThinQR needs Q or X")
        self.R = R
        self._Q, self._X = Q, X
        self._xty = xty  # (y, Xᵀy) summed when R was made, when given a y
        self._Rinv: np.ndarray | None = None
        self._lock = threading.Lock()

    @property
    def implicit(self) -> bool:
        """Q is read off X and R (not stored)."""
        return self._X is not None

    @property
    def shape(self) -> tuple[int, int]:
        """(n, k) of Q."""
        source = self._X if self._X is not None else self._Q
        assert source is not None
        return int(source.shape[0]), int(self.R.shape[1])

    @property
    def Rinv(self) -> np.ndarray:
        """R⁻¹ by a triangular solve (k × k)."""
        if self._Rinv is None:
            self._Rinv = linalg.solve_triangular(self.R, np.eye(self.R.shape[0]), check_finite=False)
        return self._Rinv

    @property
    def Q(self) -> np.ndarray:
        """The n × k array Q (made once, on first use, when implicit)."""
        if self._Q is None:
            with self._lock:
                if self._Q is None:
                    assert self._X is not None
                    with one_blas_thread():
                        # One thread: Q is a new n × k array, and two threads writing its fresh pages
                        # at once were several times slower than one on a virtual machine.
                        self._Q = np.dot(self._X, self.Rinv)
        return self._Q

    def __iter__(self) -> Iterator[np.ndarray]:
        yield self.Q
        yield self.R

    def __len__(self) -> int:
        return 2

    def __getitem__(self, i: int) -> np.ndarray:
        if i in (1, -1):
            return self.R
        if i in (0, -2):
            return self.Q
        raise IndexError(i)

    def __getstate__(self) -> dict[str, Any]:
        state = dict(self.__dict__)
        del state["_lock"]
        return state

    def __setstate__(self, state: dict[str, Any]) -> None:
        self.__dict__.update(state)
        self._lock = threading.Lock()

    def qt(self, v: np.ndarray) -> np.ndarray:
        """Qᵀv (v of n rows), summed over the two halves of the rows."""
        A = self._X if self._X is not None else self.Q
        if self._X is not None and self._xty is not None and v is self._xty[0]:
            got = self._xty[1]
        else:
            got = sum(map_rows(lambda s: np.dot(A[s].T, v[s]), A.shape[0]), np.zeros(A.shape[1]))
        if self._X is None:
            return got
        return linalg.solve_triangular(self.R, got, trans="T", check_finite=False)

    def fit_rows(self, y: np.ndarray) -> FitRows:
        """Qᵀy first, then one pass over the rows (a block of Q at a time) for the residuals
        ê = y − QQᵀy, the leverages hᵢ = ‖row i of Q‖² and the HC3 meat Qᵀ diag(êᵢ²/(1 − hᵢ)²) Q
        (MacKinnon & White 1985), the same sums as :meth:`weighted_gram` of those weights. Rows of
        leverage one make that meat infinite or undefined; the fits refuse HC3 for them first."""
        qty = self.qt(y)
        X = self._X
        A = X if X is not None else self.Q
        n, k = A.shape
        resid, h = np.empty(n), np.empty(n)
        Rinv = self.Rinv if X is not None else None

        def half(rows: slice) -> np.ndarray:
            meat = np.zeros((k, k))
            for start in range(rows.start, rows.stop, BLOCK_ROWS):
                b = slice(start, min(start + BLOCK_ROWS, rows.stop))
                q = A[b] if Rinv is None else np.dot(A[b], Rinv)
                e = np.subtract(y[b], np.dot(q, qty), out=resid[b])
                hb = np.einsum("ij,ij->i", q, q, out=h[b])
                w = np.subtract(1.0, hb)
                np.square(w, out=w)
                np.divide(1.0, w, out=w)
                w *= np.square(e)
                a = A[b]
                meat += np.dot(a.T * w, a)  # see robustmod.lanes on np.dot
            return meat

        with np.errstate(divide="ignore", invalid="ignore"):
            meat = sum(map_rows(half, n), np.zeros((k, k)))
        if Rinv is not None:
            meat = Rinv.T @ meat @ Rinv
        return FitRows(qty, resid, h, meat)

    def leverages(self) -> np.ndarray:
        """hᵢ = ‖row i of Q‖², the diagonal of the hat matrix."""
        if self._X is not None:
            return row_norms(self._X, self.Rinv)
        return row_norms(self.Q)

    def weighted_gram(self, w: np.ndarray) -> np.ndarray:
        """Qᵀ diag(w) Q."""
        if self._X is None:
            return weighted_gram(self.Q, w)
        Rinv = self.Rinv
        return Rinv.T @ weighted_gram(self._X, w) @ Rinv


def _cholesky_r(X: np.ndarray, y: np.ndarray | None = None) -> tuple[np.ndarray | None, np.ndarray | None]:
    """(R from Cholesky of the column-scaled XᵀX = RᵀR, or None when that matrix is singular or its
    condition number exceeds CHOLESKY_QR_CONDITION; Xᵀy when y is given, summed in the same halves)."""
    k = X.shape[1]

    def half(s: slice) -> tuple[np.ndarray, np.ndarray | None]:
        return np.dot(X[s].T, X[s]), None if y is None else np.dot(X[s].T, y[s])

    parts = map_rows(half, X.shape[0])
    gram = sum((g for g, _ in parts), np.zeros((k, k)))
    xty = None if y is None else sum((v for _, v in parts if v is not None), np.zeros(k))
    R, _ = scaled_cholesky(gram, CHOLESKY_QR_CONDITION)
    return R, xty


def _cholesky_qr(X: np.ndarray) -> tuple[np.ndarray, np.ndarray] | None:
    """Q = XR⁻¹ and R of Cholesky QR (:func:`_cholesky_r`), or None."""
    R, _ = _cholesky_r(X)
    return None if R is None else (ThinQR(R, X=X).Q, R)


def _householder(X: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """LAPACK geqrf then orgqr, in place on one Fortran-ordered copy of X (scipy.linalg.qr makes
    further copies of the n × k arrays, which cost as much as the QR)."""
    k = X.shape[1]
    work = np.array(X, order="F", copy=True, dtype=float)
    qr, tau, _, info = lapack.dgeqrf(work, overwrite_a=1)
    if info != 0:  # pragma: no cover - LAPACK argument errors only
        return linalg.qr(X, mode="economic", check_finite=False)
    R = np.triu(qr[:k, :k])
    Q, _, info = lapack.dorgqr(qr, tau, overwrite_a=1)
    if info != 0:  # pragma: no cover
        return linalg.qr(X, mode="economic", check_finite=False)
    return Q, R


def factor(X: np.ndarray, y: np.ndarray | None = None) -> ThinQR:
    """The thin QR of X: from :data:`CHOLESKY_QR_ROWS` rows on, Cholesky QR when the column-scaled
    XᵀX is well conditioned (one cross-product, Q not stored: about a third of the time of
    Householder at n = 10⁶, k = 7); otherwise Householder. With ``y`` the Cholesky route sums Xᵀy
    in the same pass, for :meth:`ThinQR.qt` of that y."""
    X = np.asarray(X, dtype=float)
    with one_blas_thread():  # see robustmod.blas_threads
        if X.shape[0] >= CHOLESKY_QR_ROWS:
            R, xty = _cholesky_r(X, y)
            if R is not None:
                return ThinQR(R, X=X, xty=None if y is None or xty is None else (y, xty))
        Q, R = _householder(X)
        return ThinQR(R, Q=Q)


def thin_qr(X: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(Q, R) of :func:`factor` as two arrays (Q made)."""
    f = factor(X)
    return f.Q, f.R
