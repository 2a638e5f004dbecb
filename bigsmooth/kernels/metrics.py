"""Audit figures computed on arrays.

Definitions follow the usual handbook forms: AUC is the Mann-Whitney probability that a random
positive outscores a random negative (ties count one half); the four-fifths rule compares each
group's selection rate with the highest group's (29 CFR 1607.4(D)).
"""
import numpy as np
from scipy.stats import rankdata


def roc_auc(labels, scores):
    """Area under the ROC curve via the rank-sum (Mann-Whitney U) formula."""
    labels = np.asarray(labels).astype(bool)
    scores = np.asarray(scores, dtype=np.float64)
    n_pos = int(labels.sum())
    n_neg = labels.size - n_pos
    if n_pos == 0 or n_neg == 0:
        return float("nan")
    ranks = rankdata(scores)
    return float((ranks[labels].sum() - n_pos * (n_pos + 1) / 2.0) / (n_pos * n_neg))


def accuracy(labels, decisions):
    labels = np.asarray(labels).astype(bool)
    return float(np.mean(labels == np.asarray(decisions).astype(bool))) if labels.size else float("nan")


def quantile_cutoff(scores, select_rate):
    """The score at or above which the top ``select_rate`` share of rows lie."""
    return float(np.quantile(np.asarray(scores, dtype=np.float64), 1.0 - select_rate, method="higher"))


def edge_disagreement(indptr, indices, data, f):
    """Weighted mean squared difference over graph edges: sum w_ij (f_i - f_j)^2 / sum w_ij.

    ``f`` has shape (n,) or (n, c); the squared difference is summed over columns.
    Each undirected edge counts once (the CSR holds both directions, which cancels in the ratio).
    """
    total = float(np.sum(data))
    if total == 0:
        return 0.0
    f = np.asarray(f, dtype=np.float64).reshape(len(indptr) - 1, -1)
    rows = np.repeat(np.arange(len(indptr) - 1), np.diff(indptr))
    diff = f[rows] - f[indices]
    return float(np.sum(data * np.sum(diff * diff, axis=1)) / total)


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
        rows.append({"group": level, "count": cnt, "suppressed": False,
                     "mean_score": float(scores[m].mean()), "selection_rate": float(selected[m].mean())})
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
