"""embed.fair_space = "previous": the second night keeps the first night's fair space (mean, scale,
projection) instead of fitting it again, on the demo's two nights (bigsmooth demo --next-night).

References: the embedding formula E = ((X - mean) * scale) @ transform evaluated with numpy on the
saved arrays, and the night-2 input read with pyarrow (not through the project's reader)."""

import json
import logging

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from bigsmooth.errors import EXIT_OK
from bigsmooth.stages import embed
from helpers import cli

KEEP = ("--set", "embed.fair_space=previous")


@pytest.fixture(scope="module")
def two_nights(tmp_path_factory):
    base = tmp_path_factory.mktemp("kept")
    first = cli(*KEEP, "demo", "--rows", "3000", "--dir", str(base))
    assert first.returncode == EXIT_OK, first.stderr
    second = cli(*KEEP, "demo", "--next-night", "--dir", str(base))
    assert second.returncode == EXIT_OK, second.stderr
    runs = {}
    for p in (base / "runs").iterdir():
        m = json.loads((p / "manifest.json").read_text())
        runs[m["input"]["rows"]] = p  # night 1: 3,000 rows; night 2: 2% left, 2% arrived
    assert len(runs) == 2
    night1, night2 = runs[3000], [p for r, p in runs.items() if r != 3000][0]
    return base, night1, night2, first, second


def _info(run):
    return json.loads((run / "embed" / "embed.json").read_text())


def _features(run, names):
    """The run's rows in its row order (its manifest's input files, in order), encoded with pyarrow
    and numpy: numeric columns as they are, ``column=level`` as a 0/1 indicator."""
    m = json.loads((run / "manifest.json").read_text())
    root = run.parent / m["roots"]["input"]
    t = pa.concat_tables(pq.read_table(root / e["rel"]) for e in m["input"]["files"])
    cols = []
    for name in names:
        col, eq, level = name.partition("=")
        v = t.column(col).to_numpy(zero_copy_only=False)
        cols.append((v.astype(str) == level).astype(float) if eq else v.astype(float))
    return np.column_stack(cols)


def test_the_first_night_has_nothing_to_keep_and_fits(two_nights):
    _, night1, _, first, _ = two_nights
    assert _info(night1)["fair_space_from"] is None
    assert "no published version yet; the fair space is fitted tonight" in first.stderr


def test_the_second_night_keeps_the_first_nights_space(two_nights):
    base, night1, night2, _, second = two_nights
    a, b = _info(night1), _info(night2)
    assert b["fair_space_from"]["run_id"] == night1.name and b["fair_space_from"]["origin"] == night1.name
    for key in ("mean", "scale", "transform", "features"):
        assert b[key] == a[key], key
    # night 2's embedding is night 1's formula on night 2's rows: ((X - mean) * scale) @ transform
    X = _features(night2, a["features"])
    ref = ((X - np.array(a["mean"])) * np.array(a["scale"])) @ np.array(a["transform"])
    E2 = np.load(night2 / "embed" / "embedding.npy")
    assert np.allclose(E2, ref, rtol=1e-5, atol=1e-5 * np.abs(ref).max())
    # a space fitted on night 2 would differ: night 2's feature means are not night 1's
    assert np.abs(X.mean(axis=0) - np.array(a["mean"])).max() > 1e-6
    # and the audit and report say where the space came from
    audit = json.loads(next((base / "output").glob(f"*-{night2.name[:8]}/_audit.json")).read_text())
    assert audit["provenance"]["fair_space_from"]["run_id"] == night1.name
    report = next((base / "output").glob(f"*-{night2.name[:8]}/_report.html")).read_text()
    assert "kept from the run behind version" in report
    assert "The fair space was fitted tonight" not in report
    assert "fair space: kept from run " + night1.name in second.stderr


def test_running_the_second_night_again_finds_the_same_run(two_nights):
    base, _, night2, _, _ = two_nights
    res = cli(*KEEP, "run", str(base / "bigsmooth.toml"))
    assert res.returncode == EXIT_OK, res.stderr
    assert f"run {night2.name} was already complete" in res.stdout


def test_a_space_with_other_features_is_not_kept(tmp_path, caplog):
    # the saved space encoded a category level tonight's table lacks: nothing is kept (the embed
    # stage then fits the space on tonight's rows)
    saved = tmp_path / "r1" / "embed"
    saved.mkdir(parents=True)
    names = ["x", "colour=red", "colour=blue"]
    rng = np.random.default_rng(0)
    info = {"features": names, "mean": [0.0] * 3, "scale": [1.0] * 3, "transform": np.eye(3).tolist()}
    info |= {"removed_dimensions": 0, "constant_features": []}
    (saved / "embed.json").write_text(json.dumps(info))
    source = {"run_id": "r1", "version": "v1", "origin": "r1"}
    with caplog.at_level(logging.WARNING, logger="bigsmooth"):
        space, kept = embed._kept_space(str(tmp_path), source, ["x", "colour=red"])
    assert space is None and kept is None
    assert "0 new here" in caplog.text and "1 gone, e.g. 'colour=blue'" in caplog.text
    space, kept = embed._kept_space(str(tmp_path), source, names)
    assert kept == source and np.array_equal(space.transform, np.eye(3))
    X = rng.normal(size=(5, 3))
    assert np.allclose(space.apply(X), X)  # numpy: ((X - 0) * 1) @ I
