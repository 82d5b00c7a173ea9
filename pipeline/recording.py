"""The data model shared by every stage: a cell's sweeps, in SI units.

Voltages in volts, currents in amperes (positive = depolarizing, i.e. current injected into the
cell), times in seconds, rates in hertz. Arrays are float64. Readers convert once, here nothing
is rescaled.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import InitVar, dataclass, field

import numpy as np


def _frozen_array(values: np.ndarray | None, take: bool = False) -> np.ndarray | None:
    """A read-only float64 copy of ``values``; with ``take``, a float64 array that owns its
    memory is kept as it is and made read-only (its giver hands it over: nothing else writes
    to it)."""
    if values is None:
        return None
    if take and isinstance(values, np.ndarray) and values.dtype == np.float64:
        if values.flags.owndata:
            values.setflags(write=False)
            return values
    arr = np.array(values, dtype=np.float64, copy=True)
    arr.setflags(write=False)
    return arr


@dataclass(frozen=True)
class Sweep:
    """One sweep of a current-clamp recording.

    Parameters
    ----------
    voltage : numpy.ndarray
        Membrane potential, V.
    current : numpy.ndarray or None
        Injected current, A; positive = depolarizing. ``None`` when the file stores no current
        (the step schedule then comes from the config).
    rate : float
        Sampling rate, Hz.
    number : int
        Sweep number as stored in the file (or its order when none is stored).
    start_time : float
        Start of the sweep, s, relative to the session or file start.
    protocol : str
        Stimulus or protocol name as stored (may be empty).
    settings : Mapping[str, float | str]
        Amplifier settings kept as metadata, SI units in the key suffix where numeric, e.g.
        ``bias_current_a``, ``bridge_balance_ohm``, ``capacitance_compensation_f``.
    take_arrays : bool
        Keep float64 arrays that own their memory as they are (made read-only) instead of
        copying them: for a reader handing over arrays that nothing else holds. By default the
        sweep keeps read-only copies, whatever the caller does with its arrays afterwards.
    """

    voltage: np.ndarray
    current: np.ndarray | None
    rate: float
    number: int
    start_time: float = 0.0
    protocol: str = ""
    settings: Mapping[str, float | str] = field(default_factory=dict)
    take_arrays: InitVar[bool] = False

    def __post_init__(self, take_arrays: bool) -> None:
        object.__setattr__(self, "voltage", _frozen_array(self.voltage, take_arrays))
        object.__setattr__(self, "current", _frozen_array(self.current, take_arrays))
        object.__setattr__(self, "rate", float(self.rate))
        object.__setattr__(self, "number", int(self.number))
        object.__setattr__(self, "start_time", float(self.start_time))
        object.__setattr__(self, "settings", dict(self.settings))

    @property
    def n_samples(self) -> int:
        """Number of samples."""
        return int(self.voltage.shape[0])

    @property
    def duration(self) -> float:
        """Length of the sweep, s."""
        return self.n_samples / self.rate

    @property
    def dt(self) -> float:
        """Sampling interval, s."""
        return 1.0 / self.rate

    def time(self) -> np.ndarray:
        """Sample times from the sweep start, s."""
        return np.arange(self.n_samples) / self.rate


@dataclass(frozen=True)
class Recording:
    """One cell: the current-clamp sweeps recorded through one electrode.

    Parameters
    ----------
    cell_id : str
        File stem, or ``<stem>-<electrode>`` when the file holds several cells.
    source_file : str
        Path of the file the sweeps came from.
    electrode : str
        Electrode (or channel) name as stored.
    sweeps : tuple of Sweep
        In recording order.
    metadata : Mapping[str, str]
        Free-form metadata from the file (subject, session description...).
    skipped : tuple of str
        Series that were present but not used (e.g. voltage-clamp series), one line each.
    """

    cell_id: str
    source_file: str
    electrode: str
    sweeps: tuple[Sweep, ...]
    metadata: Mapping[str, str] = field(default_factory=dict)
    skipped: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        object.__setattr__(self, "sweeps", tuple(self.sweeps))
        object.__setattr__(self, "metadata", dict(self.metadata))
        object.__setattr__(self, "skipped", tuple(self.skipped))
