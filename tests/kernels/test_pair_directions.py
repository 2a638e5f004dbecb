"""Widening the sensitive subspace by the comparable pairs' differences (fairspace.pair_directions
and fit_fair_space's pair_diffs), against numpy.linalg: the directions are the top right singular
vectors of the scaled differences, and the fitted transform ignores them."""

import numpy as np

from bigsmooth.kernels import fairspace


def _moments(X, S):
    mom = fairspace.Moments.empty(X[:100].mean(axis=0), S.shape[1])
    mom.update(X, S)
    return mom


def test_pair_directions_are_the_top_singular_vectors(rng):
    D = rng.normal(size=(50, 6)) * [5, 1, 1, 0.1, 0.1, 0.1]
    scale = rng.uniform(0.5, 2, 6)
    got = fairspace.pair_directions(D, scale, 2)
    _, _, Vt = np.linalg.svd(D * scale)  # reference: numpy.linalg.svd
    for j in range(2):
        assert abs(abs(got[:, j] @ Vt[j]) - 1) < 1e-12
    assert fairspace.pair_directions(D[:1], scale, 3).shape == (6, 1)  # one pair spans one direction
    assert fairspace.pair_directions(D, scale, 0).shape == (6, 0)


def test_the_fair_space_ignores_what_pairs_differ_in(rng):
    n, p = 2000, 5
    X = rng.normal(size=(n, p)) * [1, 2, 3, 1, 1]
    S = np.zeros((n, 2))
    S[np.arange(n), rng.integers(2, size=n)] = 1
    mom = _moments(X, S)
    # pairs that differ only by a multiple of one raw direction v
    v = np.array([1.0, -1.0, 0.5, 0.0, 0.0])
    diffs = rng.normal(size=(30, 1)) * v
    plain = fairspace.fit_fair_space(mom, remove_sensitive=False)
    wide = fairspace.fit_fair_space(mom, remove_sensitive=False, pair_diffs=diffs, pair_count=1)
    assert wide.removed == plain.removed + 1 and wide.transform.shape[1] == plain.transform.shape[1] - 1
    a = X[:30]
    b = a - diffs  # each pair: a row and the row moved along v
    ea, eb = wide.apply(a), wide.apply(b)
    np.testing.assert_allclose(ea, eb, atol=1e-10)  # the two rows of a pair coincide
    assert np.abs(plain.apply(a) - plain.apply(b)).max() > 0.1
    # with the sensitive subspace removed too, both are removed (numpy.linalg.matrix_rank of the span)
    both = fairspace.fit_fair_space(mom, remove_sensitive=True, pair_diffs=diffs, pair_count=1)
    sens = fairspace.fit_fair_space(mom, remove_sensitive=True)
    assert both.removed == sens.removed + 1
    np.testing.assert_allclose(both.apply(a), both.apply(b), atol=1e-10)
    T = np.hstack([sens.transform, both.transform])
    assert np.linalg.matrix_rank(T, tol=1e-8) == sens.transform.shape[1]  # a subspace of the narrower one
