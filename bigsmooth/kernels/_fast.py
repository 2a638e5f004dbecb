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
# The Jacobi-scaled matrix is split into strictly lower (L) and strictly upper (U) couplings inside
# a row's group and couplings to other groups (O), each a CSR triplet. Vectors are (n, c); the column
# loop is outermost so that the inner loops are plain scalar loops.

@numba.njit(cache=True, nogil=True)
def backward_sweep(Up, Ui, Ud, r, p, t, beta, start, stop):
    """p_g = r_g + beta p_g, then t_g = E_g^-T p_g = solve (I + U_g) t = p backwards."""
    for k in range(p.shape[1]):
        bk = beta[k]
        for i in range(stop - 1, start - 1, -1):
            pi = r[i, k] + bk * p[i, k]
            p[i, k] = pi
            acc = pi
            for q in range(Up[i], Up[i + 1]):
                acc -= Ud[q] * t[Ui[q], k]
            t[i, k] = acc


@numba.njit(cache=True, nogil=True)
def forward_sweep(Lp, Li, Ld, Op, Oi, Od, p, t, w, ap, start, stop, pap):
    """w_g = E_g^-1 (p - t + O t)_g, ap_g = t_g + w_g; pap[k] = sum_g p[:, k] * ap[:, k]."""
    for k in range(p.shape[1]):
        acc_pap = 0.0
        for i in range(start, stop):
            acc = p[i, k] - t[i, k]
            for q in range(Op[i], Op[i + 1]):
                acc += Od[q] * t[Oi[q], k]
            for q in range(Lp[i], Lp[i + 1]):
                acc -= Ld[q] * w[Li[q], k]
            w[i, k] = acc
            api = t[i, k] + acc
            ap[i, k] = api
            acc_pap += p[i, k] * api
        pap[k] = acc_pap


@numba.njit(cache=True, nogil=True)
def update_sweep(x, r, t, ap, alpha, start, stop, rr):
    """x_g += alpha t_g, r_g -= alpha ap_g; rr[k] = sum_g r[:, k]^2."""
    for k in range(x.shape[1]):
        ak = alpha[k]
        acc = 0.0
        for i in range(start, stop):
            x[i, k] += ak * t[i, k]
            v = r[i, k] - ak * ap[i, k]
            r[i, k] = v
            acc += v * v
        rr[k] = acc


@numba.njit(cache=True)
def split_system(indptr, indices, data, lam, c, perm, pos, group, counts_only, Lp, Up, Op, Li, Ld, Ui, Ud, Oi, Od, s):
    """Build the Jacobi-scaled, permuted and group-split system of A = C + lam (D - W) straight from
    the graph W (CSR), in the new row order perm (pos = inverse of perm). Twin of
    :func:`bigsmooth.kernels.sweepcg.prepare` applied to the assembled, permuted A.

    Called twice: with counts_only=True it fills the row counts into Lp/Up/Op[1:]; the caller turns
    them into offsets (cumsum) and allocates; the second call fills indices and values.
    Index arrays are unsigned (uint32 / uint64).
    """
    n = len(perm)
    if counts_only:
        for r in range(n):
            ru = np.uint32(r)
            i = perm[r]
            gr = group[ru]
            nl = 0
            nu = 0
            no = 0
            for q in range(indptr[i], indptr[i + np.uint32(1)]):
                j = pos[indices[q]]
                if group[j] == gr:
                    if j < ru:
                        nl += 1
                    elif j > ru:
                        nu += 1
                else:
                    no += 1
            Lp[r + 1] = nl
            Up[r + 1] = nu
            Op[r + 1] = no
        return
    for r in range(n):
        i = perm[r]
        d = 0.0
        for q in range(indptr[i], indptr[i + np.uint32(1)]):
            d += data[q]
        s[r] = 1.0 / np.sqrt(c[i] + lam * d)
    for r in range(n):
        ru = np.uint32(r)
        i = perm[r]
        gr = group[ru]
        a = np.int64(Lp[r])
        b = np.int64(Up[r])
        e = np.int64(Op[r])
        sr = s[r]
        for q in range(indptr[i], indptr[i + np.uint32(1)]):
            j = pos[indices[q]]
            v = -lam * data[q] * sr * s[j]
            if group[j] == gr:
                if j < ru:
                    Li[a] = j
                    Ld[a] = v
                    a += 1
                elif j > ru:
                    Ui[b] = j
                    Ud[b] = v
                    b += 1
            else:
                Oi[e] = j
                Od[e] = v
                e += 1
