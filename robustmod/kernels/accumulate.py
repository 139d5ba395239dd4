"""Summaries that merge chunk by chunk: running means and sums of squares, and TSQR factors.

* :class:`RunningMoments` merges count, mean and centred sum of squares of each column with
  Chan, Golub & LeVeque's (1979) pairwise update, so no Σx² − n·x̄² cancellation occurs.
* :class:`TSQR` keeps the triangular factor R of the rows seen so far: for blocks A₁, A₂ the
  factor of [A₁; A₂] is the factor of [R₁; A₂] (Demmel et al. 2012, tall-skinny QR), so
  RᵀR = AᵀA without ever forming AᵀA.

Each has ``merge(other)``: the summary of its rows followed by those of ``other`` (partial
summaries of a file's partitions are combined so; only the rounding differs from one pass).
"""
from __future__ import annotations

import numpy as np
from scipy.linalg import lapack

#: Cross-products of [X y] and row counts of named groups of rows (Goldfeld–Quandt's "low" and "high").
GroupGrams = tuple[dict[str, np.ndarray], dict[str, int]]


class RunningMoments:
    """Count, mean and centred sum of squares of p columns, merged chunk by chunk."""

    def __init__(self, p: int) -> None:
        self.n = 0
        self.mean = np.zeros(p)
        self.m2 = np.zeros(p)
        self.minimum = np.full(p, np.inf)
        self.maximum = np.full(p, -np.inf)

    def add(self, values: np.ndarray) -> None:
        """Merge the rows of ``values`` (m × p, or m for p = 1)."""
        v = values.reshape(values.shape[0], -1)
        m = v.shape[0]
        if m == 0:
            return
        mean_b = v.mean(axis=0)
        m2_b = np.square(v - mean_b).sum(axis=0)
        total = self.n + m
        delta = mean_b - self.mean
        self.mean = self.mean + delta * (m / total)
        self.m2 = self.m2 + m2_b + np.square(delta) * (self.n * m / total)
        self.n = total
        np.minimum(self.minimum, v.min(axis=0), out=self.minimum)
        np.maximum(self.maximum, v.max(axis=0), out=self.maximum)

    def merge(self, other: RunningMoments) -> RunningMoments:
        """Self updated with the rows summarised by ``other`` (Chan et al.'s pairwise update); returns self."""
        if other.n == 0:
            return self
        if self.n == 0:
            self.n, self.mean, self.m2 = other.n, other.mean.copy(), other.m2.copy()
        else:
            total = self.n + other.n
            delta = other.mean - self.mean
            self.mean = self.mean + delta * (other.n / total)
            self.m2 = self.m2 + other.m2 + np.square(delta) * (self.n * other.n / total)
            self.n = total
        np.minimum(self.minimum, other.minimum, out=self.minimum)
        np.maximum(self.maximum, other.maximum, out=self.maximum)
        return self

    def variance(self, ddof: int = 1) -> np.ndarray:
        return self.m2 / max(self.n - ddof, 1)


class TSQR:
    """Upper-triangular R with RᵀR = AᵀA over all blocks added (Householder QR of [R; block])."""

    def __init__(self, p: int) -> None:
        self.p = p
        self.R = np.zeros((0, p))

    def add(self, block: np.ndarray, *, overwrite: bool = False) -> None:
        """Merge the rows of ``block``: its own factor first (LAPACK geqrf in place on one
        Fortran-ordered copy, or on ``block`` itself with ``overwrite`` when it is a Fortran-ordered
        float64 array), then the factor of the 2p × p stack of the two factors."""
        if block.shape[0] == 0:
            return
        own = overwrite and block.dtype == np.float64 and block.flags.f_contiguous
        work = block if own else np.array(block, dtype=float, order="F")
        qr, _, _, info = lapack.dgeqrf(work, overwrite_a=1)
        if info != 0:  # pragma: no cover - LAPACK argument errors only
            raise RuntimeError(f"geqrf failed with info {info}")
        r = np.triu(qr[: min(qr.shape), :])
        stacked = np.vstack([self.R, r]) if self.R.shape[0] else r
        self.R = np.asarray(np.linalg.qr(stacked, mode="r")) if self.R.shape[0] else r

    def merge(self, other: TSQR) -> TSQR:
        """Self updated with the rows of ``other``: the factor of the stacked factors [R₁; R₂]; returns self."""
        if other.R.shape[0] == 0:
            return self
        if self.R.shape[0] == 0:
            self.R = other.R.copy()
        else:
            self.R = np.asarray(np.linalg.qr(np.vstack([self.R, other.R]), mode="r"))
        return self

    def factor(self) -> np.ndarray:
        """The p × p factor (rows of zeros appended while fewer than p rows were seen)."""
        R = np.zeros((self.p, self.p))
        R[: self.R.shape[0]] = self.R[: self.p]
        return R


class CrossProducts:
    """Count, column means and centred cross-products C = Σ(aᵢ − ā)(aᵢ − ā)ᵀ of p columns, merged
    chunk by chunk with the pairwise update C = C₁ + C₂ + δδᵀ·n₁n₂/n (Chan, Golub & LeVeque 1979)."""

    def __init__(self, p: int) -> None:
        self.n = 0
        self.mean = np.zeros(p)
        self.C = np.zeros((p, p))

    def add(self, block: np.ndarray, *, overwrite: bool = False) -> None:
        """Merge the rows of ``block`` (m × p). With ``overwrite`` the block is centred in place;
        a Fortran-ordered block makes the product BᵀB several times faster than a C-ordered one."""
        m = block.shape[0]
        if m == 0:
            return
        mean_b = block.mean(axis=0)
        centred = block if overwrite else block.copy(order="F")
        centred -= mean_b
        C_b = np.dot(centred.T, centred)  # np.dot releases the GIL here; matmul of a transpose did not
        total = self.n + m
        delta = mean_b - self.mean
        self.C += C_b + np.outer(delta, delta) * (self.n * m / total)
        self.mean = self.mean + delta * (m / total)
        self.n = total

    def merge(self, other: CrossProducts) -> CrossProducts:
        """Self updated with the rows summarised by ``other`` (the same pairwise update); returns self."""
        if other.n == 0:
            return self
        if self.n == 0:
            self.n, self.mean, self.C = other.n, other.mean.copy(), other.C.copy()
            return self
        total = self.n + other.n
        delta = other.mean - self.mean
        self.C = self.C + other.C + np.outer(delta, delta) * (self.n * other.n / total)
        self.mean = self.mean + delta * (other.n / total)
        self.n = total
        return self
