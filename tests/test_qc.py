"""QC rules: parsing, firing, messages, exclusions (unit level; end-to-end in test_qc_cells.py)."""

import math

import pytest

from pipeline.errors import ConfigError
from pipeline.qc import Rule, judge_cell, merge_rule_tables, rules_from_toml, sweep_exclusions


def _rule(**kw):
    base = {"name": "r", "column": "x", "scope": "cell", "action": "fail", "max": 1.0}
    base.update(kw)
    return rules_from_toml({"rule": [base]}, "test.toml [qc]").rules[0]


def test_bounds_are_inclusive_and_abs_uses_magnitude():
    rule = _rule(min=-2.0, max=2.0, abs=True)
    assert not rule.fires(2.0)
    assert not rule.fires(-2.0)
    assert rule.fires(-2.5)
    assert not _rule(min=-3.0, max=2.0).fires(-2.5)


def test_missing_values_pass_unless_asked():
    assert not _rule().fires(math.nan)
    assert not _rule().fires(None)
    assert _rule(if_missing="act").fires(math.nan)


def test_message_is_filled_and_survives_missing_value():
    rule = _rule(message="x is {value:.1f} (max {max:g})", if_missing="act")
    assert rule.describe(3.14159) == "x is 3.1 (max 1)"
    assert rule.describe(math.nan) == "x could not be measured (QC rule 'r')"
    assert _rule(message="bad {placeholder}").describe(2.0) == (
        "r: x = 2 outside the allowed range [-inf, 1]"
    )


def test_cell_verdict_fail_flag_and_status():
    rules = [
        _rule(name="a", column="vrest_mv", max=-50.0, message="depolarized"),
        _rule(name="b", column="tau_ms", min=5.0, max=None, action="flag", message="short tau"),
    ]
    verdict = judge_cell(rules, {"vrest_mv": -45.0, "tau_ms": 3.0, "status": "ok"})
    assert not verdict.qc_pass
    assert verdict.reasons == ("depolarized",)
    assert verdict.flags == ("short tau",)
    ok = judge_cell(rules, {"vrest_mv": -70.0, "tau_ms": 3.0, "status": "ok"})
    assert ok.qc_pass and ok.flags == ("short tau",)
    broken = judge_cell(rules, {"vrest_mv": -70.0, "tau_ms": 20.0, "status": "no usable sweep"})
    assert not broken.qc_pass and broken.reasons == ("no usable sweep",)


def test_rule_on_unknown_column_fails_loudly():
    verdict = judge_cell([_rule(column="nope")], {"status": "ok"})
    assert not verdict.qc_pass
    assert "nope" in verdict.reasons[0]


def test_rule_on_a_column_still_to_come_is_deferred_when_asked():
    # the analysis judges a cell before its metadata sheet is joined: a rule on a sheet column
    # waits (the batch judges it after the join) instead of failing every cell
    rules = [
        _rule(column="age_days", name="age"),
        _rule(column="tau_ms", name="tau", min=5.0, max=None),
    ]
    verdict = judge_cell(rules, {"tau_ms": 3.0, "status": "ok"}, defer_missing=True)
    assert verdict.deferred == ("age",)
    assert not verdict.qc_pass and len(verdict.reasons) == 1 and "tau_ms" in verdict.reasons[0]


def test_sweep_rules_respect_step_direction():
    rule = _rule(
        scope="sweep",
        action="exclude",
        column="tau_r2",
        min=0.8,
        max=None,
        steps="hyperpolarizing",
        message="poor fit",
    )
    rows = [
        {"sweep": 1, "step_pa": -50.0, "tau_r2": 0.5},
        {"sweep": 2, "step_pa": 50.0, "tau_r2": 0.5},
        {"sweep": 3, "step_pa": -25.0, "tau_r2": 0.95},
    ]
    assert sweep_exclusions([rule], rows) == {1: "poor fit"}


@pytest.mark.parametrize(
    ("entry", "match"),
    [
        (
            {"name": "a", "column": "x", "scope": "cell", "action": "exclude", "max": 1},
            "cell rule's action must be flag or fail",
        ),
        (
            {"name": "a", "column": "x", "scope": "day", "action": "fail", "max": 1},
            "scope must be one of",
        ),
        ({"name": "a", "column": "x", "scope": "cell", "action": "fail"}, "give min, max"),
        (
            {"name": "a", "column": "x", "scope": "cell", "action": "fail", "min": 2, "max": 1},
            "min .* is above max",
        ),
        (
            {"name": "a", "column": "x", "scope": "cell", "action": "fail", "max": "1"},
            "max must be a number",
        ),
        (
            {"name": "a", "column": "x", "scope": "cell", "action": "fail", "max": 1, "colour": 1},
            "unknown key 'colour'",
        ),
        ({"column": "x", "scope": "cell", "action": "fail", "max": 1}, "'name' is required"),
    ],
)
def test_bad_rules_are_rejected_with_their_problem(entry, match):
    with pytest.raises(ConfigError, match=match):
        rules_from_toml({"rule": [entry]}, "lab.toml [qc]")


def test_duplicate_rule_names_rejected():
    entry = {"name": "a", "column": "x", "scope": "cell", "action": "fail", "max": 1}
    with pytest.raises(ConfigError, match="used twice"):
        rules_from_toml({"rule": [entry, entry]}, "lab.toml [qc]")


def test_user_rules_merge_by_name():
    defaults = [
        {"name": "vrest", "column": "vrest_mv", "scope": "cell", "action": "fail", "max": -50.0}
    ]
    merged = merge_rule_tables(
        defaults,
        [
            {"name": "vrest", "max": -55.0},
            {"name": "new", "column": "x", "scope": "cell", "action": "flag", "min": 0},
        ],
    )
    assert merged[0]["max"] == -55.0 and merged[0]["column"] == "vrest_mv"
    assert [m["name"] for m in merged] == ["vrest", "new"]


def test_rule_type_is_plain_data():
    rule = _rule()
    assert isinstance(rule, Rule)
    assert rule.max == 1.0 and rule.min is None
