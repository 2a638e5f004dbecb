"""order: cluster the rows into block groups so that most edge weight falls inside groups, order
the rows inside each group for locality, and split the graph for the solver.

1. k-means (scipy.cluster.vq.kmeans2, k-means++ start, seeded) on a sample of the fair-space
   embedding gives ``solve.groups`` centres; every row joins its nearest centre (streamed in chunks).
2. Inside each group, rows follow the reverse Cuthill-McKee order of the group's own edges
   (scipy.sparse.csgraph.reverse_cuthill_mckee), so that a row's neighbours sit close to it in
   memory and the solver's sweeps read nearby entries (measured at 1M rows: sweeps about 1.5x
   faster than with input order inside groups).
3. The graph is permuted into that order and split into couplings inside groups (lower, upper) and
   between groups, with raw weights (:func:`bigsmooth.kernels.sweepcg.split_graph`); it does not
   depend on lam, so the solve stage only scales it. Written as memory-mapped .npy files in
   ``order/split/``.

The groups are the units the solver's workers sweep; the 'blocks' solver cuts the same ordering
into blocks of ``solve.block_rows``.
"""

import contextlib
import logging

import numpy as np
from scipy.cluster.vq import kmeans2
from scipy.sparse.csgraph import reverse_cuthill_mckee

from .. import artifacts as art
from .. import atomic, streams
from ..kernels import sweepcg

log = logging.getLogger("bigsmooth.order")

SAMPLE_ROWS = 50_000


def inside_share(W, labels):
    """Share of edge weight whose two ends carry the same label."""
    total = 0.0
    inside = 0.0
    indptr, indices, data = W.indptr, W.indices, W.data
    step = 1_000_000
    for s in range(0, W.shape[0], step):
        e = min(s + step, W.shape[0])
        rows = np.repeat(np.arange(s, e), np.diff(indptr[s : e + 1]))
        cols = indices[indptr[s] : indptr[e]]
        d = data[indptr[s] : indptr[e]]
        total += d.sum()
        inside += d[labels[rows] == labels[cols]].sum()
    return float(inside / total) if total > 0 else 1.0


def cluster_labels(E, groups, seed, chunk=262_144):
    """Nearest-centre labels (int64, shape (n,)) for ``groups`` k-means centres learned on a sample."""
    n = E.shape[0]
    groups = min(groups, n)
    rng = np.random.default_rng(seed)
    sample = np.sort(rng.choice(n, size=min(n, SAMPLE_ROWS), replace=False))
    centres, _ = kmeans2(np.asarray(E[sample], dtype=np.float64), groups, minit="++", seed=rng)
    labels = np.empty(n, dtype=np.int64)
    cc = np.einsum("ij,ij->i", centres, centres)
    for s in range(0, n, chunk):
        X = np.asarray(E[s : s + chunk], dtype=np.float64)
        labels[s : s + chunk] = np.argmin(cc[None, :] - 2.0 * X @ centres.T, axis=1)
    # renumber by first appearance so that empty centres leave no empty groups
    _, first = np.unique(labels, return_index=True)
    rank = np.empty(groups, dtype=np.int64)
    used = labels[np.sort(first)]
    rank[used] = np.arange(len(used))
    return rank[labels], len(used)


def local_order(W, labels):
    """Rows sorted by label; inside a label, the reverse Cuthill-McKee order of the edges whose two
    ends carry that label. Returns perm (int64) with perm[r] = the row at position r."""
    import scipy.sparse as sp
    from ..kernels import _fast

    n = W.shape[0]
    ptr = np.zeros(n + 1, dtype=np.int64)
    none = np.empty(0, dtype=np.int32)
    _fast.inside_edges(W.indptr, W.indices, labels, True, ptr, none)
    np.cumsum(ptr, out=ptr)
    ind = np.empty(int(ptr[-1]), dtype=np.int32)
    _fast.inside_edges(W.indptr, W.indices, labels, False, ptr, ind)
    inner = sp.csr_matrix((np.ones(len(ind), dtype=np.int8), ind, ptr), shape=(n, n))
    rcm = reverse_cuthill_mckee(inner, symmetric_mode=True).astype(np.int64)
    del inner, ind
    return rcm[np.argsort(labels[rcm], kind="stable")]


def run(ctx):
    """The order stage (see the module docstring)."""
    rundir, cfg = ctx.rundir, ctx.cfg
    E = art.EMBED_EMBEDDING.load(rundir, mmap=True)
    labels, groups = cluster_labels(
        E, cfg["solve"]["groups"], streams.seed_of(cfg["run"]["seed"], "order.kmeans")
    )
    bounds = np.concatenate([[0], np.cumsum(np.bincount(labels, minlength=groups))]).astype(np.int64)
    W = art.GRAPH_WEIGHTS.load(rundir, mmap=True)
    share = inside_share(W, labels)
    sizes = np.diff(bounds)
    log.info(
        "block groups: %d (rows per group %d-%d); %.1f%% of edge weight inside groups",
        groups,
        sizes.min(),
        sizes.max(),
        100 * share,
    )
    perm = local_order(W, labels)
    art.ORDER_SPLIT.folder(rundir)
    with contextlib.ExitStack() as files:

        def alloc(name, size, dtype):
            return files.enter_context(atomic.open_memmap(art.ORDER_SPLIT.path(rundir, name), dtype, (size,)))

        split = sweepcg.split_graph(W, perm, bounds, alloc)
        between = int(split.O[0][-1])
    art.ORDER_PERM.save(rundir, perm)
    art.ORDER_GROUPS.save(rundir, bounds)
    log.info(
        "graph split for the solver: %d couplings inside groups, %d between groups", W.nnz - between, between
    )
    return {
        "method": "kmeans+rcm",
        "groups": int(groups),
        "largest_group": int(sizes.max()),
        "smallest_group": int(sizes.min()),
        "weight_inside_groups": share,
        "couplings_between_groups": between,
    }
