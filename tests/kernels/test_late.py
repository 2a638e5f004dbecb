"""Late rows (kernels.late) against outside references: the smoothing objective minimised by
scipy.optimize, the whole system solved densely by numpy.linalg.solve with the night's rows fixed,
and sklearn's brute-force NearestNeighbors."""

import numpy as np
import pytest
import scipy.sparse as sp
from scipy.optimize import minimize_scalar
from sklearn.neighbors import NearestNeighbors

from bigsmooth.kernels import late as lk
from conftest import random_graph


def _objective(f, y, W, lam, kind):
    """||f - y||_C^2 + lam f'Lf, written out from the definition (L = D - W, C = I or D)."""
    d = W.sum(axis=1)
    c = np.ones(len(y)) if kind == "unnormalised" else np.where(d > 0, d, 1.0)
    L = np.diag(d) - W
    return float(np.sum(c * (f - y) ** 2) + lam * f @ L @ f)


def _night(rng, n):
    W = random_graph(n, 0.3, rng).toarray()
    return W, rng.uniform(0, 1, n)


@pytest.mark.parametrize("kind", ["unnormalised", "random_walk"])
def test_single_row_is_the_minimiser_over_that_row(rng, kind):
    # reference: scipy.optimize.minimize_scalar on the whole objective with the night's rows fixed
    n, lam = 12, 0.7
    Wn, f_night = _night(rng, n)
    w = np.zeros(n)
    w[[1, 4, 9]] = [0.5, 1.3, 0.2]
    W = np.zeros((n + 1, n + 1))
    W[:n, :n], W[n, :n], W[:n, n] = Wn, w, w
    y_all = np.append(rng.uniform(0, 1, n), 0.9)

    def J(x):
        return _objective(np.append(f_night, x), y_all, W, lam, kind)

    ref = minimize_scalar(J, bounds=(-2, 3), method="bounded", options={"xatol": 1e-12}).x
    got = lk.single_row(0.9, w[[1, 4, 9]], f_night[[1, 4, 9]], lam, kind)
    assert got == pytest.approx(ref, abs=1e-7)
    # the batch solver on a batch of one gives the same
    f, _, _ = lk.solve_batch(
        [[0.9]], [0, 0, 0], w[[1, 4, 9]], f_night[[1, 4, 9]][:, None], np.zeros((1, 1)), lam, kind
    )
    assert f[0, 0] == pytest.approx(got, abs=1e-12)


@pytest.mark.parametrize("kind", ["unnormalised", "random_walk"])
def test_joint_batch_equals_a_dense_solve_with_the_night_fixed(rng, kind):
    # reference: numpy.linalg.solve of the late block of (C + lam L) f = C y over night + late rows
    n, b, lam = 40, 7, 1.9
    W = random_graph(n + b, 0.2, rng).toarray()
    y = rng.uniform(0, 1, (n + b, 2))
    f_night = rng.uniform(0, 1, (n, 2))
    d = W.sum(axis=1)
    c = np.ones(n + b) if kind == "unnormalised" else np.where(d > 0, d, 1.0)
    A = np.diag(c + lam * d) - lam * W
    late = slice(n, n + b)
    ref = np.linalg.solve(A[late, late], c[late, None] * y[late] - A[late, :n] @ f_night)
    q, j = np.nonzero(W[late, :n])
    f, _, _ = lk.solve_batch(
        y[late], q, W[late, :n][q, j], f_night[j], sp.csr_matrix(W[late, late]), lam, kind
    )
    np.testing.assert_allclose(f, ref, rtol=1e-10, atol=1e-12)
    # and the solution minimises the objective: no single late row can improve it (coordinate check)
    full = np.vstack([f_night, f])
    for i in range(b):
        nb = np.nonzero(W[n + i])[0]
        assert lk.single_row(y[n + i], W[n + i, nb], full[nb], lam, kind) == pytest.approx(f[i], abs=1e-9)


def test_terms_add_up_to_the_adjusted_score(rng):
    w, f_nb = rng.uniform(0.1, 1, 6), rng.uniform(0, 1, 6)
    own, each = lk.terms(0.4, w, f_nb, 2.0, 1.0)
    assert own + each.sum() == pytest.approx(lk.single_row(0.4, w, f_nb, 2.0), abs=1e-12)


def _cells(E, count, rng):
    centres = lk.cell_plan(E, count, rng)
    near = lk.nearest_cells(E, centres, 1)[:, 0]
    order = np.argsort(near, kind="stable")
    ptr = np.zeros(len(centres) + 1, dtype=np.int64)
    np.cumsum(np.bincount(near, minlength=len(centres)), out=ptr[1:])
    return centres, ptr, order


def test_search_over_every_cell_is_exact(rng):
    # reference: sklearn's brute-force NearestNeighbors over the night rows
    E = rng.normal(size=(3000, 6)).astype(np.float32)
    Q = rng.normal(size=(50, 6)).astype(np.float32).astype(np.float64)
    centres, ptr, order = _cells(E, 8, rng)

    def read(p):
        return order[ptr[p] : ptr[p + 1]], E[order[ptr[p] : ptr[p + 1]]]

    trip = lk.search(Q, lk.nearest_cells(Q, centres, len(centres)), read, 10)
    ind, dist = lk.best(trip, len(Q), 10)
    ref_d, ref_i = NearestNeighbors(n_neighbors=10, algorithm="brute").fit(E.astype(np.float64)).kneighbors(Q)
    np.testing.assert_array_equal(ind, ref_i)
    np.testing.assert_allclose(dist, ref_d, rtol=1e-12)


def test_search_reads_stored_norms_and_finds_the_same(rng):
    # the index keeps each row's squared norm (computed over all rows at once); reading them gives
    # the same triplets as computing them cell by cell
    E = rng.normal(size=(3000, 6)).astype(np.float32)
    Q = rng.normal(size=(50, 6))
    centres, ptr, order = _cells(E, 8, rng)
    norms = lk.sq_norms(E[order])
    # numpy reference: the sum of squares in float64
    np.testing.assert_allclose(norms, (E[order].astype(np.float64) ** 2).sum(axis=1), rtol=1e-6)

    def read(p, with_norms):
        got = order[ptr[p] : ptr[p + 1]], E[order[ptr[p] : ptr[p + 1]]]
        return (*got, norms[ptr[p] : ptr[p + 1]]) if with_norms else got

    cells_of = lk.nearest_cells(Q, centres, 3)
    a = lk.search(Q, cells_of, lambda p: read(p, False), 10)
    b = lk.search(Q, cells_of, lambda p: read(p, True), 10)
    for x, y in zip(a, b):
        assert np.array_equal(x, y)


def test_neighbours_of_neighbours_recover_what_the_cells_miss(rng):
    # clustered data, one cell probed: the expansion over the night's own exact lists (sklearn)
    # must raise recall@10 against sklearn's exact neighbours, and never lower it
    centres_true = rng.normal(scale=4, size=(30, 8))
    E = (centres_true[rng.integers(30, size=6000)] + rng.normal(size=(6000, 8))).astype(np.float32)
    Q = (
        (centres_true[rng.integers(30, size=200)] + rng.normal(size=(200, 8)))
        .astype(np.float32)
        .astype(np.float64)
    )
    nn = NearestNeighbors(n_neighbors=11, algorithm="brute").fit(E.astype(np.float64))
    night_lists = nn.kneighbors(E.astype(np.float64), return_distance=False)[:, 1:]
    truth = nn.kneighbors(Q, n_neighbors=10, return_distance=False)
    centres, ptr, order = _cells(E, 40, rng)

    def read(p):
        return order[ptr[p] : ptr[p + 1]], E[order[ptr[p] : ptr[p + 1]]]

    def recall(ind):
        return np.mean([len(set(a) & set(t)) / 10 for a, t in zip(ind, truth)])

    trip = lk.search(Q, lk.nearest_cells(Q, centres, 1), read, 10)
    ind, _ = lk.best(trip, len(Q), 10)
    before = recall(ind)
    new = lk.expand(Q, ind, lambda r: night_lists[r], lambda r: E[r], lk.keys(trip, len(E)), len(E))
    assert not np.isin(new[0] * (len(E) + 1) + new[1], trip[0] * (len(E) + 1) + trip[1]).any()
    ind2, dist2 = lk.best(tuple(np.concatenate([a, b]) for a, b in zip(trip, new)), len(Q), 10)
    assert recall(ind2) >= before and recall(ind2) > 0.9 and before < 1.0
    assert np.all(np.diff(dist2, axis=1) >= 0)


def test_reverse_edges_are_night_rows_that_would_list_the_late_row(rng):
    # brute force: a night row i joins late row q when d(q, i) < i's distance to its 10th neighbour
    E = rng.normal(size=(500, 4))
    Q = rng.normal(size=(20, 4))
    kth = NearestNeighbors(n_neighbors=11).fit(E).kneighbors(E)[0][:, 10]
    D = np.sqrt(((Q[:, None, :] - E[None]) ** 2).sum(axis=2))
    q, j = np.nonzero(np.ones_like(D, dtype=bool))
    trip = (q, j, D[q, j])
    ind, _ = lk.best(trip, len(Q), 10)
    rq, rj, _ = lk.reverse_edges(trip, ind, kth[j])
    want = {(a, b) for a, b in zip(*np.nonzero(D < kth[None, :])) if b not in set(ind[a])}
    assert set(zip(rq.tolist(), rj.tolist())) == want and len(want) > 0


def test_late_pairs_match_sklearn(rng):
    Q = rng.normal(size=(300, 5)).astype(np.float32)
    ind, dist = lk.late_pairs(Q, 10)
    ref_d, ref_i = NearestNeighbors(n_neighbors=11, algorithm="brute").fit(Q.astype(np.float64)).kneighbors()
    np.testing.assert_array_equal(ind, ref_i[:, :10])
    np.testing.assert_allclose(dist, ref_d[:, :10], rtol=1e-6)
    assert lk.late_pairs(Q[:1], 10)[0].shape == (1, 0)


def test_row_sigma_follows_the_graph_rule():
    from bigsmooth.kernels import graph as gk

    d = np.sort(np.random.default_rng(3).uniform(0, 2, (30, 10)), axis=1)
    d[4, 6] = 0.0
    med = gk.kernel_median(d)
    for rule in ("global", "local"):
        np.testing.assert_allclose(lk.row_sigma(d, rule, 1.5, med), gk.kernel_scale(d, rule, 1.5))


def test_nearest_cells_match_scipy_cdist(rng):
    # reference: scipy.spatial.distance.cdist, sorted by (distance, cell)
    from scipy.spatial.distance import cdist

    Q, C = rng.normal(size=(300, 5)), rng.normal(size=(40, 5))
    D = cdist(Q, C)
    ref = np.lexsort((np.broadcast_to(np.arange(40), D.shape), D), axis=1)
    for probe in (1, 3, 40):
        got = lk.nearest_cells(Q, C, probe, chunk=64)
        np.testing.assert_array_equal(got, ref[:, :probe])


def test_best_orders_triplets_as_lexsort_with_ties(rng):
    # reference: numpy's lexsort by (late row, distance, night row), written out; distances are
    # drawn from a few values so that ties within a late row are common, then from many (no ties)
    for values in (5, None):
        q = rng.integers(0, 40, 3000)
        j = rng.permutation(10_000)[:3000]
        d = rng.integers(0, values, 3000) / 7.0 if values else rng.random(3000)
        ind, dist = lk.best((q, j, d), 40, 6)
        o = np.lexsort((j, d, q))
        for r in range(40):
            mine = o[q[o] == r][:6]
            np.testing.assert_array_equal(ind[r, : len(mine)], j[mine])
            np.testing.assert_array_equal(dist[r, : len(mine)], d[mine])


def test_late_pairs_within_a_radius_match_sklearn(rng):
    # reference: sklearn's brute-force NearestNeighbors among the late rows (itself excluded), kept
    # where closer than the row's radius, at most k a row
    Q = rng.normal(size=(300, 5)).astype(np.float32)
    radius = rng.uniform(0.5, 2.5, 300)
    radius[::17] = np.inf  # rows with fewer than k night neighbours
    q, j, d = lk.late_pairs_within(Q, radius, 10, chunk=128)
    nn = NearestNeighbors(n_neighbors=11, algorithm="brute").fit(Q.astype(np.float64))
    ref_d, ref_i = nn.kneighbors(Q.astype(np.float64))
    for r in range(300):
        keep = (ref_i[r] != r) & (ref_d[r] < radius[r])
        want_i, want_d = ref_i[r][keep][:10], ref_d[r][keep][:10]
        np.testing.assert_array_equal(j[q == r], want_i)
        np.testing.assert_allclose(d[q == r], want_d, rtol=1e-12)


def _coded(rng, n=12_000, dim=8, cells=12, threads=1):
    centre = rng.normal(scale=4.0, size=(30, dim))
    E = (centre[rng.integers(0, 30, n)] + rng.normal(size=(n, dim))).astype(np.float32)
    Q = (centre[rng.integers(0, 30, 400)] + rng.normal(size=(400, dim))).astype(np.float32)
    centres = lk.cell_plan(E[:4000], cells, np.random.default_rng(1))
    blocks = (E[lo : lo + 5000] for lo in range(0, n, 5000))
    index = lk.code_index(centres, E[:4000], blocks, threads=threads)
    return E, Q.astype(np.float64), index


def test_coded_search_over_every_cell_and_row_is_exact(rng):
    # every cell probed and every row a candidate: the exact measure must give sklearn's lists
    E, Q, index = _coded(rng)
    cand = lk.coded_search(index, Q, 12, len(E))
    ind, dist = lk.best(lk.measure(Q, cand, lambda r: E[r]), len(Q), 10)
    ref_d, ref_i = NearestNeighbors(n_neighbors=10, algorithm="brute").fit(E.astype(np.float64)).kneighbors(Q)
    np.testing.assert_array_equal(ind, ref_i)
    np.testing.assert_allclose(dist, ref_d, rtol=1e-12)


def test_coded_search_finds_most_neighbours_and_is_reproducible(rng):
    # recall@10 against sklearn's brute force with a few cells probed and 48 candidates a row; the
    # index built on 1 and on 2 threads is byte for byte the same, and so is the search
    import faiss

    E, Q, index = _coded(rng)
    cand = lk.coded_search(index, Q, 4, 48)
    ind, _ = lk.best(lk.measure(Q, cand, lambda r: E[r]), len(Q), 10)
    ref_i = NearestNeighbors(n_neighbors=10, algorithm="brute").fit(E.astype(np.float64)).kneighbors(Q)[1]
    recall = np.mean([len(set(a) & set(b)) / 10 for a, b in zip(ind, ref_i)])
    assert recall >= 0.95, recall
    first, again = _coded(np.random.default_rng(7)), _coded(np.random.default_rng(7), threads=2)
    assert np.array_equal(faiss.serialize_index(first[2]), faiss.serialize_index(again[2]))
    faiss.omp_set_num_threads(2)
    two = lk.coded_search(index, Q, 4, 48)
    faiss.omp_set_num_threads(1)
    np.testing.assert_array_equal(two, cand)
