"""Audit metrics against scikit-learn, and the fair space against a direct numpy computation."""

import numpy as np
import pytest
import scipy.sparse as sp
from sklearn.metrics import accuracy_score, roc_auc_score

from bigsmooth.kernels import fairspace, metrics
from conftest import random_graph


def test_auc_matches_sklearn_with_ties(rng):
    y = rng.integers(0, 2, 500)
    s = np.round(rng.random(500) + 0.3 * y, 1)  # rounding makes many ties
    assert metrics.roc_auc(y, s) == np.float64(roc_auc_score(y, s))  # sklearn.metrics.roc_auc_score


def test_average_ranks_match_scipy_rankdata(rng):
    from scipy.stats import rankdata  # the reference: scipy's "average" method

    for x in (np.round(rng.normal(size=400), 1), rng.integers(0, 3, 50), np.array([2.0]), np.zeros(0)):
        assert np.array_equal(metrics.average_ranks(x), rankdata(x))


def test_accuracy_matches_sklearn(rng):
    y = rng.integers(0, 2, 300)
    d = rng.integers(0, 2, 300)
    assert metrics.accuracy(y, d) == accuracy_score(y, d)  # sklearn.metrics.accuracy_score


def test_quantile_cutoff_selects_the_rate(rng):
    s = rng.random(1000)
    cut = metrics.quantile_cutoff(s, 0.3)
    assert (s >= cut).sum() == 300


def test_edge_disagreement_matches_dense_formula(rng):
    W = random_graph(80, 0.1, rng)
    f = rng.random(80)
    D = W.toarray()
    expect = (D * (f[:, None] - f[None, :]) ** 2).sum() / D.sum()
    assert np.isclose(metrics.edge_disagreement(W.indptr, W.indices, W.data, f), expect)
    # rows taken in blocks (bounded memory) give the same figure
    assert np.isclose(metrics.edge_disagreement(W.indptr, W.indices, W.data, f, block=7), expect)


def test_four_fifths_flag():
    # 29 CFR 1607.4(D): a selection rate below four-fifths (80%) of the highest group's rate
    codes = np.array([0] * 100 + [1] * 100)
    selected = np.r_[np.ones(50), np.zeros(50), np.ones(39), np.zeros(61)].astype(bool)
    rows = metrics.group_table(codes, ["a", "b"], np.zeros(200), selected, 10)
    assert rows[1]["ratio_to_highest"] == 0.78 and rows[1]["below_four_fifths"]
    assert not rows[0]["below_four_fifths"]


def _stream_moments(X, S, batches):
    mom = None
    for part in np.array_split(np.arange(len(X)), batches):
        if mom is None:
            mom = fairspace.Moments.empty(X[part].mean(axis=0), S.shape[1])
        mom.update(X[part], sp.csr_matrix(S[part]))
    return mom


def test_streamed_moments_match_numpy_covariance(rng):
    X = rng.normal(loc=[1e4, 3, -2], scale=[50, 1, 0.1], size=(5000, 3))
    S = np.eye(3)[rng.integers(0, 3, 5000)]
    mom = _stream_moments(X, S, 7)
    n = mom.n
    mean = mom.shift + mom.sx / n
    cov = mom.sxx / n - np.outer(mom.sx / n, mom.sx / n)
    np.testing.assert_allclose(mean, X.mean(axis=0), rtol=1e-12)
    np.testing.assert_allclose(cov, np.cov(X.T, bias=True), rtol=1e-9)  # numpy.cov reference


def test_moments_of_files_added_in_order_match_numpy_covariance(rng):
    """The embed stage takes each file's moments with one shift and adds them in file order."""
    X = rng.normal(loc=[1e4, 3, -2], scale=[50, 1, 0.1], size=(5000, 3))
    S = np.eye(3)[rng.integers(0, 3, 5000)]
    shift = X[:100].mean(axis=0)
    total = fairspace.Moments.empty(shift, 3)
    for part in np.array_split(np.arange(len(X)), 4):
        m = fairspace.Moments.empty(shift, 3)
        m.update(X[part], sp.csr_matrix(S[part]))
        total.add(m)
    n = total.n
    cov = total.sxx / n - np.outer(total.sx / n, total.sx / n)
    np.testing.assert_allclose(total.shift + total.sx / n, X.mean(axis=0), rtol=1e-12)
    np.testing.assert_allclose(cov, np.cov(X.T, bias=True), rtol=1e-9)  # numpy.cov reference
    np.testing.assert_allclose(total.sxs, (X - shift).T @ S, rtol=1e-12)
    with pytest.raises(ValueError, match="different shifts"):
        total.add(fairspace.Moments.empty(shift + 1.0, 3))


def test_fair_space_leaves_no_linear_correlation_with_protected(rng):
    n = 4000
    g = rng.integers(0, 3, n)
    X = rng.normal(size=(n, 5))
    X[:, 0] += 1.5 * g  # a proxy of the protected attribute
    X[:, 3] += 0.8 * (g == 1)
    S = np.eye(3)[g]
    fs = fairspace.fit_fair_space(_stream_moments(X, S, 3))
    E = fs.apply(X)
    assert fs.removed == 2  # 3 levels -> 2 independent contrasts
    # the cross-covariance of every embedding dimension with every level indicator vanishes
    cross = (E - E.mean(axis=0)).T @ (S - S.mean(axis=0)) / n
    assert np.abs(cross).max() < 1e-10
    # without removal the proxy is plainly visible
    fs0 = fairspace.fit_fair_space(_stream_moments(X, S, 3), remove_sensitive=False)
    E0 = fs0.apply(X)
    assert np.abs((E0 - E0.mean(axis=0)).T @ (S - S.mean(axis=0)) / n).max() > 0.1


def test_fair_space_distance_is_mahalanobis(rng):
    # Euclidean distance in the fair space equals the Mahalanobis-type distance sqrt(dx' M dx) with
    # M = D T T' D (D = diag(scale)), checked directly on pairs.
    X = rng.normal(size=(300, 4))
    S = np.eye(2)[rng.integers(0, 2, 300)]
    fs = fairspace.fit_fair_space(_stream_moments(X, S, 2), weights=np.array([1, 2, 1, 0.5]))
    E = fs.apply(X)
    M = np.diag(fs.scale) @ fs.transform @ fs.transform.T @ np.diag(fs.scale)
    dx = X[:50] - X[50:100]
    np.testing.assert_allclose(
        np.linalg.norm(E[:50] - E[50:100], axis=1), np.sqrt(np.einsum("ij,jk,ik->i", dx, M, dx)), rtol=1e-9
    )


def test_constant_feature_is_ignored(rng):
    X = np.column_stack([rng.normal(size=200), np.full(200, 7.0)])
    S = np.eye(2)[rng.integers(0, 2, 200)]
    fs = fairspace.fit_fair_space(_stream_moments(X, S, 2))
    assert fs.constant.tolist() == [False, True]
    assert np.all(np.isfinite(fs.apply(X)))


def test_linear_probe_auc_detects_leak(rng):
    t = rng.integers(0, 2, 2000)
    E = np.column_stack([t + rng.normal(scale=0.5, size=2000), rng.normal(size=2000)])
    assert fairspace.linear_probe_auc(E, t, np.random.default_rng(0), metrics.roc_auc) > 0.9
    assert (
        abs(fairspace.linear_probe_auc(E[:, 1:], t, np.random.default_rng(0), metrics.roc_auc) - 0.5) < 0.06
    )


def test_balanced_accuracy_brier_log_loss_match_sklearn(rng):
    # sklearn.metrics.balanced_accuracy_score, brier_score_loss, log_loss
    from sklearn.metrics import balanced_accuracy_score, brier_score_loss, log_loss

    y = rng.integers(0, 2, 400)
    p = np.clip(rng.random(400) * 0.8 + 0.2 * y, 0, 1)
    d = p > 0.5
    assert np.isclose(metrics.balanced_accuracy(y, d), balanced_accuracy_score(y, d))
    assert np.isclose(metrics.brier(y, p), brier_score_loss(y, p))
    assert np.isclose(metrics.log_loss(y, p), log_loss(y, p))


def test_consistency_matches_the_textbook_loop(rng):
    # consistency = 1 - (1/n) sum_i |d_i - (1/k) sum_{j in kNN(i)} d_j|, written as a plain loop
    # over sklearn's exact neighbours
    from sklearn.neighbors import NearestNeighbors

    X = rng.normal(size=(300, 3))
    d = (X[:, 0] + 0.3 * rng.normal(size=300) > 0).astype(float)
    nb = NearestNeighbors(n_neighbors=6).fit(X).kneighbors(X, return_distance=False)[:, 1:]
    expect = 1 - sum(abs(d[i] - sum(d[j] for j in nb[i]) / 5) for i in range(300)) / 300
    assert np.isclose(metrics.consistency(d, nb), expect)


def test_lipschitz_and_same_group_share():
    f = np.array([0.0, 0.5, 0.6, 1.0])
    a, b = np.array([0, 1, 2]), np.array([1, 2, 3])
    # |diffs| = 0.5, 0.1, 0.4 against 1.0 * [0.4, 0.2, 0.5]: only the first exceeds
    counts = metrics.pair_differences(f[a], f[b], np.array([0.4, 0.2, 0.5]), 1.0)
    assert metrics.lipschitz_summary(counts)["rate"] == 1 / 3
    codes = np.array([0, 0, 1, 1])
    same, mix = metrics.same_group_share(codes, np.array([[1], [0], [0], [2]]))
    assert same == 0.75 and mix == 0.5


def test_random_graph_control_matches_an_explicit_solve(rng):
    # the matrix-free random graph against its own scipy CSR: symmetric, regular, and the control's
    # CG solution equals scipy.sparse.linalg.spsolve on (I + lam L) f = y, L from csgraph.laplacian
    from scipy.sparse.csgraph import laplacian as cs_laplacian
    from scipy.sparse.linalg import spsolve

    from bigsmooth.kernels.audit_figures import RandomRegularGraph, random_graph_control

    R = RandomRegularGraph(300, 3, 0.5, np.random.default_rng(1))
    M = R.matrix()
    x = rng.random(300)
    assert np.allclose(R.adjacency_times(x), M @ x) and abs(M - M.T).max() == 0
    assert np.allclose(np.asarray(M.sum(axis=1)).ravel(), R.degree)
    W = sp.csr_matrix(M)  # a "real" graph with the same shape: 6 entries of 0.5 per row
    y = rng.random(300)
    expect = spsolve((sp.identity(300) + 2.0 * cs_laplacian(M)).tocsc(), y)
    # asked for the spread of the lam = 2 solution, the control starts at lam = 2 and stops there
    got, rec = random_graph_control(
        W, y, 2.0, "unnormalised", 1e-12, np.random.default_rng(1), target_sd=expect.std()
    )
    assert rec["strength"] == 2.0 and rec["matched"]
    assert np.allclose(got, expect, atol=1e-9)


def test_random_graph_control_is_matched_in_spread(rng):
    # the control's strength is searched so that its sd equals the target within 1%; its result is
    # the exact solve at the strength it reports (scipy spsolve on I + t L, L from csgraph.laplacian)
    from scipy.sparse.csgraph import laplacian as cs_laplacian
    from scipy.sparse.linalg import spsolve

    from bigsmooth.kernels.audit_figures import RandomRegularGraph, random_graph_control

    M = RandomRegularGraph(400, 4, 0.7, np.random.default_rng(2)).matrix()
    y = rng.random(400)
    for target in (0.5 * y.std(), 0.1 * y.std(), 0.9 * y.std()):
        got, rec = random_graph_control(
            sp.csr_matrix(M), y, 1.0, "unnormalised", 1e-10, np.random.default_rng(2), target_sd=target
        )
        assert rec["matched"] and abs(got.std() - target) <= 0.01 * target
        expect = spsolve((sp.identity(400) + rec["strength"] * cs_laplacian(M)).tocsc(), y)
        assert np.allclose(got, expect, atol=1e-7)
    # the same through the search on a sample of 150 rows, refined on the full graph
    got, rec = random_graph_control(
        sp.csr_matrix(M),
        y,
        1.0,
        "unnormalised",
        1e-10,
        np.random.default_rng(2),
        target_sd=0.5 * y.std(),
        search_rows=150,
    )
    assert rec["matched"] and rec["sample_solves"] > 0 and abs(got.std() - 0.5 * y.std()) <= 0.005 * y.std()
    expect = spsolve((sp.identity(400) + rec["strength"] * cs_laplacian(M)).tocsc(), y)
    assert np.allclose(got, expect, atol=1e-7)
    # a spread the smoothing cannot reach (above the raw scores') is reported as not matched
    _, rec = random_graph_control(
        sp.csr_matrix(M), y, 1.0, "unnormalised", 1e-10, np.random.default_rng(2), target_sd=2 * y.std()
    )
    assert not rec["matched"]


def test_self_influence_equals_the_dense_inverse_diagonal(rng):
    # G_ii = diag((C + lam L)^-1 C), against numpy.linalg.inv on small random graphs, both
    # Laplacians, weak and strong smoothing; rows restricted to a ball cap are lower bounds
    from bigsmooth.kernels import influence, laplacian

    for kind in ("unnormalised", "random_walk"):
        for lam in (0.3, 3.0, 30.0):
            W = laplacian.as_weight_matrix(random_graph(150, 0.04, rng))
            A, c = laplacian.system(W, lam, kind)
            expect = np.diag(np.linalg.inv(A.toarray()) @ np.diag(c))
            g, step, capped = influence.self_influence(A, c, np.arange(150), tol=1e-10)
            assert not capped.any() and np.allclose(g, expect, rtol=1e-7, atol=1e-9), (kind, lam)
            g_cap, _, capped = influence.self_influence(A, c, np.arange(150), tol=1e-10, max_ball=20)
            assert capped.any() and np.all(g_cap <= expect + 1e-12)  # the M-matrix bound


def test_counterfactual_after_is_the_exact_single_row_rerun(rng):
    # for each row, rerunning the solve (scipy.sparse.linalg.spsolve) with only that row's raw score
    # replaced by its counterfactual gives the adjusted score the audit uses; with y_cf = y nothing moves
    from scipy.sparse.linalg import spsolve

    from bigsmooth.kernels import laplacian, metrics
    from bigsmooth.kernels.audit_figures import counterfactual_figures

    W = laplacian.as_weight_matrix(random_graph(120, 0.06, rng))
    y = rng.random(120)
    ycf = np.clip(y + rng.normal(0, 0.2, 120), 0, 1)
    for kind in ("unnormalised", "random_walk"):
        A, c = laplacian.system(W, 3.0, kind)
        f = spsolve(A.tocsc(), c * y)
        rerun = np.empty(120)
        for i in range(120):
            y2 = y.copy()
            y2[i] = ycf[i]
            rerun[i] = spsolve(A.tocsc(), c * y2)[i]
        cut = metrics.quantile_cutoff(f, 0.3)
        s = {"laplacian": kind, "lam": 3.0}
        got = counterfactual_figures(W, y, f, ycf, s, 0.3, np.arange(120), tol=1e-12)
        assert got["all_rows"] and got["rows_evaluated"] == 120
        assert np.isclose(got["same_decision_after"], np.mean((f >= cut) == (rerun >= cut)))
        assert np.isclose(got["mean_abs_gap_after"], np.mean(np.abs(f - rerun)), atol=1e-10)
        same = counterfactual_figures(W, y, f, y.copy(), s, 0.3, np.arange(120), tol=1e-12)
        assert same["same_decision_after"] == 1.0 and same["mean_abs_gap_after"] < 1e-12


def test_neighbour_blocks_added_in_order_equal_the_whole_table_passes(rng, monkeypatch):
    """The audit's block tasks (neighbour_block, added by neighbour_figures) give the edge
    disagreement, consistency and local Lipschitz figures of the whole-table passes bit for bit,
    and the edge disagreement equals the dense formula sum w (f_i - f_j)^2 / sum w (numpy)."""
    from bigsmooth.kernels import audit_figures as af
    from bigsmooth.kernels import graph as gk

    monkeypatch.setattr(af, "CHUNK", 97)  # several blocks, the last one short
    n, k = 500, 6
    E = rng.normal(size=(n, 3))
    E[1] = E[0]  # a pair at distance 0
    ind, dist = gk.exact_knn(E, k)
    W = gk.heat_kernel_graph(ind, dist, gk.kernel_scale(dist, "global"))
    V = np.vstack([rng.random(n), rng.normal(size=n)])
    cuts = [float(np.quantile(v, 0.7)) for v in V]
    blocks = [af.neighbour_block(V, cuts, W, ind, dist, 0.5, lo, min(lo + 97, n)) for lo in range(0, n, 97)]
    for j, (disagreement, consistency, lip) in enumerate(af.neighbour_figures(blocks, n)):
        f = V[j]
        assert disagreement == metrics.edge_disagreement(W.indptr, W.indices, W.data, f, block=97)
        D = W.toarray()
        assert np.isclose(disagreement, (D * (f[:, None] - f[None, :]) ** 2).sum() / D.sum())
        assert consistency == af.chunked_consistency((f >= cuts[j]).astype(np.float64), ind)
        assert lip == af.local_lipschitz(f, ind, dist, 0.5)
        assert lip["zero_distance_share"] > 0
