"""QC rules evaluated on the sweep and cell tables; every verdict carries its reason.

A rule names a column of the sweep table (scope ``sweep``) or of the cell table (scope ``cell``,
which includes the metadata sheet's columns), optional bounds ``min``/``max`` (inclusive; with
``abs = true`` on the magnitude), and a consequence: a sweep rule leaves the sweep out of the cell's
fits (``exclude``); a cell rule marks the cell (``flag``: it still passes) or fails it (``fail``).
The default rules live in ``configs/default.toml``; they are common practice, not a standard, and
each lab should set its own.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from pipeline.errors import ConfigError

SCOPES = {"sweep": ("exclude",), "cell": ("flag", "fail")}
STEP_KINDS = ("all", "hyperpolarizing", "depolarizing")
IF_MISSING = ("pass", "act")
_RULE_KEYS = (
    "name",
    "column",
    "scope",
    "min",
    "max",
    "abs",
    "action",
    "message",
    "steps",
    "if_missing",
    "enabled",
)


@dataclass(frozen=True)
class Rule:
    """One QC criterion.

    Parameters
    ----------
    name : str
        Unique name; a user config that reuses it changes the default rule.
    column : str
        Column of the sweep or cell table the rule reads (report units, e.g. ``vrest_mv``).
    scope : str
        ``"sweep"`` or ``"cell"``.
    action : str
        ``"exclude"`` (sweep rules), ``"flag"`` or ``"fail"`` (cell rules).
    min, max : float, optional
        Inclusive bounds in the column's units; a value outside fires the rule.
    abs : bool
        Compare the magnitude of the value.
    message : str
        Shown when the rule fires; ``{value}``, ``{min}``, ``{max}``, ``{column}``, ``{bounds}``
        are filled in (a value that could not be measured gets a fixed message instead).
    steps : str
        Sweep rules only: apply to ``"all"``, ``"hyperpolarizing"`` or ``"depolarizing"`` sweeps.
    if_missing : str
        ``"pass"``: a NaN value does not fire the rule; ``"act"``: it does.
    enabled : bool
        False switches a default rule off.
    """

    name: str
    column: str
    scope: str
    action: str
    min: float | None = None
    max: float | None = None
    abs: bool = False
    message: str = ""
    steps: str = "all"
    if_missing: str = "pass"
    enabled: bool = True

    def fires(self, value: Any) -> bool:
        """True when ``value`` breaks the rule."""
        number = _as_number(value)
        if number is None or math.isnan(number):
            return self.if_missing == "act"
        if self.abs:
            number = abs(number)
        return (self.min is not None and number < self.min) or (
            self.max is not None and number > self.max
        )

    def describe(self, value: Any) -> str:
        """The rule's message for ``value``."""
        number = _as_number(value)
        if number is None or math.isnan(number):
            return f"{self.column} could not be measured (QC rule {self.name!r})"
        template = self.message or "{column} = {value:g} outside the allowed {bounds}"
        try:
            return template.format(
                value=number, min=self.min, max=self.max, column=self.column, bounds=self._bounds()
            )
        except (ValueError, TypeError, KeyError, IndexError, AttributeError):
            # A lab's message with a bad placeholder still says what fired.
            return f"{self.name}: {self.column} = {number:g} outside the allowed {self._bounds()}"

    def _bounds(self) -> str:
        low = "-inf" if self.min is None else f"{self.min:g}"
        high = "inf" if self.max is None else f"{self.max:g}"
        return f"range [{low}, {high}]" + (" (magnitude)" if self.abs else "")


@dataclass(frozen=True)
class QcSettings:
    """The ``[qc]`` table: the rules in force (defaults merged with the user's)."""

    rules: tuple[Rule, ...] = field(default_factory=tuple)

    def for_scope(self, scope: str) -> tuple[Rule, ...]:
        """Enabled rules of one scope."""
        return tuple(r for r in self.rules if r.enabled and r.scope == scope)


@dataclass(frozen=True)
class CellVerdict:
    """QC outcome of one cell.

    Parameters
    ----------
    qc_pass : bool
        False when any rule with consequence ``fail`` fired (or the cell could not be analysed).
    reasons : tuple of str
        Messages of the rules that failed the cell.
    flags : tuple of str
        Messages of rules that only flag the cell (it still passes).
    excluded : dict
        Sweep number -> reason, for sweeps left out of the cell's fits.
    deferred : tuple of str
        Names of the rules not judged here because their column is not in the row yet (a
        metadata sheet's column: the batch judges them once the sheet is joined).
    """

    qc_pass: bool
    reasons: tuple[str, ...] = ()
    flags: tuple[str, ...] = ()
    excluded: dict[int, str] | None = None
    deferred: tuple[str, ...] = ()


def rules_from_toml(table: Mapping[str, Any], where: str) -> QcSettings:
    """Validate the ``[qc]`` table: ``[[qc.rule]]`` entries, already merged with the defaults.

    Raises
    ------
    ConfigError
        Unknown keys, wrong types, unknown scope/action, duplicate names, min > max.
    """
    if not isinstance(table, Mapping):
        raise ConfigError(f"{where} must be a table")
    extra = set(table) - {"rule"}
    if extra:
        raise ConfigError(f"{where} unknown key {sorted(extra)[0]!r}; allowed: rule")
    entries = table.get("rule", [])
    if not isinstance(entries, list):
        raise ConfigError(f"{where} 'rule' must be an array of tables ([[qc.rule]])")
    rules = [_rule_from_entry(entry, f"{where} rule #{i + 1}") for i, entry in enumerate(entries)]
    names = [r.name for r in rules]
    dupes = sorted({n for n in names if names.count(n) > 1})
    if dupes:
        raise ConfigError(f"{where} rule name {dupes[0]!r} is used twice")
    return QcSettings(rules=tuple(rules))


def _rule_from_entry(entry: Any, where: str) -> Rule:
    if not isinstance(entry, Mapping):
        raise ConfigError(f"{where} must be a table")
    unknown = set(entry) - set(_RULE_KEYS)
    if unknown:
        raise ConfigError(
            f"{where}: unknown key {sorted(unknown)[0]!r}; allowed: {', '.join(_RULE_KEYS)}"
        )
    for key in ("name", "column", "scope", "action"):
        if not isinstance(entry.get(key), str) or not entry.get(key):
            raise ConfigError(f"{where}: {key!r} is required and must be a string")
    where = f"{where} ({entry['name']!r})"
    scope, action = entry["scope"], entry["action"]
    if scope not in SCOPES:
        raise ConfigError(f"{where}: scope must be one of {', '.join(SCOPES)}, got {scope!r}")
    if action not in SCOPES[scope]:
        raise ConfigError(
            f"{where}: a {scope} rule's action must be {' or '.join(SCOPES[scope])}, got {action!r}"
        )
    bounds = {}
    for key in ("min", "max"):
        value = entry.get(key)
        if value is not None and (isinstance(value, bool) or not isinstance(value, int | float)):
            raise ConfigError(f"{where}: {key} must be a number, got {value!r}")
        bounds[key] = None if value is None else float(value)
    if bounds["min"] is None and bounds["max"] is None:
        raise ConfigError(f"{where}: give min, max or both")
    if bounds["min"] is not None and bounds["max"] is not None and bounds["min"] > bounds["max"]:
        raise ConfigError(f"{where}: min ({bounds['min']}) is above max ({bounds['max']})")
    choices = {"steps": STEP_KINDS, "if_missing": IF_MISSING}
    for key, allowed in choices.items():
        if key in entry and entry[key] not in allowed:
            raise ConfigError(f"{where}: {key} must be one of {', '.join(allowed)}")
    for key in ("abs", "enabled"):
        if key in entry and not isinstance(entry[key], bool):
            raise ConfigError(f"{where}: {key} must be true or false")
    if "message" in entry and not isinstance(entry["message"], str):
        raise ConfigError(f"{where}: message must be a string")
    return Rule(
        **{k: v for k, v in entry.items() if k not in ("min", "max")},
        min=bounds["min"],
        max=bounds["max"],
    )


def merge_rule_tables(default: list[Mapping], user: list[Mapping]) -> list[dict]:
    """Merge the user's ``[[qc.rule]]`` entries into the defaults by name.

    A user entry whose ``name`` matches a default changes only the keys it sets (e.g.
    ``max = -55`` or ``enabled = false``); other entries are added.
    """
    merged = {str(d.get("name")): dict(d) for d in default}
    for entry in user:
        name = str(entry.get("name")) if isinstance(entry, Mapping) else None
        if name in merged:
            merged[name].update(entry)
        else:
            merged[name or f"#{len(merged)}"] = dict(entry) if isinstance(entry, Mapping) else entry
    return list(merged.values())


def sweep_exclusions(rules: Iterable[Rule], sweep_rows: Sequence[Mapping[str, Any]]) -> dict:
    """Apply sweep rules to the sweep table.

    Parameters
    ----------
    rules : iterable of Rule
        Enabled sweep rules.
    sweep_rows : sequence of dict
        One row per usable sweep with at least ``sweep`` and ``step_pa`` (positive =
        depolarizing). A column that no row has is an error of the rule (every sweep is left
        out, saying so); a row that lacks it has the value NaN.

    Returns
    -------
    dict
        Sweep number -> ``'; '``-joined messages, for every sweep a rule leaves out.
    """
    out: dict[int, list[str]] = {}
    columns = {key for row in sweep_rows for key in row}
    for row in sweep_rows:
        step = _as_number(row.get("step_pa"))
        for rule in rules:
            if not _applies(rule, step):
                continue
            if rule.column not in columns:
                out.setdefault(int(row["sweep"]), []).append(
                    f"QC rule {rule.name!r} names column {rule.column!r}, not in the sweep table"
                )
            elif rule.fires(row.get(rule.column)):  # a sweep without the value: NaN
                out.setdefault(int(row["sweep"]), []).append(rule.describe(row.get(rule.column)))
    return {k: "; ".join(v) for k, v in out.items()}


def judge_cell(
    rules: Iterable[Rule],
    cell_row: Mapping[str, Any],
    excluded: Mapping[int, str] | None = None,
    *,
    defer_missing: bool = False,
) -> CellVerdict:
    """Apply cell rules to one cell's row.

    A cell whose ``status`` is not ``ok`` fails with its status as the reason. A rule naming a
    column the row lacks fails the cell, or with ``defer_missing`` is left for later (its name
    in ``deferred``): the analysis judges a cell before its metadata sheet is joined.
    """
    status = str(cell_row.get("status", "ok"))
    if status != "ok":
        # Rules would only repeat that the values are missing: the status says why.
        return CellVerdict(False, (status,), (), dict(excluded or {}))
    reasons: list[str] = []
    flags: list[str] = []
    deferred: list[str] = []
    for rule in rules:
        if rule.column not in cell_row:
            if defer_missing:
                deferred.append(rule.name)
            else:
                reasons.append(
                    f"QC rule {rule.name!r} names column {rule.column!r}, not in the cell table"
                )
            continue
        if rule.fires(cell_row[rule.column]):
            (reasons if rule.action == "fail" else flags).append(
                rule.describe(cell_row[rule.column])
            )
    return CellVerdict(
        qc_pass=not reasons,
        reasons=tuple(reasons),
        flags=tuple(flags),
        excluded=dict(excluded or {}),
        deferred=tuple(deferred),
    )


def _applies(rule: Rule, step_pa: float | None) -> bool:
    if rule.steps == "all":
        return True
    if step_pa is None or math.isnan(step_pa):
        return False
    return step_pa < 0 if rule.steps == "hyperpolarizing" else step_pa > 0


def _as_number(value: Any) -> float | None:
    if isinstance(value, bool):
        return float(value)
    if isinstance(value, int | float):
        return float(value)
    try:
        return float(value)
    except (TypeError, ValueError):
        return None
