"""NWB reader: current-clamp sweeps of an NWB 2 file.

Two engines give identical Recordings: by default the documented NWB 2 core layout is read
directly with h5py (pynwb's object mapping costs ~0.1 s per file); anything that path does not
understand (extension types, other link kinds, a file it cannot parse) is read through pynwb.

Responses are ``CurrentClampSeries`` (and ``IZeroClampSeries``, which by definition inject no
current, so their current is zeros). Each is paired with its ``CurrentClampStimulusSeries``
through the intracellular recordings table when the file has one, else by electrode and
``sweep_number``, else by order per electrode. Data are scaled to SI as the NWB schema defines:
``value = data * conversion + offset`` in the series' ``unit``, then the unit's prefix (a file
that stores ``mV`` as its unit is read as millivolts). Voltage-clamp series are skipped and listed
in ``Recording.skipped``.
"""

from __future__ import annotations

import contextlib
import datetime as dt
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
MAX_SERIES_SAMPLES = 100_000_000  # one sweep: 1 h at 25 kHz; 0.8 GB as float64


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


def read(path: Path, *, engine: str = "auto") -> list[Recording]:
    """Read the current-clamp cells of an NWB file.

    Parameters
    ----------
    path : pathlib.Path
        An NWB 2 (HDF5) file.
    engine : {"auto", "h5py", "pynwb"}
        ``"h5py"`` reads the documented core layout directly (fast, no object mapping);
        ``"pynwb"`` goes through pynwb; ``"auto"`` tries h5py and falls back to pynwb for
        anything it does not understand (extension types, other layouts).

    Returns
    -------
    list of Recording
        One per intracellular electrode with current-clamp sweeps.

    Raises
    ------
    CorruptFileError, NoCurrentClampError, UnitError, ShapeError, BadSamplesError
    """
    if engine not in ("auto", "h5py", "pynwb"):
        raise ValueError(f"engine must be 'auto', 'h5py' or 'pynwb', not {engine!r}")
    if engine != "pynwb":
        try:
            return _guarded(path, _read_h5)
        except NotUnderstood:
            # pynwb reads what the direct path does not know (extension types, other layouts)
            if engine == "h5py":
                raise
        # A file the direct path found corrupt is not handed to pynwb: on some damaged files
        # (a dangling object reference) pynwb/h5py crash the whole process (segfault).
    return _guarded(path, _read_pynwb)


def _guarded(path: Path, reader: Any) -> list[Recording]:
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            return reader(path)
    except (RecordingError, NotUnderstood):
        raise
    except Exception as exc:  # h5py / hdmf / pynwb errors on a corrupt or truncated file
        raise CorruptFileError(str(path), f"cannot be read as NWB ({describe(exc)})") from exc


class NotUnderstood(Exception):
    """The h5py path does not understand this file's layout; pynwb should read it."""


def _series_data(
    path: str,
    *,
    name: str,
    kind: str,
    electrode: str,
    base: str,
    unit: str,
    conversion: float | None,
    offset: float | None,
    data: Any,
    timestamps: Any,
    rate: float | None,
    starting_time: float | None,
    start: int,
    stop: int | None,
    sweep_number: int | None,
    protocol: str | None,
    settings: dict[str, float | str],
) -> SeriesData:
    """Scale one series to SI (schema: value = data * conversion + offset, in ``unit``)."""
    what = f"{name} ({kind})"
    factor = check_volts_or_amps(path, what, unit, base)
    # The declared length is known before reading: a small compressed file can declare
    # billions of samples (a decompression bomb), which must not reach memory.
    total = _declared_length(data)
    n = (total if stop is None else min(stop, total)) - start
    if n > MAX_SERIES_SAMPLES:
        raise ShapeError(
            path, f"{what}: {n} samples, more than the {MAX_SERIES_SAMPLES} one sweep may hold"
        )
    raw = np.asarray(data[start:stop], dtype=np.float64)
    if raw.ndim != 1 and not (raw.ndim == 2 and raw.shape[1] == 1):
        raise ShapeError(path, f"{what}: data of shape {raw.shape}, expected one channel")
    conversion = 1.0 if conversion is None else float(conversion)
    offset = 0.0 if offset is None else float(offset)
    values = (raw.reshape(-1) * conversion + offset) * factor
    if timestamps is not None:
        times = np.asarray(timestamps[start:stop], dtype=np.float64)
        rate = rate_from_times(path, times, what)
        t0 = float(times[0])
    else:
        rate = math.nan if rate is None else float(rate)
        t0 = float(starting_time or 0.0) + start / rate if rate > 0 else math.nan
    protocol = protocol or ""
    return SeriesData(
        name=name,
        kind=kind,
        electrode=electrode,
        values=values,
        rate=rate,
        start_time=t0,
        sweep_number=None if sweep_number is None else int(sweep_number),
        protocol="" if protocol == NO_DESCRIPTION else protocol,
        settings={k: float(v) for k, v in settings.items() if v is not None and np.isfinite(v)},
    )


def _declared_length(data: Any) -> int:
    """Samples a series declares (its first dimension), without reading them."""
    shape = getattr(data, "shape", None)
    if shape is None:
        return len(data)
    return int(shape[0]) if len(shape) else 1


def _finish(
    path: Path,
    table_rows: list | None,
    responses: list[SeriesData],
    stimuli: list[SeriesData],
    meta: dict[str, str],
    skipped: list[str],
) -> list[Recording]:
    """Pair (from the table's rows when given) and build the Recordings; shared by both engines."""
    name = str(path)
    skipped = sorted(skipped)
    if not responses and not table_rows:
        what = f"; skipped: {', '.join(skipped)}" if skipped else ""
        raise NoCurrentClampError(name, f"no current-clamp series{what}")
    if table_rows:
        pairs = table_rows
        # Rows cutting one series into several sweeps: number those sweeps by row order.
        counts = Counter(r.name for r, _ in pairs)
        for r, _ in pairs:
            if counts[r.name] > 1:
                r.sweep_number = None
    else:
        pairs = pair_series(name, responses, stimuli)
    return build_recordings(path, pairs, meta, skipped)


# ---- pynwb engine -----------------------------------------------------------------------------


def _read_pynwb(path: Path) -> list[Recording]:
    from pynwb import NWBHDF5IO
    from pynwb.icephys import CurrentClampSeries, CurrentClampStimulusSeries, PatchClampSeries

    name = str(path)
    with NWBHDF5IO(name, mode="r", load_namespaces=True) as io:
        nwbfile = io.read()
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
            return _finish(path, None, [], [], {}, skipped + _orphans(s.name for s in stimuli))
        rows = _rows_pynwb(name, nwbfile.intracellular_recordings)
        if rows is None:
            responses = [_load_pynwb(name, s, "V") for s in responses]
            stimuli = [_load_pynwb(name, s, "A") for s in stimuli]
        return _finish(path, rows, responses, stimuli, _metadata_pynwb(nwbfile), skipped)


def _rows_pynwb(path: str, table: Any) -> list | None:
    """Loaded (response, stimulus) per current-clamp row of the recordings table, or None."""
    from pynwb.icephys import CurrentClampSeries

    if table is None or len(table) == 0:
        return None
    rows = []
    for i in range(len(table)):
        resp = table["responses"]["response"][i]
        stim = table["stimuli"]["stimulus"][i]
        if not _valid(resp) or not isinstance(resp.timeseries, CurrentClampSeries):
            continue  # voltage-clamp rows, or stimulus-only rows
        r = _load_pynwb(path, resp.timeseries, "V", resp)
        s = _load_pynwb(path, stim.timeseries, "A", stim) if _valid(stim) else None
        rows.append((r, s))
    return rows or None


def _valid(ref: Any) -> bool:
    return ref is not None and ref.timeseries is not None and int(ref.idx_start) >= 0


def _load_pynwb(path: str, series: Any, base: str, ref: Any = None) -> SeriesData:
    """Load one pynwb series into memory, in SI, honouring a table row's (idx_start, count)."""
    start, stop = 0, None
    if ref is not None:
        start, stop = int(ref.idx_start), int(ref.idx_start) + int(ref.count)
    return _series_data(
        path,
        name=series.name,
        kind=type(series).__name__,
        electrode=series.electrode.name if series.electrode is not None else "",
        base=base,
        unit=stored_unit(series),
        conversion=series.conversion,
        offset=getattr(series, "offset", None),
        data=series.data,
        timestamps=series.timestamps,
        rate=series.rate,
        starting_time=series.starting_time,
        start=start,
        stop=stop,
        sweep_number=getattr(series, "sweep_number", None),
        protocol=series.stimulus_description,
        settings={key: getattr(series, attr, None) for attr, key in SETTINGS_KEYS.items()},
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
    return _text(unit)


def _metadata_pynwb(nwbfile: Any) -> dict[str, str]:
    start = nwbfile.session_start_time
    subject = nwbfile.subject
    return _clean_metadata(
        {
            "session_description": nwbfile.session_description,
            "identifier": nwbfile.identifier,
            "session_start_time": start.isoformat() if start is not None else None,
            "subject_id": subject.subject_id if subject is not None else None,
            "species": subject.species if subject is not None else None,
        }
    )


def _orphans(names: Iterable[str]) -> list[str]:
    """Stimulus series listed as skipped when the file has no response to pair them with."""
    return [f"{n} (CurrentClampStimulusSeries without a response)" for n in names]


def _clean_metadata(meta: dict[str, Any]) -> dict[str, str]:
    return {k: str(v) for k, v in meta.items() if v is not None}


def _text(value: Any) -> str:
    return value.decode() if isinstance(value, bytes) else str(value)


# ---- h5py engine: the NWB 2 core layout read directly ----------------------------------------

CLAMP_TYPES = ("CurrentClampSeries", "IZeroClampSeries")
STIMULUS_TYPES = ("CurrentClampStimulusSeries",)
OTHER_PATCH_TYPES = ("PatchClampSeries", "VoltageClampSeries", "VoltageClampStimulusSeries")
KNOWN_NAMESPACES = ("core", "hdmf-common", "hdmf-experimental")
TABLE = "general/intracellular_ephys/intracellular_recordings"


def _read_h5(path: Path) -> list[Recording]:
    import h5py

    name = str(path)
    with h5py.File(name, "r") as f:
        if _attr(f, "neurodata_type") != "NWBFile":
            raise NotUnderstood("no NWBFile at the root")
        responses, stimuli, skipped = [], [], []
        # Every series' name and type, read once: a table row's reference gives the group
        # only, and asking HDF5 for its name or type again costs more than the samples.
        known: dict[Any, tuple[str, str | None]] = {}
        for top in ("acquisition", "stimulus/presentation"):
            for key, group in _children(f, top):
                kind = _attr(group, "neurodata_type")
                known[group] = (key, kind)
                if kind in CLAMP_TYPES:
                    responses.append(group)
                elif kind in STIMULUS_TYPES:
                    stimuli.append(group)
                elif kind in OTHER_PATCH_TYPES:
                    skipped.append(f"{key} ({kind})")
        if not responses:
            return _finish(path, None, [], [], {}, skipped + _orphans(known[g][0] for g in stimuli))
        rows = _rows_h5(name, f, known)
        if rows is None:
            responses = [_load_h5(name, g, "V", known=known) for g in responses]
            stimuli = [_load_h5(name, g, "A", known=known) for g in stimuli]
        return _finish(path, rows, responses, stimuli, _metadata_h5(f), skipped)


def _children(f: Any, top: str) -> list[tuple[str, Any]]:
    """(name, group) under ``top``; a type from an extension namespace may subclass ours."""
    import h5py

    if top not in f:
        return []
    parent = f[top]
    out = []
    for key in parent:
        obj = parent[key]
        namespace = _attr(obj, "namespace")
        if namespace is not None and namespace not in KNOWN_NAMESPACES:
            raise NotUnderstood(f"extension type in {top}/{key}")
        if isinstance(obj, h5py.Group):
            out.append((key, obj))
    return out


def _rows_h5(path: str, f: Any, known: dict[Any, tuple[str, str | None]]) -> list | None:
    if TABLE not in f:
        return None
    table = f[TABLE]
    if _attr(table, "neurodata_type") != "IntracellularRecordingsTable":
        raise NotUnderstood("unexpected intracellular recordings table")
    responses = table["responses/response"][()]
    stimuli = table["stimuli/stimulus"][()]
    rows = []
    for resp, stim in zip(responses, stimuli, strict=True):
        if resp["idx_start"] < 0 or not resp["timeseries"]:
            continue
        group = f[resp["timeseries"]]
        kind = known[group][1] if group in known else _attr(group, "neurodata_type")
        if kind not in CLAMP_TYPES:
            continue  # voltage-clamp rows
        r = _load_h5(path, group, "V", resp, known)
        s = None
        if stim["idx_start"] >= 0 and stim["timeseries"]:
            s = _load_h5(path, f[stim["timeseries"]], "A", stim, known)
        rows.append((r, s))
    return rows or None


def _load_h5(
    path: str,
    group: Any,
    base: str,
    ref: Any = None,
    known: dict[Any, tuple[str, str | None]] | None = None,
) -> SeriesData:
    name, kind = (known or {}).get(group) or (None, None)
    if name is None:  # a table row pointing outside acquisition and stimulus
        name, kind = group.name.rsplit("/", 1)[-1], _attr(group, "neurodata_type")
    members = set(group)  # one pass over the links instead of lookups that may fail
    data = group["data"]
    start, stop = 0, None
    if ref is not None:
        start, stop = int(ref["idx_start"]), int(ref["idx_start"]) + int(ref["count"])
    starting = group["starting_time"] if "starting_time" in members else None
    if kind == "IZeroClampSeries":  # pynwb fixes these for I=0 series, whatever is stored
        settings: dict[str, Any] = dict.fromkeys(SETTINGS_KEYS.values(), 0.0)
        protocol = None
    else:
        settings = {
            key: _scalar(group, attr) if attr in members else None
            for attr, key in SETTINGS_KEYS.items()
        }
        protocol = _attr(group, "stimulus_description")
    electrode = _link_target(group, "electrode") if "electrode" in members else None
    return _series_data(
        path,
        name=name,
        kind=kind,
        electrode=electrode.rsplit("/", 1)[-1] if electrode is not None else "",
        base=base,
        unit=_attr(data, "unit") or "",
        conversion=_attr(data, "conversion"),
        offset=_attr(data, "offset"),
        data=data,
        timestamps=group["timestamps"] if "timestamps" in members else None,
        rate=_attr(starting, "rate") if starting is not None else None,
        starting_time=float(starting[()]) if starting is not None else None,
        start=start,
        stop=stop,
        sweep_number=_attr(group, "sweep_number"),
        protocol=protocol,
        settings=settings,
    )


def _link_target(group: Any, key: str) -> str | None:
    """Path a link points to (NWB stores links to electrodes as HDF5 soft links)."""
    import h5py

    link = group.get(key, getlink=True)
    if link is None:
        return None
    if not isinstance(link, h5py.SoftLink):
        raise NotUnderstood(f"{group.name}/{key} is not a soft link")
    return link.path


def _attr(obj: Any, key: str) -> Any:
    value = obj.attrs.get(key)
    if isinstance(value, bytes | str):
        return _text(value)
    return value


def _scalar(group: Any, key: str) -> Any:
    ds = group.get(key)
    if ds is None:
        return None
    value = ds[()]
    return _text(value) if isinstance(value, bytes) else value


def _metadata_h5(f: Any) -> dict[str, str]:
    start = _scalar(f, "session_start_time")
    if start is not None:
        with contextlib.suppress(ValueError):
            start = dt.datetime.fromisoformat(start).isoformat()
    subject = f.get("general/subject")
    return _clean_metadata(
        {
            "session_description": _scalar(f, "session_description"),
            "identifier": _scalar(f, "identifier"),
            "session_start_time": start,
            "subject_id": _scalar(subject, "subject_id") if subject is not None else None,
            "species": _scalar(subject, "species") if subject is not None else None,
        }
    )


# ---- pairing, shared ---------------------------------------------------------------------------


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
    responses = _ordered(responses)  # electrode order: that of their first sweep
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
