"""Config rules: every declared rule rejects bad values with a message naming the parameter."""

import os
import tomllib

import pytest

from bigsmooth import config, demo
from bigsmooth.errors import ConfigError

from helpers import ROOT


def base_raw():
    return tomllib.loads(demo.CONFIG_TEMPLATE.format(data="d", output="o", runs="r"))


def bad_values(rule):
    """Values that violate a declared rule, generated from the rule itself."""
    k = rule.kind
    if k == "int":
        return [rule.lo - 1, rule.hi + 1, 1.5, "3", True]
    if k == "float":
        return [rule.lo - 1 if rule.lo > -1e300 else None, rule.hi * 10 + 1, "x", float("nan"), True]
    if k == "bool":
        return [1, "yes"]
    if k == "str":
        return [3] + (["not-a-choice"] if rule.choices else [])
    if k == "list[str]":
        return [[1], ["a", "a"], 5]
    if k == "range":
        return [[1.0, 0.0], [0.0], "0-1"]
    if k == "table[float]":
        return [{"monthly_income": -1.0}, [1]]
    raise AssertionError(k)


CASES = [
    (s, k, v)
    for s, rules in config.RULES.items()
    for k, r in rules.items()
    for v in bad_values(r)
    if v is not None
]


@pytest.mark.parametrize("section,key,value", CASES)
def test_each_rule_rejects_bad_values_naming_the_parameter(section, key, value):
    raw = base_raw()
    raw.setdefault(section, {})[key] = value
    with pytest.raises(ConfigError) as exc:
        config.validate(raw)
    assert f"{section}.{key}" in str(exc.value)


def test_demo_config_is_valid_and_the_lambda_is_checked():
    cfg = config.validate(base_raw())
    assert cfg["solve"]["lam"] == 1.0
    raw = base_raw()
    raw["solve"]["lam"] = -1
    with pytest.raises(ConfigError, match=r"solve.lam must be a number in \[0, 1e\+09\]; got -1"):
        config.validate(raw)


def test_batch_rows_must_be_a_multiple_of_the_unit():
    raw = base_raw()
    raw["embed"]["batch_rows"] = 10000
    with pytest.raises(ConfigError, match="embed.batch_rows must be 0 or a multiple of 8192; got 10000"):
        config.validate(raw)


def test_protected_attribute_cannot_be_a_feature():
    raw = base_raw()
    raw["input"]["numeric_features"].append("origin_group")
    with pytest.raises(ConfigError, match="origin_group"):
        config.validate(raw)


def test_unknown_section_is_named():
    raw = base_raw()
    raw["grpah"] = {}
    with pytest.raises(ConfigError, match=r"\[grpah\].*did you mean 'graph'"):
        config.validate(raw)


def test_template_documents_every_option_and_parses():
    text = open(os.path.join(ROOT, "configs", "template.toml")).read()
    raw = tomllib.loads(text)
    for section, rules in config.RULES.items():
        assert f"[{section}]" in text
        for key in rules:
            assert f"\n{key} =" in text or f"\n# {key} =" in text, (
                f"{section}.{key} missing from the template"
            )
    config.validate(raw)


def test_bundled_demo_config_matches_the_demo_command():
    text = open(os.path.join(ROOT, "configs", "demo.toml")).read()
    assert text == demo.CONFIG_TEMPLATE.format(
        data="../bigsmooth-demo/data/applicants",
        output="../bigsmooth-demo/output",
        runs="../bigsmooth-demo/runs",
    )


def test_identity_hash_ignores_operational_settings():
    a = config.validate(base_raw())
    raw = base_raw()
    raw["embed"]["batch_rows"] = 16384
    raw["run"]["memory_mb"] = 1024
    raw["audit"]["report_note"] = "another note"
    assert config.config_hash(config.validate(raw)) == config.config_hash(a)
    for section, key, value in [("solve", "lam", 2.0), ("audit", "select_rate", 0.5)]:
        changed = base_raw()
        changed[section][key] = value
        assert config.config_hash(config.validate(changed)) != config.config_hash(a)
