"""``bigsmooth score``: adjusted scores for late rows (rows that arrive after the nightly run), with
the night's solution held fixed.

Reads the run behind the output's current version (or a given run directory); checks the late
table with the nightly scan's rules (the same messages and exit codes) and refuses ids the night
already scored unless ``replace``; maps the rows into the night's fair space; finds each row's k
nearest night rows (:mod:`bigsmooth.kernels.late`: candidates from its nearest cells of a fine
partition of the night, by their 4-bit codes (:class:`Coded`) or, for small nights, every row
(:class:`Cells`), measured exactly, then neighbours of neighbours from the night's lists) and the
late rows near each other; weights them with the night's kernel rule and scale; solves each batch jointly;
and writes DIR/late.parquet (never touching the output's versions or its ``current`` pointer).

The cell index is built once per run on first use and kept in the run directory (late/cells).

Rule for a category level the night never saw (or a null where the night had no missing level):
the row gets no indicator for that feature (all of the feature's one-hot columns 0), so it is
equally far from every known level; such rows are counted and flagged (``unseen_levels``).
"""

import json
import logging
import os
import time
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import scipy.sparse as sp

from . import __version__, atomic, provenance
from . import artifacts as art
from .config import load_config
from .errors import DataError, InputMissingError, OutputError, examples
from .kernels import late as lk
from .kernels import partition
from .parallel import one_blas_thread
from .rundir import RunDir, hold_lock
from .stages import scan
from .stages.embed import _floats, encoded, saved_space
from .table import Source, connect_budget, fingerprint, quote

log = logging.getLogger("bigsmooth.score")

CELL_ROWS = 4096  # night rows per cell of the late-row index (a row is stored in its nearest cell)
PROBE = 4  # cells a late row is compared with (exact cells)
ROUNDS = 2  # neighbour-of-neighbour rounds after the cells (exact cells)
CODED_MIN_ROWS = 5_000  # nights from this size are searched by their codes; smaller by exact cells
CODED_PROBE = 10  # cells whose codes a late row is compared with
CODED_TAKE = 48  # candidates by code a late row gets, then measured exactly
CODED_ROUNDS = 1  # neighbour-of-neighbour rounds after the coded candidates
CODED_WIDTH = 4  # the list places whose night neighbours a round measures
SAMPLE_ROWS = 100_000  # rows the cell centres are trained on
OUT_FILE = "late.parquet"
OUT_RECORD = "_late.json"


# ---------------------------------------------------------------------------------------- the run


def find_run(cfg, run_dir=None):
    """(RunDir, output version or None): the given run directory, or the run behind the output's
    ``current`` version."""
    if run_dir is None:
        pointer = os.path.join(cfg["output"]["path"], art.OUTPUT_POINTER)
        if not os.path.exists(pointer):
            raise InputMissingError(
                f"no published version under {cfg['output']['path']} (no {art.OUTPUT_POINTER}); run the "
                "nightly job first, or name a finished run with --run RUN_DIR"
            )
        cur = atomic.read_json(pointer)
        rd, version = RunDir(os.path.join(cfg["run"]["dir"], cur["run_id"])), cur["version"]
    else:
        rd = RunDir(run_dir)
        version = art.PUBLISH_PENDING.load(rd)["version"] if art.PUBLISH_PENDING.exists(rd) else None
    if not rd.exists():
        raise InputMissingError(f"{rd.path} is not a run directory (no {art.MANIFEST})")
    need = [art.SCAN_INFO, art.EMBED_INFO, art.GRAPH_INFO, art.GRAPH_NEIGHBOURS, art.SOLVE_ADJUSTED]
    missing = [a.key for a in need if not a.exists(rd)]
    if missing:
        raise InputMissingError(
            f"the run {rd.path} has not finished the stages late rows need (missing: "
            f"{', '.join(missing)}); score late rows against a run that solved"
        )
    return rd, version


class Night:
    """What the late rows need from a finished run, opened without reading the table: settings,
    fair space, levels, kernel rule and scale, and memory maps of the embedding, the neighbour
    lists and distances and the solution."""

    def __init__(self, rd):
        self.rd = rd
        m = rd.load()
        self.manifest = m
        s = m["settings"]
        self.inp, self.g, self.solve, self.out = s["input"], s["graph"], s["solve"], s["output"]
        self.fs = saved_space(art.EMBED_INFO.load(rd))
        scan_info = art.SCAN_INFO.load(rd)
        self.levels = scan_info["levels"]
        self.inp = dict(self.inp, list_lengths=scan_info.get("list_lengths", {}))
        gi = art.GRAPH_INFO.load(rd)
        self.E = art.EMBED_EMBEDDING.load(rd, mmap=True)
        self.nb = art.GRAPH_NEIGHBOURS.load(rd, mmap=True)
        self.dist = art.GRAPH_DISTANCES.load(rd, mmap=True)
        self.F = art.SOLVE_ADJUSTED.load(rd, mmap=True)
        self.n, self.k = self.nb.shape
        self.rule = gi["kernel_scale"]
        self.factor = gi.get("scale_factor", self.g["scale_factor"])
        if "kernel_median" in gi:
            self.median = gi["kernel_median"]
        elif self.rule == "global":  # runs before the median was recorded: sigma = median x factor
            self.median = gi["sigma_median"] / self.factor
        else:
            from .kernels import graph as gk

            self.median = gk.kernel_median(art.GRAPH_DISTANCES.rows(rd))
        self.sigma_night = gi["sigma_median"]

    def sigma_of(self, rows):
        """The night's kernel scale of night rows (from the stored float32 distances)."""
        if self.rule == "global":
            return np.full(len(rows), self.median * self.factor)
        return lk.row_sigma(self.dist[rows], self.rule, self.factor, self.median)


class Cells:
    """The exact cell search (the slow reference; used for nights below :data:`CODED_MIN_ROWS`)."""

    rounds, width = ROUNDS, None

    def __init__(self, night, seed, probe=PROBE):
        self.probe = probe
        self.centres, self.ptr, self.rows, self.E, self.norms = cells(night, seed)

    def candidates(self, night, Q):
        def read(p):
            lo, hi = self.ptr[p], self.ptr[p + 1]
            return np.asarray(self.rows[lo:hi]), self.E[lo:hi], self.norms[lo:hi]

        return lk.search(Q, lk.nearest_cells(Q, self.centres, self.probe), read, night.k)


class Coded:
    """The coded search (:func:`kernels.late.coded_search`, then exact distances)."""

    rounds, width = CODED_ROUNDS, CODED_WIDTH

    def __init__(self, night, seed, probe=CODED_PROBE, take=CODED_TAKE):
        import faiss

        self.probe, self.take = probe, take
        self.index = faiss.deserialize_index(np.asarray(codes(night, seed)))
        faiss.omp_set_num_threads(1)  # batches run on one thread per core, each search on its own

    def candidates(self, night, Q):
        return lk.measure(Q, lk.coded_search(self.index, Q, self.probe, self.take), lambda r: night.E[r])


def search_index(night, seed):
    """The night's late-row search: :class:`Coded` from :data:`CODED_MIN_ROWS` night rows, else
    :class:`Cells` (built and saved on first use)."""
    return Coded(night, seed) if night.n >= CODED_MIN_ROWS else Cells(night, seed)


def cells(night, rng_seed):
    """The exact cell index of the night (built and saved on first use, under a lock): (centres,
    ptr, rows, cell-ordered embedding memory-mapped, their squared norms)."""
    rd = night.rd
    if not art.LATE_CELLS.exists_member(rd, "norms"):
        with hold_lock(art.LATE_CELLS.folder(rd), f"the late-row index of {rd.path}"):
            if not art.LATE_CELLS.exists_member(rd, "ptr"):
                _build_cells(night, rng_seed)
            if not art.LATE_CELLS.exists_member(rd, "norms"):  # indexes built before norms were kept
                _save_norms(rd)
    load = lambda name, mm=False: art.LATE_CELLS.load(rd, member=name, mmap=mm)  # noqa: E731
    return load("centres"), load("ptr"), load("rows", True), load("embedding", True), load("norms", True)


def codes(night, rng_seed):
    """The coded index of the night, serialised (uint8, memory-mapped; built and saved on first use,
    under a lock): the cells' centres and each row's 4-bit codes (:func:`kernels.late.code_index`)."""
    rd = night.rd
    if not art.LATE_CELLS.exists_member(rd, "codes"):
        with hold_lock(art.LATE_CELLS.folder(rd), f"the late-row index of {rd.path}"):
            if not art.LATE_CELLS.exists_member(rd, "codes"):
                _build_codes(night, rng_seed)
    return art.LATE_CELLS.load(rd, member="codes", mmap=True)


def _plan(night, seed):
    """(centres, sample rows): the cells' centres, k-means on a seeded sample of the night (saved
    once; both indexes share them)."""
    rng = np.random.default_rng(seed)
    n = night.n
    sample = np.sort(rng.choice(n, size=min(n, SAMPLE_ROWS), replace=False))
    if art.LATE_CELLS.exists_member(night.rd, "centres"):
        return art.LATE_CELLS.load(night.rd, member="centres"), sample
    centres = lk.cell_plan(np.asarray(night.E[sample]), max(1, -(-n // CELL_ROWS)), rng)
    art.LATE_CELLS.save(night.rd, centres, member="centres")
    return centres, sample


def _build_codes(night, seed):
    import faiss

    t0 = time.monotonic()
    centres, sample = _plan(night, seed)
    E, block = night.E, 1 << 20
    blocks = (np.asarray(E[lo : lo + block]) for lo in range(0, night.n, block))
    index = lk.code_index(centres, np.asarray(E[sample]), blocks, threads=os.cpu_count() or 1)
    art.LATE_CELLS.save(night.rd, faiss.serialize_index(index), member="codes")
    log.info(
        "late-row index: %d cells, %d night rows coded, built in %.1f s (once per run)",
        len(centres),
        night.n,
        time.monotonic() - t0,
    )


def _save_norms(rd):
    """The squared norms of the index's rows (float32, cell order): read by the search instead of
    computed for every visit of a cell (that was 40% of the search time at 10M rows)."""
    E = art.LATE_CELLS.load(rd, member="embedding", mmap=True)
    block = 1 << 20
    with atomic.npy_writer(art.LATE_CELLS.path(rd, "norms"), np.float32, (len(E),)) as w:
        for lo in range(0, len(E), block):
            w.write(lk.sq_norms(np.asarray(E[lo : lo + block])))


def _build_cells(night, seed):
    t0 = time.monotonic()
    E, n = night.E, night.n
    centres, _ = _plan(night, seed)
    near = np.empty(n, dtype=np.int32)
    block = 1 << 20
    with one_blas_thread(), ThreadPoolExecutor(os.cpu_count() or 1) as pool:
        for lo in range(0, n, block):
            # the graph stage's compiled tiled search (once per run; the scoring path itself is numpy)
            rows = np.asarray(E[lo : lo + block])
            near[lo : lo + block] = partition.nearest_centres(rows, centres, 1, map_fn=pool.map)[:, 0]
    order = np.argsort(near, kind="stable")
    ptr = np.zeros(len(centres) + 1, dtype=np.int64)
    np.cumsum(np.bincount(near, minlength=len(centres)), out=ptr[1:])
    d = E.shape[1]
    with atomic.npy_writer(art.LATE_CELLS.path(night.rd, "embedding"), np.float32, (n, d)) as w:
        for lo in range(0, n, block):
            idx = order[lo : lo + block]
            s = np.argsort(idx)
            part = np.empty((len(idx), d), dtype=np.float32)
            part[s] = E[idx[s]]  # read in file order, placed in cell order
            w.write(part)
    art.LATE_CELLS.save(night.rd, order.astype(np.int64), member="rows")
    art.LATE_CELLS.save(night.rd, ptr, member="ptr")  # written last but norms: marks the index whole
    log.info(
        "late-row index: %d cells of up to %d night rows, built in %.1f s (once per run)",
        len(centres),
        int(np.diff(ptr).max()),
        time.monotonic() - t0,
    )


# ------------------------------------------------------------------------------------ the late rows


def late_input(inp):
    """The night's input settings as the late table is checked against: the columns the score
    needs (id, scores, features); protected attributes, labels and comparison scores are not read."""
    return dict(inp, protected=[], label="", compare_scores=[], counterfactual_score="", pairs="")


def check_late(path, inp, memory_mb):
    """Check the late table with the scan's rules: (fingerprint, rows). Raises DataError /
    InputMissingError with counts and example ids."""
    try:
        fp = fingerprint(path)
    except InputMissingError as exc:
        raise InputMissingError(str(exc).replace("input.path", "the late table", 1)) from None
    scan.check_files(fp, inp)
    con = connect_budget(memory_mb)
    try:
        src = Source(con, fp)
        cols = dict((r[0], r[1]) for r in src.fetch(con, "DESCRIBE SELECT * FROM {src}"))
        cols.pop("__bigsmooth_row", None)
        scan.check_schema(cols, inp)
        if fp["rows"] == 0:
            raise DataError(f"the late table {path} has 0 rows; nothing to score")
        total, problems = scan.row_problems(
            con, src, cols, inp, fp["rows"], memory_mb, inp.get("list_lengths")
        )
    finally:
        con.close()
    if problems:
        raise DataError(
            f"the late table has {len(problems)} problem(s) in {total} rows:\n  "
            + "\n  ".join(problems)
            + "\nFix the rows and run again; nothing was written."
        )
    return fp, total


def read_late(fp, inp, memory_mb):
    """The late table's ids, raw scores and features as one Arrow table, in file order."""
    con = connect_budget(memory_mb)
    try:
        cols = [quote(inp["id"])] + [quote(c) for c in inp["scores"] + inp["numeric_features"]]
        cols += [f"CAST({quote(c)} AS VARCHAR) AS {quote(c)}" for c in inp["categorical_features"]]
        return Source(con, fp).fetch_arrow(
            con, f"SELECT {', '.join(cols)} FROM {{src}} ORDER BY __bigsmooth_row"
        )
    finally:
        con.close()


def version_files(manifest, version_dir):
    """The published version's files as a fingerprint's file list (path, offset, rows): they hold
    the run's rows in its input order, at the input files' relative paths."""
    return [
        {"path": os.path.join(version_dir, e["rel"]), "offset": e["offset"], "rows": e["rows"]}
        for e in manifest["input"]["files"]
    ]


def night_rows_of(manifest, version_dir, id_col, ids, memory_mb):
    """{id: night row} for those of ``ids`` the night (the run of ``manifest``) scored, read from the
    published version's files (:func:`version_files`)."""
    files = [f for f in version_files(manifest, version_dir) if f["rows"]]
    missing = [f["path"] for f in files if not os.path.exists(f["path"])]
    if missing:
        raise InputMissingError(
            f"the night's published files are not all there (e.g. {missing[0]}); cannot tell which "
            "late ids the night already scored"
        )
    con = connect_budget(memory_mb)
    try:
        con.register("__late_ids", pa.table({"id": ids}))
        got = Source(con, {"files": files}).fetch(
            con,
            f"SELECT {quote(id_col)}, __bigsmooth_row FROM {{src}} WHERE {quote(id_col)} IN (SELECT id FROM __late_ids)",
        )
    finally:
        con.close()
    return {v: int(r) for v, r in got}


def features(table, inp, levels):
    """(X (b, p) encoded as the night encoded its rows, unseen (b,) count of category levels the
    night never saw): see the module docstring for the rule (:func:`stages.embed.encoded`)."""
    return encoded(table, inp, levels)


def neighbours(night, Q, index, exclude, rounds=None):
    """Each late row's k nearest night rows (the candidates of ``index``, a :class:`Coded` or
    :class:`Cells`, then ``rounds`` (the index's own by default) of the night's neighbours of the
    first ``index.width`` places of each list), without the night rows in ``exclude`` (ids being
    replaced): (ind (b, k), dist (b, k), every measured triplet)."""
    k = night.k
    rounds = index.rounds if rounds is None else rounds

    def drop(t):
        if not len(exclude) or not len(t[0]):
            return t
        keep = ~np.isin(t[1], exclude)
        return tuple(x[keep] for x in t)

    trip = drop(index.candidates(night, Q))
    ind, dist = lk.best(trip, len(Q), k)
    measured = [trip]
    for _ in range(rounds):
        seen = lk.keys(lk.concat(measured), night.n)
        near = ind[:, : index.width]  # the neighbours of each late row's nearest few
        new = drop(lk.expand(Q, near, lambda r: night.nb[r], lambda r: night.E[r], seen, night.n))
        if not len(new[0]):
            break
        measured.append(new)
        ind, dist = lk.best(lk.concat([lk.lists(ind, dist), new]), len(Q), k)
    return ind, dist, lk.concat(measured)


def score_batch(night, Q, y, nind, ndist, trip, far):
    """Adjusted scores of one batch (see the module docstring of kernels.late). Returns (f (b, s),
    nearest distance / the night's sigma (b,), no-near-neighbour flags (b,))."""
    b, k, n = len(Q), night.k, night.n
    ratio = ndist[:, 0] / night.sigma_night
    lonely = ~(ratio <= far)  # also rows that found no night row at all
    # each late row's list: its k nearest of the night rows and the other late rows (as n + i) that
    # are closer than its k-th night row
    lq, lj, ld = lk.late_pairs_within(Q, ndist[:, k - 1], k)
    q_all = np.concatenate([np.repeat(np.arange(b), k), lq])
    j_all = np.concatenate([nind.ravel(), n + lj])
    d_all = np.concatenate([ndist.ravel(), ld])
    ok = j_all >= 0
    ind, dist = lk.best((q_all[ok], j_all[ok], d_all[ok]), b, k)
    sig = lk.row_sigma(np.where(np.isfinite(dist), dist, 0.0), night.rule, night.factor, night.median)
    # night edges: the late row lists the night row, or the night row would list the late row
    lq, lj = np.nonzero((ind >= 0) & (ind < n))
    e_q, e_j, e_d = lq, ind[lq, lj], dist[lq, lj]
    rq, rj, rd = lk.reverse_edges(trip, ind, np.asarray(night.dist[trip[1], k - 1], dtype=np.float64))
    e_q, e_j, e_d = np.concatenate([e_q, rq]), np.concatenate([e_j, rj]), np.concatenate([e_d, rd])
    w = lk.heat(e_d, sig[e_q], night.sigma_of(e_j))
    keep = (w > 0) & ~lonely[e_q]
    e_q, e_j, w = e_q[keep], e_j[keep], w[keep]
    # late edges: either row lists the other (the larger weight, as the night symmetrises)
    aq, al = np.nonzero(ind >= n)
    a_j = ind[aq, al] - n
    wl = lk.heat(dist[aq, al], sig[aq], sig[a_j])
    keep = (wl > 0) & ~lonely[aq] & ~lonely[a_j]
    Wd = sp.coo_matrix((wl[keep], (aq[keep], a_j[keep])), shape=(b, b)).tocsr()
    Wl = Wd.maximum(Wd.T)
    f, _, _ = lk.solve_batch(
        y, e_q, w, np.asarray(night.F[e_j]), Wl, night.solve["lam"], night.solve["laplacian"]
    )
    f[lonely] = y[lonely]
    return f, ratio, lonely


def score(config, late_path, out_dir, run_dir=None, replace=False, batch=10_000, far=3.0):
    """The ``bigsmooth score`` command (see the module docstring). Returns a summary dict."""
    t_start = time.monotonic()
    cfg = load_config(config)
    out_abs, root_abs = os.path.abspath(out_dir), os.path.abspath(cfg["output"]["path"])
    if os.path.commonpath([out_abs, root_abs]) == root_abs:
        raise OutputError(
            f"--out {out_dir} is inside the output folder {cfg['output']['path']}, which holds only the "
            "nightly versions; write late scores elsewhere"
        )
    rd, version = find_run(cfg, run_dir)
    night = Night(rd)
    inp = late_input(night.inp)
    memory_mb = cfg["run"]["memory_mb"]
    fp, rows = check_late(late_path, inp, memory_mb)
    table = read_late(fp, inp, memory_mb)
    ids = table.column(inp["id"])
    version_dir = os.path.join(rd.root("output"), version) if version else None
    if version_dir is None or not os.path.isdir(version_dir):
        raise InputMissingError(
            f"the run {rd.path} has no published version folder to check late ids against "
            f"({version_dir}); score against a run that published"
        )
    present = night_rows_of(night.manifest, version_dir, inp["id"], ids, memory_mb)
    if present and not replace:
        raise DataError(
            f"{len(present)} of {rows} late rows have ids the night already scored (e.g. ids "
            f"{examples(sorted(present)[:5])}); give --replace to score them again as late rows "
            "(their night rows are then left out of the neighbours), or drop them"
        )
    exclude = np.array(sorted(present.values()), dtype=np.int64)
    t_index = time.monotonic()
    index = search_index(night, night.manifest["settings"]["run"]["seed"])
    t_load = time.monotonic()  # loading: the run, the checks, the ids and the late-row index
    log.info(
        "loaded run %s (%d night rows) in %.1f s",
        night.manifest["run_id"],
        night.n,
        time.monotonic() - t_start,
    )
    X, unseen = features(table, inp, night.levels)
    Q = night.fs.apply(X).astype(np.float32).astype(np.float64)  # as the night stored its rows
    Y = np.column_stack([_floats(table, c) for c in inp["scores"]])
    F = np.empty_like(Y)
    ratio = np.empty(rows)
    lonely = np.zeros(rows, dtype=bool)
    t0 = time.monotonic()

    def one(lo):
        hi = min(rows, lo + batch)
        nind, ndist, trip = neighbours(night, Q[lo:hi], index, exclude)
        F[lo:hi], ratio[lo:hi], lonely[lo:hi] = score_batch(night, Q[lo:hi], Y[lo:hi], nind, ndist, trip, far)

    # batches are independent (each is solved against the night alone), so they run on one thread
    # per core, each writing its own rows: the result does not depend on the number of threads
    starts = list(range(0, rows, batch))
    workers = min(len(starts), os.cpu_count() or 1)
    with one_blas_thread():  # BLAS sums split by thread count: one thread keeps results machine-independent
        if workers > 1:
            with ThreadPoolExecutor(workers) as pool:
                list(pool.map(one, starts))
        else:
            for lo in starts:
                one(lo)
    t_score = time.monotonic() - t0
    lo_r, hi_r = night.inp["score_range"]
    F = np.clip(F, lo_r, hi_r)
    record = {
        "written_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "bigsmooth_version": __version__,
        "kind": "late rows",
        "late_input": os.path.abspath(late_path),
        "late_input_fingerprint": fp["hash"],
        "late_rows": rows,
        "replaced_ids": len(present),
        "no_near_neighbour": int(lonely.sum()),
        "far_ratio": far,
        "unseen_level_rows": int((unseen > 0).sum()),
        "batch_rows": batch,
        "night_run_id": night.manifest["run_id"],
        "night_version": version,
        "night_rows": night.n,
        "config_path": os.path.abspath(config),
        "config_file_sha256": provenance.file_sha256(config),
        "settings_hash": night.manifest["config_hash"],
        "lam": night.solve["lam"],
        "laplacian": night.solve["laplacian"],
        "neighbours": night.k,
        "kernel_scale": night.rule,
        "seconds_loading": round(t_load - t_start, 3),
        "seconds_index": round(t_load - t_index, 3),
        "seconds_scoring": round(t_score, 3),
    }
    _write(out_dir, table, inp, night.out["suffix"], Y, F, ratio, lonely, unseen, record)
    if lonely.any():
        log.warning(
            "%d late rows have no night row within %g x the night's sigma (drift into an empty region): "
            "they keep their scores (flag no_near_neighbour)",
            int(lonely.sum()),
            far,
        )
    if unseen.any():
        log.warning(
            "%d late rows have a category level the night never saw: encoded as no known level "
            "(flag unseen_levels)",
            int((unseen > 0).sum()),
        )
    log.info("scored %d late rows in %.2f s (%.0f rows/s)", rows, t_score, rows / max(t_score, 1e-9))
    return record | {"path": os.path.join(out_dir, OUT_FILE)}


def _write(out_dir, table, inp, suffix, Y, F, ratio, lonely, unseen, record):
    cols = {inp["id"]: table.column(inp["id"])}
    for j, c in enumerate(inp["scores"]):
        cols[c] = pa.array(Y[:, j])
        cols[c + suffix] = pa.array(F[:, j])
        cols[c + "_change"] = pa.array(F[:, j] - Y[:, j])
    cols["nearest_distance_ratio"] = pa.array(ratio)
    cols["no_near_neighbour"] = pa.array(lonely)
    cols["unseen_levels"] = pa.array(unseen.astype(np.int32))
    t = pa.table(cols).replace_schema_metadata(
        {provenance.PARQUET_KEY: json.dumps(record, sort_keys=True).encode()}
    )
    try:
        os.makedirs(out_dir, exist_ok=True)
        dst = os.path.join(out_dir, OUT_FILE)
        tmp = dst + ".part"
        pq.write_table(t, tmp)
        with open(tmp, "rb") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, dst)
        atomic.write_json(os.path.join(out_dir, OUT_RECORD), record)
        atomic.fsync_dir(out_dir)
    except OSError as exc:
        raise OutputError(f"cannot write the late scores under {out_dir}: {exc.strerror or exc}") from None
