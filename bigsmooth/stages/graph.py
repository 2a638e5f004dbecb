"""graph: k nearest neighbours in the fair space, heat-kernel weights, symmetrised CSR on disk."""
import logging
import os

import numpy as np

from .. import atomic
from ..kernels import graph as gk

log = logging.getLogger("bigsmooth.graph")


def load_graph(rundir, mmap=True):
    """The saved weight matrix as scipy CSR (arrays memory-mapped)."""
    import scipy.sparse as sp

    mode = "r" if mmap else None
    arrs = [np.load(rundir.file("graph", f"{k}.npy"), mmap_mode=mode) for k in ("indptr", "indices", "data")]
    n = len(arrs[0]) - 1
    return sp.csr_matrix((arrs[2], arrs[1], arrs[0]), shape=(n, n))


def run(rundir, cfg):
    g = cfg["graph"]
    E = np.load(rundir.file("embed", "embedding.npy"), mmap_mode="r")
    n = E.shape[0]
    k = g["neighbours"]
    exact = n < g["exact_below"]
    log.info("neighbours: %s search for k=%d over %d rows x %d dims", "exact" if exact else "approximate",
             k, n, E.shape[1])
    if exact:
        ind, dist = gk.exact_knn(np.asarray(E), k)
    else:
        search = g["search_neighbours"] or int(np.ceil(1.5 * k))
        ind, dist = gk.approx_knn(np.asarray(E), k, seed=cfg["run"]["seed"], n_trees=g["index_trees"],
                                  search=max(search, k), threads=g["index_threads"])
    sigma = gk.kernel_scale(dist, g["kernel_scale"], g["scale_factor"])
    W = gk.heat_kernel_graph(ind, dist, sigma)
    deg = np.asarray(W.sum(axis=1)).ravel()
    isolated = int(np.sum(deg == 0))
    zero_dist = int(np.sum(dist == 0))
    if isolated:
        log.warning("%d rows have no neighbour with non-zero weight (isolated): their scores stay as they are",
                    isolated)
    d = rundir.stage_dir("graph")
    atomic.save_npy(os.path.join(d, "neighbours.npy"), ind)
    atomic.save_npy(os.path.join(d, "distances.npy"), dist.astype(np.float32))
    atomic.save_npy(os.path.join(d, "indptr.npy"), W.indptr.astype(np.int64))
    atomic.save_npy(os.path.join(d, "indices.npy"), W.indices.astype(np.int64))
    atomic.save_npy(os.path.join(d, "data.npy"), W.data)
    info = {"rows": n, "neighbours": k, "search": "exact" if exact else "approximate",
            "edges": int(W.nnz // 2), "mean_degree": float(deg.mean()), "max_degree": float(deg.max()),
            "mean_neighbours_after_symmetrising": float(W.nnz / n), "isolated_rows": isolated,
            "zero_distance_pairs": zero_dist, "kernel_scale": g["kernel_scale"],
            "sigma_median": float(np.median(sigma))}
    atomic.write_json(os.path.join(d, "graph.json"), info)
    return info
