"""The incremental cache: one JSON file per analysed input, in the output folder.

An entry is keyed by the input's sha256, the config digest, the package version, and the
input's path and cell-id prefix (its rows name them), so a re-run over unchanged inputs
re-analyses nothing, and a run killed midway resumes from the entries already written. JSON
only (never pickle): nothing from a cache is ever executed.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from pipeline import __version__

CACHE_DIR = ".patchbatch-cache"
_ENTRY_NAME = re.compile(r"[0-9a-f]{32}\.json")  # entry_key's 32 hex digits


def file_sha256(path: str | Path) -> str:
    """The sha256 of a file's bytes.

    Parameters
    ----------
    path : str or pathlib.Path
        The file.

    Returns
    -------
    str
        64 hexadecimal digits.
    """
    # file_digest reads into one small reused buffer: 0.12-0.16 s against 0.23 s reading 1 MB
    # blocks, for the bench day's 40 files (150 MB)
    with open(path, "rb") as fh:
        return hashlib.file_digest(fh, "sha256").hexdigest()


def entry_key(
    file_hash: str,
    config_digest: str,
    path: str = "",
    id_prefix: str = "",
    avoid: Sequence[str] = (),
) -> str:
    """The cache key of one input under one config and version.

    ``path``, ``id_prefix`` and ``avoid`` (the other inputs' ids its cells must not take) name
    the input as its rows do: two files with the same bytes under other names give other rows,
    so they must not share an entry.
    """
    text = f"{file_hash}:{config_digest}:{__version__}:{id_prefix}:{path}"
    if avoid:  # only then: the keys of every other input stay as they were
        text += ":avoid:" + "\n".join(avoid)
    return hashlib.sha256(text.encode()).hexdigest()[:32]


def has_entries(outdir: str | Path) -> bool:
    """Whether the output folder's cache holds any entry (a fresh folder has none)."""
    try:
        with os.scandir(Path(outdir) / CACHE_DIR) as found:
            return any(_ENTRY_NAME.fullmatch(e.name) for e in found)
    except OSError:  # no cache folder yet
        return False


def load_entry(outdir: str | Path, key: str) -> dict[str, Any] | None:
    """The cached result for ``key``, or None (missing or unreadable entries are ignored)."""
    path = Path(outdir) / CACHE_DIR / f"{key}.json"
    try:
        with open(path, encoding="utf-8") as fh:
            data = json.load(fh)
    except (OSError, ValueError):
        return None
    if not isinstance(data, dict) or data.get("key") != key or not _well_formed(data):
        return None  # tampered, truncated or from another layout: analyse again
    return data


def _well_formed(entry: dict[str, Any]) -> bool:
    """The shape the batch relies on: a file, no error, cells with their rows."""
    cells = entry.get("cells")
    if not isinstance(entry.get("file"), str) or entry.get("error") is not None:
        return False
    if not isinstance(cells, list):
        return False
    for cell in cells:
        if not isinstance(cell, dict) or not isinstance(cell.get("cell"), dict):
            return False
        if not all(isinstance(cell.get(k), list) for k in ("sweeps", "spikes")):
            return False
        if not all(isinstance(r, dict) for k in ("sweeps", "spikes") for r in cell[k]):
            return False
        if not _plain_figure(cell.get("figure"), cell.get("figure_sha256")):
            return False
    return all("cell_id" in cell["cell"] for cell in cells)


_FIGURE_NAME = re.compile(r"[^/\\\x00]+\.png")  # a name in the figure folder, no path
_SHA256 = re.compile(r"[0-9a-f]{64}")


def _plain_figure(name: Any, digest: Any) -> bool:
    """A figure as the analysis records it: none, or a PNG's name with its sha256 (a tampered
    entry must not send the batch to read some other file, such as a FIFO)."""
    if name is None:
        return digest is None
    return (
        isinstance(name, str)
        and _FIGURE_NAME.fullmatch(name) is not None
        and isinstance(digest, str)
        and _SHA256.fullmatch(digest) is not None
    )


def figures(outdir: str | Path) -> set[str]:
    """The figure file names the output folder's cache entries record (figures drawn there)."""
    try:
        with os.scandir(Path(outdir) / CACHE_DIR) as found:
            keys = [e.name[:-5] for e in found if _ENTRY_NAME.fullmatch(e.name)]
    except OSError:  # no cache folder
        return set()
    entries = (load_entry(outdir, key) for key in keys)
    return {c["figure"] for e in entries if e is not None for c in e["cells"] if c.get("figure")}


def store_entry(outdir: str | Path, key: str, result: dict[str, Any]) -> None:
    """Write one result, as :func:`normalise` returns it, atomically (NaN is null there, and
    the tables read it back as NaN)."""
    from pipeline.report.atomic import atomic_write_text

    folder = Path(outdir) / CACHE_DIR
    folder.mkdir(parents=True, exist_ok=True)
    text = json.dumps({"key": key, **result}, allow_nan=False)
    atomic_write_text(folder / f"{key}.json", text, sync=False)


def normalise(result: dict[str, Any]) -> dict[str, Any]:
    """A result as it reads back from the cache (non-finite floats -> null, tuples -> lists).

    One round trip through the json module's C encoder and decoder: its NaN/Infinity tokens
    become null on the way back, numpy scalars become Python numbers.
    """
    return json.loads(json.dumps(result, default=_plain), parse_constant=lambda _: None)


def _plain(value: Any) -> Any:
    """numpy scalars (np.int64, np.bool_, np.float32...) as Python numbers, for json."""
    if hasattr(value, "item") and not isinstance(value, str):
        return value.item()
    raise TypeError(f"{type(value).__name__} is not JSON serialisable")
