"""The partitioned neighbour search (bigsmooth.kernels.partition) against sklearn's exact
NearestNeighbors and the whole-table exact search (graph.exact_knn)."""

import numpy as np
import pytest
from sklearn.neighbors import NearestNeighbors

from bigsmooth.kernels import graph as gk
from bigsmooth.kernels import partition as pt


def _clustered(rng, n=6000, d=8, centres=12):
    """Test input: a mixture of Gaussian clusters (neighbour graphs are built on such data)."""
    c = rng.normal(scale=4.0, size=(centres, d))
    return (c[rng.integers(0, centres, n)] + rng.normal(size=(n, d))).astype(np.float32)


def _build(E, cap, overlap, k, seed=1, reverse=False):
    _, membership, sizes = pt.plan(E, cap, overlap, k, np.random.default_rng(seed))
    parts = int(membership.max()) + 1
    ptr, rows = pt.members(membership, parts)
    n, m = len(E), membership.shape[1]
    ci = np.full((n, m * k), -1, dtype=np.int64)
    cd = np.full((n, m * k), np.inf)
    for p in range(parts)[::-1] if reverse else range(parts):
        r = rows[ptr[p] : ptr[p + 1]]
        pt.place(ci, cd, membership, p, r, *pt.search_partition(E, r, k))
    ind, dist = pt.merge(ci, cd, k)
    return ind, dist, membership, sizes


def test_exact_search_inside_a_partition_equals_sklearn(rng):
    E = _clustered(rng, n=3000)
    ind, dist = pt.exact_in(E, 7)
    # reference: sklearn brute force on the same float32 values (in float64)
    nd, ni = NearestNeighbors(n_neighbors=8, algorithm="brute").fit(E.astype(np.float64)).kneighbors()
    np.testing.assert_allclose(dist, nd[:, :7], rtol=1e-9, atol=1e-9)
    assert np.mean(ind == ni[:, :7]) > 0.999  # ties may order differently
    ref_i, ref_d = gk.exact_knn(E, 7)
    np.testing.assert_array_equal(ind, ref_i)
    np.testing.assert_allclose(dist, ref_d, rtol=0, atol=1e-12)


@pytest.mark.parametrize("side", [8, 37, 256])
def test_square_tiles_of_any_side_give_the_exact_search(rng, side):
    """Each tile above the diagonal is computed once and merged into its rows' and (transposed)
    its columns' lists: with tiles that do not divide the rows, and with exact ties (duplicated
    rows), the result is still the exact search. Reference: scipy's cdist (direct Euclidean
    distances in float64) fully sorted by (distance, index), so ties at the k-th place are
    broken by index as the search promises."""
    from scipy.spatial.distance import cdist

    E = _clustered(rng, n=601)
    E[300:310] = E[100:110]  # duplicates: tied with each other as neighbours of any other row
    D = cdist(E.astype(np.float64), E.astype(np.float64))
    np.fill_diagonal(D, np.inf)
    cols = np.broadcast_to(np.arange(len(E)), D.shape)
    ref_i = np.lexsort((cols, D), axis=1)[:, :6]
    ind, dist = pt.exact_in(E, 6, side=side)
    np.testing.assert_array_equal(ind, ref_i)
    np.testing.assert_allclose(dist, np.take_along_axis(D, ref_i, axis=1), rtol=0, atol=1e-12)


def test_one_partition_is_the_exact_whole_table_search(rng):
    E = _clustered(rng, n=2000)
    ind, dist, membership, sizes = _build(E, cap=5000, overlap=2, k=6)
    assert membership.shape[1] == 1 and list(sizes) == [2000]
    ref_i, ref_d = gk.exact_knn(E, 6)
    np.testing.assert_array_equal(ind, ref_i)
    np.testing.assert_allclose(dist, ref_d, rtol=0, atol=1e-12)


def test_partitions_respect_the_cap_and_recall_is_high(rng):
    E = _clustered(rng)
    k = 10
    ind, dist, membership, sizes = _build(E, cap=1500, overlap=3, k=k)
    assert sizes.max() <= 1500 and len(sizes) >= 12
    assert (np.sort(membership, axis=1)[:, 1:] != np.sort(membership, axis=1)[:, :-1]).all()
    assert (ind >= 0).all() and (ind != np.arange(len(E))[:, None]).all()
    assert (np.diff(dist, axis=1) >= 0).all()
    # reference: sklearn's exact neighbours
    _, ni = NearestNeighbors(n_neighbors=k + 1, algorithm="brute").fit(E).kneighbors()
    recall = np.mean([len(set(a) & set(b[:k])) for a, b in zip(ind, ni)]) / k
    assert recall >= 0.95, recall
    # the sampled recall of the graph record agrees with the full count
    est = gk.sampled_recall(E, ind, 2000, np.random.default_rng(3))
    assert abs(est - recall) < 0.02


def test_merge_keeps_the_best_distinct_candidates():
    ci = np.array([[5, 3, -1, 3, 7, 2]])
    cd = np.array([[0.5, 0.2, np.inf, 0.2, 0.1, 0.5]])
    ind, dist = pt.merge(ci, cd, 4)
    assert ind.tolist() == [[7, 3, 2, 5]] and dist.tolist() == [[0.1, 0.2, 0.5, 0.5]]


def test_the_build_does_not_depend_on_the_order_partitions_are_searched(rng):
    E = _clustered(rng, n=3000)
    a = _build(E, cap=1000, overlap=2, k=5)
    b = _build(E, cap=1000, overlap=2, k=5, reverse=True)
    np.testing.assert_array_equal(a[0], b[0])
    np.testing.assert_array_equal(a[1], b[1])


def test_eight_partitions_give_the_solution_of_one(rng):
    """On data whose clusters are farther apart than any neighbour distance, eight or more
    partitions find every row's exact neighbours, so the smoothed scores equal those of the
    one-partition (exact) graph; the reference solve is scipy's spsolve on both graphs."""
    import scipy.sparse as sp
    from scipy.sparse.linalg import spsolve

    E = _clustered(rng, n=4000, d=6, centres=10) * np.float32(8.0)
    k = 8
    one = _build(E, cap=12000, overlap=3, k=k)  # n x overlap rows fit in one partition
    many = _build(E, cap=1400, overlap=3, k=k)
    assert len(one[3]) == 1 and len(many[3]) >= 8
    y = rng.random(len(E))
    sols = []
    for ind, dist, _, _ in (one, many):
        sigma = gk.kernel_scale(dist, "global")
        W = gk.heat_kernel_graph(ind, dist, sigma)
        L = sp.diags(np.asarray(W.sum(axis=1)).ravel()) - W
        sols.append(spsolve((sp.identity(len(E)) + 2.0 * L).tocsc(), y))
    np.testing.assert_allclose(sols[1], sols[0], rtol=0, atol=1e-8)


@pytest.mark.filterwarnings("ignore:One of the clusters is empty")
def test_lloyd_rounds_equal_scipy_kmeans2(rng):
    """The plan's k-means rounds against scipy.cluster.vq.kmeans2 from the same starting centres
    (minit='matrix'), including a centre that starts far from every row (it stays empty)."""
    from scipy.cluster.vq import kmeans2

    X = np.vstack([rng.normal(loc=c, size=(300, 3)) for c in (0.0, 4.0, 8.0)])
    init = X[rng.choice(len(X), 6, replace=False)].copy()
    init[5] = 100.0
    ref, _ = kmeans2(X, init.copy(), minit="matrix", iter=7, missing="warn")
    got, labels = pt.lloyd(X, init, rounds=7)
    np.testing.assert_allclose(got, ref, rtol=1e-10, atol=1e-12)
    assert 5 not in labels  # the far centre has no row


def test_nearest_centres_equal_a_direct_numpy_search_whatever_the_chunk(rng, monkeypatch):
    # reference: squared distances to every centre by numpy broadcasting, argsort (ties by index)
    X = rng.normal(size=(3000, 5))
    C = rng.normal(size=(40, 5))
    C[7] = C[3]  # a tie between two centres: the lower number comes first
    d2 = ((X[:, None, :] - C[None, :, :]) ** 2).sum(axis=2)
    ref = np.argsort(d2, axis=1, kind="stable")[:, :3]
    ind, val = pt.nearest_centres(X, C, 3, values=True)
    np.testing.assert_array_equal(ind, ref)
    np.testing.assert_allclose(val, np.take_along_axis(d2, ref, axis=1), rtol=1e-12)
    np.testing.assert_array_equal(pt.nearest_centres(X, C, 3, chunk=97), ref)
    # small tiles: many column tiles and row blocks per chunk, and a thread pool's map
    from concurrent.futures import ThreadPoolExecutor

    monkeypatch.setattr(pt, "ROW_BLOCK", 16)
    monkeypatch.setattr(pt, "COL_BLOCK", 6)
    with ThreadPoolExecutor(3) as pool:
        np.testing.assert_array_equal(pt.nearest_centres(X, C, 3, chunk=500, map_fn=pool.map), ref)


def test_kmeans_pp_draws_centres_in_proportion_to_the_squared_distance(rng):
    """k-means++'s second centre is row i with probability d2(i) / sum(d2) (Arthur and
    Vassilvitskii's D^2 weighting, the textbook definition): a chi-square test of the draws against
    those probabilities (scipy.stats.chisquare)."""
    from scipy.stats import chisquare

    X = np.array([[0.0, 0.0], [1.0, 0.0], [0.0, 2.0], [3.0, 0.0], [0.0, 0.0]])
    draws = []
    for seed in range(4000):
        r = np.random.default_rng(seed)
        c = pt.kmeans_pp(X, 2, r)
        if (c[0] == 0.0).all():  # first centre at the origin (rows 0 or 4)
            draws.append(int(np.flatnonzero((X == c[1]).all(axis=1))[0]))
    d2 = np.array([0.0, 1.0, 4.0, 9.0, 0.0])
    counts = np.bincount(draws, minlength=5)
    assert counts[0] == 0 and counts[4] == 0  # a row at distance 0 is never drawn
    assert chisquare(counts[1:4], d2[1:4] / d2.sum() * counts.sum()).pvalue > 1e-3


def test_refinement_raises_recall_and_keeps_exact_distances(rng):
    """A weak partitioned build (uniform points in 8 dimensions, small partitions, each row in two:
    recall about 0.90) refined by neighbours of neighbours: recall against sklearn's exact
    neighbours rises (to about 0.95), no row's list gets worse, every listed distance is the true
    distance, and the count of replaced entries is what changed."""
    E = rng.random((4000, 8)).astype(np.float32)
    k = 8
    ind, dist, membership, _ = _build(E, cap=400, overlap=2, k=k)
    nd, ni = NearestNeighbors(n_neighbors=k + 1, algorithm="brute").fit(E).kneighbors()

    def recall(I):
        return np.mean([len(set(a) & set(b[:k])) for a, b in zip(I, ni)]) / k

    before_i, before_d = ind.copy(), dist.copy()
    order = np.argsort(membership[:, 0], kind="stable")
    replaced = pt.refine(E, ind, dist, order)
    assert recall(ind) > recall(before_i) + 0.03, (recall(before_i), recall(ind))
    assert (dist[:, -1] <= before_d[:, -1]).all() and (np.diff(dist, axis=1) >= 0).all()
    true = np.sqrt(np.sum((E[:, None, :].astype(np.float64) - E[ind].astype(np.float64)) ** 2, axis=2))
    np.testing.assert_allclose(dist, true, rtol=1e-12)
    assert (ind != np.arange(len(E))[:, None]).all()
    assert all(len(set(r)) == k for r in ind)
    assert replaced == sum(len(set(a) - set(b)) for a, b in zip(ind, before_i))
    # the exact search is a fixed point: nothing to replace
    ei, ed = gk.exact_knn(E, k)
    assert pt.refine(E, ei, ed, np.arange(len(E))) == 0


def test_refinement_does_not_depend_on_chunks_or_their_order(rng):
    from concurrent.futures import ThreadPoolExecutor

    E = _clustered(rng, n=3000)
    ind, dist, membership, _ = _build(E, cap=500, overlap=2, k=6)
    a = (ind.copy(), dist.copy())
    pt.refine(E, *a, np.arange(len(E)))
    b = (ind.copy(), dist.copy())
    with ThreadPoolExecutor(2) as pool:
        pt.refine(E, *b, np.argsort(membership[:, 0], kind="stable")[::-1].copy(), map_fn=pool.map, chunk=97)
    np.testing.assert_array_equal(a[0], b[0])
    np.testing.assert_array_equal(a[1], b[1])
    # the graph stage refines int32 lists (less memory): the same lists and distances
    c = (ind.astype(np.int32), dist.copy())
    pt.refine(E, *c, np.arange(len(E)))
    np.testing.assert_array_equal(c[0], a[0])
    np.testing.assert_array_equal(c[1], a[1])


def _plan_by_full_assignment(E, cap, overlap, k, rng, max_rounds=6):
    """Reference for pt.plan: the same rounds, but every row assigned again against all centres
    after each round (the plan before the incremental reassignment)."""
    import math

    n = len(E)
    sample = np.sort(rng.choice(n, size=min(n, pt.SAMPLE_ROWS), replace=False))
    Xs = np.asarray(E[sample], dtype=np.float64)
    centres = pt._kmeans(Xs, math.ceil(overlap * n / (pt.FILL * cap)), rng)
    for _ in range(max_rounds):
        member_s = pt.nearest_centres(Xs, centres, overlap)
        near = pt.nearest_centres(E, centres, overlap)
        sizes = np.bincount(near.ravel(), minlength=len(centres))
        small = np.bincount(near[:, 0], minlength=len(centres)) <= k
        big = sizes > cap
        if not big.any() and not small.any():
            break
        keep = [centres[~big & ~small]]
        for p in np.flatnonzero(big):
            keep.append(
                pt._kmeans(Xs[(member_s == p).any(axis=1)], math.ceil(sizes[p] / (pt.FILL * cap)), rng)
            )
        centres = np.vstack(keep)
    else:
        near = pt.nearest_centres(E, centres, overlap)
    return centres, near


@pytest.mark.parametrize("overlap,cap", [(1, 900), (3, 900), (2, 260)])
def test_plan_reassigning_only_rows_that_lost_a_centre_equals_full_reassignment(rng, overlap, cap):
    """Clusters of very unequal sizes (some partitions overflow and are split) and a far clump of
    4 rows (a partition of k or fewer rows, merged away: its rows lose their centre)."""
    c = rng.normal(scale=6.0, size=(6, 4))
    lab = rng.choice(6, 6000, p=[0.6, 0.2, 0.1, 0.05, 0.04, 0.01])
    E = c[lab] + rng.normal(size=(6000, 4)) * np.array([1, 1, 0.3, 0.3])
    E = np.vstack([E, c[:1] + 30.0 + rng.normal(size=(4, 4)) * 0.01]).astype(np.float32)
    rounds = []
    got_c, got_m, got_s = pt.plan(E, cap, overlap, 5, np.random.default_rng(4), log=rounds.append)
    assert rounds and got_s.max() <= cap  # the case has splits and a merge to reassign
    ref_c, ref_m = _plan_by_full_assignment(E, cap, overlap, 5, np.random.default_rng(4))
    np.testing.assert_array_equal(got_c, ref_c)
    np.testing.assert_array_equal(got_m, ref_m)
    np.testing.assert_array_equal(got_s, np.bincount(ref_m.ravel(), minlength=len(ref_c)))
