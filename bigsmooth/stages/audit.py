"""audit: before/after figures of the smoothing, written as JSON and summarised in the log.

Decisions are taken at a quantile cutoff: the top ``audit.select_rate`` share of rows by score is
selected, before (raw scores) and after (adjusted scores) alike, so shrinking all scores toward the
mean cannot change the figures by itself.
"""
import logging
import os

import numpy as np

from .. import atomic
from ..kernels import metrics
from ..table import ids_at_rows
from .graph import load_graph

log = logging.getLogger("bigsmooth.audit")

CAUTION = ("Post-processing changes decisions about people. These figures describe what the smoothing "
           "did to this table; they are no proof of legal compliance. Defer to local law, your compliance "
           "function and counsel. Protected attributes were used only to define what the similarity "
           "measure must ignore.")


def score_figures(W, y, f, labels, select_rate):
    """Figures for one score column: disagreement over edges, spread, labelled-row accuracy."""
    out = {}
    for name, s in (("before", y), ("after", f)):
        cut = metrics.quantile_cutoff(s, select_rate)
        sel = s >= cut
        fig = {"neighbour_disagreement": metrics.edge_disagreement(W.indptr, W.indices, W.data, s),
               "mean": float(s.mean()), "sd": float(s.std()), "min": float(s.min()), "max": float(s.max()),
               "cutoff": cut, "selected": int(sel.sum())}
        if labels is not None:
            known = np.isfinite(labels)
            if known.any():
                lab = labels[known]
                fig.update(labelled_rows=int(known.sum()), auc=metrics.roc_auc(lab, s[known]),
                           accuracy_at_cutoff=metrics.accuracy(lab, sel[known]))
        out[name] = fig
    return out


def run(rundir, cfg, fp):
    inp, a = cfg["input"], cfg["audit"]
    W = load_graph(rundir)
    Y = np.load(rundir.file("embed", "scores.npy"))
    F = np.load(rundir.file("solve", "adjusted.npy"))
    codes = np.load(rundir.file("embed", "protected.npy"))
    labels = np.load(rundir.file("embed", "label.npy")) if inp["label"] else None
    scan = atomic.read_json(rundir.file("scan", "scan.json"))
    embed = atomic.read_json(rundir.file("embed", "embed.json"))
    solve = atomic.read_json(rundir.file("solve", "solve.json"))
    rate, min_rows = a["select_rate"], a["min_group_rows"]

    per_score = {c: score_figures(W, Y[:, j], F[:, j], labels, rate) for j, c in enumerate(inp["scores"])}
    # decisions use the first score column
    y, f = Y[:, 0], F[:, 0]
    sel_before = y >= metrics.quantile_cutoff(y, rate)
    sel_after = f >= metrics.quantile_cutoff(f, rate)
    groups = {}
    for j, col in enumerate(inp["protected"]):
        lv = [v for v, _ in scan["levels"][col]]
        g = codes[:, j]
        groups[col] = {
            "before": metrics.group_table(g, lv, y, sel_before, min_rows),
            "after": metrics.group_table(g, lv, f, sel_after, min_rows),
            "gap_over_sd": {"before": metrics.gap_over_sd(g, len(lv), y, min_rows),
                            "after": metrics.gap_over_sd(g, len(lv), f, min_rows)},
        }
    changed = sel_before != sel_after
    change = F - Y
    mag = np.abs(change).max(axis=1)
    top = np.argsort(-mag, kind="stable")[: a["top_changes"]]
    top_ids = ids_at_rows(fp, inp["id"], top) if len(top) else []
    report = {
        "caution": CAUTION,
        "rows": int(len(y)),
        "decision_score": inp["scores"][0],
        "select_rate": rate,
        "scores": per_score,
        "groups": groups,
        "decisions": {"changed": int(changed.sum()), "changed_rate": float(changed.mean()),
                      "newly_selected": int((sel_after & ~sel_before).sum()),
                      "newly_not_selected": int((sel_before & ~sel_after).sum())},
        "change": {"mean_abs": float(np.abs(change).mean()),
                   "quantiles_abs": {str(q): float(np.quantile(mag, q)) for q in (0.5, 0.9, 0.99, 1.0)}},
        "largest_changes": [{"id": i, "before": [float(v) for v in Y[r]], "after": [float(v) for v in F[r]]}
                            for i, r in zip(top_ids, top)],
        "leakage": embed["leakage"],
        "solver": {k: solve[k] for k in ("method", "status", "sweeps", "final_residual", "lam", "laplacian")},
    }
    atomic.write_json(os.path.join(rundir.stage_dir("audit"), "audit.json"), report)
    return {"decisions_changed": report["decisions"]["changed"],
            "neighbour_disagreement": {c: [v["before"]["neighbour_disagreement"], v["after"]["neighbour_disagreement"]]
                                       for c, v in per_score.items()}}


def summary_lines(report):
    """A short human summary of an audit report."""
    lines = [f"audit of {report['rows']} rows (decisions: top {report['select_rate']:.0%} by {report['decision_score']!r})"]
    for c, v in report["scores"].items():
        b, a = v["before"], v["after"]
        line = f"  {c}: neighbour disagreement {b['neighbour_disagreement']:.3g} -> {a['neighbour_disagreement']:.3g}"
        if "auc" in b:
            line += f"; AUC on {b['labelled_rows']} labelled rows {b['auc']:.4f} -> {a['auc']:.4f}"
        lines.append(line)
    for col, g in report["groups"].items():
        gs = g["gap_over_sd"]
        flags = [r["group"] for r in g["after"] if r.get("below_four_fifths")]
        lines.append(f"  {col}: group gap/sd {gs['before']:.3f} -> {gs['after']:.3f}; "
                     f"below four-fifths after: {', '.join(flags) if flags else 'none'}")
    d = report["decisions"]
    lines.append(f"  decisions changed at the cutoff: {d['changed']} ({d['changed_rate']:.2%})")
    lines.append("  caution: " + report["caution"])
    return lines
