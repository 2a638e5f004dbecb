"""Benchmark: the whole job on the demo scenario at a given size, and the solver against scipy's CG.

    python -m bigsmooth.bench --rows 1000000 [--workers 2] [--dir DIR] [--json FILE]
    python -m bigsmooth.bench --rows 1000000 --race-only     (the race again on the run left in DIR)
    python -m bigsmooth.bench --rows 1000000 --late 20000 --late-only   (late rows on that run)

1. Generates the demo table (not timed as part of the job) and runs ``bigsmooth run`` in a fresh
   child process, so numba compilation is included; reads per-stage wall times from the manifest
   and the child's peak RSS (getrusage of waited-for children: the job and its workers).
2. Neighbour recall@k of the graph against exact brute-force neighbours of a 2,000-row sample.
3. On the job's own graph, for lam * mean degree in (10, 100): our solver (1 worker, and
   ``--workers`` workers on each of ``--backends``: threads, the job's default, and joblib's loky
   processes over memory-mapped files) and scipy.sparse.linalg.cg with a Jacobi preconditioner,
   side by side in this process, each from the same start (the job's: the raw scores scaled to
   the multiple closest to the solution) to the same relative residual, each timed from the saved
   graph to the solution (CG: assembling A = C + lam L from W and the preconditioner; ours:
   scaling the order stage's split graph for this lam; starting the worker processes is not
   timed). The reordering and split themselves do not depend on lam and are
   done once per graph by the order stage (its time is in the stage table). CG runs in input row
   order, as a user of scipy would run it; for information the table also gives CG on our row
   order (``cg_local_order_seconds``: A permuted untimed, plus CG's setup time). The table gives
   times and the ratio ours / CG, with and without each side's setup. Each best time and its own
   setup time come from the same run.

4. With ``--late N``: N new demo rows (another seed, ids above the night's) scored by
   ``bigsmooth score`` in fresh child processes in batches of ``--late-batch`` (1,000): the first
   call builds the run's late-row index, the second is timed as a cold start (loading and scoring
   seconds from its record, rows per second); then recall@k of the late rows' neighbours against
   an exact search over the night (``--sample`` rows).

Prints one table and writes it as JSON. Timings are from this machine at this moment: compare
ratios measured in the same run, not absolute seconds across machines.
"""

import argparse
import contextlib
import glob
import json
import os
import platform
import resource
import shutil
import subprocess
import sys
import time

import numpy as np

from . import artifacts as art
from .kernels import graph as gk


def machine_info():
    """Cores, memory and the processor's model and cache sizes (ratios differ between processors:
    CG's scattered reads depend on how much of its vectors stay in cache)."""
    info = {
        "cores": os.cpu_count(),
        "memory_gib": round(os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2**30, 1),
        "python": platform.python_version(),
        "platform": platform.platform(),
    }
    try:
        with open("/proc/cpuinfo") as fh:
            info["cpu"] = next(line.split(":", 1)[1].strip() for line in fh if line.startswith("model name"))
    except (OSError, StopIteration):
        info["cpu"] = platform.processor() or "unknown"
    caches = {}
    for d in sorted(glob.glob("/sys/devices/system/cpu/cpu0/cache/index*")):
        try:
            level, kind, size = (open(os.path.join(d, f)).read().strip() for f in ("level", "type", "size"))
        except OSError:
            continue
        if kind != "Instruction":
            caches[f"L{level}"] = size
    info["caches"] = caches  # as cpu0 sees them (L3 is shared)
    return info


def _warm_worker(pause):
    """Load the compiled kernels in a worker process, then hold it a moment so that every worker
    gets one of these tasks."""
    from .kernels import _fast

    t = np.zeros((1, 1))
    _fast.update_sweep(
        x=t, r=t.copy(), t=t.copy(), ap=t.copy(), alpha=np.zeros(1), start=0, stop=1, rr=np.zeros(1)
    )
    time.sleep(pause)


def _contenders(workers, backends):
    """(key, workers, backend): one worker, then ``workers`` on each backend ('threads' keeps the
    plain key ``w{workers}``; 'processes' is ``w{workers}_processes``)."""
    out = [("w1", 1, "threads")]
    if workers > 1:
        for be in backends:
            out.append((f"w{workers}" if be == "threads" else f"w{workers}_{be}", workers, be))
    return out


def solver_race(rundir, cfg, lam_degrees, workers, repeat=1, backends=("threads",)):
    """Our solver vs scipy CG (Jacobi) on the job's graph; returns a list of result dicts.

    Each contender runs ``repeat`` times in turn and keeps its best time (the usual way to time on
    a noisy machine, as ``timeit`` does). With the 'processes' backend (joblib's loky workers), as in
    the job, the scaled system is written to memory-mapped files beside the run (counted in its
    setup) and the solver's vectors go to :func:`bigsmooth.parallel.work_files`."""
    import tempfile

    import scipy.sparse as sp
    import scipy.sparse.linalg as spla
    from .kernels import laplacian, sweepcg
    from .rundir import RunDir
    from .parallel import make_executor, work_files

    rd = RunDir(rundir)
    W = art.GRAPH_WEIGHTS.load(rd)
    Y = art.EMBED_SCORES.load(rd)[:, :1]
    perm = art.ORDER_PERM.load(rd)
    split = art.load_split(rd)
    tol = cfg["solve"]["tol"]
    mean_deg = float(np.asarray(W.sum(axis=1)).mean())
    # warm the compiled kernels on a tiny system so compilation is not timed
    tiny = sp.csr_matrix(np.array([[2.0, -1.0], [-1.0, 2.0]]))
    sweepcg.sweep_cg(sweepcg.prepare(tiny, [0, 1, 2]), np.ones((2, 1)))
    sweepcg.prepare_from_graph(
        sp.csr_matrix(np.array([[0.0, 1.0], [1.0, 0.0]])), 1.0, np.ones(2), [0, 1], [0, 2]
    )
    sweepcg.scale_split(split, 1.0, np.ones(split.n)).matvec(np.ones((split.n, 1)))
    out = []
    pool = None
    for target in lam_degrees:
        lam = target / mean_deg
        row = {"lam_times_mean_degree": target, "lam": lam, "repeat": repeat}
        for _ in range(repeat):
            # scipy: assemble A = C + lam (D - W) from the (already validated) graph the short way a
            # scipy user would, Jacobi preconditioner, CG
            t0 = time.perf_counter()
            deg = np.asarray(W.sum(axis=1)).ravel()
            c = laplacian.row_weights_from_degrees(deg, cfg["solve"]["laplacian"])
            diag = c + lam * deg
            A = (sp.diags(diag, format="csr") - lam * W).tocsr()
            b = c[:, None] * Y
            M = sp.diags(1.0 / diag)
            # the same start as ours (and the job's): the raw scores scaled to the multiple closest
            # to the solution in the A-norm (one product with A, counted in CG's setup)
            x0, _ = sweepcg.scaled_start(Y, A @ Y, b)
            t_setup = time.perf_counter() - t0
            count = [0]
            x, info = spla.cg(
                A,
                b[:, 0],
                x0=x0[:, 0],
                rtol=tol,
                M=M,
                maxiter=100000,
                callback=lambda xk: count.__setitem__(0, count[0] + 1),
            )
            t_all = time.perf_counter() - t0
            if t_all < row.get("cg_seconds", np.inf):
                row.update(
                    cg_seconds=t_all,
                    cg_setup_seconds=t_setup,
                    cg_iterations=count[0],
                    cg_residual=float(np.linalg.norm(b[:, 0] - A @ x) / np.linalg.norm(b)),
                )
            # for information: CG on the same locality order as ours (A permuted, not timed)
            Ap = A[perm][:, perm].tocsr()
            t0 = time.perf_counter()
            spla.cg(Ap, b[perm, 0], x0=x0[perm, 0], rtol=tol, M=sp.diags(1.0 / Ap.diagonal()), maxiter=100000)
            t_local = time.perf_counter() - t0 + t_setup
            row["cg_local_order_seconds"] = min(t_local, row.get("cg_local_order_seconds", np.inf))
            del A, M, x, x0, Ap
            for key, w, backend in _contenders(workers, backends):
                with (
                    tempfile.TemporaryDirectory(prefix="race-", dir=rundir) as tmp,
                    contextlib.ExitStack() as st,
                ):
                    alloc = work = None
                    if backend == "processes":
                        # as in the job: the scaled system in files beside the run, the vectors in
                        # shared memory where there is room (bigsmooth.parallel.work_files)
                        def alloc(name, size, dtype):
                            return np.lib.format.open_memmap(
                                os.path.join(tmp, f"{name}.npy"), mode="w+", dtype=dtype, shape=(size,)
                            )

                        work = st.enter_context(
                            work_files(len(perm), 1, f"race-{os.getpid()}", os.path.join(tmp, "work"))
                        )
                        # one pool of worker processes for the whole race, started untimed; a new
                        # worker's first solve is slower (the best of the repeats counts)
                        if pool is None:
                            pool = make_executor(w, backend)
                            list(pool.map(_warm_worker, [0.2] * w))
                        executor = pool
                    else:
                        executor = make_executor(w, backend)
                    # ours: scale the split graph for this lam, then sweep
                    t0 = time.perf_counter()
                    system = sweepcg.scale_split(split, lam, c[perm], alloc=alloc)
                    t_setup = time.perf_counter() - t0
                    t1 = time.perf_counter()
                    res = sweepcg.sweep_cg(
                        system,
                        b[perm],
                        x0=Y[perm],
                        tol=tol,
                        executor=executor,
                        work=work,
                        omega=cfg["solve"]["relaxation"],
                        scale_start=True,
                    )
                    t_all = t_setup + time.perf_counter() - t1
                    if executor is not None and executor is not pool:
                        executor.shutdown()
                    if t_all < row.get(f"ours_{key}_seconds", np.inf):
                        row.update(
                            {
                                f"ours_{key}_seconds": t_all,
                                f"ours_{key}_setup_seconds": t_setup,
                                f"ours_{key}_sweeps": res.sweeps,
                                f"ours_{key}_residual": res.final_residual,
                            }
                        )
                    del system, res, work
        cg_iter = row["cg_seconds"] - row["cg_setup_seconds"]
        for key, _, _ in _contenders(workers, backends):
            row[f"ratio_{key}"] = row[f"ours_{key}_seconds"] / row["cg_seconds"]
            # the same without either side's setup (iterations only), for information
            row[f"ratio_{key}_no_setup"] = (
                row[f"ours_{key}_seconds"] - row[f"ours_{key}_setup_seconds"]
            ) / cg_iter
        out.append(row)
    if pool is not None:
        pool.shutdown()
    return out


def exact_script(rundir, rows=None):
    """The contender: what a careful user would write with numpy, scipy and scikit-learn in memory,
    from the same fair-space embedding and raw scores (it skips reading the table and learning the
    fair space, which favours it): exact neighbours by scikit-learn's brute force, the heat-kernel
    weights with the job's global scale rule, max-symmetrised, scipy's csgraph Laplacian, and
    (I + lam L) f = y (or the random-walk system) by scipy's CG with a Jacobi preconditioner to a
    relative residual of 1e-6. ``rows``: only the first rows (to measure its growth). Returns
    (adjusted scores of the first score column, seconds)."""
    import scipy.sparse as sp
    from scipy.sparse.csgraph import laplacian
    from scipy.sparse.linalg import LinearOperator, cg
    from sklearn.neighbors import NearestNeighbors

    from .config import load_config

    cfg = load_config(os.path.join(os.path.dirname(os.path.dirname(rundir)), "bigsmooth.toml"))
    k, lam = cfg["graph"]["neighbours"], cfg["solve"]["lam"]
    t0 = time.perf_counter()
    E = np.asarray(art.EMBED_EMBEDDING.load(rundir, mmap=True)[:rows], dtype=np.float64)
    y = np.asarray(art.EMBED_SCORES.load(rundir, mmap=True)[:rows, 0], dtype=np.float64)
    n = len(E)
    dist, ind = NearestNeighbors(n_neighbors=k, algorithm="brute").fit(E).kneighbors()
    sigma = float(np.median(dist[dist > 0])) * cfg["graph"]["scale_factor"]
    W = sp.csr_matrix(
        (np.exp(-(dist.ravel() ** 2) / sigma**2), (np.repeat(np.arange(n), k), ind.ravel())), (n, n)
    )
    W = W.maximum(W.T).tocsr()
    L = laplacian(W)
    C = sp.diags(
        np.asarray(W.sum(axis=1)).ravel() if cfg["solve"]["laplacian"] == "random_walk" else np.ones(n)
    )
    A = (C + lam * L).tocsr()
    d = A.diagonal()
    M = LinearOperator((n, n), matvec=lambda v: v / d)
    f, info = cg(A, C @ y, x0=y, rtol=1e-6, M=M, maxiter=10_000)
    return f, time.perf_counter() - t0


def _script_child(rundir, rows, out):
    f, seconds = exact_script(rundir, rows)
    np.save(out, f)
    return seconds


def compare_with_script(rundir, rows, max_rows):
    """Run :func:`exact_script` in a fresh child process (imports included, as for the job) on the
    whole table when it has at most ``max_rows`` rows, and compare its scores with the job's
    (correlation, decisions agreeing at the job's select rate). Above that, time it on the first
    max_rows / 4 and max_rows / 2 rows and extrapolate with the fitted power of n (marked so)."""
    adjusted = art.SOLVE_ADJUSTED.load(rundir, mmap=True)
    cfg_rate = art.AUDIT_REPORT_JSON.load(rundir)["select_rate"]

    def child(m):
        out = os.path.join(os.path.dirname(os.path.dirname(rundir)), f"script-{m}.npy")
        code = (
            "import sys, time; t0 = time.perf_counter(); from bigsmooth.bench import _script_child; "
            f"_script_child({rundir!r}, {m}, {out!r}); print(time.perf_counter() - t0)"
        )
        t0 = time.perf_counter()
        proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
        if proc.returncode != 0:
            raise SystemExit(f"the contender script failed:\n{proc.stderr[-2000:]}")
        return time.perf_counter() - t0, np.load(out)

    if rows <= max_rows:
        seconds, f = child(rows)
        ours = np.asarray(adjusted[:, 0])
        sel = lambda v: v >= np.quantile(v, 1 - cfg_rate)  # noqa: E731
        return {
            "script_seconds": seconds,
            "script_extrapolated": False,
            "script_correlation": float(np.corrcoef(f, ours)[0, 1]),
            "script_decisions_agree": float(np.mean(sel(f) == sel(ours))),
            "script_max_abs_difference": float(np.max(np.abs(f - ours))),
        }
    sizes = [max_rows // 4, max_rows // 2]
    times = [child(m)[0] for m in sizes]
    power = float(np.log(times[1] / times[0]) / np.log(sizes[1] / sizes[0]))
    return {
        "script_seconds": times[1] * (rows / sizes[1]) ** power,
        "script_extrapolated": True,
        "script_measured": dict(zip(map(str, sizes), times)),
        "script_growth_power": power,
    }


def _job(args, base):
    """Generate the data if needed, run the job in a child process, measure recall; the table's
    job part and the run directory."""
    from . import demo
    from .atomic import read_json

    data = os.path.join(base, "data", "applicants")
    t0 = time.perf_counter()
    if not os.path.isdir(data):
        demo.write_demo_table(data, args.rows, seed=args.seed, rows_per_file=1_000_000)
    t_gen = time.perf_counter() - t0
    shutil.rmtree(os.path.join(base, "runs"), ignore_errors=True)
    shutil.rmtree(os.path.join(base, "output"), ignore_errors=True)
    cfg_path = demo.write_demo_config(
        os.path.join(base, "bigsmooth.toml"), "data/applicants", "output", "runs"
    )
    text = open(cfg_path).read().replace("tol = 1e-6", f"tol = 1e-6\nworkers = {args.workers}")
    with open(cfg_path, "w") as fh:
        fh.write(text)
    t0 = time.perf_counter()
    proc = subprocess.run(
        [sys.executable, "-m", "bigsmooth", "-q", "run", cfg_path], capture_output=True, text=True
    )
    t_job = time.perf_counter() - t0
    if proc.returncode != 0:
        print(proc.stderr, file=sys.stderr)
        raise SystemExit(f"the job failed with exit code {proc.returncode}")
    peak_kb = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    rundir = _the_run(base)
    m = read_json(os.path.join(rundir, art.MANIFEST))
    # the job resets its peak at each stage (per-stage figures in the manifest), so the child's
    # getrusage maximum covers the last stage only: the job's peak is the largest of them
    stage_peaks = {k: v.get("summary", {}).get("peak_rss_mb") for k, v in m["stages"].items()}
    peak_kb = max([peak_kb] + [p * 1024 for p in stage_peaks.values() if p])
    solve = art.SOLVE_INFO.load(rundir)
    E = art.EMBED_EMBEDDING.load(rundir, mmap=True)
    ind = art.GRAPH_NEIGHBOURS.load(rundir, mmap=True)
    t0 = time.perf_counter()
    recall = gk.sampled_recall(E, ind, args.sample, np.random.default_rng(0))
    t_recall = time.perf_counter() - t0
    return {
        "generate_seconds": t_gen,
        "job_seconds": t_job,
        "stage_seconds": {k: v.get("seconds") for k, v in m["stages"].items()},
        "peak_rss_gb": peak_kb * 1024 / 1e9,
        "stage_peak_rss_mb": stage_peaks,
        "rss_bytes_per_row": peak_kb * 1024 / args.rows,
        "recall_at_k": recall,
        "recall_sample": args.sample,
        "recall_seconds": t_recall,
        "job_solver": {
            k: solve.get(k) for k in ("method", "status", "sweeps", "final_residual", "workers", "groups")
        },
    }, rundir


def exact_neighbours(E, Q, k, chunk=1 << 16):
    """Exact k nearest rows of E for each row of Q, by (distance, row): float32 products over
    chunks keep k + 3 candidates per chunk, whose distances are then taken directly in float64."""
    Q64 = np.asarray(Q, dtype=np.float64)
    A = (-2.0 * Q64).astype(np.float32)
    cand = []
    for lo in range(0, E.shape[0], chunk):
        X = np.asarray(E[lo : lo + chunk], dtype=np.float32)
        G = A @ X.T
        G += np.einsum("ij,ij->i", X, X)[None, :]
        take = min(k + 3, X.shape[0])
        cand.append(lo + np.argpartition(G, take - 1, axis=1)[:, :take])
    cand = np.hstack(cand)
    d = np.sqrt(
        ((np.asarray(E[cand.ravel()], dtype=np.float64).reshape(*cand.shape, -1) - Q64[:, None, :]) ** 2).sum(
            axis=2
        )
    )
    order = np.lexsort((cand, d), axis=1)[:, :k]
    return np.take_along_axis(cand, order, axis=1)


def late_rows_bench(base, rundir, rows, batch, sample, seed):
    """Late rows against the finished run (see the module docstring, 4)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    from . import demo, late
    from .atomic import read_json

    cols = demo.generate(rows, seed=seed + 1000)
    cols.pop("district", None)
    night_ids = art.SCAN_INFO.load(rundir)["rows"]
    cols["applicant_id"] = np.asarray(cols["applicant_id"]) + 10 * night_ids + 10**9
    path = os.path.join(base, f"late-{rows}.parquet")
    pq.write_table(
        pa.table({k: (v if isinstance(v, pa.Array) else pa.array(v)) for k, v in cols.items()}), path
    )
    cfg_path = os.path.join(base, "bigsmooth.toml")
    out = os.path.join(base, "late-out")
    walls = []
    for _ in range(2):
        t0 = time.perf_counter()
        proc = subprocess.run(
            [
                sys.executable,
                "-m",
                "bigsmooth",
                "-q",
                "score",
                cfg_path,
                path,
                "--out",
                out,
                "--batch",
                str(batch),
            ],
            capture_output=True,
            text=True,
        )
        walls.append(time.perf_counter() - t0)
        if proc.returncode != 0:
            print(proc.stderr, file=sys.stderr)
            raise SystemExit(f"bigsmooth score failed with exit code {proc.returncode}")
    rec = read_json(os.path.join(out, late.OUT_RECORD))
    # recall of the late rows' neighbours (the same search, in this process) against exact
    from .rundir import RunDir

    night = late.Night(RunDir(rundir))
    index = late.search_index(night, night.manifest["settings"]["run"]["seed"])
    table = pq.read_table(path)
    X, _ = late.features(table.slice(0, sample), late.late_input(night.inp), night.levels)
    Q = night.fs.apply(X).astype(np.float32).astype(np.float64)
    got = np.vstack(
        [
            late.neighbours(night, Q[lo : lo + batch], index, np.empty(0, np.int64))[0]
            for lo in range(0, len(Q), batch)
        ]
    )
    truth = exact_neighbours(night.E, Q, night.k)
    hits = sum(len(set(a) & set(b)) for a, b in zip(got, truth))
    return {
        "late_rows": rows,
        "late_batch": batch,
        "late_first_call_seconds": walls[0],
        "late_cold_call_seconds": walls[1],
        "late_loading_seconds": rec["seconds_loading"],
        "late_scoring_seconds": rec["seconds_scoring"],
        "late_rows_per_second": rows / rec["seconds_scoring"],
        "late_recall_at_k": hits / (len(Q) * night.k),
        "late_recall_sample": len(Q),
        "late_no_near_neighbour": rec["no_near_neighbour"],
    }


def _the_run(base):
    runs = os.path.join(base, "runs")
    found = sorted(os.listdir(runs)) if os.path.isdir(runs) else []
    if len(found) != 1:
        raise SystemExit(
            f"expected one finished run in {runs}, found {len(found)}; run the benchmark without "
            "--race-only first"
        )
    return os.path.join(runs, found[0])


def _print(table, args, out):
    print(
        f"rows {table['rows']:,}  features {table['feature_columns']} columns -> {table['encoded_features']} encoded "
        f"-> {table['fair_space_dim']} fair dims   machine {table['machine']['cores']} cores, "
        f"{table['machine']['memory_gib']} GiB, {table['machine']['cpu']}, caches "
        + ", ".join(f"{k} {v}" for k, v in table["machine"]["caches"].items())
    )
    if "job_seconds" in table:
        print(
            f"job {table['job_seconds']:.1f} s (child process, incl. numba compilation); peak RSS "
            f"{table['peak_rss_gb']:.2f} GB ({table['rss_bytes_per_row']:.0f} B/row)"
        )
        print(
            "stage peak RSS: "
            + ", ".join(
                f"{k} {v * 2**20 / 1e9:.2f} GB"
                for k, v in table.get("stage_peak_rss_mb", {}).items()
                if v is not None
            )
        )
        print(
            "stages: "
            + ", ".join(f"{k} {v:.1f} s" for k, v in table["stage_seconds"].items() if v is not None)
        )
        js = table["job_solver"]
        print(
            f"job solver: {js['method']} {js['status']} in {js['sweeps']} sweeps, residual {js['final_residual']:.2e}, "
            f"{js['workers']} workers, {js['groups']} groups"
        )
        print(f"neighbour recall@k vs exact on {args.sample} rows: {table['recall_at_k']:.4f}")
    if "script_seconds" in table:
        how = (
            "extrapolated from "
            + ", ".join(f"{int(m):,} rows {t:.1f} s" for m, t in table.get("script_measured", {}).items())
            if table["script_extrapolated"]
            else "measured"
        )
        line = f"in-memory exact script: {table['script_seconds']:.1f} s ({how})"
        if "job_seconds" in table:
            line += f"; job / script {table['job_seconds'] / table['script_seconds']:.3f}"
        if not table["script_extrapolated"]:
            line += (
                f"; scores correlate {table['script_correlation']:.6f}, decisions agree "
                f"{table['script_decisions_agree']:.4f}, max |difference| {table['script_max_abs_difference']:.2e}"
            )
        print(line)
    if "late_rows" in table:
        print(
            f"late rows: {table['late_rows']:,} in batches of {table['late_batch']}: first call (builds the "
            f"index) {table['late_first_call_seconds']:.1f} s; cold call {table['late_cold_call_seconds']:.1f} s "
            f"(loading {table['late_loading_seconds']:.2f} s, scoring {table['late_scoring_seconds']:.2f} s, "
            f"{table['late_rows_per_second']:,.0f} rows/s); neighbour recall@k vs exact on "
            f"{table['late_recall_sample']} late rows {table['late_recall_at_k']:.4f}"
        )
    for r in table.get("solver_race", []):
        print(
            f"best of {r['repeat']}, lam*deg {r['lam_times_mean_degree']}: CG-Jacobi {r['cg_seconds']:.2f} s "
            f"({r['cg_iterations']} it, setup {r['cg_setup_seconds']:.2f} s; {r['cg_local_order_seconds']:.2f} s "
            "on our row order)"
        )
        for key, w, backend in _contenders(args.workers, args.backends):
            print(
                f"  ours {w} worker{'s' if w > 1 else ''}{' (' + backend + ')' if w > 1 else ''}: "
                f"{r[f'ours_{key}_seconds']:.2f} s ({r[f'ours_{key}_sweeps']} sweeps, setup "
                f"{r[f'ours_{key}_setup_seconds']:.2f} s)  ratio {r[f'ratio_{key}']:.2f} "
                f"({r[f'ratio_{key}_no_setup']:.2f} without setup)"
            )
    print(f"table written to {out}")


def main(argv=None):
    p = argparse.ArgumentParser(
        prog="python -m bigsmooth.bench",
        description=__doc__,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("--rows", type=int, default=1_000_000, help="demo rows (default 1000000)")
    p.add_argument(
        "--workers", type=int, default=2, help="solver workers for the job and the race (default 2)"
    )
    p.add_argument(
        "--dir", default="bench-out", help="work folder (default ./bench-out; reused data if present)"
    )
    p.add_argument("--json", default=None, help="write the table here (default DIR/bench-<rows>.json)")
    p.add_argument("--sample", type=int, default=2000, help="rows in the recall sample (default 2000)")
    p.add_argument("--seed", type=int, default=7)
    p.add_argument("--no-race", action="store_true", help="skip the solver comparison")
    p.add_argument(
        "--script-max-rows",
        type=int,
        default=300_000,
        help="run the in-memory exact contender script on the whole table up to this many rows; "
        "above, time it on a quarter and a half of this and extrapolate (default 300000; 0 = skip)",
    )
    p.add_argument(
        "--race-only",
        action="store_true",
        help="only the solver comparison, on the finished run an earlier benchmark left in DIR",
    )
    p.add_argument(
        "--backends",
        default="threads,processes",
        help="comma-separated worker backends raced with --workers workers: threads (the job's "
        "default) and/or processes (joblib's loky workers over memmaps); default both",
    )
    p.add_argument(
        "--repeat",
        type=int,
        default=3,
        help="runs of each solver in the comparison; the best time counts (default 3)",
    )
    p.add_argument("--late", type=int, default=0, help="late rows scored against the run (default 0: none)")
    p.add_argument("--late-batch", type=int, default=1000, help="batch rows for --late (default 1000)")
    p.add_argument(
        "--late-only",
        action="store_true",
        help="only the late rows (--late), on the finished run an earlier benchmark left in DIR",
    )
    args = p.parse_args(argv)
    if args.late_only:
        if not args.late:
            p.error("--late-only needs --late N")
        args.race_only, args.no_race = True, True
    args.backends = [b.strip() for b in args.backends.split(",") if b.strip()]
    bad = sorted(set(args.backends) - {"threads", "processes"})
    if bad or not args.backends:
        p.error(f"--backends takes threads and/or processes; got {','.join(bad) or 'nothing'}")
    if args.race_only and args.no_race and not args.late_only:
        p.error("--race-only and --no-race exclude each other")

    from .config import load_config

    base = os.path.abspath(os.path.join(args.dir, f"rows-{args.rows}"))
    if args.race_only:
        part, rundir = {}, _the_run(base)
    else:
        part, rundir = _job(args, base)
    cfg = load_config(os.path.join(base, "bigsmooth.toml"))
    emb = art.EMBED_INFO.load(rundir)
    table = {
        "machine": machine_info(),
        "rows": args.rows,
        "feature_columns": len(cfg["input"]["numeric_features"]) + len(cfg["input"]["categorical_features"]),
        "encoded_features": len(emb["features"]),
        "fair_space_dim": emb["dim"],
        **part,
        "workers": args.workers,
        "backends": args.backends,
    }
    if not args.race_only and args.script_max_rows:
        table.update(compare_with_script(rundir, args.rows, args.script_max_rows))
    if args.late:
        table.update(
            late_rows_bench(base, rundir, args.late, args.late_batch, min(args.sample, args.late), args.seed)
        )
    if not args.no_race:
        table["solver_race"] = solver_race(rundir, cfg, (10, 100), args.workers, args.repeat, args.backends)
    kind = "-late" if args.late_only else ("-race" if args.race_only else "")
    out = args.json or os.path.join(args.dir, f"bench-{args.rows}{kind}.json")
    os.makedirs(os.path.dirname(os.path.abspath(out)), exist_ok=True)
    with open(out, "w") as fh:
        json.dump(table, fh, indent=2)
    _print(table, args, out)


if __name__ == "__main__":
    main()
