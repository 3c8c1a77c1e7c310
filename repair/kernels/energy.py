"""Compiled batch kernels for energies and local fields of a CSR-coupled QUBO.

Both run in O(K * (n + nnz)) with no (K, nnz) temporaries, so large libraries stay
within memory. They allocate nothing (the callers pass ``out``), so they compile without
numba's reference counting and without a C-callable wrapper: less to compile.
"""

from __future__ import annotations

import numba as nb
import numpy as np

__all__ = ["csr_energies", "csr_local_fields"]


@nb.njit(cache=True, _nrt=False, no_cfunc_wrapper=True)
def _energies(X, h, indptr, indices, data, offset, out):
    K, n = X.shape
    for k in range(K):
        x = X[k]
        e = offset
        for i in range(n):
            if x[i]:
                e += h[i]
                acc = 0.0
                for p in range(indptr[i], indptr[i + 1]):
                    j = indices[p]
                    if j > i and x[j]:
                        acc += data[p]
                e += acc
        out[k] = e


@nb.njit(cache=True, _nrt=False, no_cfunc_wrapper=True)
def _fields(X, h, indptr, indices, data, out):
    K, n = X.shape
    for k in range(K):
        x = X[k]
        for i in range(n):
            f = h[i]
            for p in range(indptr[i], indptr[i + 1]):
                if x[indices[p]]:
                    f += data[p]
            out[k, i] = f


def csr_energies(X: np.ndarray, h, indptr, indices, data, offset: float) -> np.ndarray:
    """Energy of every row of X (int8 (K, n), 0/1): float64 (K,)."""
    X = np.ascontiguousarray(X, dtype=np.int8)
    out = np.empty(X.shape[0])
    _energies(X, h, indptr, indices, data, float(offset), out)
    return out


def csr_local_fields(X: np.ndarray, h, indptr, indices, data) -> np.ndarray:
    """h_i + sum_j J_ij x_j for every row of X (int8 (K, n)): float64 (K, n)."""
    X = np.ascontiguousarray(X, dtype=np.int8)
    out = np.empty(X.shape, dtype=np.float64)
    _fields(X, h, indptr, indices, data, out)
    return out
