"""Plain-text reader: one cell per CSV or TSV file.

Layout
------
One row per sample, a header row whose column names carry the units::

    sweep,time_s,voltage_mv,current_pa
    1,0.0,-70.1,0.0
    1,0.0001,-70.1,0.0
    ...
    2,0.0,-70.3,0.0

- ``sweep``: integer sweep number; the rows of one sweep are contiguous.
- ``time_<unit>``: sample time, unit ``s`` or ``ms``; evenly spaced within a sweep (the rate is
  taken from it); the first time of a sweep is its start time.
- ``voltage_<unit>``: membrane potential, unit ``v``, ``mv`` or ``uv``. Empty cells, ``nan`` or
  ``inf`` inside a sweep are kept (the fitters report them).
- ``current_<unit>``: injected current, optional, unit ``a``, ``na`` or ``pa``; positive =
  depolarizing. A sweep whose current cells are all empty has no stored current.

The delimiter (comma, tab or semicolon) is sniffed from the header; column names are not case
sensitive; lines starting with ``#`` are comments. Other columns (``time_of_day``, ``note``) are
ignored. Extensions ``.csv``, ``.tsv`` and ``.txt``.
"""

from __future__ import annotations

import csv
import re
from pathlib import Path

import numpy as np

from pipeline.errors import CorruptFileError, RecordingError, ShapeError, UnitError
from pipeline.readers import MIN_SAMPLES, describe, make_recording, make_sweep, rate_from_times
from pipeline.recording import Recording

_COLUMN = re.compile(r"(time|voltage|current)(?:_([^\W_]+))?")  # kind, and a one-word unit
UNITS = {
    "time": {"s": 1.0, "ms": 1e-3},
    "voltage": {"v": 1.0, "mv": 1e-3, "uv": 1e-6},
    "current": {"a": 1.0, "na": 1e-9, "pa": 1e-12},
}


def read(path: Path) -> list[Recording]:
    """Read one cell from a CSV/TSV file in the layout of this module's docstring.

    Parameters
    ----------
    path : pathlib.Path
        The text file.

    Returns
    -------
    list of Recording
        A single Recording, ``cell_id`` = file stem.

    Raises
    ------
    CorruptFileError, UnitError, ShapeError, BadSamplesError
    """
    import pandas as pd

    name = str(path)
    sep = _sniff(path)
    try:
        header = pd.read_csv(path, sep=sep, comment="#", nrows=0).columns
        columns = _columns(name, header)
        wanted = [v for k, v in columns.items() if not k.endswith("_unit")]
        table = pd.read_csv(
            path, sep=sep, comment="#", usecols=wanted, dtype=dict.fromkeys(wanted, "float64")
        )
    except RecordingError:
        raise
    except (ValueError, OSError, pd.errors.ParserError, UnicodeDecodeError) as exc:
        hint = ""
        if re.search(r"'[-+]?\d*,\d+'", str(exc)):  # '-70,1': a spreadsheet's decimal comma
            hint = "; numbers need '.' as the decimal point, not ','"
        raise CorruptFileError(name, f"not a readable table ({describe(exc)}){hint}") from exc
    if table.empty:
        raise ShapeError(name, "the table has a header but no samples")
    return [_recording(path, table, columns)]


def not_a_recording(path: Path) -> str | None:
    """Why a text file found in a folder is plainly not a recording table, or None.

    A lab's day folder holds notes and other tables beside the recordings (``notes.txt``, an
    old copy of a sheet). A file whose first line (after ``#`` comments and blank lines) is
    UTF-8 text naming neither a ``sweep`` nor a ``voltage`` or ``voltage_<unit>`` column
    (separated by commas, tabs, semicolons or spaces; quotes and case ignored) is such a file.
    Anything else, an empty or binary file included, is read as a recording, so that a damaged
    one fails with its error. Only the first 64 KiB are looked at.
    """
    try:
        with open(path, "rb") as fh:
            data = fh.read(65536)
    except OSError:
        return None
    if data.startswith(b"\xef\xbb\xbf"):  # a spreadsheet's UTF-8 mark
        data = data[3:]
    lines = (ln.strip() for ln in data.splitlines())
    first = next((ln for ln in lines if ln and not ln.startswith(b"#")), b"")
    if not first or b"\x00" in data:
        return None
    try:
        text = first.decode("utf-8")
    except UnicodeDecodeError:  # not text (or cut inside a character): read it
        return None
    names = [n.strip().strip("\"'").strip().lower() for n in re.split(r"[,\t; ]+", text)]
    if any(n == "sweep" or _voltage_column(n) for n in names):
        return None
    return "its first line names no sweep or voltage column"


def _voltage_column(name: str) -> bool:
    m = _COLUMN.fullmatch(name)
    return m is not None and m.group(1) == "voltage"


def _sniff(path: Path) -> str:
    try:
        with open(path, encoding="utf-8", newline="") as fh:
            first = next((ln for ln in fh if ln.strip() and not ln.startswith("#")), "")
    except UnicodeDecodeError as exc:
        raise CorruptFileError(str(path), "not a text file (not UTF-8)") from exc
    except OSError as exc:
        raise CorruptFileError(str(path), f"cannot be opened ({describe(exc)})") from exc
    try:
        return csv.Sniffer().sniff(first, delimiters=",\t;").delimiter
    except csv.Error as exc:
        raise CorruptFileError(
            str(path), "no header with comma, tab or semicolon separated columns"
        ) from exc


def _columns(path: str, header) -> dict[str, str]:
    """Map 'sweep', 'time', 'voltage', 'current' to column names, '<kind>_unit' to units."""
    found: dict[str, str] = {}
    for col in header:
        key = str(col).strip().lower()
        if key == "sweep":
            found["sweep"] = col
            continue
        # a unit is one word: ``time_of_day`` or ``current_step_label`` are other columns,
        # left alone, while ``voltage_volts`` is ours with a unit we do not know
        m = _COLUMN.fullmatch(key)
        if m is None:
            continue
        kind, unit = m.group(1), m.group(2)
        if unit is None or unit not in UNITS[kind]:
            allowed = ", ".join(f"{kind}_{u}" for u in UNITS[kind])
            what = "has no unit" if unit is None else f"has unknown unit {unit!r}"
            raise UnitError(path, f"column {col!r} {what}; expected one of {allowed}")
        found[kind] = col
        found[f"{kind}_unit"] = unit
    missing = [k for k in ("sweep", "time", "voltage") if k not in found]
    if missing:
        raise CorruptFileError(
            path,
            f"missing column(s) {', '.join(missing)}; the header must be like "
            "sweep,time_s,voltage_mv,current_pa",
        )
    return found


def _recording(path: Path, table, columns: dict[str, str]) -> Recording:
    name = str(path)
    sweep_col = table[columns["sweep"]].to_numpy()
    if not np.all(np.isfinite(sweep_col)) or np.any(sweep_col != np.round(sweep_col)):
        raise CorruptFileError(name, "column 'sweep' must hold whole numbers on every row")
    t = table[columns["time"]].to_numpy() * UNITS["time"][columns["time_unit"]]
    v = table[columns["voltage"]].to_numpy() * UNITS["voltage"][columns["voltage_unit"]]
    i = None
    if "current" in columns:
        i = table[columns["current"]].to_numpy() * UNITS["current"][columns["current_unit"]]
    starts = np.flatnonzero(np.r_[True, sweep_col[1:] != sweep_col[:-1]])
    bounds = np.r_[starts, sweep_col.size]
    sweeps = []
    for a, b in zip(bounds[:-1], bounds[1:], strict=True):
        number = int(sweep_col[a])
        what = f"sweep {number}"
        cur = None if i is None or np.all(np.isnan(i[a:b])) else i[a:b]
        if b - a < MIN_SAMPLES:
            raise ShapeError(name, f"{what}: fewer than {MIN_SAMPLES} samples ({b - a})")
        rate = rate_from_times(name, t[a:b], what)
        sweeps.append(make_sweep(name, what, v[a:b], cur, rate, number, start_time=float(t[a])))
    return make_recording(name, path.stem, "", sweeps)
