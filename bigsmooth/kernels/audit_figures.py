"""Audit figures computed on arrays (the audit stage reads the run directory and calls these).

Neighbour lists and distances may be memory-mapped (n, k) arrays: the chunked functions read them a
chunk of rows at a time, so memory stays bounded at any table size. The controls and the exact
counterfactual figure are checked against scipy's spsolve in tests/kernels/test_metrics_fairspace.py.
"""

import numpy as np

from . import influence, laplacian, metrics

CHUNK = 262_144  # rows a pass holds at a time (neighbour lists and their temporaries)


def chunked_consistency(decisions, nb):
    """:func:`bigsmooth.kernels.metrics.consistency` over the memory-mapped neighbour lists, a chunk
    of rows at a time (weighted by chunk length)."""
    inconsistency = 0.0
    for s in range(0, len(nb), CHUNK):
        part = np.asarray(nb[s : s + CHUNK])
        rows = np.arange(s, s + len(part))
        inconsistency += (1.0 - metrics.consistency(decisions, part, rows)) * len(part)
    return float(1.0 - inconsistency / len(nb))


def neighbour_block(V, cuts, W, nb, dist, constant, lo, hi):
    """The neighbour figures' partial sums over rows lo..hi for each score vector V[j] (V is
    (vectors, n)), decided at ``cuts[j]``: per vector a dict with ``edge`` (sum of w (f_i - f_j)^2
    over the block's edges, sum of w), ``inconsistency`` (the block's rows times one minus their
    consistency) and ``lipschitz`` (:func:`bigsmooth.kernels.metrics.pair_differences` counts).
    :func:`neighbour_figures` adds the blocks in order; with blocks of :data:`CHUNK` rows the
    figures equal :func:`metrics.edge_disagreement`, :func:`chunked_consistency` and
    :func:`local_lipschitz` bit for bit (tested)."""
    a, b = int(W.indptr[lo]), int(W.indptr[hi])
    rows = np.repeat(np.arange(lo, hi), np.diff(W.indptr[lo : hi + 1]))
    cols = np.asarray(W.indices[a:b])
    w = np.asarray(W.data[a:b])
    part = np.asarray(nb[lo:hi])
    d = np.asarray(dist[lo:hi], dtype=np.float64)
    out = []
    for j in range(V.shape[0]):
        f = np.asarray(V[j], dtype=np.float64)
        diff = (f[rows] - f[cols])[:, None]
        own = (f[lo:hi] >= cuts[j]).astype(np.float64)
        theirs = (f[part] >= cuts[j]).astype(np.float64)
        cons = float(1.0 - np.mean(np.abs(own - theirs.mean(axis=1))))  # metrics.consistency
        out.append(
            {
                "edge": (float(np.sum(w * np.sum(diff * diff, axis=1))), float(np.sum(w))),
                "inconsistency": (1.0 - cons) * len(part),
                "lipschitz": metrics.pair_differences(
                    np.broadcast_to(f[lo:hi, None], part.shape), f[part], d, constant
                ),
            }
        )
    return out


def neighbour_figures(blocks, n):
    """Per vector (neighbour_disagreement, neighbour_consistency, local Lipschitz summary) from the
    :func:`neighbour_block` results of consecutive blocks, added in block order."""
    figs = []
    for j in range(len(blocks[0]) if blocks else 0):
        acc = total = inconsistency = 0.0
        lip = None
        for blk in blocks:
            e = blk[j]
            acc += e["edge"][0]
            total += e["edge"][1]
            inconsistency += e["inconsistency"]
            c = e["lipschitz"]
            lip = c if lip is None else {k: lip[k] + c[k] for k in lip}
        figs.append(
            (
                acc / total if total != 0 else 0.0,
                float(1.0 - inconsistency / n),
                metrics.lipschitz_summary(lip),
            )
        )
    return figs


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
    # the mean weight over blocks of entries (W.data may be a RowReader: never read whole)
    step = 1 << 24
    weight = sum(float(np.sum(W.data[a : a + step])) for a in range(0, W.nnz, step)) / W.nnz if W.nnz else 0.0
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
