"""What each stage depends on, declared once: the settings that change its result, and whether its
outputs may be shared with another run that has the same identity.

A stage's identity is a hash of its own settings and the identity of the stage before it (the first
stage, scan, also takes the input's fingerprint), so two runs whose configs differ only in, say,
``solve.lam`` have the same scan, embed, graph and order identities: the second run links the first
run's outputs of those stages instead of computing them again (see :func:`bigsmooth.pipeline`).
"""

import hashlib
import json
import logging
import os
from collections.abc import Mapping
from dataclasses import dataclass, replace

from .. import artifacts, streams
from ..config import RULES, result_settings


@dataclass(frozen=True)
class StageSpec:
    name: str
    settings: tuple  # "section.key", or "section.*" for every result-changing key of a section
    shareable: bool  # outputs depend on nothing but the identity, so another run may reuse them
    reads: tuple = ()  # artifact keys (bigsmooth.artifacts) read from earlier stages
    writes: tuple = ()  # artifact keys always written; the stage is done only when they exist

    def module(self):
        """The stage's module; its ``run(ctx)`` does the work."""
        import importlib

        return importlib.import_module(f"bigsmooth.stages.{self.name}")


class UndeclaredSetting(KeyError):
    """A stage read a result-changing setting that neither it nor an earlier stage declares: reusing
    its outputs by identity would then be wrong. A programming error, found by the tests."""


class SectionView(Mapping):
    """One config section as a stage sees it: read-only, and a result-changing key that is not in
    ``allowed`` (the settings of this stage and the stages before it) is refused."""

    def __init__(self, stage, section, values, allowed):
        self._stage, self._section, self._values, self._allowed = stage, section, values, allowed

    def __getitem__(self, key):
        rule = RULES.get(self._section, {}).get(key)
        if rule is not None and rule.affects_result and (self._section, key) not in self._allowed:
            raise UndeclaredSetting(
                f"stage {self._stage!r} reads {self._section}.{key}, which changes results but is not "
                f"among the settings of {self._stage!r} or an earlier stage (bigsmooth/stages/base.py SPECS)"
            )
        return self._values[key]

    def __iter__(self):
        return iter(self._values)

    def __len__(self):
        return len(self._values)


class ConfigView(Mapping):
    """The config as stage ``stage`` sees it: ``view["solve"]`` is a :class:`SectionView`."""

    def __init__(self, stage, cfg):
        self._stage, self._cfg = stage, cfg
        self._allowed = allowed_settings(stage, cfg)

    def __getitem__(self, section):
        return SectionView(self._stage, section, self._cfg[section], self._allowed)

    def __iter__(self):
        return iter(self._cfg)

    def __len__(self):
        return len(self._cfg)


@dataclass
class Context:
    """What a stage is run with: the run directory, the config, the input's fingerprint and the
    run id; random numbers come from named streams of the config's seed, executors by name.

    :meth:`for_stage` gives the context a stage's ``run`` receives: its ``cfg`` is a
    :class:`ConfigView` that refuses result-changing settings the stage has not declared."""

    rundir: object
    cfg: Mapping
    fp: dict
    run_id: str

    def for_stage(self, name):
        raw = self.cfg._cfg if isinstance(self.cfg, ConfigView) else self.cfg
        return replace(self, cfg=ConfigView(name, raw))

    def section(self, name):
        """One section of the config (a read-only view when the context is a stage's)."""
        return self.cfg[name]

    def rng(self, stream):
        return streams.rng(self.cfg["run"]["seed"], stream)

    def executor(self, workers, backend):
        """An executor of :mod:`bigsmooth.parallel` chosen by name (the seam where an engine that
        runs tasks elsewhere plugs in)."""
        from .. import parallel

        return parallel.make_executor(workers, backend)

    def task_executor(self):
        """Where tasks go (functions of the run root, artifact keys and row ranges, see
        :mod:`bigsmooth.parallel`): a Dask cluster when run.engine = "dask", else a thread per core
        here (None on one core: they run one after another)."""
        from .. import parallel

        run = self.cfg["run"]
        if run["engine"] == "dask":
            return parallel.DaskTasks.connect(run["dask_scheduler"])
        return parallel.make_executor(os.cpu_count() or 1, "threads")

    def run_tasks(self, fn, calls, sizes, what, done=None, local=None, threads=False):
        """``fn`` over ``calls``, results in the order of the calls: tasks on the Dask cluster when
        run.engine = "dask" (``done(j)`` as call j finishes), else here: with ``threads`` on a
        thread per core (for numpy-heavy tasks that release the GIL; ``done(j)`` as call j
        finishes), otherwise one after another as ``fn(*call, **local)``, then ``done(j)`` unless
        ``local`` gives fn a progress hook of its own. ``what`` names the tasks in the log line;
        ``sizes`` weigh them for the scheduler."""
        if self.cfg["run"]["engine"] == "dask":
            executor = self.task_executor()
            try:
                logging.getLogger("bigsmooth.run").info(
                    "%s: %d tasks on %s", what, len(calls), executor.describe()
                )
                return executor.map_calls(fn, calls, None, sizes, done=done)
            finally:
                executor.shutdown()
        if threads and local is None and (os.cpu_count() or 1) > 1 and len(calls) > 1:
            executor = self.task_executor()
            try:
                order = sorted(range(len(calls)), key=lambda j: (-sizes[j], j))
                return executor.map_calls(fn, calls, order, sizes, done=done or (lambda j: None))
            finally:
                executor.shutdown()
        out = []
        for j, call in enumerate(calls):
            out.append(fn(*call, **(local or {})))
            if done is not None and local is None:
                done(j)
        return out


SPECS = (
    StageSpec("scan", ("input.*", "graph.neighbours"), True, reads=(), writes=("scan.info",)),
    StageSpec(
        "embed",
        (
            "embed.remove_sensitive",
            "embed.components",
            "embed.pair_directions",
            "embed.fair_space",
            "embed.feature_weights",
            "embed.probe_rows",
            "run.seed",
        ),
        True,
        reads=("scan.info",),
        writes=("embed.scores", "embed.protected", "embed.compare", "embed.embedding", "embed.info"),
    ),
    StageSpec(
        "graph",
        ("graph.*", "run.seed"),
        True,
        reads=("embed.embedding",),
        writes=("graph.neighbours", "graph.distances", "graph.weights", "graph.info"),
    ),
    StageSpec(
        "order",
        ("solve.groups", "run.seed"),
        True,
        reads=("embed.embedding", "graph.weights"),
        writes=("order.perm", "order.groups", "order.split"),
    ),
    # a warm start or an anchor reads the output published at the time: not shareable then (see shareable())
    StageSpec(
        "solve",
        ("solve.*",),
        True,
        reads=("embed.scores", "order.perm", "order.groups", "order.split", "graph.weights"),
        writes=("solve.adjusted", "solve.info"),
    ),
    # the audit's provenance names its own run; publishing writes this run's version
    StageSpec(
        "audit",
        ("audit.*", "gates.*", "embed.leakage_warn_auc", "embed.probe_rows", "run.seed"),
        False,
        reads=(
            "scan.info",
            "embed.scores",
            "embed.protected",
            "embed.compare",
            "embed.embedding",
            "embed.info",
            "graph.neighbours",
            "graph.distances",
            "graph.weights",
            "solve.adjusted",
            "solve.info",
        ),
        writes=("audit.record", "audit.page", "publish.pending"),
    ),
    StageSpec(
        "publish",
        ("output.*",),
        False,
        reads=(
            "scan.info",
            "embed.scores",
            "solve.adjusted",
            "audit.record",
            "audit.page",
            "publish.pending",
        ),
        writes=(),
    ),
)
BY_NAME = {s.name: s for s in SPECS}
STAGE_INDEX = {s.name: i for i, s in enumerate(SPECS)}


def _keys(pattern):
    section, key = pattern.split(".", 1)
    if key == "*":
        return [(section, k) for k, r in RULES[section].items() if r.affects_result]
    return [(section, key)]


def allowed_settings(name, cfg):
    """{(section, key)} a stage may read among the result-changing settings: its own and those of
    every stage before it (their identities chain into its own). A stage whose outputs are never
    shared (audit, publish, a warm-started solve) belongs to its run alone, whose id hashes every
    setting, so it sees everything; so does a name that is not a stage (a command on top)."""
    if name in BY_NAME and shareable(name, cfg):
        out = set()
        for spec in SPECS[: STAGE_INDEX[name] + 1]:
            out.update(sk for p in spec.settings for sk in _keys(p))
        return out
    return {(s, k) for s, rules in RULES.items() for k in rules}


def settings_of(spec, cfg):
    """{"section.key": value} of the settings that change the stage's result (paths relative to
    run.dir, as in :func:`bigsmooth.config.result_settings`)."""
    values = result_settings(cfg)
    return {f"{s}.{k}": values[s][k] for pattern in spec.settings for s, k in _keys(pattern)}


def identities(cfg, input_hash):
    """{stage name: identity hex} for a config and the input's fingerprint hash."""
    out, prev = {}, "input:" + input_hash
    for spec in SPECS:
        canon = json.dumps(
            {"stage": spec.name, "settings": settings_of(spec, cfg), "after": prev},
            sort_keys=True,
            separators=(",", ":"),
        )
        prev = out[spec.name] = hashlib.sha256(canon.encode()).hexdigest()[:32]
    return out


def shareable(name, cfg):
    if name == "solve" and (cfg["solve"]["warm_start"] or cfg["solve"]["stability"] > 0):
        return False
    return BY_NAME[name].shareable


def outputs_missing(name, rundir):
    """The declared outputs of stage ``name`` that are not in ``rundir`` (a stage marked done whose
    outputs are gone, e.g. deleted by hand, is done again)."""
    return [k for k in BY_NAME[name].writes if not artifacts.CATALOGUE[k].exists(rundir)]
