"""Retention: delete old published versions (``output.keep_versions``) and old run directories
(``run.keep_runs``) of one job, by `bigsmooth prune CONFIG [--dry-run]` or after a successful
publish when either setting is above 0.

Never deleted: the version behind ``current``, the run that made it, a run some process holds
(its lock is tried first and kept while the folder goes), and anything of another job (a run counts
as this job's when its manifest names the same output folder). A folder is first renamed to
``.deleting-NAME`` and then removed, so a half-deleted run or version is never taken for a whole one.
"""

import logging
import os
import shutil

from . import artifacts as art
from . import logs
from .atomic import read_json
from .errors import LockHeldError
from .rundir import RunDir, hold_lock, manifests
from .status import created_key, output_versions, tree_bytes

log = logging.getLogger("bigsmooth.prune")


def _job_runs(run_root, output):
    """[(created, path)] of the run directories under ``run_root`` that publish to ``output``."""
    out = [
        (created_key(m), path)
        for path, m in manifests(run_root)
        if os.path.abspath(RunDir(path).root("output", m)) == os.path.abspath(output)
    ]
    return sorted(out)


def plan(cfg):
    """What retention would delete now: {"versions": [...], "runs": [...], "kept": [...]} with each
    entry's path, bytes and reason."""
    output, run_root = cfg["output"]["path"], cfg["run"]["dir"]
    keep_v, keep_r = cfg["output"]["keep_versions"], cfg["run"]["keep_runs"]
    pointer = os.path.join(output, art.OUTPUT_POINTER)
    cur = read_json(pointer) if os.path.exists(pointer) else {}
    versions, runs, kept = [], [], []
    if keep_v:
        vs = output_versions(output)
        for i, v in enumerate(vs):
            newest = i >= len(vs) - keep_v
            if v["current"] or newest:
                continue
            versions.append(
                {"path": os.path.join(output, v["version"]), "bytes": v["bytes"], "what": "version"}
            )
    if keep_r:
        job = _job_runs(run_root, output)
        for i, (_, path) in enumerate(job):
            if i >= len(job) - keep_r:
                continue
            if os.path.basename(path) == cur.get("run_id"):
                kept.append({"path": path, "why": "made the current version"})
                continue
            runs.append({"path": path, "bytes": tree_bytes(path), "what": "run"})
    return {"versions": versions, "runs": runs, "kept": kept}


def _remove(entry):
    """Rename the folder aside, then delete it; a run is deleted only under its own lock."""
    path = entry["path"]
    aside = os.path.join(os.path.dirname(path), f".deleting-{os.path.basename(path)}")
    if entry["what"] == "run":
        try:
            with hold_lock(path, f"run {path}"):
                os.rename(path, aside)
        except LockHeldError:
            log.info("prune: run %s is in use; kept", path)
            return False
    else:
        os.rename(path, aside)
    shutil.rmtree(aside)
    return True


def prune(cfg, dry_run=False):
    """Apply retention (the output's lock must be held by the caller, or taken here: see
    :func:`prune_job`). Returns the plan with ``deleted`` marks and the bytes freed."""
    p = plan(cfg)
    freed = 0
    for entry in p["versions"] + p["runs"]:
        entry["deleted"] = False
        if dry_run:
            continue
        if _remove(entry):
            entry["deleted"] = True
            freed += entry["bytes"]
    for k, n in (("versions", len(p["versions"])), ("runs", len(p["runs"]))):
        done = sum(e["deleted"] for e in p[k])
        if n:
            logs.event(
                log,
                "pruned",
                "prune: %s %d of %d old %s",
                "would delete" if dry_run else "deleted",
                n if dry_run else done,
                n,
                k,
                what=k,
                count=n if dry_run else done,
                dry_run=dry_run,
            )
    p["bytes_freed"] = freed
    p["dry_run"] = dry_run
    return p


def prune_job(cfg, dry_run=False):
    """`bigsmooth prune`: retention under the output's lock (exit 75 while a job publishes there)."""
    # leftovers of an interrupted prune are finished first
    for root in (cfg["output"]["path"], cfg["run"]["dir"]):
        if os.path.isdir(root) and not dry_run:
            for name in os.listdir(root):
                if name.startswith(".deleting-"):
                    shutil.rmtree(os.path.join(root, name), ignore_errors=True)
    if not os.path.isdir(cfg["output"]["path"]):
        return prune(cfg, dry_run)
    with hold_lock(cfg["output"]["path"], f"output {cfg['output']['path']}"):
        return prune(cfg, dry_run)


def lines(p):
    out = []
    verb = "would delete" if p["dry_run"] else "deleted"
    for e in p["versions"] + p["runs"]:
        state = verb if (p["dry_run"] or e["deleted"]) else "kept (in use)"
        out.append(f"{state:<14} {e['what']:<8} {e['path']}  ({e['bytes'] / 1e6:,.1f} MB)")
    for e in p["kept"]:
        out.append(f"{'kept':<14} {'run':<8} {e['path']}  ({e['why']})")
    total = sum(e["bytes"] for e in p["versions"] + p["runs"]) if p["dry_run"] else p["bytes_freed"]
    out.append(f"{verb} {len(p['versions'])} version(s) and {len(p['runs'])} run(s): {total / 1e6:,.1f} MB")
    return out
