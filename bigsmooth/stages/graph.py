"""graph: k nearest neighbours in the fair space, heat-kernel weights, symmetrised CSR on disk.

Two builds (graph.build): one search over the whole table (exact below graph.exact_below rows, else
pynndescent), or a partitioned build (:mod:`bigsmooth.kernels.partition`): overlapping k-means
partitions of bounded size, each searched exactly as its own task (on the context's executor, which
may be a Dask cluster), its result written to graph/parts; the neighbours are then merged per row.
A partition whose result file exists is not searched again, so a killed stage resumes there.
"""

import contextlib
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
from .. import progress
from ..progress import Progress

log = logging.getLogger("bigsmooth.graph")

RECALL_WARN = 0.95


@contextlib.contextmanager
def _local_pool(ctx):
    """(map, workers): a map over local threads, one per core (the builtin map on one core). The
    stage's own passes use it; partition searches are tasks (``ctx.task_executor``)."""
    workers = os.cpu_count() or 1
    pool = ctx.executor(workers, "threads")
    try:
        yield (pool.map if pool is not None else map), workers
    finally:
        if pool is not None:
            pool.shutdown()


def _part_name(p):
    return f"p{p:06d}"


def search_task(root, p, k):
    """Search partition ``p`` of the run at ``root`` and write its result (a task: it reads the
    embedding and the membership from the run directory and writes one file atomically, so running
    it twice, or on another host that mounts the run directory, gives the same file)."""
    if art.GRAPH_PARTS.exists_member(root, _part_name(p) + "-ind"):
        return p
    E = art.EMBED_EMBEDDING.rows(root)
    ptr = art.GRAPH_PARTS.load(root, member="ptr", mmap=True)
    rows = np.asarray(art.GRAPH_PARTS.load(root, member="rows", mmap=True)[ptr[p] : ptr[p + 1]])
    ind, dist = partition.search_partition(E, rows, k)
    faults.point(f"graph:partition:{p}")
    art.GRAPH_PARTS.save(root, dist, member=_part_name(p) + "-dist")
    art.GRAPH_PARTS.save(root, ind, member=_part_name(p) + "-ind")  # written last: marks it done
    return p


def _partitioned(ctx, E, k, g):
    rundir = ctx.rundir
    t0 = time.monotonic()
    if art.GRAPH_PARTS.exists_member(rundir, "ptr"):
        membership = art.GRAPH_PARTS.load(rundir, member="membership")
        ptr = art.GRAPH_PARTS.load(rundir, member="ptr")
        log.info("partitions: %d, planned earlier (resuming)", len(ptr) - 1)
    else:
        progress.phase(log, "planning the partitions (k-means on a sample, balanced)")
        with _local_pool(ctx) as (map_fn, _):
            _, membership, _ = partition.plan(
                E,
                g["partition_rows"],
                g["partition_overlap"],
                k,
                ctx.rng("graph.partition"),
                log=log.info,
                map_fn=map_fn,
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
    progress.phase(log, f"searching {parts} partitions")
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
    log.info("partitions searched in %.1f s", time.monotonic() - t0)
    progress.phase(log, "merging each row's lists over its partitions")
    _merge_parts(
        rundir, membership, ptr, k, _block_rows(ctx.cfg["run"]["memory_mb"], membership.shape[1] * k)
    )
    for p in range(parts):  # the merged lists replace them; the plan stays (membership, rows, ptr)
        for what in ("-ind", "-dist"):
            path = art.GRAPH_PARTS.path(rundir, _part_name(p) + what)
            if os.path.exists(path):
                os.unlink(path)
    info = {"partitions": parts, "partition_rows_max": int(sizes.max()), "overlap": membership.shape[1]}
    if g["refine_rounds"]:
        info["refine_rounds"] = g["refine_rounds"]
        progress.phase(log, f"refining the lists (up to {g['refine_rounds']} neighbour-of-neighbour rounds)")
        info["refine_replaced"] = _refine(ctx, E, membership[:, 0], g["refine_rounds"])
    return info


REWRITE_ROWS = 1 << 20  # rows per block when the lists are read in and written back


def _load_lists32(path, n, k):
    """The stored (int64) neighbour lists as int32 (when row numbers fit), read block by block so
    that the int64 file is never resident whole."""
    mm = np.load(path, mmap_mode="r")
    if n >= 2**31:
        return np.array(mm)
    out = np.empty((n, k), dtype=np.int32)
    for lo in range(0, n, REWRITE_ROWS):
        out[lo : lo + REWRITE_ROWS] = mm[lo : lo + REWRITE_ROWS]
        atomic.release_pages(mm)
    return out


def _refine(ctx, E, primary, rounds):
    """Neighbour-of-neighbour rounds over the merged lists (:func:`partition.refine`), rows visited
    partition by partition; the lists are rewritten atomically. Holds the embedding (float32), the
    lists (int32), their float64 distances and a frozen copy of the lists in memory: 4 d + 16 k
    bytes a row (260 B at d = 25, k = 10; the lists were int64 until session 10: 300 B). Returns the
    number of list entries replaced."""
    rundir = ctx.rundir
    t0 = time.monotonic()
    n, k = art.GRAPH_NEIGHBOURS.rows(rundir).shape
    X = E[:]
    ind = _load_lists32(art.GRAPH_NEIGHBOURS.path(rundir), n, k)
    dist = np.load(_dist64(rundir))
    order = np.argsort(primary, kind="stable")
    replaced = 0
    with _local_pool(ctx) as (map_fn, _):
        for r in range(rounds):
            got = partition.refine(X, ind, dist, order, map_fn=map_fn)
            replaced += got
            log.info(
                "refinement round %d: %d list entries replaced (%.2f per row), %.1f s",
                r + 1,
                got,
                got / n,
                time.monotonic() - t0,
            )
            if not got:
                break
    del X, order
    with contextlib.ExitStack() as stack:
        writers = _lists_writers(stack, rundir, n, k)
        for lo in range(0, n, REWRITE_ROWS):  # converted block by block (no whole-table temporaries)
            for out, arr in zip(writers, (ind, dist, dist)):
                out.write(arr[lo : lo + REWRITE_ROWS])
    return replaced


def _block_rows(memory_mb, width):
    """Rows per block for a pass that holds about 40 bytes per column of a block (an eighth of the
    memory budget; at least 65,536 rows)."""
    return max(65_536, memory_mb * (1 << 20) // 8 // (40 * width))


def _dist64(rundir):
    return art.GRAPH_SCRATCH.path(rundir, "distances64")


def _lists_writers(stack, rundir, n, k):
    """Writers of the neighbour lists, their float32 distances (the artifact) and the float64
    distances the weights are computed from (scratch)."""
    art.GRAPH_SCRATCH.folder(rundir)
    art.GRAPH_NEIGHBOURS.folder(rundir)
    return [
        stack.enter_context(atomic.npy_writer(path, dt, (n, k)))
        for path, dt in (
            (art.GRAPH_NEIGHBOURS.path(rundir), np.int64),
            (art.GRAPH_DISTANCES.path(rundir), np.float32),
            (_dist64(rundir), np.float64),
        )
    ]


def _merge_parts(rundir, membership, ptr, k, block):
    """Per block of rows, every row's results from its partitions (each partition's rows are
    ascending, so a block is one slice of each partition's files), merged into its k best and
    written out: memory holds one block of candidates, never the whole table's."""
    n, m = membership.shape
    parts = len(ptr) - 1
    rows_all = art.GRAPH_PARTS.rows(rundir, "rows")
    bounds = np.array(list(range(0, n, block)) + [n], dtype=np.int64)
    cuts = np.empty((parts, len(bounds)), dtype=np.int64)
    for p in range(parts):  # where each block starts in each partition
        cuts[p] = ptr[p] + np.searchsorted(rows_all[ptr[p] : ptr[p + 1]], bounds)
    # one reader a file, made once (its header read once): each block reads one run of rows of each
    readers = [
        (
            art.GRAPH_PARTS.rows(rundir, _part_name(p) + "-ind"),
            art.GRAPH_PARTS.rows(rundir, _part_name(p) + "-dist"),
        )
        for p in range(parts)
    ]
    with contextlib.ExitStack() as stack:
        out_ind, out_dist32, out_dist = _lists_writers(stack, rundir, n, k)
        for b in range(len(bounds) - 1):
            lo, hi = int(bounds[b]), int(bounds[b + 1])
            cand_ind = np.full((hi - lo, m * k), -1, dtype=np.int64)
            cand_dist = np.full((hi - lo, m * k), np.inf)
            local = membership[lo:hi]
            for p in range(parts):  # a fixed order, whatever order the tasks finished in
                a, e = int(cuts[p, b] - ptr[p]), int(cuts[p, b + 1] - ptr[p])
                if a == e:
                    continue
                partition.place(
                    cand_ind,
                    cand_dist,
                    local,
                    p,
                    rows_all[ptr[p] + a : ptr[p] + e] - lo,
                    readers[p][0][a:e],
                    readers[p][1][a:e],
                )
            ind, dist = partition.merge(cand_ind, cand_dist, k)
            del cand_ind, cand_dist
            missing = int(np.sum(ind < 0))
            if missing:
                raise RuntimeError(f"the partitioned build left {missing} neighbour slots empty (a bug)")
            out_ind.write(ind)
            out_dist32.write(dist.astype(np.float32))
            out_dist.write(dist)


def write_weights(
    rundir, ind, dist, sigma, memory_mb, block=262_144, shard_rows=None, map_fn=map, workers=1, extra=None
):
    """Write the symmetric heat-kernel weight matrix (the graph.weights CSR files) in bounded memory:
    the directed edges go to shard files by row range (each edge in both directions), each shard is
    merged on its own (:func:`kernels.graph.max_merge_rows`), and the shards are appended to the
    CSR files in row order. ``ind`` and ``dist`` are arrays or RowReaders (read in blocks); shards
    are merged through ``map_fn`` (a thread pool's map merges one shard per thread, so the budget
    is shared among ``workers`` shards). Equals
    :func:`kernels.graph.heat_kernel_graph` (tested). ``extra`` = (rows, cols, weights): more
    edges (the comparable pairs), merged the same way (the larger weight where an edge is given
    twice). Returns (stored entries, row sums)."""
    n, k = ind.shape
    # a shard holds about 2 k edges per row at 24 bytes each; a quarter of the budget for one shard
    shard_rows = shard_rows or max(65_536, memory_mb * (1 << 20) // 4 // workers // (2 * k * 24 * 3))
    bounds = list(range(0, n, shard_rows)) + [n]
    folder = art.GRAPH_SCRATCH.folder(rundir)
    files = {}
    try:

        def blocks():
            for lo in range(0, n, block):
                yield gk.heat_edges(ind[lo : lo + block], dist[lo : lo + block], sigma, lo)
            if extra is not None:
                yield tuple(np.asarray(x) for x in extra)

        for r, c, w in blocks():
            R, C, V = np.concatenate([r, c]), np.concatenate([c, r]), np.concatenate([w, w])
            shard = R // shard_rows
            if len(bounds) <= 1 << 16:
                # 16-bit keys: numpy's stable sort is then a radix sort (the same order, about 5x
                # faster than on int64 keys; measured on 5.2M edges)
                shard = shard.astype(np.uint16)
            order = np.argsort(shard, kind="stable")
            cuts = np.searchsorted(shard[order], np.arange(len(bounds)))
            # edges in shard order once, then each shard's edges are one run of each array
            R, C, V = R[order], C[order], V[order]
            for j in range(len(bounds) - 1):
                a, b = int(cuts[j]), int(cuts[j + 1])
                if a == b:
                    continue
                for name, arr in (("r", R), ("c", C), ("w", V)):
                    key = (j, name)
                    if key not in files:
                        files[key] = open(os.path.join(folder, f"shard{j:05d}-{name}.bin"), "wb")
                    arr[a:b].tofile(files[key])
    finally:
        for fh in files.values():
            fh.close()
    deg = np.empty(n)

    def merge_shard(j):
        lo, hi = bounds[j], bounds[j + 1]
        parts = []
        for name, dt in (("r", np.int64), ("c", np.int64), ("w", np.float64)):
            path = os.path.join(folder, f"shard{j:05d}-{name}.bin")
            parts.append(np.fromfile(path, dtype=dt) if os.path.exists(path) else np.empty(0, dt))
            if os.path.exists(path):
                os.unlink(path)
        indptr, indices, data = gk.max_merge_rows(*parts, lo, hi)
        del parts
        # row sums as scipy computes them (the same loop over each row's entries)
        deg[lo:hi] = np.asarray(
            sp.csr_matrix((data, indices, indptr), shape=(hi - lo, n)).sum(axis=1)
        ).ravel()
        indices.astype(art.index_dtype(n)).tofile(os.path.join(folder, f"merged{j:05d}-indices.bin"))
        data.tofile(os.path.join(folder, f"merged{j:05d}-data.bin"))
        return indptr

    merged = list(map_fn(merge_shard, range(len(bounds) - 1)))
    nnz = int(sum(int(p[-1]) for p in merged))
    art.GRAPH_WEIGHTS.folder(rundir)
    with atomic.npy_writer(art.GRAPH_WEIGHTS.path(rundir, "indptr"), np.int64, (n + 1,)) as out:
        out.write(np.zeros(1, dtype=np.int64))
        at = 0
        for p in merged:
            out.write(p[1:] + at)
            at += int(p[-1])
    for member, dt in (("indices", art.index_dtype(n)), ("data", np.float64)):
        with atomic.npy_writer(art.GRAPH_WEIGHTS.path(rundir, member), dt, (nnz,)) as out:
            for j in range(len(merged)):
                path = os.path.join(folder, f"merged{j:05d}-{member}.bin")
                out.write(np.fromfile(path, dtype=dt))
                os.unlink(path)
    return nnz, deg


def _pair_edges(ctx, info):
    """The comparable pairs (input.pairs) as edges of weight graph.pair_weight x the pair's weight
    (rows, cols, weights); counts go into the graph record ``info``."""
    from ..errors import examples
    from ..table import Source, connect_budget, pair_rows

    cfg = ctx.cfg
    con = connect_budget(cfg["run"]["memory_mb"])
    try:
        ra, rb, w, total, unknown = pair_rows(
            con, Source(con, ctx.fp), cfg["input"]["pairs"], cfg["input"]["id"]
        )
    finally:
        con.close()
    w = cfg["graph"]["pair_weight"] * w
    keep = np.isfinite(w) & (w > 0)
    info.update({"pairs": total, "pair_edges": int(keep.sum()), "pairs_not_found": total - len(ra)})
    log.info(
        "comparable pairs: %d of %d added as edges (weight %g each)",
        int(keep.sum()),
        total,
        cfg["graph"]["pair_weight"],
    )
    if len(ra) < total:
        log.warning(
            "input.pairs: %d of %d pairs name ids that are not in the table (e.g. %s) or join a row with itself; "
            "no edge for them",
            total - len(ra),
            total,
            examples(unknown) if unknown else "-",
        )
    return ra[keep], rb[keep], w[keep]


def run(ctx):
    """The graph stage (see the module docstring)."""
    rundir, cfg = ctx.rundir, ctx.cfg
    g = cfg["graph"]
    E = art.EMBED_EMBEDDING.rows(rundir)  # read in blocks: the stage never maps the whole table
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
        extra = _partitioned(ctx, E, k, g)
    else:
        progress.phase(log, f"{search} neighbour search over the whole table")
        if exact:
            ind, dist = gk.exact_knn(E[:], k)
        else:
            wanted = g["search_neighbours"] or int(np.ceil(1.5 * k))
            ind, dist = gk.approx_knn(
                E[:],
                k,
                seed=streams.seed_of(cfg["run"]["seed"], "graph.index"),
                n_trees=g["index_trees"],
                search=max(wanted, k),
                threads=g["index_threads"],
            )
        with contextlib.ExitStack() as stack:
            for out, arr in zip(_lists_writers(stack, rundir, n, k), (ind, dist, dist)):
                out.write(arr)
        del ind, dist
    ind = art.GRAPH_NEIGHBOURS.rows(rundir)
    dist = art.RowReader(_dist64(rundir))
    if search != "exact" and g["recall_rows"]:
        progress.phase(log, f"measuring recall on {min(n, g['recall_rows'])} sampled rows")
        t0 = time.monotonic()
        s = gk.recall_sample(n, g["recall_rows"], ctx.rng("graph.recall"))
        # a share of the sample per local thread (each pass reads the table; hits are integers,
        # so the figure does not depend on how the sample is cut)
        with _local_pool(ctx) as (map_fn, workers):
            hits = list(
                map_fn(lambda part: gk.recall_hits(E, ind, part), [s[j::workers] for j in range(workers)])
            )
        recall = float(sum(hits) / (len(s) * k))
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
                "neighbour recall %.3f is below %.2f: raise graph.refine_rounds, graph.partition_overlap "
                "or graph.partition_rows (partitioned build) or graph.search_neighbours (pynndescent)",
                recall,
                RECALL_WARN,
            )
    progress.phase(log, "kernel scale and weights (symmetrised, written shard by shard)")
    t0 = time.monotonic()
    median = gk.kernel_median(dist)
    sigma = gk.kernel_scale(dist, g["kernel_scale"], g["scale_factor"], median=median)
    extra_edges = _pair_edges(ctx, extra) if g["pair_weight"] > 0 and cfg["input"]["pairs"] else None
    with _local_pool(ctx) as (map_fn, workers):
        nnz, deg = write_weights(
            rundir,
            ind,
            dist,
            sigma,
            cfg["run"]["memory_mb"],
            map_fn=map_fn,
            workers=workers,
            extra=extra_edges,
        )
    zero_dist = sum(int(np.sum(dist[lo : lo + (1 << 20)] == 0)) for lo in range(0, n, 1 << 20))
    shutil.rmtree(art.GRAPH_SCRATCH.path(rundir), ignore_errors=True)
    log.info("weights: %d entries written in %.1f s", nnz, time.monotonic() - t0)
    isolated = int(np.sum(deg == 0))
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
        "kernel_median": float(median),  # before graph.scale_factor (late rows' weights need it)
        "scale_factor": g["scale_factor"],
        **extra,
    }
    art.GRAPH_INFO.save(rundir, info)
    return info
