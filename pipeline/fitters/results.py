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


def sag_response(t: np.ndarray, tau: float, tau_sag: float, kappa: float) -> np.ndarray:
    """Normalised step response of a membrane with one slow restoring gate (Ih-like).

    The linearised system ``dV/dt = -V/tau - b*m + I/C``, ``dm/dt = c*V - m/tau_sag`` with
    ``b*c = kappa / (tau * tau_sag)`` (kappa = steady-state conductance / instantaneous
    conductance - 1, so kappa > 0 gives a sag). ``tau`` is the frozen-gate membrane time constant.
    Returns ``x(t)`` with ``x(0) = 0`` and ``x(inf) = 1`` (``t`` in s from the step onset).
    Poles may be complex (a damped oscillation); the result is real either way.
    """
    a, d = 1.0 / tau, 1.0 / tau_sag
    t = np.asarray(t, dtype=float)
    disc = (a - d) ** 2 - 4.0 * kappa * a * d
    mid = -(a + d) / 2.0
    if disc > 1e-18 * (a + d) ** 2:  # two real poles: two exponentials
        h = math.sqrt(disc) / 2.0
        l1, l2 = mid + h, mid - h
        s_ = l1 * l2
        c1 = s_ * (l1 + d) / (d * l1 * (l1 - l2))
        c2 = s_ * (l2 + d) / (d * l2 * (l2 - l1))
        return 1.0 + c1 * np.exp(l1 * t) + c2 * np.exp(l2 * t)
    # complex (or repeated, nudged apart) poles mid +- i*w: a damped oscillation
    w = max(math.sqrt(-disc) / 2.0, 1e-9 * (a + d))
    l1 = complex(mid, w)
    s_ = (l1 * l1.conjugate()).real
    c1 = s_ * (l1 + d) / (d * l1 * (2j * w))
    e = np.exp(mid * t)
    return 1.0 + 2.0 * e * (c1.real * np.cos(w * t) - c1.imag * np.sin(w * t))


@dataclass(frozen=True)
class ExpFit:
    """A single-exponential fit ``v(t) = v_inf + amp * exp(-(t - t0) / tau)``.

    With ``model == "exp+sag"`` the fit is instead the step response of a membrane with one slow
    restoring gate (:func:`sag_response`): ``v(t) = v_inf - amp + amp * x(t - onset)``; ``tau``
    is then the frozen-gate membrane time constant, ``amp`` the steady deflection of that mode,
    ``tau_sag`` and ``kappa`` the gate's time constant and strength.

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
    tau_se: float = NAN  # standard error of tau from the fit's covariance, s
    model: str = "exp"  # 'exp' or 'exp+sag' (see the class docstring)
    onset: float = NAN  # step onset, s from the sweep start (time origin of 'exp+sag')
    tau_sag: float = NAN  # slow gate time constant, s ('exp+sag')
    kappa: float = NAN  # steady / instantaneous conductance - 1 ('exp+sag')
    kappa_se: float = NAN  # its standard error from the fit

    @property
    def ok(self) -> bool:
        """True when the fit produced a finite time constant."""
        return math.isfinite(self.tau)

    def curve(self, t: np.ndarray) -> np.ndarray:
        """Evaluate the fitted curve at times ``t`` (s); returns V."""
        t = np.asarray(t, dtype=float)
        if self.model == "exp+sag":
            x = sag_response(t - self.onset, self.tau, self.tau_sag, self.kappa)
            return self.v_inf - self.amp + self.amp * x
        return self.v_inf + self.amp * np.exp(-(t - self.t0) / self.tau)


@dataclass(frozen=True)
class BiExpFit:
    """A two-exponential fit ``v(t) = v_inf + amp0 exp(-(t-t0)/tau0) + amp1 exp(-(t-t0)/tau1)``,
    ``tau0 >= tau1`` (Rall 1969 peeling: tau0 the membrane, tau1 the first equalising constant).

    Times in s from the sweep start, voltages in V; ``*_se`` are standard errors from the fit.
    """

    t0: float = NAN
    t1: float = NAN
    tau0: float = NAN
    tau1: float = NAN
    amp0: float = NAN
    amp1: float = NAN
    v_inf: float = NAN
    tau0_se: float = NAN
    tau1_se: float = NAN
    resid_rms: float = NAN

    @property
    def ok(self) -> bool:
        """True when both time constants are finite."""
        return math.isfinite(self.tau0) and math.isfinite(self.tau1)


def _ms(x: float) -> float:
    return x * 1e3


def _mv(x: float) -> float:
    return x * 1e3


def _pa(x: float) -> float:
    return x * 1e12


def _mohm(x: float) -> float:
    return x * 1e-6


@dataclass(frozen=True)
class SweepFit:
    """Passive measurements of one sweep. NaN where a value could not be measured; ``reason``
    then says why."""

    sweep: int
    step_a: float = NAN  # step current relative to holding, A (positive = depolarizing)
    holding_a: float = NAN
    baseline_v: float = NAN  # mean in the pre-step window, V
    baseline_rms_v: float = NAN  # RMS noise in the pre-step window (mains hum removed), V
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
    bias_a: float = 0.0  # amplifier bias current from the sweep's settings, A
    start_time_s: float = NAN  # sweep start, s from the session start
    onset_s: float = NAN  # step onset, s from the sweep start
    nonfinite_samples: int = 0  # NaN or infinite samples in the whole sweep
    clipped_samples: int = 0  # samples in flat runs at the trace's extreme (amplifier rail)
    rounding_v: float = NAN  # the step a trace rounded coarser than its noise is on, V, or NaN
    charging2: BiExpFit | None = None  # two-exponential fit, when asked for
    tau_fast_s: float = NAN  # fastest (equalising) time constant found by peeling, s
    onset_jump_curved_v: float = NAN  # onset jump extrapolated with a t^1.5 term too, V
    offset_jump_curved_v: float = NAN
    jump_ssr_drop_v2: float = (
        0.0  # residual sum of squares the t^1.5 term removes (both edges), V^2
    )
    jump_ssr_v2: float = 0.0  # residual sum of squares of the curved extrapolations, V^2
    jump_dof: int = 0  # their degrees of freedom
    # the early responses themselves (after the electrode settling), for the cell's pooled fit:
    # samples minus the level before the edge, V; empty where the edge was not measurable
    onset_edge_v: tuple[float, ...] = ()
    offset_edge_v: tuple[float, ...] = ()  # empty too when the membrane was not steady before it
    edge_start_s: float = NAN  # time of their first sample after the edge, s
    edge_dt_s: float = NAN  # their sample interval, s

    @property
    def baseline_shift_v(self) -> float:
        """Baseline after the step minus before, V."""
        return self.baseline_after_v - self.baseline_v

    def row(self) -> dict[str, float | int | str]:
        """Flat record with report units in the keys (mV, pA, MOhm, ms from step onset)."""
        c = self.charging
        row = {
            "sweep": self.sweep,
            "step_pa": _pa(self.step_a),
            "holding_pa": _pa(self.holding_a),
            "baseline_mv": _mv(self.baseline_v),
            "baseline_rms_mv": _mv(self.baseline_rms_v),
            "baseline_after_mv": _mv(self.baseline_after_v),
            "baseline_shift_mv": _mv(self.baseline_shift_v),
            "ss_dv_mv": _mv(self.ss_dv),
            "peak_dv_mv": _mv(self.peak_dv),
            "onset_jump_mv": _mv(self.onset_jump_v),
            "offset_jump_mv": _mv(self.offset_jump_v),
            "rin_mohm": _mohm(self.rin_ohm),
            "tau_ms": _ms(c.tau),
            "tau_se_ms": _ms(c.tau_se),
            "tau_model": c.model,
            "tau_fast_ms": _ms(self.tau_fast_s),
            "tau_r2": c.r2,
            "tau_resid_rms_mv": _mv(c.resid_rms),
            "fit_start_ms": _ms(c.t0 - self.onset_s),
            "fit_end_ms": _ms(c.t1 - self.onset_s),
            "sag_ratio": self.sag_ratio,
            "rebound_mv": _mv(self.rebound_v),
            "nonfinite_samples": self.nonfinite_samples,
            "clipped_samples": self.clipped_samples,
            "fit_reason": self.reason,
        }
        if self.charging2 is not None:
            row["tau0_ms"] = _ms(self.charging2.tau0)
            row["tau1_ms"] = _ms(self.charging2.tau1)
        return row


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
    rin_apparent_ohm: float = NAN  # steady-state slope before the bridge correction, ohm
    rin_method: str = ""  # 'linear' (slope of the linear range) or 'quadratic' (slope at rest)
    bridge_error_se_ohm: float = NAN
    bridge_method: str = ""  # jump extrapolation: 'quadratic', 'curved' (t^1.5) or 'cable'
    sag_ratio_at_target: float = NAN  # interpolated at PassiveSettings.sag_target_v
    two_exp: bool = False  # True when the two-exponential (peeling) values were asked for
    tau0_s: float = NAN  # slow time constant of the two-exponential fits
    tau1_s: float = NAN  # first equalising time constant
    tau1_ci_s: tuple[float, float] = (NAN, NAN)
    electrotonic_length: float = NAN  # L = pi / sqrt(tau0/tau1 - 1) (Rall 1969)
    peel_status: str = ""  # 'ok' or why tau1 / L are not given
    notes: str = ""  # why some cell values are NaN or uncorrected, '; '-separated
    rin_frozen_ohm: float = (
        NAN  # input resistance before the slow (Ih) gate moves; = Rin without sag
    )
    ss_charge_left: float = NAN  # exp(-t/tau) at the steady-state window's start (fraction)

    @property
    def n_sweeps(self) -> int:
        """Number of sweeps measured (usable or not)."""
        return len(self.sweeps)

    def row(self) -> dict[str, float | int | str]:
        """Flat record with report units in the keys (mV, MOhm, ms, pF, pA)."""
        row = {
            "cell_id": self.cell_id,
            "n_sweeps": self.n_sweeps,
            "n_sweeps_used": len(self.used),
            "vrest_mv": _mv(self.vrest_v),
            "vrest_drift_mv": _mv(self.vrest_drift_v),
            "rin_mohm": _mohm(self.rin_ohm),
            "rin_ci_low_mohm": _mohm(self.rin_ci_ohm[0]),
            "rin_ci_high_mohm": _mohm(self.rin_ci_ohm[1]),
            "rin_peak_mohm": _mohm(self.rin_peak_ohm),
            "rin_apparent_mohm": _mohm(self.rin_apparent_ohm),
            "rin_method": self.rin_method,
            "iv_curvature": self.iv_curvature,
            "bridge_error_mohm": _mohm(self.bridge_error_ohm),
            "tau_ms": _ms(self.tau_s),
            "tau_ci_low_ms": _ms(self.tau_ci_s[0]),
            "tau_ci_high_ms": _ms(self.tau_ci_s[1]),
            "cm_pf": self.cm_f * 1e12,
            "cm_ci_low_pf": self.cm_ci_f[0] * 1e12,
            "cm_ci_high_pf": self.cm_ci_f[1] * 1e12,
            "sag_ratio": self.sag_ratio,
            "sag_step_pa": _pa(self.sag_step_a),
            "sag_ratio_at_target": self.sag_ratio_at_target,
            "rin_frozen_mohm": _mohm(self.rin_frozen_ohm),
            "ss_charge_left_pct": 100 * self.ss_charge_left,
            "rebound_mv": _mv(self.rebound_v),
            "status": self.status,
            "notes": self.notes,
        }
        if self.two_exp:
            row.update(
                tau0_ms=_ms(self.tau0_s),
                tau1_ms=_ms(self.tau1_s),
                tau1_ci_low_ms=_ms(self.tau1_ci_s[0]),
                tau1_ci_high_ms=_ms(self.tau1_ci_s[1]),
                electrotonic_length=self.electrotonic_length,
                peel_status=self.peel_status,
            )
        return row

    def sweep_rows(self) -> list[dict[str, float | int | str | bool]]:
        """One flat record per sweep, with ``used`` and ``excluded_because`` added."""
        used = set(self.used)
        return [
            {
                **f.row(),
                "used": f.sweep in used,
                "excluded_because": self.excluded.get(f.sweep, ""),
            }
            for f in self.sweeps
        ]
