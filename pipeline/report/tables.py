"""Output tables (cells, sweeps, spikes) and the run record (run.json).

The rows come from the result records' flat dicts (keys already carry report units:
``rin_mohm``, ``tau_ms``...); this module only orders, types and writes them. One CSV dialect
everywhere: comma separated, UTF-8, ``.`` decimal point, one header row, ``\\n`` line ends,
NaN written as an empty field, booleans as ``true``/``false``.

The tables are :class:`Table` objects: plain typed columns, written with the csv module and
pyarrow. pandas is imported only when a DataFrame is asked for (:meth:`Table.to_frame`, the
``*_frame`` functions, a run's ``BatchResult``): its import, 0.2-0.4 s, was up to a sixth of
a tables-only run (DEVELOPERS.md, "Where the time goes").
"""

from __future__ import annotations

import csv
import datetime as _dt
import io
import json
import math
import os
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from pipeline.report.atomic import atomic_path, atomic_write_text

if TYPE_CHECKING:
    import pandas as pd

CELLS_LEAD = ("cell_id", "source_file")
SWEEPS_LEAD = ("cell_id", "sweep")
SPIKES_LEAD = ("cell_id", "sweep", "spike")
_BOOL_COLUMNS = ("qc_pass", "used")
_LIST_SEP = "; "
_INT64 = (-(2**63), 2**63 - 1)


@dataclass(frozen=True)
class Table:
    """A table as typed columns: what the report stage writes and shows.

    Parameters
    ----------
    columns : tuple of str
        Column names, in order.
    kinds : dict
        Column -> ``'bool'``, ``'int'``, ``'float'``, ``'text'``, or ``'none'`` (a column of a
        table with no rows, whose type nothing tells).
    data : dict
        Column -> list of values, one per row: ``bool``; ``int``; ``float`` (NaN when
        missing); ``str`` or None (missing) (from a DataFrame, any object, written as its
        ``str``).
    """

    columns: tuple[str, ...]
    kinds: dict[str, str]
    data: dict[str, list[Any]]

    def __len__(self) -> int:
        return len(self.data[self.columns[0]]) if self.columns else 0

    def records(self) -> list[dict[str, Any]]:
        """One dict per row, columns in order."""
        return [dict(zip(self.columns, values, strict=True)) for values in self._rows()]

    def _rows(self) -> Iterable[tuple[Any, ...]]:
        return zip(*(self.data[c] for c in self.columns), strict=True)

    def numbers(self, column: str) -> np.ndarray:
        """A column as floats (NaN where missing or not a number; booleans as 0 and 1)."""
        return np.array([_number(v) for v in self.data[column]], dtype=float)

    def to_frame(self) -> pd.DataFrame:
        """The table as a DataFrame: bool, int64, float64 and pandas' text columns.

        Returns
        -------
        pandas.DataFrame
        """
        import pandas as pd

        if not len(self):
            return pd.DataFrame(
                {c: pd.Series([], dtype=bool if self.kinds[c] == "bool" else object)
                 for c in self.columns}
            )  # fmt: skip
        dtypes = {"bool": bool, "int": np.int64, "float": np.float64}
        return pd.DataFrame(
            {c: pd.Series(self.data[c], dtype=dtypes.get(self.kinds[c])) for c in self.columns},
            columns=list(self.columns),
        )

    @classmethod
    def from_frame(cls, frame: pd.DataFrame) -> Table:
        """A DataFrame as a :class:`Table` (its dtypes decide the kinds; any other column is
        text).

        Parameters
        ----------
        frame : pandas.DataFrame
            E.g. a table read back with :func:`read_table_csv`.

        Returns
        -------
        Table
        """
        columns = tuple(str(c) for c in frame.columns)
        if len(set(columns)) != len(columns):
            raise ValueError("a table's column names must differ")
        kinds, data = {}, {}
        for name, col in zip(columns, frame.columns, strict=True):
            series = frame[col]
            kind = {"b": "bool", "i": "int", "u": "int", "f": "float"}.get(series.dtype.kind)
            if len(frame) == 0 and kind is None:
                kind = "none"
            values = series.tolist()
            if kind == "int" and any(is_missing(v) for v in values):  # pandas' nullable Int64
                kind = "float"
            if kind == "bool" and any(is_missing(v) for v in values):  # pandas' nullable boolean
                kind = None
            if kind == "float":
                values = [math.nan if is_missing(v) else float(v) for v in values]
            elif kind is None:  # text, or objects shown and written as text (str(value))
                kind = "text"
                values = [None if is_missing(v) else v for v in values]
            kinds[name] = kind
            data[name] = values
        return cls(columns, kinds, data)


def _number(value: Any) -> float:
    """``pd.to_numeric(value, errors="coerce")`` for one value: text only in ASCII digits."""
    if value is None or (isinstance(value, str) and (not value.isascii() or "_" in value)):
        return math.nan
    try:
        return float(value)
    except (TypeError, ValueError):
        return math.nan


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


def is_missing(value: Any) -> bool:
    """None, NaN (Python or numpy), or pandas' NA and NaT (told by name: no pandas import)."""
    if value is None or (isinstance(value, float | np.floating) and math.isnan(value)):
        return True
    return type(value).__name__ in ("NAType", "NaTType")


def _typed(name: str, values: list[Any]) -> tuple[str, list[Any]]:
    """One column's kind and values, so that CSV and Parquet agree.

    Bools stay bools; whole numbers with none missing are integers; numbers with some missing
    are floats (NaN for the missing); anything else is text (a sheet column of numbers and
    words too). An empty string is a missing value: CSV cannot tell the two apart, and re-read
    tables must equal the written ones. A column with nothing in it is float NaN, as a CSV
    reader makes of it.
    """
    if name in _BOOL_COLUMNS:
        return "bool", [_as_bool(v) for v in values]
    present = [v for v in values if not is_missing(v)]
    types = {type(v) for v in present}
    complete = len(present) == len(values)
    if types == {bool} and complete:
        return "bool", values
    if types == {int} and complete and all(_INT64[0] <= v <= _INT64[1] for v in values):
        return "int", values
    if types <= {int, float}:  # some missing, or none present at all
        return "float", [math.nan if is_missing(v) else float(v) for v in values]
    text = [None if is_missing(v) or v == "" else str(v) for v in values]
    if all(t is None for t in text):
        return "float", [math.nan] * len(values)
    return "text", text


_PLAIN = frozenset((float, int, str, bool, type(None)))  # what _flatten leaves as it is


def _table(rows: Iterable[Mapping[str, Any]], lead: Sequence[str]) -> Table:
    rows = [{k: v if type(v) in _PLAIN else _flatten(v) for k, v in row.items()} for row in rows]
    columns = _column_order(rows, lead)
    kinds, data = {}, {}
    for col in columns:
        if not rows:
            kinds[col], data[col] = ("bool" if col in _BOOL_COLUMNS else "none"), []
            continue
        kinds[col], data[col] = _typed(col, [row.get(col) for row in rows])  # absent: missing
    return Table(tuple(columns), kinds, data)


def cells_table(rows: list[dict[str, Any]], sheet_columns: Sequence[str] = ()) -> Table:
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
    Table
        Columns in that order, the others in the order they first appear in the rows;
        ``qc_pass`` is bool (missing counts as False: a cell not analysed has not passed).
    """
    table = _table(rows, (*CELLS_LEAD, *sheet_columns))
    if "qc_pass" in table.kinds:
        return table
    return Table(
        (*table.columns, "qc_pass"),
        {**table.kinds, "qc_pass": "bool"},
        {**table.data, "qc_pass": [False] * len(rows)},
    )


def sweeps_table(rows: list[dict[str, Any]]) -> Table:
    """One row per sweep: ``cell_id``, ``sweep``, then the rest in row order.

    Parameters
    ----------
    rows : list of dict
        One flat dict per sweep (``step_pa``, deflections in mV, fit values, ``used``,
        ``excluded_because``...).

    Returns
    -------
    Table
        ``used`` is bool when present.
    """
    return _table(rows, SWEEPS_LEAD)


def spikes_table(rows: list[dict[str, Any]]) -> Table:
    """One row per detected spike: ``cell_id``, ``sweep``, ``spike``, then the rest in row order.

    Parameters
    ----------
    rows : list of dict
        One flat dict per spike (threshold, peak, width... in report units).

    Returns
    -------
    Table
        Columns ``cell_id``, ``sweep``, ``spike`` exist even when there are no rows.
    """
    return _table(rows, SPIKES_LEAD)


def cells_frame(rows: list[dict[str, Any]], sheet_columns: Sequence[str] = ()) -> pd.DataFrame:
    """:func:`cells_table` as a DataFrame (:meth:`Table.to_frame`)."""
    return cells_table(rows, sheet_columns).to_frame()


def sweeps_frame(rows: list[dict[str, Any]]) -> pd.DataFrame:
    """:func:`sweeps_table` as a DataFrame (:meth:`Table.to_frame`)."""
    return sweeps_table(rows).to_frame()


def spikes_frame(rows: list[dict[str, Any]]) -> pd.DataFrame:
    """:func:`spikes_table` as a DataFrame (:meth:`Table.to_frame`)."""
    return spikes_table(rows).to_frame()


def as_table(table: Table | pd.DataFrame) -> Table:
    """A :class:`Table` as it is; a DataFrame through :meth:`Table.from_frame`."""
    return table if isinstance(table, Table) else Table.from_frame(table)


def _field(value: Any, kind: str) -> str:
    if kind == "float":
        # repr: the shortest text that reads back exact (as pandas writes float64)
        return "" if math.isnan(value) else repr(float(value))
    if kind == "bool":
        return "true" if value else "false"
    return "" if value is None else str(value)


def table_to_csv(table: Table | pd.DataFrame) -> str:
    """Render a table in the project's CSV dialect (see the module docstring).

    Parameters
    ----------
    table : Table or pandas.DataFrame
        Table to render; a DataFrame is written by pandas (its own dtypes decide how).

    Returns
    -------
    str
        CSV text, header row first.
    """
    if not isinstance(table, Table):
        return frame_to_csv(table)
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")  # quotes only fields that need it
    writer.writerow(table.columns)
    kinds = [table.kinds[c] for c in table.columns]
    writer.writerows(
        [_field(v, k) for v, k in zip(row, kinds, strict=True)] for row in table._rows()
    )
    return buf.getvalue()


def frame_to_csv(frame: pd.DataFrame) -> str:
    """Render a DataFrame in the project's CSV dialect with pandas' own writer.

    Parameters
    ----------
    frame : pandas.DataFrame
        Table to render (bool columns as ``true``/``false``).

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
    import pandas as pd

    return pd.read_csv(path, sep=",", encoding="utf-8")


def write_parquet(table: Table | pd.DataFrame, path: str | os.PathLike[str]) -> None:
    """Write a table as Parquet with pyarrow: missing values as nulls, text as UTF-8.

    Parameters
    ----------
    table : Table or pandas.DataFrame
        Table to write; a DataFrame is written by pandas (``to_parquet``, its dtypes as they
        are).
    path : str or os.PathLike
        File to write (not atomically: :func:`write_tables` gives it a temporary path).
    """
    if not isinstance(table, Table):
        table.to_parquet(path, index=False, engine="pyarrow")
        return
    import pyarrow as pa
    import pyarrow.parquet as pq

    arrays = [_arrow_column(table.kinds[c], table.data[c]) for c in table.columns]
    pq.write_table(pa.table(arrays, names=list(table.columns)), os.fspath(path))


def _arrow_column(kind: str, values: list[Any]) -> Any:
    """One column as an Arrow array, built from its buffers (Arrow's columnar format).

    ``pyarrow.array`` would do it from the list, but its first call imports pandas to ask
    whether the list is one of pandas' arrays: about a tenth of a tables-only run.
    """
    import pyarrow as pa

    n = len(values)
    if kind == "none":
        return pa.nulls(n)
    if kind == "bool":
        bits = np.packbits(np.array(values, dtype=bool), bitorder="little")
        column = pa.Array.from_buffers(pa.bool_(), n, [None, pa.py_buffer(bits)])
    elif kind == "int":
        data = np.array(values, dtype=np.int64)
        column = pa.Array.from_buffers(pa.int64(), n, [None, pa.py_buffer(data)])
    elif kind == "float":
        data = np.array(values, dtype=np.float64)
        missing = np.isnan(data)
        column = pa.Array.from_buffers(
            pa.float64(), n, [_validity(missing), pa.py_buffer(data)], int(missing.sum())
        )
    else:  # text: offsets into one UTF-8 buffer
        missing = np.array([v is None for v in values], dtype=bool)
        encoded = [b"" if v is None else str(v).encode("utf-8") for v in values]
        offsets = np.zeros(n + 1, dtype=np.int64)
        np.cumsum([len(b) for b in encoded], out=offsets[1:])
        buffers = [_validity(missing), pa.py_buffer(offsets), pa.py_buffer(b"".join(encoded))]
        column = pa.Array.from_buffers(pa.large_string(), n, buffers, int(missing.sum()))
    column.validate(full=True)
    return column


def _validity(missing: np.ndarray) -> Any:
    """Arrow's validity bitmap (1 = present, least significant bit first), None when full."""
    import pyarrow as pa

    if not missing.any():
        return None
    return pa.py_buffer(np.packbits(~missing, bitorder="little"))


def write_tables(
    outdir: str | os.PathLike[str],
    cells: Table | pd.DataFrame,
    sweeps: Table | pd.DataFrame,
    spikes: Table | pd.DataFrame | None = None,
) -> dict[str, Path]:
    """Write ``cells.csv``, ``cells.parquet``, ``sweeps.csv`` (and ``spikes.csv``) atomically.

    Parameters
    ----------
    outdir : str or os.PathLike
        Output folder (created if missing).
    cells, sweeps : Table or pandas.DataFrame
        From :func:`cells_table` and :func:`sweeps_table` (or their ``*_frame`` forms).
    spikes : Table or pandas.DataFrame or None
        From :func:`spikes_table`; ``spikes.csv`` is written only when given.

    Returns
    -------
    dict
        File name -> path written.
    """
    out = Path(outdir)
    out.mkdir(parents=True, exist_ok=True)
    written = {
        "cells.csv": atomic_write_text(out / "cells.csv", table_to_csv(cells)),
        "sweeps.csv": atomic_write_text(out / "sweeps.csv", table_to_csv(sweeps)),
    }
    with atomic_path(out / "cells.parquet") as tmp:
        write_parquet(cells, tmp)
    written["cells.parquet"] = out / "cells.parquet"
    if spikes is not None:
        written["spikes.csv"] = atomic_write_text(out / "spikes.csv", table_to_csv(spikes))
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
