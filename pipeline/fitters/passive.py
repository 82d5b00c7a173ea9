"""Passive fitters: per-sweep measurements and per-cell properties (issue 3).

The public entry points live here; the work is split between
:mod:`pipeline.fitters.sweep` (one sweep: baseline, steady state, peak, edge jumps, charging
fit, sag, rebound) and :mod:`pipeline.fitters.cell` (the cell: Rin with bridge correction, tau,
Cm, Vrest, sag, peeling). Units are SI; injected current positive = depolarizing.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import replace

import numpy as np

from pipeline.errors import RecordingError
from pipeline.fitters.cell import summarize_cell
from pipeline.fitters.results import CellFit, SweepFit
from pipeline.fitters.sweep import (
    PassiveSettings,
    SweepMeasure,
    complete_sweep,
    fit_sweep,
    measure_sweep,
)
from pipeline.recording import Recording, Sweep
from pipeline.steps import StepEpoch, StepSettings

__all__ = ["PassiveSettings", "fit_cell", "fit_sweep", "fit_sweeps", "summarize_cell"]


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

    Notes
    -----
    The sweeps are measured with :func:`fit_sweeps` (two passes), then summarised.

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
    fits = fit_sweeps(list(zip(recording.sweeps, epochs, strict=True)), settings)
    return summarize_cell(recording.cell_id, fits, settings, exclude)


def fit_sweeps(
    pairs: Sequence[tuple[Sweep, StepEpoch]], settings: PassiveSettings
) -> list[SweepFit]:
    """Per-sweep passive measurements of one cell's sweeps, with the cell-level second pass.

    Parameters
    ----------
    pairs : sequence of (Sweep, StepEpoch)
        The cell's sweeps with their step epochs (unusable epochs give a SweepFit with the
        epoch's reason).
    settings : PassiveSettings
        Windows and fit options.

    Returns
    -------
    list of SweepFit
        In the order of ``pairs``; feed them to :func:`summarize_cell` (again with other
        exclusions as often as needed: it re-reads no trace).

    Notes
    -----
    The charging curves are first fitted on the three largest hyperpolarizing steps (best
    signal-to-noise); every hyperpolarizing sweep is then fitted starting no earlier than the
    dendritic equalisation time found on them, with the exp+sag model when the largest step
    sags (small steps are too noisy to decide alone: an upward baseline drift looks like sag
    there). A slow K+ gate that closes on hyperpolarization sags at small steps only, so such
    a cell is fitted with one exponential and its Cm is overestimated (tests/test_slow_gates.py,
    a known limit). Calling :func:`fit_sweep` sweep by sweep
    skips this and decides per sweep. Each trace is measured once
    (:func:`pipeline.fitters.sweep.measure_sweep`); the second pass redoes only the charging
    fits, and not those it would repeat.
    """
    hyper = sorted(
        (k for k, (_, ep) in enumerate(pairs) if ep.usable and ep.amplitude < 0),
        key=lambda k: pairs[k][1].amplitude,
    )
    pilots = set(hyper[:3])
    skip = replace(settings, charging_model="none")
    # traces are measured once; only the charging fit is redone in the second pass
    measured = [measure_sweep(sw, ep, settings) for sw, ep in pairs]
    fits = [complete_sweep(m, settings if k in pilots else skip) for k, m in enumerate(measured)]
    second, fast_found = _second_pass_settings([fits[k] for k in pilots], settings)
    second = second or settings
    for k in hyper:
        m = measured[k]
        if k in pilots and (second is settings or _same_fit(m, settings, second)):
            continue  # the second pass would repeat the first
        if (
            k in pilots
            and math.isnan(fits[k].tau_fast_s)
            and _same_fit(m, settings, _peeled(second))
        ):
            continue  # it peeled nothing: its start stays, the same fit again
        fits[k] = _refit(fits[k], m, second, fast_found)
    return fits


def _same_fit(m: SweepFit | SweepMeasure, a: PassiveSettings, b: PassiveSettings) -> bool:
    """True when the sweep's charging fit is the same under settings ``a`` and ``b``."""
    return isinstance(m, SweepFit) or m.same_charging(a, b)


def _refit(
    first: SweepFit, m: SweepFit | SweepMeasure, settings: PassiveSettings, fast_found: bool
) -> SweepFit:
    """Second-pass fit of a sweep. It keeps the fast time constant its first pass peeled when
    the cell found a fast component; a peel the cell outvoted is not reported (``tau_fast_ms``
    empty, as on the sweeps that peeled nothing)."""
    again = complete_sweep(m, settings)
    if fast_found and math.isnan(again.tau_fast_s):
        return replace(again, tau_fast_s=first.tau_fast_s)
    return again


# A fit start (s after the onset) that moves no fit (every bin lies after the settling) but
# tells _charging_fit that the cell has decided the equalisation time: the sweep peels nothing.
_DECIDED = 1e-9


def _peeled(settings: PassiveSettings) -> PassiveSettings:
    """``settings`` as the first pass had them, when only the decided start differs."""
    if settings.fit_start_min_s == _DECIDED:
        return replace(settings, fit_start_min_s=0.0)
    return settings


def _second_pass_settings(
    fits: Sequence[SweepFit], settings: PassiveSettings
) -> tuple[PassiveSettings | None, bool]:
    """Settings for refitting the charging curves with what the cell's largest hyperpolarizing
    steps (best signal-to-noise) showed: the dendritic equalisation time, below which no fit
    starts, and whether the cell sags (then every hyperpolarizing sweep gets the exp+sag model).
    None when nothing changes.

    A fast component counts only when most of those steps show it: one peel can be noise (a
    late fit whose tau is drawn high overshoots the early bins, backwards, by more than 3 SD of
    a bin; a simulated 5 ms cell then lost every sweep to the R² rule, 1 cell in 40). The
    decision, "none" too, is handed to every sweep (a start of at least ``_DECIDED``): the
    small steps are too noisy to peel on their own. Also returned: whether the cell has a
    fast component."""
    hyper = sorted(
        (f for f in fits if f.step_a < 0 and f.charging.ok and math.isfinite(f.peak_dv)),
        key=lambda f: f.peak_dv,
    )[:3]
    if not hyper:
        return None, False
    eq = [
        settings.equalization_factor * f.tau_fast_s
        for f in hyper
        if math.isfinite(f.tau_fast_s) and f.tau_fast_s < f.charging.tau / 2
    ]
    found = 2 * len(eq) > len(hyper)
    start = max(settings.fit_start_min_s, _DECIDED, float(np.median(eq)) if found else 0.0)
    model = settings.charging_model
    if model == "auto":
        model = "exp+sag" if hyper[0].charging.model == "exp+sag" else "exp"
    if start == settings.fit_start_min_s and model == settings.charging_model:
        return None, found
    return replace(settings, fit_start_min_s=start, charging_model=model), found
