"""Result records of the passive fitters: plain frozen dataclasses, SI units.

These are the contract between the fitters, QC and the report stage. ``row()`` methods turn a
record into a flat dict whose keys carry report units (``rin_mohm``, ``tau_ms``...); DataFrames
are built only from those rows, at the report stage.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

NAN = math.nan


@dataclass(frozen=True)
class ExpFit:
    """A single-exponential fit ``v(t) = v_inf + amp * exp(-(t - t0) / tau)``.

    Parameters
    ----------
    t0, t1 : float
        Fit window, s from the sweep start; ``t0`` is also the time origin of the curve.
    tau : float
        Time constant, s.
    amp : float
        Amplitude at ``t0``, V.
    v_inf : float
        Asymptote, V.
    r2 : float
        Coefficient of determination of the fit in its window.
    resid_rms : float
        RMS of the residuals, V.
    """

    t0: float = NAN
    t1: float = NAN
    tau: float = NAN
    amp: float = NAN
    v_inf: float = NAN
    r2: float = NAN
    resid_rms: float = NAN

    @property
    def ok(self) -> bool:
        """True when the fit produced a finite time constant."""
        return math.isfinite(self.tau)

    def curve(self, t: np.ndarray) -> np.ndarray:
        """Evaluate the fitted curve at times ``t`` (s); returns V."""
        return self.v_inf + self.amp * np.exp(-(np.asarray(t) - self.t0) / self.tau)


@dataclass(frozen=True)
class SweepFit:
    """Passive measurements of one sweep. NaN where a value could not be measured; ``reason``
    then says why."""

    sweep: int
    step_a: float = NAN  # step current relative to holding, A (positive = depolarizing)
    holding_a: float = NAN
    baseline_v: float = NAN  # mean in the pre-step window, V
    baseline_rms_v: float = NAN  # RMS noise in the pre-step window, V
    baseline_after_v: float = NAN  # mean after the step has relaxed, V
    ss_dv: float = NAN  # steady-state deflection from baseline, V
    peak_dv: float = NAN  # peak deflection from baseline (noise-robust), V
    onset_jump_v: float = NAN  # fast jump at onset (bridge error * I), V
    offset_jump_v: float = NAN  # fast jump at offset, V
    ss_window: tuple[float, float] = (NAN, NAN)  # s from sweep start
    baseline_window: tuple[float, float] = (NAN, NAN)
    charging: ExpFit = field(default_factory=ExpFit)
    sag_ratio: float = NAN
    rebound_v: float = NAN
    rin_ohm: float = NAN  # ss_dv / step_a for this sweep alone
    reason: str = ""  # why values are NaN, '; '-separated


@dataclass(frozen=True)
class CellFit:
    """Passive properties of one cell with 95% intervals (SI units)."""

    cell_id: str
    sweeps: tuple[SweepFit, ...]
    used: tuple[int, ...] = ()  # sweep numbers used for the cell's values
    excluded: dict[int, str] = field(default_factory=dict)  # sweep number -> reason left out
    vrest_v: float = NAN
    vrest_drift_v: float = NAN
    rin_ohm: float = NAN
    rin_ci_ohm: tuple[float, float] = (NAN, NAN)
    rin_peak_ohm: float = NAN
    iv_slope_ohm: float = NAN  # slope of the steady-state V-I line, ohm
    iv_intercept_v: float = NAN
    iv_curvature: float = NAN
    bridge_error_ohm: float = NAN
    tau_s: float = NAN
    tau_ci_s: tuple[float, float] = (NAN, NAN)
    cm_f: float = NAN
    cm_ci_f: tuple[float, float] = (NAN, NAN)
    sag_ratio: float = NAN
    sag_step_a: float = NAN
    rebound_v: float = NAN
    status: str = "ok"  # 'ok' or why the cell has no values
