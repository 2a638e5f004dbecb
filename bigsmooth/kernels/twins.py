"""Plain-Python twins of the compiled kernels in :mod:`bigsmooth.kernels._fast`, and the registry that
pairs every compiled kernel with its twin.

The twins are slow and obvious (loops or numpy, same signatures, filling the same output buffers);
tests/kernels/test_kernel_twins.py walks every compiled kernel of ``_fast``, refuses one without a twin,
and compares the two on random input.
"""

import numpy as np


def split_counts(indptr, indices, perm, pos, group, Lc, Uc, Oc):
    for r, i in enumerate(perm):
        cols = pos[indices[indptr[i] : indptr[i + 1]]]
        same = group[cols] == group[r]
        Lc[r + 1] = np.sum(same & (cols < r))
        Uc[r + 1] = np.sum(same & (cols > r))
        Oc[r + 1] = np.sum(~same)


def split_fill(indptr, indices, data, perm, pos, group, Lp, Li, Lw, Up, Ui, Uw, Op, Oi, Ow, degree, lo, hi):
    for r in range(lo, hi):
        i = perm[r]
        a, b, e = Lp[r], Up[r], Op[r]
        degree[r] = 0.0
        for q in range(indptr[i], indptr[i + 1]):
            j, v = pos[indices[q]], data[q]
            degree[r] += v
            if group[j] == group[r] and j < r:
                Li[a], Lw[a], a = j, v, a + 1
            elif group[j] == group[r] and j > r:
                Ui[b], Uw[b], b = j, v, b + 1
            elif group[j] != group[r]:
                Oi[e], Ow[e], e = j, v, e + 1


def scale_triplet(ptr, ind, w, s, lam, out):
    rows = np.repeat(np.arange(len(ptr) - 1), np.diff(ptr))
    out[:] = -lam * s[rows] * w * s[ind]


def _csr_times(ptr, ind, val, y):
    rows = np.repeat(np.arange(len(ptr) - 1), np.diff(ptr))
    out = np.zeros_like(y)
    np.add.at(out, rows, val[:, None] * y[ind])
    return out


def split_matvec(Lp, Li, Ld, Up, Ui, Ud, Op, Oi, Od, y, out):
    out[:] = y + _csr_times(Lp, Li, Ld, y) + _csr_times(Up, Ui, Ud, y) + _csr_times(Op, Oi, Od, y)


def split_residual_sq(Lp, Li, Ld, Up, Ui, Ud, Op, Oi, Od, s, xs, b, chunk, parts):
    ax = np.empty_like(xs)
    split_matvec(Lp, Li, Ld, Up, Ui, Ud, Op, Oi, Od, xs, ax)
    r = b - ax / s[:, None]
    for j in range(len(parts)):
        part = r[j * chunk : (j + 1) * chunk]
        parts[j] = float(np.sum(part * part))


def inside_edges(indptr, indices, label, counts_only, ptr, out):
    for i in range(len(indptr) - 1):
        cols = indices[indptr[i] : indptr[i + 1]]
        keep = cols[label[cols] == label[i]]
        if counts_only:
            ptr[i + 1] = len(keep)
        else:
            out[ptr[i] : ptr[i] + len(keep)] = keep


def smallest_merge(g, col_offset, skip_offset, out_ind, out_val):
    b, m = g.shape
    kk = out_val.shape[1]
    for i in range(b):
        cols = np.arange(m) + col_offset
        take = (cols != i + skip_offset) & (g[i] < np.inf)
        have = out_val[i] < np.inf
        v = np.concatenate([out_val[i][have], g[i][take]])
        c = np.concatenate([out_ind[i][have], cols[take]])
        order = np.lexsort((c, v))[:kk]
        out_val[i] = np.inf
        out_ind[i] = -1
        out_val[i, : len(order)] = v[order]
        out_ind[i, : len(order)] = c[order]


def transpose_tile(g, out):
    out[:] = g.T


def max_merge_fill(rows, cols, w, lo, out_ptr, out_cols, out_w):
    nr = len(out_ptr) - 1
    n = int(cols.max()) + 1 if len(cols) else 1
    key = (rows - lo) * n + cols  # one int64 key per (row, col)
    order = np.argsort(key, kind="stable")
    key, v, r, c = key[order], w[order], rows[order], cols[order]
    new = np.ones(len(r), dtype=bool)
    new[1:] = key[1:] != key[:-1]
    starts = np.flatnonzero(new)
    m = len(starts)
    out_w[:m] = np.maximum.reduceat(v, starts) if len(v) else v
    out_cols[:m] = c[starts]
    out_ptr[0] = 0
    np.cumsum(np.bincount(r[starts] - lo, minlength=nr), out=out_ptr[1:])


def merge_lists(cand_ind, cand_dist, out_ind, out_dist):
    k = out_ind.shape[1]
    order = np.lexsort((cand_ind, cand_dist), axis=1)
    ci = np.take_along_axis(cand_ind, order, axis=1)
    cd = np.take_along_axis(cand_dist, order, axis=1)
    dup = np.zeros(ci.shape, dtype=bool)  # the same row twice sits side by side once sorted
    dup[:, 1:] = (ci[:, 1:] == ci[:, :-1]) & (ci[:, 1:] >= 0)
    cd = np.where(dup, np.inf, cd)
    ci = np.where(dup, -1, ci)
    order = np.lexsort((np.where(ci < 0, np.iinfo(np.int64).max, ci), cd), axis=1)[:, :k]
    out_ind[:] = np.take_along_axis(ci, order, axis=1)
    out_dist[:] = np.take_along_axis(cd, order, axis=1)


def refine_lists(E, frozen, rows, out_ind, out_dist):
    k = out_ind.shape[1]
    inserted = 0
    for i in rows:
        have = [(out_dist[i, q], out_ind[i, q]) for q in range(k)]
        listed = set(int(c) for c in out_ind[i])
        new = set()
        for j in frozen[i]:
            if j >= 0:
                new |= {int(c) for c in frozen[j] if c >= 0 and c != i and c not in listed}
        for c in new:
            s = 0.0
            for t in range(E.shape[1]):
                z = float(E[i, t]) - float(E[c, t])
                s += z * z
            have.append((float(np.sqrt(s)), c))
        # the k smallest by (distance, row); an empty place (-1 / inf) sorts after every row
        have.sort(key=lambda e: (e[0], e[1] < 0, e[1]))
        for q, (v, c) in enumerate(have[:k]):
            out_dist[i, q], out_ind[i, q] = v, c
        inserted += sum(1 for _, c in have[:k] if c >= 0 and c not in set(frozen[i].tolist()))
    return inserted


def registry():
    """{compiled kernel name: its Python twin} for every kernel in ``_fast``."""
    from . import solver, sweepcg

    return {
        "gauss_seidel_rows": solver.gauss_seidel_rows,
        "backward_sweep": sweepcg.backward_sweep,
        "forward_sweep": sweepcg.forward_sweep,
        "update_sweep": sweepcg.update_sweep,
        "split_counts": split_counts,
        "split_fill": split_fill,
        "scale_triplet": scale_triplet,
        "split_matvec": split_matvec,
        "split_residual_sq": split_residual_sq,
        "inside_edges": inside_edges,
        "smallest_merge": smallest_merge,
        "transpose_tile": transpose_tile,
        "max_merge_fill": max_merge_fill,
        "merge_lists": merge_lists,
        "refine_lists": refine_lists,
        "_split_row": None,  # inlined helper of split_matvec / split_residual_sq, tested through them
    }
