"""Neighbour search and graph weights against exact references."""

import numpy as np
import pytest
from sklearn.neighbors import NearestNeighbors

from bigsmooth.kernels import graph as gk


def sklearn_neighbours(X, k):
    """Exact k nearest neighbours excluding self, from scikit-learn (the reference)."""
    nn = NearestNeighbors(n_neighbors=k + 1, algorithm="brute").fit(X)  # sklearn.neighbors
    dist, ind = nn.kneighbors(X)
    return gk.drop_self(ind, dist, k)


def test_exact_knn_matches_sklearn(rng):
    X = rng.normal(size=(700, 6))
    ind, dist = gk.exact_knn(X, 8, block=128)
    ref_ind, ref_dist = sklearn_neighbours(X, 8)
    np.testing.assert_allclose(dist, ref_dist, atol=1e-9)
    # with continuous data there are no distance ties, so the neighbour sets agree exactly
    assert all(set(a) == set(b) for a, b in zip(ind, ref_ind))


def test_exact_knn_with_duplicate_points_excludes_only_self(rng):
    X = np.repeat(rng.normal(size=(20, 3)), 5, axis=0)  # every point appears 5 times
    ind, dist = gk.exact_knn(X, 6)
    n = len(X)
    assert not np.any(ind == np.arange(n)[:, None])
    assert np.all(dist[:, :4] == 0)  # its four twins come first
    assert np.all(dist[:, 4:] > 0)


@pytest.mark.slow  # pynndescent compiles for about 20 s in a new process; no longer the default build
def test_approximate_neighbours_recall_against_exact(rng):
    # common practice: an approximate index is acceptable at recall@k >= 0.95
    centres = rng.normal(scale=4, size=(30, 10))
    X = (centres[rng.integers(0, 30, 4000)] + rng.normal(size=(4000, 10))).astype(np.float32)
    k = 10
    ind, dist = gk.approx_knn(X, k, seed=3, search=15, threads=2)
    ref_ind, _ = sklearn_neighbours(X.astype(np.float64), k)
    recall = np.mean([len(set(a) & set(b)) / k for a, b in zip(ind, ref_ind)])
    assert recall >= 0.95, recall
    assert not np.any(ind == np.arange(len(X))[:, None])


@pytest.mark.slow  # pynndescent (graph.build = "whole") compiles for about 20 s in a new process
@pytest.mark.parametrize("threads", [1, 2])
def test_approximate_neighbours_same_seed_same_graph(rng, threads):
    X = rng.normal(size=(3000, 5)).astype(np.float32)
    a = gk.approx_knn(X, 5, seed=11, threads=threads)
    b = gk.approx_knn(X, 5, seed=11, threads=threads)
    assert np.array_equal(a[0], b[0]) and np.array_equal(a[1], b[1])


@pytest.mark.parametrize("rule", ["global", "local"])
def test_heat_kernel_graph_is_symmetric_with_unit_weight_for_duplicates(rng, rule):
    X = np.vstack([rng.normal(size=(50, 3)), np.zeros((3, 3))])
    ind, dist = gk.exact_knn(X, 4)
    sigma = gk.kernel_scale(dist, rule)
    W = gk.heat_kernel_graph(ind, dist, sigma)
    assert abs(W - W.T).max() == 0
    assert W.diagonal().sum() == 0
    assert W[50, 51] == pytest.approx(1.0)  # exp(0) for a zero distance
    # weights follow the heat-kernel formula exp(-d^2 / (sigma_i sigma_j)) on every listed edge
    i, j = 0, ind[0, 0]
    assert W[i, j] == pytest.approx(np.exp(-(dist[0, 0] ** 2) / (sigma[i] * sigma[j])))


def test_drop_self_when_self_is_not_listed():
    ind = np.array([[1, 2, 3], [0, 1, 2], [5, 0, 1]])
    dist = np.array([[0.1, 0.2, 0.3], [0.0, 0.0, 0.4], [0.1, 0.2, 0.3]])
    i2, d2 = gk.drop_self(ind, dist, 2)
    assert i2.tolist() == [[1, 2], [0, 2], [5, 0]]
    assert d2.tolist() == [[0.1, 0.2], [0.0, 0.4], [0.1, 0.2]]


def test_sharded_weights_equal_the_in_memory_symmetrised_graph(rng, tmp_path):
    """The graph stage writes W shard by shard (write_weights); the reference is
    kernels.graph.heat_kernel_graph (scipy's maximum(W, W.T) in memory), bit for bit."""
    from bigsmooth import artifacts as art
    from bigsmooth.stages.graph import write_weights

    E = rng.normal(size=(5000, 4))
    ind, dist = gk.exact_knn(E, 7)
    for rule in ("global", "local"):
        sigma = gk.kernel_scale(dist, rule)
        W = gk.heat_kernel_graph(ind, dist, sigma)
        nnz, deg = write_weights(tmp_path, ind, dist, sigma, 256, block=700, shard_rows=900)
        got = art.GRAPH_WEIGHTS.load(tmp_path)
        assert nnz == W.nnz
        for a in ("indptr", "indices", "data"):
            np.testing.assert_array_equal(getattr(got, a), getattr(W, a))
        np.testing.assert_array_equal(deg, np.asarray(W.sum(axis=1)).ravel())
    # lists read from files in blocks, shards merged on two threads: the same matrix
    from concurrent.futures import ThreadPoolExecutor

    np.save(tmp_path / "ind.npy", ind)
    np.save(tmp_path / "dist.npy", dist)
    sigma = gk.kernel_scale(art.RowReader(str(tmp_path / "dist.npy")), "global")
    W = gk.heat_kernel_graph(ind, dist, sigma)
    with ThreadPoolExecutor(2) as pool:
        write_weights(
            tmp_path,
            art.RowReader(str(tmp_path / "ind.npy")),
            art.RowReader(str(tmp_path / "dist.npy")),
            sigma,
            256,
            block=700,
            shard_rows=900,
            map_fn=pool.map,
            workers=2,
        )
    got = art.GRAPH_WEIGHTS.load(tmp_path)
    for a in ("indptr", "indices", "data"):
        np.testing.assert_array_equal(getattr(got, a), getattr(W, a))
    assert got.indices.dtype == np.int32  # stored as int32: scipy loads it without a copy


@pytest.mark.parametrize("odd", [True, False])
def test_median_of_positive_distances_in_blocks_equals_numpy(rng, odd):
    """The kernel scale's median, taken over row blocks by radix selection, against numpy.median,
    with ties and zeros (duplicates) among the distances."""
    d = np.round(rng.gamma(2.0, 0.5, size=(1001 if odd else 1000, 7)), 3)
    d[rng.random(d.shape) < 0.05] = 0.0
    ref = float(np.median(d[d > 0]))
    for block in (1, 13, 5000):
        assert gk.median_positive(d, block=block) == ref
    assert gk.median_positive(np.zeros((5, 3))) is None


def test_edges_merged_shard_by_shard_equal_the_in_memory_graph(rng):
    E = rng.normal(size=(3000, 4))
    ind, dist = gk.exact_knn(E, 6)
    sigma = gk.kernel_scale(dist, "local")
    W = gk.heat_kernel_graph(ind, dist, sigma)
    r, c, w = gk.heat_edges(ind, dist, sigma)
    R, C, V = np.concatenate([r, c]), np.concatenate([c, r]), np.concatenate([w, w])
    for lo in range(0, 3000, 700):
        hi = min(lo + 700, 3000)
        m = (R >= lo) & (R < hi)
        indptr, indices, data = gk.max_merge_rows(R[m], C[m], V[m], lo, hi)
        piece = W[lo:hi]
        np.testing.assert_array_equal(indptr, piece.indptr)
        np.testing.assert_array_equal(indices, piece.indices)
        np.testing.assert_array_equal(data, piece.data)
