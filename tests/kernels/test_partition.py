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
