"""Neighbour graphs: exact and approximate k nearest neighbours, heat-kernel weights, symmetrising.

Every function takes arrays and returns arrays; the graph stage owns the files.
"""

import numpy as np
import scipy.sparse as sp


def exact_knn(X, k, block=2048):
    """Exact k nearest neighbours by brute force (Euclidean), excluding each row itself.

    Duplicates of a row (distance 0) are valid neighbours; only the row's own index is excluded.

    Returns
    -------
    indices : ndarray of shape (n, k), int64
    distances : ndarray of shape (n, k), float64, ascending per row
    """
    X = np.asarray(X, dtype=np.float64)
    n = X.shape[0]
    if not 1 <= k < n:
        raise ValueError(f"k must be in [1, n_rows - 1] = [1, {n - 1}]; got {k}")
    sq = np.einsum("ij,ij->i", X, X)
    ind = np.empty((n, k), dtype=np.int64)
    dist = np.empty((n, k), dtype=np.float64)
    for s in range(0, n, block):
        e = min(s + block, n)
        d2 = sq[s:e, None] + sq[None, :] - 2.0 * (X[s:e] @ X.T)
        np.maximum(d2, 0.0, out=d2)
        d2[np.arange(e - s), np.arange(s, e)] = np.inf
        part = np.argpartition(d2, k - 1, axis=1)[:, :k]
        # recompute the chosen distances directly: the expanded form above leaves round-off
        # (duplicates would come out at ~1e-8 instead of exactly 0)
        pd = np.sqrt(np.sum((X[s:e, None, :] - X[part]) ** 2, axis=2))
        # sort by (distance, index) so that ties are broken the same way every time
        order = np.lexsort((part, pd), axis=1)
        ind[s:e] = np.take_along_axis(part, order, axis=1)
        dist[s:e] = np.take_along_axis(pd, order, axis=1)
    return ind, dist


def drop_self(indices, distances, k):
    """From (n, k+1) neighbour lists that may contain the row itself, keep k others per row.

    The row's own index is removed wherever it appears (with duplicate points it need not be
    first); rows that do not list themselves lose their farthest neighbour instead.
    """
    n = indices.shape[0]
    is_self = indices == np.arange(n)[:, None]
    no_self = ~is_self.any(axis=1)
    is_self[no_self, -1] = True
    # a row could list itself twice only if the index is broken; keep the first occurrence
    extra = is_self.sum(axis=1) != 1
    if extra.any():
        first = np.argmax(is_self, axis=1)
        is_self[:] = False
        is_self[np.arange(n), first] = True
    keep = ~is_self
    return indices[keep].reshape(n, k), distances[keep].reshape(n, k)


def approx_knn(X, k, seed, n_trees=0, search=None, threads=1):
    """Approximate k nearest neighbours with pynndescent (Euclidean), excluding each row itself.

    The index looks for ``search`` (>= k) neighbours and the nearest k are kept: asking for more
    than needed raises recall at a modest cost. pynndescent's result depends on its thread count,
    so ``threads`` is a setting, not the machine's core count; numba must allow that many threads
    (NUMBA_NUM_THREADS, which the pipeline raises before numba starts).
    """
    import numba
    from pynndescent import NNDescent  # imported late: numba compiles on first use

    search = max(k, search or k)
    if threads > numba.config.NUMBA_NUM_THREADS:
        raise RuntimeError(
            f"graph.index_threads = {threads} but numba allows {numba.config.NUMBA_NUM_THREADS} "
            "threads in this process (set NUMBA_NUM_THREADS before start)"
        )
    X = np.ascontiguousarray(X, dtype=np.float32)
    kw = {"n_trees": n_trees} if n_trees else {}
    before = numba.get_num_threads()
    try:
        index = NNDescent(
            X,
            n_neighbors=min(search + 1, X.shape[0]),
            metric="euclidean",
            random_state=np.random.RandomState(seed),
            low_memory=True,
            compressed=False,
            n_jobs=threads,
            **kw,
        )
        ind, dist = index.neighbor_graph
    finally:
        numba.set_num_threads(before)
    ind = np.asarray(ind, dtype=np.int64)
    dist = np.asarray(dist, dtype=np.float64)
    bad = ind < 0
    if bad.any():  # pynndescent marks missing neighbours with -1; fill with self (dropped below)
        rows = np.nonzero(bad)[0]
        ind[bad] = rows
        dist[bad] = 0.0
    ind, dist = drop_self(ind, dist, ind.shape[1] - 1)
    return ind[:, :k], dist[:, :k]


def kernel_scale(distances, rule="global", factor=1.0):
    """The heat-kernel scale.

    ``global``: one sigma, the median of the positive neighbour distances (times ``factor``).
    ``local``: sigma_i = distance to row i's min(7, k)-th neighbour (self-tuning scale), falling
    back to the global sigma where that distance is 0. Returns an array of shape (n,) either way.
    """
    pos = distances[distances > 0]
    g = float(np.median(pos)) if pos.size else 1.0
    n, k = distances.shape
    if rule == "global":
        return np.full(n, g * factor)
    if rule == "local":
        s = distances[:, min(7, k) - 1].astype(np.float64)
        s = np.where(s > 0, s, g)
        return s * factor
    raise ValueError(f"kernel scale rule must be 'global' or 'local'; got {rule!r}")


def heat_kernel_graph(indices, distances, sigma):
    """Symmetric weight matrix from neighbour lists.

    w_ij = exp(-d_ij^2 / (sigma_i sigma_j)); the graph is symmetrised by taking the larger weight of
    (i, j) and (j, i) (an edge exists if either row lists the other). Weights that underflow to 0 are
    dropped, so a row far from everyone may end up isolated.

    Returns
    -------
    W : scipy.sparse.csr_matrix of shape (n, n)
    """
    n, k = indices.shape
    rows = np.repeat(np.arange(n), k)
    cols = indices.ravel()
    d = distances.ravel()
    w = np.exp(-(d * d) / (sigma[rows] * sigma[cols]))
    W = sp.csr_matrix((w, (rows, cols)), shape=(n, n))
    W.sum_duplicates()
    W = W.maximum(W.T).tocsr()
    W.setdiag(0)
    W.eliminate_zeros()
    W.sort_indices()
    return W


def sampled_recall(E, ind, sample_rows, rng, chunk=8192):
    """Recall@k of neighbour lists ``ind`` (n, k) against exact neighbours, on a random sample of rows.

    For a sampled row with list distances a_1..a_k, every true neighbour lies within max(a): one pass
    over the table in chunks keeps only the rows within that radius (a compare after a matrix
    product, no selection over the whole table), and the k nearest of those by (distance, row) are
    the exact neighbours. Reference: sklearn's brute-force NearestNeighbors (tests)."""
    n, k = ind.shape
    s = np.sort(rng.choice(n, size=min(sample_rows, n), replace=False))
    Q = np.asarray(E[s], dtype=np.float64)
    lists = np.asarray(ind[s])
    a = np.sqrt(
        np.sum(
            (Q[:, None, :] - np.asarray(E[lists.ravel()], dtype=np.float64).reshape(len(s), k, -1)) ** 2,
            axis=2,
        )
    )
    # the filter ranks by ||x||^2 - 2 q.x in float32 against r^2 - ||q||^2, with a margin for the
    # round-off of that expanded form (a superset of the rows within the radius; the distances of
    # the kept rows are then computed directly in float64)
    qq = np.einsum("ij,ij->i", Q, Q)
    Qm2 = (-2.0 * Q).astype(np.float32)
    limit = (a.max(axis=1) ** 2 - qq) + 1e-4 * (1.0 + qq + a.max(axis=1) ** 2)
    limit = limit.astype(np.float32)
    found_r, found_c = [], []
    for lo in range(0, n, chunk):
        X = np.asarray(E[lo : lo + chunk], dtype=np.float32)
        xx = np.einsum("ij,ij->i", X, X)
        g = Qm2 @ X.T
        g += xx[None, :]
        r, c = np.nonzero(g <= limit[:, None])
        c = c + lo
        keep = c != s[r]  # a row is not its own neighbour
        found_r.append(r[keep])
        found_c.append(c[keep])
    r = np.concatenate(found_r)
    c = np.concatenate(found_c)
    d = np.sqrt(np.sum((Q[r] - np.asarray(E[c], dtype=np.float64)) ** 2, axis=1))
    order = np.lexsort((c, d, r))
    r, c = r[order], c[order]
    starts = np.searchsorted(r, np.arange(len(s)))
    hits = 0
    for j in range(len(s)):
        true = c[starts[j] : starts[j] + k]
        hits += len(np.intersect1d(true, lists[j]))
    return float(hits / (len(s) * k))


def heat_edges(indices, distances, sigma, lo=0):
    """The directed heat-kernel edges of rows lo .. lo + len(indices): (rows, cols, w) with
    w = exp(-d^2 / (sigma_i sigma_j)), the same numbers as :func:`heat_kernel_graph`, without the
    edges whose weight underflows to 0 or that join a row to itself."""
    b, k = indices.shape
    rows = np.repeat(np.arange(lo, lo + b), k)
    cols = np.asarray(indices).ravel()
    d = np.asarray(distances).ravel()
    w = np.exp(-(d * d) / (sigma[rows] * sigma[cols]))
    keep = (w != 0) & (rows != cols)
    return rows[keep], cols[keep], w[keep]


def max_merge_rows(rows, cols, w, lo, hi):
    """CSR rows lo..hi of the symmetrised graph from every directed edge that starts or ends in them
    (each edge given in both directions): one entry per (row, col) with the larger weight, columns
    ascending. Returns (indptr (hi - lo + 1,) int64 from 0, indices int64, data float64).

    The rows of a table can be merged shard by shard this way in bounded memory; put together they
    equal :func:`heat_kernel_graph` (the reference in tests/kernels/test_graph.py)."""
    n = max(int(cols.max()) + 1, hi) if len(cols) else hi
    # one int64 key per (row, col); the order among equal keys does not matter for a maximum
    key = (rows - lo) * n + cols
    order = np.argsort(key)
    key, v = key[order], w[order]
    r, c = rows[order], cols[order]
    new = np.ones(len(r), dtype=bool)
    new[1:] = key[1:] != key[:-1]
    starts = np.flatnonzero(new)
    data = np.maximum.reduceat(v, starts) if len(v) else v
    r, c = r[starts], c[starts]
    indptr = np.zeros(hi - lo + 1, dtype=np.int64)
    np.cumsum(np.bincount(r - lo, minlength=hi - lo), out=indptr[1:])
    return indptr, c.astype(np.int64), data
