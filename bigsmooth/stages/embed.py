"""embed: stream the table twice and write the fair-space embedding.

Pass 1 accumulates sufficient statistics (:class:`~bigsmooth.kernels.fairspace.Moments`) and writes
the per-row arrays the later stages need (scores, labels, protected-level codes). The fair space is
learned from the statistics. Pass 2 writes the embedding as a float32 memmap, one row per input row
at its stable row index. Finally a linear probe on a sample measures how well the raw features and
the fair space still predict each protected attribute (the leakage figure).

Each pass is one task per input file (here, or on the Dask cluster with run.engine = "dask"): a
task streams its file in the same fixed chunks, writes its rows into the stage's temporary arrays
by path, and returns its file's statistics, which the driver adds in file order.
"""

import logging
import os

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from .. import artifacts as art
from .. import atomic, faults
from ..errors import DataError, examples
from ..kernels import encoding, fairspace
from ..kernels.metrics import roc_auc
from ..progress import Progress
from ..table import UNIT_ROWS, Source, batch_rows_for, connect_budget, quote, units, verify_unchanged
from .scan import MISSING_LEVEL

log = logging.getLogger("bigsmooth.embed")


def numeric_names(inp):
    """The numeric features one by one: a list feature (``inp["list_lengths"]``, from the scan) is
    one feature per position, ``name[0]``, ``name[1]``, ..."""
    lengths = inp.get("list_lengths") or {}
    out = []
    for c in inp["numeric_features"]:
        out += [f"{c}[{i}]" for i in range(lengths[c])] if c in lengths else [c]
    return out


def feature_names(inp, levels):
    return encoding.feature_names(
        numeric_names(inp), inp["categorical_features"], {c: [v for v, _ in levels[c]] for c in levels}
    )


def numeric_columns(batch, inp):
    """The numeric features of a batch as float64 arrays, one per feature (a list feature gives one
    array per position)."""
    lengths = inp.get("list_lengths") or {}
    out = []
    for c in inp["numeric_features"]:
        if c not in lengths:
            out.append(_floats(batch, c))
            continue
        col = batch.column(c)
        chunks = col.chunks if hasattr(col, "chunks") else [col]
        flat = [pc.list_flatten(ch).to_numpy(zero_copy_only=False) for ch in chunks]
        X = (
            (np.concatenate(flat) if flat else np.empty(0))
            .astype(np.float64)
            .reshape(batch.num_rows, lengths[c])
        )
        out += list(X.T)
    return out


def _codes(batch, col, lv):
    """Level codes of an Arrow column (null as the missing level) in the order of ``lv``; -1 for a
    value not in ``lv`` (never in the table the levels were counted on; late rows can have one)."""
    arr = batch.column(col)
    arr = pc.fill_null(arr.cast(pa.string()), MISSING_LEVEL)
    codes = pc.fill_null(pc.index_in(arr, value_set=pa.array(lv, pa.string())), -1)
    return np.asarray(codes.to_numpy(zero_copy_only=False), dtype=np.int64)


def _floats(batch, col):
    return batch.column(col).to_numpy(zero_copy_only=False).astype(np.float64)


def encoded(batch, inp, levels):
    """Numeric features plus one-hot categoricals for a batch: (ndarray (b, p), per row the count
    of category values not among ``levels``, which get no indicator)."""
    cats = inp["categorical_features"]
    lvs = [[v for v, _ in levels[c]] for c in cats]
    codes = [_codes(batch, c, lv) for c, lv in zip(cats, lvs)]
    X = encoding.encode(numeric_columns(batch, inp), codes, [len(lv) for lv in lvs], batch.num_rows)
    unseen = np.zeros(batch.num_rows, dtype=np.int64)
    for cc in codes:
        unseen += cc < 0
    return X, unseen


def _features(batch, inp, levels):
    """Numeric features plus one-hot categoricals for a batch: ndarray (b, p)."""
    return encoded(batch, inp, levels)[0]


def other_columns(inp):
    """Score columns read for the audit only: compare_scores, then the counterfactual score (last)."""
    return inp["compare_scores"] + ([inp["counterfactual_score"]] if inp["counterfactual_score"] else [])


def _select_sql(inp):
    cols = [quote(c) for c in inp["scores"] + other_columns(inp) + inp["numeric_features"]]
    cols += [
        f"CAST({quote(c)} AS VARCHAR) AS {quote(c)}" for c in inp["categorical_features"] + inp["protected"]
    ]
    if inp["label"]:
        cols.append(f"CAST({quote(inp['label'])} AS DOUBLE) AS {quote(inp['label'])}")
    return ", ".join(cols)


class _Outputs:
    """Row-indexed arrays written through memmaps in temporary files (by the file tasks, which map
    them by path), renamed into place at the end. The driver keeps no mapping of its own: a
    mapping with dirty pages here could overwrite a worker's rows on a shared file system."""

    def __init__(self):
        self.items = {}

    def open(self, path, shape, dtype, fill=None):
        tmp = path + ".partial"
        mm = atomic.new_memmap(tmp, dtype, shape)
        if fill is not None:
            mm[:] = fill
            mm.flush()
        del mm
        self.items[path] = tmp
        return tmp

    def commit(self):
        for path, tmp in self.items.items():
            with open(tmp, "rb+") as fh:
                os.fsync(fh.fileno())
            os.replace(tmp, path)
        if self.items:
            atomic.fsync_dir(os.path.dirname(next(iter(self.items))))
        self.items.clear()


def _mapped(paths):
    return {k: (np.load(v, mmap_mode="r+") if v else None) for k, v in paths.items()}


def _flushed(arrays):
    for mm in arrays.values():
        if mm is not None:
            mm.flush()
            with open(mm.filename, "rb+") as fh:
                os.fsync(fh.fileno())


def _file_chunks(spec, i, on_chunk=None):
    """(chunk number, rows, batch) of input file ``i``: chunks are numbered from 1 over every file
    in order (and on over the second pass, see ``spec["first_chunk"]``), so a fault point names
    the same chunk whichever worker reads the file."""
    e = spec["files"][i]
    con = connect_budget(spec["memory_mb"])
    number = spec["first_chunk"][i]
    try:
        for rows, batch in Source(con, {"files": [e]}).chunks(con, spec["sql"], spec["batch_rows"]):
            number += 1
            yield number, rows, batch
            if on_chunk is not None:
                on_chunk(len(rows))
    finally:
        con.close()


def statistics_task(root, spec, i, on_chunk=None):
    """Pass 1 over input file ``i`` (a task): write its rows' scores, labels, protected codes and
    audit-only columns into the stage's temporary arrays (mapped by path) and return the file's
    :class:`~bigsmooth.kernels.fairspace.Moments` (taken with ``spec["shift"]``) and rows. Running
    it twice writes the same values again."""
    inp, levels, prot_levels = spec["input"], spec["levels"], spec["prot_levels"]
    out = _mapped(spec["pass1"])
    mom = fairspace.Moments.empty(spec["shift"], spec["m"])
    seen = 0
    for number, rows, batch in _file_chunks(spec, i, on_chunk):
        X = _features(batch, inp, levels)
        pcodes = [_codes(batch, c, prot_levels[c]) for c in inp["protected"]]
        for j, cc in enumerate(pcodes):
            out["codes"][rows, j] = cc
        S = encoding.indicators(pcodes, [len(prot_levels[c]) for c in inp["protected"]], len(rows))
        for u in units(len(X)):
            mom.update(X[u], S[u])
        for j, c in enumerate(inp["scores"]):
            out["scores"][rows, j] = _floats(batch, c)
        for j, c in enumerate(other_columns(inp)):
            out["other"][rows, j] = _floats(batch, c)
        if out["label"] is not None:
            out["label"][rows] = batch.column(inp["label"]).to_numpy(zero_copy_only=False)
        seen += len(rows)
        faults.point(f"embed:chunk:{number}")
    _flushed(out)
    return mom, seen


def embedding_task(root, spec, i, on_chunk=None):
    """Pass 2 over input file ``i`` (a task): write its rows of the embedding (mapped by path) and
    return (positions in the probe sample, standardised features) of its sampled rows, and its rows.
    Running it twice writes the same values again."""
    inp, levels, fs = spec["input"], spec["levels"], spec["fair_space"]
    sample = spec["sample"]
    out = _mapped({"embedding": spec["embedding"]})
    E = out["embedding"]
    pos_all, raw_all = [], []
    seen = 0
    for number, rows, batch in _file_chunks(spec, i, on_chunk):
        X = _features(batch, inp, levels)
        for u in units(len(X)):
            E[rows[u]] = fs.apply(X[u]).astype(np.float32)
        pos = np.searchsorted(sample, rows)
        hit = (pos < len(sample)) & (sample[np.minimum(pos, len(sample) - 1)] == rows)
        pos_all.append(pos[hit])
        raw_all.append((X[hit] - fs.mean) * fs.scale)  # standardised, before the projection
        seen += len(rows)
        faults.point(f"embed:chunk:{number}")
    _flushed(out)
    p = len(fs.mean)
    return (
        np.concatenate(pos_all) if pos_all else np.empty(0, dtype=np.int64),
        np.concatenate(raw_all) if raw_all else np.empty((0, p)),
        seen,
    )


def _shift(con, fp, sql, inp, levels):
    """The mean of the first :data:`~bigsmooth.table.UNIT_ROWS` rows' features: the shift every
    file's statistics are taken with (so that they add up)."""
    first = next((e for e in fp["files"] if e["rows"]), None)
    if first is None:  # no rows (the scan refuses such a table; nothing to shift)
        return np.zeros(len(feature_names(inp, levels)))
    rows, batch = next(iter(Source(con, {"files": [first]}).chunks(con, sql, UNIT_ROWS)))
    return _features(batch, inp, levels).mean(axis=0)


PAIR_ROWS = 200_000  # comparable pairs whose differences the fair space is fitted on (the first by row)


def _pair_diffs(con, fp, sql, inp, levels):
    """The comparable pairs' feature differences x_a - x_b (m, p), for up to :data:`PAIR_ROWS`
    pairs (the first by row number), their rows read from the table by row number."""
    from ..table import ROW, pair_rows

    src = Source(con, fp)
    ra, rb, _, _, _ = pair_rows(con, src, inp["pairs"], inp["id"])
    ra, rb = ra[:PAIR_ROWS], rb[:PAIR_ROWS]
    rows = np.unique(np.concatenate([ra, rb]))
    con.register("__pair_rows", pa.table({"r": rows}))
    t = src.fetch_arrow(
        con, f"SELECT {ROW}, {sql} FROM {{src}} WHERE {ROW} IN (SELECT r FROM __pair_rows) ORDER BY {ROW}"
    )
    X = _features(t, inp, levels)
    got = t.column(ROW).to_numpy()
    return X[np.searchsorted(got, ra)] - X[np.searchsorted(got, rb)]


def _kept_space(run_root, source, names):
    """(fair space, source) for embed.fair_space = "previous": the space saved by the source run when
    its features are tonight's (same names in the same order), else (None, None) with a warning
    that says why (the caller fits the space on tonight's rows)."""
    info_path = art.EMBED_INFO.path(os.path.join(run_root, source["run_id"]))
    try:
        info = atomic.read_json(info_path)
    except (OSError, ValueError) as exc:
        log.warning("fair space: cannot read %s (%s); fitted on tonight's rows instead", info_path, exc)
        return None, None
    if info["features"] != names:
        added = [f for f in names if f not in info["features"]]
        gone = [f for f in info["features"] if f not in names]
        log.warning(
            "fair space: run %s encoded other features (%d new here, e.g. %s; %d gone, e.g. %s); "
            "fitted on tonight's rows instead",
            source["run_id"],
            len(added),
            examples(added, 3) or "-",
            len(gone),
            examples(gone, 3) or "-",
        )
        return None, None
    log.info(
        "fair space: kept from run %s (version %s; first fitted by run %s), not fitted tonight",
        source["run_id"],
        source["version"],
        source["origin"],
    )
    return saved_space(info), source


def saved_space(info):
    """The fair space a run saved in its embed.json (:data:`bigsmooth.artifacts.EMBED_INFO`), for
    mapping rows the run did not embed: late rows, or the next night's rows."""
    constant = set(info.get("constant_features", []))
    return fairspace.FairSpace(
        mean=np.asarray(info["mean"], dtype=np.float64),
        scale=np.asarray(info["scale"], dtype=np.float64),
        transform=np.asarray(info["transform"], dtype=np.float64),
        removed=info["removed_dimensions"],
        constant=np.array([f in constant for f in info["features"]], dtype=bool),
        explained=np.zeros(0),
    )


def run(ctx):
    """The embed stage (see the module docstring). Each pass is one task per input file
    (:func:`statistics_task`, :func:`embedding_task`); the driver adds the files' statistics in
    file order, so the result does not depend on where or in which order the tasks ran."""
    rundir, cfg, fp = ctx.rundir, ctx.cfg, ctx.fp
    inp, ecfg = cfg["input"], cfg["embed"]
    scan = art.SCAN_INFO.load(rundir)
    inp = dict(inp, list_lengths=scan.get("list_lengths", {}))
    levels = scan["levels"]
    n = scan["rows"]
    names = feature_names(inp, levels)
    p = len(names)
    prot_levels = {c: [v for v, _ in levels[c]] for c in inp["protected"]}
    m = sum(len(v) for v in prot_levels.values())
    art.EMBED_SCORES.folder(rundir)
    out = _Outputs()
    pass1 = {
        "scores": out.open(art.EMBED_SCORES.path(rundir), (n, len(inp["scores"])), np.float64),
        "label": out.open(art.EMBED_LABEL.path(rundir), (n,), np.float64, fill=np.nan)
        if inp["label"]
        else None,
        "codes": out.open(art.EMBED_PROTECTED.path(rundir), (n, len(inp["protected"])), np.int32),
        "other": out.open(art.EMBED_COMPARE.path(rundir), (n, len(other_columns(inp))), np.float64),
    }

    con = connect_budget(cfg["run"]["memory_mb"])
    sql = _select_sql(inp)
    width = p + len(inp["scores"]) + len(inp["protected"]) + 2
    batch_rows = ecfg["batch_rows"] or batch_rows_for(cfg["run"]["memory_mb"], width)
    log.info("streaming in chunks of %d rows (memory budget %d MiB)", batch_rows, cfg["run"]["memory_mb"])
    files = [{k: e[k] for k in ("path", "offset", "rows")} for e in fp["files"]]
    chunks = np.cumsum([0] + [-(-e["rows"] // batch_rows) for e in files])
    spec = {
        "files": files,
        "memory_mb": cfg["run"]["memory_mb"],
        "sql": sql,
        "batch_rows": batch_rows,
        "first_chunk": [int(c) for c in chunks[:-1]],
        "input": {
            k: inp[k] for k in ("numeric_features", "categorical_features", "protected", "scores", "label")
        }
        | {"list_lengths": inp["list_lengths"]}
        | {"compare_scores": inp["compare_scores"], "counterfactual_score": inp["counterfactual_score"]},
        "levels": levels,
        "prot_levels": prot_levels,
        "m": m,
        "shift": _shift(con, fp, sql, inp, levels),
        "pass1": pass1,
    }
    calls = [(rundir.path, spec, i) for i in range(len(files))]
    sizes = [e["rows"] for e in files]
    prog = Progress(log, "embed pass 1 (statistics)", n)
    mom = fairspace.Moments.empty(spec["shift"], m)
    seen = 0
    for part, rows in ctx.run_tasks(
        statistics_task,
        calls,
        sizes,
        "embed pass 1 (statistics_task, one per input file)",
        done=lambda j: prog.update(sizes[j]),
        local={"on_chunk": prog.update},
    ):
        mom.add(part)
        seen += rows
    if seen != n:
        raise RuntimeError(f"embed pass 1 streamed {seen} rows; the footers say {n}")

    # embed.fair_space = "previous": the space of the run behind the current version, if usable
    kept = fp.get("fair_space_from")
    fs, kept = _kept_space(cfg["run"]["dir"], kept, names) if kept else (None, None)
    diffs = None
    if fs is None:
        weights = encoding.weight_vector(names, ecfg["feature_weights"])
        indicator = np.arange(p) >= len(numeric_names(inp))
        if ecfg["pair_directions"] and inp["pairs"]:
            diffs = _pair_diffs(con, fp, sql, inp, levels)
            log.info(
                "comparable pairs: %d pairs' feature differences, their %d principal direction(s) removed",
                len(diffs),
                ecfg["pair_directions"],
            )
        fs = fairspace.fit_fair_space(
            mom,
            weights,
            ecfg["remove_sensitive"],
            ecfg["components"],
            indicator,
            pair_diffs=diffs,
            pair_count=ecfg["pair_directions"],
        )
    if fs.constant.any():
        log.warning(
            "constant features (no information, ignored): %s", ", ".join(np.array(names)[fs.constant][:10])
        )
    dim = fs.transform.shape[1]
    if dim == 0:
        raise DataError(
            f"the fair space has no dimensions left: of {p} encoded features, "
            f"{int(fs.constant.sum())} are constant over all {n} rows and the rest are explained by "
            "the protected attributes, so every row would look the same. Check that the feature "
            "columns carry values (all rows identical?) and that input.numeric_features / "
            "categorical_features name the right columns."
        )
    rng = ctx.rng("embed.probe_sample")
    sample = np.sort(rng.choice(n, size=min(n, ecfg["probe_rows"]), replace=False))
    spec2 = spec | {
        "embedding": out.open(art.EMBED_EMBEDDING.path(rundir), (n, dim), np.float32),
        "first_chunk": [int(c + chunks[-1]) for c in chunks[:-1]],
        "fair_space": fs,
        "sample": sample,
    }
    calls = [(rundir.path, spec2, i) for i in range(len(files))]
    raw_sample = np.zeros((len(sample), p))
    seen = 0
    prog = Progress(log, "embed pass 2 (embedding)", n)
    for pos, raw, rows in ctx.run_tasks(
        embedding_task,
        calls,
        sizes,
        "embed pass 2 (embedding_task, one per input file)",
        done=lambda j: prog.update(sizes[j]),
        local={"on_chunk": prog.update},
    ):
        raw_sample[pos] = raw
        seen += rows
    if seen != n:
        raise RuntimeError(f"embed pass 2 streamed {seen} rows; the footers say {n}")

    verify_unchanged(fp, "during stage embed")
    leakage = {}
    # read back through new mappings (the tasks wrote the files)
    fair_sample = np.asarray(np.load(spec2["embedding"], mmap_mode="r")[sample], dtype=np.float64)
    code_sample = np.asarray(np.load(pass1["codes"], mmap_mode="r")[sample])
    for j, c in enumerate(inp["protected"]):
        per_level = {}
        for li, lv in enumerate(prot_levels[c]):
            t = (code_sample[:, j] == li).astype(float)
            before = fairspace.linear_probe_auc(raw_sample, t, ctx.rng("embed.linear_probe"), roc_auc)
            after = fairspace.linear_probe_auc(fair_sample, t, ctx.rng("embed.linear_probe"), roc_auc)
            per_level[lv] = {"features_auc": before, "fair_space_auc": after}
        worst = max(
            (v["fair_space_auc"] for v in per_level.values() if np.isfinite(v["fair_space_auc"])),
            default=float("nan"),
        )
        leakage[c] = {"levels": per_level, "max_fair_space_auc": worst}
        # the warning against embed.leakage_warn_auc is the audit's (a threshold that only warns
        # must not change this stage's identity, so it is not read here)
        log.info("linear probe on the fair space: %r predicted with AUC %.3f at most", c, worst)
    out.commit()
    info = {
        "features": names,
        "dim": dim,
        "removed_dimensions": fs.removed,
        "pair_directions": ecfg["pair_directions"] if diffs is not None else 0,
        "pairs_used": 0 if diffs is None else len(diffs),
        "constant_features": list(np.array(names)[fs.constant]),
        "leakage": leakage,
        "probe_rows": len(sample),
        "fair_space_from": kept,
        "mean": fs.mean,
        "scale": fs.scale,
        "transform": fs.transform,
    }
    art.EMBED_INFO.save(rundir, info)
    return {
        "rows": n,
        "features": p,
        "dim": dim,
        "removed_dimensions": fs.removed,
        "max_leakage_auc": {c: v["max_fair_space_auc"] for c, v in leakage.items()},
        "fair_space": f"kept from run {kept['run_id']}" if kept else "fitted",
    }
