"""Comparable pairs as graph edges (graph.pair_weight): the stored graph equals the neighbour graph
of the same run without pair edges merged with the pairs by scipy's elementwise maximum; pairs that
name unknown ids are counted and reported; new pairs are a new run."""

import json

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import scipy.sparse as sp

from bigsmooth import demo
from bigsmooth.errors import EXIT_OK
from helpers import _small_table, cli

ROWS = 1200


def _graph(run):
    g = run / "graph"
    return sp.csr_matrix(
        (np.load(g / "data.npy"), np.load(g / "indices.npy"), np.load(g / "indptr.npy")), shape=(ROWS, ROWS)
    )


def _case(folder, table, pairs, pair_weight):
    (folder / "in").mkdir(parents=True)
    pq.write_table(pa.table(table), folder / "in" / "part-0.parquet")
    pq.write_table(pairs, folder / "pairs.parquet")
    text = demo.CONFIG_TEMPLATE.format(data="in", output="out", runs="runs")
    text = text.replace("[input]\n", '[input]\npairs = "pairs.parquet"\n').replace(
        "[graph]\n", f"[graph]\npair_weight = {pair_weight}\n"
    )
    (folder / "job.toml").write_text(text)
    return folder / "job.toml"


def test_pair_edges_merge_into_the_graph(tmp_path):
    table = _small_table(ROWS, seed=4)
    ids = np.asarray(table["applicant_id"])
    rng = np.random.default_rng(4)
    a, b = rng.integers(ROWS, size=40), rng.integers(ROWS, size=40)
    keep = a != b
    a, b = a[keep], b[keep]
    w = rng.uniform(0.5, 2.0, len(a))
    pairs = pa.table(
        {
            "id_a": pa.array(np.append(ids[a], [10**12])),  # the last pair names an unknown id
            "id_b": pa.array(np.append(ids[b], [ids[0]])),
            "weight": pa.array(np.append(w, [1.0])),
        }
    )
    plain = _case(tmp_path / "plain", table, pairs, 0.0)
    paired = _case(tmp_path / "paired", table, pairs, 0.5)
    assert cli("-q", "run", str(plain)).returncode == EXIT_OK
    res = cli("run", str(paired))
    assert res.returncode == EXIT_OK, res.stderr
    assert f"1 of {len(a) + 1} pairs name ids that are not in the table" in res.stderr
    assert str(10**12) in res.stderr
    (r0,) = (tmp_path / "plain" / "runs").iterdir()
    (r1,) = (tmp_path / "paired" / "runs").iterdir()
    # the same embedding both times (pairs do not change it), so the neighbour part is the same
    assert np.array_equal(np.load(r0 / "embed" / "embedding.npy"), np.load(r1 / "embed" / "embedding.npy"))
    P = sp.coo_matrix((0.5 * w, (a, b)), shape=(ROWS, ROWS)).tocsr()
    P = P.maximum(P.T)  # a pair given twice keeps its larger weight, as the graph does
    ref = _graph(r0).maximum(P)
    got = _graph(r1)
    assert (abs(got - ref) > 0).nnz == 0 and got.nnz == ref.nnz
    info = json.loads((r1 / "graph" / "graph.json").read_text())
    assert info["pairs"] == len(a) + 1 and info["pair_edges"] == len(a) and info["pairs_not_found"] == 1
    # new pairs are a new run (the pairs file's content is part of the run's identity)
    pq.write_table(pairs.slice(0, 10), tmp_path / "paired" / "pairs.parquet")
    res = cli("-q", "run", str(paired))
    assert res.returncode == EXIT_OK and len(list((tmp_path / "paired" / "runs").iterdir())) == 2


def test_pair_directions_widen_the_sensitive_subspace(tmp_path):
    table = _small_table(ROWS, seed=6)
    ids = np.asarray(table["applicant_id"])
    rng = np.random.default_rng(6)
    a, b = rng.integers(ROWS, size=60), rng.integers(ROWS, size=60)
    a, b = a[a != b], b[a != b]
    pairs = pa.table({"id_a": pa.array(ids[a]), "id_b": pa.array(ids[b])})
    plain = _case(tmp_path / "plain", table, pairs, 0.0)
    wide = _case(tmp_path / "wide", table, pairs, 0.0)
    wide.write_text(wide.read_text().replace("[embed]\n", "[embed]\npair_directions = 2\n"))
    for cfg in (plain, wide):
        res = cli("-q", "run", str(cfg))
        assert res.returncode == EXIT_OK, res.stderr
    (r0,) = (tmp_path / "plain" / "runs").iterdir()
    (r1,) = (tmp_path / "wide" / "runs").iterdir()
    i0 = json.loads((r0 / "embed" / "embed.json").read_text())
    i1 = json.loads((r1 / "embed" / "embed.json").read_text())
    assert i1["pairs_used"] == len(a) and i1["pair_directions"] == 2
    assert i1["removed_dimensions"] == i0["removed_dimensions"] + 2 and i1["dim"] == i0["dim"] - 2
    E0, E1 = np.load(r0 / "embed" / "embedding.npy"), np.load(r1 / "embed" / "embedding.npy")
    d0 = np.linalg.norm(E0[a] - E0[b], axis=1)  # rows are in file order: row i is the table's row i
    d1 = np.linalg.norm(E1[a] - E1[b], axis=1)
    assert d1.mean() < d0.mean()
