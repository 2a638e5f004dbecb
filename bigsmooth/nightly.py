"""Tonight against last night: two versions of the adjusted table compared row by row (by id).

Rows added, removed and present in both; for rows in both, the change of the adjusted score night
over night and the decisions that flipped, each night's decisions taken at its own quantile cutoffs
(the audit's). A flip of the adjusted decision is *explained by the raw score* when the raw score's
own decision flipped too, and *added by the smoothing* when it did not; raw flips that the adjusted
decision did not follow are *absorbed*. Smoothing should not make decisions flip-flop more than the
raw scores do: ``adjusted_flip_rate`` against ``raw_flip_rate``.

One DuckDB query over the two sides (a full outer join on the id), so memory stays within DuckDB's
limit at any size. Used by the audit (the current version against tonight's result) and by
``bigsmooth diff`` (any two published versions).
"""

import os

from . import artifacts as art
from . import atomic
from .errors import InputMissingError
from .table import connect_budget, quote

SCHEMA = 1


def table_key(fp):
    """The fingerprint of the input table itself (a run's ``fp["hash"]`` also folds in the run
    whose fair space it keeps): two runs on the same table tonight share it."""
    return fp.get("hash_before_space", fp["hash"])


def last_night(root, table):
    """(version, None): the published version that stands for last night in output folder
    ``root``, for a run on the input table whose :func:`table_key` is ``table``: the current version,
    unless its provenance says it was published from this same table (an earlier run tonight, e.g.
    with another lam), then the version that run took as last night (its comparison's, else its
    anchor's). (None, reason) when there is none."""
    from .atomic import read_json

    pointer = os.path.join(root, art.OUTPUT_POINTER)
    if not os.path.exists(pointer):
        return None, "nothing published yet"
    current = read_json(pointer)["version"]
    try:
        audit = read_json(os.path.join(root, current, art.OUTPUT_AUDIT))
    except (OSError, ValueError):
        return current, None  # nothing tells: taken as last night's
    if (audit.get("provenance") or {}).get("input_table") != table:
        return current, None
    earlier = (audit.get("night_over_night") or {}).get("last_version") or (
        (audit["provenance"].get("stability") or {}).get("version")
    )
    if earlier and os.path.isdir(os.path.join(root, earlier)):
        return earlier, None
    return None, f"the current version {current} is of tonight's table and names no earlier night"


def version_select(folder, id_col, score, suffix):
    """SQL of (id, y, f) over a published version folder's Parquet files."""
    path = os.path.join(folder, "**", "*.parquet").replace("'", "''")
    return (
        f"SELECT {quote(id_col)} AS id, CAST({quote(score)} AS DOUBLE) AS y, "
        f"CAST({quote(score + suffix)} AS DOUBLE) AS f FROM read_parquet('{path}', hive_partitioning = false)"
    )


def compare(con, sql_a, sql_b, cuts_a, cuts_b, params=None):
    """The comparison record of side A (last night) and side B (tonight), each a SQL query of
    (id, y, f) (``params``: the queries' own parameters); ``cuts_*`` = (raw cutoff, adjusted
    cutoff) of that night."""
    q = f"""
    WITH a AS ({sql_a}), b AS ({sql_b}),
    j AS (
        SELECT a.id IS NOT NULL AND b.id IS NOT NULL AS both_, a.id IS NULL AS added_,
               b.id IS NULL AS removed_, a.y AS ya, a.f AS fa, b.y AS yb, b.f AS fb,
               (a.y >= $ra) <> (b.y >= $rb) AS raw_flip, (a.f >= $fa) <> (b.f >= $fb) AS adj_flip
        FROM a FULL OUTER JOIN b ON a.id = b.id
    )
    SELECT
        count(*) FILTER (WHERE added_), count(*) FILTER (WHERE removed_), count(*) FILTER (WHERE both_),
        count(*) FILTER (WHERE both_ AND yb <> ya),
        avg(fb - fa) FILTER (WHERE both_), avg(abs(fb - fa)) FILTER (WHERE both_),
        quantile_cont(abs(fb - fa), [0.5, 0.9, 0.99]) FILTER (WHERE both_), max(abs(fb - fa)) FILTER (WHERE both_),
        avg(abs(yb - ya)) FILTER (WHERE both_),
        count(*) FILTER (WHERE both_ AND raw_flip), count(*) FILTER (WHERE both_ AND adj_flip),
        count(*) FILTER (WHERE both_ AND adj_flip AND raw_flip),
        count(*) FILTER (WHERE both_ AND adj_flip AND NOT raw_flip),
        count(*) FILTER (WHERE both_ AND raw_flip AND NOT adj_flip),
        count(*) FILTER (WHERE both_ AND yb = ya), count(*) FILTER (WHERE both_ AND yb = ya AND adj_flip)
    FROM j
    """
    params = {**(params or {}), "ra": cuts_a[0], "fa": cuts_a[1], "rb": cuts_b[0], "fb": cuts_b[1]}
    r = con.execute(q, params).fetchone()
    added, removed, both, rescored = (int(v) for v in r[:4])
    raw_flips, adj_flips, explained, by_smoothing, absorbed, same_raw, same_raw_flips = (
        int(v) for v in r[9:]
    )
    qs = r[6] or [None, None, None]
    return {
        "schema": SCHEMA,
        "rows_added": added,
        "rows_removed": removed,
        "rows_in_both": both,
        "rows_rescored": rescored,
        "adjusted_change": {
            "mean": r[4],
            "mean_abs": r[5],
            "quantiles_abs": {"0.5": qs[0], "0.9": qs[1], "0.99": qs[2], "1.0": r[7]},
        },
        "raw_change_mean_abs": r[8],
        "cutoffs": {
            "last_raw": cuts_a[0],
            "last_adjusted": cuts_a[1],
            "tonight_raw": cuts_b[0],
            "tonight_adjusted": cuts_b[1],
        },
        "raw_flips": raw_flips,
        "adjusted_flips": adj_flips,
        "flips_explained_by_raw": explained,
        "flips_added_by_smoothing": by_smoothing,
        "raw_flips_absorbed": absorbed,
        "raw_flip_rate": raw_flips / both if both else None,
        "adjusted_flip_rate": adj_flips / both if both else None,
        "rows_with_unchanged_raw": same_raw,
        "flips_with_unchanged_raw": same_raw_flips,
    }


def cutoffs(audit, score):
    """(raw cutoff, adjusted cutoff) of a night from its audit record."""
    s = audit["scores"][score]
    return s["before"]["cutoff"], s["after"]["cutoff"]


def diff(output, version_a, version_b, memory_mb=1024):
    """``bigsmooth diff``: two published versions of an output folder compared (A = the earlier)."""
    folders = []
    for v in (version_a, version_b):
        folder = os.path.join(output, v)
        if not os.path.exists(os.path.join(folder, art.OUTPUT_AUDIT)):
            have = (
                sorted(
                    n
                    for n in os.listdir(output)
                    if n != art.OUTPUT_LINK and os.path.exists(os.path.join(output, n, art.OUTPUT_AUDIT))
                )
                if os.path.isdir(output)
                else []
            )
            raise InputMissingError(
                f"{folder} is not a published version (no {art.OUTPUT_AUDIT}); versions in {output}: "
                + (", ".join(have[-10:]) or "none")
            )
        folders.append(folder)
    audits = [atomic.read_json(os.path.join(f, art.OUTPUT_AUDIT)) for f in folders]
    prov = [a["provenance"] for a in audits]
    first = prov[1]["score_columns"][0]
    id_col = _id_column(folders[1], prov[1])
    suffix = prov[1].get("adjusted_suffix") or _suffix(folders[1], first)
    con = connect_budget(memory_mb)
    try:
        rec = compare(
            con,
            version_select(folders[0], id_col, first, suffix),
            version_select(folders[1], id_col, first, suffix),
            cutoffs(audits[0], first),
            cutoffs(audits[1], first),
        )
    finally:
        con.close()
    return rec | {"version_a": version_a, "version_b": version_b, "score": first, "id": id_col}


def _first_file(folder):
    for dirpath, _, files in sorted(os.walk(folder)):
        for f in sorted(files):
            if f.endswith(".parquet"):
                return os.path.join(dirpath, f)
    raise InputMissingError(f"{folder} holds no Parquet files")


def _id_column(folder, prov):
    import pyarrow.parquet as pq

    if prov.get("id_column"):
        return prov["id_column"]
    return pq.read_schema(_first_file(folder)).names[0]  # publish writes the id column first


def _suffix(folder, score):
    import pyarrow.parquet as pq

    names = pq.read_schema(_first_file(folder)).names
    for n in names:
        if n.startswith(score) and n != score and not n.endswith("_change"):
            return n[len(score) :]
    raise InputMissingError(f"{folder}: no adjusted column for {score!r} (columns {', '.join(names)})")


def lines(rec):
    """The record as text."""

    def pct(v):
        return "-" if v is None else f"{v:.2%}"

    ch = rec["adjusted_change"]
    qa = ch["quantiles_abs"]
    out = [
        f"rows: {rec['rows_in_both']} in both, {rec['rows_added']} added, {rec['rows_removed']} removed; "
        f"{rec['rows_rescored']} of those in both re-scored (raw score changed)",
    ]
    if rec["rows_in_both"]:
        out += [
            f"adjusted score night over night (rows in both): mean change {ch['mean']:+.4f}, |change| median "
            f"{qa['0.5']:.4f}, 90th percentile {qa['0.9']:.4f}, 99th {qa['0.99']:.4f}, largest {qa['1.0']:.4f} "
            f"(raw |change| mean {rec['raw_change_mean_abs']:.4f})",
            f"decisions flipped: raw {rec['raw_flips']} ({pct(rec['raw_flip_rate'])}), adjusted {rec['adjusted_flips']} "
            f"({pct(rec['adjusted_flip_rate'])}); of the adjusted flips {rec['flips_explained_by_raw']} follow the raw "
            f"score's own flip and {rec['flips_added_by_smoothing']} were added by the smoothing; "
            f"{rec['raw_flips_absorbed']} raw flips did not carry through",
            f"rows whose raw score did not change: {rec['rows_with_unchanged_raw']}, of which "
            f"{rec['flips_with_unchanged_raw']} flipped after smoothing (their neighbourhood changed)",
        ]
    return out
