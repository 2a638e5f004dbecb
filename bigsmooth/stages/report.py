"""The audit as one self-contained HTML page (plots embedded as PNG data URIs; opens offline).

Sections: summary (what changed, gates, warnings), the figures before / after beside the two
controls, score distributions by group, the histogram of changes, the group tables, the tuning
trade-off when ``bigsmooth tune`` has run for this run, and the cautions. matplotlib draws with
the Agg backend (no display needed).
"""
import base64
import html
import io
import os

import numpy as np

from .. import atomic

FIGURE_ROWS = ("consistency", "neighbour_disagreement", "lipschitz_violations_local", "lipschitz_violations_global",
               "auc", "accuracy_at_cutoff", "balanced_accuracy_at_cutoff", "brier", "log_loss", "sd", "cutoff")


def _png(fig):
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=90, bbox_inches="tight")
    import matplotlib.pyplot as plt

    plt.close(fig)
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode()


def _plots(report, Y, F, codes, scan, protected):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    out = {}
    y, f = Y[:, 0], F[:, 0]
    bins = np.linspace(min(y.min(), f.min()), max(y.max(), f.max()), 41)
    if protected:
        col = protected[0]
        levels = [v for v, _ in scan["levels"][col]]
        fig, axes = plt.subplots(1, 2, figsize=(10, 3.4), sharey=True)
        for ax, s, title in ((axes[0], y, "before"), (axes[1], f, "after")):
            for code, lv in enumerate(levels):
                m = codes[:, 0] == code
                if m.sum() >= report.get("min_group_rows", 10):
                    ax.hist(s[m], bins=bins, histtype="step", density=True, label=str(lv))
            ax.set_title(f"{report['decision_score']} {title}, by {col}")
            ax.set_xlabel("score")
        axes[0].set_ylabel("density")
        axes[1].legend(fontsize=8)
        out["distributions"] = _png(fig)
    counts, edges = (np.asarray(v) for v in report["change"]["histogram"])
    fig, ax = plt.subplots(figsize=(6, 3))
    ax.bar(edges[:-1], counts, width=np.diff(edges), align="edge")
    ax.set_xlabel("adjusted - raw score")
    ax.set_ylabel("rows")
    ax.set_title("changes")
    out["changes"] = _png(fig)
    return out


def _table(header, rows):
    h = "".join(f"<th>{html.escape(str(c))}</th>" for c in header)
    body = "".join("<tr>" + "".join(f"<td>{html.escape(_fmt(c))}</td>" for c in r) + "</tr>" for r in rows)
    return f"<table><tr>{h}</tr>{body}</table>"


def _fmt(v):
    if isinstance(v, float):
        return f"{v:.4g}" if np.isfinite(v) else "-"
    return str(v)


def render(report, plots, tune=None):
    """The page as a string."""
    e = html.escape
    s = report["scores"][report["decision_score"]]
    b, a = s["before"], s["after"]
    gates = report.get("gates", [])
    failed = [g for g in gates if not g["passed"]]
    parts = [f"<h1>bigsmooth audit: {report['rows']:,} rows</h1>",
             "<section id='summary'><h2>Summary</h2><ul>",
             f"<li>Decisions: the top {report['select_rate']:.0%} by {e(report['decision_score'])} are selected, "
             f"before and after alike; {report['decisions']['changed']:,} decisions changed "
             f"({report['decisions']['changed_rate']:.2%}).</li>",
             f"<li>Consistency of decisions among neighbours {b['consistency']:.4f} &rarr; {a['consistency']:.4f}.</li>"]
    if "auc" in b:
        parts.append(f"<li>AUC on {b['labelled_rows']:,} labelled rows {b['auc']:.4f} &rarr; {a['auc']:.4f}.</li>")
    cf = report.get("counterfactual")
    if cf:
        parts.append(f"<li>Counterfactual consistency (same decision for the row and its counterfactual score) "
                     f"{cf['same_decision_before']:.4f} &rarr; {cf['same_decision_after']:.4f}.</li>")
    pr = report.get("pairs")
    if pr:
        parts.append(f"<li>Comparable pairs ({pr['pairs_found']:,} of {pr['pairs']:,} found): same decision "
                     f"{pr['same_decision_before']:.4f} &rarr; {pr['same_decision_after']:.4f}.</li>")
    parts.append(f"<li>Gates: {'all passed' if not failed else 'FAILED: ' + ', '.join(g['gate'] for g in failed)}.</li>")
    parts += [f"<li>{e(g['line'])}: {'passed' if g['passed'] else '<b>failed</b>'}</li>" for g in gates]
    parts += [f"<li class='warn'>Warning: {e(w)}</li>" for w in report.get("warnings", [])]
    parts.append("</ul></section>")
    ctrl = report.get("controls", {})
    other = report.get("compare", {})
    header = ["figure", "before", "after"] + [f"control: {k}" for k in ctrl] + [f"compared: {k}" for k in other]
    rows = [[k, b.get(k, float("nan")), a.get(k, float("nan"))] + [c.get(k, float("nan")) for c in ctrl.values()]
            + [c.get(k, float("nan")) for c in other.values()] for k in FIGURE_ROWS if k in b]
    parts += ["<section id='figures'><h2>Before, after and the controls</h2>",
              "<p>The controls show what the figures would say without the neighbour graph: shrinking every score "
              "toward the mean by the same spread reduction (decisions at a quantile cutoff do not move), and "
              "smoothing with the same strength on a random graph of the same degree. A real gain is one the "
              "controls do not reach.</p>", _table(header, rows),
              f"<p>Lipschitz constant L = {report['lipschitz_constant']:.4g} ({e(report['lipschitz_constant_source'])}).</p>",
              "</section>"]
    if "distributions" in plots:
        parts.append(f"<section id='distributions'><h2>Score distributions by group</h2><img alt='distributions' src='{plots['distributions']}'></section>")
    parts.append(f"<section id='changes'><h2>Changes</h2><img alt='changes' src='{plots['changes']}'>")
    parts.append(_table(["id", "before", "after"], [[c["id"], c["before"][0], c["after"][0]] for c in report["largest_changes"]]))
    parts.append("</section><section id='groups'><h2>Groups</h2>")
    for col, g in report["groups"].items():
        after = {r["group"]: r for r in g["after"]}
        rows = []
        for r in g["before"]:
            if r["suppressed"]:
                rows.append([r["group"], r["count"], "suppressed", "", "", "", ""])
                continue
            q = after[r["group"]]
            rows.append([r["group"], r["count"], r["mean_score"], q["mean_score"], r["selection_rate"], q["selection_rate"],
                         f"{q['ratio_to_highest']:.3f}" + (" below 4/5" if q["below_four_fifths"] else "")])
        gs = g["gap_over_sd"]
        parts += [f"<h3>{e(col)}</h3>", _table(["group", "rows", "mean before", "mean after", "selected before",
                                                "selected after", "ratio to highest after"], rows),
                  f"<p>gap/sd {gs['before']:.3f} &rarr; {gs['after']:.3f}; same-group neighbours "
                  f"{g['same_group_neighbours']:.1%} (random mixing {g['same_group_if_random']:.1%}). Groups under "
                  f"the configured size are suppressed. Four-fifths rule: 29 CFR 1607.4(D).</p>"]
    parts.append("</section>")
    if tune:
        parts += ["<section id='tuning'><h2>Tuning</h2>",
                  f"<img alt='trade-off' src='{plots['tradeoff']}'>" if "tradeoff" in plots else "",
                  _table(["lam", "sweeps", "AUC", "AUC drop", "consistency"],
                         [[r["lam"], r["sweeps"], r["auc"], r["auc_drop"], r["consistency"]] for r in tune["path"]]),
                  f"<p>Recommended lam: {e(str(tune.get('recommended')))}.</p></section>"]
    parts += ["<section id='cautions'><h2>Cautions</h2>", f"<p>{e(report['caution'])}</p>",
              "<p>The protected attributes are used only to define what the similarity measure must ignore; they "
              "are not used to set anyone's score.</p></section>"]
    style = ("body{font-family:sans-serif;max-width:1100px;margin:2em auto;color:#222}table{border-collapse:collapse;"
             "margin:.5em 0}td,th{border:1px solid #bbb;padding:3px 8px;text-align:right}th{background:#eee}"
             ".warn{color:#a40}img{max-width:100%}")
    return (f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>bigsmooth audit</title>"
            f"<style>{style}</style></head><body>{''.join(parts)}</body></html>\n")


def write(rundir, cfg, report, Y, F, codes, scan):
    tune_path = rundir.file("tune", "tune.json")
    tune = atomic.read_json(tune_path) if os.path.exists(tune_path) else None
    plots = _plots({**report, "min_group_rows": cfg["audit"]["min_group_rows"]}, Y, F, codes, scan,
                   cfg["input"]["protected"])
    png = rundir.file("tune", "tradeoff.png")
    if tune and os.path.exists(png):
        with open(png, "rb") as fh:      # drawn by bigsmooth.tune
            plots["tradeoff"] = "data:image/png;base64," + base64.b64encode(fh.read()).decode()
    atomic.write_bytes(os.path.join(rundir.stage_dir("audit"), "report.html"), render(report, plots, tune).encode())
