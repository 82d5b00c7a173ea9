"""The run's configuration: one TOML file, validated against the settings of each stage.

Each stage declares its settings as a frozen dataclass with defaults (``StepSettings`` in
``steps.py``, ``PassiveSettings`` in ``fitters/passive.py``, ``SpikeSettings`` in
``fitters/spikes.py``, ``QcSettings`` in ``qc.py``, and the report/run settings below). This module
maps the TOML tables onto them. A user config overrides only the keys it sets; unknown keys, wrong
types and impossible values are rejected with a :class:`~pipeline.errors.ConfigError` naming the
file, the key and what is allowed.
"""

from __future__ import annotations

import dataclasses
import difflib
import hashlib
import json
import math
import tomllib
import types
import typing
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any

from pipeline.errors import ConfigError
from pipeline.fitters.passive import PassiveSettings
from pipeline.fitters.spikes import SpikeSettings
from pipeline.qc import QcSettings, merge_rule_tables, rules_from_toml
from pipeline.steps import StepSettings


@dataclass(frozen=True)
class ReportSettings:
    """What the report stage writes; the ``[report]`` table."""

    figures: bool = True  # one PNG per cell in figures/
    figure_dpi: int = 100
    group_column: str = "condition"  # sheet column the summary plots are grouped by


@dataclass(frozen=True)
class RunSettings:
    """How the batch runs; the ``[run]`` table."""

    workers: int = 0  # processes for the local pool; 0 = all cores


@dataclass(frozen=True)
class Config:
    """The whole run's configuration (one instance per run, passed to every stage)."""

    steps: StepSettings = field(default_factory=StepSettings)
    passive: PassiveSettings = field(default_factory=PassiveSettings)
    spikes: SpikeSettings = field(default_factory=SpikeSettings)
    qc: QcSettings = field(default_factory=QcSettings)
    report: ReportSettings = field(default_factory=ReportSettings)
    run: RunSettings = field(default_factory=RunSettings)

    def to_dict(self) -> dict[str, Any]:
        """The resolved config as plain data (JSON-able), for run.json and the cache key."""
        return _jsonable(dataclasses.asdict(self))

    def digest(self) -> str:
        """sha256 of the resolved analysis config (the run/report tables do not change results)."""
        data = self.to_dict()
        data.pop("run", None)
        text = json.dumps(data, sort_keys=True, allow_nan=True)
        return hashlib.sha256(text.encode()).hexdigest()


_SECTIONS: dict[str, type] = {
    "steps": StepSettings,
    "passive": PassiveSettings,
    "spikes": SpikeSettings,
    "report": ReportSettings,
    "run": RunSettings,
}


def default_config_text() -> str:
    """The shipped default config (``configs/default.toml``), with its comments."""
    return resources.files("pipeline").joinpath("default.toml").read_text(encoding="utf-8")


def load_config(path: str | Path | None = None) -> Config:
    """Load a config file over the defaults.

    Parameters
    ----------
    path : str or Path, optional
        A TOML file. ``None`` gives the defaults.

    Returns
    -------
    Config
        Validated configuration.

    Raises
    ------
    ConfigError
        The file is missing or not TOML, or a key is unknown, of the wrong type or impossible;
        the message names the file and the key.
    """
    defaults = _default_tables()
    if path is None:
        return config_from_dict(defaults, "default config")
    where = str(path)
    try:
        with open(path, "rb") as fh:
            data = tomllib.load(fh)
    except FileNotFoundError:
        raise ConfigError(f"{where}: config file not found") from None
    except IsADirectoryError:
        raise ConfigError(f"{where}: is a folder, not a config file") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{where}: not valid TOML ({exc})") from None
    except UnicodeDecodeError as exc:
        raise ConfigError(f"{where}: not UTF-8 text ({exc})") from None
    return config_from_dict(merge_tables(defaults, data), where)


def merge_tables(defaults: dict[str, Any], user: dict[str, Any]) -> dict[str, Any]:
    """Overlay a user's parsed TOML on the defaults: keys it sets win, QC rules merge by name."""
    merged = {name: dict(table) for name, table in defaults.items()}
    for name, table in user.items():
        if name == "qc" and isinstance(table, dict):
            qc = dict(table)
            rules = table.get("rule", [])
            if isinstance(rules, list):  # anything else is left for validation to reject
                rules = merge_rule_tables(defaults["qc"].get("rule", []), rules)
            qc["rule"] = rules
            merged["qc"] = qc
        elif isinstance(table, dict) and isinstance(merged.get(name), dict):
            merged[name] = {**merged[name], **table}
        else:
            merged[name] = table
    return merged


def _default_tables() -> dict[str, Any]:
    return tomllib.loads(default_config_text())


def config_from_dict(data: dict[str, Any], where: str = "<config>") -> Config:
    """Build a validated :class:`Config` from parsed TOML (tables of keys)."""
    unknown = set(data) - set(_SECTIONS) - {"qc"}
    if unknown:
        name = sorted(unknown)[0]
        raise ConfigError(
            f"{where}: unknown table [{name}]{_suggest(name, [*_SECTIONS, 'qc'])}; "
            f"allowed: {', '.join(sorted([*_SECTIONS, 'qc']))}"
        )
    parts: dict[str, Any] = {}
    for name, cls in _SECTIONS.items():
        table = data.get(name, {})
        if not isinstance(table, dict):
            raise ConfigError(f"{where}: [{name}] must be a table of keys, got {table!r}")
        parts[name] = _build_section(cls, table, f"{where}: [{name}]")
    parts["qc"] = rules_from_toml(data.get("qc", {}), f"{where}: [qc]")
    config = Config(**parts)
    _check_cross_fields(config, where)
    return config


def _build_section(cls: type, table: dict[str, Any], where: str) -> Any:
    hints = typing.get_type_hints(cls)
    names = [f.name for f in dataclasses.fields(cls)]
    values = {}
    for key, value in table.items():
        if key not in hints:
            raise ConfigError(
                f"{where} unknown key {key!r}{_suggest(key, names)}; allowed: {', '.join(names)}"
            )
        values[key] = _coerce(value, hints[key], f"{where} {key}")
    try:
        return cls(**values)
    except (TypeError, ValueError) as exc:
        raise ConfigError(f"{where} {exc}") from None


def _coerce(value: Any, hint: Any, where: str) -> Any:
    """Check one TOML value against a dataclass field's type; ints are accepted for floats."""
    options = typing.get_args(hint) if _is_union(hint) else (hint,)
    for option in options:
        if option is type(None):
            continue
        if option is bool and isinstance(value, bool):
            return value
        if option is int and isinstance(value, int) and not isinstance(value, bool):
            return value
        if option is float and isinstance(value, int | float) and not isinstance(value, bool):
            if not math.isfinite(value):
                raise ConfigError(f"{where} must be a finite number, got {value!r}")
            return float(value)
        if option is str and isinstance(value, str):
            return value
        origin = typing.get_origin(option)
        if origin is tuple and isinstance(value, list):
            inner = typing.get_args(option)[0]
            return tuple(_coerce(v, inner, where) for v in value)
    wanted = " or ".join(_type_name(o) for o in options if o is not type(None))
    raise ConfigError(f"{where} must be {wanted}, got {value!r} ({type(value).__name__})")


def _check_cross_fields(config: Config, where: str) -> None:
    """Reject negative durations and windows that contradict each other."""
    for name in _SECTIONS:
        section = getattr(config, name)
        for f in dataclasses.fields(section):
            value = getattr(section, f.name)
            if f.name.endswith(("_s", "_ms")) and isinstance(value, float) and value < 0:
                raise ConfigError(f"{where}: [{name}] {f.name} must be >= 0, got {value}")
    for problem in _contradictions(config):
        raise ConfigError(f"{where}: {problem}")
    if config.run.workers < 0:
        raise ConfigError(f"{where}: [run] workers must be >= 0 (0 = all cores)")
    if config.report.figure_dpi < 20 or config.report.figure_dpi > 600:
        raise ConfigError(f"{where}: [report] figure_dpi must be within 20..600")


def _contradictions(config: Config) -> list[str]:
    """Settings that cannot all hold at once (each message names the keys)."""
    p, st = config.passive, config.steps
    out = []
    if p.min_window_s > min(p.baseline_window_s, p.ss_window_s):
        out.append(
            "[passive] min_window_s is longer than baseline_window_s or ss_window_s: "
            "no window could ever be accepted"
        )
    if not 0.0 < p.fit_start_fraction < p.fit_end_fraction <= 1.0:
        out.append("[passive] need 0 < fit_start_fraction < fit_end_fraction <= 1")
    if not 0.0 < p.confidence < 1.0:
        out.append("[passive] confidence must be between 0 and 1 (e.g. 0.95)")
    if p.bin_s >= p.ss_window_s:
        out.append("[passive] bin_s must be much shorter than ss_window_s")
    schedule = [
        st.schedule_onset_s,
        st.schedule_duration_s,
        st.schedule_first_a,
        st.schedule_increment_a,
    ]
    if any(v is not None for v in schedule) and any(v is None for v in schedule):
        out.append(
            "[steps] give all four schedule keys (schedule_onset_s, schedule_duration_s, "
            "schedule_first_a, schedule_increment_a) or none"
        )
    if st.schedule_duration_s is not None and st.schedule_duration_s <= 0:
        out.append("[steps] schedule_duration_s must be > 0")
    if not st.min_amplitude_a > 0:  # the edge threshold: at 0 the sums' rounding makes edges
        out.append("[steps] min_amplitude_a must be > 0 (e.g. 1e-12 A)")
    return out


def _is_union(hint: Any) -> bool:
    return typing.get_origin(hint) in (typing.Union, types.UnionType)


def _type_name(hint: Any) -> str:
    if typing.get_origin(hint) is tuple:
        return "a list of numbers"
    return {bool: "true or false", int: "a whole number", float: "a number", str: "a string"}.get(
        hint, str(hint)
    )


def _suggest(name: str, options: list[str]) -> str:
    close = difflib.get_close_matches(name, options, n=1)
    return f" (did you mean {close[0]!r}?)" if close else ""


def _jsonable(value: Any) -> Any:
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_jsonable(v) for v in value]
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value
