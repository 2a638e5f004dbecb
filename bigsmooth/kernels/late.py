"""Late rows: adjusted scores for rows that arrive after the nightly run, with the night's solution
held fixed (pure array code; ``bigsmooth.late`` owns the files).

The night solved (C + lam L) f = C y, whose row i reads
    (c_i + lam d_i) f_i - lam sum_j w_ij f_j = c_i y_i,
with d_i = sum_j w_ij and c_i = 1 (unnormalised Laplacian) or d_i (random walk; 1 without edges).
A batch of late rows joins the graph with edges to night rows (held fixed) and to each other. The
objective restricted to the batch is minimised by
    (diag(c + lam d) - lam W_late) f = c y + lam W_old f_old,
a small symmetric, diagonally dominant system; one late row alone gets the closed form
    f = (c y + lam sum_j w_j f_j) / (c + lam sum_j w_j).
References for the tests: a dense solve of the whole system with the night's rows fixed
(numpy.linalg.solve) and scipy.optimize's scalar minimiser of the objective over one row.

Neighbours come from a fine partition of the night's rows (cells of a few thousand rows, each row
in the cell of its nearest centre). Two searches use it:
- coded (:func:`code_index`, :func:`coded_search`, the default): each row is kept in its cell as a
  4-bit code a dimension (12.5 bytes a row at 25 dimensions instead of 100), searched by faiss's
  inverted lists with SIMD "fast scan" of the codes (compiled C++, no JIT: nothing is compiled on
  this path); the best ``take`` candidates of a late row's ``probe`` nearest cells are then measured
  exactly, in float64, against the fair-space rows.
- exact cells (:func:`search`, the slow reference, used for small nights): the cells' rows
  contiguous in a float32 copy of the fair space, a late row compared exactly with every row of its
  ``probe`` nearest cells, in plain numpy.
"""

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from . import partition


def heat(d, sigma_a, sigma_b):
    """The night's heat kernel w = exp(-d^2 / (sigma_a sigma_b))."""
    return np.exp(-(np.asarray(d, dtype=np.float64) ** 2) / (sigma_a * sigma_b))


def row_sigma(dist, rule, factor, median):
    """Kernel scale of rows with sorted neighbour distances ``dist`` (b, k), as the graph stage's
    rule: ``global`` median x factor; ``local`` the distance to the min(7, k)-th neighbour (the
    median where that is 0), x factor."""
    dist = np.asarray(dist, dtype=np.float64)
    if rule == "global":
        return np.full(dist.shape[0], median * factor)
    s = dist[:, min(7, dist.shape[1]) - 1]
    return np.where(s > 0, s, median) * factor


def single_row(y, w, f_nb, lam, kind="unnormalised"):
    """The closed form for one late row: score ``y``, weights ``w`` to fixed rows whose solutions
    are ``f_nb`` (len(w), columns)."""
    w = np.asarray(w, dtype=np.float64)
    d = w.sum()
    c = 1.0 if kind == "unnormalised" else (d if d > 0 else 1.0)
    return (c * np.asarray(y, dtype=np.float64) + lam * (w @ np.asarray(f_nb, dtype=np.float64))) / (
        c + lam * d
    )


def solve_batch(y, old_row, old_w, old_f, late_W, lam, kind="unnormalised"):
    """Adjusted scores of a batch of b late rows solved jointly.

    y: (b, s) raw scores; old edges as parallel arrays ``old_row`` (late row 0..b-1), ``old_w``
    (weight) and ``old_f`` (the night's solution at the other end, (edges, s)); ``late_W`` (b, b)
    symmetric weights between late rows (scipy sparse or dense). Returns (f (b, s), c (b,),
    degree (b,))."""
    y = np.asarray(y, dtype=np.float64)
    b = y.shape[0]
    old_row = np.asarray(old_row, dtype=np.int64)
    old_w = np.asarray(old_w, dtype=np.float64)
    Wl = sp.csr_matrix(late_W, dtype=np.float64, shape=(b, b))
    Wl.setdiag(0)
    Wl.eliminate_zeros()
    deg = np.bincount(old_row, weights=old_w, minlength=b) + np.asarray(Wl.sum(axis=1)).ravel()
    c = np.ones(b) if kind == "unnormalised" else np.where(deg > 0, deg, 1.0)
    pull = np.zeros_like(y)
    np.add.at(pull, old_row, old_w[:, None] * np.asarray(old_f, dtype=np.float64).reshape(len(old_w), -1))
    rhs = c[:, None] * y + lam * pull
    if Wl.nnz == 0:
        return rhs / (c + lam * deg)[:, None], c, deg
    A = (sp.diags(c + lam * deg) - lam * Wl).tocsc()
    f = spla.spsolve(A, rhs)
    return np.asarray(f, dtype=np.float64).reshape(b, -1), c, deg


def terms(y, w, f_nb, lam, c, pull=0.0):
    """The terms of the coordinate update at the solution for one row: (own share c y / (c + lam d),
    each neighbour's share lam w_j f_j / (c + lam d)); they add up to the row's adjusted score.
    ``y`` a score or a row of scores (s,); ``f_nb`` (len(w),) or (len(w), s). A row anchored by
    solve.stability (``pull`` = mu) has c (1 + mu) + lam d below the line, and a third share,
    mu c t / (c (1 + mu) + lam d), which the caller adds (t: last night's adjusted score)."""
    w = np.asarray(w, dtype=np.float64)
    f_nb = np.asarray(f_nb, dtype=np.float64)
    den = c * (1.0 + pull) + lam * w.sum()
    wb = w.reshape((-1,) + (1,) * (f_nb.ndim - 1))
    return c * np.asarray(y, dtype=np.float64) / den, lam * wb * f_nb / den


def cell_plan(sample, cells, rng):
    """Centres of ``cells`` cells: k-means (k-means++ start, Lloyd rounds) on a sample of the fair
    space, as the partitioned graph build plans its partitions."""
    return partition._kmeans(np.asarray(sample, dtype=np.float64), cells, rng)


def nearest_cells(Q, centres, probe, map_fn=map, chunk=16_384):
    """(b, probe) the nearest cells of each row of Q, nearest first (ties by index), ranked by
    ||c||^2 - 2 q.c in float64 (plain numpy: no compiled code on the late-row path); row chunks go
    through ``map_fn`` (e.g. a thread pool's map). Reference: a direct numpy search (tests)."""
    Q = np.asarray(Q, dtype=np.float64)
    C = np.asarray(centres, dtype=np.float64)
    probe = min(probe, len(C))
    cc = np.einsum("ij,ij->i", C, C)

    def one(lo):
        G = cc[None, :] - 2.0 * (Q[lo : lo + chunk] @ C.T)
        if probe == 1:
            return G.argmin(axis=1)[:, None]
        cand = np.argpartition(G, probe - 1, axis=1)[:, :probe] if probe < len(C) else np.argsort(G, axis=1)
        g = np.take_along_axis(G, cand, axis=1)
        return np.take_along_axis(cand, np.lexsort((cand, g), axis=1), axis=1)

    parts = list(map_fn(one, range(0, Q.shape[0], chunk)))
    return (np.vstack(parts) if parts else np.empty((0, probe), np.int64)).astype(np.int32)


def sq_norms(X):
    """Squared norms of float32 rows, in float32 (the ranking term of :func:`search`; row by row,
    so a block of rows gives each row the same value as the row alone)."""
    return np.einsum("ij,ij->i", X, X)


def search(Q, cells_of, read_cell, k):
    """Candidate night rows for late rows Q (b, d): each late row against every night row of the
    cells ``cells_of`` (b, probe) lists; ``read_cell(p)`` returns (night rows (m,), their
    fair-space rows (m, d) float32[, their squared norms (m,) float32 as :func:`sq_norms` gives
    them, read instead of computed]). Returns triplets (late row, night row, distance) with each
    late row's k nearest per cell, distances taken directly in float64 (:func:`best` picks the
    lists)."""
    Q = np.asarray(Q, dtype=np.float64)
    by_cell = {}
    for q, row in enumerate(cells_of):
        for p in row:
            by_cell.setdefault(int(p), []).append(q)
    out = []
    Q32 = (-2.0 * Q).astype(np.float32)
    for p in sorted(by_cell):
        qs = np.array(by_cell[p], dtype=np.int64)
        got = read_cell(p)
        rows, X = got[0], got[1]
        if not len(rows):
            continue
        X = np.asarray(X, dtype=np.float32)
        take = min(k + partition.SLACK, len(rows))
        if take < len(rows):
            # ranked in float32 by ||x||^2 - 2 q.x, with a few candidates to spare for round-off;
            # the chosen distances are then taken directly in float64 and :func:`best` decides
            G = Q32[qs] @ X.T
            G += (np.asarray(got[2]) if len(got) > 2 else sq_norms(X))[None, :]
            sel = np.argpartition(G, take - 1, axis=1)[:, :take]
        else:
            sel = np.broadcast_to(np.arange(len(rows)), (len(qs), len(rows)))
        d = _direct(Q[qs][:, None, :], X[sel].astype(np.float64))
        out.append((np.repeat(qs, take), rows[sel].ravel(), d.ravel()))
    return concat(out)


def code_index(centres, sample, blocks, threads=1):
    """The coded index of the night: an inverted-list index (faiss ``IndexIVFPQFastScan``) whose
    lists are the cells of ``centres`` (nlist, d) and whose codes quantise each dimension of a row
    to 4 bits (faiss's default for this index: the row itself, not its offset from the cell centre;
    a product quantiser with one dimension a sub-quantiser, trained on ``sample`` on one thread, so
    that the codes do not depend on the thread count);
    ``blocks`` yields the night's rows (float32, in row order) block by block. Returns the index."""
    import faiss

    C = np.ascontiguousarray(centres, dtype=np.float32)
    nlist, d = C.shape
    quantiser = faiss.IndexFlatL2(d)
    quantiser.add(C)
    index = faiss.IndexIVFPQFastScan(quantiser, d, nlist, d, 4)
    index.own_fields = True
    quantiser.this.disown()
    index.pq.cp.seed = 1234  # faiss's default, stated: the codebooks are a function of the sample alone
    faiss.omp_set_num_threads(1)
    index.train(np.ascontiguousarray(sample, dtype=np.float32))
    faiss.omp_set_num_threads(threads)
    for X in blocks:
        index.add(np.ascontiguousarray(X, dtype=np.float32))
    return index


def coded_search(index, Q, probe, take):
    """(b, take) candidate night rows of the late rows Q (-1 where fewer): the best ``take`` by
    their codes among the rows of each late row's ``probe`` nearest cells (faiss, one thread a call;
    :func:`measure` then takes the exact distances)."""
    import faiss

    params = faiss.SearchParametersIVF(nprobe=int(probe))
    return index.search(np.ascontiguousarray(Q, dtype=np.float32), int(take), params=params)[1]


def measure(Q, cand, rows_of):
    """Triplets (late row, night row, distance) of candidates ``cand`` (b, c; -1 for none), the
    distance taken directly in float64 from the fair-space rows ``rows_of(rows)``."""
    b, c = cand.shape
    q = np.repeat(np.arange(b, dtype=np.int64), c)
    j = np.asarray(cand, dtype=np.int64).ravel()
    q, j = q[j >= 0], j[j >= 0]
    X = np.asarray(rows_of(j), dtype=np.float64)
    return q, j, _direct(np.asarray(Q, dtype=np.float64)[q], X)


def expand(Q, ind, neighbours_of, rows_of, seen, n):
    """One round of neighbour-of-neighbour search for late rows: the night's neighbours
    (``neighbours_of(rows)`` -> (len, k)) of each late row's current list ``ind`` (b, k) are
    candidates at their direct distance (``rows_of(rows)`` -> fair-space rows). ``seen``: sorted
    keys (late row x (n + 1) + night row, :func:`keys`) of the pairs already measured, which are
    not measured again; ``n``: night rows. Returns the new triplets."""
    b, k = ind.shape
    q = np.repeat(np.arange(b, dtype=np.int64), k)
    j = ind.ravel()
    q, j = q[j >= 0], j[j >= 0]
    nb = np.asarray(neighbours_of(j), dtype=np.int64)
    cq, cj = np.repeat(q, nb.shape[1]), nb.ravel()
    key = np.unique(cq[cj >= 0] * (n + 1) + cj[cj >= 0])
    if len(seen):
        at = np.minimum(np.searchsorted(seen, key), len(seen) - 1)
        key = key[seen[at] != key]
    if not len(key):
        return concat([])
    cq, cj = key // (n + 1), key % (n + 1)
    X = np.asarray(rows_of(cj), dtype=np.float64)
    return cq, cj, _direct(np.asarray(Q, dtype=np.float64)[cq], X)


def keys(trip, n):
    """Sorted keys late row x (n + 1) + night row of triplets (for :func:`expand`'s ``seen``)."""
    return np.sort(trip[0] * (n + 1) + trip[1])


def lists(ind, dist):
    """The triplets of lists (b, k) (without empty places)."""
    b, k = ind.shape
    q = np.repeat(np.arange(b, dtype=np.int64), k)
    ok = ind.ravel() >= 0
    return q[ok], ind.ravel()[ok], dist.ravel()[ok]


def best(trip, b, k):
    """Each late row's k nearest of the triplets ``trip`` (late row, night row, distance), by
    (distance, row), without repeats: (ind (b, k), -1 where fewer; dist (b, k), inf there)."""
    q, j, d = trip
    order = _by_row_distance(q, j, d, b)
    q, j, d = q[order], j[order], d[order]
    first = np.ones(len(q), dtype=bool)
    # repeats of a (late row, night row) pair carry the same distance, so they are adjacent
    first[1:] = (q[1:] != q[:-1]) | (j[1:] != j[:-1])
    q, j, d = q[first], j[first], d[first]
    start = np.searchsorted(q, np.arange(b))
    rank = np.arange(len(q)) - start[q]
    keep = rank < k
    ind = np.full((b, k), -1, dtype=np.int64)
    dist = np.full((b, k), np.inf)
    ind[q[keep], rank[keep]] = j[keep]
    dist[q[keep], rank[keep]] = d[keep]
    return ind, dist


def _by_row_distance(q, j, d, b):
    """The order of triplets by (late row, distance, night row), as ``np.lexsort((j, d, q))`` gives
    it: by distance, then stably by late row (a radix sort of 16-bit keys), which is that order
    wherever no late row has two triplets at the same distance; lexsort itself where one has."""
    if b > np.iinfo(np.int16).max:
        return np.lexsort((j, d, q))
    order = np.argsort(d)
    order = order[np.argsort(q[order].astype(np.int16), kind="stable")]
    qs, ds = q[order], d[order]
    if np.any((qs[1:] == qs[:-1]) & (ds[1:] == ds[:-1])):
        return np.lexsort((j, d, q))
    return order


def reverse_edges(trip, ind, kth):
    """Triplets (late row, night row, distance) measured but not in the late row's list whose night
    row would list the late row among its own k nearest (closer than its k-th neighbour,
    ``kth[i]`` for triplet i): the night's symmetrised graph would join them too."""
    q, j, d = trip
    listed = (ind[q] == j[:, None]).any(axis=1)
    hit = (~listed) & (d < kth)
    q, j, d = q[hit], j[hit], d[hit]
    key = np.unique(q * (j.max(initial=0) + 1) + j, return_index=True)[1]
    return q[key], j[key], d[key]


def concat(parts):
    """Triplets (late row, night row, distance) of several parts, one after another."""
    if not parts:
        return np.empty(0, np.int64), np.empty(0, np.int64), np.empty(0)
    return tuple(np.concatenate(x) for x in zip(*parts))


def _sq_dist(A, B):
    """Squared distances (a, b) in float64 by the expanded form (for ranking only)."""
    return np.einsum("ij,ij->i", A, A)[:, None] - 2.0 * (A @ B.T) + np.einsum("ij,ij->i", B, B)[None, :]


def _direct(A, B):
    """Euclidean distances of A and B along the last axis, taken directly in float64 (as the graph
    stage takes the night's distances)."""
    return np.sqrt(np.sum((A - B) ** 2, axis=-1))


def late_pairs(Q, k, chunk=1024):
    """Exact k nearest neighbours among the late rows themselves (each excluding itself): (ind
    (b, k') local rows, dist (b, k')) with k' = min(k, b - 1), ascending by (distance, row).
    Plain numpy (no compiled code on the late-row path): rows are ranked by float32 products in
    chunks of ``chunk`` rows, with a few candidates to spare, and the chosen distances are taken
    directly in float64, as the graph stage does."""
    Q = np.asarray(Q, dtype=np.float32)
    b = Q.shape[0]
    kk = min(k, b - 1)
    if kk <= 0:
        return np.empty((b, 0), np.int64), np.empty((b, 0))
    take = min(kk + partition.SLACK, b - 1)
    Q64 = Q.astype(np.float64)
    A = -2.0 * Q
    sq = np.einsum("ij,ij->i", Q, Q)
    ind = np.empty((b, kk), dtype=np.int64)
    dist = np.empty((b, kk))
    for lo in range(0, b, chunk):
        hi = min(b, lo + chunk)
        G = A[lo:hi] @ Q.T
        G += sq[None, :]
        G[np.arange(hi - lo), np.arange(lo, hi)] = np.inf  # not its own neighbour
        cand = np.argpartition(G, take - 1, axis=1)[:, :take]
        d = _direct(Q64[lo:hi, None, :], Q64[cand])
        order = np.lexsort((cand, d), axis=1)[:, :kk]
        ind[lo:hi] = np.take_along_axis(cand, order, axis=1)
        dist[lo:hi] = np.take_along_axis(d, order, axis=1)
    return ind, dist


def late_pairs_within(Q, radius, k, chunk=1024):
    """The pairs of late rows that can enter each other's lists: for each late row i, its k nearest
    other late rows closer than ``radius[i]`` (its k-th night neighbour's distance; inf where it has
    fewer), as triplets (row, other row, distance) by (row, distance, other row). A late row
    farther than that loses to the night row at the k-th place (ties go to the night row, whose
    number is lower), so merging these gives the same lists as merging :func:`late_pairs`' (the
    reference). Pairs are screened in float32 by ||x_j||^2 - 2 x_i.x_j (one product of augmented
    rows, compared with the row's own bound with a margin for round-off) and measured directly in
    float64, as the graph stage measures distances."""
    Q = np.asarray(Q, dtype=np.float32)
    b = Q.shape[0]
    Q64 = Q.astype(np.float64)
    sq = np.einsum("ij,ij->i", Q64, Q64)
    r = np.asarray(radius, dtype=np.float64)
    margin = 1e-5 * (sq + (sq.max() if b else 0.0) + np.where(np.isfinite(r), r**2, 0.0)) + 1e-12
    bound = (r**2 - sq + margin).astype(np.float32)  # inf stays inf
    A, B = partition._augmented(Q)
    parts = []
    for lo in range(0, b, chunk):
        hi = min(b, lo + chunk)
        near = (A[lo:hi] @ B) <= bound[lo:hi, None]
        near[np.arange(hi - lo), np.arange(lo, hi)] = False  # not its own neighbour
        rows = np.flatnonzero(near.any(axis=1))  # few rows have any (a vector pass finds them)
        qi, qj = np.nonzero(near[rows])
        qi = rows[qi] + lo
        d = _direct(Q64[qi], Q64[qj])
        ok = d < r[qi]
        parts.append((qi[ok].astype(np.int64), qj[ok].astype(np.int64), d[ok]))
    q, j, d = concat(parts)
    ind, dist = best((q, j, d), b, max(0, min(k, b - 1)))
    return lists(ind, dist)
