"""A small back-end kept with the tests: OLS with delete-one jackknife standard errors.

It exists to show that one module plus one ``register(...)`` line is all a new back-end needs:
tests/test_contract.py registers it and runs the same contract tests on it as on the built-in ones.

With X = QR, hᵢ = ‖qᵢ‖² and êᵢ the OLS residuals, deleting row i moves the estimate by
β̂₍ᵢ₎ − β̂ = −R⁻¹qᵢ·êᵢ/(1 − hᵢ) (Miller 1974), so all n delete-one estimates come from one
matrix product. The jackknife covariance is V = (n − 1)/n · Σᵢ (β̂₍ᵢ₎ − β̄)(β̂₍ᵢ₎ − β̄)ᵀ with β̄
their mean (Efron & Stein 1981; MacKinnon & White 1985, who relate it to HC3).
"""
from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
from scipy import linalg

from robustmod.backends.base import Backend, Fit, Option, Unavailable, WaldFit

if TYPE_CHECKING:  # pragma: no cover
    from robustmod.design import Design


def delete_one_shifts(Q: np.ndarray, R: np.ndarray, y: np.ndarray) -> np.ndarray:
    """β̂₍ᵢ₎ − β̂ for every row i, as an n × k array (no refits, no inverse of XᵀX)."""
    resid = y - Q @ (Q.T @ y)
    h = np.einsum("ij,ij->i", Q, Q)
    return -linalg.solve_triangular(R, Q.T, check_finite=False).T * (resid / (1.0 - h))[:, None]


class JackknifeBackend(Backend):
    """OLS estimates with delete-one jackknife standard errors (t with n − k df)."""

    id = "jackknife"
    label = "OLS, delete-one jackknife SE"
    assumes_constant_variance = False
    assumes_independent_rows = True
    cost = "cheap"
    options = (
        Option("centre", "text", "mean", "Centre the delete-one estimates at their mean or at the full-data estimate.",
               choices=("mean", "estimate"), case="insensitive"),
        Option("scale", "number", 1.0, "Multiplies the jackknife variance (1 is the textbook form).",
               low=0.0, high=10.0, low_open=True),
    )

    centre: str
    scale: float

    def fit(self, design: Design, *, seed: int = 0, progress: bool = False) -> Fit | Unavailable:
        """Deterministic: ``seed`` is not used."""
        Q, R = design.qr
        y = design.y
        n, k = Q.shape
        h = np.einsum("ij,ij->i", Q, Q)
        if np.any(h >= 1.0 - 1e-10):
            return Unavailable(self.id, self.label, "Some rows have leverage 1, so deleting them is undefined; "
                               "drop them or use another back-end.")
        beta = linalg.solve_triangular(R, Q.T @ y, check_finite=False)
        shifts = delete_one_shifts(Q, R, y)
        dev = shifts - shifts.mean(axis=0) if self.centre == "mean" else shifts
        cov = self.scale * (n - 1) / n * (dev.T @ dev)
        return WaldFit(self.id, self.label, design.term_names, beta, cov, float(n - k),
                       se_label="delete-one jackknife")
