"""What the readers and the step finder see in a file, sweep by sweep (``patchbatch inspect``).

One block per cell: a header line (cell id, electrode, source file, skipped series), then a
plain aligned table with one row per sweep. Currents are shown in pA (positive =
depolarizing), times in ms, the baseline in mV.
"""

from __future__ import annotations

import os
import warnings
from collections.abc import Sequence

import numpy as np
import pandas as pd

from pipeline.recording import Recording, Sweep
from pipeline.steps import StepEpoch, StepSettings, find_steps

COLUMNS = (
    "sweep",
    "rate_khz",
    "duration_ms",
    "protocol",
    "holding_pa",
    "onset_ms",
    "step_ms",
    "amplitude_pa",
    "baseline_mv",
    "status",
)


def _fixed(decimals: int):
    """Format with ``decimals`` decimals, never showing ``-0.0``."""
    return lambda value: f"{round(value, decimals) + 0.0:.{decimals}f}"


_FORMATS = {
    "rate_khz": "{:.4g}".format,
    "duration_ms": _fixed(1),
    "holding_pa": _fixed(1),
    "onset_ms": _fixed(2),
    "step_ms": _fixed(2),
    "amplitude_pa": _fixed(1),
    "baseline_mv": _fixed(2),
}


def inspect_file(path: str | os.PathLike, settings: StepSettings) -> str:
    """Describe every cell of a recording file, sweep by sweep.

    Parameters
    ----------
    path : str or os.PathLike
        Any file :func:`pipeline.readers.open_recordings` reads.
    settings : StepSettings
        Step finder settings (the config's ``[steps]`` table).

    Returns
    -------
    str
        The text of :func:`inspect_recordings`.

    Raises
    ------
    RecordingError
        When the file cannot be read (the message names the file).
    """
    from pipeline.readers import open_recordings

    return inspect_recordings(open_recordings(path), settings)


def inspect_recordings(recordings: Sequence[Recording], settings: StepSettings) -> str:
    """Describe cells already read, one header line and one table per cell.

    Parameters
    ----------
    recordings : sequence of Recording
        The cells of one file (or any cells).
    settings : StepSettings
        Step finder settings.

    Returns
    -------
    str
        Plain text, blocks separated by a blank line.
    """
    if not recordings:
        return "no current-clamp recordings found"
    return "\n\n".join(_block(rec, settings) for rec in recordings) + "\n"


def sweep_table(recording: Recording, settings: StepSettings) -> pd.DataFrame:
    """The per-sweep rows shown by :func:`inspect_recordings`, in report units.

    Parameters
    ----------
    recording : Recording
        One cell.
    settings : StepSettings
        Step finder settings.

    Returns
    -------
    pandas.DataFrame
        Columns ``COLUMNS``; NaN where a value is unknown (e.g. the onset of a ramp).
    """
    epochs = find_steps(recording, settings)
    rows = [_row(sw, ep) for sw, ep in zip(recording.sweeps, epochs, strict=True)]
    return pd.DataFrame(rows, columns=list(COLUMNS))


def _header(rec: Recording, table: pd.DataFrame) -> str:
    usable = int((table["status"].str.startswith("ok")).sum()) if len(table) else 0
    skipped = "; ".join(rec.skipped) if rec.skipped else "none"
    return (
        f"cell {rec.cell_id} | electrode {rec.electrode or '?'} | file {rec.source_file} | "
        f"{len(rec.sweeps)} sweeps, {usable} usable | skipped: {skipped}"
    )


def _block(rec: Recording, settings: StepSettings) -> str:
    table = sweep_table(rec, settings)
    if table.empty:
        return _header(rec, table) + "\n(no sweeps)"
    return _header(rec, table) + "\n" + _aligned(table)


def _aligned(table: pd.DataFrame) -> str:
    """Numbers right-aligned, text (protocol, status) left-aligned, NaN as '-'."""
    columns = []
    for name in table.columns:
        fmt = _FORMATS.get(name, str)
        cells = [name] + ["-" if _is_nan(v) else fmt(v) for v in table[name]]
        width = max(len(c) for c in cells)
        text = name in ("protocol", "status")
        columns.append([c.ljust(width) if text else c.rjust(width) for c in cells])
    return "\n".join("  ".join(row).rstrip() for row in zip(*columns, strict=True))


def _is_nan(value: object) -> bool:
    return isinstance(value, float) and np.isnan(value)


def _row(sweep: Sweep, epoch: StepEpoch) -> dict[str, object]:
    return {
        "sweep": sweep.number,
        "rate_khz": sweep.rate / 1e3,
        "duration_ms": sweep.duration * 1e3,
        "protocol": sweep.protocol or "-",
        "holding_pa": epoch.holding * 1e12,
        "onset_ms": epoch.onset * 1e3,
        "step_ms": epoch.duration * 1e3,
        "amplitude_pa": epoch.amplitude * 1e12,
        "baseline_mv": _baseline(sweep, epoch) * 1e3,
        "status": _status(epoch),
    }


def _status(epoch: StepEpoch) -> str:
    if epoch.usable:
        return "ok" if epoch.source == "recorded" else "ok (schedule)"
    return f"{epoch.kind}: {epoch.reason}"


def _baseline(sweep: Sweep, epoch: StepEpoch) -> float:
    """Mean voltage before the onset (the whole sweep when nothing changes), NaN-aware, V."""
    if epoch.onset_index >= 1:
        part = sweep.voltage[: epoch.onset_index]
    elif epoch.kind == "no change":
        part = sweep.voltage
    else:
        return float("nan")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN part: NaN is the answer
        return float(np.nanmean(part))
