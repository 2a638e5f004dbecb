"""Bad input through the command line: one case per row of the table below.

Every case runs ``python -m bigsmooth run CONFIG`` in a subprocess on a small table derived from
the demo generator and checks: the documented exit code (sysexits conventions, BSD sysexits.h:
64 usage, 65 data, 66 no input, 73 cannot create, 75 temporary failure, 78 config), the message
names what is wrong (and, for row problems, how many and example ids), nothing is published, and
the input files are byte-for-byte untouched. Cases marked "works" must run and publish every row.
The same table, in words, is in the README ("Reliability").
"""

import fcntl
import hashlib
import os

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from bigsmooth import demo
from bigsmooth.errors import EXIT_CANTCREAT, EXIT_CONFIG, EXIT_DATA, EXIT_NOINPUT, EXIT_TEMPFAIL
from helpers import _assert_nothing_published, _small_table, cli, read_output

ID = "applicant_id"


def _with(cols, **changes):
    out = dict(cols)
    for k, v in changes.items():
        out[k] = v if isinstance(v, pa.Array) else pa.array(v)
    return out


def _set(cols, name, idx, value):
    a = cols[name].to_pylist()
    for i in idx:
        a[i] = value
    return _with(cols, **{name: pa.array(a, type=cols[name].type if value is not None else None)})


def _cfg_text(edit=None):
    text = demo.CONFIG_TEMPLATE.format(data="in", output="out", runs="runs")
    return edit(text) if edit else text


class Case:
    def __init__(
        self, name, files=None, cfg=None, code=EXIT_DATA, says=(), setup=None, works=False, argv=None
    ):
        self.name, self.files, self.cfg, self.code, self.says = name, files, cfg, code, says
        self.setup, self.works, self.argv = setup, works, argv

    def __repr__(self):
        return self.name


def _base():
    return _small_table(200, seed=3)


def _ids(cols, idx):
    return [str(cols[ID].to_pylist()[i]) for i in idx]


def _rename(cols, old, new):
    out = {}
    for k, v in cols.items():
        out[new if k == old else k] = v
    return out


def _base_other():
    cols = _small_table(200, seed=4)
    ids = np.asarray(cols[ID].to_pylist()) + 10_000_000  # ids distinct from the first file's
    return _with(cols, applicant_id=ids)


B = _base()
CASES = [
    Case(
        "misspelled column",
        [_rename(B, "monthly_income", "monthly_incme")],
        says=["'monthly_income' is not in the table", "did you mean 'monthly_incme'"],
    ),
    Case(
        "missing score column",
        [{k: v for k, v in B.items() if k != "sustain_score"}],
        says=["input.scores: column 'sustain_score' is not in the table"],
    ),
    Case(
        "score column of strings",
        [_with(B, sustain_score=[f"{v:.3f}" for v in B["sustain_score"].to_pylist()])],
        says=["'sustain_score' has type VARCHAR; a numeric type is needed"],
    ),
    Case(
        "numeric feature of strings",
        [_with(B, arrears_months=["none"] * 200)],
        says=["'arrears_months' has type VARCHAR"],
    ),
    Case(
        "id column of floats (NaN/inf ids)",
        [_with(B, applicant_id=[float("nan")] + [float(i) for i in range(199)])],
        says=["input.id: column 'applicant_id' has type DOUBLE; an integer or string type is needed"],
    ),
    Case("null ids", [_set(B, ID, [4, 7], None)], says=["2 rows with null id"]),
    Case(
        "null scores", [_set(B, "sustain_score", [3], None)], says=["1 rows with null score", *_ids(B, [3])]
    ),
    Case(
        "NaN scores",
        [_set(B, "sustain_score", [5, 9], float("nan"))],
        says=["2 rows with NaN or infinite score", *_ids(B, [5, 9])],
    ),
    Case(
        "infinite score",
        [_set(B, "sustain_score", [11], float("inf"))],
        says=["1 rows with NaN or infinite score", *_ids(B, [11])],
    ),
    Case(
        "null feature values",
        [_set(B, "monthly_income", [1, 2, 3], None)],
        says=["3 rows with null value in numeric feature 'monthly_income'", *_ids(B, [1, 2, 3])],
    ),
    Case(
        "NaN feature values",
        [_set(B, "debt_to_income", [8], float("nan"))],
        says=["1 rows with NaN or infinite value in numeric feature 'debt_to_income'", *_ids(B, [8])],
    ),
    Case(
        "infinite feature values",
        [_set(B, "savings_months", [0, 150], float("-inf"))],
        says=["2 rows with NaN or infinite value in numeric feature 'savings_months'", *_ids(B, [0, 150])],
    ),
    Case(
        "duplicate ids",
        [_set(B, ID, [10, 11, 12], B[ID].to_pylist()[0])],
        says=["3 duplicate rows of id column 'applicant_id'", f"{B[ID].to_pylist()[0]} x4"],
    ),
    Case(
        "duplicate ids across two files",
        [B, _with(B, sustain_score=B["sustain_score"])],
        says=["200 duplicate rows"],
    ),
    Case(
        "scores outside the declared range",
        [_set(B, "sustain_score", [20, 21], 1.5)],
        says=[
            "2 rows with score in 'sustain_score' outside the declared score_range [0, 1]",
            *_ids(B, [20, 21]),
        ],
    ),
    Case(
        "label that is not binary",
        [_with(B, sustained_12m=pa.array([2] * 5 + [1] * 195, pa.int8()))],
        says=["5 rows with label 'sustained_12m' value other than 0, 1 or null"],
    ),
    Case("empty input", [pa.table(B).slice(0, 0)], says=["the input has 0 rows"]),
    Case(
        "one row",
        [pa.table(B).slice(0, 1)],
        code=EXIT_CONFIG,
        says=["graph.neighbours = 10 needs more rows than neighbours; the input has 1 rows"],
    ),
    Case(
        "k >= rows", [pa.table(B).slice(0, 10)], code=EXIT_CONFIG, says=["Set graph.neighbours to at most 9"]
    ),
    Case(
        "all rows identical (but the id)",
        [{k: (v if k == ID else pa.array([v[0].as_py()] * 200, v.type)) for k, v in B.items()}],
        says=["the fair space has no dimensions left", "constant over all 200 rows"],
    ),
    Case(
        "partitions with different schemas (a column missing in one)",
        [B, {k: v for k, v in _base_other().items() if k != "references"}],
        says=["200 rows with null value in numeric feature 'references'"],
    ),
    Case(
        "partitions with different types for one column",
        [
            B,
            _with(
                _base_other(), household_size=[str(v) for v in _base_other()["household_size"].to_pylist()]
            ),
        ],
        says=["'household_size' has type VARCHAR"],
    ),
    Case(
        "truncated Parquet file",
        [B, "truncated"],
        code=EXIT_NOINPUT,
        says=["1 of 2 input files are not readable Parquet", "part-1.parquet"],
    ),
    Case(
        "file that is not Parquet",
        [B, "csv"],
        code=EXIT_NOINPUT,
        says=["1 of 2 input files are not readable Parquet"],
    ),
    Case(
        "input path missing",
        [],
        cfg=lambda t: t.replace('path = "in"', 'path = "nowhere"'),
        code=EXIT_NOINPUT,
        says=["input.path", "nowhere does not exist"],
    ),
    Case(
        "input folder without Parquet files",
        ["only-readme"],
        code=EXIT_NOINPUT,
        says=["holds no .parquet files"],
    ),
    Case(
        "dangling symlink as input",
        [],
        cfg=lambda t: t.replace('path = "in"', 'path = "link.parquet"'),
        setup=lambda tmp: os.symlink(tmp / "gone.parquet", tmp / "link.parquet"),
        code=EXIT_NOINPUT,
        says=["does not exist"],
    ),
    Case(
        "negative lam",
        [B],
        cfg=lambda t: t.replace("lam = 1.0", "lam = -2.0"),
        code=EXIT_CONFIG,
        says=["solve.lam", "-2"],
    ),
    Case(
        "non-numeric lam",
        [B],
        cfg=lambda t: t.replace("lam = 1.0", 'lam = "strong"'),
        code=EXIT_CONFIG,
        says=["solve.lam"],
    ),
    Case(
        "unknown config key",
        [B],
        cfg=lambda t: t.replace("neighbours = 10", "neighbors = 10"),
        code=EXIT_CONFIG,
        says=["graph.neighbors", "neighbours"],
    ),
    Case(
        "unknown section",
        [B],
        cfg=lambda t: t + "\n[solver]\nlam = 2\n",
        code=EXIT_CONFIG,
        says=["solver", "solve"],
    ),
    Case(
        "config that is not TOML",
        [B],
        cfg=lambda t: t + "\nthis is = = not toml\n",
        code=EXIT_CONFIG,
        says=["job.toml"],
    ),
    Case(
        "protected attribute also a feature",
        [B],
        cfg=lambda t: t.replace('"postcode_sector"]', '"postcode_sector", "origin_group"]'),
        code=EXIT_CONFIG,
        says=["origin_group"],
    ),
    Case(
        "score range upside down",
        [B],
        cfg=lambda t: t.replace("score_range = [0.0, 1.0]", "score_range = [1.0, 0.0]"),
        code=EXIT_CONFIG,
        says=["input.score_range"],
    ),
    Case(
        "output location not writable",
        [B],
        cfg=lambda t: t.replace('path = "out"', 'path = "blocker/out"'),
        setup=lambda tmp: (tmp / "blocker").write_text("a file, not a folder"),
        code=EXIT_CANTCREAT,
        says=["not writable"],
    ),
    Case(
        "output's current link copied as a folder",
        [B],
        setup=lambda tmp: (tmp / "out" / "current").mkdir(parents=True),
        code=EXIT_CANTCREAT,
        says=["out/current is a folder, not the symbolic link", "copied without its links"],
    ),
    Case(
        "run directory locked by another run",
        [B],
        setup=lambda tmp: _hold_run_lock(tmp),
        code=EXIT_TEMPFAIL,
        says=["in use by another bigsmooth process", "retry later"],
    ),
    Case(
        "too many levels in a categorical column",
        [_with(_small_table(1100, seed=5), employment=[f"e{i}" for i in range(1100)])],
        says=["column 'employment' has 1100 distinct values (more than 1000)"],
    ),
    Case(
        "pairs file without its id_b column",
        [B],
        cfg=lambda t: t.replace(
            'label = "sustained_12m"', 'label = "sustained_12m"\npairs = "pairs.parquet"'
        ),
        setup=lambda tmp: pq.write_table(pa.table({"id_a": [1], "other": [2]}), tmp / "pairs.parquet"),
        says=["lacks column(s) id_b"],
    ),
    # ---- issue 11: inputs that went wrong silently or with a traceback ----
    Case(
        "output folder inside the input folder",
        [B],
        cfg=lambda t: t.replace('path = "out"', 'path = "in/out"'),
        code=EXIT_CONFIG,
        says=["output.path", "inside it or a link to it"],
    ),
    Case(
        "output folder equal to the input folder",
        [B],
        cfg=lambda t: t.replace('path = "out"', 'path = "in"'),
        code=EXIT_CONFIG,
        says=["output.path", "the next run would read this output as input"],
    ),
    Case(
        "output folder a symlink to the input folder",
        [B],
        cfg=lambda t: t.replace('path = "out"', 'path = "outlink"'),
        setup=lambda tmp: os.symlink(tmp / "in", tmp / "outlink"),
        code=EXIT_CONFIG,
        says=["output.path", "a link to it"],
    ),
    Case(
        "empty output.path",
        [B],
        cfg=lambda t: t.replace('path = "out"', 'path = ""'),
        code=EXIT_CONFIG,
        says=["output.path is empty"],
    ),
    Case(
        "empty input.path",
        [B],
        cfg=lambda t: t.replace('path = "in"', 'path = ""'),
        code=EXIT_CONFIG,
        says=["input.path is empty"],
    ),
    Case(
        "input on an object store",
        [B],
        cfg=lambda t: t.replace('path = "in"', 'path = "s3://bucket/scores/"'),
        code=EXIT_CONFIG,
        says=["input.path = 's3://bucket/scores/'", "object store", "not supported"],
    ),
    Case(
        "output on an object store",
        [B],
        cfg=lambda t: t.replace('path = "out"', 'path = "gs://bucket/out"'),
        code=EXIT_CONFIG,
        says=["output.path", "object store"],
    ),
    Case(
        "empty output.suffix (would overwrite the raw score)",
        [B],
        cfg=lambda t: t.replace("[output]\n", '[output]\nsuffix = ""\n'),
        code=EXIT_CONFIG,
        says=["output.suffix"],
    ),
    Case(
        "output.suffix '_change' (would lose the adjusted score)",
        [B],
        cfg=lambda t: t.replace("[output]\n", '[output]\nsuffix = "_change"\n'),
        code=EXIT_CONFIG,
        says=["output.suffix must be a non-empty suffix other than '_change'"],
    ),
    Case(
        "output.suffix making a column that exists",
        [B],
        cfg=lambda t: t.replace("[output]\n", '[output]\nsuffix = "_x"\ninclude_protected = true\n').replace(
            'protected = ["origin_group", "age_band"]', 'protected = ["origin_group", "sustain_score_x"]'
        ),
        code=EXIT_CONFIG,
        says=["makes the output column 'sustain_score_x'"],
    ),
    Case(
        "ids integer in one file and strings in another",
        [B, _with(_base_other(), applicant_id=[f"x{i}" for i in range(200)])],
        says=[
            "the id column 'applicant_id' has different types in different files",
            "integer in 1 file(s)",
            "string in 1 file(s)",
        ],
    ),
    Case(
        "a partition folder key that is also a column inside the file",
        [B],
        setup=lambda tmp: _move_into(tmp, "origin_group=group_a"),
        says=["'origin_group' is both a partition folder key", "origin_group=group_a"],
    ),
    Case(
        "a column named file_row_number",
        [_with(B, file_row_number=list(range(200)))],
        says=["column 'file_row_number' has a name bigsmooth needs for its own row numbering"],
    ),
    Case("a column that appears twice in one file", ["twice"], says=["'references' appear more than once"]),
    Case(
        "a feature value of 1e200",
        [_set(B, "monthly_income", [7], 1e200)],
        says=["1 rows with value in numeric feature 'monthly_income' beyond +-1e+100", *_ids(B, [7])],
    ),
    Case(
        "pairs file with string ids against integer ids",
        [B],
        cfg=lambda t: t.replace(
            'label = "sustained_12m"', 'label = "sustained_12m"\npairs = "pairs.parquet"'
        ),
        setup=lambda tmp: pq.write_table(pa.table({"id_a": ["1"], "id_b": ["2"]}), tmp / "pairs.parquet"),
        says=["column id_a has type VARCHAR but the id column 'applicant_id' has type"],
    ),
    Case(
        "pairs file that does not exist",
        [B],
        cfg=lambda t: t.replace('label = "sustained_12m"', 'label = "sustained_12m"\npairs = "nope.parquet"'),
        code=EXIT_NOINPUT,
        says=["input.pairs", "nope.parquet does not exist"],
    ),
    Case(
        "pairs file that is not Parquet",
        [B],
        cfg=lambda t: t.replace(
            'label = "sustained_12m"', 'label = "sustained_12m"\npairs = "pairs.parquet"'
        ),
        setup=lambda tmp: (tmp / "pairs.parquet").write_text("id_a,id_b\n1,2\n"),
        code=EXIT_NOINPUT,
        says=["input.pairs", "is not readable Parquet"],
    ),
    Case(
        "config in Latin-1",
        [B],
        setup=lambda tmp: _latin1(tmp / "job.toml"),
        code=EXIT_CONFIG,
        says=["is not UTF-8 text", "line 1"],
    ),
    Case(
        "config path that is a directory",
        [B],
        argv=lambda tmp: ["run", str(tmp)],
        code=EXIT_CONFIG,
        says=["is a directory"],
    ),
    Case(
        "a symbolic link loop in the input folder",
        [B],
        setup=lambda tmp: os.symlink(tmp / "in", tmp / "in" / "loop"),
        code=EXIT_NOINPUT,
        says=["is reached again as", "symbolic link loop"],
    ),
    Case(
        "the same file reached through a link",
        [B],
        setup=lambda tmp: os.symlink(tmp / "in" / "part-0.parquet", tmp / "in" / "again.parquet"),
        code=EXIT_NOINPUT,
        says=["is reached twice"],
    ),
    Case(
        "corrupt data pages behind an intact footer",
        [B, "pages"],
        code=EXIT_NOINPUT,
        says=["part-1.parquet", "cannot be read (corrupt data pages?)"],
    ),
    Case(
        "protected attribute column missing",
        [{k: v for k, v in B.items() if k != "age_band"}],
        says=["input.protected: column 'age_band' is not in the table"],
    ),
    Case(
        "label column of strings",
        [_with(B, sustained_12m=["yes"] * 200)],
        says=["input.label: column 'sustained_12m' has type VARCHAR"],
    ),
    Case(
        "id column of booleans",
        [_with(B, applicant_id=[True, False] * 100)],
        says=["input.id: column 'applicant_id' has type BOOLEAN"],
    ),
    Case(
        "categorical feature of floats",
        [_with(B, employment=[0.5] * 200)],
        says=["input.categorical_features: column 'employment' has type DOUBLE"],
    ),
    Case(
        "counterfactual column missing",
        [B],
        cfg=lambda t: t.replace(
            'label = "sustained_12m"', 'label = "sustained_12m"\ncounterfactual_score = "cf"'
        ),
        says=["input.counterfactual_score: column 'cf' is not in the table"],
    ),
    Case(
        "zero neighbours",
        [B],
        cfg=lambda t: t.replace("neighbours = 10", "neighbours = 0"),
        code=EXIT_CONFIG,
        says=["graph.neighbours must be an integer in [1, 200]; got 0"],
    ),
    Case(
        "unknown Laplacian",
        [B],
        cfg=lambda t: t.replace('laplacian = "unnormalised"', 'laplacian = "normalized"'),
        code=EXIT_CONFIG,
        says=["solve.laplacian must be one of 'unnormalised', 'random_walk'"],
    ),
    Case(
        "select_rate of 0",
        [B],
        cfg=lambda t: t.replace("select_rate = 0.3", "select_rate = 0.0"),
        code=EXIT_CONFIG,
        says=["audit.select_rate"],
    ),
    Case(
        "memory budget below the floor",
        [B],
        cfg=lambda t: t.replace("seed = 0", "seed = 0\nmemory_mb = 10"),
        code=EXIT_CONFIG,
        says=["run.memory_mb must be an integer in [256"],
    ),
    Case(
        "a score column also given as a feature",
        [B],
        cfg=lambda t: t.replace('"debt_to_income"]', '"debt_to_income", "sustain_score"]'),
        code=EXIT_CONFIG,
        says=["'sustain_score' is given as both input.scores and input.numeric_features"],
    ),
    Case(
        "a glob that matches nothing",
        [B],
        cfg=lambda t: t.replace('path = "in"', 'path = "in/*.nothing"'),
        code=EXIT_NOINPUT,
        says=["matches no files"],
    ),
    Case(
        "a seed below zero",
        [B],
        cfg=lambda t: t.replace("seed = 0", "seed = -1"),
        code=EXIT_CONFIG,
        says=["run.seed"],
    ),
    # ---- these must work ----
    Case(
        "upper-case .PARQUET endings",
        [B, _base_other()],
        setup=lambda tmp: os.rename(tmp / "in" / "part-1.parquet", tmp / "in" / "part-1.PARQUET"),
        works=True,
    ),
    Case("an unused input column named filename", [_with(B, filename=["x.csv"] * 200)], works=True),
    Case("a config with a byte-order mark", [B], setup=lambda tmp: _with_bom(tmp / "job.toml"), works=True),
    Case(
        "labels all null: the AUC gate says it is off",
        [_with(B, sustained_12m=pa.array([None] * 200, pa.int8()))],
        works=True,
        says=["AUC drop: off, cannot be evaluated"],
    ),
    Case(
        "labels of one class: the AUC gate says it is off",
        [_with(B, sustained_12m=pa.array([1] * 200, pa.int8()))],
        works=True,
        says=["hold only one outcome"],
    ),
    Case(
        "hidden files and _SUCCESS markers beside the data",
        [B],
        setup=lambda tmp: (
            (tmp / "in" / "_SUCCESS").write_text(""),
            (tmp / "in" / ".part-9.parquet.crc").write_text("x"),
        ),
        works=True,
    ),
    Case(
        "a 0-row file with another schema beside full files",
        [B, pa.table({"other": pa.array([], pa.int64())})],
        works=True,
    ),
    Case(
        "an empty partition among full ones",
        [B, pa.table(_base_other()).slice(0, 0), _base_other()],
        works=True,
    ),
    Case("a constant feature", [_with(B, references=[1.0] * 200)], works=True),
    Case("a protected attribute with one level", [_with(B, age_band=["30-49"] * 200)], works=True),
    Case(
        "column names with quotes, spaces and SQL keywords",
        [
            _rename(
                _rename(
                    _rename(B, "applicant_id", "select"), "monthly_income", 'monthly "income"; DROP TABLE x'
                ),
                "sustain_score",
                "score FROM src",
            )
        ],
        cfg=lambda t: (
            t.replace('id = "applicant_id"', 'id = "select"')
            .replace('"monthly_income"', "'monthly \"income\"; DROP TABLE x'")
            .replace('scores = ["sustain_score"]', 'scores = ["score FROM src"]')
        ),
        works=True,
    ),
]


def _hold_run_lock(tmp):
    """Create the run directory of this case (by a first run that stops at once) and hold its lock."""
    from bigsmooth import config as config_mod
    from bigsmooth.rundir import run_id
    from bigsmooth.table import fingerprint

    cfg = config_mod.load_config(str(tmp / "job.toml"))
    rid = run_id(config_mod.config_hash(cfg), fingerprint(cfg["input"]["path"])["hash"])
    d = tmp / "runs" / rid
    d.mkdir(parents=True)
    fd = os.open(d / ".lock", os.O_RDWR | os.O_CREAT)
    fcntl.flock(fd, fcntl.LOCK_EX)
    os.pwrite(fd, b"pid 4242 on testhost since earlier\n", 0)
    return ("lock", fd)  # kept open (and locked) until the test ends


def _move_into(tmp, folder):
    (tmp / "in" / folder).mkdir()
    os.rename(tmp / "in" / "part-0.parquet", tmp / "in" / folder / "part-0.parquet")


def _latin1(path):
    path.write_bytes(b"# Gr\xfc\xdfe: a comment in Latin-1\n" + path.read_bytes())


def _with_bom(path):
    path.write_bytes(b"\xef\xbb\xbf" + path.read_bytes())


def _corrupt_pages(path):
    """Overwrite the middle of the data pages (the footer stays intact and readable)."""
    data = bytearray(path.read_bytes())
    footer = int.from_bytes(data[-8:-4], "little") + 8
    for i in range(4, len(data) - footer - 4, 7):
        data[i] = (data[i] * 31 + 17) % 256
    path.write_bytes(bytes(data))


def _write_files(tmp, files):
    d = tmp / "in"
    d.mkdir()
    for i, f in enumerate(files):
        path = d / f"part-{i}.parquet"
        if f == "truncated":
            pq.write_table(pa.table(_base_other()), path)
            data = path.read_bytes()
            path.write_bytes(data[: len(data) // 2])
        elif f == "pages":
            pq.write_table(pa.table(_base_other()), path, compression="snappy")
            _corrupt_pages(path)
        elif f == "twice":
            t = pa.table(B)
            pq.write_table(
                pa.Table.from_arrays(
                    t.columns + [t.column("references")], names=t.column_names + ["references"]
                ),
                path,
            )
        elif f == "csv":
            path.write_text("applicant_id,sustain_score\n1,0.5\n")
        elif f == "only-readme":
            (d / "README.txt").write_text("no data tonight\n")
        else:
            pq.write_table(f if isinstance(f, pa.Table) else pa.table(f), path)


def _digest(folder):
    h = hashlib.sha256()
    for root, _, files in sorted(os.walk(folder)):
        for f in sorted(files):
            p = os.path.join(root, f)
            h.update(p.encode())
            if not os.path.islink(p):
                h.update(open(p, "rb").read())
    return h.hexdigest()


@pytest.mark.parametrize("case", CASES, ids=repr)
def test_bad_input_case(tmp_path, case):
    _write_files(tmp_path, case.files)
    text = _cfg_text(case.cfg)
    if case.works:
        # 200 rows, 80 labelled: the AUC moves by more than the default 1% gate either way; the gate
        # is tested in tests/end_to_end/test_audit_tune.py
        text += "\n[gates]\nmax_auc_drop = 1.0\n"
    (tmp_path / "job.toml").write_text(text)
    keep = case.setup(tmp_path) if case.setup else None
    before = _digest(tmp_path / "in")
    res = cli(*(case.argv(tmp_path) if case.argv else ["run", str(tmp_path / "job.toml")]))
    if isinstance(keep, tuple) and keep[0] == "lock":
        os.close(keep[1])
    assert _digest(tmp_path / "in") == before, "the input was modified"
    if case.works:
        assert res.returncode == 0, res.stderr
        rows = sum(
            pq.ParquetFile(tmp_path / "in" / f).metadata.num_rows
            for f in os.listdir(tmp_path / "in")
            if f.lower().endswith(".parquet") and not f.startswith((".", "_"))
        )
        out = read_output(tmp_path / "out")
        assert out.num_rows == rows
        idcol = "select" if "select" in out.column_names else ID
        assert len(set(out.column(idcol).to_pylist())) == rows
        for phrase in case.says:
            assert phrase in res.stdout, (phrase, res.stdout[-3000:])
        return
    assert res.returncode == case.code, (res.returncode, res.stderr[-3000:])
    for phrase in case.says:
        assert phrase in res.stderr, (phrase, res.stderr[-3000:])
    assert "Traceback" not in res.stderr
    if case.name == "output's current link copied as a folder":
        # the folder the case put there is left as it was, and nothing else was written
        assert [p.name for p in (tmp_path / "out").iterdir()] == ["current"]
        assert not list((tmp_path / "out" / "current").iterdir())
    else:
        _assert_nothing_published(tmp_path)


def test_the_table_has_at_least_eighty_cases():
    assert len(CASES) >= 80
