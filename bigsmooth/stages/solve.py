"""solve: (C + lam L) f = C y on the saved graph, with a checkpoint after every sweep.

The system is permuted into the locality ordering of the order stage, solved by blocked coordinate
descent (or directly, for small tables / reference), and the result is written in input row order.
A checkpoint (iterate, sweep, residual record) is replaced atomically after each sweep; a run that
is started again continues from it.
"""
import logging
import os

import numpy as np

from .. import atomic
from ..kernels import laplacian, solver
from .graph import load_graph

log = logging.getLogger("bigsmooth.solve")


def _fast_gs():
    try:
        from ..kernels._fast import gauss_seidel_rows
    except ImportError:  # numba unavailable: the pure-Python reference still works
        return None
    return gauss_seidel_rows


def load_checkpoint(path):
    if not os.path.exists(path):
        return None
    with np.load(path) as z:
        return {"x": z["x"], "sweep": int(z["sweep"]), "residuals": z["residuals"].tolist()}


def save_checkpoint(path, x, sweep, residuals):
    with atomic.atomic_path(path) as tmp:
        with open(tmp, "wb") as fh:
            np.savez(fh, x=x, sweep=np.int64(sweep), residuals=np.asarray(residuals))


def run(rundir, cfg):
    s = cfg["solve"]
    W = load_graph(rundir, mmap=False)
    Y = np.load(rundir.file("embed", "scores.npy"))
    n, c = Y.shape
    A, cvec = laplacian.system(W, s["lam"], s["laplacian"])
    b = cvec[:, None] * Y
    info = {"method": s["method"], "laplacian": s["laplacian"], "lam": s["lam"], "rows": n, "columns": c}
    if s["lam"] == 0 or W.nnz == 0:
        F = Y.copy()
        info.update(status=solver.STATUS_CONVERGED, sweeps=0, residuals=[0.0], note="nothing to smooth")
    elif s["method"] == "direct":
        F = solver.direct_solve(A, b)
        res = solver.relative_residual(A, b, F)
        info.update(status=solver.STATUS_CONVERGED, sweeps=0, residuals=[res])
    else:
        perm = np.load(rundir.file("order", "order.npy"))
        Ap = A[perm][:, perm].tocsr()
        Ap.sort_indices()
        bp = b[perm]
        ck_path = os.path.join(rundir.stage_dir("checkpoint"), "solver.npz")
        ck = load_checkpoint(ck_path)
        x0, start, record = (Y[perm], 0, None) if ck is None else (ck["x"], ck["sweep"], ck["residuals"])
        if ck is not None:
            log.info("resuming the solver from the checkpoint after sweep %d (residual %.3g)", start, record[-1])

        def on_sweep(sweep, x, residuals):
            save_checkpoint(ck_path, x, sweep, residuals)
            if sweep == 1 or sweep % 10 == 0:
                log.info("sweep %d: relative residual %.3e", sweep, residuals[-1])

        res = solver.block_coordinate_descent(
            Ap, bp, x0=x0, block_rows=s["block_rows"], block_solve=s["block_solve"],
            inner_sweeps=s["inner_sweeps"], tol=s["tol"], max_sweeps=s["max_sweeps"], start_sweep=start,
            residuals=record, on_sweep=on_sweep, gs_kernel=_fast_gs())
        F = np.empty_like(res.x)
        F[perm] = res.x
        info.update(status=res.status, sweeps=res.sweeps, residuals=res.residuals,
                    block_rows=s["block_rows"], block_solve=s["block_solve"])
        if res.status != solver.STATUS_CONVERGED:
            log.warning("the solver stopped after %d sweeps at relative residual %.3e without reaching tol %.1e "
                        "(status %s); raise solve.max_sweeps or lower solve.lam", res.sweeps,
                        res.final_residual, s["tol"], res.status)
    info["final_residual"] = info["residuals"][-1]
    atomic.save_npy(os.path.join(rundir.stage_dir("solve"), "adjusted.npy"), F)
    atomic.write_json(rundir.file("solve", "solve.json"), info)
    log.info("solve: %s after %d sweeps, relative residual %.3e", info["status"], info["sweeps"],
             info["final_residual"])
    return {k: v for k, v in info.items() if k != "residuals"}
