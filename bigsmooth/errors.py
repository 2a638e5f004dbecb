"""Exit codes and the exceptions that carry them.

The codes follow the BSD ``sysexits.h`` conventions so that a scheduler can tell
"fix your config" from "fix your data" from "retry later" from "bug".
"""

EXIT_OK = 0
EXIT_GATE = 3  # a quality gate of the audit failed (ours; outside the sysexits range)
EXIT_USAGE = 64  # EX_USAGE: bad command line
EXIT_DATA = 65  # EX_DATAERR: the input table is unusable
EXIT_NOINPUT = 66  # EX_NOINPUT: input path missing or unreadable
EXIT_SOFTWARE = 70  # EX_SOFTWARE: internal error (a bug; please report)
EXIT_CANTCREAT = 73  # EX_CANTCREAT: cannot write the run directory or output
EXIT_TEMPFAIL = 75  # EX_TEMPFAIL: another run holds the lock; retry later
EXIT_CONFIG = 78  # EX_CONFIG: the config file is wrong

# code: (meaning, what to do). The one source of the exit-code table: the CLI's --help, the README
# and jobs/nightly.sh are generated from it (python -m bigsmooth.errors; tests/stages/test_exit_codes.py).
EXIT_TABLE = {
    EXIT_OK: ("success (or nothing to do: the run was already complete)", "nothing"),
    EXIT_GATE: (
        'an audit gate failed (output held back unless gates.on_fail = "publish")',
        'read the report; nothing was published unless gates.on_fail = "publish"; alert',
    ),
    EXIT_USAGE: ("bad command line", "fix the call; alert"),
    EXIT_DATA: (
        "bad input data (columns, types, nulls, duplicate ids, ranges, schemas), or input files that "
        "changed while the job ran",
        "fix the data; the message has counts and example ids; alert",
    ),
    EXIT_NOINPUT: (
        "input path missing, unreadable or not Parquet (also corrupt data pages)",
        "check the path, permissions and files",
    ),
    EXIT_SOFTWARE: ("internal error", "report it (a bug); the run resumes after a fix"),
    EXIT_CANTCREAT: (
        "cannot write the run directory or the output (also a full disk)",
        "free space or fix permissions, then run again: it resumes",
    ),
    EXIT_TEMPFAIL: (
        'another run holds the lock, or the Dask cluster (run.engine = "dask") cannot be reached',
        "retry later; the run resumes",
    ),
    EXIT_CONFIG: ("bad configuration", "fix the config; alert"),
}
EXIT_CODES = {code: meaning for code, (meaning, _) in EXIT_TABLE.items()}
# what a scheduler does with a failure: retry these later (the run resumes), alert on the others
RETRY_LATER = (EXIT_TEMPFAIL,)


def markdown_table():
    """The exit-code table as the README shows it."""
    rows = ["| code | meaning | what to do |", "|---|---|---|"]
    rows += [f"| {c} | {m} | {w} |" for c, (m, w) in EXIT_TABLE.items()]
    return "\n".join(rows)


def shell_comment():
    """The exit-code table as comment lines for shell scripts and unit files in jobs/."""
    return "\n".join(f"#   {c:>3}  {m}" for c, (m, _) in EXIT_TABLE.items())


def alert_codes():
    """The failure codes a scheduler should alert on rather than retry."""
    return [c for c in EXIT_TABLE if c != EXIT_OK and c not in RETRY_LATER]


def systemd_restart():
    """The restart policy lines of jobs/bigsmooth.service: retry later on RETRY_LATER (and when the
    process was killed), never on the codes that need a person."""
    return "\n".join(
        [
            "Restart=on-failure",
            "RestartSec=15min",
            "RestartPreventExitStatus=" + " ".join(str(c) for c in alert_codes()),
        ]
    )


class BigsmoothError(Exception):
    """Base class: a failure the user can act on, with its exit code."""

    exit_code = EXIT_SOFTWARE
    kind = "error"


class ConfigError(BigsmoothError):
    exit_code = EXIT_CONFIG
    kind = "config error"


class DataError(BigsmoothError):
    exit_code = EXIT_DATA
    kind = "data error"


class InputMissingError(BigsmoothError):
    exit_code = EXIT_NOINPUT
    kind = "input error"


class OutputError(BigsmoothError):
    exit_code = EXIT_CANTCREAT
    kind = "output error"


class GateError(BigsmoothError):
    exit_code = EXIT_GATE
    kind = "gate failed"


class LockHeldError(BigsmoothError):
    exit_code = EXIT_TEMPFAIL
    kind = "busy"


class EngineUnavailableError(BigsmoothError):
    exit_code = EXIT_TEMPFAIL
    kind = "engine unavailable"


def examples(values, limit=5):
    """Format up to ``limit`` example values for an error message."""
    vals = list(values)[:limit]
    return ", ".join(repr(v) for v in vals)


if __name__ == "__main__":
    print(markdown_table())
    print()
    print(shell_comment())
    print()
    print(systemd_restart())
