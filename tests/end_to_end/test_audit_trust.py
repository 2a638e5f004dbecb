"""The audit's honesty through the command line: provenance on every artifact, warnings that fire,
figures that keep identical rows apart, gates that are off saying so.

Tables here are invented test input (not references); each check names what it compares with.
"""

import json

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from helpers import _small_table, _write_case, cli


def _cfg(tmp_path, extra="", features=("x1", "x2")):
    return f"""
[input]
path = "in"
id = "id"
scores = ["score"]
numeric_features = {json.dumps(list(features))}
protected = ["group"]
label = "label"

[graph]
neighbours = 10

[solve]
lam = 1.0

[output]
path = "out"

[run]
dir = "runs"
{extra}
"""


def _run(tmp_path, cols, extra="", features=("x1", "x2")):
    (tmp_path / "in").mkdir()
    pq.write_table(pa.table(cols), tmp_path / "in" / "part-0.parquet")
    (tmp_path / "job.toml").write_text(_cfg(tmp_path, extra, features))
    return cli("run", str(tmp_path / "job.toml"))


def _audit(tmp_path):
    return json.loads((tmp_path / "out" / "current" / "_audit.json").read_text())


def test_a_ring_shaped_protected_attribute_is_found_by_the_neighbour_vote(tmp_path):
    # the group is a ring in the plane of x1, x2 (inside / outside radius 0.8; x3, x4 are noise): no
    # linear function of the features predicts it, so the linear probe reads about 0.5, but the
    # fair-space neighbours mostly share the row's group; the audit must warn (embed.leakage_warn_auc,
    # default 0.65)
    rng = np.random.default_rng(5)
    n = 3000
    x = np.column_stack([rng.uniform(-1, 1, (n, 2)), 0.3 * rng.normal(size=(n, 2))])
    group = np.where(np.hypot(x[:, 0], x[:, 1]) < 0.8, "inner", "outer")
    score = np.clip(0.5 + 0.3 * (group == "inner") + rng.normal(0, 0.1, n), 0, 1)
    label = (rng.random(n) < score).astype(np.int8)
    res = _run(
        tmp_path,
        {
            "id": np.arange(n),
            "score": score,
            **{f"x{j + 1}": x[:, j] for j in range(4)},
            "group": group,
            "label": label,
        },
        extra="[gates]\nmax_auc_drop = 1.0\n",
        features=("x1", "x2", "x3", "x4"),
    )
    assert res.returncode == 0, res.stderr[-2000:]
    a = _audit(tmp_path)
    assert a["leakage"]["linear_probe"]["group"]["max_fair_space_auc"] < 0.65
    assert a["leakage"]["neighbour_vote"]["group"]["max_auc"] > 0.9
    assert any(w.startswith("leakage: the fair-space neighbours predict 'group'") for w in a["warnings"])
    assert "warning: leakage" in res.stdout
    assert "neighbour vote" in (tmp_path / "out" / "current" / "_report.html").read_text()


def test_identical_rows_are_reported_apart_from_the_lipschitz_rate(tmp_path):
    # 300 distinct feature rows, each repeated 12 times (k = 10) with different raw scores: every neighbour
    # pair is at distance 0. The local violation rate is taken over pairs at d > 0 only (none here),
    # and the pairs at d = 0 are counted on their own, against a direct count with numpy
    rng = np.random.default_rng(6)
    base = rng.normal(size=(300, 2))
    x = np.repeat(base, 12, axis=0)
    n = len(x)
    score = rng.uniform(0.2, 0.8, n)
    res = _run(
        tmp_path,
        {
            "id": np.arange(n),
            "score": score,
            "x1": x[:, 0],
            "x2": x[:, 1],
            "group": rng.choice(["a", "b"], n),
            "label": (rng.random(n) < 0.5).astype(np.int8),
        },
        extra="[gates]\nmax_auc_drop = 1.0\n",
    )
    assert res.returncode == 0, res.stderr[-2000:]
    b = _audit(tmp_path)["scores"]["score"]["before"]
    assert b["zero_distance_pair_share"] == 1.0
    assert b["lipschitz_violations_local"] == 0.0  # no pair at d > 0 to violate
    assert b["zero_distance_pairs_differing"] == 1.0  # continuous random scores all differ
    # the mean |difference| over the zero-distance neighbour pairs: the expected |u - v| of two
    # independent uniforms on an interval of length 0.6 is 0.6 / 3 (handbook), within sampling error
    assert abs(b["zero_distance_mean_abs_difference"] - 0.2) < 0.02


def test_provenance_names_the_run_and_lam_in_json_report_and_parquet(tmp_path):
    cfg = _write_case(tmp_path, _small_table(400, seed=11))
    cfg.write_text(cfg.read_text().replace("lam = 1.0", "lam = 2.5"))
    res = cli("run", str(cfg))
    assert res.returncode == 0, res.stderr[-2000:]
    cur = tmp_path / "out" / "current"
    prov = json.loads((cur / "_audit.json").read_text())["provenance"]
    (run_dir,) = list((tmp_path / "runs").iterdir())
    assert prov["run_id"] == run_dir.name and prov["lam"] == 2.5 and prov["status"] == "published"
    assert prov["output_version"] == (cur.resolve()).name and prov["input_rows"] == 400
    page = (cur / "_report.html").read_text()
    assert run_dir.name in page and ">2.5<" in page and "PUBLISHED as " + prov["output_version"] in page
    for f in cur.glob("*.parquet"):
        meta = json.loads(pq.read_schema(f).metadata[b"bigsmooth.provenance"])
        assert (
            meta["run_id"] == run_dir.name
            and meta["lam"] == 2.5
            and meta["output_version"] == prov["output_version"]
        )
    assert res.stdout.splitlines()[0] == "PUBLISHED as " + prov["output_version"]
    # the full cautions are printed once on the page
    assert page.count("no proof of legal compliance") == 2  # the one-line caution and the full list


def test_gates_that_are_off_say_off_and_a_held_run_says_held(tmp_path):
    cfg = _write_case(tmp_path, _small_table(400, seed=12))
    res = cli("run", str(cfg))
    assert res.returncode == 0
    assert (
        "gate min_neighbour_consistency: off" in res.stdout
        and "gates: the one gate that is on passed (4 off)" in res.stdout
    )
    assert "passed (neighbour consistency" not in res.stdout
    text = cfg.read_text() + "\n[gates]\nmax_decision_change_rate = 0.0001\n"
    cfg.write_text(text)
    res = cli("run", str(cfg))
    assert res.returncode == 3
    runs = [p for p in (tmp_path / "runs").iterdir() if (p / "audit" / "audit.json").exists()]
    held = [json.loads((p / "audit" / "audit.json").read_text())["provenance"] for p in runs]
    held = [p for p in held if p["status"] == "held"]
    assert (
        held and held[0]["failed_gates"] == ["max_decision_change_rate"] and held[0]["output_version"] is None
    )
    page = (tmp_path / "runs" / held[0]["run_id"] / "audit" / "report.html").read_text()
    assert "HELD: gate(s) max_decision_change_rate failed" in page


def test_a_smoothing_that_changes_nothing_is_warned_about(tmp_path):
    cfg = _write_case(tmp_path, _small_table(400, seed=13))
    cfg.write_text(cfg.read_text().replace("lam = 1.0", "lam = 0.0"))
    res = cli("run", str(cfg))
    assert res.returncode == 0, res.stderr[-2000:]
    assert "warning: the smoothing changed almost nothing: 0 decisions changed" in res.stdout


def test_the_selection_ratio_gate_holds_a_run_whose_group_ratio_falls(tmp_path):
    # a group's four-fifths ratio (29 CFR 1607.4(D)) computed by hand from the published Parquet must
    # match the audit, and a zero-tolerance gate fails exactly when some group's ratio fell
    cfg = _write_case(tmp_path, _small_table(800, seed=14))
    cfg.write_text(cfg.read_text() + '\n[gates]\nmax_selection_ratio_drop = 0.0\non_fail = "publish"\n')
    res = cli("run", str(cfg))
    a = _audit(tmp_path)
    drops = [
        r["ratio_drop"]
        for g in a["groups"].values()
        for r in g["ratio_change"]
        if r["ratio_drop"] is not None
    ]
    fell = any(d > 0 for d in drops)
    assert res.returncode == (3 if fell else 0)
    gate = [g for g in a["gates"] if g["gate"] == "max_selection_ratio_drop"][0]
    assert gate["state"] == ("failed" if fell else "passed")
    # a fall is also a warning; a group that fell below 0.8 is named as such
    for g in a["groups"].values():
        for r in g["ratio_change"]:
            if r["ratio_drop"] is not None and r["ratio_drop"] > 0.001:
                assert any(f"= {r['group']}" in w and "fell" in w for w in a["warnings"]), (r, a["warnings"])


def test_a_group_whose_selection_ratio_falls_is_warned_about_and_fails_the_gate(tmp_path):
    # group Z lives alone on an outer ring of the feature plane (a region no linear projection
    # removes) and keeps its scores; groups A and X share the inner disk, X's raw scores carry a
    # +0.15 boost that smoothing over the shared neighbourhoods takes away. X's selection rate over
    # Z's (the four-fifths ratio, 29 CFR 1607.4(D)) therefore falls: a warning, and a failed gate
    rng = np.random.default_rng(9)
    n = 3000
    ang, rad = rng.uniform(0, 2 * np.pi, n), np.sqrt(rng.uniform(0, 1, n))
    group = np.where(rad > 0.8, "Z", rng.choice(["A", "X"], n))
    x = np.column_stack([rad * np.cos(ang), rad * np.sin(ang), 0.3 * rng.normal(size=(n, 2))])
    score = np.clip(0.5 + 0.1 * rng.normal(size=n) + 0.25 * (group == "Z") + 0.15 * (group == "X"), 0, 1)
    res = _run(
        tmp_path,
        {
            "id": np.arange(n),
            "score": score,
            **{f"x{j + 1}": x[:, j] for j in range(4)},
            "group": group,
            "label": (rng.random(n) < score).astype(np.int8),
        },
        extra='[gates]\nmax_auc_drop = 1.0\nmax_selection_ratio_drop = 0.02\non_fail = "publish"\n',
        features=("x1", "x2", "x3", "x4"),
    )
    assert res.returncode == 3, res.stderr[-2000:]
    a = _audit(tmp_path)
    x_row = [r for r in a["groups"]["group"]["ratio_change"] if r["group"] == "X"][0]
    assert x_row["ratio_drop"] > 0.02, x_row
    assert any("group = X" in w and "fell" in w for w in a["warnings"]), a["warnings"]
    gate = [g for g in a["gates"] if g["gate"] == "max_selection_ratio_drop"][0]
    assert gate["state"] == "failed" and "(group = X)" in gate["line"]
