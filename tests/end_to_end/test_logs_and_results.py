"""Logs for a log collector (--log-format json) and the machine-readable result of `run --json`.

Checked with the standard library's json parser and datetime.fromisoformat (ISO 8601), against the
files the run wrote (the published version folder, the audit's gates)."""

import datetime
import json
import logging

import pytest

from bigsmooth import logs, progress
from bigsmooth.errors import EXIT_CONFIG, EXIT_GATE, EXIT_OK
from helpers import _small_table, _write_case, cli

STAGES = ("scan", "embed", "graph", "order", "solve", "audit", "publish")
KEYS = ("time", "level", "logger", "run_id", "stage", "event", "message")


def _records(stderr):
    recs = [json.loads(line) for line in stderr.splitlines()]  # every line is one JSON object
    for r in recs:
        assert set(KEYS) <= set(r), r
        assert r["time"].endswith("Z")
        datetime.datetime.fromisoformat(r["time"].replace("Z", "+00:00"))
    return recs


@pytest.fixture(scope="module")
def case(tmp_path_factory):
    return _write_case(tmp_path_factory.mktemp("ops"), _small_table(400, seed=3))


def test_run_json_and_json_logs(case):
    res = cli("run", str(case), "--json", "--log-format", "json")
    assert res.returncode == EXIT_OK, res.stderr
    out = json.loads(res.stdout)  # stdout holds the result and nothing else
    assert out["schema"] == "bigsmooth.run-result/1" and out["status"] == "published"
    assert out["exit_code"] == 0 and out["already_complete"] is False and out["error"] is None
    version = case.parent / "out" / out["output_version"]
    assert version.is_dir() and out["output"] == str(version)
    audit = json.loads((version / "_audit.json").read_text())
    assert out["gates"] == {g["gate"]: g["state"] for g in audit["gates"]}
    assert out["figures"]["rows"] == 400
    assert out["figures"]["decisions_changed_rate"] == audit["decisions"]["changed_rate"]

    recs = _records(res.stderr)
    events = [r["event"] for r in recs]
    assert events.count("run_started") == 1 and events[-1] == "run_finished"
    done = [r["stage"] for r in recs if r["event"] == "stage_done"]
    assert done == list(STAGES)
    assert all(r["run_id"] == out["run_id"] for r in recs if r["event"] != "message")
    assert all(r["seconds"] >= 0 for r in recs if r["event"] == "stage_done")
    sweeps = [r for r in recs if r["event"] == "sweep"]
    assert sweeps and all(r["stage"] == "solve" and r["residual"] >= 0 for r in sweeps)
    assert {r["gate"]: r["state"] for r in recs if r["event"] == "gate"} == out["gates"]
    (pub,) = [r for r in recs if r["event"] == "published"]
    assert pub["rows"] == 400 and pub["version"] == out["output_version"]
    assert recs[-1]["status"] == "published" and recs[-1]["output_version"] == out["output_version"]

    # run again: nothing to do, said the same way
    again = json.loads(cli("run", str(case), "--json", "-q").stdout)
    assert again["already_complete"] is True and again["output_version"] == out["output_version"]


def test_a_held_run_and_a_bad_config_in_json(case):
    res = cli(
        "run", str(case), "--json", "--log-format", "json", "--set", "gates.min_neighbour_consistency=1.0"
    )
    assert res.returncode == EXIT_GATE
    out = json.loads(res.stdout)
    assert out["status"] == "held" and out["exit_code"] == EXIT_GATE and out["output_version"] is None
    assert out["failed_gates"] == ["min_neighbour_consistency"] and out["error"]["kind"] == "gate failed"
    assert out["report"].endswith("report.html") and out["run_id"]
    recs = _records(res.stderr)
    assert recs[-1]["event"] == "error" and recs[-1]["exit_code"] == EXIT_GATE

    res = cli("--log-format", "json", "run", str(case), "--json", "--set", "solve.lam=-1")
    assert res.returncode == EXIT_CONFIG
    out = json.loads(res.stdout)
    assert out["status"] == "failed" and out["error"]["kind"] == "config error" and out["run_id"] is None
    recs = _records(res.stderr)
    assert [r["event"] for r in recs] == ["run_finished", "error"] and "solve.lam" in recs[-1]["message"]


def test_log_level_after_the_command(case):
    res = cli("run", str(case), "--log-level", "warning", "--set", "solve.lam=2")
    assert res.returncode == EXIT_OK, res.stderr
    assert " INFO " not in res.stderr and "output:" in res.stdout
    res = cli("run", str(case), "--log-format", "xml")
    assert res.returncode == 64 and "invalid choice" in res.stderr


def test_heartbeat_speaks_only_after_a_quiet_spell(caplog):
    log = logging.getLogger("bigsmooth.test")
    hb = progress.Heartbeat(log, "graph", every=15.0)
    with caplog.at_level(logging.INFO, logger="bigsmooth"):
        progress.Heartbeat.current = hb
        progress.phase(log, "merging")
        start = progress._LAST[0]
        hb.tick(start + 14.0)  # progress 14 s ago: quiet enough? no
        assert [r.event for r in caplog.records] == ["phase"]
        hb.tick(start + 15.5)
        beat = caplog.records[-1]
        assert beat.event == "progress" and "stage graph: merging" in beat.getMessage()
        assert beat.fields["phase_seconds"] == pytest.approx(15.5, abs=0.1)
        hb.tick(start + 20.0)  # the heartbeat itself counts as progress
        assert len(caplog.records) == 2
    progress.Heartbeat.current = None


def test_json_formatter_fields_and_context():
    rec = logging.LogRecord("bigsmooth.x", logging.WARNING, __file__, 1, "%d rows", (5,), None)
    rec.event, rec.fields = "progress", {"rows": 5, "stage": "embed"}
    logs.CONTEXT.update(run_id="abc", stage=None)
    try:
        obj = json.loads(logs.JsonFormatter().format(rec))
    finally:
        logs.CONTEXT.update(run_id=None, stage=None)
    assert obj["message"] == "5 rows" and obj["level"] == "warning" and obj["rows"] == 5
    assert obj["run_id"] == "abc" and obj["stage"] == "embed"  # an event's stage fills an empty context


def test_a_terminal_gets_a_live_bar_and_a_pipe_gets_lines(case, tmp_path):
    # stderr on a pseudo-terminal (os.openpty): counted progress is redrawn in place ("\r", erase to
    # the end of the line); the same run on a pipe logs plain lines only
    import os
    import subprocess
    import sys

    from helpers import cli_env

    master, slave = os.openpty()
    cmd = [sys.executable, "-m", "bigsmooth", "run", str(case), "--fresh", "--set", "solve.lam=3"]
    env = cli_env()
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=slave, env=env)
    os.close(slave)
    chunks = []
    while True:
        try:
            data = os.read(master, 65536)
        except OSError:  # the child closed the terminal
            break
        if not data:
            break
        chunks.append(data)
    os.close(master)
    assert proc.wait(timeout=600) == EXIT_OK
    seen = b"".join(chunks).decode(errors="replace")
    assert "\r\x1b[K[" + "#" * 30 + "] embed pass 1 (statistics): 400 / 400 rows" in seen
    assert " INFO bigsmooth.run: stage graph" in seen  # other records stay lines
    res = cli("run", str(case), "--fresh", "--set", "solve.lam=4")
    assert (
        res.returncode == EXIT_OK
        and "\r" not in res.stderr
        and "embed pass 1 (statistics): 400 / 400" in res.stderr
    )
