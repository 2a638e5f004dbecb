"""Stage-level reuse: a run whose settings differ from an earlier run's only in later stages takes
the earlier run's outputs of the stages before (hard links), and publishes exactly what a run that
computed everything itself publishes."""

import hashlib
import json
import os

import numpy as np

from bigsmooth import config as config_mod
from bigsmooth.stages import base
from helpers import _small_table, _write_case, cli, read_output


def _digest(folder):
    h = hashlib.sha256()
    for root, dirs, files in sorted(os.walk(folder)):
        dirs.sort()
        for f in sorted(files):
            h.update(f.encode())
            h.update(open(os.path.join(root, f), "rb").read())
    return h.hexdigest()


def _manifests(runs):
    return {p: json.loads((runs / p / "manifest.json").read_text()) for p in os.listdir(runs)}


def test_every_result_changing_setting_belongs_to_a_stage():
    covered = {
        k for spec in base.SPECS for p in spec.settings for k in ([f"{s}.{k}" for s, k in base._keys(p)])
    }
    wanted = {
        f"{s}.{k}" for s, rules in config_mod.RULES.items() for k, r in rules.items() if r.affects_result
    }
    assert wanted <= covered, wanted - covered


def test_a_stage_sees_only_the_settings_its_identity_covers(tmp_path):
    """The config view a stage runs with refuses a result-changing setting of a later stage (reusing
    the stage's outputs by identity would otherwise be wrong); the whole job runs through these
    views in every CLI test, so a stage reading an undeclared setting fails there too."""
    import pytest

    cfg = config_mod.load_config(_write_case(tmp_path, _small_table(50, seed=1)))
    ctx = base.Context(None, cfg, {}, "r")
    graph = ctx.for_stage("graph")
    assert graph.cfg["graph"]["neighbours"] == cfg["graph"]["neighbours"]
    assert graph.cfg["input"]["id"] == cfg["input"]["id"]  # scan's settings come before
    assert graph.cfg["run"]["memory_mb"] == cfg["run"]["memory_mb"]  # changes no result
    with pytest.raises(base.UndeclaredSetting, match="solve.lam"):
        graph.cfg["solve"]["lam"]
    with pytest.raises(base.UndeclaredSetting, match="embed.leakage_warn_auc"):
        ctx.for_stage("embed").section("embed")["leakage_warn_auc"]
    assert ctx.for_stage("audit").cfg["output"]["path"]  # never shared: belongs to its run
    assert ctx.for_stage("order").cfg["solve"]["groups"] == cfg["solve"]["groups"]


def test_identities_follow_the_chain_of_stages(tmp_path):
    cfg = config_mod.load_config(_write_case(tmp_path, _small_table(50, seed=1)))
    a = base.identities(cfg, "h")
    lam = json.loads(json.dumps(cfg))
    lam["solve"]["lam"] = 2.0
    b = base.identities(lam, "h")
    assert [s for s in a if a[s] == b[s]] == ["scan", "embed", "graph", "order"]
    k = json.loads(json.dumps(cfg))
    k["graph"]["neighbours"] = 5
    assert all(base.identities(k, "h")[s] != a[s] for s in a)  # scan checks k against the rows
    assert all(base.identities(cfg, "other input")[s] != a[s] for s in a)
    note = json.loads(json.dumps(cfg))
    note["audit"]["report_note"] = "x"  # not a result-changing setting
    assert base.identities(note, "h") == a


def test_a_change_of_lam_reuses_scan_to_order_and_publishes_the_same_scores(tmp_path):
    cols = _small_table(1500, seed=31)
    cfg = _write_case(tmp_path, cols, "\n[gates]\nmax_auc_drop = 1.0\n")
    assert cli("run", str(cfg)).returncode == 0
    runs = tmp_path / "runs"
    (first,) = os.listdir(runs)
    before = _digest(runs / first)
    cfg.write_text(cfg.read_text().replace("lam = 1.0", "lam = 2.0"))
    res = cli("run", str(cfg))
    assert res.returncode == 0, res.stderr[-2000:]
    assert "stage graph: reusing the outputs of run " + first in res.stderr
    (second,) = [p for p in os.listdir(runs) if p != first]
    st = _manifests(runs)[second]["stages"]
    assert {s for s in st if st[s].get("reused_from") == first} == {"scan", "embed", "graph", "order"}
    assert _digest(runs / first) == before  # the earlier run is untouched
    assert (
        os.stat(runs / second / "graph" / "indptr.npy").st_ino
        == os.stat(runs / first / "graph" / "indptr.npy").st_ino
    )
    reused = read_output(tmp_path / "out").sort_by("applicant_id")
    # the same lam = 2 run, computed from nothing in another run folder and output folder
    text = (
        cfg.read_text()
        .replace('dir = "runs"', 'dir = "runs-alone"')
        .replace('path = "out"', 'path = "out-alone"')
    )
    cfg.write_text(text)
    assert cli("run", str(cfg)).returncode == 0
    alone = read_output(tmp_path / "out-alone").sort_by("applicant_id")
    for c in reused.column_names:
        assert np.array_equal(reused.column(c).to_numpy(), alone.column(c).to_numpy()), c
    res = cli("status", str(runs / second))
    assert f"(reused from run {first})" in res.stdout


def test_fresh_computes_every_stage_itself(tmp_path):
    cfg = _write_case(tmp_path, _small_table(600, seed=32), "\n[gates]\nmax_auc_drop = 1.0\n")
    assert cli("run", str(cfg)).returncode == 0
    cfg.write_text(cfg.read_text().replace("lam = 1.0", "lam = 2.0"))
    res = cli("run", "--fresh", str(cfg))
    assert res.returncode == 0 and "reusing" not in res.stderr


def test_tune_then_run_with_the_recommended_lam_does_not_rebuild_the_graph(tmp_path):
    cfg = _write_case(tmp_path, _small_table(1500, seed=33))
    res = cli("tune", str(cfg), "--lams", "2,5", "--max-auc-drop", "1.0")
    assert res.returncode == 0, res.stderr[-2000:]
    runs = tmp_path / "runs"
    (tuned,) = os.listdir(runs)
    rec = json.loads((runs / tuned / "tune" / "tune.json").read_text())["recommended"]
    assert rec in (2.0, 5.0)
    cfg.write_text(cfg.read_text().replace("lam = 1.0", f"lam = {rec}") + "\n[gates]\nmax_auc_drop = 1.0\n")
    res = cli("run", str(cfg))
    assert res.returncode == 0, res.stderr[-2000:]
    assert (
        "stage graph: reusing the outputs of run " + tuned in res.stderr
        and "stage graph done" not in res.stderr
    )


def test_a_run_directory_moved_with_its_neighbours_can_still_be_read(tmp_path):
    # the manifest keeps the config, input and output folders relative to run.dir and the input
    # files relative to the input folder: the tree mounted under another path is still readable
    import shutil

    a = tmp_path / "a"
    a.mkdir()
    cfg = _write_case(a, _small_table(300, seed=34), "\n[gates]\nmax_auc_drop = 1.0\n")
    assert cli("run", str(cfg)).returncode == 0
    m = next(iter(_manifests(a / "runs").values()))
    assert not any(os.path.isabs(v) for v in m["roots"].values())
    assert not any("path" in e for e in m["input"]["files"])
    shutil.move(str(a), str(tmp_path / "b"))
    (run_dir,) = list((tmp_path / "b" / "runs").iterdir())
    res = cli("status", str(run_dir))
    assert res.returncode == 0 and "publish   done" in res.stdout
    res = cli("report", str(run_dir))  # finds the config through the relative root
    assert res.returncode == 0, res.stderr[-2000:]
    prov = json.loads((run_dir / "audit" / "audit.json").read_text())["provenance"]
    assert prov["config_path"] == str(tmp_path / "a" / "job.toml")  # as written when it ran
    # the config, input and output moved with it: the same run, already complete (the input's
    # identity hashes file paths relative to the input folder, the settings paths relative to run.dir)
    res = cli("run", str(tmp_path / "b" / "job.toml"))
    assert res.returncode == 0, res.stderr[-2000:]
    assert f"run {run_dir.name} was already complete" in res.stdout
    assert os.listdir(tmp_path / "b" / "runs") == [run_dir.name]
