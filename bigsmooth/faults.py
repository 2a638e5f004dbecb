"""Fault injection for tests: make the process die (or a write fail) at a named point.

    BIGSMOOTH_FAULT=solve:sweep:3                 SIGKILL this process right after solver sweep 3
    BIGSMOOTH_FAULT=publish:before-rename         SIGKILL before the version folder is renamed
    BIGSMOOTH_FAULT=checkpoint:write=oserror      raise OSError(ENOSPC) there instead
    BIGSMOOTH_FAULT=stage:graph:start=stop        SIGSTOP there (a test changes something, then SIGCONT)
    BIGSMOOTH_FAULT=embed:chunk:2,stage:audit:start   several points (the first one reached fires)
    BIGSMOOTH_FAULT=graph:partition:3=kill-once:/tmp/x   SIGKILL the first time only (the file
                                                  /tmp/x marks it done; for a task re-run elsewhere)

Points (see :data:`POINTS`): ``stage:<name>:start`` (the stage marked running, nothing written)
and ``stage:<name>:done`` (its outputs written, not yet marked done) for every stage;
``graph:partition:<p>`` after partition p is searched, before its result is written (on the
worker that runs the task: the Dask engine hands the driver's armed faults to its tasks);
``embed:chunk:<i>`` after the i-th chunk (counted from 1 over both passes); ``solve:sweep:<i>``
after sweep i, before its checkpoint; ``solve:task:<i>`` in each task of the i-th map of group
sweeps on the Dask engine (counted from 1), after the task marks itself started and before it
writes; ``checkpoint:write`` inside the checkpoint write, after the
temporary file is complete and before it replaces the old one; ``publish:file:<i>`` after the i-th
output file (from 1) is written under its temporary name, before it is renamed (in the task that
writes it: on a Dask worker with the Dask engine); ``publish:before-rename``; ``publish:before-pointer`` (version folder in
place, CURRENT not yet replaced); ``publish:before-link`` (CURRENT replaced, the ``current``
symlink not yet).

SIGKILL is what the OOM killer and a hard reboot do: no handler, no cleanup, no flush. Unset (the
normal case), every point costs one dictionary lookup.
"""

import errno
import os
import signal

ENV = "BIGSMOOTH_FAULT"

POINTS = (
    "stage:<name>:start",
    "stage:<name>:done",
    "embed:chunk:<i>",
    "graph:partition:<p>",
    "solve:sweep:<i>",
    "solve:task:<i>",
    "checkpoint:write",
    "publish:file:<i>",
    "publish:before-rename",
    "publish:before-pointer",
    "publish:before-link",
)


def _armed():
    spec = os.environ.get(ENV, "")
    out = {}
    for item in filter(None, (s.strip() for s in spec.split(","))):
        name, _, action = item.partition("=")
        out[name] = action or "kill"
    return out


def point(name):
    """Fire the fault armed at ``name``, if any: SIGKILL (default), ``oserror`` or ``stop``."""
    if ENV not in os.environ:
        return
    action = _armed().get(name)
    if action is None:
        return
    if action == "oserror":
        raise OSError(errno.ENOSPC, f"No space left on device (injected by {ENV} at {name})")
    if action.startswith("kill-once:"):
        sentinel = action.split(":", 1)[1]
        try:
            os.close(os.open(sentinel, os.O_CREAT | os.O_EXCL | os.O_WRONLY))
        except FileExistsError:
            return
        os.kill(os.getpid(), signal.SIGKILL)
    if action == "stop":
        os.kill(os.getpid(), signal.SIGSTOP)
        return
    os.kill(os.getpid(), signal.SIGKILL)
