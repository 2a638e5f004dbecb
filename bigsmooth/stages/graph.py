"""graph: k nearest neighbours in the fair space, heat-kernel weights, symmetrised CSR on disk.

Two builds (graph.build): one search over the whole table (exact below graph.exact_below rows, else
pynndescent), or a partitioned build (:mod:`bigsmooth.kernels.partition`): overlapping k-means
partitions of bounded size, each searched exactly as its own task (on the context's executor, which
may be a Dask cluster), its result written to graph/parts; the neighbours are then merged per row.
A partition whose result file exists is not searched again, so a killed stage resumes there.
"""

import logging
import time

import numpy as np

from .. import artifacts as art
from .. import faults, streams
from ..kernels import graph as gk
from ..kernels import partition

log = logging.getLogger("bigsmooth.graph")

RECALL_WARN = 0.95


def _part_name(p):
    return f"p{p:06d}"


def search_task(root, p, k):
    """Search partition ``p`` of the run at ``root`` and write its result (a task: it reads the
    embedding and the membership from the run directory and writes one file atomically, so running
    it twice, or on another host that mounts the run directory, gives the same file)."""
    if art.GRAPH_PARTS.exists_member(root, _part_name(p) + "-ind"):
        return p
    E = art.EMBED_EMBEDDING.load(root, mmap=True)
    ptr = art.GRAPH_PARTS.load(root, member="ptr", mmap=True)
    rows = np.asarray(art.GRAPH_PARTS.load(root, member="rows", mmap=True)[ptr[p] : ptr[p + 1]])
    ind, dist = partition.search_partition(E, rows, k)
    faults.point(f"graph:partition:{p}")
    art.GRAPH_PARTS.save(root, dist, member=_part_name(p) + "-dist")
    art.GRAPH_PARTS.save(root, ind, member=_part_name(p) + "-ind")  # written last: marks it done
    return p


def _partitioned(ctx, E, k, g):
    rundir = ctx.rundir
    n = E.shape[0]
    t0 = time.monotonic()
    if art.GRAPH_PARTS.exists_member(rundir, "ptr"):
        membership = art.GRAPH_PARTS.load(rundir, member="membership")
        ptr = art.GRAPH_PARTS.load(rundir, member="ptr")
        log.info("partitions: %d, planned earlier (resuming)", len(ptr) - 1)
    else:
        _, membership, _ = partition.plan(
            E, g["partition_rows"], g["partition_overlap"], k, ctx.rng("graph.partition"), log=log.info
        )
        parts = int(membership.max()) + 1
        ptr, rows = partition.members(membership, parts)
        art.GRAPH_PARTS.save(rundir, membership, member="membership")
        art.GRAPH_PARTS.save(rundir, rows, member="rows")
        art.GRAPH_PARTS.save(rundir, ptr, member="ptr")  # written last: marks the plan done
    parts = len(ptr) - 1
    sizes = np.diff(ptr)
    log.info(
        "partitions: %d of %d to %d rows (cap %d, each row in %d), planned in %.1f s",
        parts,
        int(sizes.min()),
        int(sizes.max()),
        g["partition_rows"],
        membership.shape[1],
        time.monotonic() - t0,
    )
    order = sorted(range(parts), key=lambda p: (-int(sizes[p]), p))
    executor = ctx.task_executor()
    calls = [(rundir.path, p, k) for p in range(parts)]
    try:
        if executor is None:
            for j, p in enumerate(order):
                search_task(*calls[p])
                if (j + 1) % 50 == 0:
                    log.info("partitions searched: %d of %d", j + 1, parts)
        else:
            log.info("partitions: %d tasks on %s", parts, executor.describe())
            executor.map_calls(search_task, calls, order, [int(x) for x in sizes])
    finally:
        if executor is not None:
            executor.shutdown()
    log.info("partitions searched in %.1f s; merging", time.monotonic() - t0)
    m = membership.shape[1]
    cand_ind = np.full((n, m * k), -1, dtype=np.int64)
    cand_dist = np.full((n, m * k), np.inf)
    rows_all = art.GRAPH_PARTS.load(rundir, member="rows", mmap=True)
    for p in range(parts):  # a fixed order, whatever order the tasks finished in
        rows = np.asarray(rows_all[ptr[p] : ptr[p + 1]])
        if not len(rows):
            continue
        slot = np.argmax(membership[rows] == p, axis=1)
        cols = slot[:, None] * k + np.arange(k)[None, :]
        cand_ind[rows[:, None], cols] = art.GRAPH_PARTS.load(rundir, member=_part_name(p) + "-ind")
        cand_dist[rows[:, None], cols] = art.GRAPH_PARTS.load(rundir, member=_part_name(p) + "-dist")
    ind = np.empty((n, k), dtype=np.int64)
    dist = np.empty((n, k))
    step = 262_144
    for s in range(0, n, step):
        ind[s : s + step], dist[s : s + step] = partition.merge(
            cand_ind[s : s + step], cand_dist[s : s + step], k
        )
    del cand_ind, cand_dist
    missing = int(np.sum(ind < 0))
    if missing:
        raise RuntimeError(f"the partitioned build left {missing} neighbour slots empty (a bug)")
    return ind, dist, {"partitions": parts, "partition_rows_max": int(sizes.max()), "overlap": m}


def run(ctx):
    """The graph stage (see the module docstring)."""
    rundir, cfg = ctx.rundir, ctx.cfg
    g = cfg["graph"]
    E = art.EMBED_EMBEDDING.load(rundir, mmap=True)
    n = E.shape[0]
    k = g["neighbours"]
    exact = n < g["exact_below"]
    build = g["build"] if g["build"] != "auto" else ("whole" if exact else "partitioned")
    search = "exact" if exact else "approximate"
    if build == "partitioned":
        search = "partitioned"
    log.info("neighbours: %s search for k=%d over %d rows x %d dims", search, k, n, E.shape[1])
    extra = {}
    if build == "partitioned":
        ind, dist, extra = _partitioned(ctx, E, k, g)
    elif exact:
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
    if search != "exact" and g["recall_rows"]:
        t0 = time.monotonic()
        recall = gk.sampled_recall(E, ind, g["recall_rows"], ctx.rng("graph.recall"))
        extra["sampled_recall"] = recall
        extra["recall_rows"] = min(n, g["recall_rows"])
        log.info(
            "recall@%d against exact neighbours on %d sampled rows: %.3f (%.1f s)",
            k,
            extra["recall_rows"],
            recall,
            time.monotonic() - t0,
        )
        if recall < RECALL_WARN:
            log.warning(
                "neighbour recall %.3f is below %.2f: raise graph.partition_overlap or "
                "graph.partition_rows (partitioned build) or graph.search_neighbours (pynndescent)",
                recall,
                RECALL_WARN,
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
        "search": search,
        "edges": int(W.nnz // 2),
        "mean_degree": float(deg.mean()),
        "max_degree": float(deg.max()),
        "mean_neighbours_after_symmetrising": float(W.nnz / n),
        "isolated_rows": isolated,
        "zero_distance_pairs": zero_dist,
        "kernel_scale": g["kernel_scale"],
        "sigma_median": float(np.median(sigma)),
        **extra,
    }
    art.GRAPH_INFO.save(rundir, info)
    return info
