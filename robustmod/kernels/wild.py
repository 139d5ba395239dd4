"""The wild bootstrap of :mod:`robustmod.backends.wild` over chunks of rows, in batches of replicates.

For a batch of replicates with auxiliary weights vᵢ and transformed base residuals ẽᵢ (the
full model's for the unrestricted bootstrap, the model without the product term(s) for each
null-imposed one), uᵢ = ẽᵢvᵢ. Pass 1 accumulates Xᵀu, so β* − β_base = D = (XᵀX)⁻¹Xᵀu (two
triangular solves with R, RᵀR = XᵀX). Pass 2 forms e* = u − XD per chunk and accumulates the
HC pair entries M_{jl} = Σᵢ A_{ji}A_{li}ωᵢe*ᵢ², with the columns A_{·i} = R⁻¹R⁻ᵀxᵢ of
A = (XᵀX)⁻¹Xᵀ made per chunk. D and M are what :class:`robustmod.backends.wild.BootstrapFit`
keeps, so the same fit object gives the same t*, intervals and null-imposed p.

Weights. A file cannot be held as the B × n weight matrix the in-memory back-end draws, so
weights come from a counter-based stream: rows are grouped in fixed blocks of
:data:`WEIGHT_BLOCK` rows and replicates in batches of ``batch`` replicates; block j of batch r
is drawn from ``numpy.random.default_rng([seed, r, j])``. The weights do not depend on the chunk
size, so every chunking gives the same numbers (though not the in-memory back-end's draws).
"""
from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass

import numpy as np
from scipy import linalg

from ..backends.base import Unavailable
from ..backends.hc import HC_WEIGHTS, hc_weights
from ..backends.wild import (
    MAMMEN_P_LOW,
    MAMMEN_VALUES,
    TRANSFORMS,
    WEBB_VALUES,
    WEIGHT_KINDS,
    BootstrapFit,
    _pairs_within,
    residual_factor,
)
from ..errors import option_error
from .chunks import Chunk, ChunkSource
from .ols import Factor, chunk_q, factor_pass, residual_pass

#: Rows per block of the weight stream (fixed, so weights do not depend on the chunk size).
WEIGHT_BLOCK = 4096
#: Replicates per batch when the caller names none.
BATCH = 256


def _block(kind: str, seed: int, batch: int, j: int, reps: int) -> np.ndarray:
    rng = np.random.default_rng([seed, batch, j])
    if kind == "rademacher":
        return 1.0 - 2.0 * rng.integers(0, 2, size=(reps, WEIGHT_BLOCK)).astype(float)
    if kind == "mammen":
        return MAMMEN_VALUES[(rng.random((reps, WEIGHT_BLOCK)) >= MAMMEN_P_LOW).astype(np.intp)]
    if kind == "webb":
        return WEBB_VALUES[np.minimum((6.0 * rng.random((reps, WEIGHT_BLOCK))).astype(np.intp), 5)]
    raise option_error("weights", "one of rademacher, mammen, webb", kind)


class WeightStream:
    """Weights of one batch of replicates, row range by row range (the current block is kept, so
    chunks smaller than a block do not draw it again)."""

    def __init__(self, kind: str, seed: int, batch: int, reps: int) -> None:
        self.kind, self.seed, self.batch, self.reps = kind, seed, batch, reps
        self._j, self._block = -1, np.zeros((0, 0))

    def rows(self, start: int, stop: int) -> np.ndarray:
        """Weights of rows start … stop − 1 (positions among the rows used), reps × (stop − start)."""
        out = np.empty((self.reps, stop - start))
        for j in range(start // WEIGHT_BLOCK, (stop - 1) // WEIGHT_BLOCK + 1):
            if j != self._j:
                self._j, self._block = j, _block(self.kind, self.seed, self.batch, j, self.reps)
            a, b = max(start, j * WEIGHT_BLOCK), min(stop, (j + 1) * WEIGHT_BLOCK)
            out[:, a - start:b - start] = self._block[:, a - j * WEIGHT_BLOCK:b - j * WEIGHT_BLOCK]
        return out


def stream_weights(kind: str, seed: int, batch: int, start: int, stop: int, reps: int) -> np.ndarray:
    """Auxiliary weights of rows start … stop − 1 for batch ``batch`` (reps × m)."""
    return WeightStream(kind, seed, batch, reps).rows(start, stop)


@dataclass(frozen=True)
class _Model:
    """A least-squares fit whose transformed residuals seed one bootstrap."""

    cols: list[int]
    factor: Factor

    def base_resid(self, c: Chunk, transform: str) -> np.ndarray:
        X = c.X[:, self.cols]
        h = _leverages(self.factor.R, X)
        return (c.y - X @ self.factor.beta) * residual_factor(transform, h)


def _leverages(R: np.ndarray, X: np.ndarray) -> np.ndarray:
    U = chunk_q(R, X)
    return np.einsum("ij,ij->j", U, U)


def _solve_gram(R: np.ndarray, B: np.ndarray) -> np.ndarray:
    """(RᵀR)⁻¹B by two triangular solves."""
    return linalg.solve_triangular(R, linalg.solve_triangular(R, B, trans="T", check_finite=False),
                                   check_finite=False)


def streamed_wild(chunks: ChunkSource, term_names: tuple[str, ...], product_columns: Sequence[int], *,
                  replications: int = 9999, weights: str = "rademacher", se: str = "hc3",
                  transform: str = "hc2", seed: int, batch: int = BATCH) -> BootstrapFit | Unavailable:
    """Unrestricted and null-imposed wild bootstraps over chunks (see the module docstring)."""
    if isinstance(replications, bool) or not isinstance(replications, (int, np.integer)) \
            or not 99 <= replications <= 1_000_000:
        raise option_error("replications", "a whole number from 99 to 1000000", replications)
    for name, value, allowed in (("weights", weights, WEIGHT_KINDS), ("se", se, tuple(HC_WEIGHTS)),
                                 ("transform", transform, TRANSFORMS)):
        if value not in allowed:
            raise option_error(name, f"one of {', '.join(allowed)}", value)
    full = factor_pass(chunks, names=term_names)
    fit = residual_pass(chunks, full, [se])
    label = f"Wild bootstrap ({se.upper()}-t, {weights})"
    if fit.cov[se] is None:
        return Unavailable("wild", label, f"{se.upper()} is undefined: some rows have leverage 1; "
                           "drop them or set wild.se=hc0.")
    n, k = full.n, full.k
    cols = tuple(int(c) for c in product_columns)
    null_sets = [(c,) for c in cols] + ([cols] if len(cols) > 1 else [])
    models = [_Model(list(range(k)), full)]
    for s in null_sets:
        keep = [j for j in range(k) if j not in s]
        models.append(_Model(keep, factor_pass(_select(chunks, keep))))
    pair_sets = [np.arange(k * (k + 1) // 2)] + [_pairs_within(s, k) for s in null_sets]
    jj, ll = np.triu_indices(k)
    delta = np.empty((replications, k))
    meat = np.empty((replications, k * (k + 1) // 2))
    null = {s: (np.empty((replications, len(s))), np.empty((replications, len(p))))
            for s, p in zip(null_sets, pair_sets[1:], strict=False)}
    for r, a in enumerate(range(0, replications, batch)):
        reps = min(batch, replications - a)
        XtU = [np.zeros((k, reps)) for _ in models]
        stream = WeightStream(weights, seed, r, reps)
        for c, pos in _positions(chunks):
            V = stream.rows(pos, pos + c.size)
            for i, m in enumerate(models):
                XtU[i] += c.X.T @ (V * m.base_resid(c, transform)).T
        D = [_solve_gram(full.R, x) for x in XtU]  # k × reps each
        M = [np.zeros((reps, p.size)) for p in pair_sets]
        stream = WeightStream(weights, seed, r, reps)
        for c, pos in _positions(chunks):
            V = stream.rows(pos, pos + c.size)
            A = _solve_gram(full.R, c.X.T)  # k × m
            h = _leverages(full.R, c.X)
            omega = hc_weights(se, h, n, k)
            for i, m in enumerate(models):
                E = V * m.base_resid(c, transform) - (c.X @ D[i]).T  # reps × m
                P = (A[jj[pair_sets[i]]] * A[ll[pair_sets[i]]] * omega).T  # m × pairs
                M[i] += (E * E) @ P
        delta[a:a + reps], meat[a:a + reps] = D[0].T, M[0]
        for s, Di, Mi in zip(null_sets, D[1:], M[1:], strict=False):
            null[s][0][a:a + reps], null[s][1][a:a + reps] = Di[list(s)].T, Mi
    cov = fit.cov[se]
    assert cov is not None
    out = BootstrapFit("wild", label, term_names, full.beta, cov, delta, meat, null,
                       f"wild bootstrap-t ({weights}, B = {replications}, streamed weights)",
                       se_label=f"{se.upper()} (wild bootstrap-t)")
    out.extras.update({"replications": replications, "weights": weights, "residual_transform": transform,
                       "se": se, "interaction_p": out.null_p[null_sets[-1]], "weight_stream": "counter-based"})
    return out


def _select(chunks: ChunkSource, keep: list[int]) -> ChunkSource:
    def passes() -> Iterator[Chunk]:
        for c in chunks():
            yield Chunk(c.X[:, keep], c.y, c.rows, c.columns)
    return passes


def _positions(chunks: ChunkSource) -> Iterator[tuple[Chunk, int]]:
    """(chunk, position of its first row among the rows used)."""
    pos = 0
    for c in chunks():
        yield c, pos
        pos += c.size
