"""The fair space: standardise, project out the protected directions, optionally reduce with PCA.

Everything is computed from streamed sufficient statistics of the feature matrix X (n x p) and the
protected-level indicators S (n x m): counts, sums and cross products, accumulated around a shift
(the first batch's mean) to avoid cancellation.

With z = (x - mu) * w / sd (w = per-feature weights; one-hot columns use sqrt(2) for sd), the sensitive subspace is the span of the
cross-covariances Cov(z, s_l) over all protected levels l, i.e. Sigma_z beta_l where beta_l is the
least-squares direction that predicts level l from z. Projecting it out leaves features of which no
linear combination correlates with any protected level (on these statistics). The embedding is
e = z Q with Q an orthonormal basis of the remaining space (or its top principal components), so
Euclidean distance between embeddings is a Mahalanobis distance on the original features.
"""

from dataclasses import dataclass

import numpy as np


@dataclass
class Moments:
    """Streamed sufficient statistics; combine batches with :meth:`update`."""

    shift: np.ndarray
    n: int
    sx: np.ndarray  # (p,)   sum of (x - shift)
    sxx: np.ndarray  # (p, p) sum of (x - shift)(x - shift)'
    ss: np.ndarray  # (m,)   sum of s
    sxs: np.ndarray  # (p, m) sum of (x - shift) s'

    @classmethod
    def empty(cls, shift, m):
        p = len(shift)
        return cls(
            np.asarray(shift, dtype=np.float64),
            0,
            np.zeros(p),
            np.zeros((p, p)),
            np.zeros(m),
            np.zeros((p, m)),
        )

    def update(self, X, S):
        """Add a batch: X of shape (b, p), S of shape (b, m) (dense or scipy sparse indicators)."""
        Xc = np.asarray(X, dtype=np.float64) - self.shift
        self.n += Xc.shape[0]
        self.sx += Xc.sum(axis=0)
        self.sxx += Xc.T @ Xc
        self.ss += np.asarray(S.sum(axis=0)).ravel()
        self.sxs += np.asarray((S.T @ Xc).T)

    def add(self, other):
        """Add the statistics of other rows, taken with the same shift."""
        if not np.array_equal(self.shift, other.shift):
            raise ValueError("moments taken with different shifts cannot be added")
        self.n += other.n
        self.sx += other.sx
        self.sxx += other.sxx
        self.ss += other.ss
        self.sxs += other.sxs


@dataclass
class FairSpace:
    mean: np.ndarray  # (p,)
    scale: np.ndarray  # (p,)  w / sd (0 sd -> feature dropped: scale 0)
    transform: np.ndarray  # (p, d)
    removed: int  # dimensions of the sensitive subspace removed
    constant: np.ndarray  # (p,) bool, features with zero variance
    explained: np.ndarray  # (d,) variance of each output dimension

    def apply(self, X):
        """Embed rows: ndarray (b, p) -> (b, d) float64."""
        return ((np.asarray(X, dtype=np.float64) - self.mean) * self.scale) @ self.transform


def pair_directions(diffs, scale, count, rtol=1e-8):
    """(p, r) the ``count`` principal directions (uncentred: the top right singular vectors) of the
    comparable pairs' feature differences ``diffs`` (m, p) in the standardised space (times
    ``scale``); fewer when the differences span fewer. Directions along which rows judged alike
    differ are directions the similarity should ignore."""
    D = np.asarray(diffs, dtype=np.float64) * scale
    if not count or D.size == 0:
        return np.zeros((len(scale), 0))
    _, sv, Vt = np.linalg.svd(D, full_matrices=False)
    r = min(count, int(np.sum(sv > rtol * max(sv.max(initial=0.0), 1e-300))))
    return Vt[:r].T


def fit_fair_space(
    mom,
    weights=None,
    remove_sensitive=True,
    components=0,
    indicator=None,
    rtol=1e-8,
    pair_diffs=None,
    pair_count=0,
):
    """Learn the fair space from :class:`Moments`.

    Parameters
    ----------
    mom : Moments
    weights : ndarray of shape (p,), optional per-feature multipliers (default ones)
    remove_sensitive : bool
    components : int, 0 keeps every remaining dimension
    indicator : ndarray of shape (p,) bool, optional
        Columns that are one-hot indicators of a categorical feature. They are centred but not
        divided by their standard deviation (which would blow up rare categories); instead they are
        scaled by 1/sqrt(2), so that two rows in different categories are one unit apart, like one
        standard deviation of a numeric feature.
    pair_diffs, pair_count : the comparable pairs' feature differences (m, p) and how many of their
        principal directions (:func:`pair_directions`) to remove along with the sensitive subspace.
    """
    n = mom.n
    if n < 2:
        raise ValueError(f"need at least 2 rows to learn the fair space; got {n}")
    p = len(mom.sx)
    w = np.ones(p) if weights is None else np.asarray(weights, dtype=np.float64)
    dm = mom.sx / n
    mean = mom.shift + dm
    cov = mom.sxx / n - np.outer(dm, dm)
    var = np.clip(np.diag(cov), 0.0, None)
    sd = np.sqrt(var)
    constant = sd <= 1e-12 * np.maximum(1.0, np.abs(mean))
    per_unit = np.where(constant, 1.0, sd)
    if indicator is not None:
        per_unit = np.where(np.asarray(indicator, dtype=bool), np.sqrt(2.0), per_unit)
    scale = np.where(constant, 0.0, w / per_unit)
    cov_z = cov * np.outer(scale, scale)
    removed = 0
    basis = np.eye(p)
    if remove_sensitive and mom.ss.size:
        cross = (mom.sxs / n - np.outer(dm, mom.ss / n)) * scale[:, None]  # Cov(z, s), (p, m)
        U, sv, _ = np.linalg.svd(cross, full_matrices=True)
        removed = int(np.sum(sv > rtol * max(1.0, sv.max(initial=0.0)))) if sv.size else 0
        basis = U[:, removed:]
    extra = (
        pair_directions(pair_diffs, scale, pair_count, rtol) if pair_diffs is not None else np.zeros((p, 0))
    )
    if extra.shape[1]:
        # the removed span widened by the pairs' directions; the basis is what is left of the space
        span = np.hstack([np.eye(p) - basis @ basis.T, extra])  # projector on the removed span, pairs
        U2, sv2, _ = np.linalg.svd(span, full_matrices=True)
        removed = int(np.sum(sv2 > rtol * max(1.0, sv2.max(initial=0.0))))
        basis = U2[:, removed:]
    # drop directions with no variance (constant features, exact collinearity such as one-hot sums)
    sub = basis.T @ cov_z @ basis
    ev, V = np.linalg.eigh((sub + sub.T) / 2)
    order = np.argsort(ev)[::-1]
    ev, V = ev[order], V[:, order]
    keep = ev > rtol * max(ev.max(initial=0.0), 1e-300)
    if components:
        keep &= np.arange(len(ev)) < components
    transform = basis @ V[:, keep]
    return FairSpace(
        mean=mean, scale=scale, transform=transform, removed=removed, constant=constant, explained=ev[keep]
    )


def linear_probe_auc(E, target, rng, auc):
    """Hold-out AUC of a least-squares linear probe predicting a 0/1 ``target`` from rows of E.

    Half the rows (chosen by ``rng``) fit the probe, the other half score it. ``auc`` is the AUC
    function to use. Returns nan when a half lacks either class.
    """
    n = E.shape[0]
    idx = rng.permutation(n)
    tr, te = idx[: n // 2], idx[n // 2 :]
    t = np.asarray(target, dtype=np.float64)
    if t[tr].min(initial=1) == t[tr].max(initial=0) or t[te].min(initial=1) == t[te].max(initial=0):
        return float("nan")
    Xtr = np.column_stack([np.ones(len(tr)), E[tr]])
    coef, *_ = np.linalg.lstsq(Xtr, t[tr], rcond=None)
    pred = np.column_stack([np.ones(len(te)), E[te]]) @ coef
    return auc(t[te], pred)
