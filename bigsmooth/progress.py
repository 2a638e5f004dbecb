"""Progress of long stages as log lines: counted progress (:class:`Progress`, at most one line every
few seconds plus the last) and, for every stage, a heartbeat (:class:`Heartbeat`) that logs the
stage's phase and elapsed time whenever nothing else reported progress for ``HEARTBEAT`` seconds."""

import threading
import time

from . import logs

HEARTBEAT = 15.0  # seconds without a progress line before the heartbeat speaks
_LAST = [time.monotonic()]  # when the last progress line was logged (any Progress or heartbeat)


LIVE_EVERY = 0.5  # seconds between redraws of the live bar (logs.LIVE: text logs on a terminal)


class Progress:
    def __init__(self, log, what, total, every=10.0):
        self.log, self.what, self.total = log, what, total
        self.every = LIVE_EVERY if logs.LIVE[0] else every
        self.done = 0
        self.t0 = self.last = time.monotonic()
        self._lock = threading.Lock()  # tasks on a thread pool report as they finish

    def update(self, k):
        with self._lock:
            self._update(k)

    def _update(self, k):
        self.done += k
        now = time.monotonic()
        if now - self.last >= self.every or self.done >= self.total:
            rate = self.done / max(now - self.t0, 1e-9)
            logs.event(
                self.log,
                "progress",
                "%s: %d / %d rows (%.0f%%, %.0f rows/s)",
                self.what,
                self.done,
                self.total,
                100.0 * self.done / max(self.total, 1),
                rate,
                task=self.what,
                done=int(self.done),
                total=int(self.total),
                seconds=round(now - self.t0, 1),
            )
            self.last = _LAST[0] = now


class Heartbeat:
    """While a stage runs (``with Heartbeat(log, "graph"):``), a thread logs "stage S: PHASE, N s
    (stage M s)" when no progress line was logged for ``every`` seconds; :func:`phase` names what the
    stage is doing (phases whose kernels cannot count their own progress still show they are alive)."""

    current = None

    def __init__(self, log, stage, every=HEARTBEAT):
        self.log, self.stage, self.every = log, stage, every
        self.phase, self.t0 = "running", time.monotonic()
        self.phase_t0 = self.t0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, name=f"heartbeat-{stage}", daemon=True)

    def __enter__(self):
        _LAST[0] = time.monotonic()
        Heartbeat.current = self
        self._thread.start()
        return self

    def __exit__(self, *exc):
        self._stop.set()
        self._thread.join()
        Heartbeat.current = None

    def _loop(self):
        while not self._stop.wait(min(1.0, self.every)):
            self.tick(time.monotonic())

    def tick(self, now):
        """Log the heartbeat line if nothing reported progress for ``every`` seconds before ``now``."""
        if now - _LAST[0] >= self.every:
            _LAST[0] = now
            logs.event(
                self.log,
                "progress",
                "stage %s: %s, %.0f s (stage %.0f s)",
                self.stage,
                self.phase,
                now - self.phase_t0,
                now - self.t0,
                task=self.phase,
                seconds=round(now - self.t0, 1),
                phase_seconds=round(now - self.phase_t0, 1),
            )


def phase(log, name):
    """The running stage is now doing ``name``: logged, and named by the heartbeat until the next."""
    hb = Heartbeat.current
    if hb is not None:
        hb.phase, hb.phase_t0 = name, time.monotonic()
        _LAST[0] = hb.phase_t0
    logs.event(log, "phase", "%s", name, phase=name)
