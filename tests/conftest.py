import os

os.environ.setdefault(
    "NUMBA_CACHE_DIR", os.path.join(os.path.expanduser("~"), ".cache", "bigsmooth", "numba")
)

import numpy as np  # noqa: E402
import pytest  # noqa: E402
import scipy.sparse as sp  # noqa: E402


def random_graph(n, density, rng):
    """A random symmetric weight matrix (test input only, not a reference)."""
    W = sp.random(n, n, density=density, random_state=rng, data_rvs=lambda k: rng.uniform(0.1, 2.0, k))
    W = sp.triu(W, 1)
    return (W + W.T).tocsr()


@pytest.fixture
def rng():
    return np.random.default_rng(12345)
