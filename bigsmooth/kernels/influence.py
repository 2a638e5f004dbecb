"""Self-influence of the smoothing: how much a row's adjusted score moves with its own raw score.

The smoothed scores are f = G y with G = (C + lam L)^-1 C. If only row i's raw score changes (from
y_i to y'_i) and the job is run again, the new adjusted score of row i is exactly

    f'_i = f_i + G_ii (y'_i - y_i),     G_ii = c_i (A^-1)_ii,  A = C + lam L.

(A^-1)_ii is computed by solves restricted to growing hop balls S around row i (rows within h
edges). A is a symmetric M-matrix, so for any index set S the inverse of the principal submatrix
A_SS is entrywise no larger than the matching block of A^-1 (the Schur complement
A_SS - A_ST A_TT^-1 A_TS is entrywise <= A_SS because A_ST <= 0 and A_TT^-1 >= 0, and for
M-matrices B <= A entrywise implies B^-1 >= A^-1). So the estimates increase with h and reach the
exact value once the ball holds the row's whole connected component; the ball stops growing when a
further hop adds less than ``tol`` or when it would exceed ``max_ball`` rows.
"""

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla


def _grow(indptr, indices, members, frontier, seen):
    """Rows one hop beyond ``frontier`` that are not in ``seen`` (sorted, unique)."""
    nxt = (
        np.concatenate([indices[indptr[r] : indptr[r + 1]] for r in frontier])
        if len(frontier)
        else np.empty(0, np.int64)
    )
    nxt = np.unique(nxt)
    return nxt[~seen[nxt]]


def _inverse_diagonal_entry(A, ball, i, rtol):
    """(A_SS^-1)_ii for S = ``ball`` (sorted rows containing i)."""
    sub = A[ball][:, ball].tocsc()  # CSC for the direct solve
    pos = int(np.searchsorted(ball, i))
    e = np.zeros(len(ball))
    e[pos] = 1.0
    if len(ball) <= 200:
        x = spla.spsolve(sub, e)
    else:
        diag = sub.diagonal()
        M = spla.LinearOperator(sub.shape, matvec=lambda v: v.ravel() / diag, dtype=np.float64)
        x, _ = spla.cg(sub.tocsr(), e, rtol=rtol, M=M, maxiter=10_000)
    return float(np.atleast_1d(x)[pos])


def self_influence(A, c, rows, tol=1e-5, max_ball=20_000, max_hops=64):
    """G_ii = c_i (A^-1)_ii for each row i in ``rows``.

    Parameters
    ----------
    A : sparse matrix of shape (n, n)
        The system matrix C + lam L (symmetric M-matrix; see :func:`bigsmooth.kernels.laplacian.system`).
    c : ndarray of shape (n,)
        The diagonal of C.
    rows : ndarray of shape (m,)
        Rows to evaluate.
    tol : float
        Stop growing a row's ball when one more hop changes G_ii by less than this.
    max_ball : int
        Largest ball (rows) solved; a row that reaches it keeps its last estimate (a lower bound).

    Returns
    -------
    g : ndarray of shape (m,)
        G_ii for each row (0 < G_ii <= 1).
    last_step : ndarray of shape (m,)
        The change of G_ii at the last hop (0 when the ball covered the row's component).
    capped : ndarray of shape (m,), bool
        Rows whose ball reached ``max_ball`` before the change fell below ``tol`` (lower bounds).
    """
    A = sp.csr_matrix(A, dtype=np.float64)
    n = A.shape[0]
    indptr, indices = A.indptr, A.indices
    c = np.asarray(c, dtype=np.float64)
    out = np.empty(len(rows))
    step = np.empty(len(rows))
    capped = np.zeros(len(rows), dtype=bool)
    seen = np.zeros(n, dtype=bool)
    for q, i in enumerate(np.asarray(rows, dtype=np.int64)):
        members = [np.array([i], dtype=np.int64)]
        seen[i] = True
        frontier = members[0]
        value, last = c[i] / A[i, i], 0.0
        for _ in range(max_hops):
            nxt = _grow(indptr, indices, members, frontier, seen)
            size = sum(len(m) for m in members) + len(nxt)
            if not len(nxt):
                last = 0.0
                break
            if size > max_ball:
                capped[q] = True
                break
            seen[nxt] = True
            members.append(nxt)
            frontier = nxt
            ball = np.sort(np.concatenate(members))
            new = c[i] * _inverse_diagonal_entry(A, ball, i, rtol=tol * 1e-3)
            last, value = new - value, new
            if abs(last) < tol:
                break
        for m in members:
            seen[m] = False
        out[q], step[q] = value, last
    return out, step, capped


def self_influence_reference(A, c):
    """The whole diagonal of G = A^-1 C by a dense inverse (numpy.linalg.inv): the slow twin."""
    Ad = A.toarray() if sp.issparse(A) else np.asarray(A)
    return np.diag(np.linalg.inv(Ad) @ np.diag(c)).copy()
