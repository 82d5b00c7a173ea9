"""Readers: turn a recording file into :class:`~pipeline.recording.Recording` objects in SI units.

The reader is picked from the file's extension through an explicit table (``.nwb`` -> NWB,
``.nix`` -> neo's NixIO, ``.csv``/``.tsv``/``.txt`` -> plain text, every other extension neo
knows -> neo). The helpers below are shared by the reader modules: they check one sweep's arrays
and a cell's sweep numbers, so every reader rejects bad input with the same errors.
"""

from __future__ import annotations

import importlib
import math
import os
import re
from collections.abc import Callable, Sequence
from functools import cache
from pathlib import Path

import numpy as np

from pipeline.errors import (
    BadSamplesError,
    CorruptFileError,
    RecordingError,
    ShapeError,
    UnitError,
    UnsupportedFormatError,
)
from pipeline.recording import Recording, Sweep

__all__ = ["open_recordings", "supported_extensions", "MIN_SAMPLES", "TEXT_EXTENSIONS"]

MIN_SAMPLES = 10
"""Fewest samples a sweep may have; shorter ones cannot hold a baseline and a step."""

# Magnitudes no whole-cell current-clamp recording reaches in SI: they mean the samples are in
# another unit than the file states (common practice, no source: membrane potentials stay
# within about +-0.2 V, and current-clamp steps within tens of nA).
MAX_TYPICAL_VOLTAGE_V = 1.0  # the median |V| of a cell: -70 "V" is -70 mV stored as volts
MAX_CURRENT_A = 1e-6  # 1 uA: 100 "A" is 100 pA stored as amperes

# Our own readers; they win over neo's readers for the same extensions.
_OWN_READERS: dict[str, str] = {
    ".nwb": "pipeline.readers.nwb",
    ".nix": "pipeline.readers.neo_formats",
    ".csv": "pipeline.readers.text",
    ".tsv": "pipeline.readers.text",
    ".txt": "pipeline.readers.text",
}
_NEO_MODULE = "pipeline.readers.neo_formats"
TEXT_EXTENSIONS = tuple(e for e, m in _OWN_READERS.items() if m == "pipeline.readers.text")


# Extensions neo lists that we do not hand to neo: pickle runs code on load; the others are
# side-car, spike-sorting or event files (or any file at all, for numbered extensions and
# none), which a folder search would otherwise pick up as recordings (e.g. our own run.json).
_NEO_EXCLUDED = frozenset(
    {"", "pickle", "pkl", "json", "xml", "npy", "meta", "set", "fake", "events", "spikes"}
    | {"clu", "fet", "res", "spk"}
)


# The extensions of neo's IOs (neo.io.io_by_extension of neo 0.14, less _NEO_EXCLUDED), so
# that searching a folder does not import neo (~0.4 s per process) when it holds no such file.
# tests/test_readers.py checks every one against the installed neo; an extension a newer neo
# adds is still read when the file is named on the command line (_reader_for asks neo).
_NEO_KNOWN = frozenset(
    ".abf .asc .axgd .axgx .bin .brw .ccf .cfs .continuous .csv .dam .dat .edf .edr .eeg .f32 "
    ".gdf .h5 .ibw .kwik .lfp .lsx .mat .mcd .medd .mpx .ncs .nev .nex .nix .nrd .ns1 .ns2 .ns3 "
    ".ns4 .ns5 .ns6 .nse .ntt .nvt .nwb .oebin .openephys .pl2 .plx .pxp .raw .rdat .rec .rhd "
    ".rhs .ridx .sev .sif .smr .smrx .src .tbk .tdx .tev .tin .tnt .trc .tsq .tsv .txt .vhdr "
    ".wcp .xdat".split()
)


@cache
def _neo_extensions() -> tuple[str, ...]:
    """Extensions neo's IO detection knows (``neo.io.io_by_extension``), with the dot."""
    import neo.io

    exts = {e.lower() for e in neo.io.io_by_extension}
    return tuple(sorted(f".{e}" for e in exts if e not in _NEO_EXCLUDED and not e.isdigit()))


def supported_extensions() -> tuple[str, ...]:
    """Extensions :func:`open_recordings` can read, lower case with the dot, sorted.

    Folder searches use these. They come from a list kept with the code (checked against neo in
    the tests), not from neo itself, so that a search never imports neo.

    Returns
    -------
    tuple of str
        E.g. ``(".abf", ..., ".csv", ..., ".nix", ".nwb", ...)``.
    """
    return tuple(sorted(set(_OWN_READERS) | _NEO_KNOWN))


def _reader_for(path: Path) -> Callable[[Path], list[Recording]]:
    ext = path.suffix.lower()
    module = _OWN_READERS.get(ext)
    if module is None and (ext in _NEO_KNOWN or ext in _neo_extensions()):
        module = _NEO_MODULE
    if module is None:
        own = ", ".join(sorted(_OWN_READERS))
        raise UnsupportedFormatError(
            str(path),
            f"unknown extension {ext or '(none)'!r}; supported: {own} and the formats neo "
            f"reads ({', '.join(e for e in _neo_extensions() if e not in _OWN_READERS)})",
        )
    return importlib.import_module(module).read


def open_recordings(path: str | os.PathLike) -> list[Recording]:
    """Read every current-clamp cell stored in one file.

    Parameters
    ----------
    path : str or os.PathLike
        A ``.nwb``, ``.nix``, ``.csv``/``.tsv``/``.txt`` file, or any file neo reads.

    Returns
    -------
    list of Recording
        One per cell (electrode or voltage channel), sweeps in SI units (V, A, s, Hz).

    Raises
    ------
    RecordingError
        Or a subclass, naming the file and the problem, for any file that cannot be read.
    """
    p = Path(path)
    if p.is_dir():
        raise UnsupportedFormatError(str(p), "is a folder, not a recording file")
    if not p.exists():
        raise RecordingError(str(p), "no such file")
    reader = _reader_for(p)
    if p.stat().st_size == 0:
        raise CorruptFileError(str(p), "file is empty (0 bytes)")
    return reader(p)


# ---- shared checks, used by every reader -----------------------------------------------------

_PREFIXES = {"": 1.0, "m": 1e-3, "u": 1e-6, "µ": 1e-6, "μ": 1e-6, "n": 1e-9, "p": 1e-12}
_LONG_PREFIXES = {"kilo": "k", "milli": "m", "micro": "u", "nano": "n", "pico": "p"}


def parse_unit(text: str) -> tuple[str, float] | None:
    """Parse a voltage or current unit name.

    Parameters
    ----------
    text : str
        E.g. ``"volts"``, ``"V"``, ``"mV"``, ``"millivolts"``, ``"uV"``, ``"pA"``, ``"nA"``,
        ``"amperes"``. Case matters only to tell ``m`` (milli) from nothing else; ``MV`` and
        ``PA`` are read as mV and pA (no one records in megavolts).

    Returns
    -------
    (str, float) or None
        Base unit (``"V"`` or ``"A"``) and the factor to SI, or None when not recognised.
    """
    s = text.strip().replace(" ", "")
    for long, short in _LONG_PREFIXES.items():
        if s.lower().startswith(long):
            s = short + s[len(long) :]
            break
    m = re.fullmatch(r"([munpµμ]?)(volts?|v|amperes?|amps?|a)", s, flags=re.IGNORECASE)
    if m is None:
        return None
    prefix, base = m.group(1).lower(), m.group(2).lower()
    return ("V" if base.startswith("v") else "A"), _PREFIXES[prefix]


def rate_from_times(path: str, times: np.ndarray, what: str) -> float:
    """Sampling rate from sample times, checking they are evenly spaced.

    Parameters
    ----------
    path : str
        File, for error messages.
    times : numpy.ndarray
        Sample times, s.
    what : str
        Which series or sweep, for error messages.

    Returns
    -------
    float
        Rate, Hz: (n - 1) / (t_last - t_first), rounded to 12 significant digits so that times
        printed as text give back the rate they were written with.
    """
    t = np.asarray(times, dtype=np.float64)
    if t.size < 2:
        raise ShapeError(path, f"{what}: fewer than {MIN_SAMPLES} samples ({t.size})")
    if not np.all(np.isfinite(t)):
        raise ShapeError(path, f"{what}: sample times are not all finite")
    steps = np.diff(t)
    median = float(np.median(steps))
    if not median > 0:
        raise ShapeError(path, f"{what}: sample times do not increase (median step {median} s)")
    # Text files may round times; real gaps and jumps are far larger than 5 % of a step.
    if np.max(np.abs(steps - median)) > 0.05 * median:
        raise ShapeError(path, f"{what}: sample times are irregular (steps not evenly spaced)")
    rate = (t.size - 1) / (t[-1] - t[0])
    return float(f"{rate:.12g}")


def check_rate(path: str, rate: float, what: str) -> float:
    """Return ``rate`` (Hz) as float, or raise ShapeError if it is not finite and > 0."""
    rate = float(rate)
    if not (np.isfinite(rate) and rate > 0):
        raise ShapeError(path, f"{what}: sampling rate {rate} Hz is not finite and > 0")
    return rate


def make_sweep(
    path: str,
    what: str,
    voltage: np.ndarray,
    current: np.ndarray | None,
    rate: float,
    number: int,
    *,
    current_rate: float | None = None,
    start_time: float = 0.0,
    protocol: str = "",
    settings: dict[str, float | str] | None = None,
    take_arrays: bool = False,
) -> Sweep:
    """Check one sweep's arrays (already in SI) and build the Sweep.

    Parameters
    ----------
    path : str
        File, for error messages.
    what : str
        Which sweep or series, for error messages.
    voltage : numpy.ndarray
        Membrane potential, V. Partial NaN/Inf runs are kept (the fitters report them).
    current : numpy.ndarray or None
        Injected current, A, positive = depolarizing; None when not stored.
    rate : float
        Voltage sampling rate, Hz.
    number : int
        Sweep number.
    current_rate : float, optional
        Current sampling rate, Hz, when stored separately; must equal ``rate``.
    start_time : float
        Sweep start, s.
    protocol : str
        Stimulus name.
    settings : dict, optional
        Amplifier settings, SI in the key suffix.
    take_arrays : bool
        Hand float64 arrays that own their memory over to the Sweep instead of having it copy
        them (see :class:`~pipeline.recording.Sweep`): for arrays the caller made and drops.

    Returns
    -------
    Sweep

    Raises
    ------
    ShapeError
        Bad rate, too few samples, voltage and current of different lengths or rates.
    BadSamplesError
        NaN/Inf in the current, or no finite voltage sample at all.
    """
    rate = check_rate(path, rate, what)
    v = _flat(voltage)
    if v.size < MIN_SAMPLES:
        raise ShapeError(path, f"{what}: fewer than {MIN_SAMPLES} samples ({v.size})")
    if not (math.isfinite(v[0]) or np.any(np.isfinite(v))):  # the first sample mostly answers
        raise BadSamplesError(path, f"{what}: voltage has no finite sample (all NaN or Inf)")
    if not np.isfinite(start_time):
        raise ShapeError(path, f"{what}: start time {start_time} s is not finite")
    i = None
    if current is not None:
        i = _flat(current)
        if current_rate is not None:
            current_rate = check_rate(path, current_rate, f"{what} (current)")
            if not np.isclose(current_rate, rate, rtol=1e-9, atol=0.0):
                raise ShapeError(
                    path, f"{what}: voltage at {rate:g} Hz but current at {current_rate:g} Hz"
                )
        if i.size != v.size:
            raise ShapeError(path, f"{what}: voltage has {v.size} samples but current has {i.size}")
        if not np.all(np.isfinite(i)):
            bad = int(np.count_nonzero(~np.isfinite(i)))
            raise BadSamplesError(path, f"{what}: injected current has {bad} NaN/Inf samples")
    return Sweep(
        voltage=v,
        current=i,
        rate=rate,
        number=int(number),
        start_time=float(start_time),
        protocol=protocol,
        settings=settings or {},
        take_arrays=take_arrays,
    )


def _flat(values: np.ndarray) -> np.ndarray:
    """``values`` as a 1-D float64 array; a 1-D float64 array as it is (not a view of it, which
    a Sweep taking arrays over would copy)."""
    arr = np.asarray(values, dtype=np.float64)
    return arr if arr.ndim == 1 else arr.reshape(-1)


def make_recording(
    path: str,
    cell_id: str,
    electrode: str,
    sweeps: Sequence[Sweep],
    metadata: dict[str, str] | None = None,
    skipped: Sequence[str] = (),
) -> Recording:
    """Build a Recording, refusing duplicate sweep numbers (ShapeError naming the file) and
    magnitudes no recording in SI has (UnitError: the samples are in another unit than the
    file says, e.g. millivolts under a volts label).

    Sweeps are put in the order of their numbers, whatever order the file stores them in: the
    recording order every stage reads (a file written backwards gives the same cell).
    """
    sweeps = sorted(sweeps, key=lambda s: s.number)
    numbers = [s.number for s in sweeps]
    who = electrode or cell_id
    dupes = sorted({n for n in numbers if numbers.count(n) > 1})
    if dupes:
        raise ShapeError(path, f"{who}: duplicate sweep numbers {dupes} in one cell")
    _check_magnitudes(path, who, sweeps)
    return Recording(
        cell_id=cell_id,
        source_file=str(path),
        electrode=electrode,
        sweeps=tuple(sweeps),
        metadata=metadata or {},
        skipped=tuple(skipped),
    )


def _check_magnitudes(path: str, who: str, sweeps: Sequence[Sweep]) -> None:
    """UnitError when a cell's voltages or currents are too large to be in volts or amperes.

    The voltage test is on the median magnitude of every 64th sample (glitches and saturated
    samples do not count); the current test on the largest magnitude of every sample (a
    stored current has no glitches to speak of). A small part of a file's reading time. A
    file of several cells is refused whole when one of them fails, as for duplicate sweeps.
    """
    if not sweeps:
        return
    v = np.concatenate([s.voltage[::64] for s in sweeps])
    typical = float(np.nanmedian(np.abs(v))) if np.isfinite(v).any() else 0.0
    if typical > MAX_TYPICAL_VOLTAGE_V:
        raise UnitError(
            path,
            f"{who}: membrane potential of typically {typical:.3g} V in magnitude; a membrane "
            "potential stays within about 0.2 V, so the voltage samples are most likely in "
            "another unit (millivolts?) than the file states",
        )
    largest = max(
        # finite: make_sweep refuses a current with NaN or Inf samples
        (max(s.current.max(), -s.current.min()) for s in sweeps if s.current is not None),
        default=0.0,
    )
    if largest > MAX_CURRENT_A:
        raise UnitError(
            path,
            f"{who}: injected current up to {largest:.3g} A in magnitude; current-clamp steps "
            "stay within tens of nA, so the current samples are most likely in another unit "
            "(pA or nA?) than the file states",
        )


def cell_ids(path: Path, electrodes: Sequence[str]) -> list[str]:
    """File stem for one cell, ``<stem>-<electrode>`` for several (DESIGN.md)."""
    if len(electrodes) == 1:
        return [path.stem]
    return [f"{path.stem}-{e}" for e in electrodes]


def describe(exc: BaseException, limit: int = 200) -> str:
    """A library exception as one short line for an error message (never a traceback)."""
    text = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
    if len(text) > limit:
        text = text[: limit - 3] + "..."
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__


def check_volts_or_amps(path: str, what: str, unit: str, expected: str) -> float:
    """Factor to SI for a unit name that must be volts-like (``"V"``) or amperes-like (``"A"``)."""
    parsed = parse_unit(unit or "")
    kind = "volts" if expected == "V" else "amperes"
    if parsed is None:
        raise UnitError(path, f"{what}: unknown unit {unit!r} (expected {kind})")
    if parsed[0] != expected:
        raise UnitError(path, f"{what}: unit {unit!r} is not {kind}-like")
    return parsed[1]
