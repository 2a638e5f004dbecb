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


def median_positive(distances, block=1 << 20):
    """np.median of the positive entries of ``distances`` (any array-like of float64 read by row
    slices, such as an artifact's RowReader), exactly and in memory bounded by ``block`` rows:
    a radix selection on the float64 bit patterns, which order positive numbers as their values.
    Pass 1 counts the entries by their top 16 bits, pass 2 by the next 16 inside the chosen
    bucket, pass 3 collects the few entries that share the chosen top 32 bits and sorts them.
    Returns None when no entry is positive. Reference: numpy.median (tests/kernels/test_graph.py)."""
    n = distances.shape[0]

    def bits():
        for lo in range(0, n, block):
            d = np.asarray(distances[lo : lo + block], dtype=np.float64).ravel()
            yield d[d > 0].view(np.uint64)

    top = np.zeros(1 << 16, dtype=np.int64)
    for b in bits():
        top += np.bincount((b >> np.uint64(48)).astype(np.int64), minlength=1 << 16)
    total = int(top.sum())
    if total == 0:
        return None
    ranks = [total // 2] if total % 2 else [total // 2 - 1, total // 2]
    values = []
    for r in ranks:
        cum = np.cumsum(top)
        hi16 = int(np.searchsorted(cum, r, side="right"))
        r1 = r - (int(cum[hi16 - 1]) if hi16 else 0)
        mid = np.zeros(1 << 16, dtype=np.int64)
        for b in bits():
            b = b[(b >> np.uint64(48)) == hi16]
            mid += np.bincount(((b >> np.uint64(32)) & np.uint64(0xFFFF)).astype(np.int64), minlength=1 << 16)
        cum2 = np.cumsum(mid)
        lo16 = int(np.searchsorted(cum2, r1, side="right"))
        r2 = r1 - (int(cum2[lo16 - 1]) if lo16 else 0)
        prefix = np.uint64((hi16 << 16) | lo16)
        same = np.sort(np.concatenate([b[(b >> np.uint64(32)) == prefix] for b in bits()]))
        values.append(float(same.view(np.float64)[r2]))
    return values[0] if len(values) == 1 else (values[0] + values[1]) / 2.0


def kernel_median(distances):
    """The median of the positive neighbour distances (1.0 when none is positive): the global
    kernel scale before ``graph.scale_factor``, and the local rule's fallback."""
    g = median_positive(distances)
    return 1.0 if g is None else g


def kernel_scale(distances, rule="global", factor=1.0, median=None):
    """The heat-kernel scale (``median``: :func:`kernel_median` of ``distances``, if known).

    ``global``: one sigma, the median of the positive neighbour distances (times ``factor``).
    ``local``: sigma_i = distance to row i's min(7, k)-th neighbour (self-tuning scale), falling
    back to the global sigma where that distance is 0. Returns an array of shape (n,) either way.
    ``distances`` may be an array or a RowReader (read in row blocks).
    """
    g = kernel_median(distances) if median is None else median
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


def recall_sample(n, sample_rows, rng):
    """The rows a sampled recall is measured on (sorted, without repeats)."""
    return np.sort(rng.choice(n, size=min(sample_rows, n), replace=False))


def recall_hits(E, ind, rows, chunk=8192):
    """How many of the listed neighbours ``ind[rows]`` are among the exact k nearest neighbours of
    those rows (by (distance, row)); recall@k = hits / (len(rows) k). ``E`` and ``ind`` are arrays
    or RowReaders.

    For a row with list distances a_1..a_k, every true neighbour lies within max(a): one pass over
    the table in chunks keeps only the rows within that radius (a compare after a matrix product,
    no selection over the whole table), and the k nearest of those by (distance, row) are the
    exact neighbours. Reference: sklearn's brute-force NearestNeighbors (tests)."""
    s = np.asarray(rows)
    n = E.shape[0]
    k = ind.shape[1]
    if not len(s):
        return 0
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
        hit = g <= limit[:, None]
        # few rows of a chunk lie within any radius: their columns first, then the hits among them
        # (np.nonzero over the whole chunk took half the pass; measured at 10M, 1,000 rows a thread)
        cols = np.flatnonzero(hit.any(axis=0))
        r, c = np.nonzero(hit[:, cols])
        c = cols[c] + lo
        keep = c != s[r]  # a row is not its own neighbour
        found_r.append(r[keep])
        found_c.append(c[keep])
    r = np.concatenate(found_r)
    c = np.concatenate(found_c)
    d = np.sqrt(np.sum((Q[r] - np.asarray(E[c], dtype=np.float64)) ** 2, axis=1))
    order = np.lexsort((c, d, r))
    r, c = r[order], c[order]
    # the first k of each row's run are its exact neighbours
    starts = np.searchsorted(r, np.arange(len(s)))
    rank = np.arange(len(r)) - starts[r]
    r, c = r[rank < k], c[rank < k]
    return int(np.sum((lists[r] == c[:, None]).any(axis=1)))


def sampled_recall(E, ind, sample_rows, rng, chunk=8192):
    """Recall@k of neighbour lists ``ind`` (n, k) against exact neighbours, on a random sample of
    rows (:func:`recall_hits` on :func:`recall_sample`)."""
    s = recall_sample(ind.shape[0], sample_rows, rng)
    return float(recall_hits(E, ind, s, chunk) / (len(s) * ind.shape[1]))


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
    equal :func:`heat_kernel_graph` (the reference in tests/kernels/test_graph.py). The work is the
    compiled ``max_merge_fill`` (a bucket per row, then each row's few columns sorted: linear in the
    edges, where one sort of (row, col) keys took most of the weights' time), or its twin."""
    try:
        from ._fast import max_merge_fill
    except ImportError:
        from .twins import max_merge_fill
    indptr = np.zeros(hi - lo + 1, dtype=np.int64)
    out_cols = np.empty(len(rows), dtype=np.int64)
    out_w = np.empty(len(rows), dtype=np.float64)
    max_merge_fill(
        rows=np.asarray(rows, dtype=np.int64),
        cols=np.asarray(cols, dtype=np.int64),
        w=np.asarray(w, dtype=np.float64),
        lo=lo,
        out_ptr=indptr,
        out_cols=out_cols,
        out_w=out_w,
    )
    m = int(indptr[-1])
    return indptr, out_cols[:m].copy(), out_w[:m].copy()
