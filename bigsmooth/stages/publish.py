"""publish: write the adjusted table as a new version folder, then move the pointer atomically.

    <output.path>/<version>/...          one Parquet file per input file, at the same relative path
                                         (so hive partition folders are kept), rows in input order
    <output.path>/<version>/_audit.json  the run's audit
    <output.path>/CURRENT                JSON naming the current version (replaced atomically)
    <output.path>/current                symlink to the current version folder (replaced atomically)

The version folder is built under a hidden staging name and renamed when complete, so readers of
``current`` see last night's output until the new one is whole. The version's name is recorded in
the run directory (publish/pending.json) by the audit, before anything is written: a run killed after the rename
reuses its complete version folder and only moves the pointers; one killed before it rebuilds the
folder. Leftover staging folders (the job holds the output lock, so they belong to dead runs) are
removed first.
"""

import contextlib
import json
import logging
import os
import shutil

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from .. import artifacts as art
from .. import atomic, faults, logs, provenance
from ..errors import DataError, OutputError
from ..table import batch_rows_for, connect_budget, id_digests, verify_unchanged

log = logging.getLogger("bigsmooth.publish")


def output_columns(inp, out):
    cols = [inp["id"]] + inp["scores"]
    if out["include_protected"]:
        cols += inp["protected"]
    return cols


def _write_file(src_path, dst_path, cols, inp, out, Y, F, lo, hi, offset, batch_rows, meta):
    pf = pq.ParquetFile(src_path)
    present = set(pf.schema_arrow.names)
    read = [c for c in cols if c in present]
    writer = None
    pos = offset
    try:
        for batch in pf.iter_batches(batch_size=batch_rows, columns=read):
            b = batch.num_rows
            arrays = {c: batch.column(c) for c in read}
            for j, c in enumerate(inp["scores"]):
                adj = np.clip(F[pos : pos + b, j], lo, hi)
                arrays[c + out["suffix"]] = pa.array(adj)
                arrays[c + "_change"] = pa.array(adj - Y[pos : pos + b, j])
            t = pa.table(arrays)
            t = t.replace_schema_metadata(meta)
            if writer is None:
                writer = pq.ParquetWriter(dst_path, t.schema)
            writer.write_table(t)
            pos += b
    finally:
        if writer is not None:
            writer.close()
    return pos - offset


def file_task(root, staging, spec, i):
    """Write output file ``i`` (numbered from 1 in the input's file order) of the run at ``root``
    into the folder ``staging`` (a task: it reads the raw and adjusted scores from the run
    directory and the input file from its path, and writes its file under a temporary name, then
    renames it, so a task run twice, or on another host that mounts both, leaves one whole file).
    ``spec`` holds the file list and what the stage read from the config. Returns the rows written."""
    e = spec["files"][i - 1]
    dst = os.path.join(staging, os.path.relpath(e["path"], spec["input_root"]))
    os.makedirs(os.path.dirname(dst), exist_ok=True)
    Y = art.EMBED_SCORES.load(root, mmap=True)
    F = art.SOLVE_ADJUSTED.load(root, mmap=True)
    tmp = dst + ".part"
    got = _write_file(
        e["path"],
        tmp,
        spec["cols"],
        spec["input"],
        spec["output"],
        Y,
        F,
        *spec["range"],
        e["offset"],
        spec["batch_rows"],
        spec["meta"],
    )
    if got != e["rows"]:
        raise RuntimeError(f"{e['path']}: wrote {got} rows, the footer says {e['rows']}")
    written = os.path.exists(tmp)  # a file without rows has no output file
    if written:
        with open(tmp, "rb") as fh:
            os.fsync(fh.fileno())
    faults.point(f"publish:file:{i}")
    if written:
        os.replace(tmp, dst)
    return got


def _clear_leftovers(root):
    for name in os.listdir(root):
        p = os.path.join(root, name)
        if name.startswith(".staging-"):
            log.info("removing %s left by an interrupted run", p)
            shutil.rmtree(p, ignore_errors=True)
        elif name.startswith(".current-"):
            with contextlib.suppress(FileNotFoundError):
                os.unlink(p)


def _move_pointers(root, version, run_id, rows, run_dir):
    faults.point("publish:before-pointer")
    # run_dir relative to the output folder (found again where both are mounted elsewhere)
    pointer = {
        "version": version,
        "run_id": run_id,
        "rows": rows,
        "published": version[:16],
        "run_dir": os.path.relpath(os.path.abspath(run_dir), os.path.abspath(root)),
    }
    atomic.write_bytes(
        os.path.join(root, art.OUTPUT_POINTER), (json.dumps(pointer, indent=2) + "\n").encode()
    )
    faults.point("publish:before-link")
    link_tmp = os.path.join(root, f".current-{version}")
    with contextlib.suppress(FileNotFoundError):
        os.unlink(link_tmp)
    os.symlink(version, link_tmp)
    os.replace(link_tmp, os.path.join(root, art.OUTPUT_LINK))
    atomic.fsync_dir(root)


def _verify_input(rundir, cfg, fp):
    """The files just copied are the files the run read: fingerprints unchanged, and each file's ids in
    the same order as the scan saw them (an order-sensitive digest). Otherwise rows would get other
    rows' adjusted scores."""
    verify_unchanged(fp, "while publishing")
    want = art.SCAN_INFO.load(rundir).get("id_digests")
    if want is None:
        return
    got = id_digests(connect_budget(cfg["run"]["memory_mb"]), fp, cfg["input"]["id"])
    bad = sorted(p for p in want if got.get(p) != want[p])
    if bad:
        raise DataError(
            f"{len(bad)} input file(s) hold other ids, or the same ids in another order, than when the "
            "run scanned them:\n  " + "\n  ".join(bad[:10]) + "\nNothing was published. Run the job "
            "again once the input is complete; it starts a fresh run."
        )


def _refresh_audit(rundir, cfg, fp, version):
    """The provenance as of publishing: the status follows the current gates.on_fail (which is not part
    of the run identity), and the report is drawn again so that it shows it (and any tuning done since
    the audit). Returns the provenance record."""
    from . import report as html_report

    audit = art.AUDIT_REPORT_JSON.load(rundir)
    audit["provenance"] = provenance.record(rundir, cfg, fp, version, audit["gates"])
    art.AUDIT_REPORT_JSON.save(rundir, audit)
    html_report.write(rundir, cfg, audit)
    return audit["provenance"]


def run(ctx):
    """The publish stage (see the module docstring)."""
    rundir, cfg, fp, run_id = ctx.rundir, ctx.cfg, ctx.fp, ctx.run_id
    inp, out = cfg["input"], cfg["output"]
    root = out["path"]
    version = provenance.version_name(rundir, run_id)
    staging = os.path.join(root, f".staging-{version}")
    final = os.path.join(root, version)
    try:
        os.makedirs(root, exist_ok=True)
        _clear_leftovers(root)
        if os.path.isdir(final):
            log.info("the version folder %s was completed before an interruption; moving the pointers", final)
            _move_pointers(root, version, run_id, fp["rows"], rundir.path)
            return {"version": version, "rows": fp["rows"], "files": len(fp["files"])}
    except OSError as exc:
        raise OutputError(f"cannot write the output under {root}: {exc}") from None
    cols = output_columns(inp, out)
    meta = {
        provenance.PARQUET_KEY: json.dumps(_refresh_audit(rundir, cfg, fp, version), sort_keys=True).encode()
    }
    spec = {
        "files": [{k: e[k] for k in ("path", "offset", "rows")} for e in fp["files"]],
        "input_root": fp["root"],
        "cols": cols,
        "input": {"scores": list(inp["scores"])},
        "output": {"suffix": out["suffix"]},
        "range": tuple(inp["score_range"]),
        "batch_rows": cfg["embed"]["batch_rows"]
        or batch_rows_for(cfg["run"]["memory_mb"], len(cols) + 2 * len(inp["scores"])),
        "meta": meta,
    }
    try:
        os.makedirs(staging, exist_ok=False)
    except OSError as exc:
        raise OutputError(f"cannot create the output folder {staging}: {exc.strerror}") from None
    try:
        calls = [(rundir.path, staging, spec, i) for i in range(1, len(fp["files"]) + 1)]
        got = ctx.run_tasks(file_task, calls, [e["rows"] for e in fp["files"]], "output files")
        written = int(sum(got))
        if written != fp["rows"]:
            raise RuntimeError(f"wrote {written} rows; the input has {fp['rows']}")
        shutil.copyfile(art.AUDIT_REPORT_JSON.path(rundir), os.path.join(staging, art.OUTPUT_AUDIT))
        shutil.copyfile(art.AUDIT_REPORT_HTML.path(rundir), os.path.join(staging, art.OUTPUT_REPORT))
        for dirpath, _, files in os.walk(staging):
            for f in files:
                with open(os.path.join(dirpath, f), "rb") as fh:
                    os.fsync(fh.fileno())
            atomic.fsync_dir(dirpath)
        _verify_input(rundir, cfg, fp)
        faults.point("publish:before-rename")
        os.rename(staging, final)
        atomic.fsync_dir(root)
    except OSError as exc:
        shutil.rmtree(staging, ignore_errors=True)
        raise OutputError(f"cannot write the output under {root}: {exc}") from None
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        raise
    try:
        _move_pointers(root, version, run_id, written, rundir.path)
    except OSError as exc:
        raise OutputError(f"cannot move the output pointers under {root} to {version}: {exc}") from None
    logs.event(
        log,
        "published",
        "published %d rows to %s",
        written,
        final,
        rows=int(written),
        path=final,
        version=version,
    )
    return {"version": version, "rows": written, "files": len(fp["files"])}
