"""Block groups and the locality order of rows for the solver (the order stage calls these).

k-means on a sample of the fair space gives the groups; inside each group rows follow the reverse
Cuthill-McKee order of the group's own edges (scipy.sparse.csgraph), so a row's neighbours sit near
it in memory.
"""

import numpy as np
from scipy.cluster.vq import kmeans2
from scipy.sparse.csgraph import reverse_cuthill_mckee

from . import _fast

SAMPLE_ROWS = 50_000  # rows sampled for k-means


def inside_share(W, labels):
    """Share of edge weight whose two ends carry the same label."""
    total = 0.0
    inside = 0.0
    indptr, indices, data = W.indptr, W.indices, W.data
    step = 262_144  # rows at a time: temporaries of one block's edges
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

    n = W.shape[0]
    ptr = np.zeros(n + 1, dtype=np.int64)
    none = np.empty(0, dtype=np.int32)
    _fast.inside_edges(indptr=W.indptr, indices=W.indices, label=labels, counts_only=True, ptr=ptr, out=none)
    np.cumsum(ptr, out=ptr)
    ind = np.empty(int(ptr[-1]), dtype=np.int32)
    _fast.inside_edges(indptr=W.indptr, indices=W.indices, label=labels, counts_only=False, ptr=ptr, out=ind)
    inner = sp.csr_matrix((np.ones(len(ind), dtype=np.int8), ind, ptr), shape=(n, n))
    rcm = reverse_cuthill_mckee(inner, symmetric_mode=True).astype(np.int64)
    del inner, ind
    return rcm[np.argsort(labels[rcm], kind="stable")]
