"""Interruptions: SIGKILL at named points (and at random moments), failed writes, changed input,
concurrent runs, and the nightly warm start. All through the command line in subprocesses.

The reference is the same job run once without interruption; "bit-identical" compares every
published column of every row (sorted by id) with numpy.array_equal.
"""

import fcntl
import json
import os
import shutil
import signal
import subprocess
import sys
import time

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from bigsmooth import demo
from bigsmooth.errors import EXIT_CANTCREAT, EXIT_DATA, EXIT_TEMPFAIL
from helpers import cli, cli_env, read_output

FILES = 3
ROWS_PER_FILE = 700


def _write_input(folder, seed=11, rows=ROWS_PER_FILE):
    folder.mkdir(parents=True)
    for i in range(FILES):
        cols = demo.generate(rows, seed + i)
        cols["applicant_id"] = np.asarray(cols["applicant_id"]) + i * 10_000_000
        cols.pop("district")
        pq.write_table(pa.table(cols), folder / f"part-{i}.parquet")


def _config(base, extra=""):
    text = demo.CONFIG_TEMPLATE.format(data="in", output="out", runs="runs")
    text = text.replace("tol = 1e-6", "tol = 1e-8\ncheckpoint_every = 1") + extra
    (base / "job.toml").write_text(text)
    return base / "job.toml"


def _published(base):
    t = read_output(base / "out").sort_by("applicant_id")
    return {c: t.column(c).to_numpy() for c in t.column_names}


def _same(a, b):
    return a.keys() == b.keys() and all(np.array_equal(a[k], b[k]) for k in a)


@pytest.fixture(scope="module")
def source(tmp_path_factory):
    """The input files and the uninterrupted reference output."""
    base = tmp_path_factory.mktemp("reference")
    _write_input(base / "in")
    res = cli("run", str(_config(base)))
    assert res.returncode == 0, res.stderr
    solve = json.loads(next((base / "runs").iterdir()).joinpath("solve", "solve.json").read_text())
    assert solve["sweeps"] >= 7  # enough sweeps for the mid-solve kill points below
    ref = _published(base)
    ids = np.concatenate(
        [
            pq.read_table(base / "in" / f"part-{i}.parquet").column("applicant_id").to_numpy()
            for i in range(FILES)
        ]
    )
    assert np.array_equal(np.sort(ids), ref["applicant_id"])  # every input row once, no other
    return base, ref


def _copy_input(source, tmp_path):
    shutil.copytree(source[0] / "in", tmp_path / "in")
    return _config(tmp_path)


# 20 kill points: each stage's start and end, chunks inside embed, sweeps, the checkpoint write and
# every step of publishing (see bigsmooth.faults)
KILL_POINTS = [
    "stage:scan:start",
    "stage:embed:start",
    "embed:chunk:2",
    "embed:chunk:5",
    "stage:embed:done",
    "stage:graph:start",
    "stage:graph:done",
    "stage:order:done",
    "stage:solve:start",
    "solve:sweep:1",
    "solve:sweep:4",
    "solve:sweep:7",
    "checkpoint:write",
    "stage:audit:start",
    "stage:audit:done",
    "publish:file:1",
    "publish:file:2",
    "publish:before-rename",
    "publish:before-pointer",
    "publish:before-link",
]


@pytest.mark.parametrize("point", KILL_POINTS)
def test_sigkill_at_a_point_then_resume_is_bit_identical(source, tmp_path, point):
    cfg = _copy_input(source, tmp_path)
    killed = cli("run", str(cfg), env={"BIGSMOOTH_FAULT": point})
    assert killed.returncode == -signal.SIGKILL, killed.stderr[-2000:]
    assert not (tmp_path / "out" / "current").exists()  # nothing half-published
    resumed = cli("run", str(cfg))
    assert resumed.returncode == 0, resumed.stderr[-2000:]
    assert "resuming run" in resumed.stderr
    if point.startswith("solve:sweep:"):
        done = int(point.rsplit(":", 1)[1]) - 1  # the checkpoint of the sweep before the kill
        if done:
            assert f"resuming the solver from the checkpoint after sweep {done}" in resumed.stderr
    assert _same(_published(tmp_path), source[1])
    out = tmp_path / "out"
    assert not [p for p in os.listdir(out) if p.startswith(".staging-")]
    assert len([p for p in os.listdir(out) if not p.startswith((".", "CURRENT", "current"))]) == 1


def _wait_for_stage(run_root, stage, proc, timeout=120):
    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout and proc.poll() is None:
        for m in run_root.glob("*/manifest.json"):
            try:
                if json.loads(m.read_text())["stages"][stage]["state"] == "running":
                    return
            except (ValueError, OSError):
                pass  # mid-replace: read again
        time.sleep(0.005)


@pytest.mark.parametrize("stage", ["embed", "graph", "solve"])
def test_sigkill_from_outside_then_resume_is_bit_identical(source, tmp_path, stage):
    # a real SIGKILL from another process, as soon as it sees the stage running (wherever the job
    # is inside it by then: not a point the job chooses)
    cfg = _copy_input(source, tmp_path)
    proc = subprocess.Popen(
        [sys.executable, "-m", "bigsmooth", "run", str(cfg)],
        env=cli_env(),
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    _wait_for_stage(tmp_path / "runs", stage, proc)
    proc.send_signal(signal.SIGKILL)
    assert proc.wait() == -signal.SIGKILL  # it was still running when killed
    resumed = cli("run", str(cfg))
    assert resumed.returncode == 0, resumed.stderr[-2000:]
    assert _same(_published(tmp_path), source[1])


def test_kills_twice_in_one_run(source, tmp_path):
    cfg = _copy_input(source, tmp_path)
    assert cli("run", str(cfg), env={"BIGSMOOTH_FAULT": "solve:sweep:2"}).returncode == -signal.SIGKILL
    assert cli("run", str(cfg), env={"BIGSMOOTH_FAULT": "solve:sweep:5"}).returncode == -signal.SIGKILL
    assert cli("run", str(cfg)).returncode == 0
    assert _same(_published(tmp_path), source[1])


def test_failed_checkpoint_write_keeps_the_previous_checkpoint(source, tmp_path):
    cfg = _copy_input(source, tmp_path)
    assert cli("run", str(cfg), env={"BIGSMOOTH_FAULT": "solve:sweep:4"}).returncode == -signal.SIGKILL
    (run_dir,) = list((tmp_path / "runs").iterdir())
    ck = run_dir / "checkpoint" / "solver.npz"
    before = ck.read_bytes()
    res = cli("run", str(cfg), env={"BIGSMOOTH_FAULT": "checkpoint:write=oserror"})
    assert res.returncode == EXIT_CANTCREAT, res.stderr[-2000:]
    assert "No space left on device" in res.stderr and "run again to resume" in res.stderr
    assert ck.read_bytes() == before  # the sweep-3 checkpoint, untouched
    assert not [p for p in os.listdir(ck.parent) if p.endswith(".tmp")]
    assert cli("run", str(cfg)).returncode == 0
    assert _same(_published(tmp_path), source[1])


def test_failed_output_write_keeps_last_nights_output(source, tmp_path):
    cfg = _copy_input(source, tmp_path)
    assert cli("run", str(cfg)).returncode == 0
    night1 = os.readlink(tmp_path / "out" / "current")
    # night 2: different settings (new run), publishing fails on the first file
    cfg.write_text(cfg.read_text().replace("lam = 1.0", "lam = 2.0"))
    res = cli("run", str(cfg), env={"BIGSMOOTH_FAULT": "publish:file:1=oserror"})
    assert res.returncode == EXIT_CANTCREAT and "cannot write the output" in res.stderr
    assert os.readlink(tmp_path / "out" / "current") == night1
    assert json.loads((tmp_path / "out" / "CURRENT").read_text())["version"] == night1
    assert _same(_published(tmp_path), source[1])  # last night's output still reads whole
    assert not [p for p in os.listdir(tmp_path / "out") if p.startswith(".staging-")]
    # killed just before the pointer moves: readers still see night 1
    assert (
        cli("run", str(cfg), env={"BIGSMOOTH_FAULT": "publish:before-pointer"}).returncode == -signal.SIGKILL
    )
    assert os.readlink(tmp_path / "out" / "current") == night1
    assert cli("run", str(cfg)).returncode == 0
    assert os.readlink(tmp_path / "out" / "current") != night1


def test_changed_input_starts_a_fresh_run_and_names_the_files(source, tmp_path):
    cfg = _copy_input(source, tmp_path)
    assert cli("run", str(cfg), env={"BIGSMOOTH_FAULT": "solve:sweep:3"}).returncode == -signal.SIGKILL
    (old_run,) = list((tmp_path / "runs").iterdir())
    t = pq.read_table(tmp_path / "in" / "part-1.parquet")
    scores = t.column("sustain_score").to_numpy().copy()
    scores[:5] = 0.5
    pq.write_table(
        t.set_column(t.column_names.index("sustain_score"), "sustain_score", pa.array(scores)),
        tmp_path / "in" / "part-1.parquet",
    )
    refuse = cfg.read_text() + "\n"
    cfg.write_text(refuse.replace("seed = 0", 'seed = 0\non_input_change = "refuse"'))
    res = cli("run", str(cfg))
    assert res.returncode == EXIT_DATA and "part-1.parquet" in res.stderr and "1 files differ" in res.stderr
    cfg.write_text(refuse)
    res = cli("run", str(cfg))
    assert res.returncode == 0, res.stderr[-2000:]
    assert "not resuming it, starting a fresh run" in res.stderr and "changed: " in res.stderr
    assert "part-1.parquet" in res.stderr and "part-0.parquet" not in res.stderr.split("files differ")[1]
    assert json.loads((old_run / "manifest.json").read_text())["superseded_by"]
    out = _published(tmp_path)
    assert len(out["applicant_id"]) == FILES * ROWS_PER_FILE


def test_a_second_run_on_the_same_output_exits_at_once(source, tmp_path):
    cfg = _copy_input(source, tmp_path)
    (tmp_path / "out").mkdir()
    fd = os.open(tmp_path / "out" / ".lock", os.O_RDWR | os.O_CREAT)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX)
        os.pwrite(fd, b"pid 999 on nightly-host since 02:00\n", 0)
        t0 = time.monotonic()
        res = cli("run", str(cfg))
        assert res.returncode == EXIT_TEMPFAIL and "pid 999 on nightly-host" in res.stderr
        assert "retry later" in res.stderr and time.monotonic() - t0 < 60
    finally:
        os.close(fd)


def test_fresh_forces_a_new_run(source, tmp_path):
    cfg = _copy_input(source, tmp_path)
    assert cli("run", str(cfg)).returncode == 0
    assert "already complete" in cli("run", str(cfg)).stdout
    res = cli("run", str(cfg), "--fresh")
    assert res.returncode == 0 and "discarding the earlier state" in res.stderr
    assert _same(_published(tmp_path), source[1])


def test_warm_start_from_last_nights_output(source, tmp_path):
    # night 1 publishes; night 2 has changed scores, 100 rows gone and 100 new ids. Warm and cold
    # starts on night 2 must agree within the solver tolerance; the warm one needs fewer sweeps.
    cfg = _copy_input(source, tmp_path)
    assert cli("run", str(cfg)).returncode == 0
    night2 = tmp_path / "night2"
    _write_input(night2, seed=11)
    t = pq.read_table(night2 / "part-0.parquet")
    new = pq.read_table(tmp_path / "in" / "part-2.parquet").slice(0, 100)
    new = new.set_column(0, "applicant_id", pa.array(new.column(0).to_numpy() + 5_000_000))
    rng = np.random.default_rng(0)
    s = np.clip(t.column("sustain_score").to_numpy() + rng.normal(0, 0.02, t.num_rows), 0, 1)
    t = t.set_column(t.column_names.index("sustain_score"), "sustain_score", pa.array(s)).slice(100)
    pq.write_table(pa.concat_tables([t, new.select(t.column_names)]), night2 / "part-0.parquet")
    text = cfg.read_text().replace('path = "in"', 'path = "night2"')
    results = {}
    for name, warm, out in (("warm", "true", "out"), ("cold", "false", "out-cold")):
        c = tmp_path / f"{name}.toml"
        c.write_text(
            text.replace('path = "out"', f'path = "{out}"').replace(
                "checkpoint_every = 1", f"checkpoint_every = 1\nwarm_start = {warm}"
            )
        )
        res = cli("run", str(c))
        assert res.returncode == 0, res.stderr[-2000:]
        tab = read_output(tmp_path / out).sort_by("applicant_id")
        run_dir = [
            p
            for p in (tmp_path / "runs").iterdir()
            if json.loads((p / "manifest.json").read_text())["config_file"] == c.name
        ][0]
        results[name] = (
            tab.column("sustain_score_adjusted").to_numpy(),
            json.loads((run_dir / "solve" / "solve.json").read_text()),
        )
    (fw, sw), (fc, sc) = results["warm"], results["cold"]
    assert sw["warm_start"]["used"] and sw["warm_start"]["rows_new"] == 100
    assert sw["warm_start"]["rows_matched"] == FILES * ROWS_PER_FILE - 100
    assert sw["sweeps"] < sc["sweeps"]
    assert sw["warm_start_effect"]["estimated_sweeps_saved"] > 0
    # both solves stop at relative residual <= 1e-8; the solutions then agree far closer than 1e-5
    assert np.linalg.norm(fw - fc) / np.linalg.norm(fc) < 1e-5
