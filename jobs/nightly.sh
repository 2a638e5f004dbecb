#!/usr/bin/env bash
# Nightly entry point for a scheduler: config path in, the job's exit code out.
#
#   jobs/nightly.sh /etc/bigsmooth/tenancy.toml
#
# Example crontab line (02:30 every night; logs appended, one line per event):
#   30 2 * * *  /opt/bigsmooth/jobs/nightly.sh /etc/bigsmooth/tenancy.toml >>/var/log/bigsmooth.log 2>&1
#
# Exit codes are bigsmooth's own (see README): 0 done or already done, 75 another run holds the
# lock (retry later), 65 bad data, 66 missing input, 73 cannot write, 78 bad config, 70 bug.
# Running it again after an interruption resumes the same run.
set -u
if [ $# -ne 1 ]; then
  echo "usage: $0 CONFIG.toml" >&2
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
"$bin" run "$1"
code=$?
echo "$(date -u +%Y-%m-%dT%H:%M:%SZ) nightly: bigsmooth run $1 exited $code" >&2
exit $code
