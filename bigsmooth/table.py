"""The input table: finding the Parquet files, fingerprinting them, and streaming them with DuckDB.

Rows get a stable index independent of DuckDB's scan order: files are sorted by path, each file's
rows are numbered by their position in the file (DuckDB's ``file_row_number``), and the row index
is the file's offset (from the Parquet footers) plus that position. Every identifier that goes into
SQL is quoted; every value (paths, lists) is passed as a parameter.
"""

import glob
import hashlib
import json
import logging
import os

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from .errors import DataError, InputMissingError

log = logging.getLogger("bigsmooth.table")

ROW = "__bigsmooth_row"
FILE_COL = "__bigsmooth_file"  # DuckDB's file name column, under a name no input column takes
RESERVED_COLUMNS = ("file_row_number", ROW, FILE_COL)  # DuckDB's row-number option cannot be renamed


def quote(name):
    """Quote an SQL identifier (doubling embedded quotes)."""
    return '"' + str(name).replace('"', '""') + '"'


def _walk_parquet(root):
    """Parquet files under ``root`` (any case of the .parquet ending; hidden and _-prefixed names
    skipped), following links to folders but refusing a folder reached twice (a link loop)."""
    files, seen = [], {}
    for dirpath, dirnames, filenames in os.walk(root, followlinks=True):
        st = os.stat(dirpath)
        key = (st.st_dev, st.st_ino)
        if key in seen:
            raise InputMissingError(
                f"input folder {root}: the folder {seen[key]} is reached again as {dirpath} "
                "(a symbolic link loop or a second link to it); remove the link so that "
                "every file is read once"
            )
        seen[key] = dirpath
        dirnames[:] = sorted(d for d in dirnames if not d.startswith((".", "_")))
        files += [
            os.path.join(dirpath, f)
            for f in filenames
            if f.lower().endswith(".parquet") and not f.startswith((".", "_"))
        ]
    return [os.path.abspath(f) for f in files if os.path.isfile(f)]


def resolve_files(path):
    """Sorted absolute paths of the Parquet files named by a file, folder or glob."""
    if any(c in path for c in "*?["):
        files = [os.path.abspath(f) for f in glob.glob(path, recursive=True) if os.path.isfile(f)]
        if not files:
            raise InputMissingError(f"input.path {path!r} matches no files")
    elif os.path.isdir(path):
        files = _walk_parquet(path)
        if not files:
            raise InputMissingError(f"input folder {path} holds no .parquet files")
    elif os.path.isfile(path):
        files = [os.path.abspath(path)]
    else:
        raise InputMissingError(f"input.path {path} does not exist")
    real = {}
    for f in files:
        r = os.path.realpath(f)
        if r in real:
            raise InputMissingError(
                f"the input file {r} is reached twice, as {real[r]} and as {f} (a symbolic "
                "link?); every file must be read once"
            )
        real[r] = f
    for f in files:
        if not os.access(f, os.R_OK):
            raise InputMissingError(f"input file {f} is not readable (permissions)")
    return sorted(files)


def input_root(path, files):
    """The folder that output paths mirror: the input folder, or the files' common folder."""
    if os.path.isdir(path) and not any(c in path for c in "*?["):
        return os.path.abspath(path)
    return (
        os.path.dirname(os.path.commonpath(files))
        if len(files) == 1
        else os.path.commonpath([os.path.dirname(f) for f in files])
    )


def footer_hash(path):
    """sha256 of a Parquet file's footer (schema, row groups, column statistics): changes with the
    content of almost any rewrite, read in one small seek."""
    with open(path, "rb") as fh:
        fh.seek(-8, os.SEEK_END)
        tail = fh.read(8)
        size = int.from_bytes(tail[:4], "little")
        fh.seek(-(8 + size), os.SEEK_END)
        return hashlib.sha256(fh.read(size)).hexdigest()[:32]


def verify_unchanged(fp, when):
    """Raise DataError if any input file changed since the run's fingerprint was taken (size, mtime,
    footer): a stage must never read a file other than the one the earlier stages read."""
    lines = []
    for e in fp["files"]:
        try:
            st = os.stat(e["path"])
            same = (
                st.st_size == e["size"]
                and st.st_mtime_ns == e["mtime_ns"]
                and footer_hash(e["path"]) == e["footer"]
            )
        except (OSError, ValueError):
            lines.append(f"removed or unreadable: {e['path']}")
            continue
        if not same:
            lines.append(f"changed: {e['path']}")
    if lines:
        raise DataError(
            f"{len(lines)} input file(s) changed while the job was running ({when}):\n  "
            + "\n  ".join(lines[:10])
            + "\nNothing was published. Run the job again once the input "
            "is complete; it starts a fresh run on the new files."
        )


def unreadable_files(fp, limit=5):
    """[(path, first line of the error)] for input files whose data cannot be decoded, found by
    reading each file whole (the error path only: a failed read of several files does not say which
    one failed)."""
    import duckdb

    con = connect()
    bad = []
    for e in fp["files"]:
        try:
            reader = con.sql("SELECT * FROM read_parquet($f)", params={"f": e["path"]}).to_arrow_reader(65536)
            for _ in reader:
                pass
            pq.ParquetFile(e["path"]).read()
        except (duckdb.Error, pa.ArrowException, OSError) as exc:
            bad.append((e["path"], (str(exc).splitlines() or [type(exc).__name__])[0]))
            if len(bad) >= limit:
                break
    return bad


def id_digests(con, fp, id_col):
    """{path: order-sensitive digest of the file's ids}: the xor over rows of a hash of the text
    "id:row number in the file" (one string, so that swapping two ids changes it; a hash of the two
    values as separate arguments combined them so that the xor over rows lost the order)."""
    rows = con.execute(
        f"SELECT {FILE_COL}, bit_xor(hash(CAST({quote(id_col)} AS VARCHAR) || ':' || CAST(file_row_number AS VARCHAR))) FROM read_parquet("
        f"$files, hive_partitioning = true, union_by_name = true, filename = '{FILE_COL}', "
        f"file_row_number = true) GROUP BY {FILE_COL}",
        {"files": [e["path"] for e in fp["files"]]},
    ).fetchall()
    return {path: str(d) for path, d in rows}


def portable(fp):
    """The fingerprint with each file's path relative to the input root (as stored in a run's
    manifest, so that a host that mounts the input elsewhere can read it): ``rel`` instead of ``path``."""
    files = [
        {**{k: v for k, v in e.items() if k != "path"}, "rel": os.path.relpath(e["path"], fp["root"])}
        for e in fp["files"]
    ]
    return {**fp, "files": files}


def _rel(entry, root):
    return entry["rel"] if "rel" in entry else os.path.relpath(entry["path"], root)


def changed_files(old, new):
    """Lines saying which input files differ between two fingerprints (added, removed, changed);
    files are matched by their path relative to the input root."""
    a = {_rel(e, old["root"]): e for e in old["files"]}
    b = {_rel(e, new["root"]): e for e in new["files"]}
    lines = [f"added:   {p}" for p in sorted(set(b) - set(a))]
    lines += [f"removed: {p}" for p in sorted(set(a) - set(b))]
    for p in sorted(set(a) & set(b)):
        what = [k for k in ("size", "rows", "mtime_ns", "footer") if a[p].get(k) != b[p].get(k)]
        if what:
            lines.append(f"changed: {p} ({', '.join(what)})")
    return lines


def fingerprint(path):
    """Paths, sizes and footer row counts of the input; a hash of them identifies the input. The hash
    takes each file's path relative to the input root, so the same files moved or mounted elsewhere
    keep their identity (and the run that read them)."""
    files = resolve_files(path)
    entries = []
    offset = 0
    bad = []
    for f in files:
        try:
            rows = pq.ParquetFile(f).metadata.num_rows
        except (OSError, pa.ArrowException) as exc:
            bad.append((f, str(exc).splitlines()[0] if str(exc) else type(exc).__name__))
            continue
        st = os.stat(f)
        entries.append(
            {
                "path": f,
                "size": st.st_size,
                "mtime_ns": st.st_mtime_ns,
                "footer": footer_hash(f),
                "rows": rows,
                "offset": offset,
            }
        )
        offset += rows
    if bad:
        lines = "\n".join(f"  {f}: {why}" for f, why in bad[:5])
        raise InputMissingError(
            f"{len(bad)} of {len(files)} input files are not readable Parquet "
            f"(truncated or corrupt?):\n{lines}\nReplace or remove them and run again."
        )
    root = input_root(path, files)
    digest = hashlib.sha256(
        json.dumps(
            [
                (os.path.relpath(e["path"], root), e["size"], e["mtime_ns"], e["footer"], e["rows"])
                for e in entries
            ]
        ).encode()
    ).hexdigest()
    return {"root": root, "files": entries, "rows": offset, "hash": digest}


UNIT_ROWS = 8192


def batch_rows_for(memory_mb, columns):
    """Rows per streamed chunk for a memory budget: a quarter of it for about three float64 copies
    of each of ``columns`` encoded columns per row (Arrow chunk, numpy features, the embedding),
    a multiple of :data:`UNIT_ROWS` between 8,192 and 1,048,576 rows."""
    per_row = 3 * 8 * max(1, columns)
    rows = memory_mb * (1 << 20) // 4 // per_row
    return int(min(1 << 20, max(UNIT_ROWS, rows // UNIT_ROWS * UNIT_ROWS)))


def units(n):
    """Slices of a chunk of n rows in pieces of :data:`UNIT_ROWS`: every sum over the table is
    taken piece by piece in row order, so the chunk size (a multiple of the unit) never changes
    a result."""
    return [slice(a, min(a + UNIT_ROWS, n)) for a in range(0, n, UNIT_ROWS)]


def connect_budget(memory_mb):
    """A DuckDB connection whose memory_limit is a quarter of the budget."""
    return connect(memory_limit=memory_mb * (1 << 20) // 4)


def connect(threads=None, memory_limit=None):
    import duckdb

    con = duckdb.connect()
    if threads:
        con.execute(f"SET threads = {int(threads)}")
    if memory_limit:
        con.execute(f"SET memory_limit = '{int(memory_limit)}B'")
    return con


class Source:
    """The input as a FROM-clause fragment with the stable row index column :data:`ROW`.

    Queries name the input as ``{src}`` (see :meth:`fetch` and :meth:`relation`); the file list
    travels as the ``$files`` parameter, never as SQL text.

    ``can_have_nan = true``: Parquet min/max statistics leave NaN out (as the format says), and
    without this DuckDB prunes on them and silently drops NaN rows from filters (DuckDB issue
    #25521, open at the time of writing); a NaN score must be found, not skipped.
    """

    def __init__(self, con, fp):
        self.files = fp["files"]
        offsets = pa.table(
            {
                FILE_COL: [e["path"] for e in fp["files"]],
                "__offset": pa.array([e["offset"] for e in fp["files"]], pa.int64()),
            }
        )
        con.register("__bigsmooth_offsets", offsets)
        self.params = {"files": [e["path"] for e in fp["files"]]}
        self.sql = (
            f"(SELECT o.__offset + t.file_row_number AS {ROW}, "
            f"t.* EXCLUDE ({FILE_COL}, file_row_number) "
            f"FROM read_parquet($files, hive_partitioning = true, union_by_name = true, "
            f"filename = '{FILE_COL}', file_row_number = true, can_have_nan = true) t "
            f"JOIN __bigsmooth_offsets o USING ({FILE_COL})) AS src"
        )

    def fetch(self, con, sql, **params):
        """Run a query whose FROM names ``{src}``; return all result rows as tuples."""
        return con.execute(sql.replace("{src}", self.sql), {**self.params, **params}).fetchall()

    def fetch_arrow(self, con, sql, **params):
        """As :meth:`fetch`, returning a pyarrow Table (for results with many rows)."""
        return con.sql(sql.replace("{src}", self.sql), params={**self.params, **params}).to_arrow_table()

    def chunks(self, con, select, batch_rows):
        """Stream the table file by file in fixed chunks: yields (rows, pyarrow.Table).

        ``select`` is the column list of a SELECT (quoted identifiers / casts); the stable row index
        is added as :data:`ROW`. Each file is a plain single-file scan, whose order DuckDB keeps
        (preserve_insertion_order); the row index comes from ``file_row_number`` and is checked to
        run 0, 1, 2, ... so that a change in DuckDB's behaviour fails loudly instead of silently.
        Chunks hold exactly ``batch_rows`` rows (fewer at the end of a file), so that the same input
        is always cut the same way and every sum over chunks adds the same numbers in the same order.
        """
        con.execute("SET preserve_insertion_order = true")
        for e in self.files:
            if e["rows"] == 0:  # nothing to stream (its schema may even lack the columns)
                continue
            rel = con.sql(
                f"SELECT file_row_number AS {ROW}, {select} FROM read_parquet($file, "
                f"hive_partitioning = true, file_row_number = true, can_have_nan = true)",
                params={"file": e["path"]},
            )
            pending, have, expect = [], 0, 0
            for batch in rel.to_arrow_reader(batch_rows):
                if not batch.num_rows:
                    continue
                pending.append(batch)
                have += batch.num_rows
                while have >= batch_rows:
                    table = pa.Table.from_batches(pending)
                    head, rest = table.slice(0, batch_rows), table.slice(batch_rows)
                    expect = yield_check(head, e, expect)
                    yield e["offset"] + head.column(ROW).to_numpy(), head
                    pending, have = rest.to_batches(), rest.num_rows
            if have:
                table = pa.Table.from_batches(pending)
                expect = yield_check(table, e, expect)
                yield e["offset"] + table.column(ROW).to_numpy(), table
            if expect != e["rows"]:
                raise RuntimeError(f"{e['path']}: streamed {expect} rows; the footer says {e['rows']}")


def yield_check(table, entry, expect):
    """Check that a chunk's file row numbers continue the file's sequence; return the next one."""
    rows = table.column(ROW).to_numpy()
    if rows[0] != expect or (len(rows) > 1 and not np.all(np.diff(rows) == 1)):
        raise RuntimeError(
            f"{entry['path']}: DuckDB returned rows out of file order near row {expect}; "
            "refusing to continue (row order must be deterministic)"
        )
    return expect + len(rows)


def ids_at_rows(fp, id_col, rows):
    """Look up the ids of a few row indices by reading only the files that hold them."""
    import bisect

    starts = [e["offset"] for e in fp["files"]]
    out = {}
    by_file = {}
    for r in rows:
        i = bisect.bisect_right(starts, int(r)) - 1
        by_file.setdefault(i, []).append(int(r))
    for i, rs in by_file.items():
        e = fp["files"][i]
        col = pq.read_table(e["path"], columns=[id_col]).column(0)
        for r in rs:
            out[r] = col[r - e["offset"]].as_py()
    return [out[int(r)] for r in rows]


def pair_rows(con, src, pairs, id_col):
    """The comparable pairs of the Parquet file ``pairs`` (id_a, id_b, optional weight) as row
    numbers of the table behind ``src``: (rows a, rows b, weights (ones without a weight column),
    pairs in the file, up to 5 ids of pairs that name ids not in the table). Pairs whose ids are
    missing are left out; pairs of a row with itself are left out too."""
    import duckdb

    cols = [r[0] for r in con.execute("DESCRIBE SELECT * FROM read_parquet($p)", {"p": pairs}).fetchall()]
    wcol = "CAST(p.weight AS DOUBLE)" if "weight" in cols else "1.0"
    idq = quote(id_col)
    got = src.fetch_arrow(
        con,
        f"SELECT a.{ROW} AS ra, b.{ROW} AS rb, {wcol} AS w FROM read_parquet($pairs) p "
        f"JOIN (SELECT {ROW}, {idq} FROM {{src}}) a ON p.id_a = a.{idq} "
        f"JOIN (SELECT {ROW}, {idq} FROM {{src}}) b ON p.id_b = b.{idq} ORDER BY ra, rb",
        pairs=pairs,
    )
    total = con.execute("SELECT count(*) FROM read_parquet($p)", {"p": pairs}).fetchall()[0][0]
    unknown = []
    if got.num_rows < total:
        try:
            unknown = [
                r[0]
                for r in src.fetch(
                    con,
                    f"SELECT v FROM (SELECT id_a AS v FROM read_parquet($pairs) UNION ALL SELECT id_b FROM "
                    f"read_parquet($pairs)) WHERE v NOT IN (SELECT {idq} FROM {{src}}) ORDER BY v LIMIT 5",
                    pairs=pairs,
                )
            ]
        except duckdb.Error:
            unknown = []
    ra, rb = got.column("ra").to_numpy(), got.column("rb").to_numpy()
    w = got.column("w").to_numpy(zero_copy_only=False).astype(np.float64)
    keep = ra != rb
    return ra[keep], rb[keep], w[keep], int(total), unknown
