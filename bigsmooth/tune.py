"""Choosing the smoothing strength: solve a path of lam values on the run's graph and weigh accuracy
against consistency on the labelled rows.

``bigsmooth tune CONFIG`` runs the job's stages up to ``order`` (the same run directory as
``bigsmooth run``, so nothing is computed twice), then for each lam (ascending) scales the split
graph and solves, warm-starting from the previous lam's solution. For each it computes, on the
labelled rows used for tuning: AUC, its relative drop against the raw scores, and the consistency of
the decisions at the quantile cutoff among fair-space neighbours. It recommends the lam with the
best consistency whose AUC drop is within the budget (default gates.max_auc_drop, 1% relative:
common practice). With ``--holdout F`` a share F of the labelled rows (chosen by a seeded draw) is
kept out of the choice and the recommended lam is reported on them as well.

Writes ``<run dir>/tune/tune.json`` and ``tune/tradeoff.png``. The next ``bigsmooth run`` that publishes
draws the report again with the trade-off in it ("applied lam X; recommended lam Y"); for a run that
has already finished, ``bigsmooth report RUN_DIR`` draws it again.
"""

import logging

import numpy as np

from . import artifacts as art
from . import atomic, streams
from .errors import ConfigError
from .kernels import laplacian, metrics, sweepcg

log = logging.getLogger("bigsmooth.tune")

DEFAULT_LAMS = (0.1, 0.3, 1.0, 3.0, 10.0, 30.0)


def recommend(path, budget):
    """The lam with the highest consistency among those whose AUC drop is within ``budget``."""
    ok = [r for r in path if r["auc_drop"] <= budget]
    return max(ok, key=lambda r: (r["consistency"], -r["lam"]))["lam"] if ok else None


def tune_run(rd, cfg, lams, budget, holdout):
    inp, s = cfg["input"], cfg["solve"]
    if not inp["label"]:
        raise ConfigError(
            "tuning needs labelled rows: set input.label to a 0/1 outcome column (null where unknown)"
        )
    Y = art.EMBED_SCORES.load(rd)
    labels = art.EMBED_LABEL.load(rd)
    nb = art.GRAPH_NEIGHBOURS.load(rd, mmap=True)
    perm = art.ORDER_PERM.load(rd)
    split = art.load_split(rd)
    n = len(Y)
    deg = np.empty(n)
    deg[perm] = split.degree
    c = laplacian.row_weights_from_degrees(deg, s["laplacian"])
    anchor = art.SOLVE_ANCHOR_INFO.load(rd) if art.SOLVE_ANCHOR_INFO.exists(rd) else {}
    if anchor.get("used"):
        # the run's solve.stability anchor, as its solve stage had it: every lam is tried with it
        from .stages.solve import anchored

        rows, target = (art.SOLVE_ANCHOR.load(rd, member=m) for m in ("rows", "target"))
        c, b = anchored(c, Y, rows, target, anchor["weight"])
    else:
        b = c[:, None] * Y
    b = b[perm]
    known = np.flatnonzero(np.isfinite(labels))
    if len(known) < 20:
        raise ConfigError(f"tuning needs labelled rows; only {len(known)} rows have a label")
    rng = streams.rng(cfg["run"]["seed"], "tune.holdout")
    held = np.zeros(n, dtype=bool)
    if holdout > 0:
        held[rng.choice(known, size=int(round(holdout * len(known))), replace=False)] = True
    use = known[~held[known]]
    rate = cfg["audit"]["select_rate"]
    nb_use = np.asarray(nb[use])

    def figures(F, rows, nbr):
        f = F[:, 0]
        sel = (f >= metrics.quantile_cutoff(f, rate)).astype(np.float64)
        return metrics.roc_auc(labels[rows], f[rows]), metrics.consistency(sel, nbr, rows)

    auc0, cons0 = figures(Y, use, nb_use)
    path = []
    x0 = Y[perm]
    cold = True
    for lam in sorted(lams):
        system = sweepcg.scale_split(split, lam, c[perm])
        # the first lam starts as the job does from the raw scores (scaled to the multiple closest
        # to its solution); each later lam from the previous lam's solution as it is
        res = sweepcg.sweep_cg(
            system,
            b,
            x0=x0,
            tol=s["tol"],
            max_sweeps=s["max_sweeps"],
            omega=s["relaxation"],
            scale_start=cold,
        )
        x0, cold = res.x, False
        F = np.empty_like(res.x)
        F[perm] = res.x
        auc, cons = figures(F, use, nb_use)
        drop = (auc0 - auc) / auc0 if auc0 > 0 else 0.0
        row = {
            "lam": lam,
            "sweeps": res.sweeps,
            "status": res.status,
            "auc": auc,
            "auc_drop": drop,
            "auc_change": -drop,
            "consistency": cons,
        }
        if holdout > 0:
            hrows = np.flatnonzero(held)
            row["holdout_auc"], row["holdout_consistency"] = figures(F, hrows, np.asarray(nb[hrows]))
        path.append(row)
        log.info(
            "lam %g: %d sweeps, AUC %.4f (change %+.2f%%), neighbour consistency %.4f",
            lam,
            res.sweeps,
            auc,
            100 * row["auc_change"],
            cons,
        )
    rec = recommend(path, budget)
    warnings = []
    if rec is not None and len(path) > 1 and rec in (path[0]["lam"], path[-1]["lam"]):
        side = "smallest" if rec == path[0]["lam"] else "largest"
        warnings.append(
            f"the recommended lam {rec:g} is the {side} lam tried: the best value may lie beyond the "
            "grid; extend --lams on that side and tune again"
        )
    out = {
        "raw": {"auc": auc0, "consistency": cons0},
        "path": path,
        "recommended": rec,
        "auc_drop_budget": budget,
        "tuning_rows": int(len(use)),
        "holdout_rows": int(held.sum()),
        "select_rate": rate,
        "applied_lam": s["lam"],
        "warnings": warnings,
    }
    for w in warnings:
        log.warning("tune: %s", w)
    art.TUNE_INFO.save(rd, out)
    _plot(out, art.TUNE_PLOT.path(rd))
    return out


def _plot(out, path):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(6.5, 3.8))
    xs = [100 * r["auc_change"] for r in out["path"]]
    ys = [r["consistency"] for r in out["path"]]
    ax.plot(xs, ys, "o-", label="lam path (labels: lam)")
    for r, x, y in zip(out["path"], xs, ys):
        ax.annotate(f"{r['lam']:g}", (x, y), fontsize=7, xytext=(3, 3), textcoords="offset points")
    ax.axvline(
        -100 * out["auc_drop_budget"],
        color="grey",
        ls="--",
        lw=1,
        label=f"AUC budget ({-100 * out['auc_drop_budget']:+.1f}%)",
    )
    ax.plot([0], [out["raw"]["consistency"]], "s", color="black", label="raw scores")
    rec = [r for r in out["path"] if r["lam"] == out["recommended"]]
    if rec:
        ax.plot(
            [100 * rec[0]["auc_change"]],
            [rec[0]["consistency"]],
            "*",
            ms=14,
            color="tab:red",
            label=f"recommended lam {rec[0]['lam']:g}",
        )
    ax.set_xlabel("AUC change on labelled rows (% of raw; negative = worse)")
    ax.set_ylabel("neighbour consistency at the cutoff")
    ax.set_title("Accuracy against consistency over lam")
    ax.legend(fontsize=7, loc="best")
    with atomic.atomic_path(path) as tmp:
        fig.savefig(tmp, format="png", dpi=90, bbox_inches="tight")
    plt.close(fig)


def table_lines(out):
    lines = [
        f"tuning on {out['tuning_rows']} labelled rows (held out: {out['holdout_rows']}); raw AUC "
        f"{out['raw']['auc']:.4f}, neighbour consistency {out['raw']['consistency']:.4f}",
        f"{'lam':>8} {'sweeps':>6} {'AUC':>7} {'AUC change':>10} {'neighbour consistency':>21}"
        + (f" {'holdout AUC':>11} {'holdout cons.':>13}" if out["holdout_rows"] else ""),
    ]
    for r in out["path"]:
        line = (
            f"{r['lam']:>8g} {r['sweeps']:>6} {r['auc']:>7.4f} {100 * -r['auc_drop']:>+9.2f}% "
            f"{r['consistency']:>21.4f}"
        )
        if out["holdout_rows"]:
            line += f" {r['holdout_auc']:>11.4f} {r['holdout_consistency']:>13.4f}"
        lines.append(line)
    rec = out["recommended"]
    applied = out.get("applied_lam")
    lines.append(
        (f"applied lam (solve.lam): {applied:g}; " if applied is not None else "")
        + (
            f"recommended lam: {rec:g} (best neighbour consistency with an AUC change of at least "
            f"{-100 * out['auc_drop_budget']:+.1f}%)"
            if rec is not None
            else f"no lam keeps the AUC change within {-100 * out['auc_drop_budget']:+.1f}%; smoothing is not advised"
        )
    )
    lines += [f"warning: {w}" for w in out.get("warnings", [])]
    return lines
