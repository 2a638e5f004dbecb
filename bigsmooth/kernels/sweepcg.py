"""Conjugate gradients preconditioned by symmetric Gauss-Seidel sweeps over block groups.

Solves A x = b for symmetric positive definite A with a positive diagonal (here A = C + lam L),
b of shape (n, c) (each column is its own CG run, all sharing the sweeps).

1. Jacobi scaling: s = diag(A)^-1/2, As = S A S has a unit diagonal, bs = S b, x = S xs.
2. Block groups are consecutive row ranges (rows ordered for locality first). Within a group, E =
   I / omega + L_g where L_g is the strictly lower part of As restricted to couplings inside the
   group and 0 < omega < 2 the relaxation factor. The preconditioner M = E E^T (up to a constant
   factor) is one forward and one backward symmetric sweep over each group: symmetric Gauss-Seidel
   for omega = 1, SSOR otherwise. Groups do not see each other inside M (Jacobi between groups), so
   every group can be swept by a different worker and the result does not depend on how many
   workers there are.
3. CG runs on the split-preconditioned matrix Ahat = E^-1 As E^-T with Eisenstat's trick (S. C.
   Eisenstat, "Efficient implementation of a class of preconditioned conjugate gradient methods",
   SIAM J. Sci. Stat. Comput. 2(1), 1981): with As = E + E^T + (1 - 2 / omega) I + O (O =
   couplings between groups), Ahat p = t + E^-1 (p + (1 - 2 / omega) t + O t) where t = E^-T p.
   One backward and one forward sweep cost about one matrix-vector product, so an iteration costs
   about what a Jacobi-preconditioned CG iteration costs while needing fewer iterations. The
   iterate xs = E^-T yhat is updated with t.

The scaled matrix is split once into L (strictly lower couplings inside a group), U (strictly
upper inside a group) and O (couplings between groups), so the sweeps are plain loops over their
own entries.

Each iteration has three phases; in each, every group touches only its own rows of the outputs
and the partial dot products are summed in group order, so results are bit-identical for any
number of workers. Phase 1: p = r + beta p, t = E^-T p. Phase 2: ap = Ahat p and p.ap.
Phase 3: xs += alpha t, r -= alpha ap and r.r.

The stopping rule uses the true relative residual ||b - A x|| / ||b||, checked when the
estimate ||r_k|| / ||r_0|| * (||b - A x0|| / ||b||) falls below the tolerance (for x0 = 0 that is
||r_k|| / ||E^-1 bs||); a failed check lowers the estimate's target.
"""

from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp

# one status vocabulary for every solver (declared in solver.py)
from .solver import STATUS_CONVERGED, STATUS_MAX_SWEEPS, STATUS_STOPPED  # noqa: E402


def triplet_kwargs(last="d", **triplets):
    """Keyword arguments for the kernels that take CSR triplets: ``triplet_kwargs(L=(p, i, d))`` is
    ``{"Lp": p, "Li": i, "Ld": d}`` (``last`` names the values: "d" scaled data, "w" raw weights)."""
    out = {}
    for name, (ptr, ind, val) in triplets.items():
        out.update({f"{name}p": ptr, f"{name}i": ind, f"{name}{last}": val})
    return out


# ---- Python references of the compiled kernels in bigsmooth.kernels._fast (same signatures) ----


def backward_sweep(Up, Ui, Ud, r, p, t, beta, omega, start, stop):
    for i in range(stop - 1, start - 1, -1):
        p[i] = r[i] + beta * p[i]
        acc = p[i].copy()
        for q in range(Up[i], Up[i + 1]):
            acc -= Ud[q] * t[Ui[q]]
        t[i] = omega * acc


def forward_sweep(Lp, Li, Ld, Op, Oi, Od, p, t, w, ap, omega, start, stop, pap):
    pap[:] = 0.0
    for i in range(start, stop):
        acc = p[i] + (1.0 - 2.0 / omega) * t[i]
        for q in range(Op[i], Op[i + 1]):
            acc += Od[q] * t[Oi[q]]
        for q in range(Lp[i], Lp[i + 1]):
            acc -= Ld[q] * w[Li[q]]
        w[i] = omega * acc
        ap[i] = t[i] + w[i]
        pap += p[i] * ap[i]


def update_sweep(x, r, t, ap, alpha, start, stop, rr):
    x[start:stop] += alpha * t[start:stop]
    r[start:stop] -= alpha * ap[start:stop]
    rr[:] = np.sum(r[start:stop] ** 2, axis=0)


PY_KERNELS = {"backward": backward_sweep, "forward": forward_sweep, "update": update_sweep}


def compiled_kernels():
    from . import _fast

    return {"backward": _fast.backward_sweep, "forward": _fast.forward_sweep, "update": _fast.update_sweep}


@dataclass
class Grouped:
    """The Jacobi-scaled system split by block groups. Triplets are (indptr, indices, data)."""

    s: np.ndarray  # (n,) diag(A)^-1/2
    bounds: np.ndarray  # (G + 1,) group boundaries
    L: tuple
    U: tuple
    O: tuple

    @property
    def n(self):
        return len(self.s)

    def matrices(self):
        n = self.n
        return [sp.csr_matrix((t[2], t[1], t[0]), shape=(n, n)) for t in (self.L, self.U, self.O)]

    def matvec(self, x, fast=True):
        """A x for the unscaled A = S^-1 (I + L + U + O) S^-1, x of shape (n, c).

        ``fast``: one compiled parallel pass over the triplets; otherwise the scipy reference."""
        y = np.ascontiguousarray(x / self.s[:, None])
        if fast:
            from . import _fast

            out = np.empty_like(y)
            _fast.split_matvec(**triplet_kwargs(L=self.L, U=self.U, O=self.O), y=y, out=out)
        else:
            out = y.copy()
            for M in self.matrices():
                out += M @ y
        return out / self.s[:, None]

    def residual_norm(self, xs, b, fast=True):
        """||b - A x|| for x = S xs (xs: the scaled iterate), without forming A x.

        ``fast``: one compiled parallel pass that sums squares in fixed chunks of rows, then adds the
        chunks in order (the same bits for any number of threads); otherwise numpy on :meth:`matvec`."""
        xs = np.asarray(xs, dtype=np.float64)
        b = np.asarray(b, dtype=np.float64).reshape(xs.shape)
        if not fast:
            return float(np.linalg.norm(b - self.matvec(self.s[:, None] * xs, fast=False)))
        from . import _fast

        parts = np.zeros(-(-self.n // RESIDUAL_CHUNK))
        _fast.split_residual_sq(
            **triplet_kwargs(L=self.L, U=self.U, O=self.O),
            s=self.s,
            xs=xs,
            b=b,
            chunk=RESIDUAL_CHUNK,
            parts=parts,
        )
        return float(np.sqrt(np.sum(parts)))


RESIDUAL_CHUNK = 16384


def prepare(A, bounds):
    """Scale A to a unit diagonal and split it by the group ``bounds`` into L, U and O."""
    A = sp.csr_matrix(A, dtype=np.float64)
    n = A.shape[0]
    bounds = np.asarray(bounds, dtype=np.int64)
    if bounds[0] != 0 or bounds[-1] != n or np.any(np.diff(bounds) <= 0):
        raise ValueError(f"group bounds must rise strictly from 0 to n = {n}; got {bounds.tolist()}")
    d = A.diagonal()
    if np.any(d <= 0):
        raise ValueError("A must have a positive diagonal")
    s = 1.0 / np.sqrt(d)
    As = (sp.diags(s) @ A @ sp.diags(s)).tocsr()
    As.sort_indices()
    rows = np.repeat(np.arange(n), np.diff(As.indptr))
    cols = As.indices
    grp = np.searchsorted(bounds, np.arange(n), side="right") - 1
    same = grp[rows] == grp[cols]
    parts = []
    for mask in (same & (cols < rows), same & (cols > rows), ~same):
        M = sp.csr_matrix((As.data[mask], (rows[mask], cols[mask])), shape=(n, n))
        M.sort_indices()
        parts.append((M.indptr.astype(np.uint64), M.indices.astype(np.uint32), M.data))
    return Grouped(s, bounds, *parts)


@dataclass
class SplitGraph:
    """The graph W permuted into the group order and split like :class:`Grouped`, with raw weights.

    It does not depend on lam, so the order stage builds it once and every solve scales it.
    """

    degree: np.ndarray  # (n,) row sums of W in the new order
    bounds: np.ndarray
    L: tuple  # (indptr uint64, indices uint32, weights float64)
    U: tuple
    O: tuple

    @property
    def n(self):
        return len(self.degree)


def _check_bounds(bounds, n):
    bounds = np.asarray(bounds, dtype=np.int64)
    if bounds[0] != 0 or bounds[-1] != n or np.any(np.diff(bounds) <= 0):
        raise ValueError(f"group bounds must rise strictly from 0 to n = {n}; got {bounds.tolist()}")
    return bounds


def _default_alloc(name, size, dtype):
    return np.empty(size, dtype=dtype)


def split_graph(W, perm, bounds, alloc=None, block=None, release=None):
    """Permute W (CSR, symmetric, empty diagonal) by ``perm`` (``perm[r]`` = input row at position r)
    and split it by the group ``bounds``, in two parallel O(nnz) passes without assembling anything.

    ``alloc(name, size, dtype)`` may supply the arrays (e.g. memmaps). Entries within a row keep the
    graph's column order, so the result is deterministic. Reference: :func:`prepare` on the
    assembled, permuted matrix. The fill runs over ``block`` positions at a time (default: all);
    ``release(array)``, if given, is called on W's arrays and on every output after each block
    and after the counts (the order stage drops memory-mapped pages it no longer needs, so its
    resident memory holds about one block's pages instead of both whole matrices).
    """
    from . import _fast

    alloc = alloc or _default_alloc
    n = W.shape[0]
    perm = np.asarray(perm, dtype=np.int64)
    bounds = _check_bounds(bounds, n)
    # unsigned indices in the solver's arrays: numba skips its negative-index wraparound check on
    # every gather (measured here at about 2x on a CSR product); positions are never negative
    pos = np.empty(n, dtype=np.uint32)
    pos[perm] = np.arange(n, dtype=np.uint32)
    group = np.repeat(np.arange(len(bounds) - 1, dtype=np.uint32), np.diff(bounds))
    ptrs = [alloc(f"{name}-indptr", n + 1, np.uint64) for name in "LUO"]
    for p in ptrs:
        p[0] = 0
    _fast.split_counts(
        indptr=W.indptr,
        indices=W.indices,
        perm=perm,
        pos=pos,
        group=group,
        Lc=ptrs[0],
        Uc=ptrs[1],
        Oc=ptrs[2],
    )
    for p in ptrs:
        np.cumsum(p, out=p)

    def done(*arrays):  # after the counts and after each block of the fill
        if release is not None:
            for a in (W.indptr, W.indices, W.data, *arrays):
                release(a)

    done(*ptrs)
    parts = [
        (p, alloc(f"{name}-indices", int(p[-1]), np.uint32), alloc(f"{name}-weight", int(p[-1]), np.float64))
        for name, p in zip("LUO", ptrs)
    ]
    degree = alloc("degree", n, np.float64)
    step = max(1, int(block or n))
    for lo in range(0, n, step):
        _fast.split_fill(
            indptr=W.indptr,
            indices=W.indices,
            data=W.data,
            perm=perm,
            pos=pos,
            group=group,
            **triplet_kwargs("w", L=parts[0], U=parts[1], O=parts[2]),
            degree=degree,
            lo=lo,
            hi=min(lo + step, n),
        )
        done(degree, *(a for part in parts for a in part))
    return SplitGraph(degree, bounds, *parts)


def scale_split(split, lam, c, alloc=None, release=None):
    """The Jacobi-scaled system of A = C + lam L from a :class:`SplitGraph`; ``c`` is diag(C) in the
    split's row order. One parallel pass over the entries. ``release(array)``, if given, is called
    on each raw weight array once its part is scaled (the stage drops its memory-mapped pages)."""
    from . import _fast

    alloc = alloc or _default_alloc
    c = np.asarray(c, dtype=np.float64)
    s = alloc("s", split.n, np.float64)
    s[:] = 1.0 / np.sqrt(c + lam * np.asarray(split.degree))
    parts = []
    for name, (ptr, ind, w) in zip("LUO", (split.L, split.U, split.O)):
        out = alloc(f"{name}-data", len(w), np.float64)
        _fast.scale_triplet(ptr=ptr, ind=ind, w=w, s=s, lam=float(lam), out=out)
        if release is not None:
            release(w)
        parts.append((ptr, ind, out))
    return Grouped(s, split.bounds, *parts)


def prepare_from_graph(W, lam, c, perm, bounds, alloc=None):
    """``prepare(C + lam L permuted by perm, bounds)`` straight from the graph: :func:`split_graph`
    then :func:`scale_split`. ``c`` is diag(C) in input row order."""
    split = split_graph(W, perm, bounds, alloc)
    return scale_split(split, lam, np.asarray(c, dtype=np.float64)[np.asarray(perm)], alloc)


# ---- group tasks (module level so that process workers can import them) ----


def _phase1(kern, U, r, p, t, beta, omega, start, stop):
    kern["backward"](**triplet_kwargs(U=U), r=r, p=p, t=t, beta=beta, omega=omega, start=start, stop=stop)


def _phase2(kern, L, O, p, t, w, ap, omega, start, stop):
    pap = np.zeros(p.shape[1])
    kern["forward"](
        **triplet_kwargs(L=L, O=O), p=p, t=t, w=w, ap=ap, omega=omega, start=start, stop=stop, pap=pap
    )
    return pap


def _phase3(kern, x, r, t, ap, alpha, start, stop):
    rr = np.zeros(x.shape[1])
    kern["update"](x=x, r=r, t=t, ap=ap, alpha=alpha, start=start, stop=stop, rr=rr)
    return rr


# ---- the same phases by value: a group's rows of the vectors go in, its new rows come out ----
# (for workers that share no memory and no coherent file with the driver: a Dask cluster across
# hosts. The vectors stay with the caller, which writes each group's rows back; a task writes
# nothing, so it may run twice. The kernels run on the same values in the same order, so the
# result is bit-identical to the in-place phases.)


def _rows_at(n, g0, a_g):
    """An (n, c) array of zeros holding ``a_g`` at rows g0.. (numpy's zeros are calloc'ed: the pages
    of rows the kernel never touches are never written, so this costs the group's rows only)."""
    out = np.zeros((n,) + a_g.shape[1:])
    out[g0 : g0 + len(a_g)] = a_g
    return out


def _phase1_rows(kern, U, r_g, p_g, beta, omega, start, stop, n):
    """Phase 1 of one group by value: (its new rows of p, of t). U couples rows inside the group only."""
    r, p, t = _rows_at(n, start, r_g), _rows_at(n, start, p_g), np.zeros((n, r_g.shape[1]))
    _phase1(kern, U, r, p, t, beta, omega, start, stop)
    return p[start:stop].copy(), t[start:stop].copy()


def _phase2_rows(kern, L, O, p_g, t, omega, start, stop):
    """Phase 2 of one group by value, given the whole t (O reads other groups' rows of it): (its
    new rows of w, of ap, its part of p.ap)."""
    n = t.shape[0]
    p, w, ap = _rows_at(n, start, p_g), np.zeros(t.shape), np.zeros(t.shape)
    pap = _phase2(kern, L, O, p, t, w, ap, omega, start, stop)
    return w[start:stop].copy(), ap[start:stop].copy(), pap


def _phase3_rows(kern, x_g, r_g, t_g, ap_g, alpha):
    """Phase 3 of one group by value (the group's rows only): (its new rows of x, of r, its part of r.r)."""
    x_g, r_g = np.array(x_g), np.array(r_g)
    rr = _phase3(kern, x_g, r_g, t_g, ap_g, alpha, 0, len(x_g))
    return x_g, r_g, rr


class _InPlace:
    """The three phases over the groups on the shared vectors of ``work`` (threads, or processes
    and same-host Dask workers mapping the same files)."""

    def __init__(self, sweep_map, kern, system, groups, work, omega):
        self.map, self.kern, self.sys, self.groups, self.work, self.omega = (
            sweep_map,
            kern,
            system,
            groups,
            work,
            omega,
        )

    def phase1(self, beta):
        k, s, wk = self.kern, self.sys, self.work
        self.map(_phase1, [(k, s.U, wk.r, wk.p, wk.t, beta, self.omega, g0, g1) for g0, g1 in self.groups])

    def phase2(self):
        k, s, wk = self.kern, self.sys, self.work
        calls = [(k, s.L, s.O, wk.p, wk.t, wk.w, wk.ap, self.omega, g0, g1) for g0, g1 in self.groups]
        return np.sum(self.map(_phase2, calls), axis=0)

    def phase3(self, alpha):
        k, wk = self.kern, self.work
        calls = [(k, wk.x, wk.r, wk.t, wk.ap, alpha, g0, g1) for g0, g1 in self.groups]
        return np.sum(self.map(_phase3, calls), axis=0)


class _ByValue(_InPlace):
    """The same phases by value: each group's rows go to its task and its new rows come back and
    are written here in group order. ``share(t)`` hands the whole t to the executor once a phase
    (a Dask executor scatters it), else it travels with every call."""

    def __init__(self, sweep_map, kern, system, groups, work, omega, share=None):
        super().__init__(sweep_map, kern, system, groups, work, omega)
        self.share = share or (lambda a: a)

    def phase1(self, beta):
        k, s, wk, n = self.kern, self.sys, self.work, self.work.x.shape[0]
        calls = [
            (k, s.U, np.array(wk.r[g0:g1]), np.array(wk.p[g0:g1]), beta, self.omega, g0, g1, n)
            for g0, g1 in self.groups
        ]
        for (g0, g1), (p_g, t_g) in zip(self.groups, self.map(_phase1_rows, calls)):
            wk.p[g0:g1], wk.t[g0:g1] = p_g, t_g

    def phase2(self):
        k, s, wk = self.kern, self.sys, self.work
        t = self.share(np.array(wk.t))
        calls = [(k, s.L, s.O, np.array(wk.p[g0:g1]), t, self.omega, g0, g1) for g0, g1 in self.groups]
        paps = []
        for (g0, g1), (w_g, ap_g, pap) in zip(self.groups, self.map(_phase2_rows, calls)):
            wk.w[g0:g1], wk.ap[g0:g1] = w_g, ap_g
            paps.append(pap)
        return np.sum(paps, axis=0)

    def phase3(self, alpha):
        k, wk = self.kern, self.work
        calls = [
            (
                k,
                np.array(wk.x[g0:g1]),
                np.array(wk.r[g0:g1]),
                np.array(wk.t[g0:g1]),
                np.array(wk.ap[g0:g1]),
                alpha,
            )
            for g0, g1 in self.groups
        ]
        rrs = []
        for (g0, g1), (x_g, r_g, rr) in zip(self.groups, self.map(_phase3_rows, calls)):
            wk.x[g0:g1], wk.r[g0:g1] = x_g, r_g
            rrs.append(rr)
        return np.sum(rrs, axis=0)


def _map(executor, fn, calls, order=None, sizes=None):
    """Run fn over the group calls, here in order or on an executor of :mod:`bigsmooth.parallel`
    (anything with ``map_calls(fn, calls, order, sizes)``). Results come back in the order of
    ``calls`` either way; ``order`` is the order in which they are handed out (largest groups
    first) and ``sizes`` their work, for executors that batch calls."""
    if executor is None:
        return [fn(*c) for c in calls]
    return executor.map_calls(fn, calls, order, sizes)


@dataclass
class Work:
    """The solver's O(n) vectors, each (n, c) float64; memmaps when workers are processes."""

    x: np.ndarray  # scaled iterate xs
    r: np.ndarray  # preconditioned residual
    p: np.ndarray
    t: np.ndarray
    w: np.ndarray
    ap: np.ndarray

    @classmethod
    def allocate(cls, n, c, make=None):
        make = make or (lambda name, shape: np.zeros(shape))
        return cls(*(make(name, (n, c)) for name in ("x", "r", "p", "t", "w", "ap")))


@dataclass
class SweepCGResult:
    x: np.ndarray
    status: str
    sweeps: int
    residuals: list = field(default_factory=list)  # preconditioned estimate after each iteration
    checks: list = field(default_factory=list)  # (iteration, true relative residual)

    @property
    def final_residual(self):
        return self.checks[-1][1] if self.checks else float("nan")


def scaled_start(x0, ax0, b):
    """(a x0, a A x0) with a = x0.b / x0.A x0 per column (a = 1 where x0.A x0 = 0)."""
    num = np.sum(x0 * b, axis=0)
    den = np.sum(x0 * ax0, axis=0)
    a = np.divide(num, den, out=np.ones_like(num), where=den > 0)
    return x0 * a, ax0 * a


def sweep_cg(
    system,
    b,
    x0=None,
    tol=1e-6,
    max_sweeps=500,
    executor=None,
    kernels=None,
    work=None,
    state=None,
    on_sweep=None,
    omega=1.0,
    scale_start=False,
    by_value=False,
    share=None,
):
    """Solve A x = b (b of shape (n, c)) by sweep-preconditioned CG; see the module docstring.

    Parameters
    ----------
    system : :class:`Grouped` from :func:`prepare` (its arrays may be memmaps)
    b : ndarray (n, c), the right-hand side of the unscaled system
    x0 : ndarray (n, c), optional initial iterate (warm start; default zeros)
    executor : from :func:`bigsmooth.parallel.make_executor`, or None (serial); with process workers every array must be a memmap
    kernels : dict of the three kernels (default compiled; :data:`PY_KERNELS` are the references)
    work : :class:`Work`, optional preallocated vectors (memmaps for process workers)
    state : dict, optional resume state from ``on_sweep`` (``sweep``, ``rho``, ``beta``, ``nbhat``,
        ``residuals``, ``checks``, ``target``) with ``work`` holding the matching x, r, p
    on_sweep : callable(state_dict, work) -> bool or None, called after each iteration; False stops
    omega : relaxation factor of the symmetric sweeps (SSOR), 0 < omega < 2; 1 = Gauss-Seidel
    scale_start : start from a_k x0_k per column with a_k = x0_k.b_k / x0_k.A x0_k, the multiple of
        x0 closest to the solution in the A-norm (so never farther than x = 0 in that norm)
    by_value : the group tasks get their rows of the vectors by value and return their new rows,
        which are written back here (workers that share neither memory nor coherent files with
        this process); same result, bit for bit
    share : with ``by_value``, a function that hands the whole t to the executor once a phase (a
        Dask executor's scatter); by default it travels with each call

    Returns
    -------
    SweepCGResult
    """
    if not 0.0 < omega < 2.0:
        raise ValueError(f"omega must lie strictly between 0 and 2; got {omega}")
    omega = float(omega)
    kern = kernels or compiled_kernels()
    sysm = system
    n = sysm.n
    s = sysm.s
    b = np.asarray(b, dtype=np.float64).reshape(n, -1)
    c = b.shape[1]
    bounds = sysm.bounds
    groups = list(zip(bounds[:-1].tolist(), bounds[1:].tolist()))
    work = work or Work.allocate(n, c)
    nb = float(np.linalg.norm(b))
    if nb == 0.0:
        work.x[:] = 0.0
        return SweepCGResult(np.zeros((n, c)), STATUS_CONVERGED, 0, [0.0], [(0, 0.0)])
    bs = s[:, None] * b

    # hand the largest groups to the workers first (longest-processing-time rule); the groups'
    # results are still combined in group order
    order = sorted(range(len(groups)), key=lambda j: (groups[j][0] - groups[j][1], j))

    sizes = [g1 - g0 for g0, g1 in groups]

    def sweep_map(fn, calls):
        return _map(executor, fn, calls, order, sizes)

    phases = (
        _ByValue(sweep_map, kern, sysm, groups, work, omega, share)
        if by_value
        else _InPlace(sweep_map, kern, sysm, groups, work, omega)
    )

    def forward_solve(v):
        """w = E^-1 v (one forward sweep with t = 0; p is scratch, ap and pap are by-products)."""
        work.t[:] = 0.0
        work.p[:] = v
        phases.phase2()
        return work.w

    def true_residual():
        return sysm.residual_norm(work.x, b) / nb

    if state is None:
        if x0 is None or not np.any(x0):
            work.x[:] = 0.0
            res0 = 1.0
            work.r[:] = forward_solve(bs)
        else:
            x0 = np.asarray(x0, dtype=np.float64).reshape(n, c)
            ax0 = sysm.matvec(x0)
            if scale_start:
                x0, ax0 = scaled_start(x0, ax0, b)
            work.x[:] = x0 / s[:, None]
            # r = E^-1 (bs - As xs) = E^-1 S (b - A x0)
            resid = b - ax0
            del ax0
            res0 = float(np.linalg.norm(resid)) / nb
            work.r[:] = forward_solve(s[:, None] * resid)
            del resid
        rho = np.sum(work.r**2, axis=0)
        # the preconditioned residual estimate is ||r_k|| / ||r_0|| times the true relative residual
        # at the start, i.e. ||r_k|| / nbhat (with x0 = 0, nbhat = ||E^-1 S b||)
        r0 = float(np.sqrt(rho.sum()))
        nbhat = r0 / res0 if res0 > 0 else 1.0
        work.p[:] = 0.0
        state = {
            "sweep": 0,
            "rho": rho,
            "beta": np.zeros(c),
            "nbhat": nbhat,
            "residuals": [r0 / nbhat if res0 > 0 else 0.0],
            "checks": [],
            "target": tol,
        }
    else:
        nbhat = float(state["nbhat"])
        state = {
            **state,
            "rho": np.asarray(state["rho"], dtype=np.float64),
            "beta": np.asarray(state["beta"], dtype=np.float64),
            "residuals": list(state["residuals"]),
            "checks": [tuple(ch) for ch in state["checks"]],
        }

    status = STATUS_MAX_SWEEPS
    if state["residuals"][-1] <= state["target"]:
        res = true_residual()
        state["checks"].append((state["sweep"], res))
        if res <= tol:
            status = STATUS_CONVERGED
    while status != STATUS_CONVERGED and state["sweep"] < max_sweeps:
        phases.phase1(state["beta"])
        pap = phases.phase2()
        rho = state["rho"]
        alpha = np.divide(rho, pap, out=np.zeros(c), where=pap > 0)
        rr = phases.phase3(alpha)
        state["beta"] = np.divide(rr, rho, out=np.zeros(c), where=rho > 0)
        state["rho"] = rr
        state["sweep"] += 1
        est = float(np.sqrt(rr.sum()) / nbhat)
        state["residuals"].append(est)
        if est <= state["target"]:
            res = true_residual()
            state["checks"].append((state["sweep"], res))
            if res <= tol:
                status = STATUS_CONVERGED
            else:
                state["target"] = est * max(0.05, tol / res)
        if on_sweep is not None and on_sweep(state, work) is False and status != STATUS_CONVERGED:
            status = STATUS_STOPPED
            break
    if status == STATUS_MAX_SWEEPS and (not state["checks"] or state["checks"][-1][0] != state["sweep"]):
        state["checks"].append((state["sweep"], true_residual()))
    x = s[:, None] * work.x
    return SweepCGResult(np.asarray(x), status, state["sweep"], state["residuals"], state["checks"])
