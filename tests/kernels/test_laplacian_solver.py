"""Solvers and Laplacians against outside references and handbook facts."""

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from scipy.sparse.csgraph import laplacian as csgraph_laplacian

from bigsmooth.kernels import laplacian, solver
from bigsmooth.kernels._fast import gauss_seidel_rows as fast_gs
from conftest import random_graph


def reference_solution(W, Y, lam, kind):
    """Build (C + lam L) f = C y from scipy's own Laplacian and solve it with spsolve (the reference)."""
    L = csgraph_laplacian(W.astype(float))  # scipy.sparse.csgraph.laplacian
    d = np.asarray(W.sum(axis=1)).ravel()
    c = np.ones(W.shape[0]) if kind == "unnormalised" else np.where(d > 0, d, 1.0)
    A = (sp.diags(c) + lam * L).tocsc()
    return spla.spsolve(A, c[:, None] * Y).reshape(Y.shape)  # scipy.sparse.linalg.spsolve


def test_laplacian_matches_scipy_csgraph(rng):
    W = random_graph(60, 0.1, rng)
    ours = laplacian.laplacian(W).toarray()
    ref = csgraph_laplacian(W).toarray()  # scipy.sparse.csgraph.laplacian
    np.testing.assert_allclose(ours, ref, atol=1e-14)


@pytest.mark.parametrize("kind", ["unnormalised", "random_walk"])
@pytest.mark.parametrize("cols", [1, 3])
def test_direct_solve_matches_spsolve(rng, kind, cols):
    W = random_graph(200, 0.03, rng)
    Y = rng.random((200, cols))
    A, c = laplacian.system(W, 0.7, kind)
    ours = solver.direct_solve(A, c[:, None] * Y)
    np.testing.assert_allclose(ours, reference_solution(W, Y, 0.7, kind), atol=1e-8)


@pytest.mark.parametrize("kind", ["unnormalised", "random_walk"])
@pytest.mark.parametrize(
    "block_solve,block_rows", [("exact", 37), ("exact", 1000), ("sweeps", 50), ("sweeps", 1)]
)
@pytest.mark.parametrize("cols", [1, 4])
def test_block_coordinate_descent_matches_spsolve(rng, kind, block_solve, block_rows, cols):
    W = random_graph(300, 0.02, rng)
    Y = rng.random((300, cols))
    A, c = laplacian.system(W, 2.0, kind)
    res = solver.block_coordinate_descent(
        A,
        c[:, None] * Y,
        x0=Y,
        block_rows=block_rows,
        block_solve=block_solve,
        inner_sweeps=3,
        tol=1e-13,
        max_sweeps=5000,
        gs_kernel=fast_gs,
    )
    assert res.status == solver.STATUS_CONVERGED
    np.testing.assert_allclose(res.x, reference_solution(W, Y, 2.0, kind), atol=1e-8)
    # residuals go down (block Gauss-Seidel on an SPD matrix decreases the energy every sweep)
    assert res.residuals[-1] < res.residuals[0]


def test_compiled_gauss_seidel_matches_python_reference(rng):
    W = random_graph(120, 0.05, rng)
    A, _ = laplacian.system(W, 1.5, "unnormalised")
    B = rng.random((120, 2))
    x_py = rng.random((120, 2))
    x_nb = x_py.copy()
    solver.gauss_seidel_rows(A.indptr, A.indices, A.data, B, x_py, 10, 90, 3)
    fast_gs(A.indptr, A.indices, A.data, B, x_nb, 10, 90, 3)
    np.testing.assert_allclose(x_nb, x_py, rtol=0, atol=1e-14)


def test_solver_reports_max_sweeps_when_capped(rng):
    W = random_graph(300, 0.05, rng)
    A, _ = laplacian.system(W, 50.0, "unnormalised")
    res = solver.block_coordinate_descent(
        A, rng.random(300), block_rows=10, block_solve="sweeps", inner_sweeps=1, tol=1e-14, max_sweeps=3
    )
    assert res.status == solver.STATUS_MAX_SWEEPS and res.sweeps == 3 and len(res.residuals) == 4


def test_checkpoint_resume_gives_identical_iterates(rng):
    W = random_graph(200, 0.03, rng)
    A, _ = laplacian.system(W, 3.0, "unnormalised")
    b = rng.random((200, 1))
    kw = dict(block_rows=40, block_solve="exact", tol=1e-12, max_sweeps=200)
    full = solver.block_coordinate_descent(A, b, **kw)
    saved = {}
    solver.block_coordinate_descent(
        A, b, on_sweep=lambda s, x, r: saved.update(x=x.copy(), s=s, r=list(r)) or s < 4, **kw
    )
    resumed = solver.block_coordinate_descent(
        A, b, x0=saved["x"], start_sweep=saved["s"], residuals=saved["r"], **kw
    )
    assert resumed.sweeps == full.sweeps
    assert np.array_equal(resumed.x, full.x)


def test_complete_graph_closed_form(rng):
    # Handbook fact: the complete graph K_n with unit weights has L = nI - J (J the all-ones matrix).
    # Derivation of the unnormalised solution: (I + lam(nI - J)) f = y. Summing the rows, 1'L = 0 gives
    # sum f = sum y, so J f = n mean(y) 1 and (1 + lam n) f = y + lam n mean(y) 1, i.e.
    # f_i = (y_i + lam n mean(y)) / (1 + lam n).
    n, lam = 25, 0.3
    W = sp.csr_matrix(np.ones((n, n)) - np.eye(n))
    np.testing.assert_allclose(laplacian.laplacian(W).toarray(), n * np.eye(n) - np.ones((n, n)), atol=1e-14)
    y = rng.random(n)
    A, _ = laplacian.system(W, lam, "unnormalised")
    expect = (y + lam * n * y.mean()) / (1 + lam * n)
    np.testing.assert_allclose(solver.direct_solve(A, y), expect, atol=1e-12)
    res = solver.block_coordinate_descent(A, y, block_rows=7, tol=1e-14, max_sweeps=1000)
    np.testing.assert_allclose(res.x, expect, atol=1e-10)


def test_path_graph_laplacian_eigenvalues():
    # Handbook fact (spectral graph theory): the path graph on n vertices has Laplacian eigenvalues
    # 2 - 2 cos(pi k / n), k = 0..n-1.
    n = 17
    W = sp.diags([np.ones(n - 1), np.ones(n - 1)], [-1, 1]).tocsr()
    ev = np.sort(np.linalg.eigvalsh(laplacian.laplacian(W).toarray()))
    expect = np.sort(2 - 2 * np.cos(np.pi * np.arange(n) / n))
    np.testing.assert_allclose(ev, expect, atol=1e-12)


@pytest.mark.parametrize("kind", ["unnormalised", "random_walk"])
def test_properties_range_and_simplex(rng, kind):
    # A = C + lam L is a symmetric M-matrix with A^-1 C row-stochastic, so f is a convex combination of y.
    W = random_graph(250, 0.03, rng)
    P = rng.dirichlet(np.ones(3), size=250)  # probability rows
    A, c = laplacian.system(W, 5.0, kind)
    F = solver.direct_solve(A, c[:, None] * P)
    assert F.min() >= P.min() - 1e-12 and F.max() <= P.max() + 1e-12
    np.testing.assert_allclose(F.sum(axis=1), 1.0, atol=1e-12)
    if kind == "unnormalised":
        # 1'(I + lam L) = 1' so the mean is kept
        np.testing.assert_allclose(F.mean(axis=0), P.mean(axis=0), atol=1e-12)
    else:
        # with C = D the degree-weighted mean is kept (1'(D + lam L) = 1'D)
        d = np.asarray(W.sum(axis=1)).ravel()
        np.testing.assert_allclose(d @ F, d @ P, rtol=1e-10)


@pytest.mark.parametrize("kind", ["unnormalised", "random_walk"])
def test_edgeless_graph_and_zero_lambda_change_nothing(rng, kind):
    y = rng.random((40, 2))
    empty = sp.csr_matrix((40, 40))
    A, c = laplacian.system(empty, 3.0, kind)
    np.testing.assert_allclose(solver.direct_solve(A, c[:, None] * y), y, atol=1e-15)
    W = random_graph(40, 0.2, rng)
    A, c = laplacian.system(W, 0.0, kind)
    np.testing.assert_allclose(solver.direct_solve(A, c[:, None] * y), y, atol=1e-15)


def test_isolated_row_keeps_its_score_random_walk(rng):
    W = random_graph(30, 0.3, rng).tolil()
    W[5, :] = 0
    W[:, 5] = 0
    W = W.tocsr()
    y = rng.random(30)
    A, c = laplacian.system(W, 2.0, "random_walk")
    f = solver.direct_solve(A, c * y)
    assert f[5] == pytest.approx(y[5], abs=1e-14)
