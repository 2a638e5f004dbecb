"""Gates, tuning and the HTML report, through the command line on small demo tables."""

import json
import os
from html.parser import HTMLParser

import numpy as np
import pyarrow as pa

from bigsmooth.errors import EXIT_GATE
from bigsmooth.tune import recommend
from helpers import _small_table, _write_case, cli, read_output


def test_recommend_picks_best_consistency_within_budget():
    path = [
        {"lam": 0.1, "auc_drop": 0.001, "consistency": 0.90},
        {"lam": 1, "auc_drop": 0.008, "consistency": 0.95},
        {"lam": 10, "auc_drop": 0.03, "consistency": 0.99},
    ]
    assert recommend(path, 0.01) == 1
    assert recommend(path, 0.0001) is None


def test_a_failed_gate_holds_the_output_back(tmp_path):
    cfg = _write_case(tmp_path, _small_table(800, seed=2))
    assert cli("run", str(cfg)).returncode == 0
    night1 = os.readlink(tmp_path / "out" / "current")
    strict = (
        cfg.read_text().replace("lam = 1.0", "lam = 3.0") + "\n[gates]\nmin_neighbour_consistency = 0.9999\n"
    )
    cfg.write_text(strict)
    res = cli("run", str(cfg))
    assert res.returncode == EXIT_GATE, res.stderr[-2000:]
    assert "1 audit gate(s) failed" in res.stderr and "neighbour consistency after" in res.stderr
    assert "nothing was published" in res.stderr
    assert os.readlink(tmp_path / "out" / "current") == night1
    again = cli("run", str(cfg))  # still held: the same answer, nothing published
    assert again.returncode == EXIT_GATE and os.readlink(tmp_path / "out" / "current") == night1
    cfg.write_text(
        strict.replace(
            "min_neighbour_consistency = 0.9999", 'min_neighbour_consistency = 0.9999\non_fail = "publish"'
        )
    )
    res = cli("run", str(cfg))
    assert res.returncode == EXIT_GATE and "published anyway" in res.stderr
    assert os.readlink(tmp_path / "out" / "current") != night1


class _Sections(HTMLParser):
    def __init__(self):
        super().__init__()
        self.ids, self.imgs = [], []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "section":
            self.ids.append(a.get("id"))
        if tag == "img":
            self.imgs.append(a.get("src", ""))


def test_tune_then_run_shows_the_trade_off_in_the_report(tmp_path):
    cfg = _write_case(tmp_path, _small_table(1500, seed=5))
    res = cli("tune", str(cfg), "--lams", "0.3,1,3", "--holdout", "0.3")
    assert res.returncode == 0, res.stderr[-2000:]
    assert "recommended lam" in res.stdout and "holdout AUC" in res.stdout
    (run_dir,) = list((tmp_path / "runs").iterdir())
    t = json.loads((run_dir / "tune" / "tune.json").read_text())
    assert [r["lam"] for r in t["path"]] == [0.3, 1.0, 3.0]
    # stronger smoothing, more consistent decisions (on this table), fewer sweeps thanks to warm starts
    cons = [r["consistency"] for r in t["path"]]
    assert cons[-1] > t["raw"]["consistency"]
    assert t["holdout_rows"] > 0 and t["tuning_rows"] > t["holdout_rows"]
    assert (run_dir / "tune" / "tradeoff.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert not (tmp_path / "out" / "current").exists()  # tuning publishes nothing
    res = cli("run", str(cfg))
    assert res.returncode == 0, res.stderr[-2000:]
    page = (tmp_path / "out" / "current" / "_report.html").read_text()
    p = _Sections()
    p.feed(page)
    assert p.ids == [
        "provenance",
        "howto",
        "summary",
        "figures",
        "groups",
        "leakage",
        "distributions",
        "changes",
        "solver",
        "tuning",
        "cautions",
    ]
    # a distribution plot for each of the two protected attributes, the changes, the trade-off
    assert len(p.imgs) == 4 and all(s.startswith("data:image/png;base64,") for s in p.imgs)
    assert "http://" not in page and "https://" not in page  # opens offline
    assert "no proof of legal compliance" in page and "29 CFR 1607.4(D)" in page
    assert f"Applied lam 1; recommended lam {t['recommended']:g}" in page


def test_multiclass_scores_stay_on_the_simplex(tmp_path):
    # three class scores per row summing to 1: (I + lam L) f = y keeps row sums (L 1 = 0) and signs
    # (the inverse of an M-matrix is non-negative), so rows stay on the simplex up to the tolerance
    cols = _small_table(900, seed=6)
    rng = np.random.default_rng(0)
    raw = rng.dirichlet([2, 2, 2], size=900)
    for j, name in enumerate(("p_low", "p_mid", "p_high")):
        cols[name] = pa.array(raw[:, j])
    cfg = _write_case(tmp_path, cols)
    cfg.write_text(
        cfg.read_text()
        .replace('scores = ["sustain_score"]', 'scores = ["p_low", "p_mid", "p_high"]')
        .replace("tol = 1e-6", "tol = 1e-10")
    )
    res = cli("run", str(cfg))
    assert res.returncode == 0, res.stderr[-2000:]
    out = read_output(tmp_path / "out")
    F = np.column_stack([out.column(f"{c}_adjusted").to_numpy() for c in ("p_low", "p_mid", "p_high")])
    assert np.allclose(F.sum(axis=1), 1.0, atol=1e-7) and F.min() >= 0
    a = json.loads((tmp_path / "out" / "current" / "_audit.json").read_text())
    assert set(a["scores"]) == {"p_low", "p_mid", "p_high"}
    am = a["argmax"]
    assert (
        0 <= am["changed_rate"] <= 1
        and am["neighbour_consistency"]["after"] >= am["neighbour_consistency"]["before"]
    )


def test_report_renders_in_headless_chromium(tmp_path):
    # renders the page in Debian's Chromium when it is installed (DEVELOPERS.md: optional); the
    # screenshot must come out, and the page must not try to load anything from the network
    import shutil
    import subprocess

    import pytest

    exe = shutil.which("chromium") or shutil.which("chromium-browser")
    if not exe:
        pytest.skip("chromium not installed (apt-get install chromium); see DEVELOPERS.md")
    cfg = _write_case(tmp_path, _small_table(600, seed=8))
    assert cli("run", str(cfg)).returncode == 0
    page = tmp_path / "out" / "current" / "_report.html"
    shot = tmp_path / "report.png"
    subprocess.run(
        [
            exe,
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--disable-quic",
            "--no-first-run",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            f"--user-data-dir={tmp_path / 'chromium'}",
            "--window-size=1200,3000",
            f"--screenshot={shot}",
            page.as_uri(),
        ],
        capture_output=True,
        timeout=120,
    )
    assert shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and shot.stat().st_size > 50_000


def test_a_second_score_column_is_audited_side_by_side(tmp_path):
    cols = _small_table(700, seed=9)
    rng = np.random.default_rng(1)
    cols["retrained_score"] = pa.array(
        np.clip(cols["sustain_score"].to_numpy() + rng.normal(0, 0.05, 700), 0, 1)
    )
    cfg = _write_case(tmp_path, cols, "\n[gates]\nmax_auc_drop = 1.0\n")
    cfg.write_text(
        cfg.read_text().replace(
            'label = "sustained_12m"', 'label = "sustained_12m"\ncompare_scores = ["retrained_score"]'
        )
    )
    res = cli("run", str(cfg))
    assert res.returncode == 0, res.stderr[-2000:]
    a = json.loads((tmp_path / "out" / "current" / "_audit.json").read_text())
    c = a["compare"]["retrained_score"]
    assert {"neighbour_consistency", "auc", "gap_over_sd", "decisions_differing_from_adjusted"} <= set(c)
    assert "compared: retrained_score" in (tmp_path / "out" / "current" / "_report.html").read_text()
    assert "retrained_score_adjusted" not in read_output(tmp_path / "out").column_names


def test_tune_first_lam_starts_as_the_job_does(tmp_path):
    # the first lam of the path solves the job's own system from the job's own start (the raw
    # scores scaled to the multiple closest to the solution), so it takes the job's sweeps
    cfg = _write_case(tmp_path, _small_table(1200, seed=4))
    cfg.write_text(cfg.read_text().replace("lam = 1.0", "lam = 30.0").replace("tol = 1e-6", "tol = 1e-10"))
    res = cli("tune", str(cfg), "--lams", "30")
    assert res.returncode == 0, res.stderr[-2000:]
    (run_dir,) = list((tmp_path / "runs").iterdir())
    t = json.loads((run_dir / "tune" / "tune.json").read_text())
    assert cli("run", str(cfg)).returncode == 0
    solve = json.loads((run_dir / "solve" / "solve.json").read_text())
    assert solve["method"] == "sweep-cg" and solve["lam"] == t["path"][0]["lam"] == 30.0
    assert t["path"][0]["sweeps"] == solve["sweeps"]
