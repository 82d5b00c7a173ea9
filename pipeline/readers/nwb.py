"""NWB reader: current-clamp sweeps of an NWB 2 file, read through pynwb.

Responses are ``CurrentClampSeries`` (and ``IZeroClampSeries``, which by definition inject no
current, so their current is zeros). Each is paired with its ``CurrentClampStimulusSeries``
through the intracellular recordings table when the file has one, else by electrode and
``sweep_number``, else by order per electrode. Data are scaled to SI as the NWB schema defines:
``value = data * conversion + offset`` in the series' ``unit``, then the unit's prefix (a file
that stores ``mV`` as its unit is read as millivolts). Voltage-clamp series are skipped and listed
in ``Recording.skipped``.
"""

from __future__ import annotations

import math
import re
import warnings
from collections import Counter
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.errors import CorruptFileError, NoCurrentClampError, RecordingError, ShapeError
from pipeline.readers import (
    cell_ids,
    check_volts_or_amps,
    describe,
    make_recording,
    make_sweep,
    rate_from_times,
)
from pipeline.recording import Recording, Sweep

# NWB attribute -> our settings key (SI unit in the suffix).
SETTINGS_KEYS = {
    "bias_current": "bias_current_a",
    "bridge_balance": "bridge_balance_ohm",
    "capacitance_compensation": "capacitance_compensation_f",
}
NO_DESCRIPTION = "N/A"  # pynwb's placeholder for an empty stimulus_description


@dataclass
class SeriesData:
    """One patch-clamp series loaded into memory, in SI (V or A), independent of the file."""

    name: str
    kind: str  # neurodata type: CurrentClampSeries, IZeroClampSeries, CurrentClampStimulusSeries
    electrode: str
    values: np.ndarray
    rate: float
    start_time: float
    sweep_number: int | None
    protocol: str
    settings: dict[str, float | str]


def read(path: Path) -> list[Recording]:
    """Read the current-clamp cells of an NWB file through pynwb.

    Parameters
    ----------
    path : pathlib.Path
        An NWB 2 (HDF5) file.

    Returns
    -------
    list of Recording
        One per intracellular electrode with current-clamp sweeps, in electrode order.

    Raises
    ------
    CorruptFileError, NoCurrentClampError, UnitError, ShapeError, BadSamplesError
    """
    from pynwb import NWBHDF5IO

    name = str(path)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            with NWBHDF5IO(name, mode="r", load_namespaces=True) as io:
                nwbfile = io.read()
                return _recordings(path, nwbfile)
    except RecordingError:
        raise
    except Exception as exc:  # h5py / hdmf / pynwb errors on a corrupt or truncated file
        raise CorruptFileError(name, f"cannot be read as NWB ({describe(exc)})") from exc


def _recordings(path: Path, nwbfile: Any) -> list[Recording]:
    from pynwb.icephys import (
        CurrentClampSeries,
        CurrentClampStimulusSeries,
        PatchClampSeries,
    )

    name = str(path)
    everything = list(nwbfile.acquisition.values()) + list(nwbfile.stimulus.values())
    responses, stimuli, skipped = [], [], []
    for obj in everything:
        if isinstance(obj, CurrentClampSeries):
            responses.append(obj)
        elif isinstance(obj, CurrentClampStimulusSeries):
            stimuli.append(obj)
        elif isinstance(obj, PatchClampSeries):
            skipped.append(f"{obj.name} ({type(obj).__name__})")
    if not responses:
        what = f"; skipped: {', '.join(skipped)}" if skipped else ""
        raise NoCurrentClampError(name, f"no current-clamp series{what}")
    pairs = _pairs_from_table(nwbfile.intracellular_recordings)
    if pairs is None:
        pairs = pair_series(
            name, [_load(name, s, "V") for s in responses], [_load(name, s, "A") for s in stimuli]
        )
    else:
        pairs = [
            (_load(name, r, "V", ref_r), None if s is None else _load(name, s, "A", ref_s))
            for (r, ref_r), (s, ref_s) in pairs
        ]
        # Rows cutting one series into several sweeps: number those sweeps by row order.
        counts = Counter(r.name for r, _ in pairs)
        for r, _ in pairs:
            if counts[r.name] > 1:
                r.sweep_number = None
    return build_recordings(path, pairs, metadata(nwbfile), skipped)


def _pairs_from_table(table: Any) -> list | None:
    """(response, ref), (stimulus, ref) per row of the intracellular recordings table, or None."""
    from pynwb.icephys import CurrentClampSeries

    if table is None or len(table) == 0:
        return None
    rows = []
    for i in range(len(table)):
        resp = table["responses"]["response"][i]
        stim = table["stimuli"]["stimulus"][i]
        if not _valid(resp) or not isinstance(resp.timeseries, CurrentClampSeries):
            continue  # voltage-clamp rows, or stimulus-only rows
        stim_pair = (stim.timeseries, stim) if _valid(stim) else (None, None)
        rows.append(((resp.timeseries, resp), stim_pair))
    return rows or None


def _valid(ref: Any) -> bool:
    return ref is not None and ref.timeseries is not None and int(ref.idx_start) >= 0


def _load(path: str, series: Any, base: str, ref: Any = None) -> SeriesData:
    """Load one pynwb series into memory, in SI, honouring a table row's (idx_start, count)."""
    kind = type(series).__name__
    what = f"{series.name} ({kind})"
    factor = check_volts_or_amps(path, what, stored_unit(series), base)
    conversion = float(series.conversion) if series.conversion is not None else 1.0
    offset = float(getattr(series, "offset", 0.0) or 0.0)
    start, stop = 0, None
    if ref is not None:
        start, stop = int(ref.idx_start), int(ref.idx_start) + int(ref.count)
    raw = np.asarray(series.data[start:stop], dtype=np.float64)
    values = (raw * conversion + offset) * factor
    if series.timestamps is not None:
        times = np.asarray(series.timestamps[start:stop], dtype=np.float64)
        rate = rate_from_times(path, times, what)
        t0 = float(times[0])
    else:
        rate = float(series.rate) if series.rate is not None else math.nan
        t0 = float(series.starting_time or 0.0) + start / rate if rate > 0 else math.nan
    settings: dict[str, float | str] = {}
    for attr, key in SETTINGS_KEYS.items():
        value = getattr(series, attr, None)
        if value is not None and np.isfinite(value):
            settings[key] = float(value)
    number = getattr(series, "sweep_number", None)
    protocol = series.stimulus_description or ""
    return SeriesData(
        name=series.name,
        kind=kind,
        electrode=series.electrode.name if series.electrode is not None else "",
        values=values,
        rate=rate,
        start_time=t0,
        sweep_number=None if number is None else int(number),
        protocol="" if protocol == NO_DESCRIPTION else protocol,
        settings=settings,
    )


def stored_unit(series: Any) -> str:
    """The unit as written in the file.

    pynwb replaces a CurrentClampSeries' unit by 'volts' (and a stimulus' by 'amperes') when it
    reads one, so a file storing millivolts would be read 1000 times too large; the unit
    attribute of the HDF5 dataset is what the file says.
    """
    attrs = getattr(series.data, "attrs", None)
    unit = attrs.get("unit") if attrs is not None else None
    if unit is None:
        return series.unit or ""
    return unit.decode() if isinstance(unit, bytes) else str(unit)


def _natural_key(name: str) -> list:
    return [int(tok) if tok.isdigit() else tok for tok in re.split(r"(\d+)", name)]


def pair_series(
    path: str, responses: list[SeriesData], stimuli: list[SeriesData]
) -> list[tuple[SeriesData, SeriesData | None]]:
    """Pair responses with stimuli per electrode: by sweep number if all have one, else by order.

    Order is start time, then name with numbers compared as numbers (HDF5 lists names
    alphabetically, so ``sweep_10`` would come before ``sweep_2``).
    """
    pairs = []
    for electrode in dict.fromkeys(r.electrode for r in responses):
        resp = _ordered(r for r in responses if r.electrode == electrode)
        stim = _ordered(s for s in stimuli if s.electrode == electrode)
        numbered = all(s.sweep_number is not None for s in resp + stim)
        if numbered:
            by_number = {s.sweep_number: s for s in stim}
            pairs += [(r, by_number.get(r.sweep_number)) for r in resp]
            continue
        clamp = [r for r in resp if r.kind != "IZeroClampSeries"]
        izero = [(r, None) for r in resp if r.kind == "IZeroClampSeries"]
        if stim and len(stim) != len(clamp):
            raise ShapeError(
                path,
                f"electrode {electrode!r}: {len(clamp)} current-clamp series but {len(stim)} "
                "stimulus series and no sweep numbers to pair them",
            )
        pairs += list(zip(clamp, stim or [None] * len(clamp), strict=True)) + izero
    return pairs


def _ordered(series: Iterable[SeriesData]) -> list[SeriesData]:
    return sorted(series, key=lambda s: (s.start_time, _natural_key(s.name)))


def build_recordings(
    path: Path,
    pairs: list[tuple[SeriesData, SeriesData | None]],
    meta: dict[str, str],
    skipped: list[str],
) -> list[Recording]:
    """Group (response, stimulus) pairs by electrode into checked Recordings."""
    name = str(path)
    electrodes = list(dict.fromkeys(r.electrode for r, _ in pairs))
    out = []
    for electrode, cell_id in zip(electrodes, cell_ids(path, electrodes), strict=True):
        mine = [(r, s) for r, s in pairs if r.electrode == electrode]
        sweeps = [_sweep(name, order, r, s) for order, (r, s) in enumerate(mine)]
        sweeps.sort(key=lambda s: (s.number, s.start_time))
        out.append(make_recording(name, cell_id, electrode, sweeps, meta, skipped))
    return out


def _sweep(path: str, order: int, resp: SeriesData, stim: SeriesData | None) -> Sweep:
    what = f"{resp.name} ({resp.kind})"
    if resp.kind == "IZeroClampSeries":
        current = np.zeros_like(resp.values)  # I=0 mode: the amplifier injects nothing
        current_rate = None
    else:
        current = None if stim is None else stim.values
        current_rate = None if stim is None else stim.rate
    if stim is not None and stim.values.size != resp.values.size:
        what = f"{what} with stimulus {stim.name}"
    number = resp.sweep_number if resp.sweep_number is not None else order
    return make_sweep(
        path,
        what,
        resp.values,
        current,
        resp.rate,
        number,
        current_rate=current_rate,
        start_time=resp.start_time,
        protocol=resp.protocol or (stim.protocol if stim is not None else ""),
        settings=resp.settings,
    )


def metadata(nwbfile: Any) -> dict[str, str]:
    """Session and subject fields as strings (missing ones left out)."""
    meta = {
        "session_description": nwbfile.session_description,
        "identifier": nwbfile.identifier,
        "session_start_time": (
            nwbfile.session_start_time.isoformat() if nwbfile.session_start_time else None
        ),
    }
    subject = nwbfile.subject
    if subject is not None:
        meta["subject_id"] = subject.subject_id
        meta["species"] = subject.species
    return {k: str(v) for k, v in meta.items() if v is not None}
