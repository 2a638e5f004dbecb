"""Exit codes and the exceptions that carry them.

The codes follow the BSD ``sysexits.h`` conventions so that a scheduler can tell
"fix your config" from "fix your data" from "retry later" from "bug".
"""

EXIT_OK = 0
EXIT_GATE = 3        # a quality gate of the audit failed (ours; outside the sysexits range)
EXIT_USAGE = 64      # EX_USAGE: bad command line
EXIT_DATA = 65       # EX_DATAERR: the input table is unusable
EXIT_NOINPUT = 66    # EX_NOINPUT: input path missing or unreadable
EXIT_SOFTWARE = 70   # EX_SOFTWARE: internal error (a bug; please report)
EXIT_CANTCREAT = 73  # EX_CANTCREAT: cannot write the run directory or output
EXIT_TEMPFAIL = 75   # EX_TEMPFAIL: another run holds the lock; retry later
EXIT_CONFIG = 78     # EX_CONFIG: the config file is wrong

EXIT_CODES = {
    EXIT_OK: "success (or nothing to do: the run was already complete)",
    EXIT_GATE: "an audit gate failed (output held back unless gates.on_fail = \"publish\")",
    EXIT_USAGE: "bad command line",
    EXIT_DATA: "bad input data (columns, types, nulls, duplicates, ranges)",
    EXIT_NOINPUT: "input path missing, unreadable or not Parquet",
    EXIT_SOFTWARE: "internal error",
    EXIT_CANTCREAT: "cannot write the run directory or the output",
    EXIT_TEMPFAIL: "another run holds the lock; retry later",
    EXIT_CONFIG: "bad configuration",
}


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


def examples(values, limit=5):
    """Format up to ``limit`` example values for an error message."""
    vals = list(values)[:limit]
    return ", ".join(repr(v) for v in vals)
