"""The job end to end through its command line, on small inputs."""

import json
import os
import subprocess
import sys

import numpy as np
import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.parquet as pq
import pytest
from sklearn.neighbors import NearestNeighbors

from bigsmooth import demo
from bigsmooth.errors import EXIT_CONFIG, EXIT_DATA, EXIT_NOINPUT, EXIT_USAGE
from helpers import ROOT, _assert_nothing_published, _small_table, _write_case, cli, read_output


def test_demo_publishes_every_row_once(demo_run):
    base, res = demo_run
    assert "output:" in res.stdout and "caution" in res.stdout
    inp = ds.dataset(base / "data" / "applicants", format="parquet", partitioning="hive").to_table()
    out = read_output(base / "output")
    assert out.num_rows == inp.num_rows == 3000
    ids_in = np.sort(inp.column("applicant_id").to_numpy())
    ids_out = np.sort(out.column("applicant_id").to_numpy())
    assert np.array_equal(ids_in, ids_out) and len(np.unique(ids_out)) == 3000
    assert {"sustain_score", "sustain_score_adjusted", "sustain_score_change", "district"} <= set(
        out.column_names
    )
    assert "origin_group" not in out.column_names and "age_band" not in out.column_names
    adj = out.column("sustain_score_adjusted").to_numpy()
    assert adj.min() >= 0 and adj.max() <= 1


def test_demo_reduces_disagreement_between_exact_neighbours(demo_run):
    base, _ = demo_run
    (run_dir,) = [p for p in (base / "runs").iterdir() if p.is_dir()]
    E = np.load(run_dir / "embed" / "embedding.npy")
    # neighbours from scikit-learn on the fair space (outside reference); scores from the published Parquet,
    # matched back to row order through the input files
    order_tbl = pa.concat_tables(
        [
            pq.read_table(f, columns=["applicant_id"])
            for f in sorted(str(p) for p in (base / "data" / "applicants").rglob("*.parquet"))
        ]
    )
    out = read_output(base / "output")
    pos = {v: i for i, v in enumerate(out.column("applicant_id").to_pylist())}
    idx = np.array([pos[v] for v in order_tbl.column(0).to_pylist()])
    y = out.column("sustain_score").to_numpy()[idx]
    f = out.column("sustain_score_adjusted").to_numpy()[idx]
    _, nb = NearestNeighbors(n_neighbors=11).fit(E).kneighbors(E)
    before = np.mean(np.abs(y[:, None] - y[nb[:, 1:]]))
    after = np.mean(np.abs(f[:, None] - f[nb[:, 1:]]))
    assert after < 0.5 * before


def test_second_run_is_a_no_op(demo_run):
    base, _ = demo_run
    versions = sorted(p.name for p in (base / "output").iterdir() if not p.name.startswith("."))
    res = cli("run", str(base / "bigsmooth.toml"))
    assert res.returncode == 0, res.stderr
    assert "already complete" in res.stdout
    assert sorted(p.name for p in (base / "output").iterdir() if not p.name.startswith(".")) == versions


def test_status_shows_stages_and_solver(demo_run):
    base, _ = demo_run
    (run_dir,) = [p for p in (base / "runs").iterdir() if p.is_dir()]
    res = cli("status", str(run_dir))
    assert res.returncode == 0, res.stderr
    stages = ("scan", "embed", "graph", "order", "solve", "audit", "publish")
    listed = [line.split()[0] for line in res.stdout.splitlines()[2:9]]
    assert listed == list(stages)  # in pipeline order, one line each
    assert "converged" in res.stdout and "residual" in res.stdout
    m = json.loads(cli("status", str(run_dir), "--json").stdout)
    assert all(s["state"] == "done" for s in m["stages"].values())


def test_audit_has_cautions_and_four_fifths(demo_run):
    base, _ = demo_run
    a = json.loads((base / "output" / "current" / "_audit.json").read_text())
    assert "no proof of legal compliance" in a["caution"]
    g = a["groups"]["origin_group"]["after"]
    assert all("below_four_fifths" in r for r in g if not r["suppressed"])
    assert (
        a["scores"]["sustain_score"]["after"]["neighbour_disagreement"]
        < a["scores"]["sustain_score"]["before"]["neighbour_disagreement"]
    )


def test_help_lists_every_option():
    res = cli("--help")
    assert res.returncode == 0 and "exit codes" in res.stdout
    for cmd, opts in {
        "run": ["--fresh"],
        "demo": ["--rows", "--dir", "--seed"],
        "status": ["--json"],
    }.items():
        r = cli(cmd, "--help")
        assert r.returncode == 0
        for o in opts:
            assert o in r.stdout


def test_bad_usage_exit_code():
    assert cli("run").returncode == EXIT_USAGE
    assert cli("frobnicate").returncode == EXIT_USAGE


def test_missing_column_suggests_the_close_name(tmp_path):
    cols = _small_table()
    cols["monthly_incme"] = cols.pop("monthly_income")
    res = cli("run", str(_write_case(tmp_path, cols)))
    assert res.returncode == EXIT_DATA
    assert "'monthly_income' is not in the table" in res.stderr and "monthly_incme" in res.stderr
    _assert_nothing_published(tmp_path)


def test_duplicate_ids_are_counted_with_examples(tmp_path):
    cols = _small_table()
    ids = cols["applicant_id"].to_numpy().copy()
    ids[10:13] = ids[0]
    cols["applicant_id"] = pa.array(ids)
    res = cli("run", str(_write_case(tmp_path, cols)))
    assert res.returncode == EXIT_DATA
    assert "3 duplicate rows" in res.stderr and f"{ids[0]} x4" in res.stderr
    _assert_nothing_published(tmp_path)


def test_nan_score_is_reported_with_ids(tmp_path):
    # regression: DuckDB pruned pyarrow-written row groups on NaN-free min/max statistics and
    # found no example ids for NaN rows (fixed by can_have_nan = true in bigsmooth.table.Source)
    cols = _small_table()
    s = cols["sustain_score"].to_numpy().copy()
    s[[5, 9]] = np.nan
    cols["sustain_score"] = pa.array(s)
    res = cli("run", str(_write_case(tmp_path, cols)))
    assert res.returncode == EXIT_DATA
    ids = cols["applicant_id"].to_numpy()
    assert "2 rows with NaN or infinite score" in res.stderr and str(ids[5]) in res.stderr
    _assert_nothing_published(tmp_path)


def test_empty_input_is_refused(tmp_path):
    cols = _small_table()
    empty = pa.table(cols).slice(0, 0)
    res = cli("run", str(_write_case(tmp_path, {c: empty.column(c) for c in empty.column_names})))
    assert res.returncode == EXIT_DATA
    assert "0 rows" in res.stderr
    _assert_nothing_published(tmp_path)


def test_missing_input_path(tmp_path):
    cfg = tmp_path / "job.toml"
    cfg.write_text(demo.CONFIG_TEMPLATE.format(data="nowhere", output="out", runs="runs"))
    res = cli("run", str(cfg))
    assert res.returncode == EXIT_NOINPUT and "does not exist" in res.stderr


def test_unknown_config_key_suggests_the_close_key(tmp_path):
    cols = _small_table()
    cfg = _write_case(tmp_path, cols)
    cfg.write_text(cfg.read_text().replace("neighbours = 10", "neighbors = 10"))
    res = cli("run", str(cfg))
    assert res.returncode == EXIT_CONFIG and "graph.neighbors" in res.stderr and "neighbours" in res.stderr
    _assert_nothing_published(tmp_path)


def test_nightly_script_passes_the_exit_code_through(demo_run, tmp_path):
    base, _ = demo_run
    env = {**os.environ, "BIGSMOOTH": os.path.join(os.path.dirname(sys.executable), "bigsmooth")}
    script = os.path.join(ROOT, "jobs", "nightly.sh")
    ok = subprocess.run(
        ["bash", script, str(base / "bigsmooth.toml")], capture_output=True, text=True, env=env
    )
    assert ok.returncode == 0 and "already complete" in ok.stdout
    bad = tmp_path / "bad.toml"
    bad.write_text("[input]\npath = 3\n")
    res = subprocess.run(["bash", script, str(bad)], capture_output=True, text=True, env=env)
    assert res.returncode == EXIT_CONFIG and "input.path must be a string" in res.stderr


def test_unwritable_output_is_refused_before_any_work(tmp_path):
    # a regular file where the output folder's parent should be: not writable even for root
    cols = _small_table()
    cfg = _write_case(tmp_path, cols)
    (tmp_path / "blocker").write_text("not a folder")
    cfg.write_text(cfg.read_text().replace('path = "out"', 'path = "blocker/out"'))
    res = cli("run", str(cfg))
    assert res.returncode == 73 and "not writable" in res.stderr
    assert (tmp_path / "blocker").read_text() == "not a folder"


def _variants(demo_run, tmp_path, variants, exact_below, build="auto"):
    from bigsmooth.pipeline import run_job

    base, _ = demo_run
    text = (base / "bigsmooth.toml").read_text().replace("data/applicants", str(base / "data" / "applicants"))
    outs = []
    for i, (workers, backend) in enumerate(variants):
        cfg = tmp_path / f"job{i}.toml"
        cfg.write_text(
            text.replace('path = "output"', f'path = "out{i}"')
            .replace('dir = "runs"', f'dir = "runs{i}"')
            .replace(
                'kernel_scale = "global"',
                f'kernel_scale = "global"\nexact_below = {exact_below}\nbuild = "{build}"',
            )
            .replace("tol = 1e-6", f'tol = 1e-6\nworkers = {workers}\nbackend = "{backend}"')
        )
        run_job(str(cfg))  # in this process: the variants differ only in the solve stage's executor
        t = read_output(tmp_path / f"out{i}").sort_by("applicant_id")
        outs.append(t.column("sustain_score_adjusted").to_numpy())
    return outs


def test_output_is_bit_identical_for_one_and_two_workers(demo_run, tmp_path):
    # the solver with 1 worker, 2 threads and 2 processes: the published adjusted scores are the same bits
    outs = _variants(
        demo_run, tmp_path, [(1, "threads"), (2, "threads"), (2, "processes")], exact_below=20000
    )
    for o in outs[1:]:
        assert np.array_equal(o, outs[0])


@pytest.mark.slow
def test_output_is_bit_identical_on_the_approximate_path_across_workers_and_repeats(demo_run, tmp_path):
    # as above with pynndescent forced, and a repeat of the first run (same seed): same bits
    outs = _variants(
        demo_run,
        tmp_path,
        [(1, "threads"), (2, "threads"), (2, "processes"), (1, "threads")],
        exact_below=0,
        build="whole",
    )
    for o in outs[1:]:
        assert np.array_equal(o, outs[0])


def test_chunk_size_does_not_change_the_result(tmp_path, caplog):
    # the statistics are summed in fixed pieces of rows, so two chunk sizes give the same bits
    # (20,000 rows in one file: chunks of 8,192 + 8,192 + 3,616 rows against 16,384 + 3,616);
    # the job runs in this process up to the embed stage, the one that reads in chunks
    from bigsmooth.pipeline import run_job

    cfg0 = _write_case(tmp_path, _small_table(20000, seed=4))
    emb = []
    for i, rows in enumerate((8192, 16384)):
        cfg = tmp_path / f"job{i}.toml"
        cfg.write_text(
            cfg0.read_text()
            .replace('path = "out"', f'path = "out{i}"')
            .replace('dir = "runs"', f'dir = "runs{i}"')
            .replace("components = 0", f"components = 0\nbatch_rows = {rows}")
        )
        caplog.clear()
        with caplog.at_level("INFO", logger="bigsmooth"):
            res = run_job(str(cfg), upto="embed")
        assert f"chunks of {rows} rows" in caplog.text
        emb.append(np.load(os.path.join(res["run_dir"], "embed", "embedding.npy")))
    assert np.array_equal(emb[0], emb[1])
