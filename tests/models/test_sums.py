"""The processor-independent sums (server/models/sums.py) against numpy's BLAS-backed ones.

They must agree with numpy to rounding (numpy is the reference here); that they give the
same bits whichever BLAS kernels run is checked end to end in tests/lab/test_rehearsal_golden.py."""

from __future__ import annotations

import numpy as np
import pytest

from server.models.sums import cholesky, covariance, dot, rows_dot, times_transposed


def test_each_sum_matches_numpy():
    rng = np.random.default_rng(5)
    a, b = rng.random(2048), rng.random(2048)
    assert dot(a, b) == pytest.approx(float(np.dot(a, b)), rel=1e-13)
    m = rng.random((3, 2048))
    np.testing.assert_allclose(rows_dot(m, b), m @ b, rtol=1e-13)
    x, c = rng.standard_normal((500, 5)), rng.standard_normal((5, 5))
    np.testing.assert_allclose(times_transposed(x, c), x @ c.T, rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(covariance(x), np.cov(x, rowvar=False), rtol=1e-12, atol=1e-15)


def test_cholesky_matches_numpy_and_refuses_what_is_not_positive_definite():
    rng = np.random.default_rng(6)
    g = rng.standard_normal((5, 5))
    a = g @ g.T + 0.1 * np.eye(5)
    low = cholesky(a)
    np.testing.assert_allclose(low, np.linalg.cholesky(a), rtol=1e-12, atol=1e-14)
    assert np.allclose(np.triu(low, 1), 0.0)
    # A worked example (Golub & Van Loan's recurrence by hand): [[4, 2], [2, 3]] = L L^T with
    # L = [[2, 0], [1, sqrt(2)]].
    np.testing.assert_allclose(cholesky(np.array([[4.0, 2.0], [2.0, 3.0]])), [[2.0, 0.0], [1.0, 2**0.5]])
    with pytest.raises(np.linalg.LinAlgError):
        cholesky(np.array([[1.0, 2.0], [2.0, 1.0]]))
