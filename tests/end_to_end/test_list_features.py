"""A numeric feature given as a list of floats (an embedding from an upstream model, written by
pyarrow as list<float32>): the job must treat it exactly as the same numbers given as separate
columns, and refuse lists of the wrong length or with NaN inside, with counts and ids."""

import json

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from bigsmooth import demo
from bigsmooth.errors import EXIT_DATA, EXIT_OK
from helpers import _small_table, cli, read_output

ROWS, WIDTH = 1500, 4


def _tables(seed=3):
    cols = _small_table(ROWS, seed)
    rng = np.random.default_rng(seed)
    emb = rng.normal(size=(ROWS, WIDTH)).astype(np.float32)
    listed = dict(cols)
    listed["emb"] = pa.array(list(emb), type=pa.list_(pa.float32()))
    exploded = dict(cols)
    for i in range(WIDTH):
        exploded[f"emb_{i}"] = pa.array(emb[:, i])
    return listed, exploded


def _config(tmp, table, numeric_extra):
    (tmp / "in").mkdir(parents=True)
    pq.write_table(pa.table(table), tmp / "in" / "part-0.parquet")
    text = demo.CONFIG_TEMPLATE.format(data="in", output="out", runs="runs")
    text = text.replace(
        'numeric_features = ["monthly_income",', f'numeric_features = [{numeric_extra}, "monthly_income",'
    )
    cfg = tmp / "job.toml"
    cfg.write_text(text)
    return cfg


def test_list_feature_equals_the_same_numbers_as_columns(tmp_path):
    listed, exploded = _tables()
    a = _config(tmp_path / "a", listed, '"emb"')
    b = _config(tmp_path / "b", exploded, ", ".join(f'"emb_{i}"' for i in range(WIDTH)))
    for cfg in (a, b):
        res = cli("-q", "run", str(cfg))
        assert res.returncode == EXIT_OK, res.stderr
    (ra,) = (tmp_path / "a" / "runs").iterdir()
    (rb,) = (tmp_path / "b" / "runs").iterdir()
    info = json.loads((ra / "embed" / "embed.json").read_text())
    assert info["features"][:WIDTH] == [f"emb[{i}]" for i in range(WIDTH)]
    assert np.array_equal(np.load(ra / "embed" / "embedding.npy"), np.load(rb / "embed" / "embedding.npy"))
    oa, ob = read_output(tmp_path / "a" / "out"), read_output(tmp_path / "b" / "out")
    assert np.array_equal(
        oa.column("sustain_score_adjusted").to_numpy(), ob.column("sustain_score_adjusted").to_numpy()
    )
    # late rows with the list feature go through the same encoding
    late = pa.table(listed).slice(0, 5)
    late = late.set_column(0, "applicant_id", pa.array(np.arange(5) + 10**9))
    pq.write_table(late, tmp_path / "late.parquet")
    res = cli("score", str(a), str(tmp_path / "late.parquet"), "--out", str(tmp_path / "late"))
    assert res.returncode == EXIT_OK, res.stderr


def test_bad_lists_are_refused_with_counts_and_ids(tmp_path):
    listed, _ = _tables()
    emb = listed["emb"].to_pylist()
    emb[10] = emb[10][:3]  # one short list
    emb[20] = [1.0, float("nan"), 0.0, 0.0]  # NaN inside a list
    bad = dict(listed, emb=pa.array(emb, type=pa.list_(pa.float32())))
    cfg = _config(tmp_path, bad, '"emb"')
    res = cli("run", str(cfg))
    assert res.returncode == EXIT_DATA, res.stderr
    ids = (
        listed["applicant_id"].to_pylist()
        if hasattr(listed["applicant_id"], "to_pylist")
        else list(listed["applicant_id"])
    )
    assert (
        "1 rows with list of the wrong length in numeric feature 'emb' (the table's lists have 4 values)"
        in res.stderr
    )
    assert str(ids[10]) in res.stderr and str(ids[20]) in res.stderr
    assert (
        "1 rows with null, NaN, infinite or too large value inside the list of numeric feature 'emb'"
        in res.stderr
    )
