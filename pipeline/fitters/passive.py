"""Passive fitters: per-sweep measurements and per-cell properties (issue 3).

The public entry points live here; the work is split between
:mod:`pipeline.fitters.sweep` (one sweep: baseline, steady state, peak, edge jumps, charging
fit, sag, rebound) and :mod:`pipeline.fitters.cell` (the cell: Rin with bridge correction, tau,
Cm, Vrest, sag, peeling). Units are SI; injected current positive = depolarizing.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

from pipeline.errors import RecordingError
from pipeline.fitters.cell import summarize_cell
from pipeline.fitters.results import CellFit
from pipeline.fitters.sweep import PassiveSettings, fit_sweep
from pipeline.recording import Recording
from pipeline.steps import StepEpoch, StepSettings

__all__ = ["PassiveSettings", "fit_cell", "fit_sweep", "summarize_cell"]


def fit_cell(
    recording: Recording,
    settings: PassiveSettings | None = None,
    *,
    epochs: Sequence[StepEpoch] | None = None,
    step_settings: StepSettings | None = None,
    exclude: Mapping[int, str] | None = None,
) -> CellFit:
    """Passive properties of one cell.

    Parameters
    ----------
    recording : Recording
        The cell's sweeps (SI units).
    settings : PassiveSettings, optional
        Defaults when omitted.
    epochs : sequence of StepEpoch, optional
        One per sweep, in sweep order; found with :func:`pipeline.steps.find_steps` when omitted.
    step_settings : StepSettings, optional
        Used only when ``epochs`` is omitted.
    exclude : mapping of int to str, optional
        Sweep number -> reason, for sweeps to leave out of the cell's values.

    Returns
    -------
    CellFit
        See :func:`pipeline.fitters.cell.summarize_cell`.

    Raises
    ------
    RecordingError
        When ``epochs`` does not hold one epoch per sweep (names the source file).
    """
    settings = settings or PassiveSettings()
    if epochs is None:
        from pipeline.steps import find_steps  # lazy: steps.py may be newer than this module

        epochs = find_steps(recording, step_settings or StepSettings())
    if len(epochs) != len(recording.sweeps):
        raise RecordingError(
            recording.source_file,
            f"{len(epochs)} step epochs for {len(recording.sweeps)} sweeps of cell {recording.cell_id}",
        )
    fits = [fit_sweep(sw, ep, settings) for sw, ep in zip(recording.sweeps, epochs, strict=True)]
    return summarize_cell(recording.cell_id, fits, settings, exclude)
