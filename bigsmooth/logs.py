"""Log lines for people (the default) or one JSON object a line for log collectors.

Every record can carry an event name and fields (``event(log, "stage_done", "...", seconds=3.2)``);
the JSON form adds the run id and stage the job is in (:data:`CONTEXT`, set by the pipeline). Records
logged without an event get ``"event": "message"``; the human line is always in ``message``.

The JSON keys (documented in README, "Logs"; the schema version is :data:`LOG_SCHEMA`):
``time`` (UTC, ISO 8601 with milliseconds), ``level``, ``logger``, ``run_id``, ``stage``, ``event``,
``message``, then the event's own fields, and ``exception`` (the traceback) when there is one.
"""

import json
import logging
import sys
import time

LOG_SCHEMA = "bigsmooth.log/1"
FORMATS = ("text", "json")
LEVELS = ("debug", "info", "warning", "error")

# the run and stage this process is working on (one job a process; worker processes log nothing of
# their own through these handlers)
CONTEXT = {"run_id": None, "stage": None}


def event(logger, name, message, *args, level=logging.INFO, **fields):
    """Log ``message % args`` as the event ``name`` with ``fields`` (JSON-serialisable values)."""
    logger.log(level, message, *args, extra={"event": name, "fields": fields})


class JsonFormatter(logging.Formatter):
    def format(self, record):
        t = time.gmtime(record.created)
        obj = {
            "time": time.strftime("%Y-%m-%dT%H:%M:%S", t) + f".{int(record.msecs):03d}Z",
            "level": record.levelname.lower(),
            "logger": record.name,
            "run_id": CONTEXT["run_id"],
            "stage": CONTEXT["stage"],
            "event": getattr(record, "event", "message"),
            "message": record.getMessage(),
        }
        for k, v in (getattr(record, "fields", None) or {}).items():
            if obj.get(k) is None:  # an event's own stage or run id fills an empty context
                obj[k] = v
        if record.exc_info:
            obj["exception"] = self.formatException(record.exc_info)
        return json.dumps(obj, default=_plain, ensure_ascii=False)


def _plain(v):
    """numpy scalars and arrays, paths: as JSON can hold them."""
    if hasattr(v, "tolist"):
        return v.tolist()
    return str(v)


def setup(fmt="text", level="info"):
    """Send the ``bigsmooth`` loggers to stderr in ``fmt`` at ``level`` (replacing earlier handlers)."""
    handler = logging.StreamHandler(sys.stderr)
    if fmt == "json":
        handler.setFormatter(JsonFormatter())
    else:
        text = logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s", "%Y-%m-%dT%H:%M:%SZ")
        text.converter = time.gmtime
        handler.setFormatter(text)
    root = logging.getLogger("bigsmooth")
    root.handlers[:] = [handler]
    root.setLevel(getattr(logging, level.upper()))
    root.propagate = False
