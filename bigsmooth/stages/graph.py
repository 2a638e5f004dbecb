"""graph: k nearest neighbours in the fair space, heat-kernel weights, symmetrised CSR on disk."""

import logging

import numpy as np

from .. import artifacts as art
from .. import streams
from ..kernels import graph as gk

log = logging.getLogger("bigsmooth.graph")


def run(ctx):
    """The graph stage (see the module docstring)."""
    rundir, cfg = ctx.rundir, ctx.cfg
    g = cfg["graph"]
    E = art.EMBED_EMBEDDING.load(rundir, mmap=True)
    n = E.shape[0]
    k = g["neighbours"]
    exact = n < g["exact_below"]
    log.info(
        "neighbours: %s search for k=%d over %d rows x %d dims",
        "exact" if exact else "approximate",
        k,
        n,
        E.shape[1],
    )
    if exact:
        ind, dist = gk.exact_knn(np.asarray(E), k)
    else:
        search = g["search_neighbours"] or int(np.ceil(1.5 * k))
        ind, dist = gk.approx_knn(
            np.asarray(E),
            k,
            seed=streams.seed_of(cfg["run"]["seed"], "graph.index"),
            n_trees=g["index_trees"],
            search=max(search, k),
            threads=g["index_threads"],
        )
    sigma = gk.kernel_scale(dist, g["kernel_scale"], g["scale_factor"])
    W = gk.heat_kernel_graph(ind, dist, sigma)
    deg = np.asarray(W.sum(axis=1)).ravel()
    isolated = int(np.sum(deg == 0))
    zero_dist = int(np.sum(dist == 0))
    if isolated:
        log.warning(
            "%d rows have no neighbour with non-zero weight (isolated): their scores stay as they are",
            isolated,
        )
    art.GRAPH_NEIGHBOURS.save(rundir, ind)
    art.GRAPH_DISTANCES.save(rundir, dist.astype(np.float32))
    art.GRAPH_WEIGHTS.save(rundir, W)
    info = {
        "rows": n,
        "neighbours": k,
        "search": "exact" if exact else "approximate",
        "edges": int(W.nnz // 2),
        "mean_degree": float(deg.mean()),
        "max_degree": float(deg.max()),
        "mean_neighbours_after_symmetrising": float(W.nnz / n),
        "isolated_rows": isolated,
        "zero_distance_pairs": zero_dist,
        "kernel_scale": g["kernel_scale"],
        "sigma_median": float(np.median(sigma)),
    }
    art.GRAPH_INFO.save(rundir, info)
    return info
