"""solve: (C + lam L) f = C y on the saved graph, with a checkpoint after every sweep.

The system is permuted into the order stage's group ordering and solved by

- ``sweep-cg`` (default): conjugate gradients preconditioned by symmetric Gauss-Seidel sweeps over
  the block groups (:mod:`bigsmooth.kernels.sweepcg`), groups swept in parallel by joblib workers
  (threads or loky processes over memmaps in the run directory), or as tasks on the Dask cluster
  when run.engine = "dask": by default the vectors are memory-mapped files in the run directory
  and a sweep task that runs twice because its worker died sends the solver back to its last
  checkpoint; with run.dask_solve = "by-value" a task gets its group's rows and returns its new
  rows (for workers on other hosts; a task that runs twice does no harm);
- ``blocks``: plain blocked coordinate descent (block Gauss-Seidel);
- ``direct``: a sparse direct solve (small tables; the reference).

With solve.stability = mu > 0 the rows whose raw scores equal those of the version currently
published (last night's) are pulled towards its adjusted scores t: (C + mu C_S + lam L) f = C y +
mu C_S t, S those rows, i.e. min ||f - y||^2_C + mu ||f - t||^2_{C_S} + lam f'Lf; only the diagonal
and the right-hand side change, so every method solves it as it is.

The result is written in input row order. The checkpoint (iterate and solver state) is replaced
atomically after every ``solve.checkpoint_every`` sweeps; a run that is started again continues
from it and reaches the same bits as an uninterrupted run.
"""

import contextlib
import logging
import os
from dataclasses import dataclass

import numpy as np

from .. import artifacts as art
from .. import atomic, faults, logs, nightly, parallel
from ..errors import EngineUnavailableError
from ..kernels import laplacian, solver, sweepcg

log = logging.getLogger("bigsmooth.solve")

TASK_RERUNS = 3  # returns to the checkpoint after group-sweep tasks ran twice, before giving up (exit 75)


def _fast_gs():
    try:
        from ..kernels._fast import gauss_seidel_rows
    except ImportError:  # numba unavailable: the pure-Python reference still works
        return None
    return gauss_seidel_rows


def save_checkpoint(path, **arrays):
    with atomic.atomic_path(path) as tmp:
        with open(tmp, "wb") as fh:
            np.savez(fh, **arrays)
        faults.point("checkpoint:write")


def _published(cfg, fp, raw=False, version=None):
    """The version currently published in output.path (or ``version``), joined to tonight's rows by
    id: (version, rows (m,) tonight's row numbers, adjusted (m, c), raw (m, c) or None), or (None,
    reason)."""
    import glob

    import duckdb

    from ..atomic import read_json
    from ..table import ROW, Source, connect_budget, quote

    inp, out = cfg["input"], cfg["output"]
    pointer = os.path.join(out["path"], art.OUTPUT_POINTER)
    if version is None and not os.path.exists(pointer):
        return None, "nothing published yet"
    version = version or read_json(pointer)["version"]
    files = sorted(glob.glob(os.path.join(out["path"], version, "**", "*.parquet"), recursive=True))
    con = connect_budget(cfg["run"]["memory_mb"])
    src = Source(con, fp)
    idq = quote(inp["id"])
    cols = [quote(c + out["suffix"]) for c in inp["scores"]]
    if raw:
        cols += [quote(c) for c in inp["scores"]]
    try:
        t = src.fetch_arrow(
            con,
            f"SELECT src.{ROW}, {', '.join('p.' + a for a in cols)} FROM {{src}} "
            f"JOIN read_parquet($prev, union_by_name = true) p ON src.{idq} = p.{idq}",
            prev=files,
        )
    except duckdb.Error as exc:
        log.warning("cannot read the published version %s: %s", version, str(exc).splitlines()[0])
        return None, f"cannot read version {version}"
    finally:
        con.close()
    c = len(inp["scores"])
    rows = t.column(0).to_numpy()
    got = np.empty((len(rows), len(cols)))
    for j in range(len(cols)):
        got[:, j] = t.column(j + 1).to_numpy(zero_copy_only=False)
    return (version, rows, got[:, :c], got[:, c:] if raw else None), None


def previous_scores(rundir, cfg, fp, Y):
    """The warm-start iterate: the adjusted scores currently published in output.path for ids in
    both tables, the raw score for the others. Returns (X0, record)."""
    got, reason = _published(cfg, fp)
    if got is None:
        log.info("warm start: %s in %s; starting from the raw scores", reason, cfg["output"]["path"])
        return Y, {"used": False, "reason": reason}
    version, rows, adjusted, _ = got
    X0 = np.array(Y, dtype=np.float64)
    X0[rows] = adjusted
    log.info(
        "warm start from version %s: %d of %d rows start from last night's adjusted score, %d new",
        version,
        len(rows),
        len(Y),
        len(Y) - len(rows),
    )
    return X0, {
        "used": True,
        "version": version,
        "rows_matched": int(len(rows)),
        "rows_new": int(len(Y) - len(rows)),
    }


def anchor_of(cfg, fp, Y):
    """solve.stability: the rows of tonight's table whose raw scores equal those of the version
    currently published (every score column, compared as published), and that version's adjusted
    scores for them. Returns (rows (m,) int64, target (m, c), record); no rows when nothing is
    published or it cannot be read (the record says why)."""
    n, c = Y.shape
    mu = cfg["solve"]["stability"]
    last, reason = nightly.last_night(cfg["output"]["path"], nightly.table_key(fp))
    if last is not None and os.path.exists(os.path.join(cfg["output"]["path"], art.OUTPUT_POINTER)):
        current = atomic.read_json(os.path.join(cfg["output"]["path"], art.OUTPUT_POINTER))["version"]
        if last != current:
            log.info(
                "solve.stability: the current version %s is of tonight's table (an earlier run); "
                "anchoring to the version it took as last night, %s",
                current,
                last,
            )
    got, reason = _published(cfg, fp, raw=True, version=last) if reason is None else (None, reason)
    if got is None:
        log.warning(
            "solve.stability = %g: %s in %s, so no row is anchored tonight", mu, reason, cfg["output"]["path"]
        )
        return np.empty(0, np.int64), np.empty((0, c)), {"used": False, "weight": mu, "reason": reason}
    version, rows, adjusted, raw = got
    same = np.all(raw == np.asarray(Y, dtype=np.float64)[rows], axis=1)
    order = np.argsort(rows[same], kind="stable")
    kept, target = rows[same][order].astype(np.int64), adjusted[same][order]
    rec = {
        "used": True,
        "weight": mu,
        "version": version,
        "rows_anchored": int(len(kept)),
        "rows_rescored": int(len(rows) - len(kept)),
        "rows_new": int(n - len(rows)),
    }
    log.info(
        "solve.stability = %g: %d rows pulled towards their adjusted score in version %s (raw scores "
        "unchanged); %d re-scored and %d new rows are not",
        mu,
        rec["rows_anchored"],
        version,
        rec["rows_rescored"],
        rec["rows_new"],
    )
    return kept, target, rec


def anchored(cvec, Y, rows, target, mu):
    """(c_eff, b) of the anchored system (C + mu C_S + lam L) f = C y + mu C_S t: c_eff = c (1 + mu)
    on the anchored ``rows`` (c elsewhere), b = c y + mu c t there (c y elsewhere). With no rows (or
    mu = 0) the published method's (c, c y)."""
    c_eff = np.array(cvec, dtype=np.float64)
    b = c_eff[:, None] * Y
    if len(rows) and mu > 0:
        c_eff[rows] *= 1.0 + mu
        b[rows] += (mu * np.asarray(cvec, dtype=np.float64)[rows])[:, None] * target
    return c_eff, b


def _sweeps_saved(system, b, Yp, X0p, residuals, sweeps):
    """Estimated sweeps a cold start (the raw scores, scaled as the solver scales them) would have
    needed beyond this warm start: log(cold start residual / warm start residual) over the mean log
    reduction per sweep."""
    nb = np.linalg.norm(b)
    _, ay = sweepcg.scaled_start(Yp, system.matvec(Yp), b)
    cold = np.linalg.norm(b - ay) / nb
    warm = np.linalg.norm(b - system.matvec(X0p)) / nb
    rate = np.log(residuals[-1] / residuals[0]) / max(sweeps, 1) if sweeps and residuals[0] > 0 else 0.0
    est = float(np.log(cold / warm) / -rate) if rate < 0 and warm > 0 else 0.0
    return {
        "start_residual_cold": float(cold),
        "start_residual_warm": float(warm),
        "estimated_sweeps_saved": round(est, 1),
    }


def workers_for(s):
    w = s["workers"] or (os.cpu_count() or 1)
    return max(1, min(w, s["groups"]))


@dataclass
class Problem:
    """One solve: (C + lam L) f = C y in input row order, with the settings of [solve].

    ``Y`` raw scores (n, c); ``cvec`` the diagonal of C (n,), with solve.stability's anchor added
    (:func:`anchored`); ``b`` = C y (plus the anchor's term); ``perm`` the order
    stage's row order; ``X0`` the start (raw scores, or last night's for a warm start); ``cold``
    whether the start is the raw scores (then scaled, see sweepcg.scaled_start); ``ck_path`` the
    checkpoint file."""

    rundir: object
    s: dict
    Y: np.ndarray
    cvec: np.ndarray
    b: np.ndarray
    perm: np.ndarray
    X0: np.ndarray
    cold: bool
    ck_path: str
    make_executor: object = parallel.make_executor  # (workers, backend) -> executor; the context's
    task_executor: object = (
        None  # () -> a Dask executor when run.engine = "dask" (the group sweeps are its tasks)
    )
    by_value: bool = False  # the group sweeps' tasks get and return their rows by value (run.dask_solve)


def _sweep_tasks(ctx):
    """The Dask executor for the group sweeps (a function that connects), or None for local
    workers: run.engine = "dask" and run.dask_solve allows it (see the rule)."""
    run = ctx.cfg["run"]
    if run["engine"] != "dask" or run["dask_solve"] == "never":
        return None
    if run["dask_solve"] == "by-value":
        return ctx.task_executor
    if run["dask_solve"] == "same-host":
        ex = ctx.task_executor()
        try:
            here = ex.on_this_host()
        finally:
            ex.shutdown()
        if not here:
            log.info(
                "group sweeps run here: some Dask workers run on other hosts, and the sweeps share "
                "memory-mapped files (run.dask_solve = 'same-host'; see its rule)"
            )
            return None
    return ctx.task_executor


def _sweep_cg(pb):
    """The default solver on the order stage's split graph. The scaled system is written to
    memory-mapped files in solve/system (its pages are the kernel's to evict), so the process holds
    only O(n) vectors plus the pages the sweeps are reading."""
    rundir, s, perm = pb.rundir, pb.s, pb.perm
    n, c = pb.b.shape
    split = art.load_split(rundir)
    art.SOLVE_SYSTEM.folder(rundir)

    def alloc(name, size, dtype):
        return atomic.new_memmap(art.SOLVE_SYSTEM.path(rundir, name), dtype, (size,))

    # the raw weights leave the resident memory part by part as they are scaled (the sweeps read
    # only the scaled copy)
    system = sweepcg.scale_split(split, s["lam"], pb.cvec[perm], alloc=alloc, release=atomic.release_pages)
    bounds = split.bounds
    atomic.release_pages(split.degree)
    del split
    with contextlib.ExitStack() as stack:
        if s["backend"] == "processes" or (pb.task_executor is not None and not pb.by_value):
            # process workers and Dask workers map the solver's vectors as files too (Dask's in
            # the run directory, which every worker mounts)
            work = stack.enter_context(
                parallel.work_files(
                    n,
                    c,
                    parallel.shm_key(rundir.path),
                    art.SOLVE_WORK.path(rundir),
                    shared_memory=pb.task_executor is None,
                )
            )
        else:
            work = sweepcg.Work.allocate(n, c)
        for attempt in range(TASK_RERUNS + 1):
            try:
                return _sweep_cg_on(pb, system, bounds, work)
            except parallel.TaskRerun as exc:
                if attempt == TASK_RERUNS:
                    raise EngineUnavailableError(
                        f"group-sweep tasks were run twice {attempt + 1} times ({exc}): Dask workers "
                        "keep dying; the run resumes from the solver's last checkpoint when started again"
                    ) from None
                log.warning(
                    "%s: a group sweep may be half done, so the solver goes back to its last "
                    "checkpoint (or the start)",
                    exc,
                )


def _sweep_cg_on(pb, system, bounds, work):
    s, b, Y, perm, ck_path, X0 = pb.s, pb.b, pb.Y, pb.perm, pb.ck_path, pb.X0
    ck = art.SOLVE_CHECKPOINT.load(pb.rundir) if art.SOLVE_CHECKPOINT.exists(pb.rundir) else None
    state = None
    if ck is not None and ck.get("method") is not None and str(ck["method"]) == "sweep-cg":
        work.x[:], work.r[:], work.p[:] = ck["x"], ck["r"], ck["p"]
        state = {
            "sweep": int(ck["sweep"]),
            "rho": ck["rho"],
            "beta": ck["beta"],
            "target": float(ck["target"]),
            "nbhat": float(ck["nbhat"]),
            "residuals": ck["residuals"].tolist(),
            "checks": [tuple(v) for v in ck["checks"].tolist()],
        }
        log.info("resuming the solver from the checkpoint after sweep %d", state["sweep"])
    every = s["checkpoint_every"]

    def on_sweep(st, wk):
        faults.point(f"solve:sweep:{st['sweep']}")
        if st["sweep"] % every == 0:
            save_checkpoint(
                ck_path,
                method=np.array("sweep-cg"),
                x=wk.x,
                r=wk.r,
                p=wk.p,
                rho=st["rho"],
                beta=st["beta"],
                sweep=np.int64(st["sweep"]),
                target=np.float64(st["target"]),
                nbhat=np.float64(st["nbhat"]),
                residuals=np.asarray(st["residuals"]),
                checks=np.asarray(st["checks"], dtype=np.float64).reshape(-1, 2),
            )
        if st["sweep"] == 1 or st["sweep"] % 10 == 0:
            logs.event(
                log,
                "sweep",
                "sweep %d: preconditioned residual %.3e",
                st["sweep"],
                st["residuals"][-1],
                sweep=int(st["sweep"]),
                residual=float(st["residuals"][-1]),
            )

    nw = workers_for(s)
    share = None
    if pb.task_executor is not None:
        executor = pb.task_executor()
        if pb.by_value:
            # a task gets its group's rows and returns its new rows (written back here): it writes
            # nothing, so it may run twice; the whole t goes to the cluster once a phase
            share = executor.share
            executor.fault_points("solve:task")
            how = "rows by value"
        else:
            # a sweep updates the vectors in place: a task must not run twice (see _sweep_cg)
            executor.run_once(os.path.join(art.SOLVE_WORK.path(pb.rundir), "started"), "solve:task")
            how = "vectors in memory-mapped files"
        log.info(
            "group sweeps: %d groups a phase as tasks on %s (%s)", len(bounds) - 1, executor.describe(), how
        )
    else:
        executor = pb.make_executor(nw, s["backend"])
    try:
        # a cold start (the raw scores) is scaled to the multiple closest to the solution; a warm
        # start (last night's adjusted scores) is taken as it is
        res = sweepcg.sweep_cg(
            system,
            b[perm],
            x0=X0[perm],
            tol=s["tol"],
            max_sweeps=s["max_sweeps"],
            omega=s["relaxation"],
            scale_start=pb.cold,
            executor=executor,
            work=work,
            state=state,
            on_sweep=on_sweep,
            by_value=pb.by_value,
            share=share,
        )
    finally:
        # process workers too: they keep the vectors' files mapped, so their memory goes with them
        if executor is not None:
            executor.shutdown()
    info = {
        "status": res.status,
        "sweeps": res.sweeps,
        "residuals": res.residuals,
        "true_residual_checks": [list(ch) for ch in res.checks],
        "final_residual": res.final_residual,
        "groups": len(bounds) - 1,
        "workers": nw,
        "backend": s["backend"],
        "relaxation": s["relaxation"],
    }
    if s["warm_start"]:
        info["warm_start_effect"] = _sweeps_saved(
            system, b[perm], Y[perm], X0[perm], res.residuals, res.sweeps
        )
    return res.x, info


def _blocks(pb, A):
    s, b, perm, ck_path, X0 = pb.s, pb.b, pb.perm, pb.ck_path, pb.X0
    Ap = A[perm][:, perm].tocsr()
    Ap.sort_indices()
    ck = art.SOLVE_CHECKPOINT.load(pb.rundir) if art.SOLVE_CHECKPOINT.exists(pb.rundir) else None
    if ck is not None and str(ck.get("method", "")) == "blocks":
        x0, start, record = ck["x"], int(ck["sweep"]), ck["residuals"].tolist()
        log.info("resuming the solver from the checkpoint after sweep %d (residual %.3g)", start, record[-1])
    else:
        x0, start, record = X0[perm], 0, None
    every = s["checkpoint_every"]

    def on_sweep(sweep, x, residuals):
        faults.point(f"solve:sweep:{sweep}")
        if sweep % every == 0:
            save_checkpoint(
                ck_path,
                method=np.array("blocks"),
                x=x,
                sweep=np.int64(sweep),
                residuals=np.asarray(residuals),
            )
        if sweep == 1 or sweep % 10 == 0:
            logs.event(
                log,
                "sweep",
                "sweep %d: relative residual %.3e",
                sweep,
                residuals[-1],
                sweep=int(sweep),
                residual=float(residuals[-1]),
            )

    res = solver.block_coordinate_descent(
        Ap,
        b[perm],
        x0=x0,
        block_rows=s["block_rows"],
        block_solve=s["block_solve"],
        inner_sweeps=s["inner_sweeps"],
        tol=s["tol"],
        max_sweeps=s["max_sweeps"],
        start_sweep=start,
        residuals=record,
        on_sweep=on_sweep,
        gs_kernel=_fast_gs(),
    )
    return res.x, {
        "status": res.status,
        "sweeps": res.sweeps,
        "residuals": res.residuals,
        "final_residual": res.final_residual,
        "block_rows": s["block_rows"],
        "block_solve": s["block_solve"],
    }


def _system(W, s, cvec, c_eff):
    """A = C + lam L, plus the anchor's diagonal (c_eff - c) when solve.stability anchors rows."""
    import scipy.sparse as sp

    A, _ = laplacian.system(W, s["lam"], s["laplacian"])
    extra = c_eff - cvec
    return (A + sp.diags(extra)).tocsr() if np.any(extra) else A


def run(ctx):
    """The solve stage (see the module docstring)."""
    rundir, cfg = ctx.rundir, ctx.cfg
    s = cfg["solve"]
    Y = art.EMBED_SCORES.load(rundir)
    n, c = Y.shape
    if s["method"] == "sweep-cg":
        # degrees from the split graph (permuted) so that W itself is never loaded
        perm = art.ORDER_PERM.load(rundir)
        deg = np.empty(n)
        deg[perm] = art.load_split(rundir).degree
        W = None
        edges = int(np.count_nonzero(deg))
    else:
        W = art.GRAPH_WEIGHTS.load(rundir)
        deg = laplacian.degrees(W)
        edges = W.nnz
    cvec = laplacian.row_weights_from_degrees(deg, s["laplacian"])
    info = {"method": s["method"], "laplacian": s["laplacian"], "lam": s["lam"], "rows": n, "columns": c}
    a_rows, a_target = np.empty(0, np.int64), np.empty((0, c))  # no row anchored
    if s["stability"] > 0 and s["lam"] != 0 and edges:
        # kept in the run directory, as the warm start is, so that a resumed run solves the same system
        if art.SOLVE_ANCHOR.exists(rundir) and art.SOLVE_ANCHOR_INFO.exists(rundir):
            a_rows = art.SOLVE_ANCHOR.load(rundir, member="rows")
            a_target = art.SOLVE_ANCHOR.load(rundir, member="target")
            info["anchor"] = art.SOLVE_ANCHOR_INFO.load(rundir)
        else:
            a_rows, a_target, info["anchor"] = anchor_of(cfg, ctx.fp, Y)
            art.SOLVE_ANCHOR.save(rundir, a_target, member="target")
            art.SOLVE_ANCHOR.save(rundir, a_rows, member="rows")
            art.SOLVE_ANCHOR_INFO.save(rundir, info["anchor"])
    c_eff, b = anchored(cvec, Y, a_rows, a_target, s["stability"])
    ck_path = art.SOLVE_CHECKPOINT.path(rundir)
    art.SOLVE_CHECKPOINT.folder(rundir)
    if s["lam"] == 0 or edges == 0:
        F = Y.copy()
        info.update(
            status=solver.STATUS_CONVERGED,
            sweeps=0,
            residuals=[0.0],
            final_residual=0.0,
            note="nothing to smooth",
        )
    elif s["method"] == "direct":
        A = _system(W, s, cvec, c_eff)
        F = solver.direct_solve(A, b)
        res = solver.relative_residual(A, b, F)
        info.update(status=solver.STATUS_CONVERGED, sweeps=0, residuals=[res], final_residual=res)
    else:
        perm = art.ORDER_PERM.load(rundir)
        X0 = Y
        if s["warm_start"]:
            # kept in the run directory so that a resumed run starts from the same iterate even if
            # another job has published since
            if art.SOLVE_X0.exists(rundir) and art.SOLVE_X0_INFO.exists(rundir):
                X0, info["warm_start"] = art.SOLVE_X0.load(rundir), art.SOLVE_X0_INFO.load(rundir)
            else:
                X0, info["warm_start"] = previous_scores(rundir, cfg, ctx.fp, Y)
                art.SOLVE_X0.save(rundir, X0)
                art.SOLVE_X0_INFO.save(rundir, info["warm_start"])
        if s["method"] == "sweep-cg":
            # decided from the warm-start record, not from X0's identity: a resumed run reads X0
            # back from solve/x0.npy
            cold = not info.get("warm_start", {}).get("used", False)
            tasks = _sweep_tasks(ctx)
            by_value = tasks is not None and ctx.cfg["run"]["dask_solve"] == "by-value"
            Xp, more = _sweep_cg(
                Problem(rundir, s, Y, c_eff, b, perm, X0, cold, ck_path, ctx.executor, tasks, by_value)
            )
        else:
            A = _system(W, s, cvec, c_eff)
            Xp, more = _blocks(Problem(rundir, s, Y, c_eff, b, perm, X0, False, ck_path), A)
        info.update(more)
        F = np.empty_like(Xp)
        F[perm] = Xp
        if info["status"] != solver.STATUS_CONVERGED:
            log.warning(
                "the solver stopped after %d sweeps at relative residual %.3e without reaching tol %.1e "
                "(status %s); raise solve.max_sweeps or lower solve.lam",
                info["sweeps"],
                info["final_residual"],
                s["tol"],
                info["status"],
            )
    art.SOLVE_ADJUSTED.save(rundir, F)
    art.SOLVE_INFO.save(rundir, info)
    logs.event(
        log,
        "solved",
        "solve: %s after %d sweeps, relative residual %.3e",
        info["status"],
        info["sweeps"],
        info["final_residual"],
        status=info["status"],
        sweeps=int(info["sweeps"]),
        residual=float(info["final_residual"]),
    )
    return {k: v for k, v in info.items() if k not in ("residuals", "true_residual_checks")}
