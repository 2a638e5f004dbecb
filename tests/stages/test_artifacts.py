"""The artifact catalogue is the only place that spells a run directory's file names, and every
artifact the job writes is declared in it."""

import os
import re

from bigsmooth import artifacts
from helpers import ROOT, _small_table, _write_case, cli


def _sources():
    for root, _, files in os.walk(os.path.join(ROOT, "bigsmooth")):
        for f in files:
            if f.endswith(".py"):
                yield os.path.join(root, f)


def test_no_artifact_file_name_outside_the_catalogue():
    # file names (with their endings), the CSR members as files, and the folders of dir artifacts
    # except "work", a word the benchmark also uses for its own scratch folder
    names = {os.path.basename(a.rel) for a in artifacts.CATALOGUE.values() if a.kind not in ("csr", "dir")}
    names |= {f"{m}.npy" for m in artifacts.CSR_PARTS}
    names |= {os.path.basename(a.rel) for a in artifacts.CATALOGUE.values() if a.kind == "dir"} - {"work"}
    names |= {
        artifacts.MANIFEST,
        artifacts.LOCK,
        artifacts.OUTPUT_AUDIT,
        artifacts.OUTPUT_REPORT,
        artifacts.OUTPUT_POINTER,
        artifacts.DEMO_RECORD,
    }
    hits = []
    for path in _sources():
        if path.endswith(os.path.join("bigsmooth", "artifacts.py")):
            continue
        text = open(path, encoding="utf-8").read()
        for name in names:
            if re.search(r"""["']""" + re.escape(name) + r"""["']""", text):
                hits.append(f"{os.path.relpath(path, ROOT)}: {name}")
    assert not hits, hits


def test_every_file_a_run_writes_is_declared(demo_run):
    (run_dir,) = list((demo_run[0] / "runs").iterdir())
    declared = set()
    for a in artifacts.CATALOGUE.values():
        if a.kind == "csr":
            declared |= {os.path.join(a.rel, f"{m}.npy") for m in artifacts.CSR_PARTS}
        else:
            declared.add(a.rel)
    undeclared = []
    for root, _, files in os.walk(run_dir):
        for f in files:
            rel = os.path.relpath(os.path.join(root, f), run_dir)
            if rel in (artifacts.MANIFEST, artifacts.LOCK):
                continue
            if rel not in declared and not any(
                rel.startswith(a.rel + os.sep) for a in artifacts.CATALOGUE.values() if a.kind == "dir"
            ):
                undeclared.append(rel)
    assert not undeclared, undeclared


def test_stage_declarations_match_the_catalogue():
    # every artifact a stage declares exists in the catalogue and is owned by that stage; every
    # artifact a stage reads is written by an earlier stage; the stages are the run directory's
    from bigsmooth.rundir import STAGES
    from bigsmooth.stages import base

    assert tuple(s.name for s in base.SPECS) == STAGES
    written = set()
    for spec in base.SPECS:
        assert set(spec.reads) <= written, (spec.name, set(spec.reads) - written)
        for key in spec.writes:
            assert artifacts.CATALOGUE[key].stage == spec.name, key
        written |= set(spec.writes)
        assert callable(spec.module().run)


def test_a_stage_whose_outputs_are_gone_is_done_again(tmp_path):
    import shutil

    cfg = _write_case(tmp_path, _small_table(300, seed=42), "\n[gates]\nmax_auc_drop = 1.0\n")
    assert cli("run", str(cfg)).returncode == 0
    (run_dir,) = list((tmp_path / "runs").iterdir())
    os.unlink(run_dir / "graph" / "distances.npy")
    shutil.rmtree(tmp_path / "out")
    res = cli("run", str(cfg))
    assert res.returncode == 0, res.stderr[-2000:]
    assert "stage graph is marked done but graph.distances are missing; doing it again" in res.stderr
    assert (run_dir / "graph" / "distances.npy").exists()
