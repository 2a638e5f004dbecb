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


def pytest_configure(config):
    """Compile the numba kernels once, before the test processes start (the xdist controller, or a
    plain run): a small demo in a child process writes numba's on-disk cache, which the many
    command-line runs of the suite then load instead of each compiling the same kernels."""
    import subprocess
    import sys
    import tempfile

    if hasattr(config, "workerinput") or config.getoption("collectonly", False):
        return
    from helpers import cli_env

    with tempfile.TemporaryDirectory() as d:
        subprocess.run(
            [sys.executable, "-m", "bigsmooth", "-q", "demo", "--rows", "600", "--dir", d],
            capture_output=True,
            env=cli_env(),
            timeout=600,
        )


@pytest.fixture
def rng():
    return np.random.default_rng(12345)


@pytest.fixture(scope="session")
def demo_run(tmp_path_factory):
    """One finished demo (3,000 rows) per test session (per xdist worker), for tests that only read
    it: ``(folder, completed process)``. A test that changes files makes its own."""
    from helpers import cli

    base = tmp_path_factory.mktemp("demo")
    res = cli("demo", "--rows", "3000", "--dir", str(base))
    assert res.returncode == 0, res.stderr
    return base, res
