"""The job's configuration: declared rules, one place that checks them, and the run's identity.

Each section's rules are data (:data:`RULES`): type, default, allowed range or choices and a
one-line description. :func:`load_config` reads a TOML file, fills defaults, checks every value
against its rule and returns a plain nested dict. Relative paths are taken relative to the
config file's folder.
"""

import difflib
import hashlib
import json
import math
import os
import tomllib
from dataclasses import dataclass, field

from .errors import ConfigError

REQUIRED = object()


@dataclass(frozen=True)
class Rule:
    kind: str  # "int", "float", "str", "bool", "list[str]", "table[float]", "range"
    default: object = REQUIRED
    lo: float | None = None
    hi: float | None = None
    choices: tuple | None = None
    doc: str = ""
    affects_result: bool = True  # part of the run identity hash
    nullable: bool = False
    extra: dict = field(default_factory=dict)


RULES = {
    "input": {
        "path": Rule(
            "str", doc="Parquet file, folder (searched recursively) or glob of the night's scored table"
        ),
        "id": Rule("str", doc="column with a unique id per row (integer or string)"),
        "scores": Rule(
            "list[str]", doc="score column(s); several columns are smoothed together (e.g. one per class)"
        ),
        "score_range": Rule(
            "range", default=[0.0, 1.0], doc="declared [min, max] of the scores; values outside are bad data"
        ),
        "numeric_features": Rule(
            "list[str]",
            default=[],
            doc="numeric feature columns used to decide who is similar; a column may also hold a list of "
            "numbers of one length in every row (an embedding from an upstream model, e.g. list<float32>), "
            "used as one numeric feature per position (name[0], name[1], ...)",
        ),
        "categorical_features": Rule(
            "list[str]", default=[], doc="categorical feature columns (one-hot encoded)"
        ),
        "protected": Rule(
            "list[str]", doc="protected-attribute columns; used only to define what the fair space ignores"
        ),
        "label": Rule(
            "str",
            default="",
            doc="optional column of known outcomes (0/1, null where unknown); used by the audit only",
        ),
        "counterfactual_score": Rule(
            "str",
            default="",
            doc="optional column: the model's first score for the same row with its protected attributes changed; the audit reports how often both give the same decision",
        ),
        "pairs": Rule(
            "str",
            default="",
            doc="optional Parquet file of comparable pairs, columns id_a and id_b (ids of this table) and an optional weight column: the audit reports how often both rows of a pair get the same decision; with graph.pair_weight > 0 each pair is also a graph edge (pairs naming unknown ids are counted and reported); its content is part of the run's identity",
        ),
        "compare_scores": Rule(
            "list[str]",
            default=[],
            doc="other score columns (e.g. a retrained model's) audited side by side with the raw and adjusted first score; not smoothed, not published",
        ),
    },
    "embed": {
        "remove_sensitive": Rule(
            "bool",
            default=True,
            doc="project out the feature directions that predict each protected attribute",
        ),
        "components": Rule(
            "int",
            default=0,
            lo=0,
            hi=1000,
            doc="keep this many principal components of the fair space (0 = keep all)",
        ),
        "fair_space": Rule(
            "str",
            default="fit",
            choices=("fit", "previous"),
            doc="\"fit\" learns the fair space from tonight's rows; \"previous\" keeps the fair space (mean, scale and projection) of the run behind the output's current version, so that a changed population does not move every row's distances and decisions flip less night over night (fitted when there is no earlier version or its features differ; the audit still measures leakage on tonight's rows)",
        ),
        "pair_directions": Rule(
            "int",
            default=0,
            lo=0,
            hi=100,
            doc="also remove this many principal directions of the comparable pairs' feature differences (input.pairs) from the fair space: directions along which rows judged alike differ are ignored by the similarity (0 = none)",
        ),
        "feature_weights": Rule(
            "table[float]",
            default={},
            lo=0.0,
            hi=1e6,
            doc="per-feature multipliers applied after standardising (missing = 1)",
        ),
        "leakage_warn_auc": Rule(
            "float",
            default=0.65,
            lo=0.5,
            hi=1.0,
            doc="warn when the fair space still predicts a protected attribute with AUC above this: a linear probe (embed) or the vote of each row's fair-space neighbours (audit)",
        ),
        "probe_rows": Rule(
            "int", default=50000, lo=100, hi=10_000_000, doc="rows sampled for the leakage probe"
        ),
        "batch_rows": Rule(
            "int",
            default=0,
            lo=0,
            hi=10_000_000,
            doc="rows per streamed chunk, a multiple of 8192 (0 = derived from run.memory_mb)",
            affects_result=False,
        ),
    },
    "graph": {
        "neighbours": Rule(
            "int", default=10, lo=1, hi=200, doc="nearest neighbours per row before symmetrising"
        ),
        "exact_below": Rule(
            "int",
            default=20000,
            lo=0,
            hi=1_000_000,
            doc="use exact brute-force neighbours when the table has fewer rows than this",
        ),
        "build": Rule(
            "str",
            default="auto",
            choices=("auto", "whole", "partitioned"),
            doc="how the neighbour graph is built: 'whole' = one search over the table (exact below graph.exact_below rows, else pynndescent); 'partitioned' = exact search inside overlapping k-means partitions of at most graph.partition_rows rows, in bounded memory and as separate tasks; 'auto' = whole below graph.exact_below rows, partitioned above",
        ),
        "partition_rows": Rule(
            "int",
            default=20000,
            lo=100,
            hi=10_000_000,
            doc="most rows in one partition of the partitioned build (memory per task grows with it; recall too)",
        ),
        "partition_overlap": Rule(
            "int",
            default=3,
            lo=1,
            hi=4,
            doc="partitions each row joins in the partitioned build (its nearest ones); the search costs grow with it, and so does recall (measured on the demo's fair space at 200,000 rows: 0.941 with 2, 0.985 with 3)",
        ),
        "refine_rounds": Rule(
            "int",
            default=1,
            lo=0,
            hi=3,
            doc="rounds of neighbour-of-neighbour refinement after a partitioned build: each row's neighbours' neighbours are candidates at their exact distance (recovers true neighbours that share no partition with the row; measured at 1M rows: recall 0.954 -> 0.980, at 10M: 0.916 -> 0.964 for one round); 0 = none",
        ),
        "recall_rows": Rule(
            "int",
            default=2000,
            lo=0,
            hi=100_000,
            doc="rows whose neighbours are checked against an exact search after a partitioned or approximate build (recall@k in the graph record; a warning below 0.95); 0 = no check",
            affects_result=False,
        ),
        "pair_weight": Rule(
            "float",
            default=0.0,
            lo=0.0,
            hi=1e6,
            doc="weight of the graph edge each comparable pair (input.pairs) adds, times the pair's own weight column when the file has one; where the pair is also a neighbour edge the larger weight counts; 0 = pairs add no edges",
        ),
        "kernel_scale": Rule(
            "str",
            default="global",
            choices=("global", "local"),
            doc="heat-kernel scale: 'global' sigma = median neighbour distance; 'local' sigma_i = distance to the row's min(7,k)-th neighbour",
        ),
        "scale_factor": Rule(
            "float",
            default=1.0,
            lo=1e-6,
            hi=1e6,
            doc="multiplies the heat-kernel scale (larger = flatter weights)",
        ),
        "index_trees": Rule(
            "int",
            default=0,
            lo=0,
            hi=64,
            doc="random-projection trees for the approximate index (0 = pynndescent's default)",
        ),
        "search_neighbours": Rule(
            "int",
            default=0,
            lo=0,
            hi=400,
            doc="neighbours the approximate index searches for before the nearest k are kept (0 = ceil(1.5 k))",
        ),
        "index_threads": Rule(
            "int",
            default=2,
            lo=1,
            hi=256,
            doc="threads of the approximate index; its result depends on this number, so it is fixed by the config, not by the machine",
        ),
    },
    "solve": {
        "laplacian": Rule(
            "str",
            default="unnormalised",
            choices=("unnormalised", "random_walk"),
            doc="C = I (unnormalised) or C = D (random-walk normalised)",
        ),
        "lam": Rule(
            "float", default=1.0, lo=0.0, hi=1e9, doc="smoothing strength lambda (0 changes nothing)"
        ),
        "method": Rule(
            "str",
            default="sweep-cg",
            choices=("sweep-cg", "blocks", "direct"),
            doc="'sweep-cg' = conjugate gradients preconditioned by symmetric Gauss-Seidel sweeps over block groups; 'blocks' = plain blocked coordinate descent; 'direct' = sparse direct solve (small tables, reference)",
        ),
        "groups": Rule(
            "int",
            default=4,
            lo=1,
            hi=4096,
            doc="block groups: rows are clustered into this many groups (k-means on the fair space) that workers sweep independently; at most this many workers are busy, and more groups weaken the preconditioner (on the 1M-row demo graph 4 groups solved 5-10% faster than 8, measured), so set it to about the number of workers",
        ),
        "relaxation": Rule(
            "float",
            default=1.3,
            lo=0.05,
            hi=1.95,
            doc="'sweep-cg': relaxation factor omega of the symmetric sweeps (1 = symmetric Gauss-Seidel, other values = SSOR); 1.3 took 5-7% fewer sweeps than 1 on the 1M-row demo graph (measured)",
        ),
        "workers": Rule(
            "int",
            default=0,
            lo=0,
            hi=1024,
            doc="worker processes or threads for the group sweeps (0 = one per core, at most groups); results do not depend on it",
            affects_result=False,
        ),
        "backend": Rule(
            "str",
            default="threads",
            choices=("threads", "processes"),
            doc="run group sweeps in threads (compiled kernels release the GIL) or loky worker processes over memmaps",
            affects_result=False,
        ),
        "checkpoint_every": Rule(
            "int",
            default=1,
            lo=1,
            hi=1_000_000,
            doc="write the solver checkpoint after every this many sweeps",
            affects_result=False,
        ),
        "block_rows": Rule(
            "int", default=4096, lo=1, hi=10_000_000, doc="rows per block of the 'blocks' solver"
        ),
        "block_solve": Rule(
            "str",
            default="exact",
            choices=("exact", "sweeps"),
            doc="'blocks' solver: solve each block exactly (sparse LU) or by inner Gauss-Seidel sweeps",
        ),
        "inner_sweeps": Rule(
            "int",
            default=2,
            lo=1,
            hi=1000,
            doc="'blocks' solver: inner Gauss-Seidel sweeps per block when block_solve = 'sweeps'",
        ),
        "warm_start": Rule(
            "bool",
            default=False,
            doc="start the solver from the adjusted scores currently published in output.path, for ids present in both (new ids start from their raw score); converges to the same answer within tol, in fewer sweeps",
        ),
        "stability": Rule(
            "float",
            default=0.0,
            lo=0.0,
            hi=1000.0,
            doc="weight mu of a pull towards the adjusted score currently published (last night's) for rows whose raw scores did not change: the solve becomes (C + mu C_S + lam L) f = C y + mu C_S f_last (S those rows); 0 (default) is the published method as it is. Fewer decisions flip night over night; similar rows can then differ by their history (README, Night over night)",
        ),
        "tol": Rule(
            "float", default=1e-6, lo=1e-15, hi=1.0, doc="stop when ||C y - A f|| / ||C y|| falls below this"
        ),
        "max_sweeps": Rule(
            "int",
            default=500,
            lo=1,
            hi=1_000_000,
            doc="cap on outer sweeps; hitting it warns and is recorded",
        ),
    },
    "output": {
        "path": Rule(
            "str",
            doc="output folder; each run writes a new version folder inside it and then moves the 'current' pointer",
        ),
        "include_protected": Rule(
            "bool", default=False, doc="copy the protected-attribute columns into the output"
        ),
        "suffix": Rule(
            "str",
            default="_adjusted",
            doc="suffix of the adjusted score columns (the change column ends in '_change')",
        ),
        "keep_versions": Rule(
            "int",
            default=0,
            lo=0,
            hi=100_000,
            doc="keep this many newest published versions (and always the current one); older ones are deleted after each successful publish and by `bigsmooth prune` (0 = keep all)",
            affects_result=False,
        ),
    },
    "audit": {
        "select_rate": Rule(
            "float",
            default=0.3,
            lo=1e-6,
            hi=1.0,
            doc="share of rows selected (highest scores) at the quantile cutoff used for decisions",
        ),
        "min_group_rows": Rule(
            "int", default=10, lo=1, hi=1_000_000, doc="groups smaller than this are suppressed in the audit"
        ),
        "top_changes": Rule(
            "int", default=10, lo=0, hi=10000, doc="list this many largest changes (ids) in the audit"
        ),
        "lipschitz": Rule(
            "float",
            default=0.0,
            lo=0.0,
            hi=1e9,
            doc="Lipschitz constant L for the violation rates |f_i - f_j| > L d_ij (0 = the 90th percentile of |y_i - y_j| / d_ij over the raw scores' neighbour pairs)",
        ),
        "pair_sample": Rule(
            "int",
            default=200000,
            lo=100,
            hi=100_000_000,
            doc="random pairs of rows sampled for the global Lipschitz rate",
        ),
        "controls": Rule(
            "bool",
            default=True,
            doc="compute the two controls: shrinkage toward the mean with the same spread reduction, and smoothing on a random graph of the same degree with its strength chosen for the same spread reduction",
        ),
        "report_note": Rule(
            "str",
            default="",
            doc="a line shown under the status banner of the report (e.g. which model and population this is)",
            affects_result=False,
        ),
        "counterfactual_rows": Rule(
            "int",
            default=1000,
            lo=1,
            hi=100_000_000,
            doc="rows sampled for the exact counterfactual figure after smoothing (each needs a local solve; all rows when the table is smaller)",
        ),
        "counterfactual_tol": Rule(
            "float",
            default=1e-4,
            lo=1e-12,
            hi=0.1,
            doc="the local solves for the counterfactual figure stop when one more hop changes a row's self-influence G_ii by less than this",
        ),
    },
    "gates": {
        "max_auc_drop": Rule(
            "float",
            default=0.01,
            lo=0.0,
            hi=1.0,
            doc="fail when the AUC on labelled rows drops by more than this share of its value (0.01 = 1% relative; common practice; 1 = off; off as well when no labelled rows hold both outcomes)",
        ),
        "min_neighbour_consistency": Rule(
            "float",
            default=0.0,
            lo=0.0,
            hi=1.0,
            doc="fail when the neighbour consistency of decisions in the fair space after smoothing is below this (0 = off)",
        ),
        "max_decision_change_rate": Rule(
            "float",
            default=1.0,
            lo=0.0,
            hi=1.0,
            doc="fail when more than this share of decisions changes (1 = off)",
        ),
        "max_selection_ratio_drop": Rule(
            "float",
            default=1.0,
            lo=0.0,
            hi=1.0,
            doc="fail when any group's selection-rate ratio to the highest group (the four-fifths ratio, 29 CFR 1607.4(D)) falls by more than this after smoothing, e.g. 0.02 (1 = off)",
        ),
        "max_added_night_flips": Rule(
            "float",
            default=1.0,
            lo=0.0,
            hi=1.0,
            doc="fail when the adjusted scores flipped more decisions night over night than the raw scores did, by more than this share of the rows in both nights, e.g. 0.005 (1 = off; off as well, and said so, when there is no earlier night to compare with)",
        ),
        "on_fail": Rule(
            "str",
            default="hold",
            choices=("hold", "publish"),
            doc="'hold': a failed gate publishes nothing and last night's output stays current; 'publish': publish anyway (the exit code still says the gate failed)",
            affects_result=False,
        ),
    },
    "run": {
        "drop_intermediates": Rule(
            "bool",
            default=False,
            doc="after a successful publish, delete the run's intermediate files that no later command reads (the order stage's split graph, the solver's scaled system and checkpoint, the graph's partition plan): about half of a run directory. A later run that reuses this run's stages computes the order stage again",
            affects_result=False,
        ),
        "keep_runs": Rule(
            "int",
            default=0,
            lo=0,
            hi=100_000,
            doc="keep this many newest run directories of this job (runs publishing to output.path; always the run behind the current version and any run in progress); older ones are deleted after each successful publish and by `bigsmooth prune` (0 = keep all)",
            affects_result=False,
        ),
        "dir": Rule(
            "str",
            default="",
            doc="folder holding one run directory per (config, input) pair; relative to the config file. Not given: $STATE_DIRECTORY/runs under a systemd service with StateDirectory= (e.g. /var/lib/bigsmooth/runs), else $XDG_STATE_HOME/bigsmooth/runs (~/.local/state/bigsmooth/runs), never the config's own folder (a config in /etc would put runs under /etc)",
            affects_result=False,
        ),
        "seed": Rule(
            "int",
            default=0,
            lo=0,
            hi=2**32 - 1,
            doc="seed of every random choice (neighbour index, probe sample)",
        ),
        "memory_mb": Rule(
            "int",
            default=4096,
            lo=256,
            hi=100_000_000,
            doc="memory budget in MiB for streaming: sets rows per chunk and DuckDB's memory_limit (a quarter each)",
            affects_result=False,
        ),
        "on_input_change": Rule(
            "str",
            default="fresh",
            choices=("fresh", "refuse"),
            doc="when an unfinished run with the same settings exists but the input files changed: 'fresh' starts a new run (and says which files changed), 'refuse' stops with exit code 65",
            affects_result=False,
        ),
        "engine": Rule(
            "str",
            default="local",
            choices=("local", "dask"),
            doc="where tasks run (the embed passes by input file, the graph stage's partition searches, the solver's group sweeps, the audit's neighbour figures by row block, the output files): 'local' = in this process; 'dask' = on the dask.distributed cluster at run.dask_scheduler (the same result bit for bit; needs pip install bigsmooth[dask] and the run directory, input and output on storage every worker mounts at the same path)",
            affects_result=False,
        ),
        "dask_scheduler": Rule(
            "str",
            default="",
            doc="address of the Dask scheduler, e.g. tcp://10.0.0.5:8786 ('' = the DASK_SCHEDULER_ADDRESS environment variable)",
            affects_result=False,
        ),
        "dask_solve": Rule(
            "str",
            default="same-host",
            choices=("same-host", "by-value", "always", "never"),
            doc="with run.engine = 'dask', where the solver's group sweeps run and how they exchange the solver's vectors: 'same-host' shares them through memory-mapped files in the run directory, so it sends the sweeps to the cluster only when every worker runs on this host (else they run here); 'by-value' sends them to the cluster wherever its workers run: each task gets its group's rows of the vectors and returns its new rows, which are written back here (and the whole of one vector goes to the cluster once a phase: 8 bytes x rows x score columns); 'always' shares the files across hosts too (only on a file system whose memory maps are coherent between hosts; NFS is not); 'never' keeps them here",
            affects_result=False,
        ),
    },
}

PATH_KEYS = {("input", "path"), ("output", "path"), ("run", "dir"), ("input", "pairs")}
REQUIRED_PATHS = {
    ("input", "path"): "Parquet file, folder or glob",
    ("output", "path"): "folder for the output",
    ("run", "dir"): "folder for the run directories",
}
ADJUSTED_SUFFIX_RESERVED = ("", "_change")


def _suggest(word, candidates):
    close = difflib.get_close_matches(word, list(candidates), n=1, cutoff=0.6)
    return f"; did you mean '{close[0]}'?" if close else ""


def _check(section, key, rule, value):
    name = f"{section}.{key}"

    def fail(expect):
        raise ConfigError(f"{name} must be {expect}; got {value!r}")

    k = rule.kind
    if k == "bool":
        if not isinstance(value, bool):
            fail("true or false")
        return value
    if k == "int":
        if isinstance(value, bool) or not isinstance(value, int) or not (rule.lo <= value <= rule.hi):
            fail(f"an integer in [{rule.lo}, {rule.hi}]")
        return value
    if k == "float":
        if (
            isinstance(value, bool)
            or not isinstance(value, (int, float))
            or not math.isfinite(value)
            or not (rule.lo <= value <= rule.hi)
        ):
            fail(f"a number in [{rule.lo:g}, {rule.hi:g}]")
        return float(value)
    if k == "str":
        if not isinstance(value, str):
            fail("a string")
        if rule.choices and value not in rule.choices:
            fail("one of " + ", ".join(repr(c) for c in rule.choices))
        return value
    if k == "list[str]":
        if isinstance(value, str):
            value = [value]
        if not isinstance(value, list) or not all(isinstance(v, str) and v for v in value):
            fail("a list of column names")
        if len(set(value)) != len(value):
            fail("a list without repeats")
        return list(value)
    if k == "range":
        if (
            not isinstance(value, list)
            or len(value) != 2
            or not all(
                isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v) for v in value
            )
            or not value[0] < value[1]
        ):
            fail("[min, max] with min < max")
        return [float(value[0]), float(value[1])]
    if k == "table[float]":
        if not isinstance(value, dict):
            fail("a table of feature = weight")
        out = {}
        for f, w in value.items():
            if isinstance(w, bool) or not isinstance(w, (int, float)) or not (rule.lo <= w <= rule.hi):
                raise ConfigError(f"{name}.{f} must be a number in [{rule.lo:g}, {rule.hi:g}]; got {w!r}")
            out[f] = float(w)
        return out
    raise AssertionError(k)


def default_run_dir(environ=None):
    """run.dir when the config does not give one: the service's state directory (systemd sets
    $STATE_DIRECTORY for StateDirectory=), else $XDG_STATE_HOME/bigsmooth (XDG Base Directory
    specification; default ~/.local/state), with runs/ inside."""
    env = os.environ if environ is None else environ
    state = env.get("STATE_DIRECTORY", "").split(":")[0]
    if state:
        return os.path.join(state, "runs")
    xdg = env.get("XDG_STATE_HOME") or os.path.join(os.path.expanduser("~"), ".local", "state")
    return os.path.join(xdg, "bigsmooth", "runs")


def validate(raw, base_dir="."):
    """Check a raw config dict against :data:`RULES`; return the filled config."""
    if not isinstance(raw, dict):
        raise ConfigError("the config must be a TOML table")
    for section in raw:
        if section not in RULES:
            raise ConfigError(
                f"unknown config section [{section}]{_suggest(section, RULES)}; "
                f"known sections: {', '.join(RULES)}"
            )
    cfg = {}
    for section, rules in RULES.items():
        given = raw.get(section, {})
        if not isinstance(given, dict):
            raise ConfigError(f"[{section}] must be a table")
        for key in given:
            if key not in rules:
                raise ConfigError(
                    f"unknown key {section}.{key}{_suggest(key, rules)}; "
                    f"known keys in [{section}]: {', '.join(rules)}"
                )
        out = {}
        for key, rule in rules.items():
            if key in given:
                value = _check(section, key, rule, given[key])
                if (section, key) in PATH_KEYS and isinstance(value, str) and "://" in value:
                    raise ConfigError(
                        f"{section}.{key} = {value!r} names an object store or URL; object stores "
                        "are not supported yet: use a local or mounted file system path"
                    )
                if (section, key) in REQUIRED_PATHS and not value.strip():
                    raise ConfigError(
                        f"{section}.{key} is empty; it must name a {REQUIRED_PATHS[(section, key)]}"
                    )
            elif rule.default is REQUIRED:
                raise ConfigError(f"{section}.{key} is required ({rule.doc})")
            else:
                value = json.loads(json.dumps(rule.default))
            if (section, key) == ("run", "dir") and not value:
                value = default_run_dir()
            if (section, key) in PATH_KEYS and not value:
                pass  # an optional path left empty
            elif (
                (section, key) in PATH_KEYS
                and not any(c in value for c in "*?[")
                and not os.path.isabs(value)
            ):
                value = os.path.normpath(os.path.join(base_dir, value))
            elif (section, key) in PATH_KEYS and not os.path.isabs(value):
                value = os.path.join(os.path.abspath(base_dir), value)
            out[key] = value
        cfg[section] = out
    _cross_checks(cfg)
    return cfg


def _cross_checks(cfg):
    inp = cfg["input"]
    feats = inp["numeric_features"] + inp["categorical_features"]
    if not feats:
        raise ConfigError(
            "input.numeric_features and input.categorical_features are both empty; "
            "at least one feature column is needed to decide who is similar"
        )
    roles = [
        ("id", [inp["id"]]),
        ("scores", inp["scores"]),
        ("numeric_features", inp["numeric_features"]),
        ("categorical_features", inp["categorical_features"]),
        ("protected", inp["protected"]),
        ("label", [inp["label"]] if inp["label"] else []),
        ("compare_scores", inp["compare_scores"]),
        ("counterfactual_score", [inp["counterfactual_score"]] if inp["counterfactual_score"] else []),
    ]
    seen = {}
    for role, cols in roles:
        for c in cols:
            if c in seen:
                raise ConfigError(
                    f"column {c!r} is given as both input.{seen[c]} and input.{role}; "
                    "each column has one role (protected attributes must not be features)"
                )
            seen[c] = role
    if cfg["embed"]["batch_rows"] % 8192:
        raise ConfigError(
            f"embed.batch_rows must be 0 or a multiple of 8192; got {cfg['embed']['batch_rows']}"
        )
    for f in cfg["embed"]["feature_weights"]:
        if f not in feats:
            raise ConfigError(
                f"embed.feature_weights names {f!r}, which is not a feature{_suggest(f, feats)}"
            )
    _check_output_apart(cfg)
    suffix = cfg["output"]["suffix"]
    if suffix in ADJUSTED_SUFFIX_RESERVED or not suffix.strip():
        raise ConfigError(
            f"output.suffix must be a non-empty suffix other than '_change' (the change column "
            f"ends in '_change'); got {suffix!r}"
        )
    out_cols = [inp["id"]] + inp["scores"] + inp["protected"]
    for c in inp["scores"]:
        for made in (c + suffix, c + "_change"):
            if made in out_cols:
                raise ConfigError(
                    f"output.suffix {suffix!r} makes the output column {made!r}, which is also an "
                    "input column of the output; choose another suffix"
                )


def _inside(child, parent):
    return child == parent or child.startswith(parent.rstrip(os.sep) + os.sep)


def _check_output_apart(cfg):
    """The output must not be the input folder, inside it, or a link to it: the next night would read
    last night's output as input."""
    inp_path, out_path = cfg["input"]["path"], cfg["output"]["path"]
    base = inp_path
    while any(c in base for c in "*?["):
        base = os.path.dirname(base)
    in_real, out_real = os.path.realpath(base), os.path.realpath(out_path)
    bad = out_real == in_real if os.path.isfile(in_real) else _inside(out_real, in_real)
    if bad or os.path.abspath(out_path) == os.path.abspath(inp_path):
        raise ConfigError(
            f"output.path {out_path} is the input folder, inside it or a link to it (input.path "
            f"{inp_path}); the next run would read this output as input. Put the output elsewhere."
        )


def load_config(path):
    """Read and check a TOML config file. Raises :class:`ConfigError`."""
    path = os.fspath(path)
    try:
        with open(path, "rb") as fh:
            data = fh.read()
    except FileNotFoundError:
        raise ConfigError(f"config file not found: {path}") from None
    except IsADirectoryError:
        raise ConfigError(f"config path {path} is a directory; give the path of a TOML file") from None
    except OSError as exc:
        raise ConfigError(f"config file {path} cannot be read: {exc.strerror}") from None
    if data.startswith(b"\xef\xbb\xbf"):  # a byte-order mark, as some editors write: not part of TOML
        data = data[3:]
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        raise ConfigError(
            f"config file {path} is not UTF-8 text (TOML must be UTF-8): byte 0x{data[exc.start]:02x} "
            f"on line {line}; save it as UTF-8"
        ) from None
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"config file {path} is not valid TOML: {exc}") from None
    global APPLIED
    APPLIED = apply_overrides(raw, env_overrides(os.environ) + [(s, "--set") for s in CLI_OVERRIDES])
    return validate(raw, base_dir=os.path.dirname(os.path.abspath(path)))


ENV_PREFIX = "BIGSMOOTH_"
CLI_OVERRIDES = []  # "section.key=value" from the command line (bigsmooth --set), set by the CLI
APPLIED = []  # the overrides the last load_config applied, for the provenance record


def env_overrides(environ):
    """[("section.key=value", "BIGSMOOTH_SECTION__KEY")] from the environment: variables named
    BIGSMOOTH_<SECTION>__<KEY> (a double underscore between section and key, case-insensitive)."""
    out = []
    for name in sorted(environ):
        if name.startswith(ENV_PREFIX) and "__" in name[len(ENV_PREFIX) :]:
            section, key = name[len(ENV_PREFIX) :].lower().split("__", 1)
            out.append((f"{section}.{key}={environ[name]}", name))
    return out


def _override_value(text):
    """A TOML value (number, boolean, quoted string, array, inline table), else the text itself
    as a string (so that paths need no quotes)."""
    try:
        return tomllib.loads(f"v = {text}")["v"]
    except tomllib.TOMLDecodeError:
        return text


def apply_overrides(raw, overrides):
    """Set each ("section.key=value", source) in ``raw`` (environment first, then --set, so the
    command line wins); relative paths are taken from the current directory. Returns the applied
    overrides as strings for the provenance. Unknown sections and keys are refused by the normal
    validation, which names them."""
    applied = []
    for text, source in overrides:
        name, sep, value = text.partition("=")
        section, dot, key = name.strip().partition(".")
        if not sep or not dot or not section or not key:
            raise ConfigError(f"{source} {text!r} must look like SECTION.KEY=VALUE (e.g. solve.lam=3)")
        section, key = section.strip(), key.strip()
        v = _override_value(value.strip())
        if (section, key) in PATH_KEYS and isinstance(v, str) and v and "://" not in v:
            v = os.path.abspath(v)
        sec = raw.setdefault(section, {})
        if not isinstance(sec, dict):
            raise ConfigError(f"{source} {text!r}: [{section}] in the config file is not a table")
        sec[key] = v
        applied.append(f"{section}.{key}={json.dumps(v)} ({source})")
    return applied


def result_settings(cfg):
    """The settings that change results (the run identity), as a nested dict. Paths are taken
    relative to run.dir (the declared root of the run directories), so a tree of config, input,
    output and runs moved or mounted elsewhere keeps its identities."""

    def value(s, k, v):
        if (s, k) in PATH_KEYS and isinstance(v, str) and os.path.isabs(v):
            return os.path.relpath(v, cfg["run"]["dir"])
        return v

    return {s: {k: value(s, k, v) for k, v in cfg[s].items() if RULES[s][k].affects_result} for s in RULES}


def config_hash(cfg):
    canon = json.dumps(result_settings(cfg), sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(canon.encode()).hexdigest()
