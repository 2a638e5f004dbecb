"""Every compiled (numba) kernel of bigsmooth.kernels._fast against its plain-Python twin
(bigsmooth.kernels.twins.registry) on random input: same outputs in every buffer it fills.

A new compiled kernel without a twin, or without inputs here, fails the walk. The twins themselves
are obvious loops / numpy; the solver-level references (scipy's spsolve and CG) are in
tests/kernels/test_sweepcg.py and tests/kernels/test_laplacian_solver.py.
"""

import numba
import numpy as np
import pytest
import scipy.sparse as sp

from bigsmooth.kernels import _fast, twins
from conftest import random_graph


def _compiled():
    return sorted(name for name, f in vars(_fast).items() if isinstance(f, numba.core.registry.CPUDispatcher))


def _graph(rng, n=300):
    W = random_graph(n, 0.03, rng)
    W.sort_indices()
    return W


def _split_inputs(rng, n=300, groups=4):
    W = _graph(rng, n)
    perm = rng.permutation(n).astype(np.int64)
    pos = np.empty(n, np.int64)
    pos[perm] = np.arange(n)
    group = np.sort(rng.integers(0, groups, n)).astype(np.int64)
    return W, perm, pos, group


def _triplets(rng, n=300):
    """Random L (lower), U (upper), O triplets of a split system: (ptr, ind, val) each."""
    out = []
    for part in (sp.tril(_graph(rng, n), -1), sp.triu(_graph(rng, n), 1), _graph(rng, n)):
        m = sp.csr_matrix(part) * 0.05
        m.sort_indices()
        out.append((m.indptr.astype(np.int64), m.indices.astype(np.int64), m.data.copy()))
    return out


def _inputs(name, rng):
    """(args, names of the arguments the kernel writes) for kernel ``name``."""
    n, c = 300, 2
    if name == "gauss_seidel_rows":
        W = _graph(rng, n)
        A = (sp.diags(np.asarray(W.sum(axis=1)).ravel() + 1.0) - W).tocsr()
        A.sort_indices()
        return [A.indptr, A.indices, A.data, rng.random((n, c)), rng.random((n, c)), 20, 250, 3], [4]
    if name in ("backward_sweep", "forward_sweep", "update_sweep", "split_matvec", "split_residual_sq"):
        (Lp, Li, Ld), (Up, Ui, Ud), (Op, Oi, Od) = _triplets(rng, n)
        v = [rng.random((n, c)) for _ in range(4)]
        if name == "backward_sweep":
            return [Up, Ui, Ud, v[0], v[1], v[2], rng.random(c), 1.3, 10, 290], [4, 5]
        if name == "forward_sweep":
            return [Lp, Li, Ld, Op, Oi, Od, v[0], v[1], v[2], v[3], 1.3, 10, 290, np.zeros(c)], [8, 9, 13]
        if name == "update_sweep":
            return [v[0], v[1], v[2], v[3], rng.random(c), 10, 290, np.zeros(c)], [0, 1, 7]
        if name == "split_matvec":
            return [Lp, Li, Ld, Up, Ui, Ud, Op, Oi, Od, v[0], np.zeros((n, c))], [10]
        s = rng.uniform(0.5, 2.0, n)
        return [Lp, Li, Ld, Up, Ui, Ud, Op, Oi, Od, s, v[0], v[1], 64, np.zeros(-(-n // 64))], [13]
    if name == "split_counts":
        W, perm, pos, group = _split_inputs(rng)
        z = [np.zeros(n + 1, np.int64) for _ in range(3)]
        return [W.indptr, W.indices, perm, pos, group, *z], [5, 6, 7]
    if name == "split_fill":
        W, perm, pos, group = _split_inputs(rng)
        counts = [np.zeros(n + 1, np.int64) for _ in range(3)]
        twins.split_counts(W.indptr, W.indices, perm, pos, group, *counts)
        bufs = []
        for cnt in counts:
            ptr = np.cumsum(cnt)
            bufs += [ptr, np.zeros(ptr[-1], np.int64), np.zeros(ptr[-1])]
        # positions from n // 3 on: a block of the order stage's blocked fill (the rest stays zero)
        outs = [7, 8, 10, 11, 13, 14, 15]
        return [W.indptr, W.indices, W.data, perm, pos, group, *bufs, np.zeros(n), n // 3, n], outs
    if name == "scale_triplet":
        W = _graph(rng, n)
        return [W.indptr, W.indices, W.data, rng.uniform(0.5, 2.0, n), 3.0, np.zeros(W.nnz)], [5]
    if name == "inside_edges":
        W = _graph(rng, n)
        label = rng.integers(0, 3, n).astype(np.int64)
        ptr = np.zeros(n + 1, np.int64)
        twins.inside_edges(W.indptr, W.indices, label, True, ptr, np.zeros(0, np.int64))
        ptr = np.cumsum(ptr)
        counts = [W.indptr, W.indices, label, True, np.zeros(n + 1, np.int64), np.zeros(0, np.int64)]
        return (
            "two calls",
            counts,
            [W.indptr, W.indices, label, False, ptr, np.zeros(ptr[-1], np.int64)],
        ), None
    if name == "smallest_merge":
        # lists filled from a first tile (columns 0..299), then this tile (300..599) merged in;
        # row i's own column is i + 280, so rows 20.. skip one column of this tile
        g0, g = rng.random((40, 300)), rng.random((40, 300))
        g[:, 5] = g[:, 7]  # equal values: the lower column first
        ind, val = np.full((40, 12), -1, np.int64), np.full((40, 12), np.inf)
        twins.smallest_merge(g0, 0, 280, ind, val)
        return [g, 300, 280, ind, val], [3, 4]
    if name == "transpose_tile":
        # sides that are not multiples of the 8 x 8 blocks
        g = rng.random((21, 35)).astype(np.float32)
        out = np.zeros((35, 21), np.float32)
        return [g, out], [1]
    if name == "max_merge_fill":
        # directed edges of rows 50..250 in both directions, some pairs repeated with other weights
        r = rng.integers(50, 250, 3000)
        c = rng.integers(0, 300, 3000)
        r, c = np.concatenate([r, r[:500]]), np.concatenate([c, c[:500]])
        w = rng.random(len(r))
        nr = 200
        return [r, c, w, 50, np.zeros(nr + 1, np.int64), np.zeros(len(r), np.int64), np.zeros(len(r))], [
            4,
            5,
            6,
        ]
    if name == "merge_lists":
        # per row, three blocks of 6 candidates out of 40 rows; a row's distance to a candidate is
        # the same wherever it appears (as two partitions give it), rounded so that distances tie;
        # the third block repeats the first in part, then -1 / inf pads
        ind = rng.integers(0, 40, (50, 18))
        dist = np.round(rng.random((50, 40)), 1)[np.arange(50)[:, None], ind]
        ind[:, 12:16] = ind[:, :4]
        dist[:, 12:16] = dist[:, :4]
        ind[:, 16:], dist[:, 16:] = -1, np.inf
        return [ind, dist, np.zeros((50, 5), np.int64), np.zeros((50, 5))], [2, 3]
    if name == "refine_lists":
        # random lists of 6 over 80 rows (some places empty), rounded points so that distances tie;
        # every other row refined, in a shuffled order
        E = np.round(rng.random((80, 3)) * 4).astype(np.float32)
        frozen = np.array([rng.choice(np.delete(np.arange(80), i), 6, replace=False) for i in range(80)])
        frozen[::7, 4:] = -1
        diff = E[:, None, :].astype(np.float64) - E[frozen].astype(np.float64)
        dist = np.where(frozen >= 0, np.sqrt(np.sum(diff**2, axis=2)), np.inf)
        order = np.lexsort((np.where(frozen < 0, 99, frozen), dist), axis=1)
        frozen = np.take_along_axis(frozen, order, axis=1)
        dist = np.take_along_axis(dist, order, axis=1)
        rows = rng.permutation(np.arange(0, 80, 2))
        return [E, frozen, rows, frozen.copy(), dist], [3, 4]
    raise KeyError(name)


def _copy(args):
    return [a.copy() if isinstance(a, np.ndarray) else a for a in args]


def test_every_compiled_kernel_has_a_twin():
    reg = twins.registry()
    assert set(_compiled()) == set(reg), set(_compiled()) ^ set(reg)


@pytest.mark.parametrize("name", [k for k, v in twins.registry().items() if v is not None])
def test_compiled_kernel_equals_its_twin(name, rng):
    fast, slow = getattr(_fast, name), twins.registry()[name]
    args, outs = _inputs(name, rng)
    if isinstance(args, tuple) and args[0] == "two calls":
        for call in args[1:]:
            a, b = _copy(call), _copy(call)
            fast(*a)
            slow(*b)
            np.testing.assert_array_equal(a[4], b[4])
            np.testing.assert_array_equal(a[5], b[5])
        return
    a, b = _copy(args), _copy(args)
    assert fast(*a) == slow(*b)  # the kernels that return a count agree on it (others return None)
    for k in outs:
        np.testing.assert_allclose(a[k], b[k], rtol=1e-12, atol=1e-12, err_msg=f"{name}: argument {k}")


@pytest.mark.parametrize("name", [k for k, v in twins.registry().items() if v is not None])
def test_twin_has_the_same_parameter_names(name):
    """Call sites pass the kernels' arguments by keyword, to the compiled kernel or its twin alike."""
    import inspect

    fast, slow = getattr(_fast, name), twins.registry()[name]
    assert list(inspect.signature(fast.py_func).parameters) == list(inspect.signature(slow).parameters)
