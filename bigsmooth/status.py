"""`bigsmooth status TARGET`: where a job stands, from a config file, an output folder or a run
directory, without touching it (locks are only tried).

The record (``--json``; schema :data:`STATUS_SCHEMA`, documented in README "Status"):

- ``schema``: "bigsmooth.status/1"; ``target`` as given and ``resolved_from`` ("run_dir", "output"
  or "config");
- ``run_id``, ``run_dir``, ``created``, ``config``; ``state``: "running" (a process holds the run's
  lock), "done", "failed" (a stage failed), "interrupted" (a stage was left running and nobody holds
  the lock), "held" (the audit's gates stopped it before publishing) or "pending";
- ``held_by``: the lock holder ("pid N on HOST since T") or null; ``live``: {"stage", "sweep",
  "residual"} of the stage in progress (sweep from the solver's checkpoint) or null;
- ``stages``: {name: {"state", "seconds", "peak_rss_mb", "reused_from", "error"}} in pipeline order;
- ``solver``: {"method", "status", "sweeps", "final_residual", "anchor"} or null (``anchor``:
  solve.stability's record, or null when it is off);
- ``published``: {"version", "output", "current"} (this run's version, and whether the output's
  current version is it) or null; ``status``: "published", "held" or null (not audited yet);
  ``gates``: {name: "passed" | "failed" | "off"}; ``report``: path of the HTML report or null;
- ``disk``: {"run_dir_bytes", "output_versions": [{"version", "bytes", "current", "run_id"}]}.
"""

import json
import os

from . import artifacts as art
from .atomic import read_json
from .errors import InputMissingError
from .rundir import STAGES, RunDir, lock_holder, manifests

STATUS_SCHEMA = "bigsmooth.status/1"


def tree_bytes(path):
    """Bytes of the files under ``path`` (each inode once: hard links shared between runs count in
    each run that holds them, but once inside one folder)."""
    seen, total = set(), 0
    for dirpath, _, files in os.walk(path):
        for f in files:
            try:
                st = os.lstat(os.path.join(dirpath, f))
            except OSError:
                continue
            if (st.st_dev, st.st_ino) not in seen:
                seen.add((st.st_dev, st.st_ino))
                total += st.st_size
    return total


def output_versions(output):
    """[{version, bytes, current, run_id}] of an output folder, oldest first (by when the version
    folder was completed: names only have seconds, and two runs can publish within one)."""
    pointer = os.path.join(output, art.OUTPUT_POINTER)
    current = read_json(pointer)["version"] if os.path.exists(pointer) else None
    out = []
    if not os.path.isdir(output):
        return out
    names = []
    for name in os.listdir(output):
        path = os.path.join(output, name)
        if name.startswith(".") or name in (art.OUTPUT_POINTER, art.OUTPUT_LINK) or not os.path.isdir(path):
            continue
        if not os.path.islink(path):
            names.append((os.stat(path).st_mtime_ns, name))
    for _, name in sorted(names):
        path = os.path.join(output, name)
        out.append(
            {
                "version": name,
                "bytes": tree_bytes(path),
                "current": name == current,
                "run_id": _version_run(path),
            }
        )
    return out


def _version_run(path):
    """The run id a published version folder came from (its provenance), or None."""
    try:
        return (read_json(os.path.join(path, art.OUTPUT_AUDIT)).get("provenance") or {}).get("run_id")
    except (OSError, ValueError):
        return None


def latest_run(run_root, config_path=None):
    """The run directory under ``run_root`` created last, among the runs of ``config_path`` when any
    was made with it (else among all)."""
    runs = []
    for path, m in manifests(run_root):
        mine = config_path is not None and os.path.abspath(RunDir(path).config_path(m)) == os.path.abspath(
            config_path
        )
        runs.append((mine, created_key(m), path))
    if not runs:
        return None
    if any(r[0] for r in runs):
        runs = [r for r in runs if r[0]]
    return max(runs, key=lambda r: (r[1], r[2]))[2]


def created_key(manifest):
    """Sort key of a run's creation: the time to the second, then to the nanosecond when recorded."""
    return (manifest.get("created", ""), manifest.get("created_ns", 0))


def resolve(target):
    """(run directory, how it was found) for a run directory, an output folder or a config file."""
    if os.path.isdir(target) and os.path.exists(os.path.join(target, art.MANIFEST)):
        return os.path.abspath(target), "run_dir"
    if os.path.isdir(target) and os.path.exists(os.path.join(target, art.OUTPUT_POINTER)):
        cur = read_json(os.path.join(target, art.OUTPUT_POINTER))
        candidates = []
        if cur.get("run_dir"):
            candidates.append(os.path.join(target, cur["run_dir"]))
        audit = os.path.join(target, cur["version"], art.OUTPUT_AUDIT)
        if os.path.exists(audit):  # versions published before the pointer named the run directory
            cfg_path = (read_json(audit).get("provenance") or {}).get("config_path")
            if cfg_path and os.path.exists(cfg_path):
                from .config import load_config

                candidates.append(os.path.join(load_config(cfg_path)["run"]["dir"], cur["run_id"]))
        for c in candidates:
            if os.path.exists(os.path.join(c, art.MANIFEST)):
                return os.path.abspath(c), "output"
        raise InputMissingError(
            f"{target} is an output folder, but the run directory of its current version "
            f"{cur['version']} (run {cur['run_id']}) was not found; name the run directory instead"
        )
    if os.path.isfile(target):
        from .config import load_config

        cfg = load_config(target)
        path = latest_run(cfg["run"]["dir"], target)
        if path is None:
            raise InputMissingError(f"no runs yet under {cfg['run']['dir']} (run.dir of {target})")
        return path, "config"
    raise InputMissingError(
        f"{target} is neither a run directory (no {art.MANIFEST}), an output folder (no "
        f"{art.OUTPUT_POINTER}) nor a config file"
    )


def record(target):
    """The status record of ``target`` (see the module docstring)."""
    path, how = resolve(target)
    rd = RunDir(path)
    m = rd.load()
    held = lock_holder(path)
    stages = {}
    for name in STAGES:
        st = m["stages"][name]
        stages[name] = {k: st.get(k) for k in ("state", "seconds", "reused_from", "error")}
        # the runner stores a stage's peak memory in its summary
        stages[name]["peak_rss_mb"] = (st.get("summary") or {}).get("peak_rss_mb", st.get("peak_rss_mb"))
    states = [s["state"] for s in stages.values()]
    running = [n for n, s in stages.items() if s["state"] == "running"]
    if held:
        state = "running"
    elif "failed" in states:
        state = "failed"
    elif running:
        state = "interrupted"
    elif all(s == "done" for s in states):
        state = "done"
    else:
        state = "pending"
    live = None
    if running:
        live = {"stage": running[0], "sweep": None, "residual": None}
        if running[0] == "solve" and art.SOLVE_CHECKPOINT.exists(rd):
            c = art.SOLVE_CHECKPOINT.load(rd)
            live.update(sweep=int(c["sweep"]), residual=float(c["residuals"][-1]))
    solver = None
    if art.SOLVE_INFO.exists(rd):
        s = art.SOLVE_INFO.load(rd)
        solver = {k: s.get(k) for k in ("method", "status", "sweeps", "final_residual", "anchor")}
    output = rd.root("output", m)
    published = None
    version = (m["stages"]["publish"].get("summary") or {}).get("version")
    if version:
        pointer = os.path.join(output, art.OUTPUT_POINTER)
        cur = read_json(pointer)["version"] if os.path.exists(pointer) else None
        published = {"version": version, "output": os.path.join(output, version), "current": cur == version}
    gates, status, report = {}, None, None
    if art.AUDIT_REPORT_JSON.exists(rd):
        audit = art.AUDIT_REPORT_JSON.load(rd)
        gates = {g["gate"]: g["state"] for g in audit.get("gates", [])}
        report = art.AUDIT_REPORT_HTML.path(rd)
        if not published and "failed" in gates.values() and state != "running":
            status = "held"  # the gates stopped the run before publishing
    if status == "held":
        state = "held"
    if published:
        status = "published"
        if os.path.exists(os.path.join(published["output"], art.OUTPUT_REPORT)):
            report = os.path.join(published["output"], art.OUTPUT_REPORT)
    return {
        "schema": STATUS_SCHEMA,
        "target": target,
        "resolved_from": how,
        "run_id": m["run_id"],
        "run_dir": path,
        "created": m.get("created"),
        "config": rd.config_path(m),
        "state": state,
        "held_by": held,
        "live": live,
        "input_rows": m["input"]["rows"],
        "input_files": len(m["input"]["files"]),
        "stages": stages,
        "solver": solver,
        "published": published,
        "status": status,
        "gates": gates,
        "report": report,
        "disk": {"run_dir_bytes": tree_bytes(path), "output_versions": output_versions(output)},
    }


def _mb(b):
    return f"{b / 1e6:,.1f} MB"


def lines(rec):
    """The record for people: header, one line a stage, then solver, publication and disk."""
    out = [
        f"run {rec['run_id']}  created {rec['created']}  input {rec['input_rows']} rows in "
        f"{rec['input_files']} files",
        f"{'stage':<9} {'state':<8} {'seconds':>9}",
    ]
    for name, st in rec["stages"].items():
        secs = f"{st['seconds']:.1f}" if st["seconds"] is not None else "-"
        out.append(
            f"{name:<9} {st['state']:<8} {secs:>9}"
            + (f"  {st['error']}" if st["error"] else "")
            + (f"  (reused from run {st['reused_from']})" if st["reused_from"] else "")
        )
    out += solver_lines(rec["run_dir"])
    state = rec["state"] + (f" (held by {rec['held_by']})" if rec["held_by"] else "")
    if rec["live"]:
        lv = rec["live"]
        state += f"; in stage {lv['stage']}" + (
            f", sweep {lv['sweep']} (residual {lv['residual']:.3e})" if lv["sweep"] is not None else ""
        )
    out.append(f"state:     {state}")
    if rec["published"]:
        p = rec["published"]
        out.append(f"published: {p['version']}" + (" (current)" if p["current"] else " (no longer current)"))
    elif rec["status"] == "held":
        out.append("published: no; held by the audit's gates")
    failed = [g for g, s in rec["gates"].items() if s == "failed"]
    if rec["gates"]:
        out.append("gates:     " + (f"failed: {', '.join(failed)}" if failed else "none failed"))
    if rec["report"]:
        out.append(f"report:    {rec['report']}")
    d = rec["disk"]
    vs = d["output_versions"]
    out.append(
        f"disk:      run directory {_mb(d['run_dir_bytes'])}; output {len(vs)} version(s), "
        f"{_mb(sum(v['bytes'] for v in vs))}"
    )
    return out


def solver_lines(run_dir):
    """The solver's record: method, outcome and residuals (about 20 of them), or its checkpoint."""
    out = []
    if art.SOLVE_INFO.exists(run_dir):
        s = art.SOLVE_INFO.load(run_dir)
        out.append(
            f"solver: {s['method']} ({s['laplacian']}, lam={s['lam']:g}) {s['status']} after {s['sweeps']} "
            f"sweeps; final relative residual {s['final_residual']:.3e}"
        )
        a = s.get("anchor")
        if a:
            out.append(
                f"  solve.stability = {a['weight']:g}: {a['rows_anchored']:,} rows anchored to version {a['version']}"
                if a.get("used")
                else f"  solve.stability = {a['weight']:g}: no row anchored ({a.get('reason', '-')})"
            )
        res = s["residuals"]
        what = "preconditioned residual" if s["method"] == "sweep-cg" else "relative residual"
        step = max(1, len(res) // 20)
        for i in list(range(0, len(res), step)) + ([len(res) - 1] if (len(res) - 1) % step else []):
            out.append(f"  sweep {i:>5}  {what} {res[i]:.3e}")
        for sweep, true in s.get("true_residual_checks", []):
            out.append(f"  sweep {int(sweep):>5}  true relative residual ||Cy - Af|| / ||Cy|| {true:.3e}")
    elif art.SOLVE_CHECKPOINT.exists(run_dir):
        c = art.SOLVE_CHECKPOINT.load(run_dir)
        out.append(
            f"solver: in progress; checkpoint after sweep {c['sweep']}, residual {c['residuals'][-1]:.3e}"
        )
    return out


def as_json(rec):
    return json.dumps(rec, indent=2)
