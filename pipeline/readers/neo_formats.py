"""neo reader: NIX through neo's NixIO, any other format neo knows by its extension.

Each Segment is a sweep (number from a ``sweep_number``/``sweep`` annotation, else
``Segment.index``, else its order). Channels are told apart by the dimension of their units: volts
(V, mV, uV...) are membrane potential, amperes (A, nA, pA...) injected current (positive =
depolarizing, as recorded); any other or dimensionless unit is an error naming the channel.
Several voltage channels make several cells: channels are paired with their current through an
``electrode`` annotation when every signal has one (our NIX writer sets it), else by order.
A file without a current channel is allowed (the step schedule then comes from the config).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.errors import (
    CorruptFileError,
    NoCurrentClampError,
    RecordingError,
    ShapeError,
    UnitError,
)
from pipeline.readers import cell_ids, describe, make_recording, make_sweep
from pipeline.recording import Recording, Sweep

SETTINGS_KEYS = ("bias_current_a", "bridge_balance_ohm", "capacitance_compensation_f")
_INTERNAL_ANNOTATIONS = ("nix_name", "neo_name")


@dataclass
class Channel:
    """One channel of one segment, in SI (V or A)."""

    name: str
    base: str  # "V" or "A"
    values: np.ndarray
    rate: float
    t_start: float
    electrode: str | None
    annotations: dict[str, Any]


def read(path: Path) -> list[Recording]:
    """Read a file through neo (NixIO for ``.nix``, neo's IO detection otherwise).

    Parameters
    ----------
    path : pathlib.Path
        A file neo reads.

    Returns
    -------
    list of Recording
        One per voltage channel (cell).

    Raises
    ------
    CorruptFileError, NoCurrentClampError, UnitError, ShapeError, BadSamplesError
    """
    name = str(path)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            return recordings_from_blocks(path, _read_blocks(path))
    except RecordingError:
        raise
    except Exception as exc:  # neo / nixio / h5py errors on a corrupt or foreign file
        raise CorruptFileError(name, f"cannot be read by neo ({describe(exc)})") from exc


def _read_blocks(path: Path) -> list:
    import neo.io

    if path.suffix.lower() == ".nix":
        io = neo.io.NixIO(str(path), mode="ro")
    else:
        io = neo.io.get_io(str(path))
    try:
        return io.read(lazy=False)
    finally:
        close = getattr(io, "close", None)
        if callable(close):
            close()


def recordings_from_blocks(path: Path, blocks: list) -> list[Recording]:
    """Turn neo Blocks (segments = sweeps) into checked Recordings, one per voltage channel."""
    name = str(path)
    segments = [seg for block in blocks for seg in block.segments]
    skipped = [
        f"{sig.name or 'unnamed'} (IrregularlySampledSignal)"
        for seg in segments
        for sig in seg.irregularlysampledsignals
    ]
    per_segment = [_channels(name, seg) for seg in segments]
    use_electrodes = all(c.electrode is not None for chans in per_segment for c in chans)
    cells: dict[str, list[Sweep]] = {}
    for order, (seg, chans) in enumerate(zip(segments, per_segment, strict=True)):
        number = _sweep_number(seg, order)
        if not any(c.base == "V" for c in chans):
            if chans:  # current without a membrane potential: nothing to analyse, say so
                skipped.append(f"sweep {number} (current only, no voltage channel)")
            continue
        for key, v, i in _pairs(name, chans, use_electrodes, number):
            cells.setdefault(key, []).append(_sweep(name, seg, number, v, i))
    if not cells:
        raise NoCurrentClampError(name, "no voltage channel in any segment")
    keys = list(cells)
    meta = _metadata(blocks[0]) if blocks else {}
    return [
        make_recording(name, cid, key, cells[key], meta, skipped)
        for key, cid in zip(keys, cell_ids(path, keys), strict=True)
    ]


def _channels(path: str, seg: Any) -> list[Channel]:
    import quantities as pq

    out = []
    for k, sig in enumerate(seg.analogsignals):
        units = sig.units
        dim = units.simplified.dimensionality
        data = np.asarray(sig.magnitude, dtype=np.float64).reshape(sig.shape[0], -1)
        names = sig.array_annotations.get("channel_names")
        for ch in range(data.shape[1]):
            if names is not None and len(names) == data.shape[1]:
                label = str(names[ch])
            else:
                label = sig.name or f"signal {k}"
                label = label if data.shape[1] == 1 else f"{label}[{ch}]"
            base = _base_of(dim, pq)
            if base is None:
                raise UnitError(
                    path,
                    f"channel {label!r}: units {units.dimensionality.string!r} are neither "
                    "volts nor amperes",
                )
            factor = float(units.rescale(pq.V if base == "V" else pq.A).magnitude)
            out.append(
                Channel(
                    name=label,
                    base=base,
                    values=data[:, ch] * factor,
                    rate=float(sig.sampling_rate.rescale(pq.Hz).magnitude),
                    t_start=float(sig.t_start.rescale(pq.s).magnitude),
                    electrode=sig.annotations.get("electrode"),
                    annotations=dict(sig.annotations),
                )
            )
    return out


def _base_of(dim: Any, pq: Any) -> str | None:
    if dim == pq.V.simplified.dimensionality:
        return "V"
    if dim == pq.A.simplified.dimensionality:
        return "A"
    return None


def _pairs(
    path: str, chans: list[Channel], use_electrodes: bool, number: int
) -> list[tuple[str, Channel, Channel | None]]:
    """(cell key, voltage channel, current channel or None) for one segment."""
    volts = [c for c in chans if c.base == "V"]
    amps = [c for c in chans if c.base == "A"]
    if use_electrodes:
        by_electrode = {c.electrode: c for c in amps}
        return [(str(v.electrode), v, by_electrode.get(v.electrode)) for v in volts]
    if amps and len(amps) != len(volts):
        raise ShapeError(
            path,
            f"sweep {number}: {len(volts)} voltage channels but {len(amps)} current channels; "
            "cannot pair them",
        )
    return [(v.name, v, amps[k] if amps else None) for k, v in enumerate(volts)]


def _sweep_number(seg: Any, order: int) -> int:
    # Annotations first: NixIO fills Segment.index with the segment's order on reading.
    for key in ("sweep_number", "sweep"):
        if key in seg.annotations:
            return int(seg.annotations[key])
    if seg.index is not None:
        return int(seg.index)
    return order


def _sweep(path: str, seg: Any, number: int, v: Channel, i: Channel | None) -> Sweep:
    notes = {**dict(seg.annotations), **v.annotations}
    settings = {
        k: float(notes[k]) for k in SETTINGS_KEYS if k in notes and np.isfinite(float(notes[k]))
    }
    return make_sweep(
        path,
        f"sweep {number}, channel {v.name!r}",
        v.values,
        None if i is None else i.values,
        v.rate,
        number,
        current_rate=None if i is None else i.rate,
        start_time=v.t_start,
        protocol=str(notes.get("protocol", "")),
        settings=settings,
    )


def _metadata(block: Any) -> dict[str, str]:
    meta = {
        k: str(v)
        for k, v in block.annotations.items()
        if k not in _INTERNAL_ANNOTATIONS and isinstance(v, str | int | float)
    }
    if block.rec_datetime is not None:
        meta.setdefault("session_start_time", block.rec_datetime.isoformat())
    if block.description:
        meta.setdefault("session_description", str(block.description))
    return meta
