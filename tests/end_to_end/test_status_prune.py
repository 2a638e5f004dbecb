"""`bigsmooth status` from a config, an output folder or a run directory, and retention (`bigsmooth
prune`, output.keep_versions, run.keep_runs).

References: disk use against GNU find (each inode's size once), file existence after the fact,
and the lock a running job holds (a job stopped at a fault point with SIGSTOP)."""

import json
import os
import signal
import subprocess

import pytest

from bigsmooth.errors import EXIT_OK, EXIT_TEMPFAIL, GateError
from bigsmooth.pipeline import run_job
from bigsmooth.rundir import hold_lock
from helpers import _popen, _small_table, _wait_stopped, _write_case, cli, read_output


def _variant(base, name, text):
    cfg = base / f"{name}.toml"
    cfg.write_text(text)
    return cfg


@pytest.fixture(scope="module")
def job(tmp_path_factory):
    """One job run three times (lam 1, lam 2, then lam 3 held by a gate) and another job on the same
    input and run folder publishing elsewhere."""
    base = tmp_path_factory.mktemp("job")
    gates = "\n[gates]\nmax_auc_drop = 1.0\n"
    text = _write_case(base, _small_table(300, seed=5), gates).read_text()
    cfgs = {
        "a": _variant(base, "a", text),
        "b": _variant(base, "b", text.replace("lam = 1.0", "lam = 2.0")),
        "c": _variant(
            base,
            "c",
            text.replace("lam = 1.0", "lam = 3.0").replace(
                gates, gates + "min_neighbour_consistency = 1.0\n"
            ),
        ),
        "other": _variant(base, "other", text.replace('path = "out"', 'path = "out-other"')),
    }
    runs = {name: run_job(str(cfgs[name]))["run_dir"] for name in ("a", "b")}
    with pytest.raises(GateError) as held:
        run_job(str(cfgs["c"]))
    runs["c"] = held.value.run_dir
    runs["other"] = run_job(str(cfgs["other"]))["run_dir"]
    return base, cfgs, runs


def _status(target):
    res = cli("status", str(target), "--json")
    assert res.returncode == EXIT_OK, res.stderr
    rec = json.loads(res.stdout)
    assert rec["schema"] == "bigsmooth.status/1"
    return rec


def _find_bytes(path):
    """Bytes of the files under ``path``, each inode once, with GNU find."""
    out = subprocess.run(
        ["find", str(path), "-type", "f", "-printf", "%i %s\n"], capture_output=True, text=True
    )
    return sum(int(size) for size in dict(line.split() for line in out.stdout.splitlines()).values())


def test_status_finds_the_run_from_a_config_an_output_folder_or_a_run_directory(job):
    base, cfgs, runs = job
    by_cfg, by_out, by_dir = _status(cfgs["b"]), _status(base / "out"), _status(runs["b"])
    assert by_cfg["run_dir"] == by_out["run_dir"] == by_dir["run_dir"] == runs["b"]
    assert [by_cfg["resolved_from"], by_out["resolved_from"], by_dir["resolved_from"]] == [
        "config",
        "output",
        "run_dir",
    ]
    assert by_dir["state"] == "done" and by_dir["status"] == "published" and by_dir["published"]["current"]
    assert by_dir["report"] == os.path.join(by_dir["published"]["output"], "_report.html")
    assert by_dir["disk"]["run_dir_bytes"] == _find_bytes(runs["b"])
    versions = by_dir["disk"]["output_versions"]
    assert len(versions) == 2 and [v["current"] for v in versions] == [False, True]
    assert versions[1]["bytes"] == _find_bytes(base / "out" / versions[1]["version"])
    held = _status(cfgs["c"])  # the config's own latest run: held by its gate
    assert held["run_dir"] == runs["c"] and held["state"] == "held" and held["status"] == "held"
    assert held["gates"]["min_neighbour_consistency"] == "failed" and held["published"] is None
    text = cli("status", str(cfgs["c"])).stdout
    assert "published: no; held by the audit's gates" in text and "failed: min_neighbour_consistency" in text
    res = cli("status", str(base / "nothing-here"))
    assert res.returncode == 66 and "neither a run directory" in res.stderr


def test_status_of_a_running_job_shows_its_stage_sweep_and_holder(tmp_path):
    cfg = _write_case(tmp_path, _small_table(300, seed=6), "\n[gates]\nmax_auc_drop = 1.0\n")
    proc = _popen("run", str(cfg), env={"BIGSMOOTH_FAULT": "solve:sweep:3=stop"})
    try:
        _wait_stopped(proc)
        rec = _status(cfg)
        assert rec["state"] == "running" and f"pid {proc.pid} " in rec["held_by"]
        assert rec["live"]["stage"] == "solve" and rec["live"]["sweep"] in (2, 3)
        assert rec["stages"]["audit"]["state"] == "pending" and rec["published"] is None
    finally:
        os.kill(proc.pid, signal.SIGCONT)
        proc.communicate(timeout=600)
    assert proc.returncode == EXIT_OK
    assert _status(cfg)["state"] == "done"


def test_prune_keeps_the_current_version_its_run_runs_in_use_and_other_jobs(job):
    base, cfgs, runs = job
    keep = ("--set", "output.keep_versions=1", "--set", "run.keep_runs=1")
    before = sorted(os.listdir(base / "runs"))
    res = cli("prune", str(cfgs["b"]), "--dry-run", "--json", *keep)
    assert res.returncode == EXIT_OK, res.stderr
    plan = json.loads(res.stdout)
    assert [os.path.basename(e["path"]) for e in plan["runs"]] == [os.path.basename(runs["a"])]
    assert [e["path"] for e in plan["kept"]] == [runs["b"]]  # older than c, but made the current version
    assert len(plan["versions"]) == 1 and sorted(os.listdir(base / "runs")) == before  # nothing deleted
    with hold_lock(runs["a"], "test"):  # a process holds run a: it stays
        res = cli("prune", str(cfgs["b"]), *keep)
    assert res.returncode == EXIT_OK and "kept (in use)" in res.stdout and os.path.isdir(runs["a"])
    res = cli("prune", str(cfgs["b"]), *keep)
    assert res.returncode == EXIT_OK, res.stderr
    assert not os.path.exists(runs["a"])
    assert all(os.path.isdir(runs[k]) for k in ("b", "c", "other"))  # current's run, newest, other job
    versions = [p for p in os.listdir(base / "out") if p.startswith("20")]
    assert versions == [os.path.basename(os.readlink(base / "out" / "current"))]
    assert read_output(base / "out").num_rows == 300 and read_output(base / "out-other").num_rows == 300
    assert not [p for p in os.listdir(base / "runs") if p.startswith(".deleting-")]
    with hold_lock(str(base / "out"), "test"):  # a job is publishing there: retry later
        assert cli("prune", str(cfgs["b"]), *keep).returncode == EXIT_TEMPFAIL


def test_retention_runs_after_each_publish(tmp_path):
    cfg = _write_case(tmp_path, _small_table(300, seed=7), "\n[gates]\nmax_auc_drop = 1.0\n")
    text = cfg.read_text().replace('path = "out"', 'path = "out"\nkeep_versions = 1')
    for lam in ("1.0", "2.0"):
        cfg.write_text(text.replace("lam = 1.0", f"lam = {lam}"))
        run_job(str(cfg))
    assert len([p for p in os.listdir(tmp_path / "out") if p.startswith("20")]) == 1
    assert len(os.listdir(tmp_path / "runs")) == 2  # run.keep_runs = 0 keeps every run


def test_dropped_intermediates_leave_a_run_that_explains_and_is_not_adopted(tmp_path):
    cfg = _write_case(tmp_path, _small_table(300, seed=9), "\n[gates]\nmax_auc_drop = 1.0\n")
    res = cli("run", str(cfg), "--set", "run.drop_intermediates=true")
    assert res.returncode == EXIT_OK, res.stderr
    (run,) = list((tmp_path / "runs").iterdir())
    for rel in ("order/split", "solve/system", "checkpoint/solver.npz"):
        assert not (run / rel).exists(), rel
    before = _find_bytes(run)
    assert "intermediate files deleted" in res.stderr
    m = json.loads((run / "manifest.json").read_text())
    assert m["stages"]["order"]["dropped"] == ["order.split"]
    # the published run still explains a row and draws its report
    ids = read_output(tmp_path / "out").column("applicant_id").to_pylist()
    assert cli("explain", str(cfg), str(ids[0]), "--json").returncode == EXIT_OK
    assert cli("report", str(run)).returncode == EXIT_OK
    # a new lam reuses scan, embed and graph, and computes the order stage again
    cfg.write_text(cfg.read_text().replace("lam = 1.0", "lam = 2.0"))
    res = cli("run", str(cfg))
    assert res.returncode == EXIT_OK, res.stderr
    assert "stage graph: reusing the outputs" in res.stderr and "stage order: reusing" not in res.stderr
    assert _find_bytes(run) == before
