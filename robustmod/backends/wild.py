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
import time
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
from scipy import linalg

from ..errors import InputError, option_error
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


class _Kernel:
    """β* − β_base and M for chunks of weights, for several residual sources at once.

    Expanded form (a source needing few pairs m): with u = ẽ⊙v, D = Au and e* = u − XD,
    M_p = Σᵢ Pₚᵢ vᵢ²ẽᵢ² − 2 Σⱼ Dⱼ Σᵢ Pₚᵢ Xᵢⱼ uᵢ + Σⱼₗ DⱼDₗ Σᵢ Pₚᵢ XᵢⱼXᵢₗ with Pₚᵢ = A_{jᵢ}A_{lᵢ}ωᵢ,
    so one product of the weight chunk with a fixed (k + k·m) × n matrix gives everything
    (vᵢ² = 1 for Rademacher weights makes the first term a constant).
    Direct form (many pairs, k(1 + m) > EXPANDED_MAX_ROWS): e* formed explicitly, M = (e*)² Pᵀ.
    """

    def __init__(self, X: np.ndarray, A: np.ndarray, omega: np.ndarray, sources: list[_Source],
                 width: int, unit_square: bool) -> None:
        n, k = X.shape
        self.n, self.k, self.width, self.unit_square = n, k, width, unit_square
        self.Xt = np.ascontiguousarray(X.T)
        self.At = np.ascontiguousarray(A.T)
        jj, ll = _pair_index(k)
        self.sources = sources
        P = [A[jj[s.pairs]] * A[ll[s.pairs]] * omega for s in sources]  # m × n each
        self.expanded = [k * (1 + len(s.pairs)) <= EXPANDED_MAX_ROWS for s in sources]
        blocks: list[np.ndarray] = []
        self.T: dict[int, np.ndarray] = {}
        self.S2: dict[int, np.ndarray] = {}
        self.Pe2: dict[int, np.ndarray] = {}
        self.Pt: dict[int, np.ndarray] = {}
        self.offsets: dict[int, tuple[int, int]] = {}
        row = 0
        for i, (s, Pi) in enumerate(zip(sources, P, strict=False)):
            if not self.expanded[i]:
                self.Pt[i] = np.ascontiguousarray(Pi.T)
                continue
            base, self.T[i] = _expanded_factor(A, X, Pi)
            F = np.zeros((base.shape[0], width))
            F[:, :n] = base * s.resid
            blocks.append(F)
            self.offsets[i] = (row, row + F.shape[0])
            row += F.shape[0]
            self.S2[i] = Pi @ s.resid**2
            self.Pe2[i] = np.ascontiguousarray((Pi * s.resid**2).T)
        self.F_t = np.ascontiguousarray(np.vstack(blocks).T) if blocks else None  # width × rows

    def run(self, V: np.ndarray) -> list[tuple[np.ndarray, np.ndarray]]:
        """(D, M) for every source from a chunk of weights V (c × width)."""
        n = self.n
        G = V @ self.F_t if self.F_t is not None else None
        V2 = None if self.unit_square or G is None else np.square(V[:, :n])
        out = []
        for i, s in enumerate(self.sources):
            if self.expanded[i]:
                a, b = self.offsets[i]
                assert G is not None  # an expanded source added its block to F_t
                sq = self.S2[i][None, :] if V2 is None else V2 @ self.Pe2[i]
                out.append(_expanded_meat(G[:, a:b], self.T[i], sq))
                continue
            U = V[:, :n] * s.resid
            D = U @ self.At
            E = D @ self.Xt
            np.subtract(U, E, out=E)
            np.square(E, out=E)
            out.append((D, E @ self.Pt[i]))
        return out


def _chunks(total: int, size: int) -> Iterator[tuple[int, int]]:
    for start in range(0, total, size):
        yield start, min(total, start + size)


def _share_at_least(stat_star: np.ndarray, stat: np.ndarray) -> np.ndarray:
    """Bootstrap p: share of replicates (last axis) with statistic ≥ the observed one."""
    return (stat_star >= stat[..., None]).mean(axis=-1)


def _safe_ratio(num: np.ndarray, den: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(den > 0, num / np.where(den > 0, den, 1.0), 0.0)


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
        for a, b in _chunks(m, step):
            ts = t_star(a, b)
            q_lo[a:b], q_hi[a:b] = np.quantile(ts, [alpha / 2, 1 - alpha / 2], axis=1, method="weibull")
            p[a:b] = _share_at_least(np.abs(ts), np.abs(t[a:b]))
            if simultaneous:
                np.maximum(sup, np.abs(ts).max(axis=0), out=sup)
        if simultaneous and m > 1:
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
        return _safe_ratio(self.d0[None, :] + w * self.d1[None, :], np.sqrt(np.maximum(var, 0.0)))

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
        h = leverages(Q)
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
        kernel = _Kernel(X, A, omega, sources, width, unit_square=self.weights == "rademacher")
        delta = np.empty((B, k))
        meat = np.empty((B, k * (k + 1) // 2))
        null = {cols: (np.empty((B, len(cols))), np.empty((B, len(s.pairs))))
                for cols, s in zip(null_sets, sources[1:], strict=False)}
        rng = np.random.default_rng(seed)
        step = max(1, CHUNK_ELEMENTS // width)
        with _progress(progress and n * B * len(sources) >= PROGRESS_MIN_WORK, B, self.label) as advance:
            for a, b in _chunks(B, step):
                V = sign_patterns(n, a, b) if enum else _weight_chunk(self.weights, n, b - a, rng)
                results = kernel.run(V)
                delta[a:b], meat[a:b] = results[0]
                for cols, (D, M) in zip(null_sets, results[1:], strict=False):
                    null[cols][0][a:b] = D[:, list(cols)]
                    null[cols][1][a:b] = M
                advance(b - a)
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
