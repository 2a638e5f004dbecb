"""The audit as one self-contained HTML page (plots embedded as PNG data URIs; opens offline).

Order of the page: status banner (PUBLISHED / HELD) with a one-line caution, where the figures come
from (provenance), how to read the page, the summary with the gates and warnings, the figures before
and after beside the controls (each with its definition and which direction is better), groups
(four-fifths ratio before and after, decisions changed by group), leakage, score distributions for
every protected attribute, the changes and the largest of them, the solver record, the tuning
trade-off when ``bigsmooth tune`` has run for this run, and the full cautions (once).

Every value from the data or the config passes through :func:`html.escape`. matplotlib draws with
the Agg backend (no display needed). :func:`write` reads what it needs from the run directory, so
``bigsmooth report RUN_DIR`` can draw the page again (for instance after tuning).
"""

import base64
import html
import io
import json
import os

import numpy as np

from .. import artifacts as art
from .. import provenance
from .audit import CAUTION, gates_line

# (key, label, definition, which direction is better)
FIGURES = (
    (
        "neighbour_consistency",
        "Neighbour consistency of decisions (fair space)",
        "1 - mean over rows of |d_i - mean of d over the row's k nearest neighbours in the fair space|, "
        "d = selected at the cutoff",
        "higher",
    ),
    (
        "neighbour_disagreement",
        "Neighbour disagreement",
        "sum of w_ij (f_i - f_j)^2 over graph edges / sum of w_ij",
        "lower",
    ),
    (
        "lipschitz_violations_local",
        "Lipschitz violations, neighbour pairs",
        "share of neighbour pairs at distance d > 0 with |f_i - f_j| > L d",
        "lower",
    ),
    (
        "lipschitz_violations_global",
        "Lipschitz violations, random pairs",
        "share of random pairs at distance d > 0 with |f_i - f_j| > L d",
        "lower",
    ),
    (
        "zero_distance_pairs_differing",
        "Identical neighbours with different scores",
        "share of neighbour pairs at distance 0 (identical in the fair space) whose scores differ",
        "lower",
    ),
    (
        "zero_distance_mean_abs_difference",
        "Identical neighbours: mean |difference|",
        "mean |f_i - f_j| over neighbour pairs at distance 0",
        "lower",
    ),
    (
        "auc",
        "AUC on labelled rows",
        "probability that a random positive outscores a random negative",
        "higher",
    ),
    (
        "accuracy_at_cutoff",
        "Accuracy at the cutoff",
        "share of labelled rows whose decision equals the label",
        "higher",
    ),
    (
        "balanced_accuracy_at_cutoff",
        "Balanced accuracy at the cutoff",
        "mean of the true positive and true negative rates",
        "higher",
    ),
    ("brier", "Brier score", "mean (score - label)^2", "lower"),
    ("log_loss", "Log loss", "mean negative log-likelihood of the labels", "lower"),
    (
        "sd",
        "Spread (sd) of scores",
        "standard deviation over all rows; the controls are matched to it",
        "(context)",
    ),
    ("cutoff", "Cutoff", "score at or above which the top share of rows is selected", "(context)"),
)
SCALE_DEPENDENT = {
    "neighbour_disagreement",
    "lipschitz_violations_local",
    "lipschitz_violations_global",
    "zero_distance_mean_abs_difference",
    "brier",
    "log_loss",
    "sd",
}

ARROW = "&rarr;"
FOUR_FIFTHS_CAUTION = (
    "The four-fifths rule (29 CFR 1607.4(D)) is a US employment-selection rule of thumb, not "
    "the legal test in every domain or country."
)
PROTECTED_CAUTION = "Processing protected attributes needs its own lawful basis and a data-protection review."
FLIP_CAUTION = "People whose decision flips may need notice, an explanation or human review."
# the audit's own caution (in _audit.json and the CLI summary) first, then the ones that also stand
# beside the figures they qualify
CAUTIONS = (CAUTION, FOUR_FIFTHS_CAUTION, PROTECTED_CAUTION, FLIP_CAUTION)


def _png(fig):
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=90, bbox_inches="tight")
    import matplotlib.pyplot as plt

    plt.close(fig)
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode()


def _plots(report, Y, F, codes, levels, protected):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    out = {}
    y, f = Y[:, 0], F[:, 0]
    bins = np.linspace(min(y.min(), f.min()), max(y.max(), f.max()), 41)
    for j, col in enumerate(protected):
        fig, axes = plt.subplots(1, 2, figsize=(10, 3.2), sharey=True)
        for ax, s, title in ((axes[0], y, "before"), (axes[1], f, "after")):
            for code, lv in enumerate(levels[col]):
                m = codes[:, j] == code
                if m.sum() >= report.get("min_group_rows", 10):
                    ax.hist(s[m], bins=bins, histtype="step", density=True, label=str(lv))
            ax.set_title(f"{report['decision_score']} {title}, by {col}")
            ax.set_xlabel("score")
        axes[0].set_ylabel("density")
        axes[1].legend(fontsize=8, title=col)
        out[f"distributions:{col}"] = _png(fig)
    counts, edges = (np.asarray(v) for v in report["change"]["histogram"])
    fig, ax = plt.subplots(figsize=(6, 3))
    ax.bar(edges[:-1], counts, width=np.diff(edges), align="edge")
    ax.set_xlabel("adjusted - raw score")
    ax.set_ylabel("rows")
    ax.set_title("Change of each row's score")
    out["changes"] = _png(fig)
    return out


def fmt(v):
    """The page's one number format: integers with thousands separators, other numbers to 4 decimals
    (scientific below 0.001), '-' for a missing value."""
    if isinstance(v, bool) or v is None:
        return "-" if v is None else ("yes" if v else "no")
    if isinstance(v, (int, np.integer)):
        return f"{int(v):,}"
    if isinstance(v, (float, np.floating)):
        if not np.isfinite(v):
            return "-"
        return f"{v:.3e}" if v != 0 and abs(v) < 1e-3 else f"{v:.4f}"
    return str(v)


def pct(v):
    return f"{100 * v:.2f}%" if v is not None and np.isfinite(v) else "-"


def _space_line(prov):
    kept = prov.get("fair_space_from")
    if not kept:
        return "fitted on this night's rows"
    return (
        f"kept from the run behind version {kept['version']} (run {kept['run_id']}; first fitted by run "
        f"{kept['origin']}); leakage is measured on this night's rows"
    )


def _anchor_line(prov):
    a = prov.get("stability")
    if not a:
        return "off (solve.stability = 0): the published method as it is"
    if not a.get("used"):
        return f"solve.stability = {a['weight']:g}, but no row anchored: {a.get('reason', '-')}"
    return (
        f"solve.stability = {a['weight']:g}: {a['rows_anchored']:,} rows whose raw scores did not change "
        f"pulled towards their adjusted score in version {a['version']}; {a['rows_rescored']:,} re-scored "
        f"and {a['rows_new']:,} new rows free"
    )


def _search_line(prov):
    search = prov.get("graph_search") or "not recorded"
    if prov.get("graph_recall") is None:
        return search + (" (all neighbours found)" if search == "exact" else "")
    return (
        f"{search}; recall@k {prov['graph_recall']:.3f} against an exact search on "
        f"{prov['graph_recall_rows']:,} sampled rows (warned below 0.95)"
    )


def _table(header, rows, cls=""):
    h = "".join(f"<th>{html.escape(str(c))}</th>" for c in header)
    body = "".join(
        "<tr>" + "".join(f"<td>{c if isinstance(c, _Raw) else html.escape(fmt(c))}</td>" for c in r) + "</tr>"
        for r in rows
    )
    return f"<table class='{cls}'><tr>{h}</tr>{body}</table>"


def _night_over_night(nn, kept, anchored=False):
    """The section comparing tonight with the version published before (bigsmooth.nightly); ``kept``:
    the fair space was kept from an earlier run (embed.fair_space = "previous"); ``anchored``: rows
    were pulled towards last night's scores (solve.stability)."""
    e = html.escape

    def pct(v):
        return "-" if v is None else f"{v:.2%}"

    q = nn["adjusted_change"]["quantiles_abs"]
    rows = [
        [
            "rows in both / added / removed",
            f"{nn['rows_in_both']} / {nn['rows_added']} / {nn['rows_removed']}",
        ],
        ["rows re-scored (raw score changed)", nn["rows_rescored"]],
        ["raw |change|, mean (rows in both)", nn["raw_change_mean_abs"]],
        [
            "adjusted |change|: median / 90th / 99th percentile / largest",
            " / ".join(fmt(q[k]) for k in ("0.5", "0.9", "0.99", "1.0")) if nn["rows_in_both"] else "-",
        ],
        ["decisions flipped, raw score", f"{nn['raw_flips']} ({pct(nn['raw_flip_rate'])})"],
        ["decisions flipped, adjusted score", f"{nn['adjusted_flips']} ({pct(nn['adjusted_flip_rate'])})"],
        ["&nbsp;&nbsp;of which the raw score flipped too", nn["flips_explained_by_raw"]],
        ["&nbsp;&nbsp;of which added by the smoothing", nn["flips_added_by_smoothing"]],
        ["raw flips the adjusted decision did not follow", nn["raw_flips_absorbed"]],
        [
            "flips of rows whose raw score did not change",
            f"{nn['flips_with_unchanged_raw']} of {nn['rows_with_unchanged_raw']}",
        ],
    ]
    more = (
        "<p><b>The smoothing made decisions flip more often than the raw scores did.</b> Rows whose own "
        "score did not move can flip when their neighbourhood changes (rows arriving or leaving, "
        "neighbours re-scored, the fair space learned again on a changed population)."
        + (
            ""
            if kept
            else ' The fair space was fitted tonight: <code>embed.fair_space = "previous"</code> keeps '
            "the space of the version before and removes most such flips (README, night over night)."
        )
        + (
            ""
            if anchored
            else " <code>solve.stability</code> (off tonight) pulls rows whose raw score did not change "
            "towards last night's adjusted score, at the price that two similar rows can then differ by "
            "their history (README, night over night)."
        )
        + "</p>"
        if nn["rows_in_both"] and nn["adjusted_flips"] > nn["raw_flips"]
        else ""
    )
    return (
        f"<section id='night'><h2>Tonight against last night</h2><p>Against version {e(nn['last_version'])} "
        f"(the one published before), on {e(nn['score'])}, rows matched by id; each night's decisions at its own "
        "cutoff. Any two versions: <code>bigsmooth diff OUTPUT VERSION_A VERSION_B</code>.</p>"
        + more
        + _table(["figure", "value"], [[_Raw(k), v] for k, v in rows])
        + "</section>"
    )


def _why(t, c):
    """Why one of the largest changes moved: the terms of its update at the solution (the same
    breakdown as `bigsmooth explain ID`) and its heaviest neighbours."""
    w = c["why"]
    e = html.escape
    a = w.get("anchor")
    below = "c (1 + &mu;) + &lambda; d" if a else "c + &lambda; d"
    last = (
        f" + last night's share {fmt(w['anchor_share'][0])} (&mu; c t / ({below}), &mu; = {fmt(a['weight'])}, "
        f"t = {fmt(a['last_adjusted'][0])} in {e(a['version'])})"
        if a
        else ""
    )
    head = (
        f"<h4 id='why-{t}'>Why {e(str(c['id']))} moved</h4><p>Adjusted {fmt(w['adjusted'][0])} = own score's share "
        f"{fmt(w['own_share'][0])} (c y / ({below}), raw {fmt(w['raw'][0])}) + neighbours' share "
        f"{fmt(w['neighbours_share'][0])} (&lambda; &Sigma; w<sub>j</sub> f<sub>j</sub> / ({below}), "
        f"{w['neighbours']} neighbours of total weight d = {fmt(w['degree'])}){last}. Same breakdown: "
        f"<code>bigsmooth explain CONFIG {e(str(c['id']))}</code>.</p>"
    )
    rows = [
        [_Raw(e(str(h["id"]))), h["weight"], h["distance"], h["raw"][0], h["adjusted"][0], h["share"][0]]
        for h in w["heaviest"]
    ]
    return head + _table(["neighbour id", "weight", "fair-space distance", "raw", "adjusted", "share"], rows)


class _Raw(str):
    """Already-escaped HTML for a table cell."""


def _ratio_cell(row):
    flag = " <b>below 4/5</b>" if row["below_four_fifths"] else ""
    return _Raw(html.escape(fmt(row["ratio_to_highest"])) + flag)


def _decision(selected):
    return "selected" if selected else "not selected"


def _arrows(text):
    """Escape a line written for the terminal and give it the page's one arrow style."""
    return html.escape(text).replace(" -&gt; ", f" {ARROW} ")


def _caution(text):
    return f"<p class='caution'>&#9888; {html.escape(text)}</p>"


def render(report, plots, tune=None, applied_lam=None):
    """The page as a string."""
    e = html.escape
    prov = report.get("provenance") or {}
    s = report["scores"][report["decision_score"]]
    b, a = s["before"], s["after"]
    gates = report.get("gates", [])
    held = prov.get("status") == "held"
    parts = [
        f"<div class='banner {'held' if held else 'ok'}'>{e(provenance.banner(prov)) if prov else ''}</div>",
        f"<p class='oneline'>{e(CAUTIONS[0].split('. ')[0])}; this page is no proof of legal compliance "
        "(full cautions at the end).</p>",
    ]
    if report.get("note"):
        parts.append(f"<p class='note'>{e(report['note'])}</p>")
    parts.append(f"<h1>bigsmooth audit: {report['rows']:,} rows</h1>")
    if prov:
        rows = [
            [
                "status",
                prov["status"]
                + (f" (failed: {', '.join(prov['failed_gates'])})" if prov["failed_gates"] else ""),
            ],
            ["output version", prov["output_version"] or "none (held)"],
            ["output folder", prov["output_path"]],
            ["run id", prov["run_id"]],
            ["written (UTC)", prov["written_utc"]],
            ["bigsmooth version", prov["bigsmooth_version"]],
            ["config", prov["config_path"]],
            ["config file sha256", prov["config_file_sha256"]],
            ["settings hash", prov["settings_hash"]],
            ["input", prov["input_path"]],
            ["input rows / files", f"{prov['input_rows']:,} / {prov['input_files']:,}"],
            ["input fingerprint", prov["input_fingerprint"]],
            ["score column(s)", ", ".join(prov["score_columns"])],
            ["lam applied", f"{prov['lam']:g}"],
            ["Laplacian", prov["laplacian"]],
            ["neighbours k", prov["neighbours"]],
            ["neighbour search", _search_line(prov)],
            ["fair space", _space_line(prov)],
            ["night-to-night anchor", _anchor_line(prov)],
        ]
        parts += [
            "<section id='provenance'><h2>Where these figures come from</h2>",
            _table(["item", "value"], rows, "prov"),
            "</section>",
        ]
    parts += [
        "<section id='howto'><h2>How to read this page</h2><ul>",
        f"<li>Decisions: the top {report['select_rate']:.0%} of rows by {e(report['decision_score'])} are "
        "selected, before (raw scores) and after (adjusted scores) alike, so shrinking every score toward "
        "the mean cannot change a decision by itself.</li>",
        f"<li>Each figure reads before {ARROW} after; the column 'better' says which direction is better.</li>",
        "<li>The controls show what the figures would say without the neighbour graph: a real gain is one "
        "the controls do not reach.</li>",
        "<li>Gates are checks that hold the output back when they fail; a gate that is off is shown as off "
        "and never counts as passed.</li></ul></section>",
    ]
    d = report["decisions"]
    summ = [
        f"<li>Decisions changed at the cutoff: {d['changed']:,} ({pct(d['changed_rate'])}); newly selected "
        f"{d['newly_selected']:,}, newly not selected {d['newly_not_selected']:,}.</li>",
        f"<li>Neighbour consistency of decisions in the fair space {fmt(b['neighbour_consistency'])} {ARROW} "
        f"{fmt(a['neighbour_consistency'])} (higher is better).</li>",
    ]
    if "auc" in b and np.isfinite(b["auc"]):
        summ.append(
            f"<li>AUC on {b['labelled_rows']:,} labelled rows {fmt(b['auc'])} {ARROW} {fmt(a['auc'])} "
            f"(relative change {100 * (a['auc'] - b['auc']) / b['auc']:+.2f}%; negative = worse).</li>"
        )
    cf = report.get("counterfactual")
    if cf:
        scope = "all rows" if cf["all_rows"] else f"a seeded sample of {cf['rows_evaluated']:,} rows"
        summ.append(
            f"<li>Counterfactual consistency (same decision for the row and for the model's score with "
            f"its protected attributes changed) {fmt(cf['same_decision_before'])} {ARROW} "
            f"{fmt(cf['same_decision_after'])} on {scope}; 'after' is the exact result of rerunning the "
            f"job with only that row's score changed (self-influence G_ii by local solves, tolerance "
            f"{cf['self_influence_tolerance']:g}). Before, over all rows: "
            f"{fmt(cf['same_decision_before_all_rows'])}.</li>"
        )
    pr = report.get("pairs")
    if pr:
        summ.append(
            f"<li>Comparable pairs ({pr['pairs_found']:,} of {pr['pairs']:,} found): same decision "
            f"{fmt(pr['same_decision_before'])} {ARROW} {fmt(pr['same_decision_after'])}.</li>"
        )
    summ.append(f"<li>Gates: {e(gates_line(gates))}.<ul>")
    summ += [
        f"<li class='gate {g['state']}'><b>{e(g['state'].upper() if g['state'] == 'failed' else g['state'])}"
        f"</b> {e(g['gate'])}: {_arrows(g['line'])}</li>"
        for g in gates
    ]
    summ.append("</ul></li>")
    summ += [f"<li class='warn'>Warning: {_arrows(w)}</li>" for w in report.get("warnings", [])]
    parts += [
        "<section id='summary'><h2>Summary</h2><ul>",
        *summ,
        "</ul>",
        _caution(FLIP_CAUTION),
        "</section>",
    ]

    ctrl = report.get("controls", {})
    other = report.get("compare", {})
    header = (
        ["figure", "definition", "better", "before", "after"]
        + [f"control: {k}" for k in ctrl]
        + [f"compared: {k}" for k in other]
    )
    rows = []
    for key, label, definition, better in FIGURES:
        if key not in b:
            continue
        row = [label, definition, better, b.get(key), a.get(key)]
        for c in ctrl.values():
            v = c.get(key)
            row.append(
                _Raw(e(fmt(v)) + " <i>(not comparable)</i>")
                if key in SCALE_DEPENDENT and not c.get("spread_matched", True)
                else v
            )
        row += [c.get(key) for c in other.values()]
        rows.append(row)
    for col in report["groups"]:
        row = [
            f"Group gap / sd: {col}",
            "largest minus smallest group mean, over the sd of all scores",
            "lower",
            report["groups"][col]["gap_over_sd"]["before"],
            report["groups"][col]["gap_over_sd"]["after"],
        ]
        row += [c.get("gap_over_sd", {}).get(col) for c in ctrl.values()]
        row += [c.get("gap_over_sd", {}).get(col) for c in other.values()]
        rows.append(row)
    cm = report.get("control_matching", {})
    matching = "; ".join(
        f"{k}: sd {fmt(v['sd'])}"
        + (f", strength {v['strength']:.4g}" if "strength" in v else "")
        + ("" if v["matched"] else " (NOT matched)")
        for k, v in cm.items()
    )
    parts += [
        "<section id='figures'><h2>Before, after and the controls</h2>",
        "<p>Controls: shrinking every score toward the mean by the same spread reduction (decisions at a "
        "quantile cutoff do not move), and smoothing on a random graph of the same degree whose strength "
        f"is chosen so that its spread (sd) equals the result's. {e(matching)}.</p>",
        _table(header, rows, "figs"),
        f"<p>Lipschitz constant L = {report['lipschitz_constant']:.4g} "
        f"({e(report['lipschitz_constant_source'])}). Pairs at fair-space distance 0 are kept out of the "
        "violation rates and shown on their own rows.</p>",
        "</section>",
    ]

    parts.append("<section id='groups'><h2>Groups</h2>")
    for col, g in report["groups"].items():
        after = {r["group"]: r for r in g["after"]}
        changed = {r["group"]: r for r in g.get("decisions_changed_by_group", [])}
        rows = []
        for r in g["before"]:
            if r["suppressed"]:
                rows.append([r["group"], r["count"], "suppressed", "", "", "", "", "", ""])
                continue
            q = after[r["group"]]
            ch = changed.get(r["group"], {})
            rows.append(
                [
                    r["group"],
                    r["count"],
                    r["mean_score"],
                    q["mean_score"],
                    pct(r["selection_rate"]),
                    pct(q["selection_rate"]),
                    _ratio_cell(r),
                    _ratio_cell(q),
                    pct(ch.get("decisions_changed_rate")),
                ]
            )
        gs = g["gap_over_sd"]
        parts += [
            f"<h3>{e(col)}</h3>",
            _table(
                [
                    "group",
                    "rows",
                    "mean score before",
                    "mean score after",
                    "selected before",
                    "selected after",
                    "four-fifths ratio before",
                    "four-fifths ratio after",
                    "decisions changed",
                ],
                rows,
            ),
            f"<p>Group gap / sd {fmt(gs['before'])} {ARROW} {fmt(gs['after'])}. The four-fifths ratio is the "
            "group's selection rate over the highest group's; below 0.8 is flagged. Groups under "
            f"{report.get('min_group_rows', 10)} rows are suppressed.</p>",
        ]
    parts += [_caution(FOUR_FIFTHS_CAUTION), "</section>"]

    lk = report.get("leakage", {})
    if lk:
        rows = []
        for col, v in lk.get("neighbour_vote", {}).items():
            lin = lk.get("linear_probe", {}).get(col, {}).get("levels", {})
            for lv, auc in v["levels"].items():
                rows.append(
                    [col, lv, lin.get(lv, {}).get("features_auc"), lin.get(lv, {}).get("fair_space_auc"), auc]
                )
        parts += [
            "<section id='leakage'><h2>Leakage: can the fair space still tell the groups apart?</h2>",
            "<p>AUC of predicting each protected level (0.5 = no better than chance; higher is worse). The linear "
            "probe is a least-squares fit on a sample; the fair space is built to defeat it, so it reads near "
            "0.5 by construction. The neighbour vote scores each row by the share of its fair-space neighbours "
            "in the level: a nonlinear probe of what the graph itself uses. A warning is raised above "
            f"{lk.get('warn_above_auc', float('nan')):.2f} (embed.leakage_warn_auc), on "
            f"{lk.get('probe_rows', 0):,} sampled rows.</p>",
            _table(
                [
                    "attribute",
                    "level",
                    "linear probe: raw features",
                    "linear probe: fair space",
                    "neighbour vote: fair space",
                ],
                rows,
            ),
            _caution(PROTECTED_CAUTION),
            "</section>",
        ]

    parts.append("<section id='distributions'><h2>Score distributions by group</h2>")
    parts += [
        f"<img alt='score distributions by {e(k.split(':', 1)[1])}' src='{v}'>"
        for k, v in plots.items()
        if k.startswith("distributions:")
    ]
    parts.append("</section>")
    parts.append(f"<section id='changes'><h2>Changes</h2><img alt='changes' src='{plots['changes']}'>")
    q = report["change"]["quantiles_abs"]
    parts.append(
        f"<p>|change|: median {fmt(q['0.5'])}, 90th percentile {fmt(q['0.9'])}, 99th {fmt(q['0.99'])}, "
        f"largest {fmt(q['1.0'])}; mean {fmt(report['change']['mean_abs'])}.</p>"
    )
    big = report["largest_changes"]
    if big:
        cols = list(big[0].get("groups", {}))
        rows = [
            [
                _Raw(f"<a href='#why-{t}'>{e(str(c['id']))}</a>" if "why" in c else e(str(c["id"]))),
                c["before"][0],
                c["after"][0],
                c["after"][0] - c["before"][0],
                f"{_decision(c['decision_before'])} {chr(8594)} {_decision(c['decision_after'])}"
                if "decision_before" in c
                else "",
                "yes" if c.get("decision_before") != c.get("decision_after") else "no",
            ]
            + [c["groups"][k] for k in cols]
            for t, c in enumerate(big)
        ]
        parts += [
            "<h3>Largest changes</h3>",
            _table(["id", "before", "after", "change", "decision", "flipped"] + cols, rows),
        ]
        parts += [_why(t, c) for t, c in enumerate(big) if "why" in c]
    parts += [_caution(FLIP_CAUTION), "</section>"]
    nn = report.get("night_over_night")
    if nn:
        prov = report.get("provenance") or {}
        parts.append(
            _night_over_night(
                nn, bool(prov.get("fair_space_from")), bool((prov.get("stability") or {}).get("used"))
            )
        )

    sv = report.get("solver", {})
    if sv:
        parts += [
            "<section id='solver'><h2>Solver record</h2>",
            _table(
                ["method", "Laplacian", "lam", "status", "sweeps", "final relative residual"],
                [
                    [
                        sv["method"],
                        sv["laplacian"],
                        f"{sv['lam']:g}",
                        sv["status"],
                        sv["sweeps"],
                        f"{sv['final_residual']:.3e}",
                    ]
                ],
            ),
            "</section>",
        ]
    if tune:
        rec = tune.get("recommended")
        parts += [
            "<section id='tuning'><h2>Tuning</h2>",
            f"<p><b>Applied lam {applied_lam:g}; recommended lam "
            f"{'none (no lam kept the AUC within budget)' if rec is None else f'{rec:g}'}</b> "
            f"(best neighbour consistency with an AUC drop within {pct(tune['auc_drop_budget'])}, on "
            f"{tune['tuning_rows']:,} labelled rows; {tune['holdout_rows']:,} held out).</p>",
        ]
        parts += [f"<p class='warn'>Warning: {_arrows(w)}</p>" for w in tune.get("warnings", [])]
        parts.append(f"<img alt='trade-off' src='{plots['tradeoff']}'>" if "tradeoff" in plots else "")
        hold = tune["holdout_rows"] > 0
        rows = [
            [f"{r['lam']:g}", r["sweeps"], r["auc"], f"{-100 * r['auc_drop']:+.2f}%", r["consistency"]]
            + ([r["holdout_auc"], r["holdout_consistency"]] if hold else [])
            for r in tune["path"]
        ]
        parts += [
            _table(
                ["lam", "sweeps", "AUC", "AUC change (relative; negative = worse)", "neighbour consistency"]
                + (["hold-out AUC", "hold-out consistency"] if hold else []),
                rows,
            ),
            "</section>",
        ]
    parts += [
        "<section id='cautions'><h2>Cautions</h2><ul>",
        *[f"<li>{e(c)}</li>" for c in CAUTIONS],
        "</ul></section>",
    ]
    style = (
        "body{font-family:sans-serif;max-width:1150px;margin:1.5em auto;color:#222}table{border-collapse:collapse;"
        "margin:.5em 0}td,th{border:1px solid #bbb;padding:3px 8px;text-align:right;vertical-align:top}"
        "th{background:#eee}table.figs td:nth-child(2){text-align:left;font-size:85%;color:#555;max-width:22em}"
        "table.figs td:first-child,table.prov td{text-align:left}.warn{color:#a40}img{max-width:100%}"
        ".banner{font-size:1.3em;font-weight:bold;padding:.6em 1em;border-radius:4px}"
        ".banner.ok{background:#e3f4e3;border:1px solid #6a6}.banner.held{background:#fbe3e0;border:1px solid #c44}"
        ".oneline,.caution{font-size:90%;color:#555}.note{font-weight:bold;color:#345}"
        ".gate.failed{color:#b00}.gate.off{color:#777}"
    )
    return (
        f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>bigsmooth audit "
        f"{e(prov.get('run_id', ''))}</title><style>{style}</style></head><body>{''.join(parts)}</body></html>\n"
    )


_PLOTS = {}  # {what the plots are drawn from: the plots}, the last drawn only


def write(rundir, cfg, report):
    """Draw the page for ``report`` from the arrays of the run directory and write audit/report.html."""
    Y = art.EMBED_SCORES.load(rundir, mmap=True)
    F = art.SOLVE_ADJUSTED.load(rundir, mmap=True)
    codes = art.EMBED_PROTECTED.load(rundir, mmap=True)
    scan = art.SCAN_INFO.load(rundir)
    protected = cfg["input"]["protected"]
    levels = {c: [v for v, _ in scan["levels"][c]] for c in protected}
    tune = art.TUNE_INFO.load(rundir) if art.TUNE_INFO.exists(rundir) else None
    # the audit stage draws the page and publish draws it again with the provenance: the plots of
    # the same arrays are drawn once a process (matplotlib takes about half a second for them)
    key = json.dumps(
        [
            os.path.abspath(art.SOLVE_ADJUSTED.path(rundir)),
            os.stat(art.SOLVE_ADJUSTED.path(rundir)).st_mtime_ns,
            report["decision_score"],
            report["change"]["histogram"],
            report.get("min_group_rows", 10),
            levels,
            protected,
        ],
        default=str,
    )
    if key not in _PLOTS:
        _PLOTS.clear()
        _PLOTS[key] = _plots(report, np.asarray(Y), np.asarray(F), np.asarray(codes), levels, protected)
    plots = dict(_PLOTS[key])
    if tune and art.TUNE_PLOT.exists(rundir):  # drawn by bigsmooth.tune
        plots["tradeoff"] = "data:image/png;base64," + base64.b64encode(art.TUNE_PLOT.load(rundir)).decode()
    page = render(
        {**report, "note": cfg["audit"]["report_note"]}, plots, tune, applied_lam=cfg["solve"]["lam"]
    )
    art.AUDIT_REPORT_HTML.save(rundir, page.encode())
