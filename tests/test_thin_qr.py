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


def test_cholesky_route_keeps_no_q_and_reads_the_fit_off_x_and_r() -> None:
    import pickle

    import statsmodels.api as sm

    from robustmod.backends.hc import sandwich_of_meat
    from robustmod.thin_qr import factor

    X = _x(CHOLESKY_QR_ROWS + 10)
    rng = np.random.default_rng(5)
    y = X @ np.array([1.0, 0.5, -0.2, 0.1, 0.3]) + rng.normal(size=X.shape[0]) * (1 + np.abs(X[:, 1]))
    f = factor(X, y)
    assert f.implicit and f._Q is None  # no n × k array made
    qty, resid, h, meat = f.fit_rows(y)
    assert f._Q is None
    # Reference library: statsmodels OLS with HC3 (MacKinnon & White 1985) on the same X and y.
    res = sm.OLS(y, X).fit(cov_type="HC3")
    beta = np.linalg.solve(f.R, qty)
    np.testing.assert_allclose(beta, res.params, rtol=1e-10)
    np.testing.assert_allclose(resid, res.resid, rtol=0, atol=1e-9 * np.abs(y).max())
    np.testing.assert_allclose(h, res.get_influence().hat_matrix_diag, rtol=1e-9)
    np.testing.assert_allclose(sandwich_of_meat(meat, f.Rinv), res.cov_params(), rtol=1e-9)
    # Qᵀv of another vector, and the pair made on demand, agree with the Householder route.
    v = rng.normal(size=X.shape[0])
    Qh, Rh = np.linalg.qr(X)
    s = np.sign(np.diag(Rh))
    np.testing.assert_allclose(f.qt(v), s * (Qh.T @ v), rtol=1e-9, atol=1e-9)
    Q, R = f
    np.testing.assert_allclose(Q, Qh * s[None, :], rtol=0, atol=1e-10)
    assert f[1] is f.R and f.shape == X.shape
    back = pickle.loads(pickle.dumps(f))
    np.testing.assert_array_equal(back.Q, Q)


def test_householder_route_gives_the_same_fit_rows() -> None:
    from robustmod.thin_qr import factor

    X = _x(300)  # below CHOLESKY_QR_ROWS: Householder, Q stored
    rng = np.random.default_rng(6)
    y = X @ np.ones(X.shape[1]) + rng.normal(size=300)
    f = factor(X, y)
    assert not f.implicit
    qty, resid, h, _ = f.fit_rows(y)
    Q = f.Q
    np.testing.assert_allclose(qty, Q.T @ y, rtol=1e-12)
    np.testing.assert_allclose(resid, y - Q @ (Q.T @ y), rtol=0, atol=1e-12 * np.abs(y).max())
    np.testing.assert_allclose(h, np.einsum("ij,ij->i", Q, Q), rtol=1e-12)
