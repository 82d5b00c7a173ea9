"""Writers: Recordings to NWB, NIX and the plain-text layout (demo day, benchmarks, tests).

Each writer writes to a temporary file in the target folder and then moves it into place with
:func:`os.replace`, so a reader never sees a half-written file. NWB and NIX store samples as
float32 in volts and amperes (conversion 1, no offset): the readers give back exactly
``numpy.float32(x)`` of what was written. CSV stores mV and pA as the shortest decimal that
reads back to the same float64 (exact but for the last bit of the unit scaling). Sweep settings with our SI keys
(``bias_current_a``, ``bridge_balance_ohm``, ``capacitance_compensation_f``) are written back to
the format's own fields.
"""

from __future__ import annotations

import datetime as dt
import os
import uuid
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from pipeline.recording import Recording
from pipeline.report.atomic import atomic_path

__all__ = ["write_nwb", "write_nix", "write_csv"]

_NWB_SETTINGS = {
    "bias_current_a": "bias_current",
    "bridge_balance_ohm": "bridge_balance",
    "capacitance_compensation_f": "capacitance_compensation",
}


def _electrode_names(recordings: Sequence[Recording]) -> list[str]:
    """Electrode names, unique and non-empty (NWB names must be unique)."""
    names: list[str] = []
    for k, rec in enumerate(recordings):
        base = rec.electrode or f"electrode{k}"
        name, n = base, 1
        while name in names:
            name, n = f"{base}_{n}", n + 1
        names.append(name)
    return names


def write_nwb(
    recordings: Sequence[Recording],
    path: str | os.PathLike,
    *,
    session_description: str = "current-clamp step recordings",
    subject_id: str = "unknown",
    species: str | None = None,
    session_start_time: dt.datetime | None = None,
    identifier: str | None = None,
    digitize: bool = False,
) -> Path:
    """Write recordings to one NWB file in the standard intracellular layout.

    One ``IntracellularElectrode`` per recording; per sweep a ``CurrentClampStimulusSeries``
    (omitted when the sweep stores no current) and a ``CurrentClampSeries`` with its
    ``sweep_number``, both referenced from a row of the intracellular recordings table.

    Parameters
    ----------
    recordings : sequence of Recording
        Cells to write; electrode names become the NWB electrode names.
    path : str or os.PathLike
        Target ``.nwb`` file (replaced if it exists).
    session_description, subject_id : str
        NWB file and subject fields.
    species : str, optional
        Subject species.
    session_start_time : datetime.datetime, optional
        Defaults to the first recording's ``session_start_time`` metadata, else now (UTC).
    identifier : str, optional
        NWB identifier; defaults to the first recording's ``identifier`` metadata, else a UUID.
    digitize : bool
        Store the data as an acquisition system does: int16 samples with a ``conversion``
        (10 µV and 0.1 pA per step), gzip-compressed. Default: float32 volts and amperes.

    Returns
    -------
    pathlib.Path
        The written file.
    """
    from pynwb import NWBHDF5IO, NWBFile
    from pynwb.file import Subject
    from pynwb.icephys import CurrentClampSeries, CurrentClampStimulusSeries

    meta = dict(recordings[0].metadata) if recordings else {}
    if session_start_time is None:
        stored = meta.get("session_start_time")
        session_start_time = (
            dt.datetime.fromisoformat(stored) if stored else dt.datetime.now(dt.UTC)
        )
    if session_start_time.tzinfo is None:
        session_start_time = session_start_time.replace(tzinfo=dt.UTC)
    nwbfile = NWBFile(
        session_description=session_description,
        identifier=identifier or meta.get("identifier") or str(uuid.uuid4()),
        session_start_time=session_start_time,
        subject=Subject(subject_id=subject_id, species=species),
    )
    device = nwbfile.create_device(name="amplifier")
    for rec, el_name in zip(recordings, _electrode_names(recordings), strict=True):
        electrode = nwbfile.create_icephys_electrode(
            name=el_name, device=device, description="whole-cell current clamp"
        )
        for sweep in rec.sweeps:
            common = dict(
                electrode=electrode,
                rate=sweep.rate,
                starting_time=sweep.start_time,
                sweep_number=np.uint64(sweep.number),
                gain=1.0,
                stimulus_description=sweep.protocol or "N/A",
            )
            stimulus = None
            if sweep.current is not None:
                stimulus = CurrentClampStimulusSeries(
                    name=f"{el_name}_stimulus_{sweep.number:04d}",
                    **_nwb_data(sweep.current, _ADC_STEP_A if digitize else None),
                    unit="amperes",
                    **common,
                )
            settings = {
                attr: float(sweep.settings[key])
                for key, attr in _NWB_SETTINGS.items()
                if key in sweep.settings
            }
            response = CurrentClampSeries(
                name=f"{el_name}_response_{sweep.number:04d}",
                **_nwb_data(sweep.voltage, _ADC_STEP_V if digitize else None),
                unit="volts",
                **common,
                **settings,
            )
            nwbfile.add_intracellular_recording(
                electrode=electrode, stimulus=stimulus, response=response
            )
    with atomic_path(path) as tmp:
        with NWBHDF5IO(tmp, mode="w") as io:
            io.write(nwbfile)
    return Path(path)


_ADC_STEP_V = 1e-5  # 10 µV per int16 step: ±327 mV range
_ADC_STEP_A = 1e-13  # 0.1 pA per int16 step: ±3.2 nA range


def _nwb_data(values: np.ndarray, step: float | None) -> dict:
    """Series data as float32, or as compressed int16 counts with their ``conversion``."""
    if step is None:
        return {"data": values.astype(np.float32)}
    from hdmf.backends.hdf5.h5_utils import H5DataIO

    counts = np.clip(np.round(values / step), -32768, 32767).astype(np.int16)
    return {"data": H5DataIO(counts, compression="gzip", shuffle=True), "conversion": step}


def write_nix(recordings: Sequence[Recording], path: str | os.PathLike) -> Path:
    """Write recordings to a NIX file through neo's NixIO.

    One Block; one Segment per sweep number (``Segment.index``); per recording and sweep an
    AnalogSignal of voltage (V) and, when stored, one of current (A), both annotated with the
    ``electrode`` so the reader can pair them. Settings and protocol go into the voltage
    signal's annotations; recording metadata into the Block's annotations.

    Parameters
    ----------
    recordings : sequence of Recording
        Cells to write; their sweeps need not share sweep numbers.
    path : str or os.PathLike
        Target ``.nix`` file (replaced if it exists).

    Returns
    -------
    pathlib.Path
        The written file.
    """
    import neo
    import quantities as pq
    from neo.io import NixIO

    meta = dict(recordings[0].metadata) if recordings else {}
    block = neo.Block(name="recordings", **{k: str(v) for k, v in meta.items()})
    names = _electrode_names(recordings)
    numbers = sorted({s.number for rec in recordings for s in rec.sweeps})
    for number in numbers:
        # NixIO does not keep Segment.index, so the number also goes into an annotation.
        seg = neo.Segment(name=f"sweep {number}", index=number, sweep_number=number)
        for rec, el_name in zip(recordings, names, strict=True):
            for sweep in (s for s in rec.sweeps if s.number == number):
                common = dict(
                    sampling_rate=sweep.rate * pq.Hz,
                    t_start=sweep.start_time * pq.s,
                    electrode=el_name,
                )
                annotations = {"protocol": sweep.protocol, **dict(sweep.settings)}
                seg.analogsignals.append(
                    neo.AnalogSignal(
                        sweep.voltage.astype(np.float32).reshape(-1, 1),
                        units="V",
                        name=f"{el_name} voltage",
                        **common,
                        **annotations,
                    )
                )
                if sweep.current is not None:
                    seg.analogsignals.append(
                        neo.AnalogSignal(
                            sweep.current.astype(np.float32).reshape(-1, 1),
                            units="A",
                            name=f"{el_name} current",
                            **common,
                        )
                    )
        block.segments.append(seg)
    with atomic_path(path) as tmp:
        io = NixIO(tmp, mode="ow")
        try:
            io.write_block(block)
        finally:
            io.close()
    return Path(path)


def write_csv(
    recording: Recording, path: str | os.PathLike, *, decimals: int | None = None
) -> Path:
    """Write one recording in the plain-text layout of :mod:`pipeline.readers.text`.

    Columns ``sweep,time_s,voltage_mv,current_pa`` (``current_pa`` left out when no sweep
    stores a current); time is the sweep's start time plus the sample time, s.

    Parameters
    ----------
    recording : Recording
        The cell to write.
    path : str or os.PathLike
        Target ``.csv`` file (replaced if it exists).
    decimals : int, optional
        Round voltage (mV) and current (pA) to this many decimals to keep the file small; the
        default writes every float exactly.

    Returns
    -------
    pathlib.Path
        The written file.
    """
    import pandas as pd

    with_current = any(s.current is not None for s in recording.sweeps)
    frames = []
    for sweep in recording.sweeps:
        cols = {
            "sweep": np.full(sweep.n_samples, sweep.number, dtype=np.int64),
            "time_s": sweep.start_time + sweep.time(),
            "voltage_mv": sweep.voltage * 1e3,
        }
        if with_current:
            current = sweep.current if sweep.current is not None else np.nan
            cols["current_pa"] = np.broadcast_to(current, (sweep.n_samples,)) * 1e12
        if decimals is not None:
            cols = {k: np.round(v, decimals) if k != "sweep" else v for k, v in cols.items()}
            cols["time_s"] = sweep.start_time + np.round(sweep.time(), 6)
        frames.append(pd.DataFrame(cols))
    table = pd.concat(frames, ignore_index=True) if frames else pd.DataFrame(columns=["sweep"])
    with atomic_path(path) as tmp:
        table.to_csv(tmp, index=False)  # floats as repr: shortest text that reads back exactly
    return Path(path)
