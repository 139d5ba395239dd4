"""OLS with classical or heteroscedasticity-consistent (HC0–HC5) standard errors.

β̂ = R⁻¹ Qᵀ y from the thin QR factor of X (no XᵀX is formed); classical
V = s² R⁻¹R⁻ᵀ with s² = êᵀê/(n − k); HC estimators from :mod:`.hc`. Every t test
uses n − k degrees of freedom (common practice, e.g. Long & Ervin 2000).
"""
from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
from scipy import linalg

from ..blas_threads import one_blas_thread
from ..errors import InputError
from ..once import OncePer
from ..thin_qr import ThinQR
from .base import FamilyBackend, Fit, Option, Unavailable, WaldFit
from .hc import (
    NEEDS_LEVERAGE_BELOW_ONE,
    design_leverages,
    design_rows,
    hc_weights,
    leverage_one_rows,
    leverages,
    r_inverse,
    sandwich,
    sandwich_of_meat,
)
from .kernels import design_row_numbers, leverage_one_reason, wald_test

if TYPE_CHECKING:  # pragma: no cover
    from ..design import Design
    from ..stream import StreamData

LABELS = {
    "ols": "OLS, classical SE",
    "hc0": "OLS + HC0", "hc1": "OLS + HC1", "hc2": "OLS + HC2", "hc3": "OLS + HC3",
    "hc4": "OLS + HC4", "hc4m": "OLS + HC4m", "hc5": "OLS + HC5",
}


class OLSBackend(FamilyBackend):
    """Ordinary least squares; ``id`` is 'ols' (classical SE) or one of hc0 … hc5.

    One class serves several registry ids: the registry fixes ``id``, and the label and the
    constant-variance flag follow it.
    """

    id = "hc3"
    label = LABELS["hc3"]
    labels = LABELS
    assumes_constant_variance = False
    assumes_independent_rows = True
    cost = "cheap"
    options = (Option("id", "text", "hc3", "Classical SE ('ols') or an HC estimator (set by the back-end id).",
                      choices=tuple(LABELS), case="insensitive"),)

    def __init__(self, id: str = "hc3", **options: Any) -> None:
        super().__init__(id=id, **options)

    streams = True

    def finish_options(self) -> None:
        super().finish_options()
        self.assumes_constant_variance = self.id == "ols"

    def shared_ols_kinds(self) -> tuple[str, ...]:
        return (self.id,)

    def fit_stream(self, data: StreamData, *, seed: int = 0, progress: bool = False) -> Fit | Unavailable:
        """From the shared streamed OLS passes (:func:`robustmod.kernels.ols.streamed_ols`)."""
        return data.ols_fit(self.id, label=self.label, backend_id=self.id)

    def fit(self, design: Design, *, seed: int = 0, progress: bool = False) -> Fit | Unavailable:
        return design_fit(design, self.id)

    def reject_many(self, design: Design, Y: np.ndarray, alpha: float, *, seed: int = 0) -> np.ndarray:
        """Does the product-term test reject at ``alpha`` for each column of Y (n × D)?

        All D datasets share X = QR: B = R⁻¹QᵀY and E = Y − QQᵀY in one product each. With
        C = Q R⁻ᵀ Lᵀ (n × q) the product-term covariance is Cᵀ diag(ωᵢ êᵢ²) C (HC) or
        s²·CᵀC (classical); one term gives the t test, several the Wald F(q, n − k), as
        :func:`.kernels.wald_test` decides, as for a single fit.
        ``seed`` is unused (nothing here is random).
        """
        Q, R = design.qr
        Y = np.asarray(Y, dtype=float)
        if Y.ndim != 2 or Y.shape[0] != Q.shape[0]:
            raise ValueError(f"Y must be n × D with n = {Q.shape[0]}; got shape {Y.shape}")
        n, k = Q.shape
        df = n - k
        L = design.interaction_rows()
        QtY = Q.T @ Y
        E = Y - Q @ QtY
        r = L @ linalg.solve_triangular(R, QtY, check_finite=False)  # q × D
        C = Q @ linalg.solve_triangular(R, L.T, trans="T", check_finite=False)  # n × q
        E2 = E * E
        if self.id == "ols":
            s2 = E2.sum(axis=0) / df
            S = (C.T @ C)[None, :, :] * s2[:, None, None]  # D × q × q
        else:
            h = design_leverages(design)
            if self.id in NEEDS_LEVERAGE_BELOW_ONE and (
                    reason := leverage_one_reason(h, self.id.upper(), design_row_numbers(design), "drop them or use HC0/HC1")):
                raise InputError(reason)
            w = hc_weights(self.id, h, n, k)
            S = np.einsum("ia,ib,id->dab", C * w[:, None], C, E2, optimize=True)
        return wald_test(r.T, S, df)[1] < alpha


#: Fits already made on a design (by identity, dropped with it): the back-end, the SE gap and the
#: binning check all ask for the design's HC3 fit, which then costs one pass over the rows.
_DESIGN_FITS: OncePer[WaldFit | Unavailable] = OncePer()


def design_residuals(design: Design) -> tuple[np.ndarray, np.ndarray]:
    """(Qᵀy, ê = y − QQᵀy) of the design, computed once per design with its leverages
    (:func:`.hc.design_rows`; read-only arrays)."""
    rows = design_rows(design)
    return rows.qty, rows.resid


def _row_numbers(design: Design) -> Any:
    """The design rows' 1-based data row numbers for messages: a RangeIndex shifted by one when the
    rows are the data's first n (no n-vector made), else :func:`design_row_numbers`."""
    index = design.data.frame.index
    return index + 1 if isinstance(index, pd.RangeIndex) else design_row_numbers(design)


def design_fit(design: Design, kind: str) -> WaldFit | Unavailable:
    """:func:`ols_fit` of ``kind`` on the design's own QR, made once per design and kind."""
    def compute() -> WaldFit | Unavailable:
        f = design.qr
        with one_blas_thread():  # n × k products and k × k solves: see robustmod.blas_threads
            rows = design_rows(design)
            return ols_fit(kind, f, f.R, design.y, design.term_names, row_numbers=_row_numbers(design),
                           residuals=(rows.qty, rows.resid), leverage=None if kind == "ols" else rows.leverage,
                           meat=rows.hc3_meat if kind == "hc3" else None)

    return _DESIGN_FITS.get(design, compute, kind)


#: Rows of the n-vector temporaries made a block at a time (the diagnostics may be running beside).
_BLOCK = 1 << 16


def _centred_sum_of_squares(y: np.ndarray) -> float:
    """Σ(yᵢ − ȳ)², the deviations a block of rows at a time."""
    mean = y.mean()
    total = 0.0
    for a in range(0, y.size, _BLOCK):
        dev = y[a:a + _BLOCK] - mean
        total += float(dev @ dev)
    return total


def ols_fit(kind: str, Q: np.ndarray | ThinQR, R: np.ndarray, y: np.ndarray, term_names: tuple[str, ...],
            *, row_numbers: Any = None, label: str | None = None,
            backend_id: str | None = None, residuals: tuple[np.ndarray, np.ndarray] | None = None,
            leverage: np.ndarray | None = None, meat: np.ndarray | None = None) -> WaldFit | Unavailable:
    """Fit OLS from a thin QR factor; ``kind`` is 'ols' (classical) or an HC id.

    ``row_numbers``: 1-based data row numbers of the design rows (for messages; default 1 … n).
    ``residuals``: (Qᵀy, y − QQᵀy) when already at hand (see :func:`design_residuals`).
    ``leverage``: hᵢ of Q when already at hand (see :func:`.hc.design_leverages`).
    ``meat``: Qᵀ diag(ωᵢ êᵢ²) Q of ``kind`` when already at hand (see :func:`.hc.design_rows`).
    """
    n, k = Q.shape
    backend_id = backend_id or kind
    label = label or LABELS[kind]
    if residuals is None:
        Qa = Q.Q if isinstance(Q, ThinQR) else Q
        qty = Qa.T @ y
        resid = y - Qa @ qty
    else:
        qty, resid = residuals
    beta = linalg.solve_triangular(R, qty, check_finite=False)
    Rinv = r_inverse(R)
    df = n - k
    warnings: list[str] = []
    rss = float(resid @ resid)
    extras: dict[str, object] = {"sigma": float(np.sqrt(rss / df)), "df_resid": df}
    ss_tot = _centred_sum_of_squares(y)
    extras["r_squared"] = float(1 - rss / ss_tot) if ss_tot > 0 else None
    if kind == "ols":
        s2 = rss / df
        cov = s2 * (Rinv @ Rinv.T)
        se_label = "classical (homoscedastic)"
    else:
        h = leverages(Q) if leverage is None else leverage
        if kind in NEEDS_LEVERAGE_BELOW_ONE and (
                reason := leverage_one_reason(h, kind.upper(), row_numbers, "drop them or use HC0/HC1")):
            return Unavailable(backend_id, label, reason)
        if (ones := int(leverage_one_rows(h).size)):
            warnings.append(f"{ones} row(s) have leverage 1; their residuals are zero and carry no variance information.")
        if meat is not None:
            cov = sandwich_of_meat(meat, Rinv)
        else:
            u2w = hc_weights(kind, h, n, k)
            for a in range(0, n, _BLOCK):  # ωᵢ êᵢ² in place, êᵢ² a block at a time: no n-vector at the peak
                u2w[a:a + _BLOCK] *= np.square(resid[a:a + _BLOCK])
            cov = sandwich(Q, Rinv, u2w)
        se_label = kind.upper()
        extras["max_leverage"] = float(h.max())
    return WaldFit(backend_id, label, term_names, beta, cov, df, warnings=tuple(warnings),
                   extras=extras, se_label=se_label)
