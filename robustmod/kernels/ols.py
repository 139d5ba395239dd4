"""Streaming OLS with classical and HC0–HC5 covariances, in two passes over the chunks.

Pass 1 accumulates XᵀX, Xᵀy and yᵀy. With D = diag(XᵀX)^(-1/2) the column-scaled Gram matrix
G = D XᵀX D is factored by Cholesky, G = RₛᵀRₛ, when its condition number is at most
:data:`MAX_CONDITION` (the solve then loses at most about κ·ε ≈ 2e-10 relative accuracy);
otherwise, or when Cholesky fails, a TSQR pass over [X y] gives R directly (Householder
accuracy, as the in-memory QR). Either way R is upper triangular with RᵀR = XᵀX.

Pass 2 computes per chunk the residuals êᵢ = yᵢ − xᵢᵀβ̂, the rows qᵢ = R⁻ᵀxᵢ of the thin Q
factor (triangular solves, no inverse), the leverages hᵢ = ‖qᵢ‖² and the HC meat
Σ ωᵢ êᵢ² qᵢqᵢᵀ, so V = R⁻¹ [meat] R⁻ᵀ as :func:`robustmod.backends.hc.sandwich` forms it; the
weights ωᵢ come from :func:`robustmod.backends.hc.hc_weights`. HC5 needs the largest leverage
of all rows, so it adds one leverage-only pass. Classical V = s² R⁻¹R⁻ᵀ, s² = êᵀê/(n − k).
"""
from __future__ import annotations

import copy
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np
from scipy import linalg

from ..backends.base import Unavailable, WaldFit
from ..backends.hc import (
    HC_WEIGHTS,
    LEVERAGE_ONE_TOL,
    NEEDS_LEVERAGE_BELOW_ONE,
    hc_weights,
    r_inverse,
)
from ..cholesky import scaled_cholesky
from ..errors import InputError
from .accumulate import TSQR, RunningMoments
from .chunks import Chunk, ChunkSource, fold

#: Largest condition number of the scaled Gram matrix accepted for the Cholesky path.
MAX_CONDITION = 1e6
#: |R_jj| / ‖X_j‖ below this marks column j as aliased (the value the in-memory design uses).
ALIAS_TOL = 1e-11
#: Leverage-one rows named in a message.
SHOWN_ROWS = 10


@dataclass(frozen=True)
class Factor:
    """β̂ and the triangular factor R (RᵀR = XᵀX) after pass 1; ``method`` 'cholesky' or 'tsqr'."""

    beta: np.ndarray
    R: np.ndarray
    n: int
    k: int
    method: str
    condition: float


class ResidualConsumer(Protocol):
    """Anything that wants the OLS residuals of each chunk during pass 2 (e.g. the LM tests); ``merge``
    adds what another copy gathered from later rows (a file's partitions are passed separately)."""

    def add(self, chunk: Chunk, resid: np.ndarray) -> None: ...

    def merge(self, other: Any) -> Any: ...


class _Gram:
    """XᵀX, Xᵀy and n of the rows seen (pass 1)."""

    def __init__(self) -> None:
        self.G: np.ndarray | None = None
        self.b = np.zeros(0)
        self.n = 0

    def add(self, c: Chunk) -> None:
        if self.G is None:
            self.G, self.b = np.zeros((c.X.shape[1],) * 2), np.zeros(c.X.shape[1])
        self.G += c.X.T @ c.X
        self.b += c.X.T @ c.y
        self.n += c.size

    def merge(self, other: _Gram) -> _Gram:
        if other.G is not None:
            if self.G is None:
                self.G, self.b = other.G.copy(), other.b.copy()
            else:
                self.G, self.b = self.G + other.G, self.b + other.b
        self.n += other.n
        return self


class _Largest:
    """The largest value seen."""

    def __init__(self) -> None:
        self.value = 0.0

    def merge(self, other: _Largest) -> _Largest:
        self.value = max(self.value, other.value)
        return self


def _check_rank(R: np.ndarray, norms: np.ndarray, names: Sequence[str] | None, tol: float = ALIAS_TOL) -> None:
    rel = np.abs(np.diag(R)) / np.where(norms > 0, norms, 1.0)
    bad = np.flatnonzero((rel < tol) | (norms == 0))
    if bad.size:
        label = ", ".join(repr(names[int(j)]) if names else f"column {j + 1}" for j in bad)
        raise InputError(f"The design is rank-deficient: {label} is a linear combination of other terms; "
                         "drop or recode the aliased term(s).")


def _tsqr_factor(chunks: ChunkSource, k: int) -> tuple[np.ndarray, np.ndarray]:
    """(R, Qᵀy) from one TSQR pass over [X y]."""
    def step(acc: TSQR, c: Chunk) -> None:
        acc.add(np.column_stack([c.X, c.y]))

    Raug = fold(chunks, lambda: TSQR(k + 1), step).factor()
    return Raug[:k, :k], Raug[:k, k]


def factor_pass(chunks: ChunkSource, *, names: Sequence[str] | None = None,
                max_condition: float = MAX_CONDITION, alias_tol: float = ALIAS_TOL) -> Factor:
    """Pass 1: β̂ = (XᵀX)⁻¹Xᵀy by Cholesky of the scaled Gram matrix, or TSQR when ill-conditioned.

    A column with |R_jj| / ‖X_j‖ < ``alias_tol`` is refused as aliased (InputError naming it)."""
    gram = fold(chunks, _Gram, _Gram.add)
    G, b, n = gram.G, gram.b, gram.n
    if G is None or n == 0:
        raise InputError("The data have no rows to fit; check the file and the rows used.")
    k = G.shape[0]
    norms = np.sqrt(np.diag(G))
    if np.any(norms == 0) or n <= k:
        _check_rank(np.diag(norms), norms, names)
        raise InputError(f"The model has {k} coefficients but only {n} complete rows; it needs more rows.")
    R, condition = scaled_cholesky(G, max_condition)
    if R is not None:
        _check_rank(R, norms, names, alias_tol)
        return Factor(linalg.cho_solve((R, False), b, check_finite=False), R, n, k, "cholesky", condition)
    R, qty = _tsqr_factor(chunks, k)
    _check_rank(R, norms, names, alias_tol)
    beta = linalg.solve_triangular(R, qty, check_finite=False)
    return Factor(beta, R, n, k, "tsqr", condition)


def chunk_q(R: np.ndarray, X: np.ndarray) -> np.ndarray:
    """Rows of the thin Q factor for the rows of X, transposed: R⁻ᵀXᵀ (k × m), one triangular solve."""
    return linalg.solve_triangular(R, X.T, trans="T", lower=False, check_finite=False)


def max_leverage(chunks: ChunkSource, R: np.ndarray) -> float:
    """max hᵢ over all rows (a leverage-only pass, for HC5)."""
    def step(acc: _Largest, c: Chunk) -> None:
        acc.value = max(acc.value, float(np.square(chunk_q(R, c.X)).sum(axis=0).max(initial=0.0)))

    return fold(chunks, _Largest, step).value


@dataclass(frozen=True)
class StreamedOLS:
    """The OLS fit after pass 2: β̂, covariance of each requested kind (None where undefined), and facts."""

    beta: np.ndarray
    R: np.ndarray
    n: int
    k: int
    rss: float
    ss_total: float
    max_leverage: float
    leverage_one_rows: np.ndarray  # 0-based data positions (at most SHOWN_ROWS of them)
    leverage_one_count: int
    cov: dict[str, np.ndarray | None]
    method: str

    def fit(self, kind: str, term_names: tuple[str, ...], *, label: str | None = None,
            backend_id: str | None = None) -> WaldFit | Unavailable:
        """The Wald fit of ``kind`` ('ols' or an HC id), as :func:`robustmod.backends.ols.ols_fit` builds it."""
        backend_id = backend_id or kind
        label = label or ("OLS, classical SE" if kind == "ols" else f"OLS + {kind.upper()}")
        cov = self.cov[kind]
        if cov is None:
            shown = ", ".join(str(int(r) + 1) for r in self.leverage_one_rows)
            more = " …" if self.leverage_one_count > self.leverage_one_rows.size else ""
            return Unavailable(backend_id, label, f"{kind.upper()} is undefined: data row(s) {shown}{more} have "
                               "leverage 1 (each alone determines a coefficient); drop them or use HC0/HC1.")
        df = self.n - self.k
        extras: dict[str, object] = {"sigma": float(np.sqrt(self.rss / df)), "df_resid": df,
                                     "r_squared": float(1 - self.rss / self.ss_total) if self.ss_total > 0 else None}
        warnings: tuple[str, ...] = ()
        if kind != "ols":
            extras["max_leverage"] = self.max_leverage
            if self.leverage_one_count:
                warnings = ((f"{self.leverage_one_count} row(s) have leverage 1; their residuals are zero "
                             "and carry no variance information."),)
        return WaldFit(backend_id, label, term_names, self.beta, cov, df, warnings=warnings, extras=extras,
                       se_label="classical (homoscedastic)" if kind == "ols" else kind.upper())


class _ResidualSums:
    """What pass 2 gathers: RSS, moments of y, leverage facts, the HC meats and the consumers' sums."""

    def __init__(self, k: int, hc: Sequence[str], consumers: list[Any]) -> None:
        self.rss, self.hmax, self.n_ones = 0.0, 0.0, 0
        self.ymom = RunningMoments(1)
        self.ones: list[np.ndarray] = []
        self.meats = {kd: np.zeros((k, k)) for kd in hc}
        self.consumers = consumers

    def merge(self, other: _ResidualSums) -> _ResidualSums:
        self.rss += other.rss
        self.ymom.merge(other.ymom)
        self.hmax = max(self.hmax, other.hmax)
        self.n_ones += other.n_ones
        if sum(a.size for a in self.ones) < SHOWN_ROWS:  # the first rows in file order are the ones shown
            self.ones += other.ones
        for kd in self.meats:
            self.meats[kd] = self.meats[kd] + other.meats[kd]
        for mine, theirs in zip(self.consumers, other.consumers, strict=True):
            mine.merge(theirs)
        return self


def residual_pass(chunks: ChunkSource, factor: Factor, kinds: Iterable[str] = ("hc3",), *,
                  consumers: Sequence[ResidualConsumer] = ()) -> StreamedOLS:
    """Pass 2: residuals, leverages and the meat of every HC kind asked for; ``consumers`` also
    receive each chunk's residuals (the LM tests), so the diagnostics cost no further pass."""
    kinds = tuple(dict.fromkeys(kinds))
    unknown = [kd for kd in kinds if kd != "ols" and kd not in HC_WEIGHTS]
    if unknown:
        raise InputError(f"Unknown covariance kind(s) {unknown}; use 'ols' or one of {', '.join(HC_WEIGHTS)}.")
    beta, R, n, k = factor.beta, factor.R, factor.n, factor.k
    hc = [kd for kd in kinds if kd != "ols"]
    h_all_max = max_leverage(chunks, R) if "hc5" in hc else None

    def step(acc: _ResidualSums, c: Chunk) -> None:
        e = c.y - c.X @ beta
        acc.rss += float(e @ e)
        acc.ymom.add(c.y)
        for consumer in acc.consumers:
            consumer.add(c, e)
        if not hc:
            return
        U = chunk_q(R, c.X)
        h = np.einsum("ij,ij->j", U, U)
        acc.hmax = max(acc.hmax, float(h.max(initial=0.0)))
        at_one = np.flatnonzero(h >= 1.0 - LEVERAGE_ONE_TOL)
        acc.n_ones += at_one.size
        if at_one.size and sum(a.size for a in acc.ones) < SHOWN_ROWS:
            acc.ones.append(c.rows[at_one])
        e2 = e * e
        for kd in hc:
            if acc.n_ones and kd in NEEDS_LEVERAGE_BELOW_ONE:
                continue
            # HC5's exponent needs max hᵢ over all rows: append it so the shared weight function sees it.
            w = hc_weights(kd, h, n, k) if h_all_max is None else hc_weights(kd, np.append(h, h_all_max), n, k)[:-1]
            acc.meats[kd] += (U * (w * e2)) @ U.T

    sums = fold(chunks, lambda: _ResidualSums(k, hc, copy.deepcopy(list(consumers))), step)
    for consumer, got in zip(consumers, sums.consumers, strict=True):
        consumer.merge(got)
    rss, ymom, hmax, ones, n_ones, meats = sums.rss, sums.ymom, sums.hmax, sums.ones, sums.n_ones, sums.meats
    Rinv = r_inverse(R)
    cov: dict[str, np.ndarray | None] = {}
    for kd in kinds:
        if kd == "ols":
            cov[kd] = rss / (n - k) * (Rinv @ Rinv.T)
        elif n_ones and kd in NEEDS_LEVERAGE_BELOW_ONE:
            cov[kd] = None
        else:
            meat = 0.5 * (meats[kd] + meats[kd].T)
            cov[kd] = Rinv @ meat @ Rinv.T
    shown = np.concatenate(ones)[:SHOWN_ROWS] if ones else np.zeros(0, dtype=int)
    return StreamedOLS(beta, R, n, k, rss, float(ymom.m2[0]), hmax, shown, n_ones, cov, factor.method)


def streamed_ols(chunks: ChunkSource, kinds: Iterable[str] = ("hc3",), *, names: Sequence[str] | None = None,
                 consumers: Sequence[ResidualConsumer] = (), max_condition: float = MAX_CONDITION,
                 alias_tol: float = ALIAS_TOL) -> StreamedOLS:
    """OLS and its covariances over a chunk source: :func:`factor_pass` then :func:`residual_pass`."""
    factor = factor_pass(chunks, names=names, max_condition=max_condition, alias_tol=alias_tol)
    return residual_pass(chunks, factor, kinds, consumers=consumers)
