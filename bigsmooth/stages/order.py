"""order: cluster the rows into block groups so that most edge weight falls inside groups.

k-means (scipy.cluster.vq.kmeans2, k-means++ start, seeded) on a sample of the fair-space
embedding gives ``solve.groups`` centres; every row joins its nearest centre (streamed in chunks).
Rows are ordered by group (input order inside a group). The groups are the units the solver's
workers sweep; the 'blocks' solver cuts the same ordering into blocks of ``solve.block_rows``.
"""
import logging
import os

import numpy as np
from scipy.cluster.vq import kmeans2

from .. import atomic
from .graph import load_graph

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
        rows = np.repeat(np.arange(s, e), np.diff(indptr[s:e + 1]))
        cols = indices[indptr[s]:indptr[e]]
        d = data[indptr[s]:indptr[e]]
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
        X = np.asarray(E[s:s + chunk], dtype=np.float64)
        labels[s:s + chunk] = np.argmin(cc[None, :] - 2.0 * X @ centres.T, axis=1)
    # renumber by first appearance so that empty centres leave no empty groups
    _, first = np.unique(labels, return_index=True)
    rank = np.empty(groups, dtype=np.int64)
    used = labels[np.sort(first)]
    rank[used] = np.arange(len(used))
    return rank[labels], len(used)


def run(rundir, cfg):
    E = np.load(rundir.file("embed", "embedding.npy"), mmap_mode="r")
    labels, groups = cluster_labels(E, cfg["solve"]["groups"], cfg["run"]["seed"] + 2)
    perm = np.argsort(labels, kind="stable").astype(np.int64)
    bounds = np.concatenate([[0], np.cumsum(np.bincount(labels, minlength=groups))]).astype(np.int64)
    d = rundir.stage_dir("order")
    atomic.save_npy(os.path.join(d, "order.npy"), perm)
    atomic.save_npy(os.path.join(d, "groups.npy"), bounds)
    W = load_graph(rundir)
    share = inside_share(W, labels)
    sizes = np.diff(bounds)
    log.info("block groups: %d (rows per group %d-%d); %.1f%% of edge weight inside groups",
             groups, sizes.min(), sizes.max(), 100 * share)
    return {"method": "kmeans", "groups": int(groups), "largest_group": int(sizes.max()),
            "smallest_group": int(sizes.min()), "weight_inside_groups": share}
