"""Tonight against last night: the demo's second night (bigsmooth demo --next-night), the audit's
comparison with the version published before, and bigsmooth diff, against a comparison written
with numpy from the two versions' Parquet files."""

import json

import numpy as np
import pyarrow.dataset as ds
import pytest

from bigsmooth.errors import EXIT_GATE, EXIT_NOINPUT, EXIT_OK
from helpers import cli


@pytest.fixture(scope="module")
def two_nights(tmp_path_factory):
    base = tmp_path_factory.mktemp("nights")
    res = cli("-q", "demo", "--rows", "3000", "--dir", str(base))
    assert res.returncode == EXIT_OK, res.stderr
    res = cli("-q", "demo", "--next-night", "--dir", str(base))
    assert res.returncode == EXIT_OK, res.stderr
    versions = sorted(p.name for p in (base / "output").iterdir() if p.name.startswith("20"))
    assert len(versions) == 2
    return base, versions, res


def _version(base, v):
    t = ds.dataset(base / "output" / v, format="parquet", partitioning="hive").to_table()
    audit = json.loads((base / "output" / v / "_audit.json").read_text())
    s = audit["scores"]["sustain_score"]
    return (
        t.column("applicant_id").to_numpy(),
        t.column("sustain_score").to_numpy(),
        t.column("sustain_score_adjusted").to_numpy(),
        (s["before"]["cutoff"], s["after"]["cutoff"]),
    )


def _reference(base, versions):
    """The comparison with numpy: rows matched by id (np.intersect1d), each night's decisions at its
    own cutoffs."""
    ia, ya, fa, ca = _version(base, versions[0])
    ib, yb, fb, cb = _version(base, versions[1])
    both, pa_, pb_ = np.intersect1d(ia, ib, return_indices=True)
    raw = (ya[pa_] >= ca[0]) != (yb[pb_] >= cb[0])
    adj = (fa[pa_] >= ca[1]) != (fb[pb_] >= cb[1])
    same = ya[pa_] == yb[pb_]
    d = np.abs(fb[pb_] - fa[pa_])
    return {
        "rows_added": len(ib) - len(both),
        "rows_removed": len(ia) - len(both),
        "rows_in_both": len(both),
        "rows_rescored": int((~same).sum()),
        "raw_flips": int(raw.sum()),
        "adjusted_flips": int(adj.sum()),
        "flips_explained_by_raw": int((adj & raw).sum()),
        "flips_added_by_smoothing": int((adj & ~raw).sum()),
        "raw_flips_absorbed": int((raw & ~adj).sum()),
        "flips_with_unchanged_raw": int((adj & same).sum()),
        "median_abs": float(np.median(d)),
        "max_abs": float(d.max()),
    }


def _check(rec, ref):
    for k, v in ref.items():
        if k == "median_abs":
            assert rec["adjusted_change"]["quantiles_abs"]["0.5"] == pytest.approx(v, rel=1e-9)
        elif k == "max_abs":
            assert rec["adjusted_change"]["quantiles_abs"]["1.0"] == pytest.approx(v, rel=1e-12)
        else:
            assert rec[k] == v, k


def test_second_night_audit_compares_with_the_first(two_nights):
    base, versions, res = two_nights
    ref = _reference(base, versions)
    # the demo's second night: 2% leave, 2% arrive, 10% re-scored (bigsmooth.demo.NEXT_NIGHT)
    assert 20 <= ref["rows_added"] <= 100 and 20 <= ref["rows_removed"] <= 100 and ref["rows_rescored"] > 150
    audit = json.loads((base / "output" / versions[1] / "_audit.json").read_text())
    rec = audit["night_over_night"]
    assert rec["last_version"] == versions[0]
    _check(rec, ref)
    first = json.loads((base / "output" / versions[0] / "_audit.json").read_text())
    assert first["night_over_night"] is None
    page = (base / "output" / versions[1] / "_report.html").read_text()
    assert "Tonight against last night" in page
    # more adjusted than raw flips with the space fitted tonight: the page says so and names the setting
    hint = 'The fair space was fitted tonight: <code>embed.fair_space = "previous"</code>'
    assert (hint in page) == (ref["adjusted_flips"] > ref["raw_flips"])
    assert ("<code>solve.stability</code> (off tonight)" in page) == (
        ref["adjusted_flips"] > ref["raw_flips"]
    )
    # and so does the run's summary
    said = 'embed.fair_space = "previous" and solve.stability (off tonight) make them flip less'
    assert (said in res.stdout) == (ref["adjusted_flips"] > ref["raw_flips"])


def test_diff_command_matches_numpy(two_nights, tmp_path):
    base, versions, _ = two_nights
    ref = _reference(base, versions)
    res = cli("diff", str(base / "output"), versions[0], "current", "--json")
    assert res.returncode == EXIT_OK, res.stderr
    _check(json.loads(res.stdout), ref)
    res = cli("diff", str(base / "output"), versions[0], versions[1])
    assert res.returncode == EXIT_OK and "decisions flipped" in res.stdout
    res = cli("diff", str(base / "output"), "20990101T000000Z-nothere", versions[1])
    assert res.returncode == EXIT_NOINPUT and versions[0] in res.stderr


def test_the_night_flip_gate(two_nights):
    from bigsmooth.stages import audit as audit_stage

    base, versions, _ = two_nights
    ref = _reference(base, versions)
    rows = ref["rows_in_both"]
    extra = (ref["adjusted_flips"] - ref["raw_flips"]) / rows
    assert extra > 0  # the demo's second night with the default settings (measured: 75 against 21)
    first = json.loads((base / "output" / versions[0] / "_audit.json").read_text())
    gate = {g["gate"]: g for g in first["gates"]}["max_added_night_flips"]
    assert gate["state"] == "off" and "no earlier night" in gate["line"]
    second = json.loads((base / "output" / versions[1] / "_audit.json").read_text())
    gate = {g["gate"]: g for g in second["gates"]}["max_added_night_flips"]
    assert gate["state"] == "off" and f"({100 * extra:+.2f} points) (gate off)" in gate["line"]
    # the same audit against a limit above and below the measured excess
    limits = {k: 1.0 for k in ("max_auc_drop", "max_decision_change_rate", "max_selection_ratio_drop")}
    limits["min_neighbour_consistency"] = 0.0
    for lim, state in ((extra + 1e-4, "passed"), (extra - 1e-4, "failed")):
        got = audit_stage.check_gates(second, limits | {"max_added_night_flips": lim})
        assert {g["gate"]: g["state"] for g in got}["max_added_night_flips"] == state
    # through the CLI: held, nothing published, and the line says what makes decisions flip less
    res = cli("--set", f"gates.max_added_night_flips={extra / 2}", "run", str(base / "bigsmooth.toml"))
    assert res.returncode == EXIT_GATE, res.stderr[-2000:]
    assert 'embed.fair_space = "previous" and solve.stability make them flip less' in res.stderr
    assert json.loads((base / "output" / "CURRENT").read_text())["version"] == versions[1]
