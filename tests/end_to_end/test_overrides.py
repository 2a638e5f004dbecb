"""Settings for a schedule without editing the config file: --set SECTION.KEY=VALUE (before or
after the command) and BIGSMOOTH_SECTION__KEY environment variables, validated by the config's
rules and recorded in the provenance."""

import json

import pyarrow as pa
import pyarrow.parquet as pq

from bigsmooth.errors import EXIT_CONFIG, EXIT_OK
from helpers import _small_table, _write_case, cli


def _manifest(tmp_path):
    (run,) = [p for p in (tmp_path / "runs").iterdir() if p.is_dir()]
    return json.loads((run / "manifest.json").read_text()), run


def test_set_and_environment_override_the_file(tmp_path):
    cfg = _write_case(tmp_path, _small_table(300))
    # tonight's input elsewhere, given relative to the current directory
    (tmp_path / "tonight").mkdir()
    pq.write_table(pa.table(_small_table(300, seed=9)), tmp_path / "tonight" / "part-0.parquet")
    res = cli(
        "-q",
        "--set",
        "solve.lam=3",
        "run",
        str(cfg),
        "--set",
        "input.path=tonight",
        cwd=str(tmp_path),
        env={"BIGSMOOTH_SOLVE__LAM": "2", "BIGSMOOTH_AUDIT__TOP_CHANGES": "4"},
    )
    assert res.returncode == EXIT_OK, res.stderr
    m, run = _manifest(tmp_path)
    # --set after the command replaces the list given before it (argparse); the environment applies
    assert m["settings"]["input"]["path"].endswith("tonight") and m["input"]["rows"] == 300
    assert (
        m["settings"]["solve"]["lam"] == 2.0
    )  # from the environment (the --set before the command is replaced)
    audit = json.loads((run / "audit" / "audit.json").read_text())
    assert len(audit["largest_changes"]) == 4
    over = audit["provenance"]["config_overrides"]
    assert any(o.startswith("input.path=") and o.endswith("(--set)") for o in over)
    assert (
        "solve.lam=2 (BIGSMOOTH_SOLVE__LAM)" in over
        and "audit.top_changes=4 (BIGSMOOTH_AUDIT__TOP_CHANGES)" in over
    )


def test_set_wins_over_the_environment(tmp_path):
    cfg = _write_case(tmp_path, _small_table(300))
    res = cli(
        "-q",
        "run",
        str(cfg),
        "--set",
        "solve.lam=3",
        "--set",
        "gates.max_auc_drop=1",
        env={"BIGSMOOTH_SOLVE__LAM": "2"},
    )
    assert res.returncode == EXIT_OK, res.stderr
    m, _ = _manifest(tmp_path)
    assert m["settings"]["solve"]["lam"] == 3.0


def test_bad_overrides_are_config_errors(tmp_path):
    cfg = _write_case(tmp_path, _small_table(300))
    for args, says in (
        (["--set", "solve.lam=abc"], "solve.lam"),
        (["--set", "nosuch.key=1"], "unknown config section [nosuch]"),
        (["--set", "solve.lamda=1"], "did you mean 'lam'"),
        (["--set", "solve.lam"], "must look like SECTION.KEY=VALUE"),
    ):
        res = cli("run", str(cfg), *args)
        assert res.returncode == EXIT_CONFIG and says in res.stderr, (args, res.stderr[-500:])
    res = cli("run", str(cfg), env={"BIGSMOOTH_GRAPH__NEIGHBOURS": "0"})
    assert res.returncode == EXIT_CONFIG and "graph.neighbours" in res.stderr
    assert not (tmp_path / "runs").exists() or not list((tmp_path / "runs").iterdir())


def test_check_validates_without_writing(tmp_path):
    cfg = _write_case(tmp_path, _small_table(300))
    res = cli("check", str(cfg))
    assert res.returncode == EXIT_OK and "300 rows in 1 files, all checks passed" in res.stdout, res.stderr
    assert not (tmp_path / "runs").exists() and not (tmp_path / "out").exists()
    bad = _small_table(300)
    bad["sustain_score"] = pa.array([float("nan")] + list(bad["sustain_score"].to_pylist())[1:])
    pq.write_table(pa.table(bad), tmp_path / "in" / "part-0.parquet")
    res = cli("check", str(cfg))
    run = cli("run", str(cfg))
    assert res.returncode == run.returncode == 65 and "1 rows with NaN or infinite score" in res.stderr
    assert cli("check", str(cfg), "--set", "graph.neighbours=0").returncode == EXIT_CONFIG


def test_run_dir_defaults_to_the_state_directory_not_the_config_folder(tmp_path):
    from bigsmooth.config import default_run_dir

    # the XDG Base Directory specification's default, and systemd's StateDirectory= variable
    assert default_run_dir({"HOME": "/home/x"}).endswith("/.local/state/bigsmooth/runs")
    assert default_run_dir({"XDG_STATE_HOME": "/s"}) == "/s/bigsmooth/runs"
    assert (
        default_run_dir({"STATE_DIRECTORY": "/var/lib/bigsmooth", "XDG_STATE_HOME": "/s"})
        == "/var/lib/bigsmooth/runs"
    )
    cfg = _write_case(tmp_path, _small_table(300))
    cfg.write_text(cfg.read_text().replace('dir = "runs"\n', ""))
    res = cli(
        "-q",
        "run",
        str(cfg),
        "--set",
        "gates.max_auc_drop=1",
        env={"XDG_STATE_HOME": str(tmp_path / "state")},
    )
    assert res.returncode == EXIT_OK, res.stderr
    assert not (tmp_path / "runs").exists()
    assert len(list((tmp_path / "state" / "bigsmooth" / "runs").iterdir())) == 1
