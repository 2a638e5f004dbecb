"""The sampled recall (graph record, benchmark) against sklearn's exact neighbours."""

import numpy as np
from sklearn.neighbors import NearestNeighbors

from bigsmooth.kernels.graph import sampled_recall


def test_recall_of_exact_and_of_damaged_neighbour_lists(rng):
    # reference: sklearn.neighbors.NearestNeighbors (brute force) gives the exact lists
    E = rng.normal(size=(3000, 5))
    k = 8
    _, ind = NearestNeighbors(n_neighbors=k + 1, algorithm="brute").fit(E).kneighbors(E)
    exact = ind[:, 1:]  # drop the row itself
    assert sampled_recall(E, exact, 500, np.random.default_rng(1), chunk=700) == 1.0
    damaged = exact.copy()
    damaged[:, :2] = (damaged[:, :2] + 1500) % 3000  # two of eight replaced by far rows
    got = sampled_recall(E, damaged, 3000, np.random.default_rng(1), chunk=1000)
    hits = np.mean([len(set(d) & set(e)) for d, e in zip(damaged, exact)]) / k
    assert abs(got - hits) < 1e-12 and got < 0.8
