"""What a finished (or failed) `bigsmooth run` tells a scheduler: one record, printed by `run --json`
and logged as the ``run_finished`` event.

Schema :data:`RESULT_SCHEMA` (README, "Machine-readable results"):

- ``schema``: "bigsmooth.run-result/1"; ``status``: "published", "held" (an audit gate failed and
  nothing was published) or "failed" (any other error); ``exit_code`` (the process's);
  ``already_complete``: true when the run had finished before and nothing was done;
- ``run_id``, ``run_dir``, ``output_version``, ``output``, ``audit``, ``report`` (paths; null when
  not known, e.g. a config error before the run existed);
- ``failed_gates`` (names) and ``gates`` ({name: "passed" | "failed" | "off"});
- ``figures``: rows, decisions_changed_rate, and for the decision score neighbour_disagreement and
  auc ({"before", "after"}), graph_recall, night_over_night ({"raw_flip_rate",
  "adjusted_flip_rate"} or null);
- ``error``: {"kind", "message"} when status is "failed" or "held", else null.
"""

import os

from . import artifacts as art
from .atomic import read_json
from .errors import EXIT_OK, BigsmoothError, GateError

RESULT_SCHEMA = "bigsmooth.run-result/1"


def _figures(audit):
    s = audit["scores"][audit["decision_score"]]
    b, a = s["before"], s["after"]
    nn = audit.get("night_over_night")
    prov = audit.get("provenance") or {}
    return {
        "rows": audit["rows"],
        "decision_score": audit["decision_score"],
        "decisions_changed_rate": audit["decisions"]["changed_rate"],
        "neighbour_disagreement": {
            "before": b["neighbour_disagreement"],
            "after": a["neighbour_disagreement"],
        },
        "auc": {"before": b["auc"], "after": a["auc"]} if "auc" in b else None,
        "graph_recall": prov.get("graph_recall"),
        "night_over_night": {
            "raw_flip_rate": nn["raw_flip_rate"],
            "adjusted_flip_rate": nn["adjusted_flip_rate"],
        }
        if nn and nn.get("rows_in_both")
        else None,
    }


def run_result(res=None, exc=None, exit_code=EXIT_OK):
    """The result record of a run: ``res`` is :func:`bigsmooth.pipeline.run_job`'s return value, or
    ``exc`` the error it raised (carrying ``run_id`` and ``run_dir`` once the run was known)."""
    run_dir = res["run_dir"] if res else getattr(exc, "run_dir", None)
    rec = {
        "schema": RESULT_SCHEMA,
        "status": "published",
        "exit_code": exit_code,
        "already_complete": bool(res and res.get("already_complete")),
        "run_id": res["run_id"] if res else getattr(exc, "run_id", None),
        "run_dir": run_dir,
        "output_version": None,
        "output": None,
        "audit": None,
        "report": None,
        "failed_gates": [],
        "gates": {},
        "figures": None,
        "error": None,
    }
    if exc is not None:
        rec["status"] = "failed"
        rec["error"] = {
            "kind": exc.kind if isinstance(exc, BigsmoothError) else type(exc).__name__,
            "message": str(exc),
        }
    audit_path = None
    if res:
        rec["output"] = res["output"]
        audit_path = os.path.join(res["output"], art.OUTPUT_AUDIT)
        rec["report"] = os.path.join(res["output"], art.OUTPUT_REPORT)
    elif isinstance(exc, GateError) and run_dir:
        audit_path = art.AUDIT_REPORT_JSON.path(run_dir)
        rec["report"] = art.AUDIT_REPORT_HTML.path(run_dir)
    if audit_path and os.path.exists(audit_path):
        audit = read_json(audit_path)
        prov = audit.get("provenance") or {}
        rec["audit"] = audit_path
        rec["gates"] = {g["gate"]: g["state"] for g in audit.get("gates", [])}
        rec["failed_gates"] = [g for g, st in rec["gates"].items() if st == "failed"]
        rec["figures"] = _figures(audit)
        if isinstance(exc, GateError):
            rec["status"] = prov.get("status", "held")
        rec["output_version"] = prov.get("output_version")
        if rec["output_version"] and not rec["output"]:
            rec["output"] = os.path.join(prov["output_path"], rec["output_version"])
            rec["report"] = os.path.join(rec["output"], art.OUTPUT_REPORT)
            rec["audit"] = os.path.join(rec["output"], art.OUTPUT_AUDIT)
    return rec


def summary_line(rec):
    """One line for the ``run_finished`` log event."""
    if rec["status"] == "failed":
        return f"run finished: failed (exit {rec['exit_code']}): {rec['error']['kind']}"
    gates = f"; failed gates: {', '.join(rec['failed_gates'])}" if rec["failed_gates"] else ""
    where = f" as {rec['output_version']}" if rec["output_version"] else ""
    done = " (already complete; nothing done)" if rec["already_complete"] else ""
    return f"run finished: {rec['status']}{where}{done} (exit {rec['exit_code']}){gates}"
