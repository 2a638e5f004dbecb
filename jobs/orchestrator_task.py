"""The nightly job as one task of an orchestrator (a Python callable for Airflow's PythonOperator, a
Dagster op, a Prefect task, or a shell step that runs this file). Standard library only.

    python jobs/orchestrator_task.py /etc/bigsmooth/bigsmooth.toml [bigsmooth run options]

It runs `bigsmooth --log-format json run --json CONFIG`, reads the result record from standard output
(schema bigsmooth.run-result/1, README "Logs and results"), retries exit 75 (another run holds the
lock; the run resumes) and turns everything else into the task's outcome: the record when the
night was published, else :class:`NightlyFailed` carrying the record (``held`` by a gate: a person
reads the report; ``failed``: the error's kind and message). The JSON log lines go to the task's own
log (standard error) unchanged.
"""

import json
import os
import shlex
import subprocess
import sys
import time

RETRY_LATER = 75  # bigsmooth's "retry later" (bigsmooth.errors.RETRY_LATER)


class NightlyFailed(RuntimeError):
    def __init__(self, result):
        self.result = result
        err = result.get("error") or {}
        super().__init__(
            f"bigsmooth {result['status']} (exit {result['exit_code']}): "
            + (", ".join(result["failed_gates"]) if result["failed_gates"] else err.get("message", ""))
        )


def run_nightly(config, *options, command=None, retries=3, wait_seconds=900):
    """Run the night; return the result record when it was published (or already was)."""
    command = command or shlex.split(os.environ.get("BIGSMOOTH", "bigsmooth"))
    for attempt in range(retries + 1):
        proc = subprocess.run(
            [*command, "--log-format", "json", "run", "--json", config, *options],
            stdout=subprocess.PIPE,
            text=True,
        )
        try:
            result = json.loads(proc.stdout)
        except ValueError:  # no record: bigsmooth could not start (not installed, bad options)
            result = {
                "status": "failed",
                "exit_code": proc.returncode,
                "failed_gates": [],
                "error": {"kind": "no result", "message": proc.stdout[-500:]},
            }
        if proc.returncode == RETRY_LATER and attempt < retries:
            time.sleep(wait_seconds)
            continue
        if proc.returncode == 0 and result["status"] == "published":
            return result
        raise NightlyFailed(result)


if __name__ == "__main__":
    if len(sys.argv) < 2:
        sys.exit("usage: orchestrator_task.py CONFIG.toml [bigsmooth run options]")
    try:
        res = run_nightly(sys.argv[1], *sys.argv[2:])
    except NightlyFailed as exc:
        print(f"night not published: {exc}")
        sys.exit(exc.result["exit_code"] or 1)
    figures = res["figures"] or {}
    print(
        f"published {res['output_version']}: {figures.get('rows')} rows, decisions changed "
        f"{figures.get('decisions_changed_rate', 0):.2%}; report {res['report']}"
    )
