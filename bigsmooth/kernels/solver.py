"""Solvers for (C + lam L) f = C y.

- :func:`direct_solve`: sparse LU of the whole system (small n; the reference).
- :func:`block_coordinate_descent`: blocked coordinate descent, i.e. block Gauss-Seidel on the
  symmetric positive definite A, minimising the same quadratic one block of rows at a time. Each
  block is solved exactly (sparse LU of its diagonal block, factorised once) or approximately with
  inner point Gauss-Seidel sweeps. After every outer sweep the caller's ``on_sweep`` hook receives
  the sweep number, the iterate and the relative residual (the stage uses it to checkpoint).

Blocks are ranges of rows of A as given: order the rows for locality (so that most edge weight falls
inside blocks) before calling.
"""

from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

# how a solve ended, for every solver (direct, blocks, sweep-cg); recorded in solve.json and the report
STATUS_CONVERGED = "converged"  # the true relative residual reached tol
STATUS_MAX_SWEEPS = "max_sweeps"  # solve.max_sweeps reached first (warned about)
STATUS_STOPPED = "stopped"  # the caller stopped it (on_sweep returned False)
STATUSES = (STATUS_CONVERGED, STATUS_MAX_SWEEPS, STATUS_STOPPED)


@dataclass
class SolveResult:
    x: np.ndarray
    status: str
    sweeps: int
    residuals: list = field(default_factory=list)  # relative residual after each sweep (index 0 = start)

    @property
    def final_residual(self):
        return self.residuals[-1] if self.residuals else float("nan")


def _check_system(A, b):
    A = sp.csr_matrix(A, dtype=np.float64)
    if A.shape[0] != A.shape[1]:
        raise ValueError(f"A must be square; got shape {A.shape}")
    b = np.asarray(b, dtype=np.float64)
    if b.shape[0] != A.shape[0]:
        raise ValueError(f"right-hand side has {b.shape[0]} rows; A has {A.shape[0]}")
    return A, b


def relative_residual(A, b, x):
    nb = np.linalg.norm(b)
    r = np.linalg.norm(b - A @ x)
    return float(r / nb) if nb > 0 else float(r)


def direct_solve(A, b):
    """Exact solve of A x = b (b of shape (n,) or (n, c)) with a sparse LU factorisation."""
    A, b = _check_system(A, b)
    lu = spla.splu(A.tocsc())
    return lu.solve(b)


def block_ranges(n, block_rows):
    """Split rows 0..n-1 into consecutive ranges of at most ``block_rows`` rows."""
    if block_rows < 1:
        raise ValueError(f"block_rows must be >= 1; got {block_rows}")
    starts = np.arange(0, n, block_rows)
    return [(int(s), int(min(s + block_rows, n))) for s in starts]


def gauss_seidel_rows(indptr, indices, data, b, x, start, stop, sweeps):
    """Point Gauss-Seidel on rows start..stop-1 of CSR A, in place on x (shape (n, c)).

    Pure Python reference of the compiled kernel in :mod:`bigsmooth.kernels._fast`.
    """
    for _ in range(sweeps):
        for i in range(start, stop):
            acc = b[i].copy()
            diag = 0.0
            for p in range(indptr[i], indptr[i + 1]):
                j = indices[p]
                if j == i:
                    diag = data[p]
                else:
                    acc -= data[p] * x[j]
            x[i] = acc / diag


class _Block:
    __slots__ = ("start", "stop", "off", "lu")

    def __init__(self, A, start, stop, exact):
        rows = A[start:stop]
        self.start, self.stop = start, stop
        inside = (rows.indices >= start) & (rows.indices < stop)
        off = rows.copy()
        off.data[inside] = 0.0
        off.eliminate_zeros()
        self.off = off
        self.lu = spla.splu(rows[:, start:stop].tocsc()) if exact else None


def block_coordinate_descent(
    A,
    b,
    x0=None,
    block_rows=4096,
    block_solve="exact",
    inner_sweeps=2,
    tol=1e-6,
    max_sweeps=500,
    start_sweep=0,
    residuals=None,
    on_sweep=None,
    gs_kernel=None,
):
    """Blocked coordinate descent (block Gauss-Seidel) for SPD A.

    Parameters
    ----------
    A : sparse matrix of shape (n, n), symmetric positive definite
    b : ndarray of shape (n,) or (n, c)
    x0 : ndarray like ``b``, optional
        Initial iterate (default ``b`` scaled by 1/diag(A), i.e. a Jacobi step from zero).
    block_rows : int
        Rows per block (consecutive rows of A).
    block_solve : {"exact", "sweeps"}
        Exact block solve by sparse LU, or ``inner_sweeps`` point Gauss-Seidel sweeps.
    tol : float
        Stop when ``||b - A x|| / ||b|| <= tol`` (checked after each sweep).
    max_sweeps : int
        Cap on the total number of sweeps (counting ``start_sweep``).
    start_sweep, residuals :
        Resume state from a checkpoint: sweeps already done and their residual record.
    on_sweep : callable(sweep, x, residuals) -> bool or None, optional
        Called after every sweep; returning False stops the solver (status "stopped").
    gs_kernel : callable, optional
        Replacement for :func:`gauss_seidel_rows` with the same signature (the compiled kernel).

    Returns
    -------
    SolveResult
    """
    A, b = _check_system(A, b)
    vector = b.ndim == 1
    B = b.reshape(len(b), -1)
    n = A.shape[0]
    diag = A.diagonal()
    if np.any(diag <= 0):
        raise ValueError("A must have a positive diagonal")
    if x0 is None:
        X = B / diag[:, None]
    else:
        X = np.array(x0, dtype=np.float64).reshape(B.shape)
    if block_solve not in ("exact", "sweeps"):
        raise ValueError(f"block_solve must be 'exact' or 'sweeps'; got {block_solve!r}")
    residuals = list(residuals) if residuals else [relative_residual(A, B, X)]
    sweep = start_sweep
    status = STATUS_CONVERGED if residuals[-1] <= tol else STATUS_MAX_SWEEPS
    if status == STATUS_CONVERGED or n == 0:
        return SolveResult(X.reshape(b.shape), STATUS_CONVERGED, sweep, residuals)
    blocks = [_Block(A, s, e, block_solve == "exact") for s, e in block_ranges(n, block_rows)]
    gs = gs_kernel or gauss_seidel_rows
    while sweep < max_sweeps:
        for blk in blocks:
            s, e = blk.start, blk.stop
            if blk.lu is not None:
                rhs = B[s:e] - blk.off @ X
                X[s:e] = blk.lu.solve(rhs)
            else:
                gs(
                    indptr=A.indptr,
                    indices=A.indices,
                    data=A.data,
                    b=B,
                    x=X,
                    start=s,
                    stop=e,
                    sweeps=inner_sweeps,
                )
        sweep += 1
        residuals.append(relative_residual(A, B, X))
        if on_sweep is not None and on_sweep(sweep, X.reshape(b.shape), residuals) is False:
            status = STATUS_STOPPED
            break
        if residuals[-1] <= tol:
            status = STATUS_CONVERGED
            break
    else:
        status = STATUS_MAX_SWEEPS
    return SolveResult(X.reshape(b.shape) if vector else X, status, sweep, residuals)
