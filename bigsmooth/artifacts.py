"""The artifact catalogue: every file of a run directory (and the names the output folder uses),
declared once with the stage that writes it, its path relative to the run directory and its kind.

Stages and commands ask the catalogue for paths and loaders (``EMBED_SCORES.load(rundir)``); no
artifact file name is spelled anywhere else (tests/stages/test_artifacts.py checks that with grep). The
map of which stage reads what is in DEVELOPERS.md.

Kinds: ``npy`` (one array; loaded memory-mapped on request), ``json``, ``csr`` (a CSR triplet of
.npy files indptr / indices / data, loaded as scipy CSR), ``npz``, ``dir`` (a folder of .npy files
named by member), ``png`` and ``html`` (bytes).
"""

import os
from dataclasses import dataclass

import numpy as np

from . import atomic

# names in the run directory and in the output folder that are not a stage's artifact
MANIFEST = "manifest.json"
LOCK = ".lock"
OUTPUT_AUDIT = "_audit.json"
OUTPUT_REPORT = "_report.html"
OUTPUT_POINTER = "CURRENT"
OUTPUT_LINK = "current"
DEMO_RECORD = ".demo.json"
CSR_PARTS = ("indptr", "indices", "data")


def member_file(folder, name):
    """A member file of a ``dir`` artifact that lives elsewhere (e.g. the solver's vectors in /dev/shm)."""
    return os.path.join(folder, f"{name}.npy")


def _root(rundir):
    return rundir.path if hasattr(rundir, "path") else os.fspath(rundir)


@dataclass(frozen=True)
class Artifact:
    key: str
    stage: str  # the stage (or command) that writes it
    rel: str  # path relative to the run directory
    kind: str
    doc: str

    def path(self, rundir, member=None):
        """Absolute path; for ``dir`` and ``csr`` artifacts, of one member (``name`` -> ``name.npy``)."""
        p = os.path.join(_root(rundir), self.rel)
        return p if member is None else member_file(p, member)

    def exists(self, rundir):
        if self.kind == "csr":
            return all(os.path.exists(self.path(rundir, m)) for m in CSR_PARTS)
        return os.path.exists(self.path(rundir))

    def exists_member(self, rundir, member):
        return os.path.exists(self.path(rundir, member))

    def folder(self, rundir):
        """The folder that holds it (created)."""
        d = self.path(rundir) if self.kind in ("dir", "csr") else os.path.dirname(self.path(rundir))
        os.makedirs(d, exist_ok=True)
        return d

    def load(self, rundir, mmap=False, member=None):
        if self.kind == "json":
            return atomic.read_json(self.path(rundir))
        if self.kind in ("npy", "dir"):
            return np.load(self.path(rundir, member), mmap_mode="r" if mmap else None)
        if self.kind == "csr":
            import scipy.sparse as sp

            indptr, indices, data = (
                np.load(self.path(rundir, m), mmap_mode="r" if mmap else None) for m in CSR_PARTS
            )
            n = len(indptr) - 1
            return sp.csr_matrix((data, indices, indptr), shape=(n, n))
        if self.kind == "npz":
            with np.load(self.path(rundir)) as z:
                return {k: z[k] for k in z.files}
        with open(self.path(rundir), "rb") as fh:
            return fh.read()

    def rows(self, rundir, member=None):
        """A :class:`RowReader` on an ``npy`` (or ``dir`` member) artifact; for a ``csr`` artifact a
        :class:`CsrReader`."""
        if self.kind == "csr":
            return CsrReader(*(self.path(rundir, m) for m in CSR_PARTS))
        return RowReader(self.path(rundir, member))

    def save(self, rundir, value, member=None):
        """Write atomically (temporary sibling, fsync, rename)."""
        self.folder(rundir)
        if self.kind == "json":
            atomic.write_json(self.path(rundir), value)
        elif self.kind in ("npy", "dir"):
            atomic.save_npy(self.path(rundir, member), value)
        elif self.kind == "csr":
            atomic.save_npy(self.path(rundir, "indptr"), value.indptr.astype(np.int64))
            atomic.save_npy(self.path(rundir, "indices"), value.indices.astype(index_dtype(value.shape[0])))
            atomic.save_npy(self.path(rundir, "data"), value.data)
        else:
            atomic.write_bytes(self.path(rundir), value)


def index_dtype(n):
    """The dtype of a stored CSR's column indices: int32 while the row count fits (scipy would
    convert int64 indices to int32 on loading, a copy of the whole array), else int64."""
    return np.int32 if n < np.iinfo(np.int32).max else np.int64


class RowReader:
    """Rows of a .npy file read on demand: ``reader[a:b]`` reads that run of rows at its offset,
    any other key maps the file, copies the rows asked for and unmaps it, so a pass over a large
    array in blocks keeps only the current block in the process's resident memory (a long-lived
    memory map would keep every page it touched).
    Kernels take it like an array (``shape``, ``dtype``, ``len``, slices and index arrays)."""

    def __init__(self, path):
        self.path = path
        with open(path, "rb") as fh:  # the header only: readers are made once per block in loops
            major, _ = np.lib.format.read_magic(fh)
            read = np.lib.format.read_array_header_1_0 if major == 1 else np.lib.format.read_array_header_2_0
            self.shape, self._fortran, self.dtype = read(fh)
            self._offset = fh.tell()

    def __len__(self):
        return self.shape[0]

    def __getitem__(self, key):
        if isinstance(key, slice) and not self._fortran and not self.dtype.hasobject and self.shape:
            start, stop, step = key.indices(self.shape[0])
            if step == 1:
                # a run of rows: one read at its offset (no mapping: the pages stay in the page
                # cache, not in the process; measured on 400 kB slices of small files: about 3x
                # faster than mapping the file for each slice)
                rows = max(0, stop - start)
                width = int(np.prod(self.shape[1:], dtype=np.int64))
                with open(self.path, "rb") as fh:
                    out = np.fromfile(
                        fh,
                        dtype=self.dtype,
                        count=rows * width,
                        offset=self._offset + start * width * self.dtype.itemsize,
                    )
                return out.reshape((rows,) + tuple(self.shape[1:]))
        m = np.load(self.path, mmap_mode="r")
        try:
            return np.array(m[key])
        finally:
            del m


class CsrReader:
    """A stored CSR matrix for passes over row blocks: ``indptr`` in memory, ``indices`` and
    ``data`` as :class:`RowReader` (sliced by a block's entry range), ``shape`` and ``nnz``."""

    def __init__(self, indptr, indices, data):
        self.indptr = np.load(indptr)
        self.indices = RowReader(indices)
        self.data = RowReader(data)
        n = len(self.indptr) - 1
        self.shape = (n, n)
        self.nnz = int(self.indptr[-1])


CATALOGUE = {}


def _a(key, stage, rel, kind, doc):
    art = CATALOGUE[key] = Artifact(key, stage, rel, kind, doc)
    return art


SCAN_INFO = _a(
    "scan.info",
    "scan",
    "scan/scan.json",
    "json",
    "rows, files, column types, levels of categorical and protected columns, per-file id digests",
)
EMBED_SCORES = _a(
    "embed.scores", "embed", "embed/scores.npy", "npy", "raw scores (n, score columns), float64"
)
EMBED_LABEL = _a("embed.label", "embed", "embed/label.npy", "npy", "labels (n,), NaN where unknown")
EMBED_PROTECTED = _a(
    "embed.protected", "embed", "embed/protected.npy", "npy", "protected level codes (n, attributes)"
)
EMBED_COMPARE = _a(
    "embed.compare",
    "embed",
    "embed/compare.npy",
    "npy",
    "compare_scores then the counterfactual score (n, columns)",
)
EMBED_EMBEDDING = _a(
    "embed.embedding", "embed", "embed/embedding.npy", "npy", "fair-space embedding (n, dim), float32"
)
EMBED_INFO = _a(
    "embed.info", "embed", "embed/embed.json", "json", "features, fair space transform, leakage probe"
)
GRAPH_NEIGHBOURS = _a(
    "graph.neighbours", "graph", "graph/neighbours.npy", "npy", "k nearest neighbours (n, k)"
)
GRAPH_DISTANCES = _a(
    "graph.distances", "graph", "graph/distances.npy", "npy", "their fair-space distances (n, k)"
)
GRAPH_WEIGHTS = _a("graph.weights", "graph", "graph", "csr", "symmetric heat-kernel weight matrix W")
GRAPH_PARTS = _a(
    "graph.parts",
    "graph",
    "graph/parts",
    "dir",
    "partitioned build: membership (n, overlap), rows and ptr of each partition, and each partition's "
    "search result p<NNNNNN>-ind / -dist",
)
GRAPH_SCRATCH = _a(
    "graph.scratch",
    "graph",
    "graph/scratch",
    "dir",
    "the graph stage's working files (float64 distances, edge shards); removed when the stage is done",
)
GRAPH_INFO = _a("graph.info", "graph", "graph/graph.json", "json", "edges, degrees, sigma, isolated rows")
ORDER_PERM = _a("order.perm", "order", "order/order.npy", "npy", "solver row order: position -> input row")
ORDER_GROUPS = _a(
    "order.groups", "order", "order/groups.npy", "npy", "block group boundaries in solver order"
)
ORDER_SPLIT = _a(
    "order.split",
    "order",
    "order/split",
    "dir",
    "the permuted graph split into couplings inside / between groups (memory-mapped)",
)
SOLVE_SYSTEM = _a(
    "solve.system", "solve", "solve/system", "dir", "the split graph scaled for lam (memory-mapped)"
)
SOLVE_WORK = _a(
    "solve.work", "solve", "solve/work", "dir", "process workers' vectors when /dev/shm has no room"
)
SOLVE_X0 = _a("solve.x0", "solve", "solve/x0.npy", "npy", "warm start: the starting iterate")
SOLVE_X0_INFO = _a("solve.x0_info", "solve", "solve/x0.npy.json", "json", "warm start: rows matched and new")
SOLVE_ANCHOR = _a(
    "solve.anchor",
    "solve",
    "solve/last-night",
    "dir",
    "solve.stability: the anchored rows (member rows) and last night's adjusted scores they are pulled towards (member target)",
)
SOLVE_ANCHOR_INFO = _a(
    "solve.anchor_info",
    "solve",
    "solve/anchor.json",
    "json",
    "solve.stability: the version and rows anchored",
)
SOLVE_CHECKPOINT = _a(
    "solve.checkpoint", "solve", "checkpoint/solver.npz", "npz", "solver state after the last sweep"
)
SOLVE_ADJUSTED = _a(
    "solve.adjusted", "solve", "solve/adjusted.npy", "npy", "adjusted scores (n, score columns)"
)
SOLVE_INFO = _a("solve.info", "solve", "solve/solve.json", "json", "convergence record")
AUDIT_VECTORS = _a(
    "audit.vectors",
    "audit",
    "audit/vectors.npy",
    "npy",
    "the score vectors the audit's neighbour figures are taken on (vectors, n), for its block tasks; removed when the stage is done",
)
AUDIT_REPORT_JSON = _a(
    "audit.record", "audit", "audit/audit.json", "json", "the audit (copied to the output)"
)
AUDIT_REPORT_HTML = _a(
    "audit.page", "audit", "audit/report.html", "html", "the report (copied to the output)"
)
PUBLISH_PENDING = _a(
    "publish.pending",
    "audit",
    "publish/pending.json",
    "json",
    "the output version's name, chosen by the audit, used by publish",
)
LATE_CELLS = _a(
    "late.cells",
    "score",
    "late/cells",
    "dir",
    "late-row index (bigsmooth score), built on first use: cell centres; codes (the coded index, "
    "faiss-serialised); for nights searched by exact cells, ptr, night rows in cell order, their "
    "fair-space rows in that order and squared norms",
)
TUNE_INFO = _a("tune.info", "tune", "tune/tune.json", "json", "lam path and recommendation (bigsmooth tune)")
TUNE_PLOT = _a("tune.plot", "tune", "tune/tradeoff.png", "png", "trade-off plot (bigsmooth tune)")


def load_split(rundir):
    """The order stage's :class:`~bigsmooth.kernels.sweepcg.SplitGraph` (arrays memory-mapped)."""
    from .kernels import sweepcg

    def arr(name):
        return ORDER_SPLIT.load(rundir, mmap=True, member=name)

    parts = [tuple(arr(f"{x}-{k}") for k in ("indptr", "indices", "weight")) for x in "LUO"]
    return sweepcg.SplitGraph(arr("degree"), ORDER_GROUPS.load(rundir), *parts)
