"""Where an artifact came from: one record carried by the audit JSON, the report and every
published Parquet file (key ``bigsmooth.provenance`` of the file's key/value metadata).

The output version's name is chosen once per run, before the audit is written, and kept in the run
directory (publish/pending.json), so the audit, the report and the published files all name the
same version folder, also after an interruption.
"""

import hashlib
import time

from . import __version__, artifacts

PARQUET_KEY = b"bigsmooth.provenance"


def version_name(rundir, run_id):
    """The output version folder of this run: chosen on first call, then read back."""
    if artifacts.PUBLISH_PENDING.exists(rundir):
        return artifacts.PUBLISH_PENDING.load(rundir)["version"]
    version = time.strftime("%Y%m%dT%H%M%SZ", time.gmtime()) + "-" + run_id[:8]
    artifacts.PUBLISH_PENDING.save(rundir, {"version": version})
    return version


def file_sha256(path):
    with open(path, "rb") as fh:
        return hashlib.sha256(fh.read()).hexdigest()


def status_of(gates, on_fail):
    """("published" | "held", the failed gates) for a list of gate records."""
    failed = [g["gate"] for g in gates if g["state"] == "failed"]
    return ("held" if failed and on_fail == "hold" else "published"), failed


def record(rundir, cfg, fp, version, gates):
    """The provenance record of a run's audit and output."""
    from .nightly import table_key

    manifest = rundir.load()
    status, failed = status_of(gates, cfg["gates"]["on_fail"])
    cfg_path = rundir.config_path(manifest)
    try:
        cfg_sha = file_sha256(cfg_path)
    except OSError:
        cfg_sha = ""
    return {
        "written_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "bigsmooth_version": __version__,
        "run_id": manifest["run_id"],
        "config_path": cfg_path,
        "config_file_sha256": cfg_sha,
        "config_overrides": list(_overrides()),
        "settings_hash": manifest["config_hash"],
        "input_path": cfg["input"]["path"],
        "input_rows": int(fp["rows"]),
        "input_files": len(fp["files"]),
        "input_fingerprint": fp["hash"],
        # the table's own fingerprint (input_fingerprint also folds in a kept fair space's run)
        "input_table": table_key(fp),
        "id_column": cfg["input"]["id"],
        "score_columns": list(cfg["input"]["scores"]),
        "adjusted_suffix": cfg["output"]["suffix"],
        "lam": cfg["solve"]["lam"],
        "laplacian": cfg["solve"]["laplacian"],
        "neighbours": cfg["graph"]["neighbours"],
        **_graph_record(rundir),
        "fair_space_from": _space_record(rundir),
        "stability": _anchor_record(rundir),
        "output_path": cfg["output"]["path"],
        "output_version": version if status == "published" else None,
        "status": status,
        "failed_gates": failed,
    }


def _overrides():
    from . import config

    return config.APPLIED


def _space_record(rundir):
    """Where the fair space came from: None when fitted on this run's rows, else the run, version
    and first fitting run it was kept from (embed.fair_space = "previous")."""
    from . import artifacts as art

    return art.EMBED_INFO.load(rundir).get("fair_space_from") if art.EMBED_INFO.exists(rundir) else None


def _anchor_record(rundir):
    """solve.stability's record (weight, the version anchored to, rows anchored), or None."""
    from . import artifacts as art

    return art.SOLVE_ANCHOR_INFO.load(rundir) if art.SOLVE_ANCHOR_INFO.exists(rundir) else None


def _graph_record(rundir):
    """How the neighbour graph was built and its sampled recall (None for an exact search)."""
    from . import artifacts as art

    info = art.GRAPH_INFO.load(rundir) if art.GRAPH_INFO.exists(rundir) else {}
    return {
        "graph_search": info.get("search"),
        "graph_recall": info.get("sampled_recall"),
        "graph_recall_rows": info.get("recall_rows"),
    }


def banner(prov):
    """One line: PUBLISHED or HELD, with the failed gates."""
    if prov["status"] == "held":
        return f"HELD: gate(s) {', '.join(prov['failed_gates'])} failed; nothing was published"
    if prov["failed_gates"]:
        return (
            f"PUBLISHED as {prov['output_version']} although gate(s) {', '.join(prov['failed_gates'])} "
            'failed (gates.on_fail = "publish")'
        )
    return f"PUBLISHED as {prov['output_version']}"
