"""embed: stream the table twice and write the fair-space embedding.

Pass 1 accumulates sufficient statistics (:class:`~bigsmooth.kernels.fairspace.Moments`) and writes
the per-row arrays the later stages need (scores, labels, protected-level codes). The fair space is
learned from the statistics. Pass 2 writes the embedding as a float32 memmap, one row per input row
at its stable row index. Finally a linear probe on a sample measures how well the raw features and
the fair space still predict each protected attribute (the leakage figure).
"""

import logging
import os

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from .. import artifacts as art
from .. import atomic, faults
from ..errors import DataError
from ..kernels import encoding, fairspace
from ..kernels.metrics import roc_auc
from ..progress import Progress
from ..table import Source, batch_rows_for, connect_budget, quote, units, verify_unchanged
from .scan import MISSING_LEVEL

log = logging.getLogger("bigsmooth.embed")


def feature_names(inp, levels):
    return encoding.feature_names(
        inp["numeric_features"], inp["categorical_features"], {c: [v for v, _ in levels[c]] for c in levels}
    )


def _codes(batch, col, lv):
    """Level codes of an Arrow column (null as the missing level) in the order of ``lv``."""
    arr = batch.column(col)
    arr = pc.fill_null(arr.cast(pa.string()), MISSING_LEVEL)
    codes = pc.index_in(arr, value_set=pa.array(lv, pa.string()))
    return np.asarray(codes.to_numpy(zero_copy_only=False), dtype=np.int64)


def _floats(batch, col):
    return batch.column(col).to_numpy(zero_copy_only=False).astype(np.float64)


def _features(batch, inp, levels):
    """Numeric features plus one-hot categoricals for a batch: ndarray (b, p)."""
    cats = inp["categorical_features"]
    lvs = [[v for v, _ in levels[c]] for c in cats]
    return encoding.encode(
        [_floats(batch, c) for c in inp["numeric_features"]],
        [_codes(batch, c, lv) for c, lv in zip(cats, lvs)],
        [len(lv) for lv in lvs],
        batch.num_rows,
    )


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
    """Row-indexed arrays written through memmaps in temporary files, renamed into place at the end."""

    def __init__(self):
        self.items = {}

    def open(self, path, shape, dtype, fill=None):
        tmp = path + ".partial"
        mm = atomic.new_memmap(tmp, dtype, shape)
        if fill is not None:
            mm[:] = fill
        self.items[path] = (tmp, mm)
        return mm

    def commit(self):
        for path, (tmp, mm) in self.items.items():
            mm.flush()
            with open(tmp, "rb+") as fh:
                os.fsync(fh.fileno())
            del mm
            os.replace(tmp, path)
        if self.items:
            atomic.fsync_dir(os.path.dirname(next(iter(self.items))))
        self.items.clear()


def run(ctx):
    """The embed stage (see the module docstring)."""
    rundir, cfg, fp = ctx.rundir, ctx.cfg, ctx.fp
    inp, ecfg = cfg["input"], cfg["embed"]
    scan = art.SCAN_INFO.load(rundir)
    levels = scan["levels"]
    n = scan["rows"]
    names = feature_names(inp, levels)
    p = len(names)
    prot_levels = {c: [v for v, _ in levels[c]] for c in inp["protected"]}
    m = sum(len(v) for v in prot_levels.values())
    art.EMBED_SCORES.folder(rundir)
    out = _Outputs()
    Y = out.open(art.EMBED_SCORES.path(rundir), (n, len(inp["scores"])), np.float64)
    label = out.open(art.EMBED_LABEL.path(rundir), (n,), np.float64, fill=np.nan) if inp["label"] else None
    codes = out.open(art.EMBED_PROTECTED.path(rundir), (n, len(inp["protected"])), np.int32)
    other = out.open(art.EMBED_COMPARE.path(rundir), (n, len(other_columns(inp))), np.float64)

    con = connect_budget(cfg["run"]["memory_mb"])
    src = Source(con, fp)
    sql = _select_sql(inp)
    width = p + len(inp["scores"]) + len(inp["protected"]) + 2
    batch_rows = ecfg["batch_rows"] or batch_rows_for(cfg["run"]["memory_mb"], width)
    log.info("streaming in chunks of %d rows (memory budget %d MiB)", batch_rows, cfg["run"]["memory_mb"])
    mom = None
    seen = 0
    chunk_no = 0
    prog = Progress(log, "embed pass 1 (statistics)", n)
    for rows, batch in src.chunks(con, sql, batch_rows):
        X = _features(batch, inp, levels)
        pcodes = [_codes(batch, c, prot_levels[c]) for c in inp["protected"]]
        for j, cc in enumerate(pcodes):
            codes[rows, j] = cc
        S = encoding.indicators(pcodes, [len(prot_levels[c]) for c in inp["protected"]], len(rows))
        if mom is None:
            mom = fairspace.Moments.empty(X[units(len(X))[0]].mean(axis=0), m)
        for u in units(len(X)):
            mom.update(X[u], S[u])
        for j, c in enumerate(inp["scores"]):
            Y[rows, j] = _floats(batch, c)
        for j, c in enumerate(other_columns(inp)):
            other[rows, j] = _floats(batch, c)
        if label is not None:
            label[rows] = batch.column(inp["label"]).to_numpy(zero_copy_only=False)
        seen += len(rows)
        prog.update(len(rows))
        chunk_no += 1
        faults.point(f"embed:chunk:{chunk_no}")
    if seen != n:
        raise RuntimeError(f"embed pass 1 streamed {seen} rows; the footers say {n}")

    weights = encoding.weight_vector(names, ecfg["feature_weights"])
    indicator = np.arange(p) >= len(inp["numeric_features"])
    fs = fairspace.fit_fair_space(mom, weights, ecfg["remove_sensitive"], ecfg["components"], indicator)
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
    E = out.open(art.EMBED_EMBEDDING.path(rundir), (n, dim), np.float32)

    rng = ctx.rng("embed.probe_sample")
    sample = np.sort(rng.choice(n, size=min(n, ecfg["probe_rows"]), replace=False))
    raw_sample = np.zeros((len(sample), p))
    seen = 0
    prog = Progress(log, "embed pass 2 (embedding)", n)
    for rows, batch in src.chunks(con, sql, batch_rows):
        X = _features(batch, inp, levels)
        for u in units(len(X)):
            E[rows[u]] = fs.apply(X[u]).astype(np.float32)
        pos = np.searchsorted(sample, rows)
        hit = (pos < len(sample)) & (sample[np.minimum(pos, len(sample) - 1)] == rows)
        raw_sample[pos[hit]] = (X[hit] - fs.mean) * fs.scale  # standardised, before the projection
        seen += len(rows)
        prog.update(len(rows))
        chunk_no += 1
        faults.point(f"embed:chunk:{chunk_no}")
    if seen != n:
        raise RuntimeError(f"embed pass 2 streamed {seen} rows; the footers say {n}")

    verify_unchanged(fp, "during stage embed")
    leakage = {}
    fair_sample = np.asarray(E[sample], dtype=np.float64)
    code_sample = np.asarray(codes[sample])
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
        "constant_features": list(np.array(names)[fs.constant]),
        "leakage": leakage,
        "probe_rows": len(sample),
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
    }
