"""graph: k nearest neighbours in the fair space, heat-kernel weights, symmetrised CSR on disk.

Two builds (graph.build): one search over the whole table (exact below graph.exact_below rows, else
pynndescent), or a partitioned build (:mod:`bigsmooth.kernels.partition`): overlapping k-means
partitions of bounded size, each searched exactly as its own task (on the context's executor, which
may be a Dask cluster), its result written to graph/parts; the neighbours are then merged per row.
A partition whose result file exists is not searched again, so a killed stage resumes there.
"""

import logging
import os
import shutil
import time

import numpy as np
import scipy.sparse as sp

from .. import artifacts as art
from .. import atomic, faults, streams
from ..kernels import graph as gk
from ..kernels import partition
from ..progress import Progress

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
    prog = Progress(log, "partition search (rows x overlap)", int(sizes.sum()))
    try:
        if executor is None:
            for p in order:
                search_task(*calls[p])
                prog.update(int(sizes[p]))
        else:
            log.info("partitions: %d tasks on %s", parts, executor.describe())
            # the runner already limits BLAS to one thread per stage (pipeline.run_stages), so the
            # tasks on local threads run one per core with one BLAS thread each
            executor.map_calls(
                search_task,
                calls,
                order,
                [int(x) for x in sizes],
                done=lambda p: prog.update(int(sizes[p])),
            )
    finally:
        if executor is not None:
            executor.shutdown()
    log.info("partitions searched in %.1f s; merging", time.monotonic() - t0)
    m = membership.shape[1]
    # every row's candidates from its partitions, in files (the kernel's pages to evict)
    art.GRAPH_SCRATCH.folder(rundir)
    cand_ind = atomic.new_memmap(art.GRAPH_SCRATCH.path(rundir, "cand-ind"), np.int64, (n, m * k))
    cand_dist = atomic.new_memmap(art.GRAPH_SCRATCH.path(rundir, "cand-dist"), np.float64, (n, m * k))
    rows_all = art.GRAPH_PARTS.load(rundir, member="rows", mmap=True)
    for p in range(parts):  # a fixed order, whatever order the tasks finished in
        rows = np.asarray(rows_all[ptr[p] : ptr[p + 1]])
        if not len(rows):
            continue
        partition.place(
            cand_ind,
            cand_dist,
            membership,
            p,
            rows,
            art.GRAPH_PARTS.load(rundir, member=_part_name(p) + "-ind"),
            art.GRAPH_PARTS.load(rundir, member=_part_name(p) + "-dist"),
        )
    ind = np.empty((n, k), dtype=np.int64)
    dist = np.empty((n, k))
    step = 262_144
    for s in range(0, n, step):
        ind[s : s + step], dist[s : s + step] = partition.merge(
            cand_ind[s : s + step], cand_dist[s : s + step], k
        )
    del cand_ind, cand_dist
    for p in range(parts):  # the merged lists replace them; the plan stays (membership, rows, ptr)
        for what in ("-ind", "-dist"):
            path = art.GRAPH_PARTS.path(rundir, _part_name(p) + what)
            if os.path.exists(path):
                os.unlink(path)
    missing = int(np.sum(ind < 0))
    if missing:
        raise RuntimeError(f"the partitioned build left {missing} neighbour slots empty (a bug)")
    return ind, dist, {"partitions": parts, "partition_rows_max": int(sizes.max()), "overlap": m}


def write_weights(rundir, ind, dist, sigma, memory_mb, block=262_144, shard_rows=None):
    """Write the symmetric heat-kernel weight matrix (the graph.weights CSR files) in bounded memory:
    the directed edges go to shard files by row range (each edge in both directions), each shard is
    merged on its own (:func:`kernels.graph.max_merge_rows`), and the shards are copied into the
    CSR files in row order. Equals :func:`kernels.graph.heat_kernel_graph` (tested). Returns
    (stored entries, row sums)."""
    n, k = ind.shape
    # a shard holds about 2 k edges per row at 24 bytes each; a quarter of the budget for one shard
    shard_rows = shard_rows or max(65_536, memory_mb * (1 << 20) // 4 // (2 * k * 24 * 3))
    bounds = list(range(0, n, shard_rows)) + [n]
    folder = art.GRAPH_SCRATCH.folder(rundir)
    files = {}
    try:
        for lo in range(0, n, block):
            r, c, w = gk.heat_edges(ind[lo : lo + block], dist[lo : lo + block], sigma, lo)
            R, C, V = np.concatenate([r, c]), np.concatenate([c, r]), np.concatenate([w, w])
            shard = R // shard_rows
            order = np.argsort(shard, kind="stable")
            cuts = np.searchsorted(shard[order], np.arange(len(bounds)))
            for j in range(len(bounds) - 1):
                sel = order[cuts[j] : cuts[j + 1]]
                if not len(sel):
                    continue
                for name, arr in (("r", R), ("c", C), ("w", V)):
                    key = (j, name)
                    if key not in files:
                        files[key] = open(os.path.join(folder, f"shard{j:05d}-{name}.bin"), "wb")
                    arr[sel].tofile(files[key])
    finally:
        for fh in files.values():
            fh.close()
    merged = []
    deg = np.empty(n)
    for j in range(len(bounds) - 1):
        lo, hi = bounds[j], bounds[j + 1]
        parts = []
        for name, dt in (("r", np.int64), ("c", np.int64), ("w", np.float64)):
            path = os.path.join(folder, f"shard{j:05d}-{name}.bin")
            parts.append(np.fromfile(path, dtype=dt) if os.path.exists(path) else np.empty(0, dt))
        indptr, indices, data = gk.max_merge_rows(*parts, lo, hi)
        del parts
        # row sums as scipy computes them (the same loop over each row's entries)
        deg[lo:hi] = np.asarray(
            sp.csr_matrix((data, indices, indptr), shape=(hi - lo, n)).sum(axis=1)
        ).ravel()
        np.save(os.path.join(folder, f"merged{j:05d}-indices.npy"), indices)
        np.save(os.path.join(folder, f"merged{j:05d}-data.npy"), data)
        merged.append(indptr)
    nnz = int(sum(int(p[-1]) for p in merged))
    art.GRAPH_WEIGHTS.folder(rundir)
    with atomic.open_memmap(art.GRAPH_WEIGHTS.path(rundir, "indptr"), np.int64, (n + 1,)) as out:
        out[0], at = 0, 0
        for j, p in enumerate(merged):
            out[bounds[j] + 1 : bounds[j + 1] + 1] = p[1:] + at
            at += int(p[-1])
    for member, dt in (("indices", np.int64), ("data", np.float64)):
        with atomic.open_memmap(art.GRAPH_WEIGHTS.path(rundir, member), dt, (nnz,)) as out:
            at = 0
            for j, p in enumerate(merged):
                piece = np.load(os.path.join(folder, f"merged{j:05d}-{member}.npy"))
                out[at : at + len(piece)] = piece
                at += len(piece)
    return nnz, deg


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
        wanted = g["search_neighbours"] or int(np.ceil(1.5 * k))
        ind, dist = gk.approx_knn(
            np.asarray(E),
            k,
            seed=streams.seed_of(cfg["run"]["seed"], "graph.index"),
            n_trees=g["index_trees"],
            search=max(wanted, k),
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
    art.GRAPH_NEIGHBOURS.save(rundir, ind)
    art.GRAPH_DISTANCES.save(rundir, dist.astype(np.float32))
    nnz, deg = write_weights(rundir, ind, dist, sigma, cfg["run"]["memory_mb"])
    shutil.rmtree(art.GRAPH_SCRATCH.path(rundir), ignore_errors=True)
    isolated = int(np.sum(deg == 0))
    zero_dist = int(np.sum(dist == 0))
    if isolated:
        log.warning(
            "%d rows have no neighbour with non-zero weight (isolated): their scores stay as they are",
            isolated,
        )
    info = {
        "rows": n,
        "neighbours": k,
        "search": search,
        "edges": int(nnz // 2),
        "mean_degree": float(deg.mean()),
        "max_degree": float(deg.max()),
        "mean_neighbours_after_symmetrising": float(nnz / n),
        "isolated_rows": isolated,
        "zero_distance_pairs": zero_dist,
        "kernel_scale": g["kernel_scale"],
        "sigma_median": float(np.median(sigma)),
        **extra,
    }
    art.GRAPH_INFO.save(rundir, info)
    return info
