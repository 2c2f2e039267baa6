"""Weighted sums that give the same bits on every CPU.

numpy hands `@` and `np.dot` to BLAS, whose kernels are picked per processor at run time and
sum in different orders: the same seed then gave a rule value differing in its last bit on
two machines, and rehearsal output is promised byte-identical for a seed. numpy's own
reductions (pairwise summation, compiled once) do not depend on the processor, so every sum
whose value is printed, stored or compared goes through here instead.
"""

from __future__ import annotations

import numpy as np


def dot(a: np.ndarray, b: np.ndarray) -> float:
    """sum(a * b) over all elements (same shapes, or broadcastable)."""
    return float(np.multiply(a, b).sum())


def rows_dot(m: np.ndarray, v: np.ndarray) -> np.ndarray:
    """m @ v for m of shape (k, n) and v of shape (n,)."""
    return np.multiply(m, v).sum(axis=-1)


def times_transposed(x: np.ndarray, a: np.ndarray) -> np.ndarray:
    """x @ a.T for x of shape (n, d) and a small square a of shape (d, d)."""
    return np.multiply(x[:, None, :], a[None, :, :]).sum(axis=-1)


def covariance(x: np.ndarray) -> np.ndarray:
    """Sample covariance of the rows of x (n, d), divisor n - 1, as np.cov(x, rowvar=False)."""
    centred = x - x.sum(axis=0) / len(x)
    return np.multiply(centred[:, :, None], centred[:, None, :]).sum(axis=0) / (len(x) - 1)


def cholesky(a: np.ndarray) -> np.ndarray:
    """Lower-triangular L with L @ L.T = a, for a small symmetric positive-definite a.

    The Cholesky-Banachiewicz recurrence (Golub & Van Loan, Matrix Computations, algorithm
    4.2.1) in plain floats: LAPACK's routine calls BLAS too."""
    d = len(a)
    out = [[0.0] * d for _ in range(d)]
    for i in range(d):
        for j in range(i + 1):
            s = float(a[i, j]) - sum(out[i][k] * out[j][k] for k in range(j))
            if i == j:
                if s <= 0.0:
                    raise np.linalg.LinAlgError("matrix is not positive definite")
                out[i][j] = s**0.5
            else:
                out[i][j] = s / out[j][j]
    return np.array(out)
