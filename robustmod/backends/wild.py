"""Wild bootstrap of the moderation model, vectorised over replicates (back-end ``wild``).

Fixed design X = QR (n × k), A = R⁻¹Qᵀ (k × n), HC weights ωᵢ of :mod:`.hc` (HC3 by
default), so the HC covariance of β̂ is V = A diag(ωᵢ êᵢ²) Aᵀ. A replicate with
auxiliary weights vᵢ (Rademacher, Mammen 1993 or Webb 2014) and base residuals ẽ has

    uᵢ = ẽᵢ vᵢ,   β* − β_base = A u,   e* = u − X A u,
    M_{jl} = Σᵢ A_{ji} A_{li} ωᵢ e*ᵢ²          (the HC covariance of β*, pair (j, l)),

and for any row L: se*(L)² = Σ_{jl} L_j L_l M_{jl}. Only β* − β_base (B × k) and M
(B × k(k+1)/2) are kept, so intervals for any L (probe values, the Johnson–Neyman
search, bands) come later at no refitting cost. Replicates are processed in chunks of
bounded size; inside a chunk everything is a matrix product.

Two bootstraps share the same weight draws:

* unrestricted (base β̂, residuals ê): bootstrap-t intervals [est − q*₁₋α/₂·se,
  est − q*α/₂·se] with t* = (Lβ* − Lβ̂)/se*(L), symmetric p = share of |t*| ≥ |t|, sup-t
  bands, bootstrap Wald tests;
* restricted, null imposed (Davidson & Flachaire 2008): base = least squares without the
  product-term column(s), residuals ẽ; t* (one product term) or the Wald statistic W*
  (several, e.g. a categorical moderator) of the product term(s) in the full model;
  p = share of |t*| ≥ |t| (or W* ≥ W).

Residuals are rescaled by 1/√(1 − hᵢ) (the "hc2" transform, hᵢ the leverage of the
model that produced them): under constant variance E[ẽᵢ²] = σ²(1 − hᵢ), so the
rescaled residuals give bootstrap errors with the right variance, while the leverage
correction of the t statistic itself is left to its HC3 standard error (MacKinnon 2012).
"""
from __future__ import annotations

import dataclasses
import math
import os
import time
from collections import deque
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from contextlib import AbstractContextManager, nullcontext
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
from scipy import linalg

from ..errors import InputError, option_error
from ..kernels.chunks import rows_per_chunk
from .base import (
    Backend,
    Estimates,
    Fit,
    JointTest,
    Line,
    Option,
    Unavailable,
    _as_rows,
    one_row_table,
    quadratic_forms,
)
from .hc import (
    HC_WEIGHTS,
    NEEDS_LEVERAGE_BELOW_ONE,
    design_leverages,
    hc_weights,
    leverage_one_mask,
    leverages,
    r_inverse,
    sandwich,
)
from .kernels import batched_quadratic, design_row_numbers, leverage_one_reason

if TYPE_CHECKING:  # pragma: no cover
    from ..design import Design
    from ..stream import StreamData
    from ..tables import Table

#: Said in the warnings of a wild bootstrap fitted on data read in chunks (docs/method-streaming.md).
STREAM_WEIGHTS_NOTE = ("Read in chunks: the bootstrap weights come from a counter-based stream (rows in fixed blocks "
                       "of 4096, each block seeded by (seed, batch, block)), so the replicates are other draws than "
                       "the in-memory back-end's; they do not depend on the chunk size.")

WEIGHT_KINDS = ("rademacher", "mammen", "webb")
TRANSFORMS = ("hc2", "hc3", "none")
WEIGHT_LABELS = {"rademacher": "Rademacher", "mammen": "Mammen", "webb": "Webb six-point"}
_TRANSFORM_WORDS = {"hc2": "e/√(1 − h)", "hc3": "e/(1 − h)", "none": "none"}

#: Doubles per working array of a chunk (8 MB); bounds peak memory whatever B is.
CHUNK_ELEMENTS = 1_000_000
#: Rows of L answered at once in :meth:`BootstrapFit.estimate` (rows × B doubles).
ROW_CHUNK_ELEMENTS = 4_000_000
#: Show a progress bar (when asked) only for runs of at least this many n × B elements.
PROGRESS_MIN_WORK = 50_000_000
#: The expanded kernel needs k(1 + k(k+1)/2) rows; above this the direct kernel is cheaper.
EXPANDED_MAX_ROWS = 160
#: Fewest replicates a chunk of CHUNK_ELEMENTS weights must hold; for wider data (n above about
#: 15,600) the rows are split into blocks instead, since a chunk of one replicate is matrix–vector
#: work (0.2 s per replicate at n = 10⁶, k = 7: B = 9999 took over half an hour).
MIN_BATCH = 64
#: Replicates per batch of the blocked kernel at most, and the bytes of one batch's compact
#: weights (64 Rademacher signs per word, or a one-byte code per Mammen or Webb weight).
MAX_BATCH = 256
BATCH_WEIGHT_BYTES = 32 * 2**20
#: Bytes of one block of weights (replicates × rows as doubles): about what a core's cache holds.
BLOCK_BYTES = 2 * 2**20
#: The blocked kernel keeps its fixed per-row arrays up to this size, else rebuilds them per batch.
KEEP_BYTES = 512 * 2**20

_SQRT5 = math.sqrt(5.0)
#: Mammen (1993) two-point weights: mean 0, variance 1, third moment 1.
MAMMEN_VALUES = np.array([-(_SQRT5 - 1) / 2, (_SQRT5 + 1) / 2])
MAMMEN_P_LOW = (_SQRT5 + 1) / (2 * _SQRT5)
#: Webb (2014) six-point weights, each with probability 1/6: mean 0, variance 1, third moment 0.
WEBB_VALUES = np.array([-math.sqrt(1.5), -1.0, -math.sqrt(0.5), math.sqrt(0.5), 1.0, math.sqrt(1.5)])
#: Byte → its eight bits as signs (bit 1 → −1), least significant bit first.
_SIGN_TABLE = 1.0 - 2.0 * np.unpackbits(np.arange(256, dtype=np.uint8)[:, None], axis=1,
                                        bitorder="little").astype(np.float64)


# ---- auxiliary weights ---------------------------------------------------------------
def _weight_width(kind: str, n: int) -> int:
    """Columns of a weight chunk: Rademacher rows use whole 64-bit words (padding is ignored)."""
    return 64 * ((n + 63) // 64) if kind == "rademacher" else n


def _weight_chunk(kind: str, n: int, rows: int, rng: np.random.Generator) -> np.ndarray:
    """``rows`` replicates of auxiliary weights, shape rows × _weight_width(kind, n).

    Every replicate consumes the same amount of the stream, so drawing B replicates in
    chunks gives the same numbers as drawing them at once.
    """
    if kind == "rademacher":
        raw = rng.bit_generator.random_raw((rows, (n + 63) // 64))
        return np.take(_SIGN_TABLE, raw.view(np.uint8), axis=0).reshape(rows, -1)
    u = rng.random((rows, n))
    if kind == "mammen":
        return MAMMEN_VALUES[(u >= MAMMEN_P_LOW).astype(np.intp)]
    return WEBB_VALUES[np.minimum((6.0 * u).astype(np.intp), 5)]


def draw_weights(kind: str, n: int, replications: int, rng: np.random.Generator) -> np.ndarray:
    """Auxiliary weights (replications × n) exactly as a fit with the same generator draws them."""
    if kind not in WEIGHT_KINDS:
        raise option_error("weights", f"one of {', '.join(WEIGHT_KINDS)}", kind)
    return _weight_chunk(kind, n, replications, rng)[:, :n]


def sign_patterns(n: int, start: int = 0, stop: int | None = None) -> np.ndarray:
    """Rademacher sign patterns number start … stop − 1 of all 2ⁿ (default all); row b holds the bits of b as signs."""
    b = np.arange(start, 2**n if stop is None else stop, dtype=np.int64)[:, None]
    return 1.0 - 2.0 * ((b >> np.arange(n, dtype=np.int64)) & 1).astype(np.float64)


def _enumerate(kind: str, n: int, replications: int) -> bool:
    """Rademacher with 2ⁿ ≤ B: enumerate every sign pattern instead of drawing B of them."""
    return kind == "rademacher" and n < 63 and 2**n <= replications


def residual_factor(transform: str, h: np.ndarray) -> np.ndarray:
    """Rescaling of residuals: 1/√(1−h) (hc2), 1/(1−h) (hc3) or 1; 0 at leverage one (residual is 0)."""
    one = leverage_one_mask(h)
    safe = np.where(one, 0.5, h)
    f = {"hc2": 1.0 / np.sqrt(1.0 - safe), "hc3": 1.0 / (1.0 - safe), "none": np.ones_like(h)}[transform]
    return np.where(one, 0.0, f)


# ---- the kernel ------------------------------------------------------------------------
def _pair_index(k: int) -> tuple[np.ndarray, np.ndarray]:
    return np.triu_indices(k)


@dataclass
class _Source:
    """One bootstrap sharing the weight draws: base residuals and the pairs (j, l) of M it needs."""

    resid: np.ndarray  # (n,) transformed base residuals
    pairs: np.ndarray  # indices into the upper-triangle pair list


def _expanded_factor(A: np.ndarray, X: np.ndarray, P: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The fixed parts of the expanded kernel: [A; (Xⱼ·Pₚ)ⱼₚ] ((k + k·m) × n, to be scaled by the
    base residuals) and T (m × k²) with Tₚⱼₗ = Σᵢ Pₚᵢ XᵢⱼXᵢₗ."""
    k, n = A.shape
    m = P.shape[0]
    base = np.vstack([A, (X.T[:, None, :] * P[None, :, :]).reshape(k * m, n)])
    return base, np.einsum("pi,ij,il->pjl", P, X, X).reshape(m, k * k)


def _expanded_meat(G: np.ndarray, T: np.ndarray, sq: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(D, M) from G = V·(base ⊙ ẽ)ᵀ (… × (k + k·m)): D = β* − β_base and
    M_p = sq_p − 2 Σⱼ Dⱼ Cⱼₚ + Σⱼₗ DⱼDₗ Tₚⱼₗ, sq_p = Σᵢ Pₚᵢ vᵢ²ẽᵢ² (see :class:`_Kernel`)."""
    m = T.shape[0]
    k = G.shape[-1] // (1 + m)
    D = np.ascontiguousarray(G[..., :k])
    C = G[..., k:].reshape(*G.shape[:-1], k, m)
    cross = np.einsum("...j,...jp->...p", D, C)
    quad = (D[..., :, None] * D[..., None, :]).reshape(*D.shape[:-1], k * k) @ T.T
    return D, sq - 2.0 * cross + quad


@dataclass
class _Rows:
    """The fixed per-row arrays of rows a … b − 1 of the weight width (rows from n on are padding)."""

    a: int
    b: int
    e: int  # min(b, n): rows a … e − 1 are data rows
    F_t: np.ndarray | None  # (b − a) × (columns of G), zero on padding rows
    resid: list[np.ndarray]  # per source, (e − a,)
    Pt: dict[int, np.ndarray]  # direct sources: (e − a) × m, P (one block) or P ⊙ ẽ (blocked)
    Pe2: dict[int, np.ndarray]  # weights of non-unit square: (e − a) × m, P ⊙ ẽ²
    At: np.ndarray | None = None  # (e − a) × k (one block)
    Xt: np.ndarray | None = None  # k × (e − a)


def _pair_gram(P: np.ndarray, X: np.ndarray) -> np.ndarray:
    """Tₚⱼₗ = Σᵢ Pₚᵢ XᵢⱼXᵢₗ as one matrix product (m × k²)."""
    m, k = P.shape[0], X.shape[1]
    W = (np.ascontiguousarray(P.T)[:, :, None] * X[:, None, :]).reshape(X.shape[0], m * k)
    return (W.T @ X).reshape(m, k * k)


class _Kernel:
    """β* − β_base and M for batches of weights, for several residual sources at once.

    Expanded form (a source needing few pairs m): with u = ẽ⊙v, D = Au and e* = u − XD,
    M_p = Σᵢ Pₚᵢ vᵢ²ẽᵢ² − 2 Σⱼ Dⱼ Σᵢ Pₚᵢ Xᵢⱼ uᵢ + Σⱼₗ DⱼDₗ Σᵢ Pₚᵢ XᵢⱼXᵢₗ with Pₚᵢ = A_{jᵢ}A_{lᵢ}ωᵢ,
    so one product of the weight chunk with a fixed (k + k·m) × n matrix gives everything
    (vᵢ² = 1 for Rademacher weights makes the first term a constant).
    Direct form (many pairs, k(1 + m) > EXPANDED_MAX_ROWS): a first product gives D = Au; then
    e* = u − XD is formed and M = (e*)² Pᵀ.

    Blocked (``block_rows`` given, for wide data): the rows are split into blocks of that many
    rows (a multiple of 64) and every sum over rows is accumulated block by block, so a batch of c
    replicates needs c × block_rows weights at a time besides its k-vectors and pair sums. The
    direct form then takes two passes over the blocks: the first gives D (its columns A ⊙ ẽ join
    the expanded ones in one product), the second the cross term Σᵢ Pₚᵢ ẽᵢvᵢ(XD)ᵢ of the
    expansion above, from (XD) ⊙ v times the fixed P ⊙ ẽ. The fixed per-row arrays of the blocks
    are kept when they fit in ``keep_bytes``, else rebuilt for every batch. Without blocks the
    operations are exactly those of one product over all rows.
    """

    def __init__(self, X: np.ndarray, A: np.ndarray, omega: np.ndarray, sources: list[_Source],
                 width: int, unit_square: bool, *, block_rows: int | None = None,
                 keep_bytes: int | None = None) -> None:
        n, k = X.shape
        self.n, self.k, self.width, self.unit_square = n, k, width, unit_square
        self.X, self.A, self.omega = X, A, omega
        self.jj, self.ll = _pair_index(k)
        self.sources = sources
        self.expanded = [k * (1 + len(s.pairs)) <= EXPANDED_MAX_ROWS for s in sources]
        self.single = block_rows is None or block_rows >= width
        self.ranges = list(_chunks(width, width if block_rows is None or self.single else int(block_rows)))
        self.direct = [i for i, ex in enumerate(self.expanded) if not ex]
        # Columns of G = V·F: each expanded source's [A; Xⱼ·Pₚ] ⊙ ẽ, and (blocked) each direct one's A ⊙ ẽ.
        self.offsets: dict[int, tuple[int, int]] = {}
        row = 0
        for i, s in enumerate(sources):
            if self.expanded[i] or not self.single:
                width_i = k * (1 + len(s.pairs)) if self.expanded[i] else k
                self.offsets[i] = (row, row + width_i)
                row += width_i
        self.columns = row
        # Sums over all rows: T (m × k²) and S2 = P ẽ² (m) of every source the expansion serves.
        self.T: dict[int, np.ndarray] = {}
        self.S2: dict[int, np.ndarray] = {}
        for i, s in enumerate(sources):
            if self.single and not self.expanded[i]:
                continue
            for a, b in self.ranges:
                e = min(b, n)
                if e <= a:
                    continue
                Pi = self._pairs_rows(s, a, e)
                if self.single:  # the one-product kernel's own sums
                    T = np.einsum("pi,ij,il->pjl", Pi, X[a:e], X[a:e]).reshape(Pi.shape[0], k * k)
                else:
                    T = _pair_gram(Pi, X[a:e])
                S2 = Pi @ s.resid[a:e] ** 2
                self.T[i] = T if i not in self.T else self.T[i] + T
                self.S2[i] = S2 if i not in self.S2 else self.S2[i] + S2
        # Doubles per row of the fixed arrays: F, the residuals, P ⊙ ẽ of the direct sources and
        # P ⊙ ẽ² (weights of non-unit square).
        per_row = self.columns + len(sources) + sum(
            len(s.pairs) for i, s in enumerate(sources) if not self.expanded[i] or not unit_square)
        keep = self.single or (keep_bytes is not None and 8 * per_row * n <= keep_bytes)
        self._kept = [self._rows(a, b) for a, b in self.ranges] if keep else None

    def _pairs_rows(self, s: _Source, a: int, e: int) -> np.ndarray:
        """Pₚᵢ = A_{jᵢ}A_{lᵢ}ωᵢ for the pairs of source ``s`` and rows a … e − 1 (m × (e − a))."""
        A = self.A[:, a:e]
        return A[self.jj[s.pairs]] * A[self.ll[s.pairs]] * self.omega[a:e]

    def _rows(self, a: int, b: int) -> _Rows:
        n, k = self.n, self.k
        e = min(b, n)
        A, X = self.A[:, a:e], self.X[a:e]
        blocks: list[np.ndarray] = []
        Pt: dict[int, np.ndarray] = {}
        Pe2: dict[int, np.ndarray] = {}
        for i, s in enumerate(self.sources):
            Pi = self._pairs_rows(s, a, e)
            r = s.resid[a:e]
            if not self.unit_square and (self.expanded[i] or not self.single):
                Pe2[i] = np.ascontiguousarray((Pi * r**2).T)
            if not self.expanded[i]:
                Pt[i] = np.ascontiguousarray(Pi.T if self.single else (Pi * r).T)
                if self.single:
                    continue
            m = Pi.shape[0]
            base = np.vstack([A, (X.T[:, None, :] * Pi[None, :, :]).reshape(k * m, e - a)]) \
                if self.expanded[i] else A
            F = np.zeros((base.shape[0], b - a))
            F[:, :e - a] = base * r
            blocks.append(F)
        F_t = np.ascontiguousarray(np.vstack(blocks).T) if blocks else None
        rows = _Rows(a, b, e, F_t, [s.resid[a:e] for s in self.sources], Pt, Pe2)
        if self.single and self.direct:
            rows.At, rows.Xt = np.ascontiguousarray(A.T), np.ascontiguousarray(X.T)
        return rows

    def _blocks(self) -> Iterator[_Rows]:
        if self._kept is not None:
            yield from self._kept
        else:
            for a, b in self.ranges:
                yield self._rows(a, b)

    def run(self, V: np.ndarray) -> list[tuple[np.ndarray, np.ndarray]]:
        """(D, M) for every source from a chunk of weights V (c × width)."""
        return self.batch(V.shape[0], lambda a, b: V if self.single else V[:, a:b])

    def batch(self, c: int, weights: Callable[[int, int], np.ndarray]) -> list[tuple[np.ndarray, np.ndarray]]:
        """(D, M) for every source for c replicates whose weights of rows a … b − 1 are ``weights(a, b)``
        (c × (b − a); asked once per block and pass)."""
        G, sq, D = self._first_pass(c, weights)
        M = self._second_pass(c, weights, D) if self.direct else {}
        out = []
        for i in range(len(self.sources)):
            s2 = sq[i] if i in sq else self.S2.get(i)
            if i in self.direct:
                if not self.single:  # M held the cross term: expand as in the class docstring
                    assert s2 is not None
                    quad = (D[i][:, :, None] * D[i][:, None, :]).reshape(c, self.k**2) @ self.T[i].T
                    M[i] = s2 - 2.0 * M[i] + quad
                out.append((D[i], M[i]))
                continue
            a, b = self.offsets[i]
            assert G is not None and s2 is not None  # an expanded source has its columns in G
            out.append(_expanded_meat(G[:, a:b], self.T[i], s2))
        return out

    def _first_pass(self, c: int, weights: Callable[[int, int], np.ndarray]
                    ) -> tuple[np.ndarray | None, dict[int, np.ndarray], dict[int, np.ndarray]]:
        """G = V·F, Σ (P ⊙ ẽ²)·v² (weights of non-unit square) and D of the direct sources."""
        G = np.zeros((c, self.columns)) if self.columns else None
        sq = {i: np.zeros((c, len(self.sources[i].pairs))) for i in self.offsets} if not self.unit_square else {}
        D = {i: np.zeros((c, self.k)) for i in self.direct} if self.single else {}
        for blk in self._blocks():
            V = weights(blk.a, blk.b)
            if G is not None and blk.F_t is not None:
                G += V @ blk.F_t
            nb = blk.e - blk.a
            if sq:
                V2 = np.square(V[:, :nb])
                for i in sq:
                    sq[i] += V2 @ blk.Pe2[i]
            for i in D:
                assert blk.At is not None  # kept for the direct form in one block
                D[i] += (V[:, :nb] * blk.resid[i]) @ blk.At
        if not self.single:
            assert G is not None or not self.direct  # a blocked direct source has its D columns in G
            for i in self.direct:
                a, b = self.offsets[i]
                D[i] = np.ascontiguousarray(G[:, a:b])  # type: ignore[index]
        return G, sq, D

    def _second_pass(self, c: int, weights: Callable[[int, int], np.ndarray], D: dict[int, np.ndarray]
                     ) -> dict[int, np.ndarray]:
        """Direct sources: M = (e*)² Pᵀ (one block), or the cross term Σᵢ (P ⊙ ẽ)ₚᵢ vᵢ (XD)ᵢ (blocked)."""
        M = {i: np.zeros((c, len(self.sources[i].pairs))) for i in self.direct}
        scratch: dict[int, np.ndarray] = {}  # one work array per block width, reused
        for blk in self._blocks():
            V = weights(blk.a, blk.b)
            nb = blk.e - blk.a
            for i in self.direct:
                if self.single:
                    assert blk.Xt is not None  # kept for the direct form in one block
                    U = V[:, :nb] * blk.resid[i]
                    E = D[i] @ blk.Xt
                    np.subtract(U, E, out=E)
                    np.square(E, out=E)
                else:
                    E = scratch.setdefault(nb, np.empty((c, nb)))
                    np.matmul(D[i], self.X[blk.a:blk.e].T, out=E)
                    np.multiply(E, V[:, :nb], out=E)
                M[i] += E @ blk.Pt[i]
        return M


def _chunks(total: int, size: int) -> Iterator[tuple[int, int]]:
    for start in range(0, total, size):
        yield start, min(total, start + size)


def _batch_plan(kind: str, n: int) -> tuple[int, int]:
    """(replicates per batch, rows per block) of the blocked kernel, from the memory budgets.

    A batch holds its weights compactly (:class:`_BatchWeights`), so BATCH_WEIGHT_BYTES bounds it;
    a block of it (batch × rows doubles) fits in BLOCK_BYTES; rows come in whole 64-row words.
    """
    per_replicate = 8 * ((n + 63) // 64) if kind == "rademacher" else n
    batch = int(min(MAX_BATCH, max(MIN_BATCH, BATCH_WEIGHT_BYTES // per_replicate)))
    rows = rows_per_chunk(BLOCK_BYTES, batch, factor=1)
    return batch, max(64, rows // 64 * 64)


class _BatchWeights:
    """The weights of one batch of replicates, drawn exactly as :func:`_weight_chunk` draws them
    (same stream, same values) but kept compact and expanded to doubles block by block."""

    def __init__(self, kind: str, n: int, reps: int, rng: np.random.Generator) -> None:
        self.kind, self.reps = kind, reps
        if kind == "rademacher":
            self.codes = rng.bit_generator.random_raw((reps, (n + 63) // 64))
            return
        self.codes = np.empty((reps, n), dtype=np.uint8)
        for r in range(reps):  # row by row: the same stream as one reps × n draw
            u = rng.random(n)
            self.codes[r] = (u >= MAMMEN_P_LOW) if kind == "mammen" else np.minimum(6.0 * u, 5.0)
        self.values = MAMMEN_VALUES if kind == "mammen" else WEBB_VALUES

    def __call__(self, a: int, b: int) -> np.ndarray:
        """Weights of rows a … b − 1 (a and b multiples of 64, or b the width), reps × (b − a)."""
        if self.kind == "rademacher":
            bits = self.codes[:, a // 64:b // 64].view(np.uint8)
            return np.take(_SIGN_TABLE, bits, axis=0).reshape(self.reps, -1)
        return self.values[self.codes[:, a:b]]


def _workers() -> int:
    """Threads for the kernel's batches: the cores this process may use, at most the BLAS threads
    allowed (an engine worker limited to one BLAS thread gets one)."""
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover  (not Linux)
        cores = os.cpu_count() or 1
    try:
        from threadpoolctl import threadpool_info  # noqa: PLC0415  (optional; only the speed changes)
    except ImportError:  # pragma: no cover
        return max(1, cores)
    blas = [int(p.get("num_threads", 1)) for p in threadpool_info() if p.get("user_api") == "blas"]
    return max(1, min([cores, *blas]))


def _one_blas_thread() -> AbstractContextManager[Any]:
    """One BLAS thread per call while the batches run in parallel threads: the products of a block
    are small, and threads inside them cost more in hand-over than they save (far more on a busy
    machine: measured 10–40× slower with two BLAS threads and one core taken by other work)."""
    try:
        from threadpoolctl import threadpool_limits  # noqa: PLC0415  (optional; only the speed changes)
    except ImportError:  # pragma: no cover
        return nullcontext()
    return threadpool_limits(1, user_api="blas")


def _run_batches(kernel: _Kernel, draw: Callable[[int, int], Any], B: int, batch: int,
                 store: Callable[[int, int, list[tuple[np.ndarray, np.ndarray]]], None],
                 advance: Callable[[int], None]) -> None:
    """All B replicates through the kernel, batch after batch, on one BLAS thread per call.

    ``draw(a, b)`` gives the weights of replicates a … b − 1 (an array for :meth:`_Kernel.run`, or
    :class:`_BatchWeights` for the blocked kernel); it is called here in replicate order, so the
    stream is consumed as by one B × n draw. The batches run on worker threads, at most one more
    batch alive than there are workers. The same products run whatever the thread count, so the
    draws do not depend on it.
    """
    def work(c: int, w: Any) -> list[tuple[np.ndarray, np.ndarray]]:
        return kernel.run(w) if isinstance(w, np.ndarray) else kernel.batch(c, w)

    workers = _workers()
    with _one_blas_thread():
        if workers == 1:
            for a, b in _chunks(B, batch):
                store(a, b, work(b - a, draw(a, b)))
                advance(b - a)
            return
        with ThreadPoolExecutor(max_workers=workers) as pool:
            pending: deque[tuple[int, int, Future[list[tuple[np.ndarray, np.ndarray]]]]] = deque()
            for a, b in _chunks(B, batch):
                pending.append((a, b, pool.submit(work, b - a, draw(a, b))))
                while len(pending) > workers:
                    a0, b0, done = pending.popleft()
                    store(a0, b0, done.result())
                    advance(b0 - a0)
            for a0, b0, done in pending:
                store(a0, b0, done.result())
                advance(b0 - a0)


def _share_at_least(stat_star: np.ndarray, stat: np.ndarray) -> np.ndarray:
    """Bootstrap p: share of replicates (last axis) with statistic ≥ the observed one."""
    return (stat_star >= stat[..., None]).mean(axis=-1)


def _safe_ratio(num: np.ndarray, den: np.ndarray) -> np.ndarray:
    """num / den where den > 0, else 0 (one division, only where it is defined)."""
    num, den = np.asarray(num, dtype=float), np.asarray(den, dtype=float)
    out = np.zeros(np.broadcast_shapes(num.shape, den.shape))
    np.divide(num, den, out=out, where=den > 0)
    return out


def _full_from_pairs(Mp: np.ndarray, q: int) -> np.ndarray:
    """Symmetric q × q blocks (… × q × q) from their upper-triangle entries (… × q(q+1)/2)."""
    jj, ll = np.triu_indices(q)
    out = np.empty(Mp.shape[:-1] + (q, q))
    out[..., jj, ll] = Mp
    out[..., ll, jj] = Mp
    return out


def _pairs_within(cols: tuple[int, ...], k: int) -> np.ndarray:
    """Positions in the k-column upper-triangle pair list of the pairs among ``cols`` (in their own triu order).

    Pair (a, b), a ≤ b, sits at a·(2k − a + 1)/2 + (b − a) in ``np.triu_indices(k)`` order.
    """
    c = np.asarray(cols, dtype=np.intp)
    i, j = np.triu_indices(c.size)
    a, b = np.minimum(c[i], c[j]), np.maximum(c[i], c[j])
    return a * (2 * k - a + 1) // 2 + (b - a)


# ---- the fit -----------------------------------------------------------------------------
class BootstrapFit(Fit):
    """Answers for any L from wild-bootstrap draws of β* and of its HC covariance.

    ``delta`` (B × k) holds β* − β̂ and ``meat`` (B × k(k+1)/2) the pair entries M of the
    unrestricted bootstrap; ``null`` maps a tuple of product-term columns to the
    null-imposed (β*_S, M_SS) draws of the restricted bootstrap.
    """

    kind = "bootstrap"

    def __init__(self, backend_id: str, label: str, term_names: tuple[str, ...], params: np.ndarray,
                 cov: np.ndarray, delta: np.ndarray, meat: np.ndarray,
                 null: dict[tuple[int, ...], tuple[np.ndarray, np.ndarray]], interval_label: str,
                 **kwargs: Any) -> None:
        super().__init__(backend_id, label, term_names, params, **kwargs)
        self.cov = np.asarray(cov, dtype=float)
        self.delta = delta
        self.meat = meat
        self.null = null
        self.interval_label = interval_label
        for arr in (self.cov, self.delta, self.meat):
            arr.setflags(write=False)
        k = self.params.size
        jj, ll = _pair_index(k)
        self._jj, self._ll = jj, ll
        self._mult = np.where(jj == ll, 1.0, 2.0)
        self.null_p = {cols: self._null_p(cols) for cols in null}

    @property
    def replications(self) -> int:
        return int(self.delta.shape[0])

    # ---- draws for rows of L -------------------------------------------------------------
    def _var_star(self, L: np.ndarray) -> np.ndarray:
        """se*(L)² for every row and replicate (m × B)."""
        coef = L[:, self._jj] * L[:, self._ll] * self._mult
        return coef @ self.meat.T

    def t_star(self, L: np.ndarray) -> np.ndarray:
        """Unrestricted bootstrap t* = (Lβ* − Lβ̂)/se*(L), shape m × B."""
        L = _as_rows(L, self.params.size)
        return _safe_ratio(L @ self.delta.T, np.sqrt(np.maximum(self._var_star(L), 0.0)))

    def null_t_star(self, column: int) -> np.ndarray:
        """Null-imposed bootstrap t* of the product-term coefficient in ``column`` (length B)."""
        b, m = self.null[(column,)]
        return _safe_ratio(b[:, 0], np.sqrt(m[:, 0]))

    def _null_wald(self, cols: tuple[int, ...]) -> tuple[float, np.ndarray]:
        """Observed HC Wald statistic of β_S = 0 and its null-imposed bootstrap draws W*."""
        b, m = self.null[cols]
        beta = self.params[list(cols)]
        V = self.cov[np.ix_(cols, cols)]
        W = float(batched_quadratic(beta, V))
        W_star = batched_quadratic(b, _full_from_pairs(m, len(cols)))
        return W, W_star

    def _null_p(self, cols: tuple[int, ...]) -> float:
        W, W_star = self._null_wald(cols)
        return float(_share_at_least(W_star, np.array(W)))

    # ---- the Fit interface -----------------------------------------------------------------
    def estimate(self, L: np.ndarray, alpha: float, *, simultaneous: bool = False) -> Estimates:
        """L·β̂, HC se, bootstrap-t interval (sup-t band when ``simultaneous``) and the symmetric
        unrestricted bootstrap p (share of |t*| ≥ |t|).

        The answer for c·L is the answer for L scaled by c (p unchanged) for any c ≠ 0; the
        null-imposed test is asked for by name with :meth:`test_coefficients`.
        """
        L = _as_rows(L, self.params.size)
        est = L @ self.params
        se = np.sqrt(np.maximum(quadratic_forms(L, self.cov), 0.0))
        return self._answer(est, se, lambda a, b: self.t_star(L[a:b]), alpha, simultaneous)

    def _answer(self, est: np.ndarray, se: np.ndarray, t_star: Callable[[int, int], np.ndarray], alpha: float,
                simultaneous: bool) -> Estimates:
        """Bootstrap-t intervals, p and sup-t band from the draws ``t_star(a, b)`` of rows a … b − 1."""
        m = est.size
        t = _safe_ratio(est, se)
        q_lo, q_hi, p = np.empty(m), np.empty(m), np.empty(m)
        sup = np.zeros(self.replications)
        step = max(1, ROW_CHUNK_ELEMENTS // max(1, self.replications))
        band = simultaneous and m > 1  # a band needs only the sup of |t*|, not each row's quantiles
        for a, b in _chunks(m, step):
            ts = t_star(a, b)
            abs_ts = np.abs(ts)
            p[a:b] = _share_at_least(abs_ts, np.abs(t[a:b]))
            if simultaneous:
                np.maximum(sup, abs_ts.max(axis=0), out=sup)
            if not band:  # ts is not needed after this: partition it in place
                q_lo[a:b], q_hi[a:b] = np.quantile(ts, [alpha / 2, 1 - alpha / 2], axis=1, method="weibull",
                                                   overwrite_input=True)
        if band:
            c = float(np.quantile(sup, 1 - alpha, method="weibull"))
            lower, upper, label = est - c * se, est + c * se, f"{self.interval_label}, sup-t band"
        else:
            lower, upper, label = est - q_hi * se, est - q_lo * se, self.interval_label
        return Estimates(est, se, lower, upper, p, 1 - alpha, label, {"statistic": t})

    def along(self, L0: np.ndarray, L1: np.ndarray) -> Line:
        """Answers along L(w) = L0 + w·L1 from one pass over the replicates (see :class:`_BootstrapLine`)."""
        return _BootstrapLine(self, L0, L1)

    def joint_test(self, L: np.ndarray, alpha: float) -> JointTest:
        """Unrestricted bootstrap HC Wald test of L·β = 0 (W* centred at β̂); p = share of W* ≥ W.

        Statistic reported as W/q. Invariant to rescaling the rows of L.
        """
        L = _as_rows(L, self.params.size)
        q = L.shape[0]
        r = L @ self.params
        W = float(batched_quadratic(r, L @ self.cov @ L.T))
        d = self.delta @ L.T  # B × q
        S = np.einsum("aj,bl,rjl->rab", L, L, self._meat_full())
        W_star = batched_quadratic(d, S)
        p = float(_share_at_least(W_star, np.array(W)))
        method = f"wild bootstrap HC Wald, unrestricted ({q} df, B = {self.replications})"
        return JointTest(W / q, q, None, p, method, bool(p < alpha))

    def coefficients(self, alpha: float) -> Estimates:
        """Every coefficient (L = identity); the p of β_j = 0 is the null-imposed one for each
        product-term column j, whose restricted bootstrap the fit drew (:meth:`test_coefficients`)."""
        est = self.estimate(np.eye(self.params.size), alpha)
        p = est.p.copy() if est.p is not None else None
        for cols in self.null:
            if len(cols) == 1 and p is not None:
                p[cols[0]] = self.null_p[cols]
        return dataclasses.replace(est, p=p)

    def test_coefficients(self, columns: Sequence[int], alpha: float) -> JointTest:
        """Null-imposed test of β_j = 0 for j in ``columns`` (Davidson & Flachaire 2008) when the
        fit drew the restricted bootstrap for exactly those columns (the product terms, alone or
        together); otherwise the unrestricted test of the unit rows. p = share of W* ≥ W, with
        W = t² for one column; the statistic is W/q."""
        key = tuple(sorted({int(c) for c in columns}))
        if key not in self.null:
            return super().test_coefficients(columns, alpha)
        W, _ = self._null_wald(key)
        p = self.null_p[key]
        q = len(key)
        method = f"wild bootstrap HC Wald, null imposed ({q} df, B = {self.replications})"
        return JointTest(W / q, q, None, p, method, bool(p < alpha))

    def report_tables(self) -> tuple[Table, ...]:
        """The settings of this bootstrap (from its extras): replications, weights, SE type, enumeration, null."""
        ex = self.extras
        weights = ex.get("weights")
        notes = []
        if ex.get("enumerated"):
            notes.append(f"Every one of the {ex.get('sign_patterns')} Rademacher sign patterns was used instead of "
                         f"{ex.get('replications_requested')} random draws.")
        cells = [
            ("replications", "Replications", "integer", ex.get("replications")),
            ("weights", "Weight distribution", "text", WEIGHT_LABELS.get(weights, weights) if weights else None),
            ("se", "Standard error of the bootstrap t", "text", str(ex["se"]).upper() if ex.get("se") else None),
            ("residual_transform", "Residual rescaling", "text",
             _TRANSFORM_WORDS.get(str(ex.get("residual_transform")), ex.get("residual_transform"))),
            ("enumerated", "All sign patterns enumerated", "flag", ex.get("enumerated")),
            ("null_imposed", "Null imposed for the product-term test", "flag", bool(self.null)),
        ]
        return (one_row_table(f"{self.backend_id}.settings", "Wild bootstrap settings", self.backend_id, cells,
                              notes),)

    def _meat_full(self) -> np.ndarray:
        """B × k × k HC covariance draws of β* (only built for joint tests of arbitrary L)."""
        return _full_from_pairs(self.meat, self.params.size)


class _BootstrapLine(Line):
    """A bootstrap fit along L(w) = L0 + w·L1, with the replicates read once.

    Lβ* − Lβ̂ = d₀ + w·d₁ and se*(L(w))² = s₀₀ + 2w·s₀₁ + w²·s₁₁ with B-vectors d₀, d₁, s₀₀, s₀₁,
    s₁₁ computed once from the stored draws, so the grid search, its root refinement, the band
    and the curve cost O(B) per value w instead of a pass over the B × k(k+1)/2 draws.
    """

    def __init__(self, fit: BootstrapFit, L0: np.ndarray, L1: np.ndarray) -> None:
        super().__init__(fit, L0, L1)
        self.boot = fit
        L = np.vstack([self.L0, self.L1])
        self.d0, self.d1 = L @ fit.delta.T
        jj, ll, mult = fit._jj, fit._ll, fit._mult
        cross = 0.5 * (L[0, jj] * L[1, ll] + L[1, jj] * L[0, ll]) * mult
        self.s00, self.s01, self.s11 = np.vstack([L[0, jj] * L[0, ll] * mult, cross, L[1, jj] * L[1, ll] * mult]) @ fit.meat.T

    def t_star(self, w: np.ndarray) -> np.ndarray:
        """t* at each w (len(w) × B)."""
        w = np.asarray(w, dtype=float)[:, None]
        var = self.s00[None, :] + 2.0 * w * self.s01[None, :] + w * w * self.s11[None, :]
        np.maximum(var, 0.0, out=var)
        return _safe_ratio(self.d0[None, :] + w * self.d1[None, :], np.sqrt(var, out=var))

    def estimate(self, w: np.ndarray, alpha: float, *, simultaneous: bool = False) -> Estimates:
        w = np.atleast_1d(np.asarray(w, dtype=float))
        L = self.rows(w)
        est = L @ self.boot.params
        se = np.sqrt(np.maximum(quadratic_forms(L, self.boot.cov), 0.0))
        return self.boot._answer(est, se, lambda a, b: self.t_star(w[a:b]), alpha, simultaneous)


# ---- the back-end --------------------------------------------------------------------------
class WildBootstrapBackend(Backend):
    """Wild bootstrap with an HC-type t statistic; null imposed for the product term.

    Parameters
    ----------
    replications : int, default=9999
        Bootstrap replicates B (B + 1 a multiple of 100 keeps α(B + 1) whole for common α).
    weights : {"rademacher", "mammen", "webb"}, default="rademacher"
        Auxiliary weight distribution (Liu 1988; Mammen 1993; Webb 2014).
    se : str, default="hc3"
        HC estimator of the t statistic (hc0 … hc5).
    transform : {"hc2", "hc3", "none"}, default="hc2"
        Rescaling of the base residuals: ẽᵢ/√(1−hᵢ), ẽᵢ/(1−hᵢ) or none.

    Examples
    --------
    >>> from robustmod import ModelSpec, build_design
    >>> from robustmod.demo import demo_data
    >>> spec = ModelSpec(formula="grain_yield ~ fertiliser * soil_moisture", focal="fertiliser",
    ...                  moderators=("soil_moisture",))
    >>> fit = WildBootstrapBackend(replications=999).fit(build_design(demo_data(), spec), seed=1)
    >>> fit.kind, fit.extras["replications"]
    ('bootstrap', 999)
    """

    id = "wild"
    label = "Wild bootstrap (HC3-t, Rademacher)"
    assumes_constant_variance = False
    assumes_independent_rows = True
    cost = "moderate"
    options = (
        Option("replications", "integer", 9999, "Bootstrap replicates B (B + 1 a multiple of 100 keeps "
               "alpha·(B + 1) whole).", low=99, high=1_000_000),
        Option("weights", "text", "rademacher", "Auxiliary weight distribution (Liu 1988; Mammen 1993; Webb 2014).",
               choices=WEIGHT_KINDS, case="insensitive"),
        Option("se", "text", "hc3", "HC estimator of the bootstrap t statistic.", choices=tuple(HC_WEIGHTS),
               case="insensitive"),
        Option("transform", "text", "hc2", "Rescaling of the base residuals: e/sqrt(1 - h), e/(1 - h) or none.",
               choices=TRANSFORMS, case="insensitive"),
    )
    #: Inside each simulated dataset of a calibration study fewer replications suffice.
    calibration_options = {"replications": 399}
    calibration_note = ("The wild bootstrap used 399 replications per simulated dataset "
                        "(the main comparison may use more).")

    replications: int
    weights: str
    se: str
    transform: str

    streams = True

    def finish_options(self) -> None:
        self.label = f"Wild bootstrap ({self.se.upper()}-t, {WEIGHT_LABELS[self.weights]})"

    def fit_stream(self, data: StreamData, *, seed: int, progress: bool = False) -> Fit | Unavailable:
        """Replicate batches over the chunks (:func:`robustmod.kernels.wild.streamed_wild`); the weights
        differ from the in-memory draws by design, which the fit's warnings say."""
        from ..kernels.wild import BATCH, streamed_wild  # noqa: PLC0415  (kernels import the back-ends)

        d = data.design
        with data.stage(lambda i: f"wild bootstrap, replicates {(i - 3) // 2 * BATCH + 1}–"
                        f"{min(self.replications, ((i - 3) // 2 + 1) * BATCH)}" if i > 3 else "wild bootstrap: fits"):
            fit = streamed_wild(data.chunks, d.term_names, d.interaction_columns, replications=self.replications,
                                weights=self.weights, se=self.se, transform=self.transform, seed=seed)
        if isinstance(fit, Unavailable):
            return Unavailable(self.id, self.label, fit.reason)
        fit.label = self.label
        fit.warnings = (*fit.warnings, STREAM_WEIGHTS_NOTE)
        return fit

    # ---- shared pieces -------------------------------------------------------------------
    def _omega(self, design: Design) -> tuple[np.ndarray, np.ndarray, np.ndarray] | str:
        """(A, ω, h) of the full model, or the reason the HC weights are undefined."""
        Q, R = design.qr
        n, k = Q.shape
        h = design_leverages(design)
        if self.se in NEEDS_LEVERAGE_BELOW_ONE and (reason := leverage_one_reason(
                h, self.se.upper(), design_row_numbers(design), "drop them or set wild.se=hc0")):
            return reason
        A = r_inverse(R) @ Q.T
        return A, hc_weights(self.se, h, n, k), h

    def _null_sets(self, design: Design) -> list[tuple[int, ...]]:
        cols = tuple(int(c) for c in design.interaction_columns)
        sets: list[tuple[int, ...]] = [(c,) for c in cols]
        return sets + [cols] if len(cols) > 1 else sets

    def _restricted(self, X: np.ndarray, cols: tuple[int, ...], Y: np.ndarray) -> np.ndarray:
        """Transformed residuals of Y (n or n × D) on X without the columns ``cols``."""
        keep = [j for j in range(X.shape[1]) if j not in cols]
        Q0, _ = np.linalg.qr(X[:, keep], mode="reduced")
        resid = Y - Q0 @ (Q0.T @ Y)
        f = residual_factor(self.transform, leverages(Q0))
        return resid * (f if resid.ndim == 1 else f[:, None])

    # ---- fit ---------------------------------------------------------------------------------
    def fit(self, design: Design, *, seed: int, progress: bool = False) -> Fit | Unavailable:
        """Unrestricted and null-imposed wild bootstraps with the same weight draws."""
        if design.clusters is not None:  # clustered rows: one weight per cluster
            from .wild_cluster import wild_cluster_fit  # noqa: PLC0415
            return wild_cluster_fit(self, design, seed=seed, progress=progress)
        t0 = time.perf_counter()
        got = self._omega(design)
        if isinstance(got, str):
            return Unavailable(self.id, self.label, got)
        A, omega, h = got
        X, y = design.X, design.y
        n, k = X.shape
        Q, R = design.qr
        qty = Q.T @ y
        beta = linalg.solve_triangular(R, qty, check_finite=False)
        resid = y - Q @ qty
        cov = sandwich(Q, r_inverse(R), omega * resid**2)
        warnings: list[str] = []
        enum = _enumerate(self.weights, n, self.replications)
        B = 2**n if enum else self.replications
        if enum:
            warnings.append(f"With {n} rows there are only {B} distinct Rademacher sign patterns; all were "
                            f"enumerated instead of drawing {self.replications} replicates.")
        null_sets = self._null_sets(design)
        sources = [_Source(resid * residual_factor(self.transform, h), np.arange(k * (k + 1) // 2))]
        for cols in null_sets:
            sources.append(_Source(self._restricted(X, cols, y), _pairs_within(cols, k)))
        width = n if enum else _weight_width(self.weights, n)
        blocked = not enum and CHUNK_ELEMENTS // width < MIN_BATCH
        batch, block_rows = _batch_plan(self.weights, n) if blocked else (max(1, CHUNK_ELEMENTS // width), None)
        kernel = _Kernel(X, A, omega, sources, width, unit_square=self.weights == "rademacher",
                         block_rows=block_rows, keep_bytes=KEEP_BYTES)
        delta = np.empty((B, k))
        meat = np.empty((B, k * (k + 1) // 2))
        null = {cols: (np.empty((B, len(cols))), np.empty((B, len(s.pairs))))
                for cols, s in zip(null_sets, sources[1:], strict=False)}

        def store(a: int, b: int, results: list[tuple[np.ndarray, np.ndarray]]) -> None:
            delta[a:b], meat[a:b] = results[0]
            for cols, (D, M) in zip(null_sets, results[1:], strict=False):
                null[cols][0][a:b] = D[:, list(cols)]
                null[cols][1][a:b] = M

        rng = np.random.default_rng(seed)
        with _progress(progress and n * B * len(sources) >= PROGRESS_MIN_WORK, B, self.label) as advance:
            if blocked:
                _run_batches(kernel, lambda a, b: _BatchWeights(self.weights, n, b - a, rng), B, batch, store, advance)
            else:
                _run_batches(kernel, lambda a, b: sign_patterns(n, a, b) if enum else
                             _weight_chunk(self.weights, n, b - a, rng), B, batch, store, advance)
        interval = f"wild bootstrap-t ({WEIGHT_LABELS[self.weights]}, B = {B})"
        reliable = True
        alpha = float(design.spec.alpha)
        if enum and 2.0 / B >= alpha:
            reliable = False
            warnings.append(f"The smallest attainable bootstrap p with {B} sign patterns is {2.0 / B:.3g}, not below "
                            f"alpha = {alpha:g}; the wild bootstrap cannot reject here (more rows are needed).")
        fit = BootstrapFit(self.id, self.label, design.term_names, beta, cov, delta, meat, null, interval,
                           warnings=tuple(warnings), reliable=reliable, se_label=f"{self.se.upper()} (wild bootstrap-t)")
        all_cols = null_sets[-1]
        fit.extras.update({
            "replications": B, "replications_requested": self.replications, "weights": self.weights,
            "residual_transform": self.transform, "se": self.se,
            "sign_patterns": B if enum else None, "enumerated": enum,
            "interaction_p": fit.null_p[all_cols], "seconds": time.perf_counter() - t0,
            "kernel": "expanded" if kernel.expanded[0] else "direct",
            "replicate_batch": batch, "row_blocks": len(kernel.ranges),
        })
        return fit

    # ---- calibration -------------------------------------------------------------------------
    def reject_many(self, design: Design, Y: np.ndarray, alpha: float, *, seed: int) -> np.ndarray:
        """Whether the null-imposed wild bootstrap test of the product term(s) rejects at ``alpha``
        for each column of Y (n × D outcomes on design.X): p < alpha with p from :meth:`null_p_many`."""
        if isinstance(alpha, bool) or not isinstance(alpha, (int, float)) or not 0 < alpha < 1:
            raise option_error("alpha", "a number in (0, 1)", alpha)
        return self.null_p_many(design, Y, seed=seed) < alpha

    def null_p_many(self, design: Design, Y: np.ndarray, *, seed: int) -> np.ndarray:
        """Null-imposed wild bootstrap p of the product term(s) for each column of Y (n × D).

        Dataset d uses replicates d·B … (d+1)·B − 1 of the weight stream of ``seed`` (so the
        first dataset gets the draws a fit with the same seed uses); the HC Wald statistic
        (t² for one product term) is compared with its bootstrap draws, in chunks of datasets.
        """
        Y = _simulated_outcomes(Y, design.n_obs)
        n, k = design.X.shape
        if design.clusters is not None:  # clustered rows: one weight per cluster
            from .wild_cluster import cluster_null_p_many  # noqa: PLC0415
            return cluster_null_p_many(self, design, Y, seed=seed)
        got = self._omega(design)
        if isinstance(got, str):
            raise InputError(got)
        A, omega, _ = got
        X = design.X
        cols = tuple(int(c) for c in design.interaction_columns)
        q = len(cols)
        pairs = _pairs_within(cols, k)
        jj, ll = _pair_index(k)
        P = A[jj[pairs]] * A[ll[pairs]] * omega  # m × n
        # Observed HC Wald (t² for one term) of every dataset.
        Q, _ = design.qr
        E = Y - Q @ (Q.T @ Y)
        b_obs = A[list(cols)] @ Y  # q × D
        W_obs = batched_quadratic(b_obs.T, _full_from_pairs((P @ E**2).T, q))
        Et = self._restricted(X, cols, Y)  # n × D transformed restricted residuals
        enum = _enumerate(self.weights, n, self.replications)
        B = 2**n if enum else self.replications
        width = n if enum else _weight_width(self.weights, n)
        base, T = _expanded_factor(A, X, P)
        rng = np.random.default_rng(seed)
        Dn = Y.shape[1]
        hits = np.zeros(Dn)
        # Several whole datasets per chunk when B replicates fit, else one dataset in replicate
        # chunks; both consume the weight stream dataset by dataset, replicate by replicate.
        rep_step = max(1, CHUNK_ELEMENTS // width)
        data_step = max(1, CHUNK_ELEMENTS // (B * width)) if B <= rep_step else 1
        for a, b in _chunks(Dn, data_step):
            c = b - a
            e = Et[:, a:b].T  # c × n
            F = np.zeros((c, width, base.shape[0]))
            F[:, :n, :] = (base[None, :, :] * e[:, None, :]).transpose(0, 2, 1)
            sq_const = (P[None] * e[:, None, :] ** 2).sum(axis=2)[:, None, :]  # c × 1 × m
            for r0, r1 in _chunks(B, B if c > 1 else rep_step):
                r = r1 - r0
                if enum:
                    V = np.broadcast_to(sign_patterns(n, r0, r1), (c, r, n))
                else:
                    V = _weight_chunk(self.weights, n, c * r, rng).reshape(c, r, width)
                if self.weights == "rademacher":
                    sq = sq_const
                else:
                    sq = np.square(V[..., :n]) @ (P[None] * e[:, None, :] ** 2).transpose(0, 2, 1)
                D, M = _expanded_meat(V @ F, T, sq)  # V @ F: c × r × (k + k·m)
                W_star = batched_quadratic(D[..., list(cols)], _full_from_pairs(M, q))
                hits[a:b] += (W_star >= W_obs[a:b, None]).sum(axis=1)
        p_values = hits / B
        return p_values


def _simulated_outcomes(Y: np.ndarray, n: int) -> np.ndarray:
    """Y as a float array of shape (n, D) with finite values; anything else is an InputError."""
    Y = np.asarray(Y, dtype=float)
    if Y.ndim != 2 or Y.shape[0] != n:
        raise InputError(f"The simulated outcomes must be an array of shape ({n}, D), one column per dataset; "
                         f"got shape {Y.shape}.")
    if not np.all(np.isfinite(Y)):
        raise InputError("The simulated outcomes contain NaN or infinite values; simulate finite outcomes.")
    return Y


class _progress:
    """A rich progress bar over replicates when ``show``; a no-op otherwise."""

    def __init__(self, show: bool, total: int, label: str) -> None:
        self.show, self.total, self.label = show, total, label
        self._bar: Any = None

    def __enter__(self) -> Any:
        if not self.show:
            return lambda _n: None
        from rich.console import Console  # noqa: PLC0415  (only for long runs)
        from rich.progress import Progress  # noqa: PLC0415

        self._bar = Progress(transient=True, console=Console(stderr=True))  # stdout may carry the JSON results
        self._bar.start()
        task = self._bar.add_task(self.label, total=self.total)
        return lambda n: self._bar.advance(task, n)

    def __exit__(self, *exc: object) -> None:
        if self._bar is not None:
            self._bar.stop()
