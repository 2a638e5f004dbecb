"""audit: before/after figures of the smoothing, written as JSON and summarised in the log.

Decisions are taken at a quantile cutoff: the top ``audit.select_rate`` share of rows by score is
selected, before (raw scores) and after (adjusted scores) alike, so shrinking all scores toward the
mean cannot change the figures by itself.
"""

import logging
import os

import numpy as np

from .. import artifacts as art
from .. import atomic, explain, logs, provenance
from ..kernels import metrics
from ..kernels.audit_figures import (
    CHUNK,
    argmax_consistency,
    auto_lipschitz,
    counterfactual_figures,
    neighbour_block,
    neighbour_figures,
    neighbour_vote_leakage,
    random_graph_control,
    random_pairs,
    ratio_changes,
)
from ..progress import Progress
from ..table import ids_at_rows

log = logging.getLogger("bigsmooth.audit")

CAUTION = (
    "Post-processing changes decisions about people. These figures describe what the smoothing "
    "did to this table; they are no proof of legal compliance. Defer to local law, your compliance "
    "function and counsel. Protected attributes were used only to define what the similarity "
    "measure must ignore."
)


def _knn(rundir):
    """The neighbour lists and their distances, read in blocks (RowReaders: a pass over the table
    keeps only its current block resident, where a memory map would keep every page it touched)."""
    return art.GRAPH_NEIGHBOURS.rows(rundir), art.GRAPH_DISTANCES.rows(rundir)


def figures(s, nbr, pairs, labels, rate, constant, lo, hi):
    """Audit figures for one score vector ``s`` (n,); ``nbr`` its neighbour figures from the block
    pass (:func:`neighbour_pass`)."""
    cut = metrics.quantile_cutoff(s, rate)
    sel = s >= cut
    disagreement, consistency, loc = nbr
    fig = {
        "mean": float(s.mean()),
        "sd": float(s.std()),
        "min": float(s.min()),
        "max": float(s.max()),
        "cutoff": cut,
        "selected": int(sel.sum()),
        "neighbour_disagreement": disagreement,
        "neighbour_consistency": consistency,
    }
    a, b, d = pairs
    glob = metrics.lipschitz_summary(metrics.pair_differences(s[a], s[b], d, constant))
    fig.update(
        lipschitz_violations_local=loc["rate"],
        lipschitz_violations_global=glob["rate"],
        zero_distance_pairs_differing=loc["zero_distance_differing"],
        zero_distance_mean_abs_difference=loc["zero_distance_mean_abs_difference"],
        zero_distance_pair_share=loc["zero_distance_share"],
    )
    if labels is not None:
        known = np.isfinite(labels)
        fig["labelled_rows"] = int(known.sum())
        if known.any():
            lab, sk = labels[known], s[known]
            fig.update(
                labelled_rows=int(known.sum()),
                auc=metrics.roc_auc(lab, sk),
                accuracy_at_cutoff=metrics.accuracy(lab, sel[known]),
                balanced_accuracy_at_cutoff=metrics.balanced_accuracy(lab, sel[known]),
            )
            if lo >= 0 and hi <= 1:  # scores are probabilities
                fig.update(brier=metrics.brier(lab, sk), log_loss=metrics.log_loss(lab, sk))
    return fig, sel


def block_task(root, cuts, constant, lo, hi):
    """The neighbour figures' partial sums over rows lo..hi of the run at ``root`` for every vector
    of audit/vectors.npy (a task: it only reads the run directory, so running it twice is
    harmless)."""
    V = art.AUDIT_VECTORS.load(root, mmap=True)
    nb, dist = _knn(root)
    return neighbour_block(V, cuts, art.GRAPH_WEIGHTS.rows(root), nb, dist, constant, lo, hi)


def neighbour_pass(ctx, vectors, rate, constant):
    """Neighbour disagreement, consistency and the local Lipschitz check for each score vector:
    the vectors go to audit/vectors.npy, the rows are cut into blocks of :data:`CHUNK`, one task
    each (here on a thread per core, or on the Dask cluster with run.engine = "dask"), and the
    blocks' sums are added in block order, so the figures do not depend on where the tasks ran."""
    rundir = ctx.rundir
    n = len(vectors[0])
    cuts = [metrics.quantile_cutoff(v, rate) for v in vectors]
    art.AUDIT_VECTORS.folder(rundir)
    V = atomic.new_memmap(art.AUDIT_VECTORS.path(rundir), np.float64, (len(vectors), n))
    for j, v in enumerate(vectors):  # row by row into the file (no second copy of them all)
        V[j] = v
    V.flush()
    atomic.release_pages(V)
    del V
    calls = [(rundir.path, cuts, constant, lo, min(lo + CHUNK, n)) for lo in range(0, n, CHUNK)]
    sizes = [c[4] - c[3] for c in calls]
    prog = Progress(log, "audit neighbour pass (rows)", n)
    blocks = ctx.run_tasks(
        block_task,
        calls,
        sizes,
        "audit neighbour figures (row blocks)",
        done=lambda j: prog.update(sizes[j]),
        threads=True,
    )
    os.unlink(art.AUDIT_VECTORS.path(rundir))
    return neighbour_figures(blocks, n)


def pair_figures(fp, cfg, y, f, rate):
    """Same decision at the quantile cutoff for both rows of each comparable pair (input.pairs)."""
    from ..errors import examples
    from ..table import Source, connect_budget, pair_rows

    con = connect_budget(cfg["run"]["memory_mb"])
    try:
        ra, rb, _, total, unknown = pair_rows(con, Source(con, fp), cfg["input"]["pairs"], cfg["input"]["id"])
    finally:
        con.close()
    if len(ra) < total:
        log.warning(
            "input.pairs: %d of %d pairs name ids that are not in tonight's table (e.g. %s), or a row with "
            "itself; skipped",
            total - len(ra),
            total,
            examples(unknown) if unknown else "-",
        )
    sb, sa = y >= metrics.quantile_cutoff(y, rate), f >= metrics.quantile_cutoff(f, rate)
    return {
        "pairs": int(total),
        "pairs_found": int(len(ra)),
        "unknown_ids_examples": [str(v) for v in unknown],
        "same_decision_before": float(np.mean(sb[ra] == sb[rb])) if len(ra) else float("nan"),
        "same_decision_after": float(np.mean(sa[ra] == sa[rb])) if len(ra) else float("nan"),
        "mean_abs_gap_before": float(np.mean(np.abs(y[ra] - y[rb]))) if len(ra) else float("nan"),
        "mean_abs_gap_after": float(np.mean(np.abs(f[ra] - f[rb]))) if len(ra) else float("nan"),
    }


def _gate(name, state, line):
    return {"gate": name, "state": state, "line": line}


def check_gates(report, gates):
    """One record per gate for the decision score: state "passed", "failed" or "off" (a gate at its
    off value, or one that cannot be evaluated, says why in its line)."""
    s = report["scores"][report["decision_score"]]
    b, a = s["before"], s["after"]
    out = []
    lim = gates["max_auc_drop"]
    if "auc" not in b or not np.isfinite(b["auc"]):
        why = (
            "input.label is not set"
            if "labelled_rows" not in b
            else "no row has a label"
            if b["labelled_rows"] == 0
            else f"the {b['labelled_rows']} labelled rows hold only one outcome"
        )
        out.append(_gate("max_auc_drop", "off", f"AUC drop: off, cannot be evaluated ({why})"))
    elif lim >= 1.0:
        out.append(_gate("max_auc_drop", "off", "AUC drop: off (gates.max_auc_drop = 1)"))
    else:
        drop = (b["auc"] - a["auc"]) / b["auc"] if b["auc"] > 0 else 0.0
        out.append(
            _gate(
                "max_auc_drop",
                "passed" if drop <= lim else "failed",
                f"AUC {b['auc']:.4f} -> {a['auc']:.4f}: relative change {-drop:+.2%} "
                f"(largest drop allowed {lim:.2%})",
            )
        )
    lim = gates["min_neighbour_consistency"]
    v = a["neighbour_consistency"]
    out.append(
        _gate(
            "min_neighbour_consistency",
            "off" if lim <= 0 else ("passed" if v >= lim else "failed"),
            f"neighbour consistency after {v:.4f}" + (" (gate off)" if lim <= 0 else f" (minimum {lim:.4f})"),
        )
    )
    lim = gates["max_decision_change_rate"]
    rate = report["decisions"]["changed_rate"]
    out.append(
        _gate(
            "max_decision_change_rate",
            "off" if lim >= 1 else ("passed" if rate <= lim else "failed"),
            f"decisions changed {rate:.2%}" + (" (gate off)" if lim >= 1 else f" (limit {lim:.2%})"),
        )
    )
    lim = gates["max_selection_ratio_drop"]
    drops = [
        (col, r["group"], r["ratio_drop"])
        for col, g in report["groups"].items()
        for r in g.get("ratio_change", [])
        if r["ratio_drop"] is not None and r["ratio_drop"] > 0
    ]
    worst = max(drops, key=lambda t: t[2], default=None)
    what = (
        f"largest fall of a group's selection-rate ratio {worst[2]:+.3f} ({worst[0]} = {worst[1]})"
        if worst
        else "no group's selection-rate ratio fell"
    )
    state = "off" if lim >= 1 else ("passed" if worst is None or worst[2] <= lim else "failed")
    out.append(
        _gate(
            "max_selection_ratio_drop", state, what + (" (gate off)" if lim >= 1 else f" (limit {lim:.3f})")
        )
    )
    out.append(_night_gate(report.get("night_over_night"), gates["max_added_night_flips"]))
    return out


def _night_gate(nn, lim):
    """gates.max_added_night_flips: adjusted flip rate night over night less the raw one."""
    name = "max_added_night_flips"
    if not nn or not nn["rows_in_both"]:
        return _gate(
            name, "off", "decisions flipped night over night: off, cannot be evaluated (no earlier night)"
        )
    extra = nn["adjusted_flip_rate"] - nn["raw_flip_rate"]
    line = (
        f"decisions flipped night over night: adjusted {nn['adjusted_flip_rate']:.2%}, raw "
        f"{nn['raw_flip_rate']:.2%} ({100 * extra:+.2f} points)"
    )
    if lim >= 1:
        return _gate(name, "off", line + " (gate off)")
    state = "passed" if extra <= lim else "failed"
    hint = (
        '; embed.fair_space = "previous" and solve.stability make them flip less' if state == "failed" else ""
    )
    return _gate(name, state, line + f" (limit {100 * lim:+.2f} points{hint})")


def _sample(n, size, rng):
    return np.arange(n) if n <= size else np.sort(rng.choice(n, size=size, replace=False))


def run(ctx):
    """The audit stage (see the module docstring)."""
    rundir, cfg, fp = ctx.rundir, ctx.cfg, ctx.fp
    inp, a = cfg["input"], cfg["audit"]
    W = art.GRAPH_WEIGHTS.rows(rundir)  # passes read one block of rows' edges at a time
    Y = art.EMBED_SCORES.load(rundir)
    F = art.SOLVE_ADJUSTED.load(rundir)
    E = art.EMBED_EMBEDDING.rows(rundir)  # only the sampled pairs' rows are read
    codes = art.EMBED_PROTECTED.load(rundir)
    labels = art.EMBED_LABEL.load(rundir) if inp["label"] else None
    scan = art.SCAN_INFO.load(rundir)
    embed = art.EMBED_INFO.load(rundir)
    solve = art.SOLVE_INFO.load(rundir)
    rate, min_rows = a["select_rate"], a["min_group_rows"]
    lo, hi = inp["score_range"]
    nb, dist = _knn(rundir)
    rng = ctx.rng("audit.pairs")
    pairs = random_pairs(E, a["pair_sample"], rng)
    y, f = Y[:, 0], F[:, 0]
    constant = a["lipschitz"] or auto_lipschitz(y, nb, dist, rng)
    n = len(y)
    levels = {col: [v for v, _ in scan["levels"][col]] for col in inp["protected"]}

    other = art.EMBED_COMPARE.load(rundir)
    s = cfg["solve"]
    if a["controls"]:
        sd_y, sd_f = float(y.std()), float(f.std())
        shrunk = y.mean() + (y - y.mean()) * (sd_f / sd_y if sd_y > 0 else 1.0)
        rnd, rec = random_graph_control(
            W,
            y,
            s["lam"],
            s["laplacian"],
            s["tol"],
            ctx.rng("audit.random_graph"),
            target_sd=sd_f,
        )
        control_notes = {"shrink_to_mean": {"sd": float(shrunk.std()), "matched": True}, "random_graph": rec}
        control_vectors = {"shrink_to_mean": shrunk, "random_graph": rnd}
    else:
        control_notes, control_vectors = {}, {}
    # every vector's neighbour figures in one pass over the graph (block tasks)
    vectors = (
        [Y[:, j] for j in range(len(inp["scores"]))]
        + [F[:, j] for j in range(len(inp["scores"]))]
        + [other[:, j] for j in range(len(inp["compare_scores"]))]
        + list(control_vectors.values())
    )
    nbr = iter(neighbour_pass(ctx, vectors, rate, constant))
    m = len(inp["scores"])
    nbr_y, nbr_f = [next(nbr) for _ in range(m)], [next(nbr) for _ in range(m)]

    per_score = {}
    for j, c in enumerate(inp["scores"]):
        before, _ = figures(Y[:, j], nbr_y[j], pairs, labels, rate, constant, lo, hi)
        after, _ = figures(F[:, j], nbr_f[j], pairs, labels, rate, constant, lo, hi)
        per_score[c] = {"before": before, "after": after}
    # decisions use the first score column
    sel_before = y >= metrics.quantile_cutoff(y, rate)
    sel_after = f >= metrics.quantile_cutoff(f, rate)
    compare = {}
    counterfactual = None
    if inp["counterfactual_score"]:
        rows = _sample(n, a["counterfactual_rows"], ctx.rng("audit.counterfactual"))
        counterfactual = counterfactual_figures(
            art.GRAPH_WEIGHTS.load(rundir, mmap=True),
            y,
            f,
            other[:, -1],
            cfg["solve"],
            rate,
            rows,
            tol=a["counterfactual_tol"],
        )
    pairs_fig = pair_figures(fp, cfg, y, f, rate) if inp["pairs"] else None
    if inp["compare_scores"]:
        for j, c in enumerate(inp["compare_scores"]):
            fig, sel = figures(other[:, j], next(nbr), pairs, labels, rate, constant, lo, hi)
            fig["gap_over_sd"] = {
                col: metrics.gap_over_sd(codes[:, k], len(levels[col]), other[:, j], min_rows)
                for k, col in enumerate(inp["protected"])
            }
            fig["decisions_differing_from_adjusted"] = float(np.mean(sel != sel_after))
            compare[c] = fig
    controls = {}
    for name, v in control_vectors.items():
        fig, sel = figures(v, next(nbr), pairs, labels, rate, constant, lo, hi)
        fig["gap_over_sd"] = {
            col: metrics.gap_over_sd(codes[:, j], len(levels[col]), v, min_rows)
            for j, col in enumerate(inp["protected"])
        }
        fig["spread_matched"] = control_notes[name]["matched"]
        controls[name] = fig
    probe_rows = _sample(n, cfg["embed"]["probe_rows"], ctx.rng("audit.vote_sample"))
    vote = neighbour_vote_leakage(codes, levels, inp["protected"], nb, probe_rows)
    warn_auc = cfg["embed"]["leakage_warn_auc"]
    groups = {}
    warnings = []
    for j, col in enumerate(inp["protected"]):
        lv = levels[col]
        g = codes[:, j]
        m_rows = min(len(nb), CHUNK)  # the first million rows are plenty for a share
        same, mix = metrics.same_group_share(g, np.asarray(nb[:m_rows]), rows=np.arange(m_rows))
        changed_by = []
        for code, level in enumerate(lv):
            m = g == code
            if m.sum() >= min_rows:
                changed_by.append(
                    {
                        "group": level,
                        "count": int(m.sum()),
                        "decisions_changed_rate": float(np.mean(sel_before[m] != sel_after[m])),
                        "newly_selected": int(np.sum(m & sel_after & ~sel_before)),
                        "newly_not_selected": int(np.sum(m & sel_before & ~sel_after)),
                    }
                )
        before_t = metrics.group_table(g, lv, y, sel_before, min_rows)
        after_t = metrics.group_table(g, lv, f, sel_after, min_rows)
        groups[col] = {
            "before": before_t,
            "after": after_t,
            "ratio_change": ratio_changes(before_t, after_t),
            "gap_over_sd": {
                "before": metrics.gap_over_sd(g, len(lv), y, min_rows),
                "after": metrics.gap_over_sd(g, len(lv), f, min_rows),
            },
            "same_group_neighbours": same,
            "same_group_if_random": mix,
            "decisions_changed_by_group": changed_by,
        }
        gs = groups[col]["gap_over_sd"]
        if abs(gs["after"]) > abs(gs["before"]) + 1e-12:
            warnings.append(
                f"the group gap of {col!r} widened: gap/sd {gs['before']:.3f} -> {gs['after']:.3f}"
            )
        for r in groups[col]["ratio_change"]:
            if r["ratio_drop"] is None:
                continue
            if r["ratio_before"] >= 0.8 > r["ratio_after"]:
                warnings.append(
                    f"{col} = {r['group']} fell below four-fifths of the highest group's selection "
                    f"rate: ratio {r['ratio_before']:.3f} -> {r['ratio_after']:.3f}"
                )
            elif r["ratio_drop"] > 0.001:
                warnings.append(
                    f"the selection-rate ratio of {col} = {r['group']} fell: {r['ratio_before']:.3f} "
                    f"-> {r['ratio_after']:.3f}"
                )
        lin = embed["leakage"].get(col, {}).get("max_fair_space_auc", float("nan"))
        nv = vote[col]["max_auc"]
        if np.isfinite(nv) and nv > warn_auc:
            warnings.append(
                f"leakage: the fair-space neighbours predict {col!r} with AUC {nv:.3f} (neighbour vote; "
                f"linear probe {lin:.3f}; warn above {warn_auc:.2f}): the graph still groups rows by it"
            )
        elif np.isfinite(lin) and lin > warn_auc:
            warnings.append(
                f"leakage: a linear probe on the fair space predicts {col!r} with AUC {lin:.3f} "
                f"(warn above {warn_auc:.2f})"
            )
        elif mix > 0 and same > 1.25 * mix:
            warnings.append(
                f"{same:.0%} of neighbours share the row's {col!r} group against {mix:.0%} under random "
                f"mixing (neighbour-vote AUC {nv:.3f}): the fair space still groups rows by it, and "
                "smoothing can widen its gap"
            )
    changed = sel_before != sel_after
    change = F - Y
    mag = np.abs(change).max(axis=1)
    if not changed.any() or float(mag.max()) < 1e-6 * (hi - lo):
        warnings.append(
            f"the smoothing changed almost nothing: {int(changed.sum())} decisions changed, largest "
            f"|change| {float(mag.max()):.3g} (is solve.lam {cfg['solve']['lam']:g} too small, or the "
            "graph without edges?)"
        )
    for name, rec in control_notes.items():
        if not rec["matched"]:
            warnings.append(
                f"the {name} control could not be matched to the result's spread (sd {rec['sd']:.4g} "
                f"against {float(f.std()):.4g}); its scale-dependent figures are not comparable"
            )
    for w in warnings:
        log.warning("audit: %s", w)
    top = np.argsort(-mag, kind="stable")[: a["top_changes"]]
    top_ids = ids_at_rows(fp, inp["id"], top) if len(top) else []
    # why they moved: the same breakdown as `bigsmooth explain`, for the report's table
    why = [
        explain.breakdown(rundir, int(r), cfg["solve"]["lam"], cfg["solve"]["laplacian"], top=5) for r in top
    ]
    nb_rows = sorted({h["row"] for w in why for h in w["heaviest"]})
    nb_ids = dict(zip(nb_rows, ids_at_rows(fp, inp["id"], nb_rows))) if nb_rows else {}
    for w in why:
        for h in w["heaviest"]:
            h["id"] = nb_ids[h["row"]]
    report = {
        "caution": CAUTION,
        "rows": int(len(y)),
        "decision_score": inp["scores"][0],
        "select_rate": rate,
        "min_group_rows": min_rows,
        "lipschitz_constant": constant,
        "lipschitz_constant_source": "audit.lipschitz"
        if a["lipschitz"]
        else "90th percentile of raw |y_i - y_j| / d_ij",
        "scores": per_score,
        "controls": controls,
        "control_matching": control_notes,
        "compare": compare,
        "counterfactual": counterfactual,
        "pairs": pairs_fig,
        "groups": groups,
        "decisions": {
            "changed": int(changed.sum()),
            "changed_rate": float(changed.mean()),
            "newly_selected": int((sel_after & ~sel_before).sum()),
            "newly_not_selected": int((sel_before & ~sel_after).sum()),
        },
        "change": {
            "mean_abs": float(np.abs(change).mean()),
            "quantiles_abs": {str(q): float(np.quantile(mag, q)) for q in (0.5, 0.9, 0.99, 1.0)},
            "histogram": [v.tolist() for v in np.histogram(change[:, 0], bins=40)],
        },
        "largest_changes": [
            {
                "id": i,
                "before": [float(v) for v in Y[r]],
                "after": [float(v) for v in F[r]],
                "decision_before": bool(sel_before[r]),
                "decision_after": bool(sel_after[r]),
                "groups": {col: levels[col][codes[r, j]] for j, col in enumerate(inp["protected"])},
                "why": why[t],
            }
            for t, (i, r) in enumerate(zip(top_ids, top))
        ],
        "leakage": {
            "linear_probe": embed["leakage"],
            "neighbour_vote": vote,
            "probe_rows": int(len(probe_rows)),
            "warn_above_auc": warn_auc,
        },
        "warnings": warnings,
        "solver": {k: solve[k] for k in ("method", "status", "sweeps", "final_residual", "lam", "laplacian")},
    }
    if Y.shape[1] > 1:
        # one column per class: the arg-max decision, before and after
        ab, af = np.argmax(Y, axis=1), np.argmax(F, axis=1)
        report["argmax"] = {
            "changed": int(np.sum(ab != af)),
            "changed_rate": float(np.mean(ab != af)),
            "neighbour_consistency": {
                "before": argmax_consistency(ab, nb),
                "after": argmax_consistency(af, nb),
            },
            "class_shares": {
                "before": np.bincount(ab, minlength=Y.shape[1]) / len(ab),
                "after": np.bincount(af, minlength=Y.shape[1]) / len(af),
            },
        }
    version = provenance.version_name(rundir, ctx.run_id)
    report["night_over_night"] = night_over_night(cfg, fp, version, y, f, per_score[inp["scores"][0]])
    report["gates"] = check_gates(report, cfg["gates"])
    for g in report["gates"]:
        logs.event(
            log,
            "gate",
            "gate %s: %s (%s)",
            g["gate"],
            g["state"],
            g["line"],
            level=logging.WARNING if g["state"] == "failed" else logging.INFO,
            gate=g["gate"],
            state=g["state"],
        )
    report["provenance"] = provenance.record(rundir, cfg, fp, version, report["gates"])
    art.AUDIT_REPORT_JSON.save(rundir, report)
    from . import report as html_report

    html_report.write(rundir, cfg, report)
    return {
        "decisions_changed": report["decisions"]["changed"],
        "gates_failed": [g["gate"] for g in report["gates"] if g["state"] == "failed"],
        "warnings": len(warnings),
        "neighbour_disagreement": {
            c: [v["before"]["neighbour_disagreement"], v["after"]["neighbour_disagreement"]]
            for c, v in per_score.items()
        },
    }


def gates_line(gates):
    """ "all N gates that are on passed (M off)" or "FAILED: ..."; gates that are off never count as passed."""
    on = [g for g in gates if g["state"] != "off"]
    failed = [g["gate"] for g in on if g["state"] == "failed"]
    off = len(gates) - len(on)
    if failed:
        return f"FAILED: {', '.join(failed)} ({len(on) - len(failed)} of {len(on)} gates that are on passed; {off} off)"
    if not on:
        return f"none on (all {off} gates are off)"
    if len(on) == 1:
        return f"the one gate that is on passed ({off} off)"
    return f"all {len(on)} gates that are on passed ({off} off)"


def night_over_night(cfg, fp, version, y, f, fig):
    """Last night's published version (:func:`nightly.last_night`: the current version, unless it
    was published from tonight's own table) against tonight's first score column (see
    :mod:`bigsmooth.nightly`), or None when there is none. Tonight's ids come from the input files
    by row number; its adjusted scores are clipped to the score range as they will be published."""
    import duckdb
    import pyarrow as pa

    from .. import nightly
    from ..table import Source, connect_budget, quote

    root, inp = cfg["output"]["path"], cfg["input"]
    last, _ = nightly.last_night(root, nightly.table_key(fp))
    if last is None:
        return None
    folder = os.path.join(root, last)
    if last == version or not os.path.exists(os.path.join(folder, art.OUTPUT_AUDIT)):
        return None
    last_audit = atomic.read_json(os.path.join(folder, art.OUTPUT_AUDIT))
    first = inp["scores"][0]
    if first not in last_audit.get("scores", {}):
        log.warning("night over night: the current version %s has no score %r; not compared", last, first)
        return None
    lo, hi = inp["score_range"]
    con = connect_budget(cfg["run"]["memory_mb"])
    try:
        src = Source(con, fp)
        con.register("__tonight", pa.table({"row": np.arange(len(y)), "y": y, "f": np.clip(f, lo, hi)}))
        tonight = (
            f"SELECT s.{quote(inp['id'])} AS id, t.y, t.f FROM (SELECT {quote(inp['id'])}, __bigsmooth_row "
            f"FROM {src.sql}) s JOIN __tonight t ON t.row = s.__bigsmooth_row"
        )
        rec = nightly.compare(
            con,
            nightly.version_select(
                folder,
                inp["id"],
                first,
                last_audit.get("provenance", {}).get("adjusted_suffix", cfg["output"]["suffix"]),
            ),
            tonight,
            nightly.cutoffs(last_audit, first),
            (fig["before"]["cutoff"], fig["after"]["cutoff"]),
            params=src.params,
        )
    except duckdb.Error as exc:  # e.g. last night's columns were named otherwise: no comparison
        log.warning(
            "night over night: %s cannot be compared with tonight: %s", last, str(exc).splitlines()[0]
        )
        return None
    finally:
        con.close()
    rec.update({"last_version": last, "score": first})
    log.info(
        "night over night against %s: %d rows in both, %d added, %d removed; decisions flipped: raw %d, adjusted %d "
        "(%d added by the smoothing)",
        last,
        rec["rows_in_both"],
        rec["rows_added"],
        rec["rows_removed"],
        rec["raw_flips"],
        rec["adjusted_flips"],
        rec["flips_added_by_smoothing"],
    )
    return rec


def summary_lines(report):
    """A short human summary of an audit report."""
    prov = report.get("provenance")
    lines = [provenance.banner(prov)] if prov else []
    lines.append(
        f"audit of {report['rows']} rows (decisions: top {report['select_rate']:.0%} by "
        f"{report['decision_score']!r})"
    )
    for c, v in report["scores"].items():
        b, a = v["before"], v["after"]
        line = f"  {c}: neighbour disagreement {b['neighbour_disagreement']:.3g} -> {a['neighbour_disagreement']:.3g}"
        if "auc" in b and np.isfinite(b["auc"]):
            line += f"; AUC on {b['labelled_rows']} labelled rows {b['auc']:.4f} -> {a['auc']:.4f}"
        lines.append(line)
    for col, g in report["groups"].items():
        gs = g["gap_over_sd"]
        flags = [r["group"] for r in g["after"] if r.get("below_four_fifths")]
        lines.append(
            f"  {col}: group gap/sd {gs['before']:.3f} -> {gs['after']:.3f}; "
            f"below four-fifths after: {', '.join(flags) if flags else 'none'}"
        )
    d = report["decisions"]
    lines.append(f"  decisions changed at the cutoff: {d['changed']} ({d['changed_rate']:.2%})")
    nn = report.get("night_over_night")
    if nn and nn["rows_in_both"]:
        lines.append(
            f"  against {nn['last_version']}: {nn['rows_in_both']} rows in both ({nn['rows_added']} added, "
            f"{nn['rows_removed']} removed); decisions flipped night over night: raw {nn['raw_flip_rate']:.2%}, "
            f"adjusted {nn['adjusted_flip_rate']:.2%} ({nn['flips_added_by_smoothing']} added by the smoothing)"
        )
        prov = report.get("provenance") or {}
        off = [
            name
            for name, on in (
                ('embed.fair_space = "previous"', prov.get("fair_space_from")),
                ("solve.stability", (prov.get("stability") or {}).get("used")),
            )
            if not on
        ]
        if nn["adjusted_flips"] > nn["raw_flips"] and off:
            lines.append(
                f"  more decisions flipped after smoothing than before; {' and '.join(off)} "
                "(off tonight) make them flip less (README, Tonight against last night)"
            )
    s = report["scores"][report["decision_score"]]
    lines.append(
        f"  neighbour consistency of decisions (fair space) {s['before']['neighbour_consistency']:.4f} -> "
        f"{s['after']['neighbour_consistency']:.4f}"
        + "".join(
            f"; control {k}: {v['neighbour_consistency']:.4f}" for k, v in report.get("controls", {}).items()
        )
    )
    cf = report.get("counterfactual")
    if cf:
        lines.append(
            f"  counterfactual: same decision {cf['same_decision_before']:.4f} -> "
            f"{cf['same_decision_after']:.4f} on {cf['rows_evaluated']} rows (exact single-row rerun)"
        )
    gates = report.get("gates", [])
    lines.append(f"  gates: {gates_line(gates)}")
    for g in gates:
        lines.append(
            f"  gate {g['gate']}: {g['state'] if g['state'] != 'failed' else 'FAILED'} ({g['line']})"
        )
    for w in report.get("warnings", []):
        lines.append(f"  warning: {w}")
    lines.append("  caution: " + report["caution"])
    return lines
