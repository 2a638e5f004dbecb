#!/usr/bin/env bash
# Nightly entry point for a scheduler: config path in, the job's exit code out.
#
#   jobs/nightly.sh /etc/bigsmooth/tenancy.toml [more bigsmooth run options, e.g. --set input.path=...]
#
# Exit 75 (another run holds the lock, or the Dask cluster is unreachable) is retried here
# BIGSMOOTH_RETRIES times (default 3), BIGSMOOTH_RETRY_SECONDS apart (default 900); the run resumes
# where it stopped. Every other code is passed on for the scheduler to alert on.
# cron: see jobs/crontab.example (flock keeps two nights from overlapping). systemd: the
# bigsmooth.service and .timer beside this file do the retrying themselves and call bigsmooth directly.
#
# Exit codes are bigsmooth's own (README "Exit codes"); 75 means retry later:
# exit-codes:start (generated from bigsmooth/errors.py: python -m bigsmooth.errors)
#     0  success (or nothing to do: the run was already complete)
#     3  an audit gate failed (output held back unless gates.on_fail = "publish")
#    64  bad command line
#    65  bad input data (columns, types, nulls, duplicate ids, ranges, schemas), or input files that changed while the job ran
#    66  input path missing, unreadable or not Parquet (also corrupt data pages)
#    70  internal error
#    73  cannot write the run directory or the output (also a full disk)
#    75  another run holds the lock, or the Dask cluster (run.engine = "dask") cannot be reached
#    78  bad configuration
# exit-codes:end
# Running it again after an interruption resumes the same run.
set -u
if [ $# -lt 1 ]; then
  echo "usage: $0 CONFIG.toml [bigsmooth run options]" >&2
  exit 64
fi
here=$(cd "$(dirname "$0")" && pwd)
if [ -n "${BIGSMOOTH:-}" ]; then
  bin=$BIGSMOOTH
elif [ -x "$here/../.venv/bin/bigsmooth" ]; then
  bin="$here/../.venv/bin/bigsmooth"
else
  bin=$(command -v bigsmooth) || { echo "$0: bigsmooth not found (run 'make install' or set BIGSMOOTH)" >&2; exit 70; }
fi
retries=${BIGSMOOTH_RETRIES:-3}
wait=${BIGSMOOTH_RETRY_SECONDS:-900}
attempt=0
while :; do
  "$bin" run "$@"
  code=$?
  echo "$(date -u +%Y-%m-%dT%H:%M:%SZ) nightly: bigsmooth run $* exited $code (attempt $((attempt + 1)))" >&2
  if [ "$code" -ne 75 ] || [ "$attempt" -ge "$retries" ]; then
    exit $code
  fi
  attempt=$((attempt + 1))
  sleep "$wait"
done
