"""scan: check the table against the config with DuckDB before any heavy work.

Checks that every configured column exists with a usable type, then counts in one pass: rows,
null ids, duplicate ids, null/NaN/inf scores and numeric features, scores outside the declared
range, and label values that are not 0/1. Collects the levels of categorical and protected columns.
Every problem is reported at once, each with its count and a few example ids.
"""

import difflib
import logging
import os
import re

from .. import artifacts as art
from ..errors import ConfigError, DataError, InputMissingError, examples
from ..table import RESERVED_COLUMNS, Source, connect_budget, id_digests, quote

log = logging.getLogger("bigsmooth.scan")

NUMERIC_TYPES = (
    "TINYINT",
    "SMALLINT",
    "INTEGER",
    "BIGINT",
    "HUGEINT",
    "UTINYINT",
    "USMALLINT",
    "UINTEGER",
    "UBIGINT",
    "FLOAT",
    "DOUBLE",
    "BOOLEAN",
)
FLOAT_TYPES = ("FLOAT", "DOUBLE")
MAX_LEVELS = 1000
MAX_FEATURE = 1e100  # squares and sums of squares over billions of rows stay finite in float64
MISSING_LEVEL = "(missing)"


def _is_numeric(t):
    return t in NUMERIC_TYPES or t.startswith("DECIMAL")


def list_of_numbers(t):
    """For a DuckDB list or array type of numbers (FLOAT[], DOUBLE[24], ...): its fixed length, or 0
    for a list of any length; None for any other type."""
    m = re.fullmatch(r"(.+)\[(\d*)\]", t)
    if m is None or not _is_numeric(m.group(1)):
        return None
    return int(m.group(2) or 0)


def _is_float(t):
    return t in FLOAT_TYPES or t.startswith("DECIMAL")


def check_schema(columns, inp):
    """Compare configured columns with the table's {name: duckdb type}; raise on any mismatch."""
    problems = []
    wanted = (
        [("id", inp["id"])]
        + [("scores", c) for c in inp["scores"]]
        + [("compare_scores", c) for c in inp["compare_scores"]]
        + [
            ("counterfactual_score", c)
            for c in ([inp["counterfactual_score"]] if inp["counterfactual_score"] else [])
        ]
        + [("numeric_features", c) for c in inp["numeric_features"]]
        + [("categorical_features", c) for c in inp["categorical_features"]]
        + [("protected", c) for c in inp["protected"]]
        + ([("label", inp["label"])] if inp["label"] else [])
    )
    for role, col in wanted:
        if col not in columns:
            close = difflib.get_close_matches(col, list(columns), n=1, cutoff=0.6)
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            problems.append(f"input.{role}: column {col!r} is not in the table{hint}")
            continue
        t = columns[col]
        if role == "numeric_features" and list_of_numbers(t) is not None:
            pass  # a list of numbers (an embedding from an upstream model): one feature per position
        elif role in (
            "scores",
            "compare_scores",
            "counterfactual_score",
            "numeric_features",
            "label",
        ) and not _is_numeric(t):
            problems.append(f"input.{role}: column {col!r} has type {t}; a numeric type is needed")
        if role == "id" and not (t in NUMERIC_TYPES[:9] or t == "VARCHAR"):
            problems.append(f"input.id: column {col!r} has type {t}; an integer or string type is needed")
        if role in ("categorical_features", "protected") and (
            _is_float(t) or t.startswith(("STRUCT", "MAP", "LIST")) or t.endswith("[]")
        ):
            problems.append(
                f"input.{role}: column {col!r} has type {t}; a string, integer or boolean "
                "type is needed (bucket continuous values first)"
            )
    if problems:
        raise DataError(
            "the table does not match the config:\n  "
            + "\n  ".join(problems)
            + f"\nThe table's columns are: {', '.join(columns)}"
        )


def _check_pairs(con, path, id_col, id_type):
    import duckdb

    if not os.path.isfile(path):
        raise InputMissingError(f"input.pairs {path} does not exist")
    try:
        types = dict(
            (r[0], r[1])
            for r in con.execute("DESCRIBE SELECT * FROM read_parquet($p)", {"p": path}).fetchall()
        )
    except duckdb.Error as exc:
        raise InputMissingError(
            f"input.pairs {path} is not readable Parquet: {str(exc).splitlines()[0]}"
        ) from None
    missing = [c for c in ("id_a", "id_b") if c not in types]
    if missing:
        return [f"input.pairs {path} lacks column(s) {', '.join(missing)} (it has {', '.join(types)})"]
    want = "string" if id_type == "VARCHAR" else "integer"
    out = []
    for c in ("id_a", "id_b"):
        got = (
            "string" if types[c] == "VARCHAR" else ("integer" if types[c] in NUMERIC_TYPES[:9] else types[c])
        )
        if got != want:
            out.append(
                f"input.pairs {path}: column {c} has type {types[c]} but the id column {id_col!r} has type "
                f"{id_type}; write the pairs' ids with the table's id type"
            )
    return out


def _hive_keys(path, root):
    rel = os.path.relpath(os.path.dirname(path), root)
    return {part.split("=", 1)[0] for part in rel.split(os.sep) if "=" in part}


def _kind(t):
    """integer / string / other, for comparing a column's Arrow type across files."""
    import pyarrow as pa

    if pa.types.is_integer(t):
        return "integer"
    if pa.types.is_string(t) or pa.types.is_large_string(t) or pa.types.is_string_view(t):
        return "string"
    return str(t)


def check_files(fp, inp):
    """Checks of each file's own schema (its footer), before DuckDB reads the files together: no
    column twice, no column named as DuckDB's row numbering, no hive folder key that is also a
    column inside the file (DuckDB would silently take the folder's value), one kind of id type."""
    import pyarrow.parquet as pq

    problems, id_kinds = [], {}
    for e in fp["files"]:
        schema = pq.read_schema(e["path"])
        names = schema.names
        twice = sorted({n for n in names if names.count(n) > 1})
        if twice:
            problems.append(
                f"{e['path']}: column(s) {', '.join(map(repr, twice))} appear more than once in the file"
            )
        reserved = [n for n in names if n in RESERVED_COLUMNS]
        if reserved:
            problems.append(
                f"{e['path']}: column {reserved[0]!r} has a name bigsmooth needs for its own row "
                "numbering; rename the column"
            )
        clash = sorted(_hive_keys(e["path"], fp["root"]) & set(names))
        if clash:
            problems.append(
                f"{e['path']}: {', '.join(map(repr, clash))} is both a partition folder key (in the "
                "path) and a column inside the file; the folder value would silently replace the "
                "file's. Rename the folder key or the column"
            )
        if inp["id"] in names and not twice:
            id_kinds.setdefault(_kind(schema.field(inp["id"]).type), []).append(e["path"])
        if len(problems) >= 10:
            break
    if len(id_kinds) > 1:
        listing = "; ".join(f"{k} in {len(v)} file(s), e.g. {v[0]}" for k, v in sorted(id_kinds.items()))
        problems.append(
            f"the id column {inp['id']!r} has different types in different files ({listing}); the "
            "output could not be read back as one dataset. Write one type in every file"
        )
    if problems:
        raise DataError(
            f"{len(problems)} problem(s) in the input files' schemas:\n  " + "\n  ".join(problems)
        )


ID_BYTES = 200  # DuckDB memory per distinct id, an upper estimate (1 GB held 10M demo ids, not 30M)


def _id_slices(idq, rows, memory_mb):
    """SQL conditions cutting the ids into slices by hash, each small enough for the distinct-id
    count and the duplicate listing to fit DuckDB's memory limit (a quarter of the budget): one
    slice ("true") while the whole table fits. DuckDB's distinct count over one table does not
    spill to disk; measured at 30M demo ids it ran out of a 1 GB limit."""
    per = max(1, (memory_mb << 20) // 4 // ID_BYTES)
    parts = -(-rows // per)
    if parts <= 1:
        return ["true"]
    return [f"hash({idq}) % {parts} = {p}" for p in range(parts)]


def list_lengths(con, src, cols, inp):
    """{numeric feature: its lists' length} for the features that are lists of numbers: the fixed
    length of an array type, else the most common length (rows of another length are bad data)."""
    out = {}
    for c in inp["numeric_features"]:
        fixed = list_of_numbers(cols.get(c, ""))
        if fixed is None:
            continue
        if not fixed:
            q = quote(c)
            row = src.fetch(
                con,
                f"SELECT len({q}) AS l, count(*) AS k FROM {{src}} WHERE {q} IS NOT NULL GROUP BY l ORDER BY k DESC, l LIMIT 1",
            )
            fixed = int(row[0][0]) if row else 0
        out[c] = fixed
    return out


def row_problems(con, src, cols, inp, n, memory_mb, lengths=None):
    """The per-row checks of the table behind ``src`` (a :class:`~bigsmooth.table.Source`) with
    DuckDB types ``cols``: (total rows, problems), each problem a line with its count and example
    ids (null ids, null / NaN / infinite / out-of-range scores, bad numeric features, labels other
    than 0/1, duplicate ids). Shared by the scan stage and ``bigsmooth score`` (late rows), so both
    refuse the same rows with the same words. ``lengths``: the lengths list features must have
    (default: each one's most common length in this table)."""
    idq = quote(inp["id"])
    lo, hi = inp["score_range"]
    checks = [(f"{idq} IS NULL", "null id", False)]
    for c in (
        inp["scores"]
        + inp["compare_scores"]
        + ([inp["counterfactual_score"]] if inp["counterfactual_score"] else [])
    ):
        q = quote(c)
        checks.append((f"{q} IS NULL", f"null score in {c!r}", True))
        if _is_float(cols[c]):
            checks.append((f"isnan({q}) OR isinf({q})", f"NaN or infinite score in {c!r}", True))
        # DuckDB orders NaN above every number, so NaN is left to the check above
        checks.append(
            (
                f"(CAST({q} AS DOUBLE) < $lo OR (CAST({q} AS DOUBLE) > $hi AND NOT isnan(CAST({q} AS DOUBLE))))",
                f"score in {c!r} outside the declared score_range [{lo:g}, {hi:g}]",
                True,
            )
        )
    lengths = list_lengths(con, src, cols, inp) if lengths is None else lengths
    for c in inp["numeric_features"]:
        q = quote(c)
        if c in lengths:
            checks.append((f"{q} IS NULL", f"null list in numeric feature {c!r}", True))
            checks.append(
                (
                    f"len({q}) <> {lengths[c]}",
                    f"list of the wrong length in numeric feature {c!r} (the table's lists have {lengths[c]} values)",
                    True,
                )
            )
            x = "CAST(x AS DOUBLE)"
            checks.append(
                (
                    f"list_bool_or(list_transform({q}, lambda x: x IS NULL OR isnan({x}) OR isinf({x}) OR abs({x}) > "
                    f"{MAX_FEATURE:g}))",
                    f"null, NaN, infinite or too large value inside the list of numeric feature {c!r}",
                    True,
                )
            )
            continue
        checks.append((f"{q} IS NULL", f"null value in numeric feature {c!r}", True))
        if _is_float(cols[c]):
            checks.append(
                (f"isnan({q}) OR isinf({q})", f"NaN or infinite value in numeric feature {c!r}", True)
            )
        checks.append(
            (
                f"abs(CAST({q} AS DOUBLE)) > {MAX_FEATURE:g}",
                f"value in numeric feature {c!r} beyond +-{MAX_FEATURE:g} (too large for the statistics in "
                "float64; rescale the feature)",
                True,
            )
        )
    if inp["label"]:
        q = quote(inp["label"])
        checks.append(
            (
                f"{q} IS NOT NULL AND CAST({q} AS DOUBLE) NOT IN (0, 1)",
                f"label {inp['label']!r} value other than 0, 1 or null",
                True,
            )
        )
    agg = ", ".join(f"count(*) FILTER (WHERE {cond})" for cond, _, _ in checks)
    rng = {"lo": lo, "hi": hi}
    counts = src.fetch(con, f"SELECT count(*), {agg} FROM {{src}}", **rng)[0]
    total, bad = counts[0], counts[1:]
    slices = _id_slices(idq, n, memory_mb)
    distinct = sum(
        src.fetch(con, f"SELECT count(DISTINCT {idq}) FROM {{src}} WHERE {where}")[0][0] for where in slices
    )
    problems = []
    for (cond, what, show_ids), cnt in zip(checks, bad):
        if cnt:
            ex = ""
            if show_ids:
                ids = [
                    r[0]
                    for r in src.fetch(
                        con,
                        f"SELECT {idq} FROM {{src}} WHERE {cond} ORDER BY __bigsmooth_row LIMIT 5",
                        **(rng if "$lo" in cond else {}),
                    )
                ]
                ex = f"; e.g. ids {examples(ids)}"
            problems.append(f"{cnt} rows with {what}{ex}")
    non_null_ids = total - bad[0]
    if distinct < non_null_ids:
        dup = []
        for where in slices:
            dup += src.fetch(
                con,
                f"SELECT {idq}, count(*) AS c FROM {{src}} WHERE {idq} IS NOT NULL AND {where} "
                f"GROUP BY {idq} HAVING count(*) > 1 ORDER BY c DESC, {idq} LIMIT 5",
            )
        dup = sorted(dup, key=lambda r: (-r[1], r[0]))[:5]
        problems.append(
            f"{non_null_ids - distinct} duplicate rows of id column {inp['id']!r}; e.g. "
            + ", ".join(f"{v!r} x{c}" for v, c in dup)
        )
    return total, problems


def run(ctx):
    """The scan stage (see the module docstring)."""
    rundir, cfg, fp = ctx.rundir, ctx.cfg, ctx.fp
    inp = cfg["input"]
    check_files(fp, inp)
    con = connect_budget(cfg["run"]["memory_mb"])
    src = Source(con, fp)
    cols = dict((r[0], r[1]) for r in src.fetch(con, "DESCRIBE SELECT * FROM {src}"))
    cols.pop("__bigsmooth_row", None)
    check_schema(cols, inp)
    n = fp["rows"]
    if n == 0:
        raise DataError(
            f"the input has 0 rows ({len(fp['files'])} files under {fp['root']}); nothing to smooth"
        )
    k = cfg["graph"]["neighbours"]
    if k >= n:
        raise ConfigError(
            f"graph.neighbours = {k} needs more rows than neighbours; the input has {n} rows. "
            f"Set graph.neighbours to at most {n - 1}."
        )

    lengths = list_lengths(con, src, cols, inp)
    total, problems = row_problems(con, src, cols, inp, n, cfg["run"]["memory_mb"], lengths)
    if inp["pairs"]:
        problems += _check_pairs(con, inp["pairs"], inp["id"], cols[inp["id"]])
    levels = {}
    for c in inp["categorical_features"] + inp["protected"]:
        q = quote(c)
        rows = src.fetch(
            con, f"SELECT CAST({q} AS VARCHAR) AS v, count(*) FROM {{src}} GROUP BY v ORDER BY v NULLS LAST"
        )
        if len(rows) > MAX_LEVELS:
            problems.append(
                f"column {c!r} has {len(rows)} distinct values (more than {MAX_LEVELS}); "
                "use it as a numeric feature or bucket it"
            )
            continue
        levels[c] = [(MISSING_LEVEL if v is None else v, cnt) for v, cnt in rows]
    for c in inp["protected"]:
        if c in levels and len(levels[c]) < 2:
            log.warning(
                "protected attribute %r has a single level (%r): it defines nothing to remove",
                c,
                levels[c][0][0],
            )
    if problems:
        raise DataError(
            f"the input has {len(problems)} problem(s) in {total} rows:\n  "
            + "\n  ".join(problems)
            + "\nFix the rows (or the config) and run again; nothing was written to the output."
        )
    digests = id_digests(con, fp, inp["id"])
    info = {
        "rows": total,
        "files": len(fp["files"]),
        "columns": cols,
        "levels": levels,
        "list_lengths": lengths,
        "id_digests": digests,
    }
    art.SCAN_INFO.save(rundir, info)
    log.info("scanned %d rows in %d files: all checks passed", total, len(fp["files"]))
    return {"rows": total, "files": len(fp["files"])}
