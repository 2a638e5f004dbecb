"""Progress of long stages as log lines, at most one every few seconds (plus the last)."""

import threading
import time


class Progress:
    def __init__(self, log, what, total, every=10.0):
        self.log, self.what, self.total, self.every = log, what, total, every
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
            self.log.info(
                "%s: %d / %d rows (%.0f%%, %.0f rows/s)",
                self.what,
                self.done,
                self.total,
                100.0 * self.done / max(self.total, 1),
                rate,
            )
            self.last = now
