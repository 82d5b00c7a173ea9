"""Atomic file writes: a reader never sees a half-written output, a failed write keeps the old one.

Each writer writes into a temporary file in the destination folder (same file system, so the
final ``os.replace`` is atomic on POSIX and Windows) and renames it onto the destination only
when it finished without error.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from collections.abc import Iterator
from pathlib import Path

_UMASK: int | None = None


def _default_mode() -> int:
    """Permissions a plain ``open(path, "w")`` would give (mkstemp gives 0600)."""
    global _UMASK
    if _UMASK is None:
        _UMASK = os.umask(0)
        os.umask(_UMASK)
    return 0o666 & ~_UMASK


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike[str]) -> Iterator[Path]:
    """Yield a temporary path next to ``path``; move it onto ``path`` when the block succeeds.

    For writers that want a file name (``Figure.savefig``, ``pyarrow.parquet.write_table``). The
    temporary name keeps the destination's suffix so writers that infer the format from it
    still work. On any exception the temporary file is removed, ``path`` is left untouched and
    the exception propagates.

    Parameters
    ----------
    path : str or os.PathLike
        Final destination. Its folder must exist.

    Yields
    ------
    pathlib.Path
        Where the writer should write.
    """
    dest = Path(path)
    fd, tmp_name = tempfile.mkstemp(
        dir=dest.parent, prefix=f".{dest.name}.", suffix=f".tmp{dest.suffix}"
    )
    os.close(fd)
    tmp = Path(tmp_name)
    try:
        yield tmp
        os.chmod(tmp, _default_mode())
        os.replace(tmp, dest)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            tmp.unlink()
        raise


def atomic_write_bytes(path: str | os.PathLike[str], data: bytes, *, sync: bool = True) -> Path:
    """Write ``data`` to ``path`` atomically (flushed to disk before the rename).

    Parameters
    ----------
    path : str or os.PathLike
        Destination file; its folder must exist.
    data : bytes
        Content.
    sync : bool
        fsync before the rename, so the file survives a power cut. The cache turns it off: a
        lost entry is only analysed again, and the sync costs tens of ms per file.

    Returns
    -------
    pathlib.Path
        The destination.
    """
    dest = Path(path)
    with atomic_path(dest) as tmp, open(tmp, "wb") as fh:
        fh.write(data)
        fh.flush()
        if sync:
            os.fsync(fh.fileno())
    return dest


def atomic_write_text(
    path: str | os.PathLike[str], text: str, encoding: str = "utf-8", *, sync: bool = True
) -> Path:
    """Write ``text`` to ``path`` atomically, UTF-8 and ``\\n`` line ends by default.

    Parameters
    ----------
    path : str or os.PathLike
        Destination file; its folder must exist.
    text : str
        Content; line ends are written as given (no platform translation).
    encoding : str
        Text encoding.
    sync : bool
        As for :func:`atomic_write_bytes`.

    Returns
    -------
    pathlib.Path
        The destination.
    """
    return atomic_write_bytes(path, text.encode(encoding), sync=sync)
