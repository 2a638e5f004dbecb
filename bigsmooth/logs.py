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


# True when progress is drawn as a live bar (text logs on a terminal): Progress then updates it
# about twice a second instead of logging a line every few seconds
LIVE = [False]


class TerminalHandler(logging.StreamHandler):
    """Text logs on a terminal: counted progress (``progress`` events with done and total) is one
    bar redrawn in place; any other record first clears the bar and is printed as a line."""

    WIDTH = 30

    def __init__(self, stream):
        super().__init__(stream)
        self.bar = False

    def emit(self, record):
        f = getattr(record, "fields", None) or {}
        try:
            if getattr(record, "event", None) == "progress" and f.get("total"):
                share = min(1.0, f["done"] / f["total"])
                filled = int(round(share * self.WIDTH))
                self.stream.write(
                    f"\r\033[K[{'#' * filled}{'-' * (self.WIDTH - filled)}] {record.getMessage()}"
                )
                self.bar = share < 1.0
                if not self.bar:
                    self.stream.write("\n")
                self.flush()
                return
            if self.bar:
                self.stream.write("\r\033[K")
                self.bar = False
        except Exception:  # a closed terminal: as logging does, never fail the job over a log line
            self.handleError(record)
            return
        super().emit(record)


def setup(fmt="text", level="info"):
    """Send the ``bigsmooth`` loggers to stderr in ``fmt`` at ``level`` (replacing earlier handlers);
    text on a terminal draws counted progress as a live bar (:class:`TerminalHandler`)."""
    LIVE[0] = fmt == "text" and sys.stderr.isatty()
    handler = TerminalHandler(sys.stderr) if LIVE[0] else logging.StreamHandler(sys.stderr)
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
