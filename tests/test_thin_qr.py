"""The design's thin QR: Cholesky QR on many rows against numpy's Householder QR (reference library)."""
from __future__ import annotations

import numpy as np

from robustmod.thin_qr import CHOLESKY_QR_ROWS, _cholesky_qr, thin_qr


def _x(n: int, scale: float = 1.0) -> np.ndarray:
    # Invented columns: an intercept, a moderator far from zero and a product (the usual conditioning).
    rng = np.random.default_rng(11)
    x, w, a = rng.normal(size=n), rng.normal(40.0, 10.0 * scale, n), rng.normal(size=n)
    return np.column_stack([np.ones(n), x, w, x * w, a])


def test_cholesky_qr_agrees_with_householder() -> None:
    X = _x(CHOLESKY_QR_ROWS + 10)
    assert _cholesky_qr(X) is not None  # well conditioned: the Cholesky route is the one tested
    Q, R = thin_qr(X)
    # Reference library: numpy.linalg.qr (LAPACK Householder); R is unique up to the signs of its rows.
    Qh, Rh = np.linalg.qr(X)
    s = np.sign(np.diag(Rh))
    np.testing.assert_allclose(R, s[:, None] * Rh, rtol=1e-10, atol=1e-10 * np.abs(Rh).max())
    np.testing.assert_allclose(Q, Qh * s[None, :], rtol=0, atol=1e-10)
    np.testing.assert_allclose(Q.T @ Q, np.eye(X.shape[1]), rtol=0, atol=1e-11)
    h, hh = np.einsum("ij,ij->i", Q, Q), np.einsum("ij,ij->i", Qh, Qh)
    np.testing.assert_allclose(h, hh, rtol=1e-9)


def test_ill_conditioned_columns_use_householder() -> None:
    X = _x(CHOLESKY_QR_ROWS + 10, scale=1e-4)  # w nearly constant: nearly collinear with the intercept
    assert _cholesky_qr(X) is None
    Q, R = thin_qr(X)
    np.testing.assert_allclose(Q.T @ Q, np.eye(X.shape[1]), rtol=0, atol=1e-12)
    np.testing.assert_allclose(Q @ R, X, rtol=0, atol=1e-10 * np.abs(X).max())
