"""Graph Laplacians and the smoothing system matrix.

For a symmetric non-negative weight matrix W with degrees d = W 1:

- unnormalised: L = D - W, and the system is (I + lam L) f = y;
- random-walk normalised: minimising ||f - y||_D^2 + lam f'Lf gives (D + lam L) f = D y,
  i.e. (I + lam (I - D^-1 W)) f = y.

A row with no edges (d_i = 0) would make the random-walk system singular; such a row gets
c_i = 1 so that it keeps its score (f_i = y_i).
"""

import numpy as np
import scipy.sparse as sp


def as_weight_matrix(W):
    """Validate and coerce a weight matrix to symmetric CSR float64 with an empty diagonal."""
    W = sp.csr_matrix(W, dtype=np.float64)
    n, m = W.shape
    if n != m:
        raise ValueError(f"weight matrix must be square; got shape {W.shape}")
    if W.nnz and W.data.min() < 0:
        raise ValueError("weight matrix must be non-negative")
    if W.diagonal().any():
        W = W.tolil()
        W.setdiag(0)
        W = W.tocsr()
    W.eliminate_zeros()
    W.sort_indices()
    return W


def degrees(W):
    return np.asarray(W.sum(axis=1)).ravel()


def laplacian(W):
    """Unnormalised Laplacian L = D - W as CSR."""
    W = as_weight_matrix(W)
    return (sp.diags(degrees(W)) - W).tocsr()


def row_weights(W, kind):
    """The diagonal of C: ones (unnormalised) or degrees (random walk; isolated rows get 1)."""
    return row_weights_from_degrees(degrees(W) if kind == "random_walk" else np.zeros(W.shape[0]), kind)


def row_weights_from_degrees(d, kind):
    """:func:`row_weights` given the degrees d = W 1."""
    d = np.asarray(d, dtype=np.float64)
    if kind == "unnormalised":
        return np.ones(len(d))
    if kind == "random_walk":
        return np.where(d > 0, d, 1.0)
    raise ValueError(f"laplacian kind must be 'unnormalised' or 'random_walk'; got {kind!r}")


def system(W, lam, kind="unnormalised"):
    """Return (A, c) with A = C + lam L (CSR, symmetric) and c = diag(C).

    The right-hand side of the smoothing problem is ``c[:, None] * y``.
    """
    W = as_weight_matrix(W)
    c = row_weights(W, kind)
    A = (sp.diags(c + lam * degrees(W)) - lam * W).tocsr()
    A.sort_indices()
    return A, c
