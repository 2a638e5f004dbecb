"""bigsmooth explain through the command line on the session's demo run (read only), checked
against the smoothing system built with scipy from the stored graph and sklearn's distances."""

import json

import numpy as np
import pyarrow.dataset as ds
import pytest
import scipy.sparse as sp
from sklearn.metrics import pairwise_distances

from bigsmooth.errors import EXIT_OK, EXIT_USAGE
from helpers import cli, read_output


def _run(base):
    (run,) = [p for p in (base / "runs").iterdir() if p.is_dir()]
    return run


def _ids(base, k):
    out = read_output(base / "output")
    ch = np.abs(out.column("sustain_score_change").to_numpy())
    ids = out.column("applicant_id").to_numpy()
    return [int(ids[i]) for i in np.argsort(-ch)[:k]] + [int(ids[np.argmin(ch)])]


def test_terms_add_up_to_the_adjusted_score(demo_run):
    base, _ = demo_run
    run = _run(base)
    W = sp.csr_matrix(
        (
            np.load(run / "graph" / "data.npy"),
            np.load(run / "graph" / "indices.npy"),
            np.load(run / "graph" / "indptr.npy"),
        )
    )
    E = np.load(run / "embed" / "embedding.npy").astype(np.float64)
    y = np.load(run / "embed" / "scores.npy")[:, 0]
    f = np.load(run / "solve" / "adjusted.npy")[:, 0]
    d = np.asarray(W.sum(axis=1)).ravel()
    lam = 1.0  # the demo config's solve.lam
    r = (1 + lam * d) * f - lam * (W @ f) - y  # A f - C y with C = I (unnormalised), scipy sparse
    for v in _ids(base, 3):
        res = cli("explain", str(base / "bigsmooth.toml"), str(v), "--json")
        assert res.returncode == EXIT_OK, res.stderr
        rec = json.loads(res.stdout)
        i = rec["row"]
        total = rec["own_share"][0] + rec["neighbours_share"][0]
        assert total + rec["residual"][0] == pytest.approx(rec["adjusted"][0], abs=1e-12)
        # the difference is the row's residual (A f - C y)_i over c + lam d: the solver's tolerance
        assert rec["residual"][0] == pytest.approx(r[i] / (1 + lam * d[i]), abs=1e-10)
        assert abs(rec["residual"][0]) < 1e-4
        assert rec["adjusted"][0] == f[i] and rec["raw"][0] == y[i] and rec["degree"] == pytest.approx(d[i])
        row = W.getrow(i)
        order = np.lexsort((row.indices, -row.data))[:10]
        assert [h["row"] for h in rec["heaviest"]] == row.indices[order].tolist()
        np.testing.assert_allclose([h["weight"] for h in rec["heaviest"]], row.data[order])
        ref = pairwise_distances(E[[i]], E[row.indices[order]])[0]  # sklearn
        np.testing.assert_allclose([h["distance"] for h in rec["heaviest"]], ref, rtol=1e-10)
        assert "protected" not in rec and "origin_group" not in res.stdout


def test_explain_text_ids_and_errors(demo_run):
    base, _ = demo_run
    v = _ids(base, 1)[0]
    res = cli("explain", str(base / "bigsmooth.toml"), str(v))
    assert res.returncode == EXIT_OK, res.stderr
    assert f"id {v}:" in res.stdout and "own score" in res.stdout and "heaviest" in res.stdout
    table = ds.dataset(base / "data" / "applicants", format="parquet", partitioning="hive").to_table()
    rec = json.loads(cli("explain", str(base / "bigsmooth.toml"), str(v), "--json").stdout)
    known = set(table.column("applicant_id").to_pylist())
    assert all(h["id"] in known for h in rec["heaviest"])
    res = cli("explain", str(base / "bigsmooth.toml"), "999999999")
    assert res.returncode == EXIT_USAGE and "is not in version" in res.stderr
    res = cli("explain", str(base / "bigsmooth.toml"), "abc")
    assert res.returncode == EXIT_USAGE and "holds integers" in res.stderr


def test_report_largest_changes_carry_the_breakdown(demo_run):
    base, _ = demo_run
    audit = json.loads((base / "output" / "current" / "_audit.json").read_text())
    big = audit["largest_changes"]
    assert big
    for c in big:
        w = c["why"]
        assert w["own_share"][0] + w["neighbours_share"][0] == pytest.approx(c["after"][0], abs=1e-4)
    page = (base / "output" / "current" / "_report.html").read_text()
    assert "href='#why-0'" in page and "id='why-0'" in page
