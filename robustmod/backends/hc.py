"""Heteroscedasticity-consistent covariance estimators HC0–HC5 as one small family.

Every member is the sandwich V = R⁻¹ [Qᵀ diag(ωᵢ êᵢ²) Q] R⁻ᵀ built from the thin QR
factor X = QR; members differ only in the weight ωᵢ of the squared residual, with
hᵢ = ‖Qᵢ‖² the leverage, n rows, k columns and h̄ = k/n:

====  =======================================  ==========================================
HC0   1                                         White (1980)
HC1   n / (n − k)                               MacKinnon & White (1985)
HC2   1 / (1 − hᵢ)                              MacKinnon & White (1985)
HC3   1 / (1 − hᵢ)²                             MacKinnon & White (1985)
HC4   1 / (1 − hᵢ)^δᵢ, δᵢ = min(4, hᵢ/h̄)        Cribari-Neto (2004)
HC4m  1 / (1 − hᵢ)^δᵢ, δᵢ = min(1, hᵢ/h̄) + min(1.5, hᵢ/h̄)   Cribari-Neto & da Silva (2011)
HC5   1 / (1 − hᵢ)^(δᵢ/2), δᵢ = min(hᵢ/h̄, max(4, 0.7·h_max/h̄))  Cribari-Neto, Souza & Vasconcellos (2007)
====  =======================================  ==========================================
"""
from __future__ import annotations

from collections.abc import Callable
from typing import TYPE_CHECKING

import numpy as np
from scipy import linalg

from ..defaults import LEVERAGE_ONE_TOL
from ..once import OncePer
from ..thin_qr import FitRows, ThinQR, row_norms, weighted_gram

if TYPE_CHECKING:
    from ..design import Design


def _power(exponent: Callable[[np.ndarray, int, int], np.ndarray]) -> Callable[[np.ndarray, int, int], np.ndarray]:
    def weight(h: np.ndarray, n: int, k: int) -> np.ndarray:
        return np.exp(-exponent(h, n, k) * np.log1p(-h))
    return weight


def _reciprocal_of_one_minus(h: np.ndarray, *, square: bool) -> np.ndarray:
    """1/(1 − h) or 1/(1 − h)², the same operations as the plain expressions but in one work array."""
    w = np.subtract(1.0, h)
    if square:
        np.square(w, out=w)
    return np.divide(1.0, w, out=w)


def _hc4_exp(h: np.ndarray, n: int, k: int) -> np.ndarray:
    return np.minimum(4.0, h * n / k)


def _hc4m_exp(h: np.ndarray, n: int, k: int) -> np.ndarray:
    r = h * n / k
    return np.minimum(1.0, r) + np.minimum(1.5, r)


def _hc5_exp(h: np.ndarray, n: int, k: int) -> np.ndarray:
    r = h * n / k
    # h_max per dataset (last axis), so a batch of D leverage rows gives D single-fit answers.
    return 0.5 * np.minimum(r, np.maximum(4.0, 0.7 * h.max(axis=-1, keepdims=True) * n / k))


#: Weight ωᵢ of êᵢ² for each estimator, as a function of (h, n, k).
HC_WEIGHTS: dict[str, Callable[[np.ndarray, int, int], np.ndarray]] = {
    "hc0": lambda h, n, k: np.ones_like(h),
    "hc1": lambda h, n, k: np.full_like(h, n / (n - k)),
    "hc2": lambda h, n, k: _reciprocal_of_one_minus(h, square=False),
    "hc3": lambda h, n, k: _reciprocal_of_one_minus(h, square=True),
    "hc4": _power(_hc4_exp),
    "hc4m": _power(_hc4m_exp),
    "hc5": _power(_hc5_exp),
}

#: Estimators whose weight involves 1/(1 − hᵢ) and so fail at leverage one.
NEEDS_LEVERAGE_BELOW_ONE = frozenset({"hc2", "hc3", "hc4", "hc4m", "hc5"})


def leverages(Q: np.ndarray | ThinQR) -> np.ndarray:
    """Diagonal of the hat matrix from the thin Q factor, hᵢ = Σⱼ Q²ᵢⱼ (no n×n matrix; from X and
    R a block at a time when Q is not stored, see :mod:`robustmod.thin_qr`)."""
    return Q.leverages() if isinstance(Q, ThinQR) else row_norms(Q)


#: The design's :class:`~robustmod.thin_qr.FitRows` (by identity, dropped with it): the HC fits,
#: the diagnostics, the wild bootstrap, the calibration and the leverage-one note read them.
_DESIGN_ROWS: OncePer[FitRows] = OncePer()


def design_rows(design: Design) -> FitRows:
    """Qᵀy, ê = y − QQᵀy, h and the HC3 meat of the design's OLS fit, from one pass over its rows
    (:meth:`robustmod.thin_qr.ThinQR.fit_rows`), computed once per design (read-only arrays)."""
    def compute() -> FitRows:
        got = design.qr.fit_rows(design.y)
        for a in got:
            a.setflags(write=False)
        return got

    return _DESIGN_ROWS.get(design, compute)


def design_leverages(design: Design) -> np.ndarray:
    """:func:`leverages` of the design's own thin Q (from :func:`design_rows`; read-only)."""
    return design_rows(design)[2]


def leverage_one_mask(h: np.ndarray) -> np.ndarray:
    """True for rows whose leverage is one to working precision (hᵢ ≥ 1 − LEVERAGE_ONE_TOL)."""
    return np.asarray(h) >= 1.0 - LEVERAGE_ONE_TOL


def leverage_one_rows(h: np.ndarray) -> np.ndarray:
    """Indices (0-based) of rows whose leverage is one to working precision."""
    return np.flatnonzero(leverage_one_mask(h))


def hc_weights(kind: str, h: np.ndarray, n: int, k: int) -> np.ndarray:
    """ωᵢ for estimator ``kind`` (h of shape n, or D × n for a batch of fits); callers must first
    exclude leverage-one rows for HC2–HC5."""
    return HC_WEIGHTS[kind](h, n, k)


def r_inverse(R: np.ndarray) -> np.ndarray:
    """R⁻¹ by a triangular solve (k×k; never an inverse of XᵀX)."""
    return linalg.solve_triangular(R, np.eye(R.shape[0]), check_finite=False)


def sandwich(Q: np.ndarray | ThinQR, Rinv: np.ndarray, u2w: np.ndarray) -> np.ndarray:
    """R⁻¹ (Qᵀ diag(u2w) Q) R⁻ᵀ with u2w = ωᵢ êᵢ², the meat summed over blocks of rows."""
    return sandwich_of_meat(Q.weighted_gram(u2w) if isinstance(Q, ThinQR) else weighted_gram(Q, u2w), Rinv)


def sandwich_of_meat(meat: np.ndarray, Rinv: np.ndarray) -> np.ndarray:
    """R⁻¹ M R⁻ᵀ of the meat M = Qᵀ diag(ωᵢ êᵢ²) Q (symmetrised)."""
    meat = 0.5 * (meat + meat.T)
    return Rinv @ meat @ Rinv.T
