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


def split_fill(indptr, indices, data, perm, pos, group, Lp, Li, Lw, Up, Ui, Uw, Op, Oi, Ow, degree):
    for r, i in enumerate(perm):
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


def smallest_per_row(g, skip_offset, kk, out_ind, out_val):
    b, m = g.shape
    for i in range(b):
        v = g[i].copy()
        if 0 <= i + skip_offset < m:
            v[i + skip_offset] = np.inf
        order = np.lexsort((np.arange(m), v))[:kk]
        out_ind[i] = np.where(np.isfinite(v[order]), order, -1)
        out_val[i] = v[order]


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
        "smallest_per_row": smallest_per_row,
        "_split_row": None,  # inlined helper of split_matvec / split_residual_sq, tested through them
    }
