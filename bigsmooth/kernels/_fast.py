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
def backward_sweep(Up, Ui, Ud, r, p, t, beta, omega, start, stop):
    """p_g = r_g + beta p_g, then t_g = E_g^-T p_g = solve (I / omega + U_g) t = p backwards."""
    for k in range(p.shape[1]):
        bk = beta[k]
        for i in range(stop - 1, start - 1, -1):
            pi = r[i, k] + bk * p[i, k]
            p[i, k] = pi
            acc = pi
            for q in range(Up[i], Up[i + 1]):
                acc -= Ud[q] * t[Ui[q], k]
            t[i, k] = omega * acc


@numba.njit(cache=True, nogil=True)
def forward_sweep(Lp, Li, Ld, Op, Oi, Od, p, t, w, ap, omega, start, stop, pap):
    """w_g = E_g^-1 (p + (1 - 2 / omega) t + O t)_g, ap_g = t_g + w_g; pap[k] = sum_g p[:, k] * ap[:, k].

    Two passes over the group's rows: first v = p + (1 - 2 / omega) t + O t into w (rows are
    independent there, so the scattered reads of t in other groups overlap), then the Gauss-Seidel
    recurrence over L in place. Fusing them into one loop was measured here at 1M rows to take
    about 2.5x as long as the backward sweep over a similar number of entries: the gathers from
    other groups then wait behind the recurrence."""
    ct = 1.0 - 2.0 / omega
    for k in range(p.shape[1]):
        for i in range(start, stop):
            acc = p[i, k] + ct * t[i, k]
            for q in range(Op[i], Op[i + 1]):
                acc += Od[q] * t[Oi[q], k]
            w[i, k] = acc
        acc_pap = 0.0
        for i in range(start, stop):
            acc = w[i, k]
            for q in range(Lp[i], Lp[i + 1]):
                acc -= Ld[q] * w[Li[q], k]
            acc *= omega
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


# ---- the group split of the graph (order stage) and its scaling for one lam (solve stage) ----
# Rows are processed in parallel (numba prange); every row writes only its own slots, so the
# result does not depend on the number of threads.


@numba.njit(cache=True, parallel=True)
def split_counts(indptr, indices, perm, pos, group, Lc, Uc, Oc):
    """Row counts of the strictly lower / strictly upper couplings inside a row's group and of the
    couplings to other groups, for the graph W permuted by perm (pos = inverse), into X[r + 1]."""
    n = len(perm)
    for r in numba.prange(n):
        i = perm[r]
        gr = group[r]
        nl = 0
        nu = 0
        no = 0
        for q in range(indptr[i], indptr[i + 1]):
            j = pos[indices[q]]
            if group[j] == gr:
                if j < r:
                    nl += 1
                elif j > r:
                    nu += 1
            else:
                no += 1
        Lc[r + 1] = nl
        Uc[r + 1] = nu
        Oc[r + 1] = no


@numba.njit(cache=True, parallel=True)
def split_fill(indptr, indices, data, perm, pos, group, Lp, Li, Lw, Up, Ui, Uw, Op, Oi, Ow, degree, lo, hi):
    """Fill the three triplets (offsets from :func:`split_counts`) with positions and raw weights in
    the graph's column order, and the permuted degrees, for the positions lo <= r < hi."""
    for r in numba.prange(lo, hi):
        i = perm[r]
        gr = group[r]
        a = np.int64(Lp[r])
        b = np.int64(Up[r])
        e = np.int64(Op[r])
        d = 0.0
        for q in range(indptr[i], indptr[i + 1]):
            j = pos[indices[q]]
            v = data[q]
            d += v
            if group[j] == gr:
                if j < r:
                    Li[a] = j
                    Lw[a] = v
                    a += 1
                elif j > r:
                    Ui[b] = j
                    Uw[b] = v
                    b += 1
            else:
                Oi[e] = j
                Ow[e] = v
                e += 1
        degree[r] = d


@numba.njit(cache=True, parallel=True)
def scale_triplet(ptr, ind, w, s, lam, out):
    """out[q] = -lam w[q] s[r] s[ind[q]] for the entries q of row r: a coupling of S (C + lam L) S."""
    n = len(ptr) - 1
    for r in numba.prange(n):
        sr = -lam * s[r]
        for q in range(ptr[r], ptr[r + 1]):
            out[q] = sr * w[q] * s[ind[q]]


@numba.njit(cache=True, inline="always")
def _split_row(Lp, Li, Ld, Up, Ui, Ud, Op, Oi, Od, y, i, k):
    """((I + L + U + O) y)[i, k]."""
    acc = y[i, k]
    for q in range(Lp[i], Lp[i + 1]):
        acc += Ld[q] * y[Li[q], k]
    for q in range(Up[i], Up[i + 1]):
        acc += Ud[q] * y[Ui[q], k]
    for q in range(Op[i], Op[i + 1]):
        acc += Od[q] * y[Oi[q], k]
    return acc


@numba.njit(cache=True, parallel=True)
def split_matvec(Lp, Li, Ld, Up, Ui, Ud, Op, Oi, Od, y, out):
    """out = (I + L + U + O) y for the scaled, split system; y and out of shape (n, c)."""
    n, c = y.shape
    for i in numba.prange(n):
        for k in range(c):
            out[i, k] = _split_row(Lp, Li, Ld, Up, Ui, Ud, Op, Oi, Od, y, i, k)


@numba.njit(cache=True, parallel=True)
def split_residual_sq(Lp, Li, Ld, Up, Ui, Ud, Op, Oi, Od, s, xs, b, chunk, parts):
    """parts[j] = sum over rows i of chunk j of ||b_i - (A x)_i||^2 with A x = S^-1 (I + L + U + O) xs,
    x = S xs. Chunks are fixed row ranges, so the sums do not depend on the number of threads."""
    n, c = xs.shape
    for j in numba.prange(len(parts)):
        acc_sq = 0.0
        for i in range(j * chunk, min(n, (j + 1) * chunk)):
            for k in range(c):
                r = b[i, k] - _split_row(Lp, Li, Ld, Up, Ui, Ud, Op, Oi, Od, xs, i, k) / s[i]
                acc_sq += r * r
        parts[j] = acc_sq


@numba.njit(cache=True)
def inside_edges(indptr, indices, label, counts_only, ptr, out):
    """The structure of W restricted to edges whose two ends carry the same label (CSR, two calls:
    counts into ptr[1:], then indices into out)."""
    n = len(indptr) - 1
    for i in range(n):
        a = ptr[i]
        m = 0
        for q in range(indptr[i], indptr[i + 1]):
            j = indices[q]
            if label[j] == label[i]:
                if not counts_only:
                    out[a + m] = j
                m += 1
        if counts_only:
            ptr[i + 1] = m


@numba.njit(cache=True, nogil=True)
def smallest_merge(g, col_offset, skip_offset, out_ind, out_val):
    """Merge the entries of g (b, m) into each row's list of the kk smallest so far (out_ind,
    out_val of shape (b, kk), ascending by (value, column); empty places are -1 / inf). Entry j of
    row i stands for column j + col_offset; column i + skip_offset of row i is skipped (the row
    itself). Called on column tiles in ascending order, the lists end ascending by (value, column)
    over all tiles. Entries are checked 64 at a time against the list's last, counting the smaller
    ones in a loop of fixed length (which the compiler turns into vector compares: 0.08 ns an
    entry measured, against 0.67 for a boolean "or" over a run of variable length); only a run
    holding a smaller entry is walked one by one, shifting the list where one beats it."""
    b, m = g.shape
    kk = out_val.shape[1]
    run = 64
    full = m - m % run
    for i in range(b):
        vals = out_val[i]
        inds = out_ind[i]
        row = g[i]
        me = i + skip_offset - col_offset
        last = vals[kk - 1]
        for j0 in range(0, m, run):
            j1 = min(j0 + run, m)
            hits = 0
            if j0 < full:
                for j in range(run):
                    hits += row[j0 + j] < last
            else:
                for j in range(j0, j1):
                    hits += row[j] < last
            if hits == 0:
                continue
            for j in range(j0, j1):
                v = row[j]
                if v < last and j != me:
                    p = kk - 1
                    while p > 0 and vals[p - 1] > v:
                        vals[p] = vals[p - 1]
                        inds[p] = inds[p - 1]
                        p -= 1
                    vals[p] = v
                    inds[p] = j + col_offset
                    last = vals[kk - 1]


@numba.njit(cache=True, nogil=True)
def transpose_tile(g, out):
    """out[j, i] = g[i, j] for g (b, m) and out (m, b), in fixed 8 x 8 blocks that the compiler
    keeps in registers (0.45-0.5 ns an entry measured on 256 x 256 float32 tiles, against about
    0.95 for ``out[:] = g.T`` or a loop over blocks of variable size), then the edges."""
    b, m = g.shape
    b8, m8 = b - b % 8, m - m % 8
    for i0 in range(0, b8, 8):
        for j0 in range(0, m8, 8):
            for jj in range(8):
                for ii in range(8):
                    out[j0 + jj, i0 + ii] = g[i0 + ii, j0 + jj]
        for j in range(m8, m):
            for ii in range(8):
                out[j, i0 + ii] = g[i0 + ii, j]
    for i in range(b8, b):
        for j in range(m):
            out[j, i] = g[i, j]


@numba.njit(cache=True, nogil=True)
def max_merge_fill(rows, cols, w, lo, out_ptr, out_cols, out_w):
    """Compiled twin of :func:`bigsmooth.kernels.twins.max_merge_fill`: per row lo.. (rows - lo
    indexes out_ptr), one entry per column with the larger weight, columns ascending. out_ptr
    (rows + 1) receives the merged row starts; out_cols / out_w (len(rows)) the entries, packed."""
    nr = len(out_ptr) - 1
    start = np.zeros(nr + 1, dtype=np.int64)
    for e in range(len(rows)):
        start[rows[e] - lo + 1] += 1
    for i in range(nr):
        start[i + 1] += start[i]
    fill = start[:-1].copy()
    bc = np.empty(len(rows), dtype=np.int64)
    bw = np.empty(len(rows), dtype=np.float64)
    for e in range(len(rows)):
        r = rows[e] - lo
        bc[fill[r]] = cols[e]
        bw[fill[r]] = w[e]
        fill[r] += 1
    at = 0
    out_ptr[0] = 0
    for i in range(nr):
        a, b = start[i], start[i + 1]
        c = bc[a:b]
        v = bw[a:b]
        order = np.argsort(c, kind="mergesort")
        prev = -1
        for q in range(b - a):
            j = c[order[q]]
            x = v[order[q]]
            if j == prev:
                if x > out_w[at - 1]:
                    out_w[at - 1] = x
            else:
                out_cols[at] = j
                out_w[at] = x
                at += 1
                prev = j
        out_ptr[i + 1] = at


@numba.njit(cache=True, nogil=True)
def merge_lists(cand_ind, cand_dist, out_ind, out_dist):
    """Per row, the k = out_ind.shape[1] best distinct candidates of (b, c) candidate lists by
    (distance, row), ascending; -1 / inf for none. A candidate is inserted into a sorted list of k
    when it beats the list's last and is not in the list already."""
    b, c = cand_ind.shape
    k = out_ind.shape[1]
    for i in range(b):
        oi = out_ind[i]
        od = out_dist[i]
        for q in range(k):
            oi[q] = -1
            od[q] = np.inf
        for j in range(c):
            v = cand_ind[i, j]
            d = cand_dist[i, j]
            if v < 0:
                continue
            if not (d < od[k - 1] or (d == od[k - 1] and (oi[k - 1] < 0 or v < oi[k - 1]))):
                continue
            seen = False
            for q in range(k):
                if oi[q] == v:
                    seen = True
                    break
            if seen:
                continue
            p = k - 1
            while p > 0 and (od[p - 1] > d or (od[p - 1] == d and (oi[p - 1] < 0 or oi[p - 1] > v))):
                oi[p] = oi[p - 1]
                od[p] = od[p - 1]
                p -= 1
            oi[p] = v
            od[p] = d


@numba.njit(cache=True, nogil=True)
def refine_lists(E, frozen, rows, out_ind, out_dist):
    """One neighbour-of-neighbour round for the given rows: every neighbour's neighbour c of row i
    (in the frozen lists, -1 skipped) that is not i and not in i's list yet is a candidate at the
    float64 distance from E (float32 rows, summed over dimensions in order), inserted into i's list
    (out_ind[i], out_dist[i], ascending by (distance, row)) when it beats the last entry. Only the
    given rows of out_ind / out_dist are written and only frozen is read for the neighbours' lists,
    so calls on disjoint rows may run at once in any order. Returns the number of entries of the
    final lists that the frozen lists did not hold (out_ind starts as a copy of frozen)."""
    k = out_ind.shape[1]
    kf = frozen.shape[1]
    d = E.shape[1]
    inserted = 0
    for r in range(len(rows)):
        i = rows[r]
        oi = out_ind[i]
        od = out_dist[i]
        for a in range(kf):
            j = frozen[i, a]
            if j < 0:
                continue
            for b in range(kf):
                c = frozen[j, b]
                if c < 0 or c == i:
                    continue
                seen = False
                for q in range(k):
                    if oi[q] == c:
                        seen = True
                        break
                if seen:
                    continue
                s = 0.0
                for t in range(d):
                    z = np.float64(E[i, t]) - np.float64(E[c, t])
                    s += z * z
                v = np.sqrt(s)
                last = od[k - 1]
                if not (v < last or (v == last and (oi[k - 1] < 0 or c < oi[k - 1]))):
                    continue
                p = k - 1
                while p > 0 and (od[p - 1] > v or (od[p - 1] == v and (oi[p - 1] < 0 or oi[p - 1] > c))):
                    oi[p] = oi[p - 1]
                    od[p] = od[p - 1]
                    p -= 1
                oi[p] = c
                od[p] = v
        for q in range(k):
            new = oi[q] >= 0
            for a in range(kf):
                if frozen[i, a] == oi[q]:
                    new = False
                    break
            if new:
                inserted += 1
    return inserted
