"""Audit figures computed on arrays.

Definitions follow the usual handbook forms: AUC is the Mann-Whitney probability that a random
positive outscores a random negative (ties count one half); the four-fifths rule compares each
group's selection rate with the highest group's (29 CFR 1607.4(D)).
"""

import numpy as np


def average_ranks(x):
    """Ranks 1..n of ``x``, tied values sharing the mean of their ranks (scipy.stats.rankdata's
    "average" method, written here so that the audit does not import scipy.stats: 0.4 s a process)."""
    x = np.asarray(x)
    order = np.argsort(x, kind="mergesort")
    xs = x[order]
    first = np.flatnonzero(np.r_[True, xs[1:] != xs[:-1]]) if x.size else np.zeros(0, dtype=np.int64)
    counts = np.diff(np.r_[first, x.size])
    ranks = np.empty(x.size, dtype=np.float64)
    ranks[order] = np.repeat(first + (counts + 1) / 2.0, counts)
    return ranks


def roc_auc(labels, scores):
    """Area under the ROC curve via the rank-sum (Mann-Whitney U) formula."""
    labels = np.asarray(labels).astype(bool)
    scores = np.asarray(scores, dtype=np.float64)
    n_pos = int(labels.sum())
    n_neg = labels.size - n_pos
    if n_pos == 0 or n_neg == 0:
        return float("nan")
    ranks = average_ranks(scores)
    return float((ranks[labels].sum() - n_pos * (n_pos + 1) / 2.0) / (n_pos * n_neg))


def accuracy(labels, decisions):
    labels = np.asarray(labels).astype(bool)
    return float(np.mean(labels == np.asarray(decisions).astype(bool))) if labels.size else float("nan")


def quantile_cutoff(scores, select_rate):
    """The score at or above which the top ``select_rate`` share of rows lie."""
    return float(np.quantile(np.asarray(scores, dtype=np.float64), 1.0 - select_rate, method="higher"))


def edge_disagreement(indptr, indices, data, f, block=262_144):
    """Weighted mean squared difference over graph edges: sum w_ij (f_i - f_j)^2 / sum w_ij.

    ``f`` has shape (n,) or (n, c); the squared difference is summed over columns.
    Each undirected edge counts once (the CSR holds both directions, which cancels in the ratio).
    ``indices`` and ``data`` are arrays or RowReaders (read one block of rows' entries at a time).
    """
    n = len(indptr) - 1
    f = np.asarray(f, dtype=np.float64).reshape(n, -1)
    acc = 0.0
    total = 0.0
    for lo in range(0, n, block):  # rows in blocks: temporaries of one block's edges, not all
        hi = min(lo + block, n)
        a, b = int(indptr[lo]), int(indptr[hi])
        rows = np.repeat(np.arange(lo, hi), np.diff(indptr[lo : hi + 1]))
        diff = f[rows] - f[np.asarray(indices[a:b])]
        w = np.asarray(data[a:b])
        total += float(np.sum(w))
        acc += float(np.sum(w * np.sum(diff * diff, axis=1)))
    return acc / total if total != 0 else 0.0


def group_table(codes, levels, scores, selected, min_rows):
    """Per-group count, mean score and selection rate; groups under ``min_rows`` are suppressed.

    Returns a list of dicts and the four-fifths comparison (ratio to the highest shown group).
    """
    rows = []
    for code, level in enumerate(levels):
        m = codes == code
        cnt = int(m.sum())
        if cnt == 0:
            continue
        if cnt < min_rows:
            rows.append({"group": level, "count": cnt, "suppressed": True})
            continue
        rows.append(
            {
                "group": level,
                "count": cnt,
                "suppressed": False,
                "mean_score": float(scores[m].mean()),
                "selection_rate": float(selected[m].mean()),
            }
        )
    shown = [r for r in rows if not r["suppressed"]]
    top = max((r["selection_rate"] for r in shown), default=0.0)
    for r in shown:
        r["ratio_to_highest"] = float(r["selection_rate"] / top) if top > 0 else float("nan")
        r["below_four_fifths"] = bool(top > 0 and r["selection_rate"] / top < 0.8)
    return rows


def gap_over_sd(codes, n_levels, scores, min_rows):
    """Largest minus smallest group mean, divided by the standard deviation of all scores."""
    means = [scores[codes == c].mean() for c in range(n_levels) if (codes == c).sum() >= min_rows]
    sd = float(np.std(scores))
    if len(means) < 2 or sd == 0:
        return 0.0
    return float((max(means) - min(means)) / sd)


def balanced_accuracy(labels, decisions):
    """Mean of the true positive rate and the true negative rate."""
    labels = np.asarray(labels).astype(bool)
    d = np.asarray(decisions).astype(bool)
    if labels.all() or not labels.any():
        return float("nan")
    return float((d[labels].mean() + (~d[~labels]).mean()) / 2.0)


def brier(labels, scores):
    """Mean squared difference between the score (as a probability) and the 0/1 outcome."""
    return float(np.mean((np.asarray(scores, dtype=np.float64) - np.asarray(labels, dtype=np.float64)) ** 2))


def log_loss(labels, scores, eps=1e-15):
    """Mean negative log-likelihood of the 0/1 outcomes, scores clipped to [eps, 1 - eps]."""
    p = np.clip(np.asarray(scores, dtype=np.float64), eps, 1 - eps)
    y = np.asarray(labels, dtype=np.float64)
    return float(-np.mean(y * np.log(p) + (1 - y) * np.log(1 - p)))


def consistency(decisions, neighbours, rows=None):
    """1 - mean_i |d_i - mean of d over row i's k nearest neighbours| (the usual individual-fairness
    consistency score); ``neighbours`` is (m, k) of row indices, ``neighbours[i]`` belonging to row
    ``rows[i]`` (default: row i)."""
    d = np.asarray(decisions, dtype=np.float64)
    own = d if rows is None else d[rows]
    return float(1.0 - np.mean(np.abs(own - d[neighbours].mean(axis=1))))


def same_group_share(codes, neighbours, rows=None):
    """Share of neighbour pairs whose two rows are in the same group, and the share expected under
    random mixing (sum of squared group shares). ``neighbours[i]`` belongs to row ``rows[i]``
    (default: row i)."""
    codes = np.asarray(codes)
    own = codes if rows is None else codes[rows]
    same = float(np.mean(codes[neighbours] == own[:, None]))
    share = np.bincount(codes[codes >= 0]) / max(1, int((codes >= 0).sum()))
    return same, float(np.sum(share**2))


def neighbour_vote_auc(codes, neighbours, rows, level):
    """AUC of the neighbour vote for one protected level: each row in ``rows`` is scored by the share
    of its neighbours (``neighbours[q]`` belongs to ``rows[q]``) that are in ``level``, and the score
    is compared with whether the row itself is in it. A nonlinear probe of what the graph sees: 0.5
    when neighbours are blind to the attribute, 1 when they always share it."""
    codes = np.asarray(codes)
    vote = np.mean(codes[neighbours] == level, axis=1)
    return roc_auc(codes[rows] == level, vote)


def pair_differences(fi, fj, dist, constant, zero_tol=1e-9):
    """Lipschitz check over pairs with their fair-space distances, pairs at distance 0 kept apart.

    Returns counts to be summed over chunks: ``pairs``, ``positive`` (pairs at d > 0), ``violations``
    (of those, |f_i - f_j| > constant * d), ``zero`` (pairs at d = 0, i.e. rows identical in the fair
    space), ``zero_differing`` (of those, |f_i - f_j| > zero_tol) and ``zero_abs_sum`` (sum of their
    |f_i - f_j|)."""
    diff = np.abs(np.asarray(fi, dtype=np.float64) - np.asarray(fj, dtype=np.float64))
    d = np.asarray(dist, dtype=np.float64)
    z = d == 0
    return {
        "pairs": int(d.size),
        "positive": int(np.sum(~z)),
        "violations": int(np.sum(diff[~z] > constant * d[~z])),
        "zero": int(np.sum(z)),
        "zero_differing": int(np.sum(diff[z] > zero_tol)),
        "zero_abs_sum": float(np.sum(diff[z])),
    }


def lipschitz_summary(counts):
    """Rates from summed :func:`pair_differences` counts."""
    zero = counts["zero"]
    return {
        "rate": counts["violations"] / counts["positive"] if counts["positive"] else 0.0,
        "zero_distance_share": zero / counts["pairs"] if counts["pairs"] else 0.0,
        "zero_distance_differing": counts["zero_differing"] / zero if zero else 0.0,
        "zero_distance_mean_abs_difference": counts["zero_abs_sum"] / zero if zero else 0.0,
    }
