"""Find the current step of each sweep (holding level, onset, offset, amplitude).

Sign convention: amplitude is the injected current relative to holding, positive =
depolarizing.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class StepSettings:
    """How steps are found; the ``[steps]`` table of the config.

    Schedule fields are used only for sweeps that store no current: onset (s) and duration (s)
    of the step, the first sweep's amplitude (A) and the increment per sweep (A).
    """

    schedule_onset_s: float | None = None
    schedule_duration_s: float | None = None
    schedule_first_a: float | None = None
    schedule_increment_a: float | None = None
    min_amplitude_a: float = 1e-12


@dataclass(frozen=True)
class StepEpoch:
    """The step epoch of one sweep.

    Parameters
    ----------
    sweep : int
        Sweep number.
    usable : bool
        True when the sweep is a single rectangular step the fitters can use.
    kind : str
        ``"step"``, or what the sweep is instead: ``"no change"``, ``"ramp"``, ``"noise"``,
        ``"train"``, ``"multi-step"``, ``"too short"``, ``"no current"``.
    reason : str
        Empty when usable; otherwise a sentence saying why the sweep cannot be used.
    holding : float
        Holding current before the step, A.
    amplitude : float
        Step current relative to holding, A (positive = depolarizing).
    onset : float
        Step onset, s from the sweep start (time of the first sample of the step).
    offset : float
        Step offset, s from the sweep start (time of the first sample after the step).
    onset_index, offset_index : int
        The same as sample indices.
    source : str
        ``"recorded"`` (from the stored current) or ``"schedule"`` (from the config).
    """

    sweep: int
    usable: bool
    kind: str
    reason: str
    holding: float
    amplitude: float
    onset: float
    offset: float
    onset_index: int
    offset_index: int
    source: str = "recorded"

    @property
    def duration(self) -> float:
        """Step duration, s."""
        return self.offset - self.onset
