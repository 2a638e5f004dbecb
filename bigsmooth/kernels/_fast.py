"""Compiled (numba) versions of hot loops. Each has a pure-Python reference beside it.

numba arrives with pynndescent; the compiled cache lives in NUMBA_CACHE_DIR (set by the CLI).
"""
import numba
import numpy as np


@numba.njit(cache=True, nogil=True)
def gauss_seidel_rows(indptr, indices, data, b, x, start, stop, sweeps):
    """Compiled twin of :func:`bigsmooth.kernels.solver.gauss_seidel_rows` (x of shape (n, c))."""
    c = x.shape[1]
    acc = np.empty(c)
    for _ in range(sweeps):
        for i in range(start, stop):
            for k in range(c):
                acc[k] = b[i, k]
            diag = 0.0
            for p in range(indptr[i], indptr[i + 1]):
                j = indices[p]
                if j == i:
                    diag = data[p]
                else:
                    w = data[p]
                    for k in range(c):
                        acc[k] -= w * x[j, k]
            for k in range(c):
                x[i, k] = acc[k] / diag
