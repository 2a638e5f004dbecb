"""The sweep-preconditioned CG solver: exactness against scipy, determinism across workers, resume."""

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from scipy.sparse.csgraph import laplacian as csgraph_laplacian

from bigsmooth import parallel
from bigsmooth.kernels import laplacian, sweepcg
from conftest import random_graph


def reference(W, Y, lam, kind):
    L = csgraph_laplacian(W)  # scipy.sparse.csgraph.laplacian
    d = np.asarray(W.sum(axis=1)).ravel()
    c = np.ones(W.shape[0]) if kind == "unnormalised" else np.where(d > 0, d, 1.0)
    return spla.spsolve((sp.diags(c) + lam * L).tocsc(), c[:, None] * Y).reshape(Y.shape)  # spsolve


def _system(rng, n=500, density=0.015, lam=4.0, kind="unnormalised", cols=2):
    W = random_graph(n, density, rng)
    Y = rng.random((n, cols))
    A, c = laplacian.system(W, lam, kind)
    return W, Y, A, c[:, None] * Y


@pytest.mark.parametrize("kind", ["unnormalised", "random_walk"])
@pytest.mark.parametrize("bounds", [[0, 500], [0, 123, 350, 500], list(range(0, 501, 25))])
@pytest.mark.parametrize("cols", [1, 3])
def test_matches_spsolve(rng, kind, bounds, cols):
    W, Y, A, b = _system(rng, kind=kind, cols=cols)
    res = sweepcg.sweep_cg(sweepcg.prepare(A, bounds), b, x0=Y, tol=1e-12, max_sweeps=2000)
    assert res.status == sweepcg.STATUS_CONVERGED
    np.testing.assert_allclose(res.x, reference(W, Y, 4.0, kind), atol=1e-8)


def test_compiled_kernels_match_python_references(rng):
    _, Y, A, b = _system(rng)
    system = sweepcg.prepare(A, [0, 200, 500])
    fast = sweepcg.sweep_cg(system, b, tol=1e-10, max_sweeps=15)
    slow = sweepcg.sweep_cg(system, b, tol=1e-10, max_sweeps=15, kernels=sweepcg.PY_KERNELS)
    assert fast.sweeps == slow.sweeps
    np.testing.assert_allclose(fast.x, slow.x, rtol=0, atol=1e-12)
    np.testing.assert_allclose(fast.residuals, slow.residuals, rtol=1e-9)


def test_singleton_groups_are_jacobi_pcg(rng):
    # With one row per group the preconditioner is diag(A): the iterates are Jacobi-preconditioned CG,
    # so the iteration count matches scipy.sparse.linalg.cg with M = diag(A)^-1 to within a sweep.
    _, Y, A, b = _system(rng, cols=1)
    ours = sweepcg.sweep_cg(sweepcg.prepare(A, np.arange(501)), b, tol=1e-8, max_sweeps=2000)
    count = [0]
    spla.cg(
        A,
        b[:, 0],
        rtol=1e-8,
        M=sp.diags(1 / A.diagonal()),
        callback=lambda x: count.__setitem__(0, count[0] + 1),
    )
    assert abs(ours.sweeps - count[0]) <= 1


def test_fewer_sweeps_than_jacobi_with_local_groups(rng):
    # a ring-of-cliques graph: groups that hold whole cliques make the sweeps a strong preconditioner
    blocks = [sp.csr_matrix(np.ones((20, 20)) - np.eye(20)) for _ in range(25)]
    W = sp.block_diag(blocks).tolil()
    for i in range(25):
        W[i * 20, ((i + 1) % 25) * 20 + 1] = W[((i + 1) % 25) * 20 + 1, i * 20] = 1.0
    W = W.tocsr()
    A, _ = laplacian.system(W, 10.0, "unnormalised")
    b = rng.random((500, 1))
    grouped = sweepcg.sweep_cg(sweepcg.prepare(A, np.arange(0, 501, 100)), b, tol=1e-8)
    jacobi = sweepcg.sweep_cg(sweepcg.prepare(A, np.arange(501)), b, tol=1e-8)
    assert grouped.sweeps < jacobi.sweeps


def _mapped(system, folder):
    """The system with its triplets as read-only memmaps of .npy files in ``folder``."""
    folder.mkdir(exist_ok=True)
    parts = {}
    for part in ("L", "U", "O"):
        arrs = []
        for i, arr in enumerate(getattr(system, part)):
            np.save(folder / f"{part}{i}.npy", arr)
            arrs.append(np.load(folder / f"{part}{i}.npy", mmap_mode="r"))
        parts[part] = tuple(arrs)
    return sweepcg.Grouped(system.s, system.bounds, parts["L"], parts["U"], parts["O"])


@pytest.mark.parametrize("backend", ["threads", "processes"])
def test_bit_identical_for_one_and_two_workers(rng, tmp_path, backend):
    _, Y, A, b = _system(rng, n=2000, density=0.004, cols=2)
    system = sweepcg.prepare(A, [0, 300, 700, 1200, 1600, 2000])
    serial = sweepcg.sweep_cg(system, b, x0=Y, tol=1e-10)

    def mm(name, shape):
        return np.lib.format.open_memmap(
            str(tmp_path / f"{name}.npy"), mode="w+", dtype=np.float64, shape=shape
        )

    shared = _mapped(system, tmp_path / "sys")
    two = sweepcg.sweep_cg(
        shared,
        b,
        x0=Y,
        tol=1e-10,
        executor=parallel.make_executor(2, backend),
        work=sweepcg.Work.allocate(2000, 2, mm),
    )
    assert two.sweeps == serial.sweeps
    assert np.array_equal(two.x, serial.x)


@pytest.mark.parametrize("workers", [1, 2])
def test_sweeps_by_value_are_bit_identical_to_sweeps_in_place(rng, workers):
    """The phases by value (a group's rows go out, its new rows come back: for Dask workers on other
    hosts) against the phases on shared vectors, cold and warm starts, serial and on two threads;
    and both against scipy's spsolve."""
    W, Y, A, b = _system(rng, n=2000, density=0.004, cols=2)
    system = sweepcg.prepare(A, [0, 300, 700, 1200, 1600, 2000])
    shared = []
    for x0 in (None, Y):
        in_place = sweepcg.sweep_cg(system, b, x0=x0, tol=1e-10)
        by_value = sweepcg.sweep_cg(
            system,
            b,
            x0=x0,
            tol=1e-10,
            by_value=True,
            executor=parallel.make_executor(workers, "threads"),
            share=lambda t: shared.append(t) or t,
        )
        assert by_value.sweeps == in_place.sweeps > 2
        assert by_value.residuals == in_place.residuals
        assert np.array_equal(by_value.x, in_place.x)
        ref = spla.spsolve(A.tocsc(), b)  # scipy's direct solve
        assert np.abs(by_value.x - ref).max() < 1e-7 * np.abs(ref).max()
    assert len(shared) > 4  # t handed over once a phase 2


def test_process_workers_follow_files_replaced_under_the_same_name(rng, tmp_path):
    # the workers keep files mapped between tasks; a system written again to the same file names
    # (in place, same size: np.save truncates the same file; or removed and written with another
    # size) must be read afresh: each solve agrees with spsolve and with the serial solve, bit for bit
    pool = parallel.make_executor(2, "processes")
    try:
        for n, lam in ((800, 4.0), (800, 9.0), (1100, 4.0)):
            W = random_graph(n, 0.01, rng)
            Y = rng.random((n, 1))
            A, c = laplacian.system(W, lam, "unnormalised")
            system = sweepcg.prepare(A, [0, n // 3, n // 2, n])
            if n == 1100:
                import shutil

                shutil.rmtree(tmp_path / "sys")
            shared = _mapped(system, tmp_path / "sys")
            work = sweepcg.Work.allocate(
                n,
                1,
                lambda name, shape: np.lib.format.open_memmap(
                    str(tmp_path / f"{name}.npy"), mode="w+", dtype=np.float64, shape=shape
                ),
            )
            two = sweepcg.sweep_cg(shared, c[:, None] * Y, tol=1e-10, executor=pool, work=work)
            serial = sweepcg.sweep_cg(system, c[:, None] * Y, tol=1e-10)
            assert np.array_equal(two.x, serial.x)
            np.testing.assert_allclose(two.x, reference(W, Y, lam, "unnormalised"), atol=1e-8)
    finally:
        pool.shutdown()


def test_process_pool_deals_groups_by_size():
    # one task per worker, groups dealt largest first to the least loaded worker: the longest-
    # processing-time rule of list scheduling (R. L. Graham, 1969; cited from memory)
    class Fake(parallel.ProcessPool):
        def __init__(self):
            self.workers = 2
            self.sent = []

            class Ex:
                def map(_, fn, fns, batches):
                    self.sent = [[args[0] for args in batch] for batch in batches]
                    return [[a[0] * 10 for a in batch] for batch in batches]

            self._ex = Ex()

    pool = Fake()
    out = sweepcg._map(pool, None, [(0,), (1,), (2,), (3,)], order=[1, 0, 2, 3], sizes=[270, 355, 202, 173])
    assert out == [0, 10, 20, 30]
    assert pool.sent == [[1, 3], [0, 2]]


def test_resume_from_state_is_bit_identical(rng):
    _, Y, A, b = _system(rng)
    system = sweepcg.prepare(A, [0, 250, 500])
    full = sweepcg.sweep_cg(system, b, x0=Y, tol=1e-11)
    saved = {}

    def stop_at_5(state, work):
        if state["sweep"] == 5:
            saved.update(
                state={
                    k: (v.copy() if isinstance(v, np.ndarray) else (list(v) if isinstance(v, list) else v))
                    for k, v in state.items()
                },
                x=work.x.copy(),
                r=work.r.copy(),
                p=work.p.copy(),
            )
            return False

    sweepcg.sweep_cg(system, b, x0=Y, tol=1e-11, on_sweep=stop_at_5)
    work = sweepcg.Work.allocate(500, 2)
    work.x[:], work.r[:], work.p[:] = saved["x"], saved["r"], saved["p"]
    resumed = sweepcg.sweep_cg(system, b, tol=1e-11, work=work, state=saved["state"])
    assert resumed.sweeps == full.sweeps
    assert np.array_equal(resumed.x, full.x)


def test_warm_start_converges_to_the_same_answer_in_fewer_sweeps(rng):
    W, Y, A, b = _system(rng)
    system = sweepcg.prepare(A, [0, 250, 500])
    cold = sweepcg.sweep_cg(system, b, x0=Y, tol=1e-9)
    near = cold.x + 1e-5 * rng.standard_normal(cold.x.shape)
    warm = sweepcg.sweep_cg(system, b, x0=near, tol=1e-9)
    assert warm.sweeps < cold.sweeps
    np.testing.assert_allclose(warm.x, reference(W, Y, 4.0, "unnormalised"), atol=1e-7)


def test_reports_max_sweeps_with_the_true_residual(rng):
    _, Y, A, b = _system(rng, lam=100.0)
    res = sweepcg.sweep_cg(sweepcg.prepare(A, [0, 500]), b, tol=1e-14, max_sweeps=2)
    assert res.status == sweepcg.STATUS_MAX_SWEEPS and res.sweeps == 2
    true = np.linalg.norm(b - A @ res.x) / np.linalg.norm(b)
    assert res.final_residual == pytest.approx(true, rel=1e-9)


def test_zero_right_hand_side():
    A = sp.identity(5, format="csr") * 2.0
    res = sweepcg.sweep_cg(sweepcg.prepare(A, [0, 5]), np.zeros((5, 1)))
    assert res.status == sweepcg.STATUS_CONVERGED and not res.x.any()


def test_split_reassembles_the_scaled_matrix(rng):
    _, _, A, _ = _system(rng)
    system = sweepcg.prepare(A, [0, 100, 420, 500])
    L, U, O = system.matrices()
    S = sp.diags(system.s)
    np.testing.assert_allclose((sp.identity(500) + L + U + O).toarray(), (S @ A @ S).toarray(), atol=1e-15)
    grp = np.searchsorted([0, 100, 420, 500], np.arange(500), side="right") - 1
    for M, ok in (
        (L, lambda i, j: grp[i] == grp[j] and j < i),
        (U, lambda i, j: grp[i] == grp[j] and j > i),
        (O, lambda i, j: grp[i] != grp[j]),
    ):
        Mc = M.tocoo()
        assert all(ok(i, j) for i, j in zip(Mc.row, Mc.col))
    x = rng.random((500, 2))
    np.testing.assert_allclose(system.matvec(x), A @ x, atol=1e-12)


@pytest.mark.parametrize("kind", ["unnormalised", "random_walk"])
def test_direct_split_from_graph_equals_assembled_split(rng, kind):
    W = random_graph(400, 0.02, rng)
    W = laplacian.as_weight_matrix(W)
    perm = rng.permutation(400)
    bounds = [0, 90, 250, 400]
    A, c = laplacian.system(W, 2.5, kind)
    ref = sweepcg.prepare(A[perm][:, perm], bounds)  # assemble with scipy, permute, split
    got = sweepcg.prepare_from_graph(W, 2.5, c, perm, bounds)
    np.testing.assert_allclose(got.s, ref.s, rtol=1e-15)
    for a, b in zip(got.matrices(), ref.matrices()):
        np.testing.assert_allclose(a.toarray(), b.toarray(), rtol=1e-14, atol=1e-16)


def test_split_graph_degrees_and_thread_count(rng):
    # reference: degrees = row sums of W (numpy), permuted; the split must not depend on numba's threads
    import numba

    W = laplacian.as_weight_matrix(random_graph(300, 0.03, rng))
    perm = rng.permutation(300)
    bounds = [0, 70, 300]
    got = []
    for threads in (1, min(2, numba.config.NUMBA_NUM_THREADS)):
        numba.set_num_threads(threads)
        got.append(sweepcg.split_graph(W, perm, bounds))
    numba.set_num_threads(numba.config.NUMBA_NUM_THREADS)
    # the order stage's blocked fill (37 positions at a time, a release after each block) is the same
    released = []
    got.append(sweepcg.split_graph(W, perm, bounds, block=37, release=released.append))
    assert len(released) == 3 + 3 + -(-300 // 37) * (3 + 1 + 9)  # W's arrays and every output
    np.testing.assert_allclose(got[0].degree, np.asarray(W.sum(axis=1)).ravel()[perm], rtol=1e-14)
    for other in got[1:]:
        np.testing.assert_array_equal(got[0].degree, other.degree)
        for a, b in zip((*got[0].L, *got[0].U, *got[0].O), (*other.L, *other.U, *other.O)):
            assert np.array_equal(a, b)


def test_fast_matvec_matches_scipy(rng):
    # reference: scipy sparse products of the split triplets
    _, _, A, _ = _system(rng)
    system = sweepcg.prepare(A, [0, 100, 420, 500])
    x = rng.random((500, 3))
    ref = system.matvec(x, fast=False)
    np.testing.assert_allclose(system.matvec(x, fast=True), ref, rtol=1e-13, atol=1e-13 * np.abs(ref).max())
    np.testing.assert_allclose(system.matvec(x), A @ x, atol=1e-12)


def test_residual_norm_matches_scipy_and_thread_count(rng, monkeypatch):
    # reference: numpy's norm of b - A x with A assembled by scipy; the chunked sum must give the
    # same bits for any number of numba threads (small chunks so that there are many)
    import numba

    monkeypatch.setattr(sweepcg, "RESIDUAL_CHUNK", 64)
    _, _, A, b = _system(rng, n=1000, cols=2)
    n = A.shape[0]
    system = sweepcg.prepare(A, [0, 300, 700, n])
    x = rng.random((n, 2))
    ref = float(np.linalg.norm(b - A @ x))
    xs = x / system.s[:, None]
    got = []
    for threads in (1, min(2, numba.config.NUMBA_NUM_THREADS)):
        numba.set_num_threads(threads)
        got.append(system.residual_norm(xs, b))
    numba.set_num_threads(numba.config.NUMBA_NUM_THREADS)
    assert got[0] == got[1]
    assert abs(got[0] - ref) <= 1e-12 * ref
    assert abs(system.residual_norm(xs, b, fast=False) - ref) <= 1e-12 * ref


@pytest.mark.parametrize("omega", [0.7, 1.3, 1.8])
def test_relaxed_sweeps_match_spsolve_and_reference_kernels(rng, omega):
    # SSOR (omega != 1) in Eisenstat's form must still converge to spsolve's answer; the compiled
    # kernels must follow the Python references
    W, Y, A, b = _system(rng, cols=2)
    system = sweepcg.prepare(A, [0, 123, 350, 500])
    res = sweepcg.sweep_cg(system, b, x0=Y, tol=1e-12, max_sweeps=2000, omega=omega)
    assert res.status == sweepcg.STATUS_CONVERGED
    np.testing.assert_allclose(res.x, reference(W, Y, 4.0, "unnormalised"), atol=1e-8)
    fast = sweepcg.sweep_cg(system, b, tol=1e-10, max_sweeps=12, omega=omega)
    slow = sweepcg.sweep_cg(system, b, tol=1e-10, max_sweeps=12, omega=omega, kernels=sweepcg.PY_KERNELS)
    np.testing.assert_allclose(fast.x, slow.x, rtol=1e-12, atol=1e-14)


def test_omega_outside_the_open_interval_is_refused(rng):
    _, _, A, b = _system(rng, cols=1)
    system = sweepcg.prepare(A, [0, 500])
    for bad in (0.0, 2.0, -1.0):
        with pytest.raises(ValueError, match="omega"):
            sweepcg.sweep_cg(system, b, omega=bad)


def test_scaled_start_is_no_farther_than_zero_and_converges(rng):
    # reference: the A-norm error against spsolve's solution; a* = x0.b / x0.A x0 minimises
    # ||x* - a x0||_A over a (a one-line derivation: d/da of (x* - a x0)' A (x* - a x0) = 0 with
    # A x* = b), and a = 0 is one of the candidates
    W, Y, A, b = _system(rng, cols=2, lam=40.0)
    xstar = reference(W, Y, 40.0, "unnormalised")

    def err(x):
        e = xstar - x
        return np.sum(e * (A @ e), axis=0)

    x0, ax0 = sweepcg.scaled_start(Y, A @ Y, b)
    np.testing.assert_allclose(ax0, A @ x0, rtol=1e-12)
    assert np.all(err(x0) <= err(np.zeros_like(Y)) * (1 + 1e-12))
    assert np.all(err(x0) <= err(Y) * (1 + 1e-12))
    system = sweepcg.prepare(A, [0, 123, 350, 500])
    res = sweepcg.sweep_cg(system, b, x0=Y, tol=1e-12, max_sweeps=2000, scale_start=True)
    np.testing.assert_allclose(res.x, xstar, atol=1e-8)


def test_process_work_vectors_go_to_shared_memory_and_are_removed(tmp_path, monkeypatch):
    shm = tmp_path / "shm"
    shm.mkdir()
    monkeypatch.setattr(parallel, "SHM", str(shm))
    (shm / "bigsmooth-k").mkdir()  # left by a killed run
    (shm / "bigsmooth-k" / "x.npy").write_bytes(b"stale")
    with parallel.work_files(100, 2, "k", str(tmp_path / "fallback")) as work:
        assert work.x.shape == (100, 2) and isinstance(work.x, np.memmap)
        assert work.x.filename.startswith(str(shm / "bigsmooth-k")) and not work.x.any()
    assert not (shm / "bigsmooth-k").exists()  # removed afterwards

    # no room in shared memory (six vectors, twice over): the fallback folder in the run directory
    class Full:
        f_bavail, f_frsize = 1, 4096

    monkeypatch.setattr(parallel.os, "statvfs", lambda path: Full())
    with parallel.work_files(100, 2, "k", str(tmp_path / "fallback")) as work:
        assert work.x.filename.startswith(str(tmp_path / "fallback"))
    assert (tmp_path / "fallback" / "x.npy").exists() and not (shm / "bigsmooth-k").exists()
