"""Output tables (cells, sweeps, spikes) and the run record (run.json).

The rows come from the result records' flat dicts (keys already carry report units:
``rin_mohm``, ``tau_ms``...); this module only orders, types and writes them. One CSV dialect
everywhere: comma separated, UTF-8, ``.`` decimal point, one header row, ``\\n`` line ends,
NaN written as an empty field, booleans as ``true``/``false``.
"""

from __future__ import annotations

import datetime as _dt
import io
import json
import math
import os
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from pipeline.report.atomic import atomic_path, atomic_write_text

CELLS_LEAD = ("cell_id", "source_file")
SWEEPS_LEAD = ("cell_id", "sweep")
SPIKES_LEAD = ("cell_id", "sweep", "spike")
_BOOL_COLUMNS = ("qc_pass", "used")
_LIST_SEP = "; "


def _column_order(rows: Sequence[Mapping[str, Any]], lead: Sequence[str]) -> list[str]:
    """``lead`` first, then every other key in the order it first appears in the rows."""
    seen = dict.fromkeys(lead)
    for row in rows:
        seen.update(dict.fromkeys(row))
    return list(seen)


def _flatten(value: Any) -> Any:
    """Lists of reasons become one ``'; '``-separated string; numpy scalars become Python."""
    if isinstance(value, list | tuple | set | frozenset):
        return _LIST_SEP.join(str(v) for v in value)
    if isinstance(value, np.generic):
        return value.item()
    return value


def _as_bool(value: Any) -> bool:
    """True only for an explicit truth value; missing or unknown counts as False (not passed)."""
    if isinstance(value, str):
        return value.strip().lower() in ("true", "1", "yes")
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return False
    return bool(value)


def _tidy(frame: pd.DataFrame) -> pd.DataFrame:
    """Give each column one type so CSV and Parquet agree: bools as bool, text as str or NaN.

    An empty string becomes NaN: CSV cannot tell the two apart, and re-read tables must equal
    the written ones.
    """
    for col in frame.columns:
        if col in _BOOL_COLUMNS:
            frame[col] = frame[col].map(_as_bool).astype(bool)
            continue
        if frame.empty or frame[col].dtype.kind in "biufcmM":
            continue
        values = frame[col].dropna().tolist()  # plain objects: a loop, not two Series.map
        if all(isinstance(v, bool) for v in values) and len(values) == len(frame):
            frame[col] = frame[col].astype(bool)
        elif all(isinstance(v, int | float) and not isinstance(v, bool) for v in values):
            frame[col] = pd.to_numeric(frame[col])
        else:
            # text, or mixed content (a sheet column with numbers and words): keep it as text
            text = [None if _missing(v) or v == "" else str(v) for v in frame[col]]
            if all(t is None for t in text):
                # an all-empty column reads back from CSV as float NaN: store it that way
                frame[col] = np.nan
            else:
                frame[col] = pd.Series(text, index=frame.index)
    return frame


def _missing(value: Any) -> bool:
    return value is None or (isinstance(value, float) and math.isnan(value))


_PLAIN = frozenset((float, int, str, bool, type(None)))  # what _flatten leaves as it is


def _frame(rows: Iterable[Mapping[str, Any]], lead: Sequence[str]) -> pd.DataFrame:
    rows = [{k: v if type(v) in _PLAIN else _flatten(v) for k, v in row.items()} for row in rows]
    columns = _column_order(rows, lead)
    frame = (
        pd.DataFrame.from_records(rows, columns=columns) if rows else pd.DataFrame(columns=columns)
    )
    return _tidy(frame)


def cells_frame(rows: list[dict[str, Any]], sheet_columns: Sequence[str] = ()) -> pd.DataFrame:
    """One row per cell: ``cell_id``, ``source_file``, the sheet columns, then the rest.

    Parameters
    ----------
    rows : list of dict
        One flat dict per cell (fit values in report units, QC verdict, status, sheet values).
        Lists or tuples (e.g. QC reasons) are joined with ``'; '``.
    sheet_columns : sequence of str
        Metadata-sheet columns, placed right after ``source_file`` in this order (columns no
        row has are still created, empty).

    Returns
    -------
    pandas.DataFrame
        Columns in that order, the others in the order they first appear in the rows;
        ``qc_pass`` is bool (missing counts as False: a cell not analysed has not passed).
    """
    frame = _frame(rows, (*CELLS_LEAD, *sheet_columns))
    if "qc_pass" not in frame.columns:
        frame["qc_pass"] = pd.Series(False, index=frame.index, dtype=bool)
    return frame


def sweeps_frame(rows: list[dict[str, Any]]) -> pd.DataFrame:
    """One row per sweep: ``cell_id``, ``sweep``, then the rest in row order.

    Parameters
    ----------
    rows : list of dict
        One flat dict per sweep (``step_pa``, deflections in mV, fit values, ``used``,
        ``excluded_because``...).

    Returns
    -------
    pandas.DataFrame
        ``used`` is bool when present.
    """
    return _frame(rows, SWEEPS_LEAD)


def spikes_frame(rows: list[dict[str, Any]]) -> pd.DataFrame:
    """One row per detected spike: ``cell_id``, ``sweep``, ``spike``, then the rest in row order.

    Parameters
    ----------
    rows : list of dict
        One flat dict per spike (threshold, peak, width... in report units).

    Returns
    -------
    pandas.DataFrame
        Columns ``cell_id``, ``sweep``, ``spike`` exist even when there are no rows.
    """
    return _frame(rows, SPIKES_LEAD)


def frame_to_csv(frame: pd.DataFrame) -> str:
    """Render a table in the project's CSV dialect (see the module docstring).

    Parameters
    ----------
    frame : pandas.DataFrame
        Table to render.

    Returns
    -------
    str
        CSV text, header row first.
    """
    out = frame.copy()
    for col in out.columns:
        if out[col].dtype == bool:
            out[col] = out[col].map({True: "true", False: "false"})
    buf = io.StringIO()
    out.to_csv(buf, index=False, sep=",", decimal=".", na_rep="", lineterminator="\n")
    return buf.getvalue()


def read_table_csv(path: str | os.PathLike[str]) -> pd.DataFrame:
    """Read a table written by :func:`write_tables` back (floats exact, bools as bool).

    Parameters
    ----------
    path : str or os.PathLike
        A ``cells.csv``, ``sweeps.csv`` or ``spikes.csv``.

    Returns
    -------
    pandas.DataFrame
    """
    return pd.read_csv(path, sep=",", encoding="utf-8")


def write_tables(
    outdir: str | os.PathLike[str],
    cells: pd.DataFrame,
    sweeps: pd.DataFrame,
    spikes: pd.DataFrame | None = None,
) -> dict[str, Path]:
    """Write ``cells.csv``, ``cells.parquet``, ``sweeps.csv`` (and ``spikes.csv``) atomically.

    Parameters
    ----------
    outdir : str or os.PathLike
        Output folder (created if missing).
    cells, sweeps : pandas.DataFrame
        From :func:`cells_frame` and :func:`sweeps_frame`.
    spikes : pandas.DataFrame or None
        From :func:`spikes_frame`; ``spikes.csv`` is written only when given.

    Returns
    -------
    dict
        File name -> path written.
    """
    out = Path(outdir)
    out.mkdir(parents=True, exist_ok=True)
    written = {
        "cells.csv": atomic_write_text(out / "cells.csv", frame_to_csv(cells)),
        "sweeps.csv": atomic_write_text(out / "sweeps.csv", frame_to_csv(sweeps)),
    }
    with atomic_path(out / "cells.parquet") as tmp:
        cells.to_parquet(tmp, index=False, engine="pyarrow")
    written["cells.parquet"] = out / "cells.parquet"
    if spikes is not None:
        written["spikes.csv"] = atomic_write_text(out / "spikes.csv", frame_to_csv(spikes))
    return written


_JSON_PLAIN = frozenset((str, int, bool, type(None)))


def to_jsonable(value: Any) -> Any:
    """Plain JSON types only: NaN/inf -> null (JSON has no NaN), numpy -> Python, paths -> str.

    Parameters
    ----------
    value : Any
        Nested mappings, sequences and scalars.

    Returns
    -------
    Any
        The same structure made of dict, list, str, int, float, bool and None.
    """
    kind = type(value)
    if kind is float:
        return value if math.isfinite(value) else None
    if kind in _JSON_PLAIN:  # before any ABC check: with matplotlib and pandas loaded, the
        return value  # first isinstance(x, Mapping) of each type scans thousands of classes
    if isinstance(value, Mapping):
        return {str(k): to_jsonable(v) for k, v in value.items()}
    if isinstance(value, list | tuple | set | frozenset | np.ndarray):
        return [to_jsonable(v) for v in value]
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, bool | int | float | str) or value is None:
        return value
    if isinstance(value, _dt.datetime | _dt.date):
        return value.isoformat()
    if isinstance(value, os.PathLike):
        return os.fspath(value)
    if isinstance(value, BaseException):
        return f"{type(value).__name__}: {value}"
    return str(value)


def write_run_json(outdir: str | os.PathLike[str], info: Mapping[str, Any]) -> Path:
    """Write ``run.json``: what was run, on what, with which settings, and what went wrong.

    Parameters
    ----------
    outdir : str or os.PathLike
        Output folder (created if missing).
    info : Mapping
        Expected keys: ``version``, ``config`` (the full resolved config), ``inputs`` (list of
        ``{"path", "sha256"}``), ``started``, ``finished`` (ISO 8601 UTC or datetimes),
        ``counts``, ``errors`` (list of ``{"file", "message"}``). Other keys are kept.
        ``version`` defaults to the package version.

    Returns
    -------
    pathlib.Path
        The file written.
    """
    from pipeline import __version__

    record = {"version": __version__, **dict(info)}
    text = json.dumps(to_jsonable(record), indent=2, ensure_ascii=False, allow_nan=False)
    out = Path(outdir)
    out.mkdir(parents=True, exist_ok=True)
    return atomic_write_text(out / "run.json", text + "\n")
