"""``bigsmooth explain``: why one row's score moved.

At the solution of (C + lam L) f = C y, row i satisfies the coordinate update
    f_i = c_i y_i / (c_i + lam d_i) + sum_j lam w_ij f_j / (c_i + lam d_i),
so the adjusted score splits into the row's own score's share and each neighbour's share (they
add up to f_i up to the row's residual, i.e. the solver's tolerance). A row anchored by
solve.stability = mu has c_i (1 + mu) + lam d_i below the line and a third share, mu c_i t_i / (...),
from t_i, its adjusted score in the version published before the run. The breakdown reads one row of
the stored graph and the neighbours' scores; the audit uses the same function for the report's
largest changes.
"""

import numpy as np

from . import artifacts as art
from .kernels import late as lk

TOP = 10  # heaviest neighbours listed


def breakdown(rd, row, lam, kind, top=TOP):
    """The terms of row ``row``'s coordinate update at the run's solution (see the module
    docstring): a dict with per score column the raw and adjusted score, the own share and the
    neighbours' share, and the ``top`` heaviest neighbours (row, weight, fair-space distance, raw
    and adjusted scores, share), heaviest first (ties by row)."""
    indptr = np.load(art.GRAPH_WEIGHTS.path(rd, "indptr"), mmap_mode="r")
    a, b = int(indptr[row]), int(indptr[row + 1])
    cols = np.asarray(np.load(art.GRAPH_WEIGHTS.path(rd, "indices"), mmap_mode="r")[a:b], dtype=np.int64)
    w = np.asarray(np.load(art.GRAPH_WEIGHTS.path(rd, "data"), mmap_mode="r")[a:b], dtype=np.float64)
    Y = art.EMBED_SCORES.load(rd, mmap=True)
    F = art.SOLVE_ADJUSTED.load(rd, mmap=True)
    E = art.EMBED_EMBEDDING.load(rd, mmap=True)
    y, f = np.asarray(Y[row], dtype=np.float64), np.asarray(F[row], dtype=np.float64)
    f_nb = np.asarray(F[cols], dtype=np.float64).reshape(len(cols), -1)
    d = float(w.sum())
    c = 1.0 if kind == "unnormalised" else (d if d > 0 else 1.0)
    pull, anchor = _anchor(rd, row, len(y))
    own, each = lk.terms(y, w, f_nb, lam, c, pull=pull)
    from_last = (
        pull * c * anchor["last_adjusted"] / (c * (1.0 + pull) + lam * d) if pull else np.zeros(len(y))
    )
    dist = np.sqrt(
        ((np.asarray(E[cols], dtype=np.float64) - np.asarray(E[row], dtype=np.float64)) ** 2).sum(axis=1)
    )
    heavy = np.lexsort((cols, -w))[:top]
    return {
        "row": int(row),
        "lam": lam,
        "laplacian": kind,
        "c": c,
        "degree": d,
        "neighbours": int(len(cols)),
        "raw": y.tolist(),
        "adjusted": f.tolist(),
        "own_share": np.atleast_1d(own).tolist(),
        "neighbours_share": each.sum(axis=0).tolist(),
        "anchor": anchor | {"last_adjusted": anchor["last_adjusted"].tolist()} if pull else None,
        "anchor_share": from_last.tolist(),
        "residual": (f - np.atleast_1d(own) - each.sum(axis=0) - from_last).tolist(),
        "heaviest": [
            {
                "row": int(cols[t]),
                "weight": float(w[t]),
                "distance": float(dist[t]),
                "raw": np.asarray(Y[cols[t]], dtype=np.float64).tolist(),
                "adjusted": f_nb[t].tolist(),
                "share": each[t].tolist(),
            }
            for t in heavy
        ],
    }


def _anchor(rd, row, columns):
    """(mu, {"weight", "version", "last_adjusted" (columns,)}) when solve.stability anchored ``row`` in
    this run, else (0.0, None)."""
    if not art.SOLVE_ANCHOR_INFO.exists(rd):
        return 0.0, None
    info = art.SOLVE_ANCHOR_INFO.load(rd)
    rows = art.SOLVE_ANCHOR.load(rd, mmap=True, member="rows")
    at = int(np.searchsorted(rows, row))
    if not info.get("used") or at >= len(rows) or int(rows[at]) != row:
        return 0.0, None
    t = np.asarray(art.SOLVE_ANCHOR.load(rd, mmap=True, member="target")[at], dtype=np.float64).reshape(
        columns
    )
    return float(info["weight"]), {
        "weight": float(info["weight"]),
        "version": info["version"],
        "last_adjusted": t,
    }


def explain(config, id_text, run_dir=None, top=TOP):
    """The ``bigsmooth explain`` record for one id of the current version (or of ``run_dir``)."""
    import os

    from . import atomic
    from .config import load_config
    from .errors import BigsmoothError
    from .late import find_run, night_rows_of, version_files
    from .table import ids_at_rows

    cfg = load_config(config)
    rd, version = find_run(cfg, run_dir)
    m = rd.load()
    s = m["settings"]
    inp = s["input"]
    scan = art.SCAN_INFO.load(rd)
    id_type = scan["columns"][inp["id"]]
    if id_type == "VARCHAR":
        key = id_text
    else:
        try:
            key = int(id_text)
        except ValueError:
            raise BigsmoothError(f"the id column {inp['id']!r} holds integers; got {id_text!r}") from None
    version_dir = os.path.join(rd.root("output", m), version) if version else None
    if version_dir is None or not os.path.isdir(version_dir):
        raise BigsmoothError(f"the run {rd.path} has no published version folder ({version_dir})")
    rows = night_rows_of(m, version_dir, inp["id"], [key], cfg["run"]["memory_mb"])
    if key not in rows:
        raise BigsmoothError(f"id {id_text!r} is not in version {version} ({scan['rows']} rows)")
    row = rows[key]
    rec = breakdown(rd, row, s["solve"]["lam"], s["solve"]["laplacian"], top)
    files = {"files": version_files(m, version_dir)}
    ids = ids_at_rows(files, inp["id"], [h["row"] for h in rec["heaviest"]]) if rec["heaviest"] else []
    for h, v in zip(rec["heaviest"], ids):
        h["id"] = v
    audit = atomic.read_json(os.path.join(version_dir, art.OUTPUT_AUDIT))
    lo, hi = inp["score_range"]
    first = inp["scores"][0]
    cut = audit["scores"][first]
    before, after = rec["raw"][0], float(np.clip(rec["adjusted"][0], lo, hi))
    rec.update(
        {
            "schema": 1,
            "id": key,
            "run_id": m["run_id"],
            "version": version,
            "scores": list(inp["scores"]),
            "published": [float(np.clip(v, lo, hi)) for v in rec["adjusted"]],
            "decision_score": first,
            "select_rate": audit["select_rate"],
            "cutoff_before": cut["before"]["cutoff"],
            "cutoff_after": cut["after"]["cutoff"],
            "selected_before": bool(before >= cut["before"]["cutoff"]),
            "selected_after": bool(after >= cut["after"]["cutoff"]),
            "solver_tolerance": s["solve"]["tol"],
        }
    )
    if s["output"]["include_protected"]:
        codes = art.EMBED_PROTECTED.load(rd, mmap=True)[row]
        rec["protected"] = {c: scan["levels"][c][int(codes[j])][0] for j, c in enumerate(inp["protected"])}
    return rec


def lines(rec):
    """The record as text."""
    out = [f"id {rec['id']!r}: row {rec['row']} of run {rec['run_id']}, version {rec['version']}"]
    for j, c in enumerate(rec["scores"]):
        out.append(
            f"{c}: raw {rec['raw'][j]:.4f} -> adjusted {rec['published'][j]:.4f} (change "
            f"{rec['published'][j] - rec['raw'][j]:+.4f})"
        )
    yes = {True: "selected", False: "not selected"}
    out.append(
        f"decision on {rec['decision_score']} (top {rec['select_rate']:.0%}): before {yes[rec['selected_before']]} "
        f"(cutoff {rec['cutoff_before']:.4f}), after {yes[rec['selected_after']]} (cutoff {rec['cutoff_after']:.4f})"
    )
    if "protected" in rec:
        out.append("protected attributes: " + ", ".join(f"{k} = {v}" for k, v in rec["protected"].items()))
    a = rec.get("anchor")
    mu = a["weight"] if a else 0.0
    den = rec["c"] * (1 + mu) + rec["lam"] * rec["degree"]
    below = "c (1 + mu) + lam d" if a else "c + lam d"
    out.append(
        f"where the adjusted score comes from (the update at the solution; lam {rec['lam']:g}, "
        f"{rec['laplacian']} Laplacian, c = {rec['c']:.4g}, {rec['neighbours']} neighbours of total weight "
        f"d = {rec['degree']:.4g}"
        + (f", anchored by solve.stability mu = {mu:g} to version {a['version']}" if a else "")
        + f", so {below} = {den:.4g}):"
    )
    for j, c in enumerate(rec["scores"]):
        last = (
            f"; last night's adjusted score mu c t / ({below}) = {rec['anchor_share'][j]:.4f} "
            f"(t = {a['last_adjusted'][j]:.4f})"
            if a
            else ""
        )
        out.append(
            f"  {c}: own score c y / ({below}) = {rec['own_share'][j]:.4f}; neighbours "
            f"sum lam w_j f_j / ({below}) = {rec['neighbours_share'][j]:.4f}{last}; together "
            f"{rec['own_share'][j] + rec['neighbours_share'][j] + rec['anchor_share'][j]:.6f} against the solution "
            f"{rec['adjusted'][j]:.6f} (difference {rec['residual'][j]:.1e}: the solver's tolerance)"
        )
    if rec["heaviest"]:
        out.append(f"heaviest {len(rec['heaviest'])} neighbours (of {rec['neighbours']}):")
        out.append(f"  {'id':>14} {'weight':>8} {'distance':>9} {'raw':>8} {'adjusted':>9} {'share':>8}")
        for h in rec["heaviest"]:
            out.append(
                f"  {str(h.get('id', h['row'])):>14} {h['weight']:8.4f} {h['distance']:9.4f} {h['raw'][0]:8.4f} "
                f"{h['adjusted'][0]:9.4f} {h['share'][0]:8.4f}"
            )
    return out
