"""audit: before/after figures of the smoothing, written as JSON and summarised in the log.

Decisions are taken at a quantile cutoff: the top ``audit.select_rate`` share of rows by score is
selected, before (raw scores) and after (adjusted scores) alike, so shrinking all scores toward the
mean cannot change the figures by itself.
"""
import logging
import os

import numpy as np

from .. import atomic
from ..kernels import laplacian, metrics
from ..table import ids_at_rows
from .graph import load_graph

log = logging.getLogger("bigsmooth.audit")

CAUTION = ("Post-processing changes decisions about people. These figures describe what the smoothing "
           "did to this table; they are no proof of legal compliance. Defer to local law, your compliance "
           "function and counsel. Protected attributes were used only to define what the similarity "
           "measure must ignore.")


CHUNK = 1_000_000


def _knn(rundir):
    return (np.load(rundir.file("graph", "neighbours.npy"), mmap_mode="r"),
            np.load(rundir.file("graph", "distances.npy"), mmap_mode="r"))


def chunked_consistency(decisions, nb):
    """:func:`bigsmooth.kernels.metrics.consistency` over the memory-mapped neighbour lists, a chunk
    of rows at a time (weighted by chunk length)."""
    inconsistency = 0.0
    for s in range(0, len(nb), CHUNK):
        part = np.asarray(nb[s:s + CHUNK])
        rows = np.arange(s, s + len(part))
        inconsistency += (1.0 - metrics.consistency(decisions, part, rows)) * len(part)
    return float(1.0 - inconsistency / len(nb))


def argmax_consistency(classes, nb):
    """1 - mean share of a row's neighbours whose arg-max class differs from the row's."""
    total = 0.0
    for s in range(0, len(nb), CHUNK):
        part = np.asarray(nb[s:s + CHUNK])
        total += np.sum(np.mean(classes[part] != classes[s:s + CHUNK, None], axis=1))
    return float(1.0 - total / len(nb))


def local_lipschitz(f, nb, dist, constant):
    """Violation rate over the neighbour pairs (i, j in kNN(i))."""
    bad = 0
    for s in range(0, len(nb), CHUNK):
        part = np.asarray(nb[s:s + CHUNK])
        d = np.asarray(dist[s:s + CHUNK], dtype=np.float64)
        bad += int(np.sum(np.abs(f[s:s + CHUNK, None] - f[part]) > constant * d))
    return bad / nb.size


def auto_lipschitz(y, nb, dist, rng, sample=200_000):
    """90th percentile of |y_i - y_j| / d_ij over a sample of the neighbour pairs (d > 0)."""
    rows = np.sort(rng.choice(len(nb), size=min(sample, len(nb)), replace=False))
    part = np.asarray(nb[rows])
    d = np.asarray(dist[rows], dtype=np.float64)
    ratio = np.abs(y[rows, None] - y[part])[d > 0] / d[d > 0]
    return float(np.quantile(ratio, 0.9)) if ratio.size else 0.0


def random_pairs(E, m, rng):
    n = E.shape[0]
    a = rng.integers(0, n, m)
    b = rng.integers(0, n, m)
    keep = a != b
    a, b = a[keep], b[keep]
    order = np.argsort(a, kind="stable")
    a, b = a[order], b[order]
    d = np.sqrt(np.sum((np.asarray(E[a], dtype=np.float64) - np.asarray(E[b], dtype=np.float64)) ** 2, axis=1))
    return a, b, d


def figures(s, W, nb, dist, pairs, labels, rate, constant, lo, hi):
    """Audit figures for one score vector ``s`` (n,)."""
    cut = metrics.quantile_cutoff(s, rate)
    sel = s >= cut
    fig = {"mean": float(s.mean()), "sd": float(s.std()), "min": float(s.min()), "max": float(s.max()),
           "cutoff": cut, "selected": int(sel.sum()),
           "neighbour_disagreement": metrics.edge_disagreement(W.indptr, W.indices, W.data, s),
           "consistency": chunked_consistency(sel.astype(np.float64), nb),
           "lipschitz_violations_local": local_lipschitz(s, nb, dist, constant),
           "lipschitz_violations_global": metrics.lipschitz_violations(s, *pairs, constant)}
    if labels is not None:
        known = np.isfinite(labels)
        if known.any():
            lab, sk = labels[known], s[known]
            fig.update(labelled_rows=int(known.sum()), auc=metrics.roc_auc(lab, sk),
                       accuracy_at_cutoff=metrics.accuracy(lab, sel[known]),
                       balanced_accuracy_at_cutoff=metrics.balanced_accuracy(lab, sel[known]))
            if lo >= 0 and hi <= 1:     # scores are probabilities
                fig.update(brier=metrics.brier(lab, sk), log_loss=metrics.log_loss(lab, sk))
    return fig, sel


class RandomRegularGraph:
    """A random graph where every row has the same degree: a circulant graph (row r joined to rows
    r +- o mod n for ``half`` random offsets o) under a random relabelling of the rows. Applied
    without storing a matrix, so the control costs O(n) memory at any size."""

    def __init__(self, n, half, weight, rng):
        self.n, self.weight = n, weight
        self.perm = rng.permutation(n)
        self.offsets = np.sort(rng.choice(np.arange(1, max(2, (n - 1) // 2 + 1)), size=min(half, max(1, (n - 1) // 2)),
                                          replace=False)) if n > 2 else np.array([1])
        self.degree = 2 * len(self.offsets) * weight if n > 2 else weight

    def adjacency_times(self, x):
        z = x[self.perm]
        acc = np.zeros_like(z)
        for o in self.offsets:
            acc += np.roll(z, o) + np.roll(z, -o)
        out = np.empty_like(x)
        out[self.perm] = self.weight * acc
        return out

    def matrix(self):
        """The same graph as scipy CSR (the reference for tests)."""
        import scipy.sparse as sp

        pos = np.arange(self.n)
        rows, cols = [], []
        for o in self.offsets:
            for sgn in (1, -1):
                rows.append(self.perm[pos])
                cols.append(self.perm[(pos - sgn * o) % self.n])
        r, c = np.concatenate(rows), np.concatenate(cols)
        return sp.csr_matrix((np.full(len(r), self.weight), (r, c)), shape=(self.n, self.n))


def random_graph_control(W, y, lam, kind, tol, rng):
    """Smooth ``y`` with the same lam on a random graph with the real graph's mean degree (edges per
    row and mean weight): solves (C + lam (D - R)) f = C y by Jacobi-preconditioned CG."""
    import scipy.sparse.linalg as spla

    n = W.shape[0]
    half = max(1, int(round(W.nnz / (2 * n))))
    R = RandomRegularGraph(n, half, float(W.data.mean()) if W.nnz else 0.0, rng)
    c = np.full(n, R.degree if kind == "random_walk" and R.degree > 0 else 1.0)
    diag = c + lam * R.degree
    A = spla.LinearOperator((n, n), matvec=lambda x: diag * x.ravel() - lam * R.adjacency_times(x.ravel()),
                            dtype=np.float64)
    M = spla.LinearOperator((n, n), matvec=lambda x: x.ravel() / diag, dtype=np.float64)
    x, _ = spla.cg(A, c * y, x0=y.copy(), rtol=tol, M=M, maxiter=10_000)
    return x


def counterfactual_figures(W, y, f, ycf, s, rate):
    """Share of rows whose decision at the quantile cutoff is the same for the score and its
    counterfactual. After smoothing, the counterfactual row is placed at the row's own point of the
    fair space (the fair space ignores the protected attributes), so its adjusted score is one exact
    coordinate update against the solved neighbours: f_cf = (c y_cf + lam (W f)) / (c + lam d), the
    same update that reproduces f from y at convergence."""
    from ..kernels import laplacian

    d = laplacian.degrees(W)
    c = laplacian.row_weights_from_degrees(d, s["laplacian"])
    wf = W @ f
    f_cf = (c * ycf + s["lam"] * wf) / (c + s["lam"] * d)
    cut_b, cut_a = metrics.quantile_cutoff(y, rate), metrics.quantile_cutoff(f, rate)
    return {"same_decision_before": float(np.mean((y >= cut_b) == (ycf >= cut_b))),
            "same_decision_after": float(np.mean((f >= cut_a) == (f_cf >= cut_a))),
            "mean_abs_gap_before": float(np.mean(np.abs(y - ycf))),
            "mean_abs_gap_after": float(np.mean(np.abs(f - f_cf)))}


def pair_figures(rundir, cfg, y, f, rate):
    """Same decision at the quantile cutoff for both rows of each comparable pair (input.pairs)."""
    from ..table import ROW, Source, connect_budget, quote

    con = connect_budget(cfg["run"]["memory_mb"])
    src = Source(con, rundir.load()["input"])
    idq = quote(cfg["input"]["id"])
    t = src.fetch_arrow(con, f"SELECT src.{ROW} AS ra, b.{ROW} AS rb FROM read_parquet($pairs) p "
                             f"JOIN {{src}} ON p.id_a = src.{idq} JOIN (SELECT {ROW}, {idq} FROM {{src}}) b "
                             f"ON p.id_b = b.{idq}", pairs=cfg["input"]["pairs"])
    total = con.execute("SELECT count(*) FROM read_parquet($pairs)", {"pairs": cfg["input"]["pairs"]}).fetchall()[0][0]
    ra, rb = t.column(0).to_numpy(), t.column(1).to_numpy()
    if len(ra) < total:
        log.warning("input.pairs: %d of %d pairs name ids that are not in tonight's table; skipped",
                    total - len(ra), total)
    sb, sa = y >= metrics.quantile_cutoff(y, rate), f >= metrics.quantile_cutoff(f, rate)
    return {"pairs": int(total), "pairs_found": int(len(ra)),
            "same_decision_before": float(np.mean(sb[ra] == sb[rb])) if len(ra) else float("nan"),
            "same_decision_after": float(np.mean(sa[ra] == sa[rb])) if len(ra) else float("nan"),
            "mean_abs_gap_before": float(np.mean(np.abs(y[ra] - y[rb]))) if len(ra) else float("nan"),
            "mean_abs_gap_after": float(np.mean(np.abs(f[ra] - f[rb]))) if len(ra) else float("nan")}


def check_gates(report, gates):
    """[(gate, passed, line)] for the decision score."""
    s = report["scores"][report["decision_score"]]
    b, a = s["before"], s["after"]
    out = []
    if "auc" in b and np.isfinite(b["auc"]):
        drop = (b["auc"] - a["auc"]) / b["auc"] if b["auc"] > 0 else 0.0
        out.append(("max_auc_drop", drop <= gates["max_auc_drop"],
                    f"AUC {b['auc']:.4f} -> {a['auc']:.4f}: relative change {-drop:+.2%} "
                    f"(largest drop allowed {gates['max_auc_drop']:.2%})"))
    out.append(("min_consistency", a["consistency"] >= gates["min_consistency"],
                f"consistency after {a['consistency']:.4f} (minimum {gates['min_consistency']:.4f})"))
    rate = report["decisions"]["changed_rate"]
    out.append(("max_decision_change_rate", rate <= gates["max_decision_change_rate"],
                f"decisions changed {rate:.2%} (limit {gates['max_decision_change_rate']:.2%})"))
    return [{"gate": g, "passed": bool(p), "line": line} for g, p, line in out]


def run(rundir, cfg, fp):
    inp, a = cfg["input"], cfg["audit"]
    W = load_graph(rundir)
    Y = np.load(rundir.file("embed", "scores.npy"))
    F = np.load(rundir.file("solve", "adjusted.npy"))
    E = np.load(rundir.file("embed", "embedding.npy"), mmap_mode="r")
    codes = np.load(rundir.file("embed", "protected.npy"))
    labels = np.load(rundir.file("embed", "label.npy")) if inp["label"] else None
    scan = atomic.read_json(rundir.file("scan", "scan.json"))
    embed = atomic.read_json(rundir.file("embed", "embed.json"))
    solve = atomic.read_json(rundir.file("solve", "solve.json"))
    rate, min_rows = a["select_rate"], a["min_group_rows"]
    lo, hi = inp["score_range"]
    nb, dist = _knn(rundir)
    rng = np.random.default_rng(cfg["run"]["seed"] + 3)
    pairs = random_pairs(E, a["pair_sample"], rng)
    y, f = Y[:, 0], F[:, 0]
    constant = a["lipschitz"] or auto_lipschitz(y, nb, dist, rng)

    per_score = {}
    for j, c in enumerate(inp["scores"]):
        before, _ = figures(Y[:, j], W, nb, dist, pairs, labels, rate, constant, lo, hi)
        after, _ = figures(F[:, j], W, nb, dist, pairs, labels, rate, constant, lo, hi)
        per_score[c] = {"before": before, "after": after}
    # decisions use the first score column
    sel_before = y >= metrics.quantile_cutoff(y, rate)
    sel_after = f >= metrics.quantile_cutoff(f, rate)
    compare = {}
    other = np.load(rundir.file("embed", "compare.npy"))
    counterfactual = None
    if inp["counterfactual_score"]:
        counterfactual = counterfactual_figures(W, y, f, other[:, -1], cfg["solve"], rate)
    pairs_fig = pair_figures(rundir, cfg, y, f, rate) if inp["pairs"] else None
    if inp["compare_scores"]:
        for j, c in enumerate(inp["compare_scores"]):
            fig, sel = figures(other[:, j], W, nb, dist, pairs, labels, rate, constant, lo, hi)
            fig["gap_over_sd"] = {col: metrics.gap_over_sd(codes[:, k], len(scan["levels"][col]), other[:, j], min_rows)
                                  for k, col in enumerate(inp["protected"])}
            fig["decisions_differing_from_adjusted"] = float(np.mean(sel != sel_after))
            compare[c] = fig
    controls = {}
    if a["controls"]:
        sd_y = float(y.std())
        shrunk = y.mean() + (y - y.mean()) * (float(f.std()) / sd_y if sd_y > 0 else 1.0)
        s = cfg["solve"]
        rnd = random_graph_control(W, y, s["lam"], s["laplacian"], s["tol"], np.random.default_rng(cfg["run"]["seed"] + 4))
        for name, v in (("shrink_to_mean", shrunk), ("random_graph", rnd)):
            fig, sel = figures(v, W, nb, dist, pairs, labels, rate, constant, lo, hi)
            fig["gap_over_sd"] = {col: metrics.gap_over_sd(codes[:, j], len(scan["levels"][col]), v, min_rows)
                                  for j, col in enumerate(inp["protected"])}
            controls[name] = fig
    groups = {}
    warnings = []
    for j, col in enumerate(inp["protected"]):
        lv = [v for v, _ in scan["levels"][col]]
        g = codes[:, j]
        m_rows = min(len(nb), CHUNK)        # the first million rows are plenty for a share
        same, mix = metrics.same_group_share(g, np.asarray(nb[:m_rows]), rows=np.arange(m_rows))
        changed_by = []
        for code, level in enumerate(lv):
            m = g == code
            if m.sum() >= min_rows:
                changed_by.append({"group": level, "count": int(m.sum()),
                                   "decisions_changed_rate": float(np.mean(sel_before[m] != sel_after[m]))})
        groups[col] = {
            "before": metrics.group_table(g, lv, y, sel_before, min_rows),
            "after": metrics.group_table(g, lv, f, sel_after, min_rows),
            "gap_over_sd": {"before": metrics.gap_over_sd(g, len(lv), y, min_rows),
                            "after": metrics.gap_over_sd(g, len(lv), f, min_rows)},
            "same_group_neighbours": same, "same_group_if_random": mix,
            "decisions_changed_by_group": changed_by,
        }
        gs = groups[col]["gap_over_sd"]
        if abs(gs["after"]) > abs(gs["before"]) + 1e-12:
            warnings.append(f"the group gap of {col!r} widened: gap/sd {gs['before']:.3f} -> {gs['after']:.3f}")
        elif mix > 0 and same > 1.25 * mix:
            warnings.append(f"{same:.0%} of neighbours share the row's {col!r} group against {mix:.0%} under random "
                            f"mixing: the fair space still groups rows by it, and smoothing can widen its gap")
    for w in warnings:
        log.warning("audit: %s", w)
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
        "lipschitz_constant": constant,
        "lipschitz_constant_source": "audit.lipschitz" if a["lipschitz"] else "90th percentile of raw |y_i - y_j| / d_ij",
        "scores": per_score,
        "controls": controls,
        "compare": compare,
        "counterfactual": counterfactual,
        "pairs": pairs_fig,
        "groups": groups,
        "decisions": {"changed": int(changed.sum()), "changed_rate": float(changed.mean()),
                      "newly_selected": int((sel_after & ~sel_before).sum()),
                      "newly_not_selected": int((sel_before & ~sel_after).sum())},
        "change": {"mean_abs": float(np.abs(change).mean()),
                   "quantiles_abs": {str(q): float(np.quantile(mag, q)) for q in (0.5, 0.9, 0.99, 1.0)},
                   "histogram": [v.tolist() for v in np.histogram(change[:, 0], bins=40)]},
        "largest_changes": [{"id": i, "before": [float(v) for v in Y[r]], "after": [float(v) for v in F[r]]}
                            for i, r in zip(top_ids, top)],
        "leakage": embed["leakage"],
        "warnings": warnings,
        "solver": {k: solve[k] for k in ("method", "status", "sweeps", "final_residual", "lam", "laplacian")},
    }
    if Y.shape[1] > 1:
        # one column per class: the arg-max decision, before and after
        ab, af = np.argmax(Y, axis=1), np.argmax(F, axis=1)
        report["argmax"] = {"changed": int(np.sum(ab != af)), "changed_rate": float(np.mean(ab != af)),
                            "consistency": {"before": argmax_consistency(ab, nb), "after": argmax_consistency(af, nb)},
                            "class_shares": {"before": np.bincount(ab, minlength=Y.shape[1]) / len(ab),
                                             "after": np.bincount(af, minlength=Y.shape[1]) / len(af)}}
    report["gates"] = check_gates(report, cfg["gates"])
    atomic.write_json(os.path.join(rundir.stage_dir("audit"), "audit.json"), report)
    from . import report as html_report

    html_report.write(rundir, cfg, report, Y, F, codes, scan)
    return {"decisions_changed": report["decisions"]["changed"],
            "gates_failed": [g["gate"] for g in report["gates"] if not g["passed"]],
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
    s = report["scores"][report["decision_score"]]
    lines.append(f"  consistency of decisions {s['before']['consistency']:.4f} -> {s['after']['consistency']:.4f}"
                 + "".join(f"; control {k}: {v['consistency']:.4f}" for k, v in report.get("controls", {}).items()))
    for g in report.get("gates", []):
        lines.append(f"  gate {g['gate']}: {'passed' if g['passed'] else 'FAILED'} ({g['line']})")
    for w in report.get("warnings", []):
        lines.append(f"  warning: {w}")
    lines.append("  caution: " + report["caution"])
    return lines
