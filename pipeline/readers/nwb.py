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
    _flat,
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
    """One patch-clamp series loaded into memory, in SI (V or A), independent of the file.

    The stimulus of a recordings-table row, read by the h5py engine, carries only its name,
    kind, values, rate and protocol (the row pairs it, so nothing reads the rest): its
    electrode is "", its sweep number None, its settings empty and its start time NaN (unless
    the series stores timestamps).
    """

    name: str
    kind: str  # neurodata type: CurrentClampSeries, IZeroClampSeries, CurrentClampStimulusSeries
    electrode: str
    values: np.ndarray | None  # None once its sweeps are built (they take it over)
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
    raw = _float_samples(data, start, stop)  # a new array: scaled in place
    if raw.ndim != 1 and not (raw.ndim == 2 and raw.shape[1] == 1):
        raise ShapeError(path, f"{what}: data of shape {raw.shape}, expected one channel")
    conversion = 1.0 if conversion is None else float(conversion)
    offset = 0.0 if offset is None else float(offset)
    values = _flat(raw)  # float64 already: the array itself when 1-D
    if conversion != 1.0:  # x * 1.0 is x: the pass is skipped, not the arithmetic changed
        values *= conversion
    values += offset  # always: -0.0 + 0.0 is +0.0
    if factor != 1.0:
        values *= factor
    if timestamps is not None:
        times = _float_samples(timestamps, start, stop)
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
    import h5py

    if not isinstance(data, h5py.h5d.DatasetID):  # a dataset's id has h5py's dataset shape
        data = _wrap(data)
    shape = getattr(data, "shape", None)
    if shape is None:
        return len(_wrap(data))
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
#
# A file's read time is mostly HDF5 metadata, and h5py's object API adds 50-250 us to each
# attribute, member or scalar dataset it opens (a file of 30 series opens ~500 of them). So the
# series are walked with h5py's low-level API: the same HDF5 calls and memory types as the
# object API, without its wrappers. Only the storage kinds NWB writers use (numbers, fixed- and
# variable-length strings, simple 1-D samples) are read that way; any other kind is handed to
# the object API, so every helper returns what the object API would.

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
    """(name, group id) under ``top``; a type from an extension namespace may subclass ours."""
    import h5py

    if top not in f:
        return []
    parent = f[top]
    out = []
    for key in parent:
        obj = _member(parent.id, key)
        namespace = _attr(obj, "namespace")
        if namespace is not None and namespace not in KNOWN_NAMESPACES:
            raise NotUnderstood(f"extension type in {top}/{key}")
        if isinstance(obj, h5py.h5g.GroupID):
            out.append((key, obj))
    return out


def _rows_h5(path: str, f: Any, known: dict[Any, tuple[str, str | None]]) -> list | None:
    if TABLE not in f:
        return None
    table = _open(f.id, TABLE)
    if _attr(table, "neurodata_type") != "IntracellularRecordingsTable":
        raise NotUnderstood("unexpected intracellular recordings table")
    responses = _column(table, "responses/response")
    stimuli = _column(table, "stimuli/stimulus")
    rows = []
    for index, (resp, stim) in enumerate(zip(responses, stimuli, strict=True)):
        if resp["idx_start"] < 0 or not resp["timeseries"]:
            continue
        group = _series_group(path, _dereference(f, resp["timeseries"]), index, "response")
        kind = known[group][1] if group in known else _attr(group, "neurodata_type")
        if kind not in CLAMP_TYPES:
            continue  # voltage-clamp rows
        r = _load_h5(path, group, "V", resp, known)
        s = None
        if stim["idx_start"] >= 0 and stim["timeseries"]:
            stim_group = _series_group(path, _dereference(f, stim["timeseries"]), index, "stimulus")
            s = _load_h5(
                path, stim_group, "A", stim, known, row_stimulus=True, protocol=not r.protocol
            )
        rows.append((r, s))
    return rows or None


def _series_group(path: str, oid: Any, row: int, column: str) -> Any:
    """``oid`` if it is a group; a table row pointing at anything else is an error of the file.

    Said at once, whatever the object's type: treated as a series, a dataset would be read
    element by element first (a large one stalls the worker for seconds) only to fail on a
    member it cannot have. ``row`` counts from 0.
    """
    import h5py

    if isinstance(oid, h5py.h5g.GroupID):
        return oid
    name = (h5py.h5i.get_name(oid) or b"an unnamed object").decode("utf-8", "replace")
    raise CorruptFileError(
        path,
        f"cannot be read as NWB (row {row} of the intracellular recordings table, counting "
        f"from 0: its {column} points at {name}, which is not a series group)",
    )


def _load_h5(
    path: str,
    group: Any,
    base: str,
    ref: Any = None,
    known: dict[Any, tuple[str, str | None]] | None = None,
    *,
    row_stimulus: bool = False,
    protocol: bool = True,
) -> SeriesData:
    """Load one series (a low-level id) into memory, in SI, honouring a table row's range.

    A table row's stimulus gives its sweep only its samples, rate and name, and its protocol
    when the response has none (``protocol``): its electrode, sweep number, start and settings,
    which nothing uses (the row pairs it), are not read.
    """
    name, kind = (known or {}).get(group) or (None, None)
    if name is None:  # a table row pointing outside acquisition and stimulus
        name, kind = _wrap(group).name.rsplit("/", 1)[-1], _attr(group, "neurodata_type")
    has = _link_exists(group)
    data = _member(group, "data")
    start, stop = 0, None
    if ref is not None:
        start, stop = int(ref["idx_start"]), int(ref["idx_start"]) + int(ref["count"])
    starting = _member(group, "starting_time") if has("starting_time") else None
    whole = not row_stimulus
    settings: dict[str, Any] = {}
    description = None
    if kind == "IZeroClampSeries":  # pynwb fixes these for I=0 series, whatever is stored
        settings = dict.fromkeys(SETTINGS_KEYS.values(), 0.0)
    elif whole:
        settings = {
            key: _scalar(group, attr) if has(attr) else None for attr, key in SETTINGS_KEYS.items()
        }
    if kind != "IZeroClampSeries" and protocol:
        description = _attr(group, "stimulus_description")
    electrode = _link_target(group, "electrode") if whole and has("electrode") else None
    start_s = math.nan  # a row's stimulus: its start is not read (NaN, not a made-up 0)
    if whole:
        start_s = float(_value(starting)) if starting is not None else None
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
        timestamps=_member(group, "timestamps") if has("timestamps") else None,
        rate=_attr(starting, "rate") if starting is not None else None,
        starting_time=start_s,
        start=start,
        stop=stop,
        sweep_number=_attr(group, "sweep_number") if whole else None,
        protocol=description,
        settings=settings,
    )


def _member(group: Any, key: str) -> Any:
    """``group[key]``: a low-level id for a group's member, else what the object API gives."""
    import h5py

    return _open(group, key) if isinstance(group, h5py.h5g.GroupID) else _wrap(group)[key]


def _column(table: Any, key: str) -> Any:
    """``table[key][()]`` (table a low-level id): a whole column of the recordings table."""
    import h5py

    column = _member(table, key)
    if isinstance(column, h5py.h5d.DatasetID):
        space = column.get_space()
        if space.get_simple_extent_type() == h5py.h5s.SIMPLE and space.get_select_npoints():
            out = np.zeros(column.shape, dtype=column.dtype)  # h5py's dtype, references too
            column.read(h5py.h5s.ALL, h5py.h5s.ALL, out)  # memory type made from out's dtype
            return out
    return _wrap(column)[()]


def _link_exists(group: Any) -> Any:
    """``name in set(h5py.Group(group))``, asked of HDF5 name by name (no listing)."""
    exists = group.links.exists
    return lambda name: exists(name.encode())


def _open(parent: Any, key: str | bytes) -> Any:
    """``parent[key]`` as a low-level id (what h5py's object API opens, without wrapping it)."""
    import h5py

    name = key.encode() if isinstance(key, str) else key  # h5py's encoding of names
    oid = h5py.h5o.open(parent, name)
    if h5py.h5i.get_type(oid) not in (h5py.h5i.GROUP, h5py.h5i.DATASET, h5py.h5i.DATATYPE):
        raise TypeError("Unknown object type")  # as h5py's object API
    return oid


def _dereference(f: Any, ref: Any) -> Any:
    """``f[ref]`` as a low-level id."""
    import h5py

    oid = h5py.h5r.dereference(ref, f.id)
    if oid is None:
        raise ValueError("Invalid HDF5 object reference")  # as h5py's object API
    if h5py.h5i.get_type(oid) not in (h5py.h5i.GROUP, h5py.h5i.DATASET, h5py.h5i.DATATYPE):
        raise TypeError("Unknown object type")
    return oid


def _wrap(obj: Any) -> Any:
    """h5py's object for a low-level id (anything else as it is), for the object API's path."""
    import h5py

    if isinstance(obj, h5py.h5g.GroupID):
        return h5py.Group(obj)
    if isinstance(obj, h5py.h5d.DatasetID):
        return h5py.Dataset(obj, readonly=True)  # the file is open read-only
    if isinstance(obj, h5py.h5t.TypeID):
        return h5py.Datatype(obj)
    return obj


def _id(obj: Any) -> Any:
    """The low-level id of an h5py object or id; None for anything else."""
    import h5py

    if isinstance(obj, h5py.HLObject):
        return obj.id
    ids = (h5py.h5g.GroupID, h5py.h5d.DatasetID, h5py.h5t.TypeID)
    return obj if isinstance(obj, ids) else None


def _link_target(group: Any, key: str) -> str | None:
    """Path the link ``key`` of the group ``group`` (a low-level id) points to (NWB links
    electrodes by soft links)."""
    import h5py

    # As h5py's get(getlink=True); the callers have made sure the link exists.
    kind = group.links.get_info(key.encode()).type
    if kind == h5py.h5l.TYPE_SOFT:
        target = group.links.get_val(key.encode())
        with contextlib.suppress(UnicodeDecodeError):  # h5py keeps undecodable paths as bytes
            target = target.decode("utf8")
        return target
    if kind in (h5py.h5l.TYPE_EXTERNAL, h5py.h5l.TYPE_HARD):
        raise NotUnderstood(f"{_wrap(group).name}/{key} is not a soft link")
    raise TypeError("Unknown link type")  # as h5py's object API


def _attr(obj: Any, key: str) -> Any:
    """``obj.attrs.get(key)`` (obj an h5py object or low-level id), with any string as str."""
    value = _plain_attr(obj, key)
    if value is _OTHER:
        value = _wrap(obj).attrs.get(key)
    if isinstance(value, (bytes, str)):  # a tuple: faster than a union, per call
        return _text(value)
    return value


def _get(gid: Any, key: str) -> Any:
    """``group.get(key)`` for a group's low-level id: the member's id, or None when it is
    missing or a dangling link (as h5py's get())."""
    try:
        return _open(gid, key)
    except KeyError:
        return None


def _scalar(group: Any, key: str) -> Any:
    """The value of the scalar dataset ``group[key]`` (str for text), or None without one."""
    import h5py

    gid = _id(group)
    if isinstance(gid, h5py.h5g.GroupID):
        ds = _get(gid, key)
    else:
        ds = _wrap(group).get(key)  # a damaged file: whatever h5py makes of it
    if ds is None:
        return None
    value = _value(ds)
    return _text(value) if isinstance(value, bytes) else value


_OTHER = object()  # a storage kind the low-level readers leave to h5py's object API
_PLAIN_TYPES: list[tuple[Any, np.dtype, Any]] = []  # (HDF5 type, h5py's dtype, memory type)
_MAX_PLAIN_TYPES = 16  # a file has a handful; a hostile one must not grow the list for ever
_LAST_TYPE: dict[str, tuple] = {}  # name -> the entry its last value matched: tried first


def _plain_type(tid: Any, name: str) -> tuple[np.dtype, Any] | None:
    """(dtype, memory type) h5py reads the HDF5 type ``tid`` as, or None if not plain.

    Plain: numbers, fixed-length byte strings and variable-length strings, which is what NWB
    writers store in attributes and scalar datasets. Equal HDF5 types (``H5Tequal``: class,
    size, order, sign, character set, ...) give equal dtypes, so h5py's dtype and memory type
    (``py_create``) are made once per type rather than once per attribute.
    """
    import h5py

    last = _LAST_TYPE.get(name)
    if last is not None and tid == last[0]:
        return last[1:]
    for entry in _PLAIN_TYPES:
        if tid == entry[0]:
            if name in _LAST_TYPE or len(_LAST_TYPE) < 64:  # a hostile file's names: not all
                _LAST_TYPE[name] = entry
            return entry[1:]
    dtype = tid.dtype
    info = h5py.check_string_dtype(dtype)
    vlen_text = info is not None and info.length is None
    if not (vlen_text or dtype.kind in "fiuS"):
        return None
    mtype = h5py.h5t.py_create(dtype)
    if len(_PLAIN_TYPES) < _MAX_PLAIN_TYPES:
        _PLAIN_TYPES.append((tid.copy(), dtype, mtype))  # a copy: free of the file
    return dtype, mtype


def _plain_attr(obj: Any, key: str) -> Any:
    """``obj.attrs.get(key)`` for a plain scalar, read as h5py's ``AttributeManager`` does.

    None when missing; _OTHER for what to leave to the object API (an empty attribute, an
    array even of one value, compounds, references, ...).
    """
    import h5py

    oid = _id(obj)
    if oid is None:
        return _OTHER
    try:
        attr = h5py.h5a.open(oid, key.encode())
    except KeyError:  # what the object API's get() takes for a missing attribute
        return None
    if attr.get_space().get_simple_extent_type() != h5py.h5s.SCALAR:
        return _OTHER
    plain = _plain_type(attr.get_type(), key)
    if plain is None:
        return _OTHER
    dtype, mtype = plain
    out = np.zeros((), dtype=dtype)
    attr.read(out, mtype=mtype)
    value = out[()]
    if dtype.kind == "O":  # h5py decodes variable-length strings so, whatever their encoding
        return value.decode("utf-8", "surrogateescape")
    return value


def _value(ds: Any) -> Any:
    """``ds[()]`` (ds an h5py object or low-level id): bytes for text, as h5py gives it."""
    import h5py

    did = _id(ds)
    if isinstance(did, h5py.h5d.DatasetID):
        if did.get_space().get_simple_extent_type() == h5py.h5s.SCALAR:
            plain = _plain_type(did.get_type(), "")  # "": one memo for all scalar datasets
            if plain is not None:
                out = np.zeros((), dtype=plain[0])
                did.read(h5py.h5s.ALL, h5py.h5s.ALL, out, plain[1])
                return out[()]
    return _wrap(ds)[()]


def _float_samples(data: Any, start: int, stop: int | None) -> np.ndarray:
    """``data[start:stop]`` (an h5py dataset, low-level id or array) as a new float64 array.

    The values are numpy's conversion of h5py's array. A low-level id of a 1-D (or one-column)
    dataset of native 32- or 64-bit floats is read in one call, as stored; float32 is then
    widened by numpy, float64 is returned as read. The pynwb engine hands h5py datasets, read
    as h5py reads them (its reference).
    """
    import h5py

    if isinstance(data, h5py.h5d.DatasetID):
        out = _read_floats(data, start, stop)
        if out is not None:
            return out
    raw = _wrap(data)[start:stop]
    values = np.asarray(raw, dtype=np.float64)
    return values.copy() if values is raw else values  # the caller scales it in place


def _read_floats(did: Any, start: int, stop: int | None) -> np.ndarray | None:
    """``did[start:stop]`` as float64 for a native float dataset of one channel, else None."""
    import h5py

    tid = did.get_type()
    single = tid == h5py.h5t.NATIVE_FLOAT
    if not (single or tid == h5py.h5t.NATIVE_DOUBLE):
        return None
    space = did.get_space()
    if space.get_simple_extent_type() != h5py.h5s.SIMPLE:
        return None
    shape = space.get_simple_extent_dims()
    first, last, _ = slice(start, stop).indices(shape[0])
    if last <= first or shape[1:] not in ((), (1,)):
        return None  # nothing to read, or not one channel: the object API's array and error
    count = (last - first, *shape[1:])
    out = np.empty(count, dtype=np.float32 if single else np.float64)
    mtype = h5py.h5t.NATIVE_FLOAT if single else h5py.h5t.NATIVE_DOUBLE  # no HDF5 conversion
    if count == shape:  # the whole series: HDF5's fastest path
        did.read(h5py.h5s.ALL, h5py.h5s.ALL, out, mtype)
    else:
        space.select_hyperslab((first, *(0 for _ in shape[1:])), count)
        did.read(h5py.h5s.create_simple(count), space, out, mtype)
    return out.astype(np.float64) if single else out  # a third of the instructions of HDF5


def _metadata_h5(f: Any) -> dict[str, str]:
    start = _scalar(f, "session_start_time")
    if start is not None:
        with contextlib.suppress(ValueError):
            start = dt.datetime.fromisoformat(start).isoformat()
    subject = _get(f.id, "general/subject")
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
    """Group (response, stimulus) pairs by electrode into checked Recordings.

    A series' samples, made here, are handed over to its sweep (``take_arrays``: no copy); the
    series lets go of them once its last sweep is built.
    """
    name = str(path)
    uses = Counter(id(x) for pair in pairs for x in pair if x is not None)
    electrodes = list(dict.fromkeys(r.electrode for r, _ in pairs))
    out = []
    for electrode, cell_id in zip(electrodes, cell_ids(path, electrodes), strict=True):
        mine = [(r, s) for r, s in pairs if r.electrode == electrode]
        sweeps = []
        for order, (r, s) in enumerate(mine):
            sweeps.append(_sweep(name, order, r, s))
            for series in (r, s):
                if series is not None:
                    uses[id(series)] -= 1
                    if not uses[id(series)]:
                        series.values = None
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
        take_arrays=True,  # the series' samples were made for this; nothing else holds them
    )
