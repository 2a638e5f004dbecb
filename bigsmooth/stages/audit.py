"""audit: before/after figures of the smoothing, written as JSON and summarised in the log.

Decisions are taken at a quantile cutoff: the top ``audit.select_rate`` share of rows by score is
selected, before (raw scores) and after (adjusted scores) alike, so shrinking all scores toward the
mean cannot change the figures by itself.
"""

import logging

import numpy as np

from .. import artifacts as art
from .. import provenance, streams
from ..kernels import influence, laplacian, metrics
from ..table import ids_at_rows

log = logging.getLogger("bigsmooth.audit")

CAUTION = (
    "Post-processing changes decisions about people. These figures describe what the smoothing "
    "did to this table; they are no proof of legal compliance. Defer to local law, your compliance "
    "function and counsel. Protected attributes were used only to define what the similarity "
    "measure must ignore."
)


CHUNK = 1_000_000


def _knn(rundir):
    return art.GRAPH_NEIGHBOURS.load(rundir, mmap=True), art.GRAPH_DISTANCES.load(rundir, mmap=True)


def chunked_consistency(decisions, nb):
    """:func:`bigsmooth.kernels.metrics.consistency` over the memory-mapped neighbour lists, a chunk
    of rows at a time (weighted by chunk length)."""
    inconsistency = 0.0
    for s in range(0, len(nb), CHUNK):
        part = np.asarray(nb[s : s + CHUNK])
        rows = np.arange(s, s + len(part))
        inconsistency += (1.0 - metrics.consistency(decisions, part, rows)) * len(part)
    return float(1.0 - inconsistency / len(nb))


def argmax_consistency(classes, nb):
    """1 - mean share of a row's neighbours whose arg-max class differs from the row's."""
    total = 0.0
    for s in range(0, len(nb), CHUNK):
        part = np.asarray(nb[s : s + CHUNK])
        total += np.sum(np.mean(classes[part] != classes[s : s + CHUNK, None], axis=1))
    return float(1.0 - total / len(nb))


def local_lipschitz(f, nb, dist, constant):
    """Lipschitz check over the neighbour pairs (i, j in kNN(i)): the violation rate among pairs at
    fair-space distance > 0, and the pairs at distance 0 (identical rows) reported apart
    (:func:`bigsmooth.kernels.metrics.lipschitz_summary`)."""
    total = None
    for s in range(0, len(nb), CHUNK):
        part = np.asarray(nb[s : s + CHUNK])
        d = np.asarray(dist[s : s + CHUNK], dtype=np.float64)
        c = metrics.pair_differences(
            np.broadcast_to(f[s : s + CHUNK, None], part.shape), f[part], d, constant
        )
        total = c if total is None else {k: total[k] + c[k] for k in total}
    return metrics.lipschitz_summary(total)


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
    d = np.sqrt(
        np.sum((np.asarray(E[a], dtype=np.float64) - np.asarray(E[b], dtype=np.float64)) ** 2, axis=1)
    )
    return a, b, d


def figures(s, W, nb, dist, pairs, labels, rate, constant, lo, hi):
    """Audit figures for one score vector ``s`` (n,)."""
    cut = metrics.quantile_cutoff(s, rate)
    sel = s >= cut
    fig = {
        "mean": float(s.mean()),
        "sd": float(s.std()),
        "min": float(s.min()),
        "max": float(s.max()),
        "cutoff": cut,
        "selected": int(sel.sum()),
        "neighbour_disagreement": metrics.edge_disagreement(W.indptr, W.indices, W.data, s),
        "neighbour_consistency": chunked_consistency(sel.astype(np.float64), nb),
    }
    loc = local_lipschitz(s, nb, dist, constant)
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


class RandomRegularGraph:
    """A random graph where every row has the same degree: a circulant graph (row r joined to rows
    r +- o mod n for ``half`` random offsets o) under a random relabelling of the rows. Applied
    without storing a matrix, so the control costs O(n) memory at any size."""

    def __init__(self, n, half, weight, rng):
        self.n, self.weight = n, weight
        self.perm = rng.permutation(n)
        self.offsets = (
            np.sort(
                rng.choice(
                    np.arange(1, max(2, (n - 1) // 2 + 1)),
                    size=min(half, max(1, (n - 1) // 2)),
                    replace=False,
                )
            )
            if n > 2
            else np.array([1])
        )
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


def _match_spread(solve, target_sd, t0, step, max_solves):
    """Search the strength t whose solution has sd ``target_sd`` (within 1%): bracket by factors of
    ``step`` from ``t0``, then bisect on log t. ``solve(t, x0)`` returns (x, sd). Returns the best
    (t, sd, x, solves); only the best solution is kept in memory."""
    lo_t, hi_t, best, x = None, None, None, None
    t = max(t0, 1e-6)
    for k in range(1, max_solves + 1):
        x, sd = solve(t, x)
        if best is None or abs(sd - target_sd) < abs(best[1] - target_sd):
            best = (t, sd, x, k)
        if abs(sd - target_sd) <= 0.01 * target_sd:
            break
        if sd > target_sd:
            lo_t = t
        else:
            hi_t = t
        t = (
            float(np.sqrt(lo_t * hi_t))
            if lo_t is not None and hi_t is not None
            else (lo_t * step if lo_t is not None else hi_t / step)
        )
        if not 1e-6 <= t <= 1e9:
            break
    return best[0], best[1], best[2], k


def random_graph_control(W, y, lam, kind, tol, rng, target_sd, max_solves=24, search_rows=200_000):
    """Smooth ``y`` on a random graph with the real graph's mean degree (edges per row and mean
    weight), with the strength chosen so that the spread (sd) of the result equals ``target_sd``, the
    real result's: solves (C + t (D - R)) f = C y by Jacobi-preconditioned CG for strengths t found by
    bisection on log t (the sd falls as t grows: the mean is kept and every other eigen-component
    shrinks by 1 / (1 + t mu_k); the random graph is regular, so both Laplacians behave alike).
    Above ``search_rows`` rows the strength is first searched on a random regular graph of the same
    degree over a sample of that many rows (the sd against t hardly depends on the size of a random
    regular graph), then refined on the full graph from there.

    Returns (f, record) with record = {"strength", "sd", "matched", "solves"}; ``matched`` is false
    when no strength within 1e-6 .. 1e9 reaches the target sd within 1% (then the control's
    scale-dependent figures are not comparable with the real result's)."""
    import scipy.sparse.linalg as spla

    n = W.shape[0]
    half = max(1, int(round(W.nnz / (2 * n))))
    weight = float(W.data.mean()) if W.nnz else 0.0
    R = RandomRegularGraph(n, half, weight, rng)
    sd_y = float(np.std(y))
    if target_sd >= sd_y or R.degree == 0 or sd_y == 0:
        return y.copy(), {
            "strength": 0.0,
            "sd": sd_y,
            "matched": bool(abs(target_sd - sd_y) <= 0.01 * max(sd_y, 1e-300)),
            "solves": 0,
        }

    def solver(graph, yy):
        c = np.full(len(yy), graph.degree if kind == "random_walk" else 1.0)

        def solve(t, x0):
            diag = c + t * graph.degree
            A = spla.LinearOperator(
                (len(yy),) * 2,
                matvec=lambda x: diag * x.ravel() - t * graph.adjacency_times(x.ravel()),
                dtype=np.float64,
            )
            M = spla.LinearOperator((len(yy),) * 2, matvec=lambda x: x.ravel() / diag, dtype=np.float64)
            x, _ = spla.cg(A, c * yy, x0=(yy if x0 is None else x0).copy(), rtol=tol, M=M, maxiter=10_000)
            return x, float(np.std(x))

        return solve

    t0, step, solves = lam, 10.0, 0
    if n > search_rows:
        rows = rng.choice(n, size=search_rows, replace=False)
        sub = RandomRegularGraph(search_rows, half, weight, rng)
        t0, _, _, solves = _match_spread(solver(sub, y[rows]), target_sd, lam, 10.0, max_solves)
        step = 1.25
    t, sd, x, k = _match_spread(solver(R, y), target_sd, t0, step, max_solves)
    return x, {
        "strength": t,
        "sd": sd,
        "matched": bool(abs(sd - target_sd) <= 0.01 * target_sd),
        "solves": k,
        "sample_solves": solves,
    }


def counterfactual_figures(W, y, f, ycf, s, rate, rows, tol):
    """Share of rows whose decision at the quantile cutoff is the same for the score and its
    counterfactual. Before smoothing over all rows; after smoothing for the rows in ``rows``: the
    counterfactual row sits at the row's own point of the fair space (which ignores the protected
    attributes), so rerunning the job with only that row's raw score changed gives exactly
    f'_i = f_i + G_ii (y'_i - y_i), G = (C + lam L)^-1 C (:mod:`bigsmooth.kernels.influence`)."""
    A, c = laplacian.system(W.copy(), s["lam"], s["laplacian"])  # W may be a read-only memmap
    g, step, capped = influence.self_influence(A, c, rows, tol=tol)
    f_cf = f[rows] + g * (ycf[rows] - y[rows])
    cut_b, cut_a = metrics.quantile_cutoff(y, rate), metrics.quantile_cutoff(f, rate)
    same_b = (y >= cut_b) == (ycf >= cut_b)
    return {
        "rows_evaluated": int(len(rows)),
        "all_rows": bool(len(rows) == len(y)),
        "same_decision_before": float(np.mean(same_b[rows])),
        "same_decision_after": float(np.mean((f[rows] >= cut_a) == (f_cf >= cut_a))),
        "same_decision_before_all_rows": float(np.mean(same_b)),
        "mean_abs_gap_before": float(np.mean(np.abs(y[rows] - ycf[rows]))),
        "mean_abs_gap_after": float(np.mean(np.abs(f[rows] - f_cf))),
        "self_influence_mean": float(np.mean(g)) if len(g) else float("nan"),
        "self_influence_tolerance": tol,
        "rows_at_ball_cap": int(np.sum(capped)),
    }


def pair_figures(fp, cfg, y, f, rate):
    """Same decision at the quantile cutoff for both rows of each comparable pair (input.pairs)."""
    from ..table import ROW, Source, connect_budget, quote

    con = connect_budget(cfg["run"]["memory_mb"])
    src = Source(con, fp)
    idq = quote(cfg["input"]["id"])
    t = src.fetch_arrow(
        con,
        f"SELECT src.{ROW} AS ra, b.{ROW} AS rb FROM read_parquet($pairs) p "
        f"JOIN {{src}} ON p.id_a = src.{idq} JOIN (SELECT {ROW}, {idq} FROM {{src}}) b "
        f"ON p.id_b = b.{idq}",
        pairs=cfg["input"]["pairs"],
    )
    total = con.execute(
        "SELECT count(*) FROM read_parquet($pairs)", {"pairs": cfg["input"]["pairs"]}
    ).fetchall()[0][0]
    ra, rb = t.column(0).to_numpy(), t.column(1).to_numpy()
    if len(ra) < total:
        log.warning(
            "input.pairs: %d of %d pairs name ids that are not in tonight's table; skipped",
            total - len(ra),
            total,
        )
    sb, sa = y >= metrics.quantile_cutoff(y, rate), f >= metrics.quantile_cutoff(f, rate)
    return {
        "pairs": int(total),
        "pairs_found": int(len(ra)),
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
    return out


def ratio_changes(before, after):
    """Per group, the four-fifths ratio (selection rate over the highest group's) before and after,
    and its fall (positive = the group's ratio fell)."""
    a = {r["group"]: r for r in after}
    out = []
    for r in before:
        if r["suppressed"] or a.get(r["group"], {}).get("suppressed", True):
            continue
        rb, ra = r["ratio_to_highest"], a[r["group"]]["ratio_to_highest"]
        ok = np.isfinite(rb) and np.isfinite(ra)
        out.append(
            {
                "group": r["group"],
                "ratio_before": rb,
                "ratio_after": ra,
                "ratio_drop": float(rb - ra) if ok else None,
            }
        )
    return out


def neighbour_vote_leakage(codes, levels, protected, nb, rows):
    """{attribute: {"levels": {level: AUC}, "max_auc": ...}} of the neighbour vote
    (:func:`bigsmooth.kernels.metrics.neighbour_vote_auc`) on the sampled rows."""
    part = np.asarray(nb[rows])
    out = {}
    for j, col in enumerate(protected):
        per = {
            lv: metrics.neighbour_vote_auc(codes[:, j], part, rows, code)
            for code, lv in enumerate(levels[col])
        }
        finite = [v for v in per.values() if np.isfinite(v)]
        out[col] = {"levels": per, "max_auc": max(finite) if finite else float("nan")}
    return out


def _sample(n, size, rng):
    return np.arange(n) if n <= size else np.sort(rng.choice(n, size=size, replace=False))


def run(ctx):
    """The audit stage (see the module docstring)."""
    rundir, cfg, fp = ctx.rundir, ctx.cfg, ctx.fp
    inp, a = cfg["input"], cfg["audit"]
    W = art.GRAPH_WEIGHTS.load(rundir, mmap=True)
    Y = art.EMBED_SCORES.load(rundir)
    F = art.SOLVE_ADJUSTED.load(rundir)
    E = art.EMBED_EMBEDDING.load(rundir, mmap=True)
    codes = art.EMBED_PROTECTED.load(rundir)
    labels = art.EMBED_LABEL.load(rundir) if inp["label"] else None
    scan = art.SCAN_INFO.load(rundir)
    embed = art.EMBED_INFO.load(rundir)
    solve = art.SOLVE_INFO.load(rundir)
    rate, min_rows = a["select_rate"], a["min_group_rows"]
    lo, hi = inp["score_range"]
    nb, dist = _knn(rundir)
    rng = streams.rng(cfg["run"]["seed"], "audit.pairs")
    pairs = random_pairs(E, a["pair_sample"], rng)
    y, f = Y[:, 0], F[:, 0]
    constant = a["lipschitz"] or auto_lipschitz(y, nb, dist, rng)
    n = len(y)
    levels = {col: [v for v, _ in scan["levels"][col]] for col in inp["protected"]}

    per_score = {}
    for j, c in enumerate(inp["scores"]):
        before, _ = figures(Y[:, j], W, nb, dist, pairs, labels, rate, constant, lo, hi)
        after, _ = figures(F[:, j], W, nb, dist, pairs, labels, rate, constant, lo, hi)
        per_score[c] = {"before": before, "after": after}
    # decisions use the first score column
    sel_before = y >= metrics.quantile_cutoff(y, rate)
    sel_after = f >= metrics.quantile_cutoff(f, rate)
    compare = {}
    other = art.EMBED_COMPARE.load(rundir)
    counterfactual = None
    if inp["counterfactual_score"]:
        rows = _sample(n, a["counterfactual_rows"], streams.rng(cfg["run"]["seed"], "audit.counterfactual"))
        counterfactual = counterfactual_figures(
            W, y, f, other[:, -1], cfg["solve"], rate, rows, tol=a["counterfactual_tol"]
        )
    pairs_fig = pair_figures(fp, cfg, y, f, rate) if inp["pairs"] else None
    if inp["compare_scores"]:
        for j, c in enumerate(inp["compare_scores"]):
            fig, sel = figures(other[:, j], W, nb, dist, pairs, labels, rate, constant, lo, hi)
            fig["gap_over_sd"] = {
                col: metrics.gap_over_sd(codes[:, k], len(levels[col]), other[:, j], min_rows)
                for k, col in enumerate(inp["protected"])
            }
            fig["decisions_differing_from_adjusted"] = float(np.mean(sel != sel_after))
            compare[c] = fig
    controls = {}
    control_notes = {}
    if a["controls"]:
        sd_y, sd_f = float(y.std()), float(f.std())
        shrunk = y.mean() + (y - y.mean()) * (sd_f / sd_y if sd_y > 0 else 1.0)
        s = cfg["solve"]
        rnd, rec = random_graph_control(
            W,
            y,
            s["lam"],
            s["laplacian"],
            s["tol"],
            streams.rng(cfg["run"]["seed"], "audit.random_graph"),
            target_sd=sd_f,
        )
        control_notes = {"shrink_to_mean": {"sd": float(shrunk.std()), "matched": True}, "random_graph": rec}
        for name, v in (("shrink_to_mean", shrunk), ("random_graph", rnd)):
            fig, sel = figures(v, W, nb, dist, pairs, labels, rate, constant, lo, hi)
            fig["gap_over_sd"] = {
                col: metrics.gap_over_sd(codes[:, j], len(levels[col]), v, min_rows)
                for j, col in enumerate(inp["protected"])
            }
            fig["spread_matched"] = control_notes[name]["matched"]
            controls[name] = fig
    probe_rows = _sample(n, cfg["embed"]["probe_rows"], streams.rng(cfg["run"]["seed"], "audit.vote_sample"))
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
            }
            for i, r in zip(top_ids, top)
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
    report["gates"] = check_gates(report, cfg["gates"])
    version = provenance.version_name(rundir, ctx.run_id)
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
