"""Command line: parses arguments and calls the pipeline; no work of its own."""

import argparse
import json
import logging
import os
import sys
import traceback

from . import __version__
from . import artifacts as art
from . import logs
from .errors import EXIT_CODES, EXIT_OK, EXIT_SOFTWARE, EXIT_USAGE, BigsmoothError

log = logging.getLogger("bigsmooth")

EPILOG = "exit codes:\n" + "\n".join(f"  {code:>3}  {what}" for code, what in EXIT_CODES.items())


SET_HELP = (
    "override a setting of the config file, validated by the same rules and recorded in the "
    "provenance (repeatable; e.g. --set input.path=/data/tonight --set solve.lam=3); a value is "
    'read as TOML (numbers, true/false, [arrays], "strings"), else as a string; relative paths are '
    "taken from the current directory. BIGSMOOTH_SECTION__KEY=VALUE environment variables do the "
    "same, and --set wins over them"
)


LOG_FORMAT_HELP = (
    "text (default): one line a record for people; json: one JSON object a line with time, level, "
    "logger, run_id, stage, event and the event's fields (README, Logs)"
)
LOG_LEVEL_HELP = "the least important records logged (default info; -q is warning)"


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # bad usage: sysexits EX_USAGE rather than argparse's 2
        self.print_usage(sys.stderr)
        self.exit(EXIT_USAGE, f"{self.prog}: error: {message}\n")


def build_parser():
    p = _Parser(
        prog="bigsmooth",
        formatter_class=argparse.RawDescriptionHelpFormatter,
        epilog=EPILOG,
        description="Nightly post-processing of model scores so that similar people get similar "
        "scores: reads a scored Parquet table, builds a neighbour graph in a fair "
        "feature space that ignores protected attributes, smooths the scores over the "
        "graph (graph-Laplacian smoothing) and publishes the adjusted scores with an "
        "audit.",
    )
    p.add_argument("--version", action="version", version=f"bigsmooth {__version__}")
    p.add_argument("-q", "--quiet", action="store_true", help="log warnings and errors only")
    p.add_argument("--log-format", choices=logs.FORMATS, default="text", help=LOG_FORMAT_HELP)
    p.add_argument("--log-level", choices=logs.LEVELS, default=None, help=LOG_LEVEL_HELP)
    p.add_argument("--set", action="append", default=[], metavar="SECTION.KEY=VALUE", help=SET_HELP)
    sub = p.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    # the logging flag is accepted after the command as well (bigsmooth run -q CONFIG)
    common = _Parser(add_help=False)
    common.add_argument(
        "-q", "--quiet", action="store_true", default=argparse.SUPPRESS, help="log warnings and errors only"
    )
    common.add_argument("--log-format", choices=logs.FORMATS, default=argparse.SUPPRESS, help=LOG_FORMAT_HELP)
    common.add_argument("--log-level", choices=logs.LEVELS, default=argparse.SUPPRESS, help=LOG_LEVEL_HELP)
    common.add_argument(
        "--set", action="append", default=argparse.SUPPRESS, metavar="SECTION.KEY=VALUE", help=SET_HELP
    )

    r = sub.add_parser(
        "run",
        parents=[common],
        formatter_class=argparse.RawDescriptionHelpFormatter,
        epilog=EPILOG,
        help="run (or resume) the job described by a config file",
        description="Run the job described by CONFIG (TOML; `bigsmooth init` writes a template). "
        "The run directory is named by a hash of the settings and the input "
        "files: the same config and input resume an interrupted run, and a "
        "finished one is not redone. A run whose settings differ from an earlier "
        "run's only in later stages (e.g. solve.lam) reuses the earlier run's "
        "scan, embed, graph and order outputs (hard links in run.dir).",
    )
    r.add_argument("config", metavar="CONFIG", help="path of the TOML config file")
    r.add_argument(
        "--json",
        action="store_true",
        help="print a machine-readable result on standard output instead of the summary (also when "
        "the run fails or is held: status, exit code, run id, output version, gates, headline "
        "figures; schema bigsmooth.run-result/1 in README)",
    )
    r.add_argument(
        "--fresh",
        action="store_true",
        help="discard any earlier state of this run and start over, "
        "computing every stage anew (no outputs reused from "
        "other runs)",
    )

    d = sub.add_parser(
        "demo",
        parents=[common],
        formatter_class=argparse.RawDescriptionHelpFormatter,
        epilog=EPILOG,
        help="generate the synthetic demo table and run the job on it",
        description="Generate a synthetic nightly tenancy pre-screen of a fictional housing "
        "co-operative (hive-partitioned Parquet under DIR/data), write its config "
        "to DIR/bigsmooth.toml and run the job. Prints where the output and the "
        "audit are. On a DIR that already holds the demo, its table and its "
        "(possibly edited) config are used as they are; --rows or --seed other than "
        "the table's are refused.",
    )
    d.add_argument("--rows", type=int, default=None, help="applicants to generate (default 300000)")
    d.add_argument(
        "--dir",
        default="bigsmooth-demo",
        help="folder for the demo's data, runs and output (default ./bigsmooth-demo)",
    )
    d.add_argument("--seed", type=int, default=None, help="seed of the generated data (default 7)")
    d.add_argument(
        "--next-night",
        action="store_true",
        help="turn the demo table in DIR into the next night's (2%% of the applicants leave, 2%% new ones "
        "arrive, 10%% are re-scored) and run the job again: its audit compares the night with the one "
        "published before",
    )

    t = sub.add_parser(
        "tune",
        parents=[common],
        formatter_class=argparse.RawDescriptionHelpFormatter,
        epilog=EPILOG,
        help="solve a path of lam values and recommend one (accuracy vs consistency)",
        description="Run the stages of CONFIG up to the graph ordering (shared with `bigsmooth "
        "run`), solve for each lam on the same graph (warm-starting each from the "
        "last) and print AUC, its drop and the consistency of decisions on the "
        "labelled rows; recommends the lam with the best consistency whose AUC drop "
        "is within the budget. Saves tune/tune.json and tune/tradeoff.png in the run "
        "directory. The next `bigsmooth run` that publishes shows the trade-off in its "
        "report (applied lam, recommended lam); for a run that has already finished, "
        "`bigsmooth report RUN_DIR` draws the report again. By default 20%% of the "
        "labelled rows are held out of the choice and reported separately.",
    )
    t.add_argument("config", metavar="CONFIG", help="path of the TOML config file")
    t.add_argument("--lams", default=None, help="comma-separated lam values (default 0.1,0.3,1,3,10,30)")
    t.add_argument(
        "--max-auc-drop",
        type=float,
        default=None,
        help="AUC drop budget, relative (default gates.max_auc_drop, 0.01 = 1%%)",
    )
    t.add_argument(
        "--holdout",
        type=float,
        default=0.2,
        help="share of labelled rows kept out of the choice and reported separately (default 0.2; "
        "0 uses every labelled row for the choice)",
    )

    rp = sub.add_parser(
        "report",
        parents=[common],
        formatter_class=argparse.RawDescriptionHelpFormatter,
        epilog=EPILOG,
        help="draw the HTML audit report of a run directory again (e.g. after tuning)",
        description="Draw RUN_DIR/audit/report.html again from the run's audit and arrays, with "
        "the tuning trade-off when `bigsmooth tune` has run since. Reads the config "
        "the run was made with (its path is in the manifest) unless --config is "
        "given. A published version folder is never changed: its _report.html stays "
        "as it was published.",
    )
    rp.add_argument("run_dir", metavar="RUN_DIR")
    rp.add_argument("--config", default=None, help="config file to read instead of the one in the manifest")

    s = sub.add_parser(
        "status",
        parents=[common],
        formatter_class=argparse.RawDescriptionHelpFormatter,
        epilog=EPILOG,
        help="where a job stands: its latest run, stage, sweep, published version, gates, disk",
        description="Show a run: each stage's state, timing and peak memory, the solver's record, "
        "the live stage and sweep of a running run, the published version (and whether it is still "
        "current), the gates, the report's path and the disk used by the run directory and the "
        "output's versions. TARGET is a run directory (a folder under run.dir holding "
        "manifest.json), an output folder (the run behind its current version) or a config file "
        "(the latest run made with it under its run.dir). Reads only; locks are tried, not taken.",
    )
    s.add_argument("target", metavar="TARGET", help="a config file, an output folder or a run directory")
    s.add_argument(
        "--json",
        action="store_true",
        help="print a JSON record instead (schema bigsmooth.status/1, documented in README: Status)",
    )

    it = sub.add_parser(
        "init",
        parents=[common],
        formatter_class=argparse.RawDescriptionHelpFormatter,
        epilog=EPILOG,
        help="write a starter config and the scheduler kit (systemd, cron, container) into a folder",
        description="Write DIR/bigsmooth.toml (the config template: every option with its default) "
        "and DIR/jobs/ (nightly.sh, a systemd service and timer, a cron line, a container recipe and "
        "an orchestrator example). They ship inside the package, so this works after a plain pip "
        "install. Existing files are never overwritten unless --force.",
    )
    it.add_argument("dir", metavar="DIR", nargs="?", default=".", help="target folder (default: here)")
    it.add_argument("--force", action="store_true", help="overwrite files that exist")

    pr = sub.add_parser(
        "prune",
        parents=[common],
        formatter_class=argparse.RawDescriptionHelpFormatter,
        epilog=EPILOG,
        help="delete old published versions and run directories (output.keep_versions, run.keep_runs)",
        description="Apply the config's retention: keep the newest output.keep_versions published "
        "versions and the newest run.keep_runs run directories of this job (0 keeps all). Never "
        "deleted: the current version, the run that made it, a run in progress. Takes the output's "
        "lock (exit 75 while a job publishes there). The same retention runs after each successful "
        "publish when either setting is above 0.",
    )
    pr.add_argument("config", metavar="CONFIG", help="path of the TOML config file")
    pr.add_argument("--dry-run", action="store_true", help="list what would be deleted; delete nothing")
    pr.add_argument("--json", action="store_true", help="print the list as JSON")

    sc = sub.add_parser(
        "score",
        parents=[common],
        formatter_class=argparse.RawDescriptionHelpFormatter,
        epilog=EPILOG,
        help="adjusted scores for late rows (arrived after the nightly run), the night held fixed",
        description="Score the rows of LATE (a Parquet file or folder with the nightly table's id, "
        "score and feature columns) against the run behind the output's current version "
        "(or --run RUN_DIR): the rows are checked with the nightly scan's rules, mapped "
        "into the night's fair space, joined to their nearest night rows with the night's "
        "kernel, and solved together with the night's solution held fixed (late rows near "
        "each other in the same batch see each other). Writes OUT/late.parquet (id, score, "
        "adjusted score, change, nearest_distance_ratio = distance to the nearest night "
        "row / the night's sigma, no_near_neighbour, unseen_levels) and OUT/_late.json; "
        "never changes the output's versions or its current pointer. Ids the night already "
        "scored are refused unless --replace. A category level the night never saw counts "
        "as no known level. The first call on a run builds its late-row index (kept in "
        "the run directory).",
    )
    sc.add_argument("config", metavar="CONFIG", help="path of the TOML config file of the nightly job")
    sc.add_argument("late", metavar="LATE", help="Parquet file or folder of late rows")
    sc.add_argument("--out", required=True, metavar="DIR", help="folder to write late.parquet into")
    sc.add_argument("--run", default=None, metavar="RUN_DIR", help="score against this finished run instead")
    sc.add_argument(
        "--replace",
        action="store_true",
        help="score ids the night already scored as late rows (their night rows are left out of the neighbours)",
    )
    sc.add_argument(
        "--batch",
        type=int,
        default=10_000,
        help="late rows searched and solved together (default 10000); rows of one batch see each other",
    )
    sc.add_argument(
        "--far",
        type=float,
        default=3.0,
        help="a late row whose nearest night row is farther than this many times the night's sigma "
        "keeps its score and is flagged no_near_neighbour (default 3)",
    )

    ex = sub.add_parser(
        "explain",
        parents=[common],
        formatter_class=argparse.RawDescriptionHelpFormatter,
        epilog=EPILOG,
        help="why one row's score moved: its own share and its neighbours' shares",
        description="For ID in the output's current version (or in --run RUN_DIR): the raw and "
        "adjusted score, the decision before and after at the audit's cutoffs, how much of the "
        "adjusted score comes from the row's own score and how much from its neighbours (the "
        "terms of the coordinate update at the solution, which add up to the adjusted score "
        "up to the solver's tolerance), and the heaviest neighbours (id, weight, fair-space "
        "distance, raw and adjusted score, share). Protected attributes are shown only when "
        "output.include_protected is true. --json prints the record (schema 1).",
    )
    ex.add_argument("config", metavar="CONFIG", help="path of the TOML config file")
    ex.add_argument("id", metavar="ID", help="the row's id")
    ex.add_argument("--run", default=None, metavar="RUN_DIR", help="explain in this finished run instead")
    ex.add_argument("--top", type=int, default=10, help="heaviest neighbours listed (default 10)")
    ex.add_argument("--json", action="store_true", help="print the record as JSON")

    df = sub.add_parser(
        "diff",
        parents=[common],
        formatter_class=argparse.RawDescriptionHelpFormatter,
        epilog=EPILOG,
        help="compare two published versions: rows added and removed, score changes, decision flips",
        description="Compare VERSION_A (the earlier) and VERSION_B of the output folder OUTPUT row by "
        "row by id, on the first score column: rows added, removed and in both; for rows in "
        "both the change of the adjusted score and the decisions that flipped (each night at "
        "its own audit cutoff), split into flips the raw score's own change explains and flips "
        "the smoothing added. The audit of every night that follows a published one carries the "
        "same comparison against it. --json prints the record (schema 1).",
    )
    df.add_argument("output", metavar="OUTPUT", help="the output folder (output.path)")
    df.add_argument("version_a", metavar="VERSION_A", help="the earlier version folder's name")
    df.add_argument("version_b", metavar="VERSION_B", help="the later version folder's name (or 'current')")
    df.add_argument("--json", action="store_true", help="print the record as JSON")

    ck = sub.add_parser(
        "check",
        parents=[common],
        formatter_class=argparse.RawDescriptionHelpFormatter,
        epilog=EPILOG,
        help="check the config and scan the input (the scan stage's checks), no heavy work",
        description="Validate CONFIG (with any --set / BIGSMOOTH_SECTION__KEY overrides) and run the "
        "scan stage's checks on the input: columns and types, nulls, NaN, ranges, duplicate ids, "
        "category counts, the pairs file. Nothing is written to run.dir or the output. Exits with "
        "the same codes as `bigsmooth run` (0 when the job would start).",
    )
    ck.add_argument("config", metavar="CONFIG", help="path of the TOML config file")
    return p


def _setup_logging(args):
    level = args.log_level or ("warning" if args.quiet else "info")
    logs.setup(args.log_format, level)


def _print_result(res):
    from .atomic import read_json
    from .stages.audit import summary_lines

    out = res["output"]
    report = read_json(os.path.join(out, art.OUTPUT_AUDIT))
    if res["already_complete"]:
        print(f"run {res['run_id']} was already complete; nothing done.")
    else:
        for line in summary_lines(report):
            print(line)
    print(f"output:    {out}")
    print(f"audit:     {os.path.join(out, art.OUTPUT_AUDIT)}")
    print(f"report:    {os.path.join(out, art.OUTPUT_REPORT)}")
    print(f"run dir:   {res['run_dir']}")


def cmd_run(args):
    from .outcome import run_result, summary_line
    from .pipeline import run_job

    try:
        res = run_job(args.config, fresh=args.fresh)
    except Exception as exc:
        code = exit_code_of(exc)
        rec = run_result(exc=exc, exit_code=code)
        logs.event(log, "run_finished", summary_line(rec), level=logging.ERROR, **_fields(rec))
        if args.json:
            print(json.dumps(rec, indent=2))
        raise
    rec = run_result(res)
    logs.event(log, "run_finished", summary_line(rec), **_fields(rec))
    if args.json:
        print(json.dumps(rec, indent=2))
    else:
        _print_result(res)
    return EXIT_OK


def _fields(rec):
    """The result record as log fields (without the keys every log line has already)."""
    return {k: v for k, v in rec.items() if k not in ("run_id",)}


def cmd_demo(args):
    from . import atomic, demo
    from .pipeline import run_job

    rows = 300_000 if args.rows is None else args.rows
    seed = 7 if args.seed is None else args.seed
    if rows < 100:
        raise BigsmoothError("--rows must be at least 100")
    base = os.path.abspath(args.dir)
    data = os.path.join(base, "data", "applicants")
    made = os.path.join(base, "data", art.DEMO_RECORD)
    if args.next_night:
        if not os.path.isdir(data) or not os.path.exists(made):
            raise BigsmoothError(
                f"--next-night needs a demo under {base}; run `bigsmooth demo --dir {args.dir}` first"
            )
        if args.rows is not None or args.seed is not None:
            raise BigsmoothError(
                "--next-night changes the demo table already there; it takes no --rows or --seed"
            )
        have = atomic.read_json(made)
        night = have.get("night", 1) + 1
        got = demo.next_night(data, night, seed=have["seed"])
        atomic.write_json(made, have | {"night": night})
        log.info(
            "night %d: %d applicants left, %d arrived, %d re-scored (%d rows)",
            night,
            got["removed"],
            got["added"],
            got["rescored"],
            got["rows"],
        )
    elif not os.path.isdir(data) or not os.listdir(data):
        log.info("generating %d synthetic applicants under %s", rows, data)
        demo.write_demo_table(data, rows, seed=seed)
        atomic.write_json(made, {"rows": rows, "seed": seed})
    else:
        have = atomic.read_json(made) if os.path.exists(made) else None
        asked = {k: v for k, v in (("rows", args.rows), ("seed", args.seed)) if v is not None}
        if asked and (have is None or any(have.get(k) != v for k, v in asked.items())):
            was = f"--rows {have['rows']} --seed {have['seed']}" if have else "other settings"
            raise BigsmoothError(
                f"the demo table under {data} was generated with {was}; to use "
                + " ".join(f"--{k} {v}" for k, v in asked.items())
                + " give another --dir or delete that folder"
            )
        log.info("using the demo table already under %s (delete the folder to regenerate)", data)
    cfg_path = os.path.join(base, "bigsmooth.toml")
    text = demo.CONFIG_TEMPLATE.format(data="data/applicants", output="output", runs="runs")
    if os.path.exists(cfg_path) and open(cfg_path, encoding="utf-8", errors="replace").read() != text:
        log.warning("%s differs from the demo's own config (edited?); using it as it is", cfg_path)
    else:
        demo.write_demo_config(cfg_path, "data/applicants", "output", "runs")
    print(f"demo config: {cfg_path}")
    _print_result(run_job(cfg_path))
    return EXIT_OK


def cmd_tune(args):
    from .config import load_config
    from .pipeline import run_job
    from .tune import DEFAULT_LAMS, table_lines, tune_run

    try:
        lams = [float(v) for v in args.lams.split(",")] if args.lams else list(DEFAULT_LAMS)
    except ValueError:
        raise BigsmoothError(f"--lams must be comma-separated numbers; got {args.lams!r}") from None
    if not lams or any(v <= 0 for v in lams) or not 0 <= args.holdout < 1:
        raise BigsmoothError("--lams must be positive numbers and --holdout in [0, 1)")
    budget = (
        args.max_auc_drop
        if args.max_auc_drop is not None
        else load_config(args.config)["gates"]["max_auc_drop"]
    )
    res = run_job(
        args.config,
        upto="order",
        then=lambda rd, cfg: tune_run(rd, cfg, lams=lams, budget=budget, holdout=args.holdout),
    )
    for line in table_lines(res["then"]):
        print(line)
    print(f"saved: {art.TUNE_INFO.path(res['run_dir'])} and {art.TUNE_PLOT.path(res['run_dir'])}")
    return EXIT_OK


def cmd_report(args):
    from .config import load_config
    from .errors import InputMissingError
    from .rundir import RunDir
    from .stages import report

    rd = RunDir(args.run_dir)
    if not rd.exists():
        raise InputMissingError(f"{args.run_dir} is not a run directory (no manifest.json)")
    if not art.AUDIT_REPORT_JSON.exists(rd):
        raise InputMissingError(
            f"{args.run_dir} has no audit yet (the audit stage has not finished); run the job first"
        )
    cfg = load_config(args.config or rd.config_path())
    report.write(rd, cfg, art.AUDIT_REPORT_JSON.load(rd))
    print(f"report: {art.AUDIT_REPORT_HTML.path(rd)}")
    return EXIT_OK


def cmd_status(args):
    from . import status

    rec = status.record(args.target)
    print(status.as_json(rec) if args.json else "\n".join(status.lines(rec)))
    return EXIT_OK


def cmd_init(args):
    from .kit import init

    written = init(args.dir, force=args.force)
    for p in written:
        print(f"wrote {p}")
    cfg = os.path.join(args.dir, "bigsmooth.toml")
    print(
        f"next: fill in [input] and [output] in {cfg}, then `bigsmooth check {cfg}`; "
        f"scheduling: {os.path.join(args.dir, 'jobs')} (README, Scheduling)"
    )
    return EXIT_OK


def cmd_prune(args):
    from . import prune
    from .config import load_config

    cfg = load_config(args.config)
    if not (cfg["output"]["keep_versions"] or cfg["run"]["keep_runs"]):
        log.warning(
            "output.keep_versions and run.keep_runs are 0 (keep all): nothing to prune; set them in "
            "the config or with --set output.keep_versions=N"
        )
    p = prune.prune_job(cfg, dry_run=args.dry_run)
    print(json.dumps(p, indent=2) if args.json else "\n".join(prune.lines(p)))
    return EXIT_OK


def cmd_score(args):
    from .late import score

    if args.batch < 1 or not args.far > 0:
        raise BigsmoothError("--batch must be at least 1 and --far positive")
    res = score(
        args.config,
        args.late,
        args.out,
        run_dir=args.run,
        replace=args.replace,
        batch=args.batch,
        far=args.far,
    )
    print(
        f"scored {res['late_rows']} late rows against run {res['night_run_id']} "
        f"(version {res['night_version']}): {res['no_near_neighbour']} without a near night row, "
        f"{res['unseen_level_rows']} with an unseen category level, {res['replaced_ids']} replaced ids"
    )
    print(f"output:    {res['path']}")
    return EXIT_OK


def cmd_explain(args):
    from .explain import explain, lines

    if args.top < 0:
        raise BigsmoothError("--top must be 0 or more")
    rec = explain(args.config, args.id, run_dir=args.run, top=args.top)
    if args.json:
        print(json.dumps(rec, indent=2))
    else:
        for line in lines(rec):
            print(line)
    return EXIT_OK


def cmd_diff(args):
    from . import nightly

    versions = []
    for v in (args.version_a, args.version_b):
        if v == "current":
            p = os.path.join(args.output, art.OUTPUT_POINTER)
            if not os.path.exists(p):
                from .errors import InputMissingError

                raise InputMissingError(f"{args.output} has no {art.OUTPUT_POINTER}: nothing published there")
            from .atomic import read_json

            v = read_json(p)["version"]
        versions.append(v)
    rec = nightly.diff(args.output, *versions)
    if args.json:
        print(json.dumps(rec, indent=2))
    else:
        print(f"{rec['version_a']} -> {rec['version_b']} ({rec['score']!r}, by {rec['id']!r})")
        for line in nightly.lines(rec):
            print(line)
    return EXIT_OK


def cmd_check(args):
    import tempfile

    from .config import load_config
    from .pipeline import with_pairs
    from .rundir import RunDir
    from .stages import scan
    from .stages.base import Context
    from .table import fingerprint

    cfg = load_config(args.config)
    fp = with_pairs(fingerprint(cfg["input"]["path"]), cfg["input"]["pairs"])
    with tempfile.TemporaryDirectory(prefix="bigsmooth-check-") as tmp:
        res = scan.run(Context(RunDir(tmp), cfg, fp, "check"))
    print(
        f"config {args.config}: valid; input {cfg['input']['path']}: {res['rows']} rows in {res['files']} "
        "files, all checks passed"
    )
    return EXIT_OK


def main(argv=None):
    os.environ.setdefault(
        "NUMBA_CACHE_DIR", os.path.join(os.path.expanduser("~"), ".cache", "bigsmooth", "numba")
    )
    parser = build_parser()
    args = parser.parse_args(argv)
    if not args.command:
        parser.print_help(sys.stderr)
        return EXIT_USAGE
    _setup_logging(args)
    from . import config as config_mod

    config_mod.CLI_OVERRIDES[:] = list(getattr(args, "set", None) or [])
    try:
        return {
            "run": cmd_run,
            "demo": cmd_demo,
            "tune": cmd_tune,
            "status": cmd_status,
            "report": cmd_report,
            "score": cmd_score,
            "explain": cmd_explain,
            "diff": cmd_diff,
            "check": cmd_check,
            "prune": cmd_prune,
            "init": cmd_init,
        }[args.command](args)
    except BigsmoothError as exc:
        code = exit_code_of(exc)
        if args.log_format == "json":
            logs.event(log, "error", str(exc), level=logging.ERROR, kind=exc.kind, exit_code=code)
        else:
            print(f"bigsmooth: {exc.kind}: {exc}", file=sys.stderr)
        return code
    except BrokenPipeError:
        # the reader of our standard output went away (e.g. `bigsmooth status RUN | head -1`): not an
        # error of ours; keep Python from complaining again when it flushes at exit
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return EXIT_OK
    except KeyboardInterrupt:
        _say(args, "interrupted", "interrupted; run the same command again to resume", 130)
        return 130
    except Exception:
        if args.log_format == "json":
            log.error(
                "internal error (a bug); the run can be resumed after it is fixed",
                exc_info=True,
                extra={"event": "error", "fields": {"kind": "internal error", "exit_code": EXIT_SOFTWARE}},
            )
        else:
            traceback.print_exc()
            print(
                "bigsmooth: internal error (a bug); the run can be resumed after it is fixed", file=sys.stderr
            )
        return EXIT_SOFTWARE


def _say(args, kind, message, code):
    if args.log_format == "json":
        logs.event(log, "error", message, level=logging.ERROR, kind=kind, exit_code=code)
    else:
        print(f"bigsmooth: {message}", file=sys.stderr)


def exit_code_of(exc):
    """The process exit code for an error (a BigsmoothError's own; 70 for anything else)."""
    if not isinstance(exc, BigsmoothError):
        return EXIT_SOFTWARE
    return exc.exit_code if exc.exit_code != EXIT_SOFTWARE else EXIT_USAGE
