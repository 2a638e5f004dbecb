"""bigsmooth score (late rows) through the command line: the replay of the issue (the job on 99%
of a table, the other 1% scored as late rows, the job on 100%), and bad late input."""

import json

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
import pytest

from bigsmooth import demo
from bigsmooth.errors import EXIT_DATA, EXIT_OK, EXIT_USAGE
from bigsmooth.kernels import late as lk
from bigsmooth.kernels.metrics import quantile_cutoff
from helpers import _small_table, cli, read_output

ROWS = 20_000


def _job(folder, table):
    (folder / "in").mkdir(parents=True)
    pq.write_table(table, folder / "in" / "part-0.parquet")
    cfg = folder / "job.toml"
    cfg.write_text(demo.CONFIG_TEMPLATE.format(data="in", output="out", runs="runs"))
    res = cli("-q", "run", str(cfg))
    assert res.returncode == EXIT_OK, res.stderr
    return cfg


@pytest.fixture(scope="module")
def replay(tmp_path_factory):
    """Night on 99% of a demo table, the job on all of it, and the other 1% as a late file."""
    base = tmp_path_factory.mktemp("late")
    table = pa.table(_small_table(ROWS, seed=5))
    is_late = pc.equal(pc.bit_wise_and(table.column("applicant_id"), 127), 7)  # ~0.8% of ids
    night_cfg = _job(base / "night", table.filter(pc.invert(is_late)))
    full_cfg = _job(base / "full", table)
    pq.write_table(table.filter(is_late), base / "late.parquet")
    res = cli("score", str(night_cfg), str(base / "late.parquet"), "--out", str(base / "scored"))
    assert res.returncode == EXIT_OK, res.stderr
    return base, night_cfg, full_cfg, res


def test_replay_late_rows_agree_with_the_full_run(replay):
    base, _, _, res = replay
    assert "scored" in res.stdout
    late = pq.read_table(base / "scored" / "late.parquet")
    full = read_output(base / "full" / "out")
    ids = late.column("applicant_id").to_numpy()
    pos = {v: i for i, v in enumerate(full.column("applicant_id").to_numpy())}
    full_adj = full.column("sustain_score_adjusted").to_numpy()
    ref = full_adj[[pos[v] for v in ids]]
    got = late.column("sustain_score_adjusted").to_numpy()
    raw = late.column("sustain_score").to_numpy()
    # decisions at the full run's quantile cutoff (audit.select_rate 0.3 in the demo config)
    cut = quantile_cutoff(full_adj, 0.3)
    agree = np.mean((got >= cut) == (ref >= cut))
    assert len(ids) > 100 and agree >= 0.97, agree
    diff = np.abs(got - ref)
    # the late scores are far closer to the full run's than the raw scores are (smoothing's own move)
    assert np.quantile(diff, 0.99) < 0.5 * np.quantile(np.abs(raw - ref), 0.99)
    np.testing.assert_allclose(late.column("sustain_score_change").to_numpy(), got - raw, atol=1e-12)
    assert not late.column("no_near_neighbour").to_numpy().any()
    meta = json.loads(late.schema.metadata[b"bigsmooth.provenance"])
    assert meta["late_rows"] == len(ids) and meta["night_rows"] == ROWS - len(ids)


def test_a_late_row_alone_gets_the_closed_form(replay, tmp_path):
    # one late row: its adjusted score equals the closed form from its neighbours and the night's
    # solution (kernel reference), with the neighbours found by brute force over the night (numpy)
    base, night_cfg, _, _ = replay
    one = pq.read_table(base / "late.parquet").slice(0, 1)
    pq.write_table(one, tmp_path / "one.parquet")
    res = cli("score", str(night_cfg), str(tmp_path / "one.parquet"), "--out", str(tmp_path / "o"))
    assert res.returncode == EXIT_OK, res.stderr
    got = pq.read_table(tmp_path / "o" / "late.parquet").column("sustain_score_adjusted")[0].as_py()
    (run,) = (base / "night" / "runs").iterdir()
    E = np.load(run / "embed" / "embedding.npy").astype(np.float64)
    F = np.load(run / "solve" / "adjusted.npy")[:, 0]
    info = json.loads((run / "embed" / "embed.json").read_text())
    g = json.loads((run / "graph" / "graph.json").read_text())
    kth = np.load(run / "graph" / "distances.npy")[:, 9].astype(np.float64)
    from bigsmooth.late import features

    scan = json.loads((run / "scan" / "scan.json").read_text())
    inp = {"numeric_features": list(demo.NUMERIC), "categorical_features": list(demo.CATEGORICAL)}
    X, _ = features(one, inp, scan["levels"])
    q = (((X - np.array(info["mean"])) * np.array(info["scale"])) @ np.array(info["transform"])).astype(
        np.float32
    )
    d = np.sqrt(((E - q.astype(np.float64)) ** 2).sum(axis=1))
    order = np.lexsort((np.arange(len(d)), d))
    near = order[:10]
    joined = np.union1d(near, np.nonzero(d < kth)[0])  # it lists them, or they would list it
    sigma = g["sigma_median"]  # the demo's kernel rule is global
    w = lk.heat(d[joined], sigma, sigma)
    y = one.column("sustain_score")[0].as_py()
    assert got == pytest.approx(float(np.clip(lk.single_row(y, w, F[joined], 1.0), 0, 1)), abs=1e-9)


def _late_case(replay, tmp_path, change):
    base, night_cfg, _, _ = replay
    t = pq.read_table(base / "late.parquet").slice(0, 20)
    t = change(t)
    pq.write_table(t, tmp_path / "bad.parquet")
    return cli("score", str(night_cfg), str(tmp_path / "bad.parquet"), "--out", str(tmp_path / "o"))


def test_bad_late_input_is_refused_with_counts_and_ids(replay, tmp_path):
    res = _late_case(replay, tmp_path, lambda t: t.drop_columns(["rent_to_income"]))
    assert res.returncode == EXIT_DATA and "'rent_to_income' is not in the table" in res.stderr

    def nan_score(t):
        s = t.column("sustain_score").to_numpy().copy()
        s[3] = np.nan
        return t.set_column(t.column_names.index("sustain_score"), "sustain_score", pa.array(s))

    res = _late_case(replay, tmp_path, nan_score)
    assert res.returncode == EXIT_DATA and "1 rows with NaN or infinite score" in res.stderr
    assert not (tmp_path / "o" / "late.parquet").exists()


def test_ids_the_night_scored_are_refused_unless_replaced(replay, tmp_path):
    base, night_cfg, _, _ = replay
    night = pq.read_table(base / "night" / "in" / "part-0.parquet").slice(100, 3)
    pq.write_table(night, tmp_path / "again.parquet")
    args = ["score", str(night_cfg), str(tmp_path / "again.parquet"), "--out", str(tmp_path / "o")]
    res = cli(*args)
    assert res.returncode == EXIT_DATA and "3 of 3 late rows have ids the night already scored" in res.stderr
    res = cli(*args, "--replace")
    assert res.returncode == EXIT_OK, res.stderr
    out = pq.read_table(tmp_path / "o" / "late.parquet")
    # the row's own night copy is not its neighbour: its nearest night row is not at distance 0
    assert (out.column("nearest_distance_ratio").to_numpy() > 0).all()


def test_unseen_level_is_flagged_and_scored(replay, tmp_path):
    def astronaut(t):
        v = t.column("employment").to_pylist()
        v[0] = "astronaut"
        return t.set_column(t.column_names.index("employment"), "employment", pa.array(v))

    res = _late_case(replay, tmp_path, astronaut)
    assert res.returncode == EXIT_OK, res.stderr
    out = pq.read_table(tmp_path / "o" / "late.parquet")
    assert out.column("unseen_levels").to_pylist()[:2] == [1, 0]
    assert np.isfinite(out.column("sustain_score_adjusted").to_numpy()).all()
    assert "1 with an unseen category level" in res.stdout


def test_score_usage_errors(replay, tmp_path):
    base, night_cfg, _, _ = replay
    res = cli("score", str(night_cfg), str(base / "late.parquet"), "--out", str(base / "night" / "out" / "x"))
    assert res.returncode != EXIT_OK and "inside the output folder" in res.stderr
    res = cli("score", str(night_cfg), str(base / "late.parquet"), "--out", str(tmp_path), "--batch", "0")
    assert res.returncode == EXIT_USAGE
