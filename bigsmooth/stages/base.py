"""What each stage depends on, declared once: the settings that change its result, and whether its
outputs may be shared with another run that has the same identity.

A stage's identity is a hash of its own settings and the identity of the stage before it (the first
stage, scan, also takes the input's fingerprint), so two runs whose configs differ only in, say,
``solve.lam`` have the same scan, embed, graph and order identities: the second run links the first
run's outputs of those stages instead of computing them again (see :func:`bigsmooth.pipeline`).
"""

import hashlib
import json
from dataclasses import dataclass

from ..config import RULES


@dataclass(frozen=True)
class StageSpec:
    name: str
    settings: tuple  # "section.key", or "section.*" for every result-changing key of a section
    shareable: bool  # outputs depend on nothing but the identity, so another run may reuse them


SPECS = (
    StageSpec("scan", ("input.*", "graph.neighbours"), True),
    StageSpec(
        "embed",
        (
            "embed.remove_sensitive",
            "embed.components",
            "embed.feature_weights",
            "embed.probe_rows",
            "run.seed",
        ),
        True,
    ),
    StageSpec("graph", ("graph.*", "run.seed"), True),
    StageSpec("order", ("solve.groups", "run.seed"), True),
    # a warm start reads the output published at the time: not shareable then (see shareable())
    StageSpec("solve", ("solve.*",), True),
    # the audit's provenance names its own run; publishing writes this run's version
    StageSpec(
        "audit", ("audit.*", "gates.*", "embed.leakage_warn_auc", "embed.probe_rows", "run.seed"), False
    ),
    StageSpec("publish", ("output.*",), False),
)
BY_NAME = {s.name: s for s in SPECS}


def _keys(pattern):
    section, key = pattern.split(".", 1)
    if key == "*":
        return [(section, k) for k, r in RULES[section].items() if r.affects_result]
    return [(section, key)]


def settings_of(spec, cfg):
    """{"section.key": value} of the settings that change the stage's result."""
    return {f"{s}.{k}": cfg[s][k] for pattern in spec.settings for s, k in _keys(pattern)}


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
    if name == "solve" and cfg["solve"]["warm_start"]:
        return False
    return BY_NAME[name].shareable
