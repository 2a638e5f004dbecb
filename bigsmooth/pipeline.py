"""The nightly job: create or resume a run and take it through every stage in order."""

import contextlib
import errno
import logging
import gc
import json
import os
import resource
import shutil
import time

from . import artifacts, logs, parallel
from . import config as config_mod
from .atomic import read_json
from .progress import Heartbeat
from .errors import BigsmoothError, DataError, GateError, InputMissingError, OutputError
from .rundir import STAGES, RunDir, find_stage, hold_lock, manifests, relative_roots, run_id
from .stages import base as stage_base
from .table import changed_files, fingerprint, portable, unreadable_files, verify_unchanged

log = logging.getLogger("bigsmooth.run")

# tables of this many rows or more get a full garbage collection before each stage, so that arrays
# the last stage left in reference cycles do not count in the next stage's peak memory; below it the
# arrays are small and the collection (about 40 ms a stage after matplotlib and numba are imported)
# would cost more than the stage
COLLECT_ABOVE = 100_000

# stages that read the input files (each checks, before it starts, that they are the files the run
# began on; embed also after its two passes, publish also before its version folder is renamed)
READS_INPUT = ("scan", "embed", "audit", "publish")


def _check_writable(path):
    """Fail early if the output folder (or, when it does not exist yet, its nearest parent) is not writable.

    Nothing is created here: a run that fails before publishing leaves no trace in the output location.
    """
    probe = os.path.abspath(path)
    while not os.path.exists(probe):
        parent = os.path.dirname(probe)
        if parent == probe:
            break
        probe = parent
    if not os.path.isdir(probe) or not os.access(probe, os.W_OK | os.X_OK):
        raise OutputError(f"output.path {path} is not writable (checked {probe})")
    link = os.path.join(path, artifacts.OUTPUT_LINK)
    if os.path.isdir(link) and not os.path.islink(link):
        # e.g. the output folder copied without keeping symbolic links: publishing could not
        # replace it, so say so before the run does its work
        raise OutputError(
            f"{link} is a folder, not the symbolic link to the current version that bigsmooth keeps "
            "(was the output folder copied without its links?); replace it by a link to the version "
            f"named in {artifacts.OUTPUT_POINTER}, or remove it"
        )


def _allow_numba_threads(threads):
    """numba caps its thread count at NUMBA_NUM_THREADS (default: the cores) when it starts, and the
    approximate index needs exactly graph.index_threads threads whatever the machine: raise the cap
    before numba is imported (a no-op if it already was)."""
    import sys

    if "numba" not in sys.modules:
        current = int(os.environ.get("NUMBA_NUM_THREADS", os.cpu_count() or 1))
        os.environ["NUMBA_NUM_THREADS"] = str(max(current, threads))


def _unfinished_with_other_input(run_root, chash, input_hash):
    """Unfinished runs under ``run_root`` with the same settings but another input: [(dir, manifest)]."""
    out = []
    for path, m in manifests(run_root):
        if m.get("config_hash") != chash or m["input"]["hash"] == input_hash or m.get("superseded_by"):
            continue
        if not all(v["state"] == "done" for v in m["stages"].values()):
            out.append((path, m))
    return out


def _handle_input_change(cfg, chash, fp, rid):
    """Never mix inputs: an unfinished run on other input files is left alone (and marked superseded)
    or, with run.on_input_change = "refuse", stops the job; either way the changed files are named."""
    for path, m in _unfinished_with_other_input(cfg["run"]["dir"], chash, fp["hash"]):
        lines = changed_files(m["input"], fp)
        listing = "\n  ".join(lines[:10]) + (f"\n  ... and {len(lines) - 10} more" if len(lines) > 10 else "")
        if cfg["run"]["on_input_change"] == "refuse":
            raise DataError(
                f"the unfinished run {path} was started on other input files; {len(lines)} "
                f'files differ:\n  {listing}\nrun.on_input_change = "refuse": nothing was '
                "done. Restore the input to resume that run, or set run.on_input_change = "
                '"fresh" to start a new run on the current files.'
            )
        log.warning(
            "the unfinished run %s was started on other input files; not resuming it, starting a "
            "fresh run. %d files differ:\n  %s",
            path,
            len(lines),
            listing,
        )
        with hold_lock(path, f"run {path}"):
            m = read_json(os.path.join(path, artifacts.MANIFEST))
            m["superseded_by"] = rid
            RunDir(path).save(m)


def _check_gates(rd, cfg, before_publish):
    """Raise GateError if an audit gate failed: before publishing when gates.on_fail = "hold" (nothing
    is published; last night's output stays current), after it when "publish"."""
    failed = [g for g in artifacts.AUDIT_REPORT_JSON.load(rd).get("gates", []) if g["state"] == "failed"]
    if not failed or (before_publish and cfg["gates"]["on_fail"] == "publish"):
        return
    lines = "\n  ".join(g["line"] for g in failed)
    what = (
        "nothing was published; the output's current version is unchanged"
        if before_publish
        else 'the output was published anyway (gates.on_fail = "publish")'
    )
    raise GateError(
        f"{len(failed)} audit gate(s) failed:\n  {lines}\n{what}. The audit is in "
        f"{artifacts.AUDIT_REPORT_JSON.path(rd)} and {artifacts.AUDIT_REPORT_HTML.path(rd)}; lower solve.lam "
        "(see `bigsmooth tune`) or change the [gates] thresholds."
    )


WRITE_ERRNOS = {errno.ENOSPC, errno.EDQUOT, errno.EROFS, errno.EFBIG}


def os_error(exc, stage, rd, cfg, fp):
    """The error to report for an OSError in a stage: a failed read of an input file (or of the
    pairs file) is an input error (exit 66); anything else, a full disk above all, is a failed write
    (exit 73), after which the run resumes."""
    path = os.path.abspath(exc.filename) if getattr(exc, "filename", None) else None
    inputs = {e["path"] for e in fp["files"]} | (
        {os.path.abspath(cfg["input"]["pairs"])} if cfg["input"]["pairs"] else set()
    )
    if (
        exc.errno not in WRITE_ERRNOS
        and path is not None
        and (path in inputs or path.startswith(fp["root"] + os.sep))
    ):
        return InputMissingError(
            f"stage {stage} could not read the input file {path}: {exc.strerror or exc}. Check that it is "
            "there and readable, then run again."
        )
    return OutputError(
        f"stage {stage} could not write in {rd.path}: {exc}. Earlier stages and the last solver "
        "checkpoint are kept; free space or fix permissions and run again to resume."
    )


def _reading(name, fp, call):
    """Run a stage; a failure inside DuckDB or Arrow while it reads the input becomes an input error
    (exit 66) naming the files that cannot be read, when some can't (otherwise it is raised as it is)."""
    import duckdb
    import pyarrow as pa

    try:
        return call() or {}
    except (duckdb.Error, pa.ArrowException) as exc:
        if name not in READS_INPUT:
            raise
        bad = unreadable_files(fp)
        if not bad:
            raise
        lines = "\n  ".join(f"{p}: {why}" for p, why in bad)
        raise InputMissingError(
            f"{len(bad)} input file(s) cannot be read (corrupt data pages?) in stage {name}:\n  "
            f"{lines}\nReplace or remove them and run again."
        ) from exc


KEEP_ON_FRESH = (
    artifacts.LOCK,
    os.path.dirname(artifacts.TUNE_INFO.rel),
)  # the lock we hold; tuning results (the graph is rebuilt the same)


def _discard(rd):
    """Reset a run directory so that a kill at any moment leaves either the old run or a new one:
    the manifest is moved aside first (from then on the run counts as new), then every other entry,
    then the set-aside folder is deleted."""
    aside = os.path.join(rd.path, f".discard-{os.getpid()}-{int(time.time() * 1e6)}")
    os.makedirs(aside)
    os.rename(rd.manifest_path, os.path.join(aside, artifacts.MANIFEST))
    for name in os.listdir(rd.path):
        if name not in KEEP_ON_FRESH and not name.startswith(".discard-"):
            os.rename(os.path.join(rd.path, name), os.path.join(aside, name))
    shutil.rmtree(aside)


def _clear_stale(rd):
    """Remove what a killed reset left: set-aside folders, and any stage output in a run directory
    without a manifest (the manifest is written before any stage runs, so such files belong to a
    discarded run and must not be resumed from)."""
    if not os.path.isdir(rd.path):
        return
    for name in os.listdir(rd.path):
        p = os.path.join(rd.path, name)
        if name.startswith((".discard-", ".adopt-")) or (not rd.exists() and name not in KEEP_ON_FRESH):
            shutil.rmtree(p, ignore_errors=True) if os.path.isdir(p) and not os.path.islink(p) else os.unlink(
                p
            )


def run_stages(ctx, upto=None, fresh=False):
    """Run the declared stages (:data:`bigsmooth.stages.base.SPECS`) in order, up to and including
    ``upto`` (default: all). A stage is skipped when the manifest says it is done and its declared
    outputs exist; taken from another run when it has the same identity (unless ``fresh``); else run
    as ``module.run(ctx)`` inside the manifest's record of it."""
    rd, cfg, fp = ctx.rundir, ctx.cfg, ctx.fp
    ids = stage_base.identities(cfg, fp["hash"])
    last = STAGES.index(upto) if upto else len(STAGES) - 1
    for spec in stage_base.SPECS[: last + 1]:
        name = spec.name
        if name == "publish":
            _check_gates(rd, cfg, before_publish=True)
        if rd.is_done(name):
            missing = stage_base.outputs_missing(name, rd)
            if not missing:
                logs.event(log, "stage_skipped", "stage %s already done; skipping", name, stage=name)
                continue
            log.warning(
                "stage %s is marked done but %s are missing; doing it again", name, ", ".join(missing)
            )
        if stage_base.shareable(name, cfg) and not fresh:
            source = find_stage(cfg["run"]["dir"], name, ids[name], exclude=rd.path)
            if source and rd.adopt(name, source, ids[name]):
                logs.event(
                    log,
                    "stage_reused",
                    "stage %s: reusing the outputs of run %s (same input and %s settings)",
                    name,
                    os.path.basename(source),
                    name,
                    stage=name,
                    from_run=os.path.basename(source),
                )
                continue
        logs.event(log, "stage_started", "stage %s", name, stage=name)
        with rd.stage(name, ids[name]) as record:
            if name in READS_INPUT:
                verify_unchanged(fp, f"before stage {name}")
            try:
                # one BLAS thread for the stage's own array work: BLAS reductions (dot products in
                # the audit's CG, norms) split by thread count, and the results must not depend on
                # the machine's cores (tasks on other executors run with one BLAS thread too)
                if fp["rows"] >= COLLECT_ABOVE:
                    gc.collect()  # arrays the last stage left in reference cycles: not this stage's peak
                own = reset_peak_rss()
                with parallel.one_blas_thread(), Heartbeat(log, name):
                    record.update(_reading(name, fp, lambda: spec.module().run(ctx.for_stage(name))))
                record["peak_rss_mb"] = peak_rss_mb()
                record["peak_rss_scope"] = "stage" if own else "process"
            except OSError as exc:
                raise os_error(exc, name, rd, cfg, fp) from None


def reset_peak_rss():
    """Start a new peak of resident memory for this process (Linux: writing 5 to
    /proc/self/clear_refs resets VmHWM). True if it worked; then :func:`peak_rss_mb` gives the peak
    since this call (the stage's own), else the process's peak so far. (After a reset, getrusage's
    maximum, also what a parent sees for this child, covers only the time since the last one: the
    benchmark takes the largest stage peak from the manifest.)"""
    try:
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")
        return True
    except OSError:
        return False


def peak_rss_mb():
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return round(int(line.split()[1]) / 1024, 1)
    except OSError:
        pass
    return round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, 1)


def with_pairs(fp, pairs):
    """The input's fingerprint with the pairs file's (size, mtime, footer) folded into its hash: the
    pairs can change the graph, so new pairs are a new run. A missing file is left to the scan."""
    if not pairs or not os.path.isfile(pairs):
        return fp
    import hashlib

    from .table import footer_hash

    st = os.stat(pairs)
    try:
        footer = footer_hash(pairs)
    except (OSError, ValueError):  # not Parquet: the scan says so
        footer = None
    mark = json.dumps([st.st_size, st.st_mtime_ns, footer])
    return fp | {"hash": hashlib.sha256((fp["hash"] + ":pairs:" + mark).encode()).hexdigest(), "pairs": mark}


def with_kept_space(fp, cfg, chash):
    """embed.fair_space = "previous": the fingerprint with the run whose fair space is kept folded into
    its hash (``fair_space_from``: run id, version and the run that first fitted it), so that a new
    earlier version is a new run. When the output's current version is this same job on this same
    input (a rerun or a resume after publishing), its own source is kept again and the run id does
    not change. No usable earlier run: nothing kept (the embed stage fits and says why)."""
    if cfg["embed"]["fair_space"] != "previous":
        return fp
    import hashlib

    base = fp | {"hash_before_space": fp["hash"], "fair_space_from": None}
    pointer = os.path.join(cfg["output"]["path"], artifacts.OUTPUT_POINTER)
    if not os.path.exists(pointer):
        log.info('embed.fair_space = "previous": no published version yet; the fair space is fitted tonight')
        return base
    cur = read_json(pointer)
    src = os.path.join(cfg["run"]["dir"], cur["run_id"])
    try:
        m = read_json(os.path.join(src, artifacts.MANIFEST))
    except (OSError, ValueError):
        log.warning(
            'embed.fair_space = "previous": the run %s behind the current version %s is gone; the fair '
            "space is fitted tonight",
            src,
            cur["version"],
        )
        return base
    prior = m["input"].get("fair_space_from")
    if m.get("config_hash") == chash and m["input"].get("hash_before_space") == fp["hash"]:
        source = prior  # the current version is this job on this input: keep what it kept
    elif not artifacts.EMBED_INFO.exists(RunDir(src)):
        log.warning('embed.fair_space = "previous": the run %s has no fair space; fitted tonight', src)
        source = None
    else:
        source = {
            "run_id": cur["run_id"],
            "version": cur["version"],
            "origin": prior["origin"] if prior else cur["run_id"],
        }
    if source is None:
        return base
    mark = hashlib.sha256((fp["hash"] + ":fair_space:" + source["run_id"]).encode()).hexdigest()
    return base | {"hash": mark, "fair_space_from": source}


# files of a finished run that no later command reads (run.drop_intermediates)
INTERMEDIATES = ("order.split", "solve.system", "solve.work", "solve.checkpoint", "graph.parts")


def drop_intermediates(rd):
    """Delete a published run's :data:`INTERMEDIATES`; a stage that declared one of them as an
    output is marked ``dropped`` first (so that, even if the deletion is interrupted, no other run
    adopts its outputs; it is computed again where needed)."""
    from .status import tree_bytes

    present = [
        artifacts.CATALOGUE[k] for k in INTERMEDIATES if os.path.exists(artifacts.CATALOGUE[k].path(rd))
    ]
    m = rd.load()
    for a in present:
        if a.key in stage_base.BY_NAME[a.stage].writes:
            m["stages"][a.stage].setdefault("dropped", []).append(a.key)
    rd.save(m)
    freed = 0
    for a in present:
        path = a.path(rd)
        if os.path.isdir(path):
            freed += tree_bytes(path)
            shutil.rmtree(path)
        else:
            freed += os.path.getsize(path)
            os.unlink(path)
    log.info("run.drop_intermediates: %.1f MB of intermediate files deleted from %s", freed / 1e6, rd.path)


def _retention(cfg):
    """Old versions and runs after a successful publish (output.keep_versions, run.keep_runs); a
    failure here is a warning: tonight's output is published either way."""
    from .prune import prune

    try:
        prune(cfg)
    except OSError as exc:
        log.warning("retention: could not delete old versions or runs (%s); run `bigsmooth prune` later", exc)


@contextlib.contextmanager
def _tagged(rid, path):
    """Errors leaving the run carry its id and directory (for `run --json` and the final log event)."""
    try:
        yield
    except BigsmoothError as exc:
        exc.run_id, exc.run_dir = rid, path
        raise


def run_job(config_path, fresh=False, upto=None, then=None):
    """Run (or resume) the job described by a config file.

    With ``upto`` (a stage name) the stages run up to and including it, and nothing is published;
    ``then(rundir, cfg)`` is called afterwards while the run's locks are still held (``bigsmooth
    tune`` runs up to ``order`` and solves its lam path this way) and its result is returned under
    ``then``.

    Returns
    -------
    dict with ``run_dir``, ``run_id``, ``already_complete`` and the published ``output`` folder
    (a full run), or ``then``'s result.
    """
    cfg = config_mod.load_config(config_path)
    _allow_numba_threads(cfg["graph"]["index_threads"])
    fp = with_pairs(fingerprint(cfg["input"]["path"]), cfg["input"]["pairs"])
    chash = config_mod.config_hash(cfg)
    fp = with_kept_space(fp, cfg, chash)
    rid = run_id(chash, fp["hash"])
    rd = RunDir(os.path.join(cfg["run"]["dir"], rid))
    logs.CONTEXT["run_id"] = rid
    with _tagged(rid, rd.path), rd.lock():
        if not rd.exists():
            _handle_input_change(cfg, chash, fp, rid)
        _clear_stale(rd)
        if fresh and rd.exists():
            log.info("--fresh: discarding the earlier state of run %s (tuning results are kept)", rid)
            _discard(rd)
        if rd.exists():
            m = rd.load()
            if rd.all_done() and upto is None:
                out = os.path.join(cfg["output"]["path"], m["stages"]["publish"]["summary"]["version"])
                if os.path.isdir(out):
                    log.info(
                        "run %s is already complete (same config and input); nothing to do. Output: %s",
                        rid,
                        out,
                    )
                    return {"run_dir": rd.path, "run_id": rid, "already_complete": True, "output": out}
                log.warning(
                    "run %s is complete but its published version folder %s is gone; publishing it again",
                    rid,
                    out,
                )
                m["stages"]["publish"] = {"state": "pending"}
                rd.save(m)
            logs.event(log, "run_resumed", "resuming run %s", rid, run_dir=rd.path)
        else:
            rd.create(
                {
                    "run_id": rid,
                    "config_hash": chash,
                    # the config, input and output folders relative to run.dir, and input files
                    # relative to the input folder: the run directory can be read where the same
                    # storage is mounted elsewhere (RunDir.root resolves them)
                    "roots": relative_roots(
                        cfg["run"]["dir"],
                        config=os.path.dirname(os.path.abspath(config_path)),
                        input=fp["root"],
                        output=cfg["output"]["path"],
                    ),
                    "config_file": os.path.basename(config_path),
                    "settings": config_mod.result_settings(cfg),
                    "input": portable(fp),
                }
            )
            logs.event(
                log,
                "run_started",
                "new run %s: %d rows in %d files",
                rid,
                fp["rows"],
                len(fp["files"]),
                rows=int(fp["rows"]),
                files=len(fp["files"]),
                run_dir=rd.path,
            )
        _check_writable(cfg["output"]["path"])
        ctx = stage_base.Context(rd, cfg, fp, rid)
        # a second job publishing to the same output waits for this one (exit 75 at once)
        with hold_lock(cfg["output"]["path"], f"output {cfg['output']['path']}"):
            run_stages(ctx, upto=upto, fresh=fresh)
            if upto is not None:
                return {"run_dir": rd.path, "run_id": rid, "then": then(rd, cfg) if then else None}
            if cfg["run"]["drop_intermediates"]:
                try:
                    drop_intermediates(rd)
                except OSError as exc:  # tonight's output is published either way
                    log.warning("run.drop_intermediates: could not delete them from %s (%s)", rd.path, exc)
            if cfg["output"]["keep_versions"] or cfg["run"]["keep_runs"]:
                _retention(cfg)
        out = os.path.join(cfg["output"]["path"], rd.summary("publish")["version"])
        _check_gates(rd, cfg, before_publish=False)
        return {"run_dir": rd.path, "run_id": rid, "already_complete": False, "output": out}
