"""The artifact catalogue is the only place that spells a run directory's file names, and every
artifact the job writes is declared in it; the readers and writers of large arrays."""

import os
import re

import numpy as np
import scipy.sparse as sp
import pytest

from bigsmooth import artifacts, atomic
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


def test_npy_writer_appends_blocks_and_refuses_a_short_file(tmp_path, rng):
    """atomic.npy_writer: blocks written one after another make the same file as numpy.save; a
    writer left short raises and leaves no file (complete or absent)."""

    a = rng.normal(size=(1000, 3))
    target = tmp_path / "a.npy"
    with atomic.npy_writer(target, np.float64, a.shape) as out:
        for lo in range(0, 1000, 333):
            out.write(a[lo : lo + 333])
    np.testing.assert_array_equal(np.load(target), a)
    short = tmp_path / "short.npy"
    with pytest.raises(ValueError, match="rows written"):
        with atomic.npy_writer(short, np.float64, a.shape) as out:
            out.write(a[:10])
    assert not short.exists()
    with pytest.raises(ValueError, match="does not fit"):
        with atomic.npy_writer(short, np.float64, (5, 3)) as out:
            out.write(a[:6])
    assert not short.exists()


def test_row_reader_reads_what_numpy_reads(tmp_path, rng):
    a = rng.integers(0, 100, size=(500, 4))
    np.save(tmp_path / "a.npy", a)
    r = artifacts.RowReader(str(tmp_path / "a.npy"))
    assert r.shape == a.shape and r.dtype == a.dtype and len(r) == 500
    idx = rng.integers(0, 500, 50)
    for key in (slice(10, 90), idx, (slice(None), 2), slice(490, 600)):
        np.testing.assert_array_equal(r[key], a[key])


def test_csr_reader_holds_the_stored_matrix_and_gives_the_in_memory_edge_disagreement(tmp_path, rng):
    # a scipy CSR saved as the graph-weights artifact, read back in row blocks
    from bigsmooth.kernels import metrics

    W = sp.random(300, 300, density=0.05, random_state=np.random.RandomState(3), format="csr")
    W = (W + W.T).tocsr()
    artifacts.GRAPH_WEIGHTS.save(str(tmp_path), W)
    r = artifacts.GRAPH_WEIGHTS.rows(str(tmp_path))
    assert r.shape == W.shape and r.nnz == W.nnz
    np.testing.assert_array_equal(r.indptr, W.indptr)
    np.testing.assert_array_equal(r.indices[:], W.indices)
    np.testing.assert_array_equal(r.data[:], W.data)
    f = rng.random(300)
    D = W.toarray()  # the dense formula 2 f'Lf / sum(w) written out with numpy
    expect = (D * (f[:, None] - f[None, :]) ** 2).sum() / D.sum()
    got = metrics.edge_disagreement(r.indptr, r.indices, r.data, f, block=17)
    assert np.isclose(got, expect)


def _mapped_rss_kb(path):
    """Resident kB of this process's mappings of ``path`` (Linux /proc/self/smaps, proc(5))."""
    total, inside = 0, False
    with open("/proc/self/smaps") as fh:
        for line in fh:
            head = line.split()
            if "-" in head[0] and len(head) >= 5:  # a mapping's first line: address range ... path
                inside = line.rstrip().endswith(str(path))
            elif inside and head[0] == "Rss:":
                total += int(head[1])
    return total


@pytest.mark.skipif(not os.path.exists("/proc/self/smaps"), reason="needs Linux /proc/self/smaps")
def test_release_pages_empties_the_resident_map_and_keeps_the_contents(tmp_path, rng):
    a = rng.random(2_000_000)  # 16 MB
    np.save(tmp_path / "r.npy", a)
    m = np.load(tmp_path / "r.npy", mmap_mode="r")
    assert float(m.sum()) == float(a.sum())  # every page touched
    assert _mapped_rss_kb(tmp_path / "r.npy") > 15_000
    assert atomic.release_pages(m[10:20])  # a view finds its map
    assert _mapped_rss_kb(tmp_path / "r.npy") < 1_000
    np.testing.assert_array_equal(m, a)  # mapped again on access, unchanged
    # a written map: flushed, dropped, and what was written is in the file
    w = atomic.new_memmap(tmp_path / "w.npy", np.float64, (2_000_000,))
    w[:] = a
    assert atomic.release_pages(w)
    assert _mapped_rss_kb(tmp_path / "w.npy") < 1_000
    w[0] = -1.0
    del w
    back = np.load(tmp_path / "w.npy")
    assert back[0] == -1.0 and np.array_equal(back[1:], a[1:])
    assert not atomic.release_pages(a)  # not a memory map: nothing to do


def test_row_reader_gives_numpys_rows(tmp_path):
    # a run of rows is read at its offset, any other key through a mapping: both against numpy's
    # indexing of the array itself, for 1-3 dimensions, a Fortran-order file and an empty one
    rng = np.random.default_rng(0)
    cases = [
        rng.integers(0, 1000, size=1000),
        rng.random((500, 7)).astype(np.float32),
        rng.random((40, 3, 4)),
        np.asfortranarray(rng.random((60, 5))),
        np.empty((0, 5), dtype=np.int32),
    ]
    for i, a in enumerate(cases):
        path = str(tmp_path / f"a{i}.npy")
        np.save(path, a)
        reader = artifacts.RowReader(path)
        n = len(a)
        keys = [slice(None), slice(3, 8), slice(-5, None), slice(8, 3), slice(0, n + 10), slice(2, 9, 2)]
        keys += [np.array([0, 3, 3]) if n else np.array([], dtype=np.int64)]
        for key in keys:
            got, ref = reader[key], a[key]
            assert got.dtype == ref.dtype and got.shape == ref.shape and np.array_equal(got, ref), (i, key)
