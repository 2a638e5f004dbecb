"""solve.stability: rows whose raw scores did not change since last night are pulled towards last
night's adjusted scores, on the demo's two nights (bigsmooth demo --next-night).

References: the minimiser of ||f - y||^2 + mu sum_S (f_i - t_i)^2 + lam f'Lf, computed densely with
numpy.linalg.solve on L = scipy.sparse.csgraph.laplacian(W) of the run's saved graph; the anchored
set S and the targets t found by joining the two nights' tables with pyarrow (not through the
project's reader)."""

import json

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import scipy.sparse as sp
from scipy.sparse.csgraph import laplacian

from bigsmooth import explain
from bigsmooth.errors import EXIT_CONFIG, EXIT_OK
from bigsmooth.rundir import RunDir
from helpers import _small_table, _write_case, cli, read_output

MU = 2.0


def _runs(base):
    out = {}
    for p in (base / "runs").iterdir():
        m = json.loads((p / "manifest.json").read_text())
        out[p.name] = (m, p)
    return out


@pytest.fixture(scope="module")
def nights(tmp_path_factory):
    base = tmp_path_factory.mktemp("stability")
    first = cli("demo", "--rows", "3000", "--dir", str(base))
    assert first.returncode == EXIT_OK, first.stderr
    assert "nothing" not in first.stderr
    v1 = json.loads((base / "output" / "CURRENT").read_text())["version"]
    second = cli("--set", f"solve.stability={MU}", "demo", "--next-night", "--dir", str(base))
    assert second.returncode == EXIT_OK, second.stderr
    v2 = json.loads((base / "output" / "CURRENT").read_text())
    return base, v1, v2["version"], base / "runs" / v2["run_id"], second


def _table(folder):
    files = sorted(folder.glob("**/*.parquet"))
    return pa.concat_tables(pq.read_table(f) for f in files)


def _run_ids(run):
    """The run's ids in its row order (its manifest's input files, in order)."""
    m = json.loads((run / "manifest.json").read_text())
    root = run.parent / m["roots"]["input"]
    t = pa.concat_tables(
        pq.read_table(root / e["rel"], columns=["applicant_id"]) for e in m["input"]["files"]
    )
    return t.column("applicant_id").to_numpy()


def _graph(run):
    ptr, ind, data = (np.load(run / "graph" / f"{m}.npy") for m in ("indptr", "indices", "data"))
    n = len(ptr) - 1
    return sp.csr_matrix((data, ind, ptr), shape=(n, n))


def _check_against_reference(base, v1, run):
    """The run's adjusted scores against the dense minimiser of the anchored objective."""
    last = _table(base / "output" / v1)
    last_score = dict(zip(last.column("applicant_id").to_pylist(), last.column("sustain_score").to_pylist()))
    last_adj = dict(
        zip(last.column("applicant_id").to_pylist(), last.column("sustain_score_adjusted").to_pylist())
    )
    ids = _run_ids(run)
    y = np.load(run / "embed" / "scores.npy")[:, 0]
    anchored = np.array([i in last_score and last_score[i] == v for i, v in zip(ids.tolist(), y.tolist())])
    t = np.array([last_adj.get(i, 0.0) for i in ids.tolist()])
    # the demo re-scores 10% of those who stay and adds 2%: both kinds are left free
    assert 0.8 * len(y) < anchored.sum() < 0.95 * len(y)
    info = json.loads((run / "solve" / "solve.json").read_text())["anchor"]
    assert info["used"] and info["version"] == v1 and info["weight"] == MU
    assert info["rows_anchored"] == int(anchored.sum())
    W = _graph(run)
    solve = json.loads((run / "manifest.json").read_text())["settings"]["solve"]
    lam = solve["lam"]
    # C = I (unnormalised) or C = D, the degrees (random walk; no row is isolated here)
    deg = np.asarray(W.sum(axis=1)).ravel()
    assert deg.min() > 0
    c = np.ones(len(y)) if solve["laplacian"] == "unnormalised" else deg
    L = laplacian(W).toarray()
    A = np.diag(c + MU * c * anchored) + lam * L
    ref = np.linalg.solve(A, c * y + MU * c * anchored * t)
    F = np.load(run / "solve" / "adjusted.npy")[:, 0]
    # the solver stops at relative residual 1e-6 (solve.tol); A is well conditioned
    assert np.linalg.norm(F - ref) / np.linalg.norm(ref) < 1e-5
    # the published method without the anchor is a different answer, farther than that
    plain = np.linalg.solve(np.diag(c) + lam * L, c * y)
    assert np.linalg.norm(F - plain) / np.linalg.norm(ref) > 1e-3


def test_the_solution_is_the_minimiser_of_the_anchored_objective(nights):
    base, v1, _, run, _ = nights
    _check_against_reference(base, v1, run)


@pytest.mark.parametrize(
    "setting", ["solve.method=direct", "solve.method=blocks", "solve.laplacian=random_walk"]
)
def test_the_other_solvers_solve_the_same_anchored_system(nights, setting):
    base, v1, _, _, _ = nights
    res = cli("--set", f"solve.stability={MU}", "--set", setting, "run", str(base / "bigsmooth.toml"))
    assert res.returncode == EXIT_OK, res.stderr
    cur = json.loads((base / "output" / "CURRENT").read_text())
    _check_against_reference(base, v1, base / "runs" / cur["run_id"])


def test_explain_adds_last_nights_share_up_to_the_adjusted_score(nights):
    _, v1, _, run, _ = nights
    rows = np.load(run / "solve" / "last-night" / "rows.npy")
    free = np.setdiff1d(np.arange(len(np.load(run / "solve" / "adjusted.npy"))), rows)
    m = json.loads((run / "manifest.json").read_text())
    lam, kind = m["settings"]["solve"]["lam"], m["settings"]["solve"]["laplacian"]
    for row in (int(rows[7]), int(free[3])):
        rec = explain.breakdown(RunDir(str(run)), row, lam, kind)
        total = rec["own_share"][0] + rec["neighbours_share"][0] + rec["anchor_share"][0]
        assert abs(total - rec["adjusted"][0]) < 1e-5
        if row in rows:
            assert rec["anchor"]["version"] == v1 and rec["anchor_share"][0] > 0
        else:
            assert rec["anchor"] is None and rec["anchor_share"][0] == 0


def test_a_second_run_on_tonights_table_anchors_to_last_night_again(nights):
    # another lam tonight: the current version is tonight's own, so last night is the version that
    # run took as last night (for the anchor and for the audit's comparison)
    base, v1, v2, _, _ = nights
    res = cli("--set", f"solve.stability={MU}", "--set", "solve.lam=2", "run", str(base / "bigsmooth.toml"))
    assert res.returncode == EXIT_OK, res.stderr
    cur = json.loads((base / "output" / "CURRENT").read_text())
    assert cur["version"] != v2
    run = base / "runs" / cur["run_id"]
    assert json.loads((run / "solve" / "solve.json").read_text())["anchor"]["version"] == v1
    audit = json.loads((base / "output" / cur["version"] / "_audit.json").read_text())
    assert audit["night_over_night"]["last_version"] == v1
    assert audit["provenance"]["stability"]["version"] == v1
    assert f"anchoring to the version it took as last night, {v1}" in res.stderr


def test_nothing_published_anchors_nothing_and_says_so(tmp_path):
    res = cli("--set", "solve.stability=1", "demo", "--rows", "2000", "--dir", str(tmp_path))
    assert res.returncode == EXIT_OK, res.stderr
    assert "solve.stability = 1: nothing published yet" in res.stderr
    (run,) = (tmp_path / "runs").iterdir()
    info = json.loads((run / "solve" / "solve.json").read_text())["anchor"]
    assert info == {"used": False, "weight": 1.0, "reason": "nothing published yet"}


def test_a_negative_weight_is_a_config_error(tmp_path):
    res = cli("--set", "solve.stability=-1", "demo", "--rows", "2000", "--dir", str(tmp_path))
    assert res.returncode == EXIT_CONFIG, res.stderr
    assert "solve.stability" in res.stderr


def test_killed_mid_solve_then_resumed_is_bit_identical(tmp_path):
    # the anchor is saved before the first sweep, so a resumed run solves the same system (and
    # reaches the bits of an uninterrupted run, as every resumed solve does)
    import shutil
    import signal

    first = tmp_path / "a"
    assert cli("demo", "--rows", "2000", "--dir", str(first)).returncode == EXIT_OK
    second = tmp_path / "b"
    shutil.copytree(first, second, symlinks=True)
    stab = ("--set", f"solve.stability={MU}")
    killed = cli(*stab, "demo", "--next-night", "--dir", str(first), env={"BIGSMOOTH_FAULT": "solve:sweep:3"})
    assert killed.returncode == -signal.SIGKILL, killed.stderr[-2000:]
    resumed = cli(*stab, "run", str(first / "bigsmooth.toml"))
    assert resumed.returncode == EXIT_OK, resumed.stderr[-2000:]
    assert "resuming the solver from the checkpoint" in resumed.stderr
    whole = cli(*stab, "demo", "--next-night", "--dir", str(second))
    assert whole.returncode == EXIT_OK, whole.stderr[-2000:]
    runs = []
    for base in (first, second):
        cur = json.loads((base / "output" / "CURRENT").read_text())
        runs.append(base / "runs" / cur["run_id"])
    info = [json.loads((r / "solve" / "solve.json").read_text())["anchor"] for r in runs]
    assert info[0]["used"] and info[0]["rows_anchored"] == info[1]["rows_anchored"]
    a, b = (np.load(r / "solve" / "adjusted.npy") for r in runs)
    assert a.tobytes() == b.tobytes()


def test_class_scores_stay_on_the_simplex_with_an_anchor(tmp_path):
    # three class scores per row summing to 1, last night's adjusted ones too: with f = 1 in every
    # row, (C + mu C_S + lam L) 1 = C 1 + mu C_S 1 (L 1 = 0), so rows keep summing to 1; a row is
    # anchored only when all three of its scores are unchanged
    cols = _small_table(900, seed=6)
    raw = np.random.default_rng(0).dirichlet([2, 2, 2], size=900)
    names = ("p_low", "p_mid", "p_high")
    for j, name in enumerate(names):
        cols[name] = pa.array(raw[:, j])
    cfg = _write_case(tmp_path, cols)
    cfg.write_text(
        cfg.read_text()
        .replace('scores = ["sustain_score"]', f"scores = {list(names)}".replace("'", '"'))
        .replace("tol = 1e-6", f"tol = 1e-10\nstability = {MU}")
    )
    assert cli("run", str(cfg)).returncode == EXIT_OK
    picked = np.random.default_rng(1).choice(900, 110, replace=False)
    moved, swapped = picked[:100], picked[100:]
    raw[moved] = np.random.default_rng(2).dirichlet([2, 2, 2], size=100)
    raw[swapped, 1:] = raw[swapped, 1:][:, ::-1]  # p_low unchanged, the other two swapped
    for j, name in enumerate(names):
        cols[name] = pa.array(raw[:, j])
    pq.write_table(pa.table(cols), tmp_path / "in" / "part-0.parquet")
    res = cli("run", str(cfg))
    assert res.returncode == EXIT_OK, res.stderr[-2000:]
    cur = json.loads((tmp_path / "out" / "CURRENT").read_text())
    info = json.loads((tmp_path / "runs" / cur["run_id"] / "solve" / "solve.json").read_text())["anchor"]
    assert info["rows_anchored"] == 790 and info["rows_rescored"] == 110 and info["rows_new"] == 0
    out = read_output(tmp_path / "out")
    F = np.column_stack([out.column(f"{c}_adjusted").to_numpy() for c in names])
    assert np.allclose(F.sum(axis=1), 1.0, atol=1e-7) and F.min() >= 0


def test_status_names_the_anchor(nights):
    base, v1, _, run, _ = nights
    res = cli("status", str(run), "--json")
    assert res.returncode == EXIT_OK, res.stderr
    anchor = json.loads(res.stdout)["solver"]["anchor"]
    assert anchor["used"] and anchor["version"] == v1
    res = cli("status", str(run))
    assert f"rows anchored to version {v1}" in res.stdout
