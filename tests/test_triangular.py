"""The inner-loop triangular solves against scipy.linalg.solve_triangular, digit for digit."""
from __future__ import annotations

import numpy as np
import pytest
from scipy import linalg

from robustmod.backends.kernels import solve_triangular_2d
from robustmod.grid import lower_inverses


def _triangles(k: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    # Invented matrices (only the two solvers are compared): Cholesky factors of random Gram matrices.
    rng = np.random.default_rng(seed)
    A = rng.normal(size=(40, 30, k))
    L = np.linalg.cholesky(np.einsum("rnk,rnl->rkl", A, A))
    return L, rng.normal(size=(k, 7))


@pytest.mark.parametrize("k", [1, 3, 11])
@pytest.mark.parametrize("lower", [True, False])
@pytest.mark.parametrize("trans", [0, 1])
def test_solve_equals_scipy_bit_for_bit(k: int, lower: bool, trans: int) -> None:
    L, B = _triangles(k, 11 * k)
    for a in (L[0] if lower else L[0].T.copy(), np.asfortranarray(L[1] if lower else L[1].T)):
        for b in (B, B.T.copy().T, B[:, 0]):
            # Reference library: scipy's own solver of the same system.
            ref = linalg.solve_triangular(a, b, lower=lower, trans=trans, check_finite=False)
            assert np.array_equal(solve_triangular_2d(a, b, lower=lower, trans=trans), ref)


def test_singular_triangle_is_an_error_as_in_scipy() -> None:
    a = np.tril(np.ones((3, 3)))
    a[1, 1] = 0.0
    with pytest.raises(linalg.LinAlgError, match="singular"):
        solve_triangular_2d(a, np.ones(3), lower=True)


@pytest.mark.parametrize("k", [2, 5, 11])
def test_stacked_inverses_equal_scipy_bit_for_bit(k: int) -> None:
    L, _ = _triangles(k, k)
    # Reference library: scipy's batched triangular solve on the identity.
    ref = linalg.solve_triangular(L, np.broadcast_to(np.eye(k), L.shape), lower=True, check_finite=False)
    got = lower_inverses(L)
    assert np.array_equal(got, ref) and got.strides == ref.strides
