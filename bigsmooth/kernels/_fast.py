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


# ---- sweep-CG kernels (see bigsmooth.kernels.sweepcg for the method and the Python references) ----
# A is Jacobi-scaled (unit diagonal); a group is the row range [start, stop). Vectors are (n, c).

@numba.njit(cache=True, nogil=True)
def backward_sweep(indptr, indices, data, r, p, t, beta, start, stop):
    """p_g = r_g + beta p_g, then t_g = E_g^-T p_g (upper in-group couplings, backwards)."""
    c = p.shape[1]
    acc = np.empty(c)
    for i in range(stop - 1, start - 1, -1):
        for k in range(c):
            p[i, k] = r[i, k] + beta[k] * p[i, k]
            acc[k] = p[i, k]
        for q in range(indptr[i], indptr[i + 1]):
            j = indices[q]
            if j > i and j < stop:
                a = data[q]
                for k in range(c):
                    acc[k] -= a * t[j, k]
        for k in range(c):
            t[i, k] = acc[k]


@numba.njit(cache=True, nogil=True)
def forward_sweep(indptr, indices, data, p, t, w, ap, start, stop, pap):
    """w_g = E_g^-1 (p - t + O t)_g, ap_g = t_g + w_g; pap[k] = sum_g p[:, k] * ap[:, k]."""
    c = p.shape[1]
    acc = np.empty(c)
    for k in range(c):
        pap[k] = 0.0
    for i in range(start, stop):
        for k in range(c):
            acc[k] = p[i, k] - t[i, k]
        for q in range(indptr[i], indptr[i + 1]):
            j = indices[q]
            if j < start or j >= stop:
                a = data[q]
                for k in range(c):
                    acc[k] += a * t[j, k]
            elif j < i:
                a = data[q]
                for k in range(c):
                    acc[k] -= a * w[j, k]
        for k in range(c):
            w[i, k] = acc[k]
            ap[i, k] = t[i, k] + acc[k]
            pap[k] += p[i, k] * ap[i, k]


@numba.njit(cache=True, nogil=True)
def update_sweep(x, r, t, ap, alpha, start, stop, rr):
    """x_g += alpha t_g, r_g -= alpha ap_g; rr[k] = sum_g r[:, k]^2."""
    c = x.shape[1]
    for k in range(c):
        rr[k] = 0.0
    for i in range(start, stop):
        for k in range(c):
            x[i, k] += alpha[k] * t[i, k]
            v = r[i, k] - alpha[k] * ap[i, k]
            r[i, k] = v
            rr[k] += v * v
