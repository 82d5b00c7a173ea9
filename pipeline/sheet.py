"""The metadata sheet: a CSV that adds experimental columns (condition, animal, slice...) to cells.

The sheet is keyed by a ``cell_id`` column or a ``file`` column (file name, with or without its
extension, after as many of its folders as tell it from other files: ``rig2/cell01.nwb``; or a
whole path). A ``file`` value matches a file whose path ends with it, and the most specific row
wins. A ``cell_id`` match wins over a ``file`` match, so a file holding several cells can have
one row per cell.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path

from pipeline.errors import PatchbatchError

KEY_COLUMNS = ("cell_id", "file")


class SheetError(PatchbatchError):
    """The metadata sheet cannot be used (exit status 2)."""


@dataclass(frozen=True)
class Sheet:
    """A validated metadata sheet.

    Parameters
    ----------
    path : str
        Where it was read from.
    rows : tuple of dict
        One dict per sheet row, values as text.
    columns : tuple of str
        Experimental columns to join (every column but the keys).
    """

    path: str
    rows: tuple[dict[str, str], ...]
    columns: tuple[str, ...]
    _by_cell: dict[str, int] = field(default_factory=dict, repr=False)
    # last path part of a ``file`` value (a name or a stem) -> (row index, its path parts)
    _by_file: dict[str, list[tuple[int, tuple[str, ...]]]] = field(default_factory=dict, repr=False)

    def lookup(self, cell_id: str, source_file: str) -> tuple[int, dict[str, str]] | None:
        """The sheet row (index, values) for a cell, or None when the sheet does not name it.

        A ``cell_id`` row first; else the ``file`` row that names the most of the file's path
        (its folders, then its name or stem): ``rig2/cell01.nwb`` is the row of
        ``/data/day/rig2/cell01.nwb``, never of ``.../rig1/cell01.nwb``.
        """
        index = self._by_cell.get(cell_id)
        if index is None:
            index = self._file_row(source_file)
        if index is None:
            return None
        return index, {c: self.rows[index].get(c, "") for c in self.columns}

    def _file_row(self, source_file: str) -> int | None:
        parts = path_parts(source_file)
        if not parts:
            return None
        folders, name = parts[:-1], parts[-1]
        stem = Path(name).stem
        best: tuple[int, int, int] | None = None  # (folders named, exact name, -row) of a match
        for last in dict.fromkeys((name, stem)):
            for index, row in self._by_file.get(last, []):
                wanted = row[:-1]
                if wanted and folders[-len(wanted) :] != wanted:
                    continue
                rank = (len(wanted), int(row[-1] == name), -index)
                if best is None or rank > best:
                    best = rank
        if best is not None:
            return -best[2]
        return self._same_stem_row(stem)

    def _same_stem_row(self, stem: str) -> int | None:
        """Fallback when no row names the file's path: the one row, if only one, whose last
        part has the file's stem ignoring case and extension (a path from another machine, a
        folder reached through a link, ``Rig2`` for ``rig2``, ``cell01.abf`` exported as
        ``cell01.nwb``)."""
        found = {
            index
            for rows in self._by_file.values()
            for index, row in rows
            if Path(row[-1]).stem.casefold() == stem.casefold()
            or row[-1].casefold() == stem.casefold()
        }
        return found.pop() if len(found) == 1 else None

    def describe_row(self, index: int) -> str:
        """How to name a row in a message (its key values)."""
        row = self.rows[index]
        keys = [f"{k}={row[k]!r}" for k in KEY_COLUMNS if row.get(k)]
        return f"row {index + 2} ({', '.join(keys)})"


def read_sheet(path: str | Path) -> Sheet:
    """Read and validate a metadata sheet.

    Raises
    ------
    SheetError
        Missing file, not UTF-8, no key column, empty keys, duplicate keys; the message names
        the sheet, the row and the problem.
    """
    where = str(path)
    try:
        raw = Path(path).read_bytes()
    except FileNotFoundError:
        raise SheetError(f"{where}: metadata sheet not found") from None
    except IsADirectoryError:
        raise SheetError(f"{where}: is a folder, not a metadata sheet") from None
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise SheetError(
            f"{where}: not UTF-8 text (byte {exc.start}: {raw[exc.start : exc.start + 1]!r}); "
            "save the sheet as UTF-8 CSV"
        ) from None
    names, rows = _parse(text, where)
    keys = [k for k in KEY_COLUMNS if k in names]
    if not keys:
        raise SheetError(
            f"{where}: needs a 'file' or 'cell_id' column to match cells; found columns: "
            f"{', '.join(names) or 'none'}"
        )
    by_key = {k: _index(rows, k, where) for k in keys}
    columns = tuple(c for c in names if c not in KEY_COLUMNS)
    return Sheet(
        where, rows, columns, by_key.get("cell_id", {}), _file_index(by_key.get("file", {}))
    )


def _parse(text: str, where: str) -> tuple[list[str], tuple[dict[str, str], ...]]:
    """The header's names (those not empty) and one dict per data row, values stripped."""
    import csv
    from io import StringIO

    if not text.strip():
        raise SheetError(f"{where}: not a readable CSV table (the sheet is empty)")
    body = text.lstrip("\r\n")
    try:
        # the separators sheets use; left open, the sniffer may pick a letter of a name
        dialect: type[csv.Dialect] | csv.Dialect = csv.Sniffer().sniff(body[:4096], ",;\t| ")
    except csv.Error:  # no dialect found
        dialect = csv.excel
    try:
        table = list(csv.reader(StringIO(body), dialect))
    except (csv.Error, ValueError):  # a dialect csv.reader refuses (3.13), or a broken quote
        try:
            table = list(csv.reader(StringIO(body), csv.excel))
        except csv.Error as exc:
            raise SheetError(f"{where}: not a readable CSV table ({exc})") from None
    names = [h.strip() for h in table[0]]
    twice = sorted({n for n in names if n and names.count(n) > 1})
    if twice:
        raise SheetError(f"{where}: column {twice[0]!r} appears twice in the header")
    rows = _rows(table[1:], names, where)
    keep = [k for k, n in enumerate(names) if n]  # trailing separators in the header: no column
    return [names[k] for k in keep], tuple({names[k]: r[k].strip() for k in keep} for r in rows)


def _rows(table: list[list[str]], names: list[str], where: str) -> list[list[str]]:
    """The data rows (line 2 on), each as wide as the header: short rows padded with empty
    cells, and empty cells past the header's end (a spreadsheet's trailing separators) dropped.
    A value past the header's end, or under a column with no name, would be joined to the
    wrong column or lost, so it stops the run."""
    width = len(names)
    out = []
    for number, row in enumerate(table, start=2):
        if not any(v.strip() for v in row):  # a blank line, or one of spaces
            continue
        extra = [v for v in row[width:] if v.strip()]
        if extra:
            raise SheetError(
                f"{where}: row {number} has {len(row)} fields but the header names {width} "
                f"columns (first extra value {extra[0]!r}); quote values that hold the "
                "separator, or add the column's name to the header"
            )
        nameless = [k for k, n in enumerate(names) if not n and k < len(row) and row[k].strip()]
        if nameless:
            raise SheetError(
                f"{where}: row {number} has a value ({row[nameless[0]]!r}) in column "
                f"{nameless[0] + 1}, which has no name in the header"
            )
        out.append((row + [""] * width)[:width])
    return out


def _index(rows: tuple[dict[str, str], ...], key: str, where: str) -> dict[str, int]:
    seen: dict[str, int] = {}
    spelled: dict[str, tuple[str, int]] = {}  # the value as compared -> (as written, row)
    for i, row in enumerate(rows):
        value = row.get(key, "")
        if not value:
            continue
        # the same file or cell however written: ``./cell01.nwb``, ``cell01.nwb``,
        # ``Cell01.NWB`` (ids and figure names are told apart ignoring case)
        same = ("/".join(path_parts(value)) if key == "file" else value).casefold()
        if same in spelled:
            first, j = spelled[same]
            what = "file" if key == "file" else "cell"
            said = (
                f"{value!r} appears twice"
                if first == value
                else f"{first!r} and {value!r} name the same {what}"
            )
            raise SheetError(f"{where}: {key} {said} (rows {j + 2} and {i + 2})")
        spelled[same] = (value, i)
        seen[value] = i
    if not seen and key == "cell_id":
        return {}
    return seen


def path_parts(text: str) -> tuple[str, ...]:
    """A path's parts, split at ``/`` or ``\\`` (a sheet may come from another system), with
    empty, ``.`` and ``..`` parts left out: ``"./rig2\\cell01.nwb"`` -> ``("rig2", "cell01.nwb")``."""
    return tuple(p for p in re.split(r"[\\/]+", text.strip()) if p not in ("", ".", ".."))


def _file_index(by_file: dict[str, int]) -> dict[str, list[tuple[int, tuple[str, ...]]]]:
    """``file`` values by their last part (a name, or a stem when written without extension)."""
    out: dict[str, list[tuple[int, tuple[str, ...]]]] = {}
    for value, index in by_file.items():
        parts = path_parts(value)
        if parts:
            out.setdefault(parts[-1], []).append((index, parts))
    return out
