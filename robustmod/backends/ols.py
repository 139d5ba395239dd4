"""OLS with classical or heteroscedasticity-consistent (HC0–HC5) standard errors.

β̂ = R⁻¹ Qᵀ y from the thin QR factor of X (no XᵀX is formed); classical
V = s² R⁻¹R⁻ᵀ with s² = êᵀê/(n − k); HC estimators from :mod:`.hc`. Every t test
uses n − k degrees of freedom (common practice, e.g. Long & Ervin 2000).
"""
from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
from scipy import linalg

from .base import Fit, Unavailable, WaldFit
from .hc import NEEDS_LEVERAGE_BELOW_ONE, hc_weights, leverage_one_rows, leverages, r_inverse, sandwich

if TYPE_CHECKING:  # pragma: no cover
    from ..design import Design

LABELS = {
    "ols": "OLS, classical SE",
    "hc0": "OLS + HC0", "hc1": "OLS + HC1", "hc2": "OLS + HC2", "hc3": "OLS + HC3",
    "hc4": "OLS + HC4", "hc4m": "OLS + HC4m", "hc5": "OLS + HC5",
}


class OLSBackend:
    """Ordinary least squares; ``covariance`` is 'classical' or one of hc0 … hc5."""

    def __init__(self, id: str = "hc3") -> None:
        if id not in LABELS:
            raise ValueError(id)
        self.id = id
        self.label = LABELS[id]

    def fit(self, design: "Design", *, seed: int = 0, progress: bool = False) -> Fit | Unavailable:
        Q, R = design.qr
        return ols_fit(self.id, Q, R, design.y, design.term_names, row_numbers=_row_numbers(design))


def _row_numbers(design: "Design") -> np.ndarray:
    return np.asarray(design.data.frame.index, dtype=int) + 1


def ols_fit(kind: str, Q: np.ndarray, R: np.ndarray, y: np.ndarray, term_names: tuple[str, ...],
            *, row_numbers: np.ndarray | None = None, label: str | None = None,
            backend_id: str | None = None) -> Fit | Unavailable:
    """Fit OLS from a thin QR factor; ``kind`` is 'ols' (classical) or an HC id."""
    n, k = Q.shape
    backend_id = backend_id or kind
    label = label or LABELS[kind]
    qty = Q.T @ y
    beta = linalg.solve_triangular(R, qty, check_finite=False)
    resid = y - Q @ qty
    Rinv = r_inverse(R)
    df = n - k
    warnings: list[str] = []
    extras: dict[str, object] = {"sigma": float(np.sqrt(resid @ resid / df)), "df_resid": df}
    ss_tot = float(((y - y.mean()) ** 2).sum())
    extras["r_squared"] = float(1 - (resid @ resid) / ss_tot) if ss_tot > 0 else None
    if kind == "ols":
        s2 = float(resid @ resid) / df
        cov = s2 * (Rinv @ Rinv.T)
        se_label = "classical (homoscedastic)"
    else:
        h = leverages(Q)
        ones = leverage_one_rows(h)
        if ones.size and kind in NEEDS_LEVERAGE_BELOW_ONE:
            rows = row_numbers[ones] if row_numbers is not None else ones + 1
            shown = ", ".join(str(int(r)) for r in rows[:10]) + (" …" if rows.size > 10 else "")
            return Unavailable(backend_id, label,
                               f"{kind.upper()} is undefined: data row(s) {shown} have leverage 1 "
                               "(each alone determines a coefficient); drop them or use HC0/HC1.")
        if ones.size:
            warnings.append(f"{ones.size} row(s) have leverage 1; their residuals are zero and carry no variance information.")
        w = hc_weights(kind, h, n, k)
        cov = sandwich(Q, Rinv, w * resid**2)
        se_label = kind.upper()
        extras["max_leverage"] = float(h.max())
    return WaldFit(backend_id, label, term_names, beta, cov, df, warnings=tuple(warnings),
                   extras=extras, se_label=se_label)
