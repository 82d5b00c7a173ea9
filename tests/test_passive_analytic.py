"""Passive fitters against analytic responses (no simulator).

The reference curve throughout is the RC charging of an isopotential membrane,
V(t) = V_inf + (V0 - V_inf) exp(-t / tau), tau = Rm Cm, and its mirror after the step
(Johnston & Wu, Foundations of Cellular Neurophysiology, 1995, ch. 2). Sweeps are built by hand
with hand-made StepEpochs, so these tests do not depend on the step finder.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import replace

import numpy as np
import pytest

from pipeline.errors import RecordingError
from pipeline.fitters.passive import (
    PassiveSettings,
    fit_cell,
    fit_sweep,
    fit_sweeps,
    summarize_cell,
)
from pipeline.fitters.results import sag_response
from pipeline.recording import Recording, Sweep
from pipeline.steps import StepEpoch

RATE = 20e3
N, ON, OFF = 30_000, 5_000, 25_000  # 1.5 s sweeps, 1 s step from 250 ms
RIN, TAU, VREST = 200e6, 0.03, -0.070
AMPS = tuple(a * 1e-12 for a in (-100, -80, -60, -40, -20, 20, 40))


def epoch(amp: float, number: int = 0, on: int = ON, off: int = OFF) -> StepEpoch:
    return StepEpoch(number, True, "step", "", 0.0, amp, on / RATE, off / RATE, on, off)


def charging(t: np.ndarray, tau: float = TAU, tau1: float | None = None, c1: float = 0.0):
    """Normalised response to a current step at t = 0 (0 before, 1 at steady state)."""
    tt = np.clip(t, 0.0, None)
    r = -np.expm1(-tt / tau)
    if tau1 is not None:  # a faster equalising component (sum of two exponentials)
        r = (1 - c1) * r + c1 * -np.expm1(-tt / tau1)
    return r


def rc_trace(amp: float, *, rin: float = RIN, shape=charging, **kw) -> np.ndarray:
    """Analytic RC step response (Johnston & Wu 1995, ch. 2): on at ON, off at OFF, V."""
    t = np.arange(N) / RATE
    return VREST + amp * rin * (shape(t - ON / RATE, **kw) - shape(t - OFF / RATE, **kw))


def bridge(amp: float, r_err: float, tau_e: float = 50e-6) -> np.ndarray:
    """Unbalanced-bridge artefact I * R_err seen through a first-order electrode filter, V."""
    t = np.arange(N) / RATE

    def edge(t0: float) -> np.ndarray:
        return np.where(t >= t0, -np.expm1(-np.clip(t - t0, 0, None) / tau_e), 0.0)

    return amp * r_err * (edge(ON / RATE) - edge(OFF / RATE))


def cell(traces: list[np.ndarray], amps=AMPS, interval: float = 3.0) -> Recording:
    sweeps = [Sweep(v, None, RATE, k, start_time=k * interval) for k, v in enumerate(traces)]
    return Recording("c1", "day/c1.nwb", "e0", sweeps)


def epochs(amps=AMPS) -> list[StepEpoch]:
    return [epoch(a, k) for k, a in enumerate(amps)]


# --------------------------------------------------------------------------- clean sweeps


def test_clean_rc_sweep_is_recovered_exactly():
    amp = -50e-12
    fit = fit_sweep(Sweep(rc_trace(amp), None, RATE, 3), epoch(amp, 3), PassiveSettings())
    assert fit.reason == ""
    assert fit.baseline_v == pytest.approx(VREST, rel=1e-9)
    assert fit.ss_dv == pytest.approx(amp * RIN, rel=1e-6)
    assert fit.rin_ohm == pytest.approx(RIN, rel=1e-6)
    assert fit.charging.tau == pytest.approx(TAU, rel=1e-6)
    assert fit.charging.r2 == pytest.approx(1.0, abs=1e-9)
    assert abs(fit.onset_jump_v) < 1e-6 and abs(fit.offset_jump_v) < 1e-6  # no bridge error
    assert abs(fit.sag_ratio) < 1e-4
    row = fit.row()
    assert row["rin_mohm"] == pytest.approx(200.0, rel=1e-6)
    assert row["tau_ms"] == pytest.approx(30.0, rel=1e-6)
    assert 0 < row["fit_start_ms"] < row["fit_end_ms"] <= 1000.0


def test_clean_rc_cell_gives_rin_tau_cm():
    rec = cell([rc_trace(a) for a in AMPS])
    cf = fit_cell(rec, PassiveSettings(bridge_correction=False), epochs=epochs())
    assert cf.status == "ok"
    assert cf.rin_method == "linear"
    assert cf.rin_ohm == pytest.approx(RIN, rel=1e-6)
    # the edge jumps are extrapolated with a quadratic over 2 ms of a curve whose cubic term is
    # ~(2 ms / tau)^3 / 6 of the deflection: a bias of a few kohm, ~1e-5 of Rin
    corrected = fit_cell(rec, epochs=epochs())
    assert abs(corrected.bridge_error_ohm) < 5e3
    assert corrected.rin_ohm == pytest.approx(RIN, rel=3e-5)
    assert cf.tau_s == pytest.approx(TAU, rel=1e-6)
    assert cf.cm_f == pytest.approx(TAU / RIN, rel=1e-6)  # tau = Rm Cm (Johnston & Wu ch. 2)
    assert cf.vrest_v == pytest.approx(VREST, abs=1e-9)
    assert cf.rin_ci_ohm[0] <= cf.rin_ohm <= cf.rin_ci_ohm[1]
    assert cf.sag_ratio == pytest.approx(0.0, abs=1e-4)


# --------------------------------------------------------------------------- rig nuisances


def noisy_cell(seed: int, r_err: float = 10e6, noise: float = 0.3e-3, hum: float = 0.2e-3):
    """RC cell with white noise, 50 Hz hum, bridge error through a 50 us filter, and a drift of
    0.5 mV over the recording."""
    rng = np.random.default_rng(seed)
    t = np.arange(N) / RATE
    traces = []
    for k, a in enumerate(AMPS):
        v = rc_trace(a) + bridge(a, r_err)
        v = (
            v
            + noise * rng.standard_normal(N)
            + hum * np.sin(2 * np.pi * 50 * t + rng.uniform(0, 6))
        )
        v = v + 0.5e-3 * (3.0 * k + t) / (3.0 * len(AMPS))
        traces.append(v)
    return cell(traces)


@pytest.mark.parametrize("seed", [1, 2])
def test_noise_hum_bridge_and_drift(seed):
    cf = fit_cell(noisy_cell(seed), epochs=epochs())
    # Tolerances from the noise: the steady-state deflections (0.3 s of windows, 0.3 mV RMS)
    # are known to ~0.01 mV, so the V-I slope to ~0.3%; each edge jump extrapolated from 2 ms of
    # samples to ~0.1 mV, which over 14 edges of 20-100 pA puts the bridge error within ~0.5 Mohm
    # (0.25% of Rin). Tau from the 3 fits with 0.3 mV noise: ~1%. Bounds are ~3 such errors.
    assert cf.bridge_error_ohm == pytest.approx(10e6, abs=1.5e6)
    assert cf.rin_apparent_ohm == pytest.approx(RIN + 10e6, rel=0.01)
    assert cf.rin_ohm == pytest.approx(RIN, rel=0.01)
    assert cf.tau_s == pytest.approx(TAU, rel=0.03)
    assert cf.cm_f == pytest.approx(TAU / RIN, rel=0.04)
    assert cf.rin_ci_ohm[0] < cf.rin_ohm < cf.rin_ci_ohm[1]
    assert cf.tau_ci_s[0] < cf.tau_s < cf.tau_ci_s[1]
    # the drift adds 0.5 mV over the recording; Vrest is read at its start
    assert cf.vrest_v == pytest.approx(VREST, abs=0.05e-3)
    assert cf.vrest_drift_v == pytest.approx(0.5e-3 * (len(AMPS) - 1) / len(AMPS), abs=0.05e-3)
    # without the correction, the bridge error is in Rin
    plain = fit_cell(noisy_cell(seed), PassiveSettings(bridge_correction=False), epochs=epochs())
    assert plain.rin_ohm == pytest.approx(RIN + 10e6, rel=0.01)


def test_hum_is_removed_before_measuring():
    """60 Hz hum of 0.5 mV on a noiseless sweep: the charging fit sees no hum."""
    amp = -50e-12
    t = np.arange(N) / RATE
    v = rc_trace(amp) + 0.5e-3 * np.sin(2 * np.pi * 60 * t + 0.3)
    fit = fit_sweep(Sweep(v, None, RATE, 0), epoch(amp), PassiveSettings())
    assert fit.charging.tau == pytest.approx(TAU, rel=1e-3)
    assert fit.charging.resid_rms < 1e-5
    kept = fit_sweep(Sweep(v, None, RATE, 0), epoch(amp), PassiveSettings(remove_hum=False))
    assert kept.charging.resid_rms > 0.2e-3  # the hum is really there
    # the baseline noise is what the fits see: hum removed, none left of this noiseless one;
    # with hum removal off it is the raw RMS of the sine, amplitude / sqrt(2)
    assert fit.baseline_rms_v < 1e-5
    assert kept.baseline_rms_v == pytest.approx(0.5e-3 / math.sqrt(2), rel=0.01)


# --------------------------------------------------------------------------- dendrites


def test_biexponential_gives_the_slow_time_constant():
    """Sum of two exponentials (tau0 = 30 ms, tau1 = 3 ms, 30% fast): tau is tau0.

    A uniform cylinder's slowest time constant is tau_m, the faster ones equalise charge
    (Rall, Biophys J 9:1483, 1969); a single exponential from onset blends them.
    """
    kw = dict(tau=TAU, tau1=3e-3, c1=0.3)
    cf = fit_cell(cell([rc_trace(a, **kw) for a in AMPS]), epochs=epochs())
    assert cf.tau_s == pytest.approx(TAU, rel=0.01)
    naive = fit_sweep(
        Sweep(rc_trace(-100e-12, **kw), None, RATE, 0),
        epoch(-100e-12),
        PassiveSettings(fit_start_fraction=0.0, equalization_factor=0.0),
    )
    assert naive.charging.tau < 0.95 * TAU  # what fitting from onset would report


def test_two_exponential_option_gives_electrotonic_length():
    tau1 = TAU / 10  # L = pi / sqrt(10 - 1) = 1.047 (Rall 1969)
    kw = dict(tau=TAU, tau1=tau1, c1=0.3)
    settings = PassiveSettings(two_exp=True)
    cf = fit_cell(cell([rc_trace(a, **kw) for a in AMPS]), settings, epochs=epochs())
    assert cf.peel_status == "ok"
    assert cf.tau0_s == pytest.approx(TAU, rel=0.01)
    assert cf.tau1_s == pytest.approx(tau1, rel=0.05)
    assert cf.electrotonic_length == pytest.approx(math.pi / 3, rel=0.03)
    row = cf.row()
    assert {"tau0_ms", "tau1_ms", "electrotonic_length", "peel_status"} <= set(row)
    close = dict(tau=TAU, tau1=TAU / 2, c1=0.3)  # ratio 2 < 3: the components do not separate
    cf2 = fit_cell(cell([rc_trace(a, **close) for a in AMPS]), settings, epochs=epochs())
    assert cf2.peel_status.startswith("not resolvable")
    assert math.isnan(cf2.electrotonic_length)


# --------------------------------------------------------------------------- sag


def sag_shape(t: np.ndarray, tau: float, tau_sag: float, kappa: float) -> np.ndarray:
    return np.where(t >= 0, sag_response(np.clip(t, 0, None), tau, tau_sag, kappa), 0.0)


def test_ih_like_sag_ratio_and_frozen_tau():
    """An analytic sag: membrane (tau = 30 ms) with a slow restoring gate (80 ms, kappa = 0.5).
    sag_ratio = (V_peak - V_ss) / (V_peak - V_base) from the dense analytic curve; a bridge
    jump added to the trace must not change it (it is removed from the deflections)."""
    amp, kw = -80e-12, dict(tau=TAU, tau_sag=0.08, kappa=0.5)
    v = rc_trace(amp, shape=sag_shape, **kw)
    during = v[ON:OFF]
    v_peak, v_ss = during.min(), during[-1]
    expected = (v_peak - v_ss) / (v_peak - VREST)
    assert 0.15 < expected < 0.4  # a clear sag
    s = PassiveSettings()
    clean = fit_sweep(Sweep(v, None, RATE, 0), epoch(amp), s)
    jumped = fit_sweep(Sweep(v + bridge(amp, 15e6), None, RATE, 0), epoch(amp), s)
    # the peak is read from a 20 ms boxcar: it flattens the analytic minimum by ~1e-3 of the sag
    assert clean.sag_ratio == pytest.approx(expected, abs=0.005)
    assert jumped.sag_ratio == pytest.approx(expected, abs=0.01)
    assert clean.charging.model == "exp+sag"
    assert clean.charging.tau == pytest.approx(TAU, rel=1e-3)  # the frozen-gate tau
    assert clean.charging.kappa == pytest.approx(0.5, rel=1e-2)
    assert clean.rebound_v > 0.5e-3  # the gate overshoots after the step: a rebound
    cf = fit_cell(
        cell([rc_trace(a, shape=sag_shape, **kw) for a in AMPS[:5]], amps=AMPS[:5]),
        epochs=epochs(AMPS[:5]),
    )
    assert cf.sag_ratio == pytest.approx(expected * 1, abs=0.005)  # the linear sag is size-free
    assert cf.sag_step_a == AMPS[0]
    assert cf.tau_s == pytest.approx(TAU, rel=1e-3)
    # Rin is the steady-state slope; Cm uses the input resistance before the gate moves
    assert cf.rin_ohm == pytest.approx(RIN, rel=1e-4)
    assert cf.rin_frozen_ohm == pytest.approx(RIN * 1.5, rel=1e-2)  # 1 + kappa
    assert cf.cm_f == pytest.approx(TAU / (RIN * 1.5), rel=1e-2)


@pytest.mark.parametrize("kappa", [0.0, 0.5, 3.0])  # 3.0: complex poles (damped oscillation)
def test_sag_response_solves_its_ode(kappa):
    """The closed form against a numerical solution of dV/dt = -V/tau - m + b,
    dm/dt = c V - m/tau_sag with b c = kappa / (tau tau_sag) (a linear ODE, solved by scipy)."""
    from scipy.integrate import solve_ivp

    tau, tau_sag = 0.03, 0.1
    a, d = 1 / tau, 1 / tau_sag
    drive = a * (1 + kappa)  # scales the steady state to 1
    t = np.linspace(0, 0.8, 41)
    sol = solve_ivp(
        lambda _, x: [-a * x[0] - x[1] + drive, kappa * a * d * x[0] - d * x[1]],
        (0, 0.8), [0.0, 0.0], t_eval=t, rtol=1e-10, atol=1e-13,
    )  # fmt: skip
    assert sag_response(t, tau, tau_sag, kappa) == pytest.approx(sol.y[0], abs=1e-8)
    assert sag_response(np.array([50.0]), tau, tau_sag, kappa)[0] == pytest.approx(1.0)


def test_sag_at_target_potential_and_vrest_sweeps():
    """Sag ratio read at a target peak potential (interpolated, never extrapolated); sweeps
    with holding current are kept out of Vrest."""
    kw = dict(tau=TAU, tau_sag=0.08, kappa=0.5)
    amps = AMPS[:5]
    traces = [rc_trace(a, shape=sag_shape, **kw) for a in amps]
    eps = [epoch(a, k) for k, a in enumerate(amps)]
    inside = PassiveSettings(sag_target_v=VREST - 0.01)  # peaks span about -4 to -21 mV
    cf = fit_cell(cell(traces, amps), inside, epochs=eps)
    assert cf.sag_ratio_at_target == pytest.approx(cf.sag_ratio, abs=0.01)  # size-free sag
    outside = fit_cell(cell(traces, amps), PassiveSettings(sag_target_v=-0.12), epochs=eps)
    assert math.isnan(outside.sag_ratio_at_target)
    held = [StepEpoch(k, True, "step", "", 50e-12 * (k == 0), a, ON / RATE, OFF / RATE, ON, OFF)
            for k, a in enumerate(amps)]  # fmt: skip
    shifted = list(traces)
    shifted[0] = traces[0] + 0.01  # the held sweep sits 10 mV higher
    cf_held = fit_cell(cell(shifted, amps), epochs=held)
    assert cf_held.vrest_v == pytest.approx(VREST, abs=1e-9)


def test_curved_iv_gives_the_slope_at_rest():
    """Steady-state deflection R0 I + c I^2 (inward rectification): Rin is R0, not the chord."""
    c = 1.5e15  # V/A^2: the chord at -100 pA is 15 Mohm below R0
    amps = tuple(-k * 10e-12 for k in range(1, 11))
    traces = [rc_trace(a, rin=RIN + c * a) for a in amps]
    cf = fit_cell(cell(traces, amps), PassiveSettings(linear_range_v=0.005), epochs=epochs(amps))
    assert cf.rin_method == "quadratic"
    assert cf.rin_ohm == pytest.approx(RIN, rel=1e-4)
    assert cf.iv_curvature == pytest.approx(c * amps[-1] / RIN, rel=1e-3)


# --------------------------------------------------------------------------- bad input


def test_bad_sweeps_give_nan_with_reasons():
    s = PassiveSettings()
    amp = -50e-12
    v = rc_trace(amp)
    short = fit_sweep(Sweep(v, None, RATE, 0), epoch(amp, on=100, off=OFF), s)
    assert math.isnan(short.ss_dv) and "too short" in short.reason
    holed = v.copy()
    holed[12_000:12_400] = np.nan
    nan_fit = fit_sweep(Sweep(holed, None, RATE, 1), epoch(amp, 1), s)
    assert nan_fit.nonfinite_samples == 400
    assert math.isnan(nan_fit.ss_dv) and math.isnan(nan_fit.charging.tau)
    assert "non-finite" in nan_fit.reason
    assert math.isfinite(nan_fit.baseline_v)  # the baseline window is clean
    none = StepEpoch(2, False, "no change", "no step in the current", 0.0, 0.0, 0.0, 0.0, -1, -1)
    assert fit_sweep(Sweep(v, None, RATE, 2), none, s).reason == "no step in the current"
    zero = fit_sweep(Sweep(v, None, RATE, 3), epoch(0.0, 3), s)
    assert zero.reason == "zero step amplitude" and math.isnan(zero.rin_ohm)
    outside = fit_sweep(Sweep(v[:20_000], None, RATE, 4), epoch(amp, 4), s)
    assert "outside the sweep" in outside.reason
    for f in (short, nan_fit, zero, outside):
        assert set(f.row()) >= {"sweep", "rin_mohm", "tau_ms", "fit_reason"}


def test_clipped_samples_are_counted_and_kept_out():
    amp = -100e-12
    rng = np.random.default_rng(5)
    v = rc_trace(amp) + 0.2e-3 * rng.standard_normal(N)
    rail = VREST + amp * RIN * 0.8  # the amplifier saturates before the steady state
    clipped = np.maximum(v, rail)
    fit = fit_sweep(Sweep(clipped, None, RATE, 0), epoch(amp), PassiveSettings())
    assert fit.clipped_samples > 10_000
    assert "clipped samples in the step window" in fit.reason
    assert math.isnan(fit.ss_dv)
    assert fit_sweep(Sweep(v, None, RATE, 0), epoch(amp), PassiveSettings()).clipped_samples == 0


def test_cell_without_hyperpolarizing_sweeps():
    amps = (20e-12, 40e-12)
    cf = fit_cell(cell([rc_trace(a) for a in amps], amps), epochs=epochs(amps))
    assert cf.status == "no usable hyperpolarizing sweep"
    assert math.isnan(cf.rin_ohm) and math.isnan(cf.tau_s) and math.isnan(cf.cm_f)
    assert cf.vrest_v == pytest.approx(VREST, abs=1e-9)
    assert cf.row()["status"] == "no usable hyperpolarizing sweep"


def test_settings_are_checked():
    with pytest.raises(ValueError, match="charging_model must be one of auto, exp, exp"):
        PassiveSettings(charging_model="expo")
    with pytest.raises(ValueError, match="n_small_steps must be >= 1, got 0"):
        PassiveSettings(n_small_steps=0)


def test_epochs_must_match_sweeps():
    with pytest.raises(RecordingError, match="day/c1.nwb: 2 step epochs for 7 sweeps"):
        fit_cell(cell([rc_trace(a) for a in AMPS]), epochs=epochs()[:2])


# --------------------------------------------------------------------------- records


CELL_COLUMNS = {
    "n_sweeps", "n_sweeps_used", "vrest_mv", "vrest_drift_mv", "rin_mohm", "rin_ci_low_mohm",
    "rin_ci_high_mohm", "rin_peak_mohm", "rin_apparent_mohm", "iv_curvature",
    "bridge_error_mohm", "tau_ms", "tau_ci_low_ms", "tau_ci_high_ms", "cm_pf", "cm_ci_low_pf",
    "cm_ci_high_pf", "sag_ratio", "sag_step_pa", "sag_ratio_at_target", "rebound_mv", "status",
}  # fmt: skip
SWEEP_COLUMNS = {
    "sweep", "step_pa", "holding_pa", "baseline_mv", "baseline_rms_mv", "baseline_after_mv",
    "baseline_shift_mv", "ss_dv_mv", "peak_dv_mv", "onset_jump_mv", "offset_jump_mv",
    "rin_mohm", "tau_ms", "tau_r2", "tau_resid_rms_mv", "fit_start_ms", "fit_end_ms",
    "sag_ratio", "rebound_mv", "nonfinite_samples", "clipped_samples", "fit_reason",
}  # fmt: skip


def test_rows_and_exclusion():
    cf = fit_cell(noisy_cell(3), epochs=epochs())
    row = cf.row()
    assert CELL_COLUMNS <= set(row)
    assert row["n_sweeps"] == len(AMPS) and row["n_sweeps_used"] == len(cf.used)
    assert row["rin_mohm"] == pytest.approx(cf.rin_ohm * 1e-6)
    assert row["cm_pf"] == pytest.approx(cf.cm_f * 1e12)
    rows = cf.sweep_rows()
    assert all(SWEEP_COLUMNS <= set(r) for r in rows)
    assert [r["step_pa"] for r in rows] == pytest.approx([a * 1e12 for a in AMPS])
    # leaving the two smallest hyperpolarizing steps out: they are no longer used
    again = summarize_cell("c1", cf.sweeps, PassiveSettings(), exclude={3: "qc", 4: "qc"})
    assert again.excluded[3] == "qc" and 3 not in again.used and 4 not in again.used
    assert again.rin_ohm == pytest.approx(RIN, rel=0.01)
    flagged = {r["sweep"]: r for r in again.sweep_rows()}
    assert flagged[3]["excluded_because"] == "qc" and not flagged[3]["used"]


def _same(a, b) -> bool:
    """``a == b``, field by field for dataclasses, with NaN equal to NaN.

    Python 3.13's dataclass ``__eq__`` compares fields with ``==``, where NaN != NaN; before,
    it compared tuples of fields, where a NaN is equal to itself (the same object).
    """
    if dataclasses.is_dataclass(a) and type(a) is type(b):
        names = [f.name for f in dataclasses.fields(a) if f.compare]
        return all(_same(getattr(a, n), getattr(b, n)) for n in names)
    if isinstance(a, (tuple, list)) and type(a) is type(b):
        return len(a) == len(b) and all(map(_same, a, b))
    if isinstance(a, dict) and isinstance(b, dict):
        return a.keys() == b.keys() and all(_same(a[k], b[k]) for k in a)
    if isinstance(a, float) and isinstance(b, float) and math.isnan(a) and math.isnan(b):
        return True
    return bool(a == b)


def test_same_is_equality_with_nan_equal_to_nan():
    nan = float("nan")
    blank = dict(sweep=0, usable=False, kind="x", reason="y", amplitude=nan, onset=nan)
    blank.update(offset=nan, onset_index=-1, offset_index=-1)
    assert _same(StepEpoch(holding=nan, **blank), StepEpoch(holding=float("nan"), **blank))
    assert not _same(StepEpoch(holding=0.0, **blank), StepEpoch(holding=nan, **blank))
    assert not _same(replace(PassiveSettings(), bin_s=1e-3), PassiveSettings())
    assert not _same((1.0, nan), (1.0, 2.0)) and _same({"a": [nan]}, {"a": [nan]})


def test_fit_sweeps_then_summarize_equals_fit_cell():
    """The batch path (measure the sweeps once, summarise with QC's exclusions) gives what
    fit_cell gives."""
    rec = noisy_cell(4)
    fits = fit_sweeps(list(zip(rec.sweeps, epochs(), strict=True)), PassiveSettings())
    assert _same(summarize_cell("c1", fits, PassiveSettings()), fit_cell(rec, epochs=epochs()))


def test_charging_refit_from_a_measurement_equals_a_fresh_fit():
    """fit_sweeps measures each trace once and redoes only the charging fit in its second pass:
    that must equal fitting the sweep afresh with the second pass's settings."""
    from pipeline.fitters.sweep import SweepMeasure, complete_sweep, measure_sweep

    kw = dict(tau=TAU, tau_sag=0.08, kappa=0.5)
    sagging = Sweep(rc_trace(-80e-12, shape=sag_shape, **kw) + bridge(-80e-12, 10e6), None, RATE, 0)
    plain = noisy_cell(5).sweeps[1]
    first = PassiveSettings()
    for sw in (sagging, plain):
        m = measure_sweep(sw, epoch(-80e-12), first)
        assert isinstance(m, SweepMeasure)
        for second in (
            first,
            replace(first, charging_model="exp+sag", fit_start_min_s=0.004),
            replace(first, charging_model="exp"),
            replace(first, charging_model="none"),
        ):
            assert _same(complete_sweep(m, second), fit_sweep(sw, epoch(-80e-12), second))
        with pytest.raises(ValueError, match="beyond the fit"):
            complete_sweep(m, replace(first, bin_s=1e-3))
    # 'auto' on a sagging sweep is the exp+sag fit; on a plain one the exp fit
    m_sag = measure_sweep(sagging, epoch(-80e-12), first)
    m_plain = measure_sweep(plain, epoch(-80e-12), first)
    assert m_sag.sagging and not m_plain.sagging
    assert m_sag.same_charging(first, replace(first, charging_model="exp+sag"))
    assert not m_sag.same_charging(first, replace(first, charging_model="exp"))
    assert m_plain.same_charging(first, replace(first, charging_model="exp"))
    assert not m_plain.same_charging(first, replace(first, fit_start_min_s=0.004))
    # a depolarizing sweep is finished at once
    up = measure_sweep(Sweep(rc_trace(40e-12), None, RATE, 0), epoch(40e-12), first)
    assert complete_sweep(up, first) is up


def test_drift_across_sweeps_is_taken_out_of_the_deflections():
    """A steady 0.5 mV/s baseline drift: 0.5 mV between the baseline and steady-state windows
    of every sweep (5% of a 10 mV deflection) unless corrected."""
    t = np.arange(N) / RATE
    traces = [rc_trace(a) + 0.5e-3 * (3.0 * k + t) for k, a in enumerate(AMPS)]
    plain = PassiveSettings(bridge_correction=False)
    cf = fit_cell(cell(traces), plain, epochs=epochs())
    assert cf.rin_ohm == pytest.approx(RIN, rel=1e-6)
    assert cf.vrest_drift_v == pytest.approx(0.5e-3 * 3.0 * (len(AMPS) - 1), rel=1e-6)
    # at the first baseline window (its centre; the samples sit half an interval earlier)
    assert cf.vrest_v == pytest.approx(VREST + 0.5e-3 * 0.2, abs=1e-7)
    raw = fit_cell(cell(traces), replace(plain, drift_correction=False), epochs=epochs())
    assert raw.rin_ohm < 0.96 * RIN


def test_one_hyperpolarizing_sweep_and_a_slow_membrane():
    """One hyperpolarizing step still gives Rin (no interval); tau longer than the step gives
    a fit or NaN with a reason, never an exception."""
    amps = (-50e-12, 50e-12)
    cf = fit_cell(cell([rc_trace(a) for a in amps], amps), epochs=epochs(amps))
    assert cf.rin_ohm == pytest.approx(RIN, rel=1e-4)
    assert math.isnan(cf.rin_ci_ohm[0])
    slow = [rc_trace(a, tau=2.0) for a in AMPS]  # tau 2 s, step 1 s
    cf_slow = fit_cell(cell(slow), epochs=epochs())
    assert cf_slow.status == "ok"
    assert math.isnan(cf_slow.tau_s) or cf_slow.tau_s > 0.5
    assert "steady state not reached" in cf_slow.sweeps[0].reason


# --------------------------------------------------------------------------- dendrite-dominated


def _stehfest(n: int = 14) -> np.ndarray:
    """Gaver-Stehfest weights (Stehfest 1970, Commun ACM 13:47-49; from memory)."""
    w = np.zeros(n)
    for k in range(1, n + 1):
        for j in range((k + 1) // 2, min(k, n // 2) + 1):
            w[k - 1] += (
                j ** (n // 2)
                * math.factorial(2 * j)
                / (
                    math.factorial(n // 2 - j)
                    * math.factorial(j)
                    * math.factorial(j - 1)
                    * math.factorial(k - j)
                    * math.factorial(2 * j - k)
                )
            )
        w[k - 1] *= (-1) ** (k + n // 2)
    return w


@pytest.mark.parametrize("rho", [0.0, 0.5, 3.0, 20.0])
def test_soma_cylinder_response_inverts_its_laplace_transform(rho):
    from pipeline.fitters.cell import soma_cylinder_response

    # V(s) G_s = 1 / (s ((1 + s tau) + rho sqrt(1 + s tau))): soma plus semi-infinite cylinder,
    # uniform membrane (Rall 1960; Jack, Noble & Tsien 1975; from memory), inverted numerically
    tau, t = 0.02, np.array([1e-4, 5e-4, 2e-3, 1e-2, 4e-2])
    w, ln2 = _stehfest(), math.log(2.0)
    s = np.outer(ln2 / t, np.arange(1, w.size + 1))
    q = np.sqrt(1 + s * tau)
    numeric = ln2 / t * ((1 / (s * (q * q + rho * q))) @ w)
    assert soma_cylinder_response(t, tau, rho) == pytest.approx(numeric, rel=2e-4)
    # steady state 1 / (1 + rho): soma and cylinder conductances in parallel
    assert soma_cylinder_response(np.array([50 * tau]), tau, rho)[0] == pytest.approx(
        1 / (1 + rho), rel=1e-4
    )


def test_cylinder_table_is_the_response_at_every_ratio():
    """The bridge fit tabulates the soma-cylinder shape for all its ratios at once; each row
    must be soma_cylinder_response itself (scaled to 1 at the last sample)."""
    from pipeline.fitters.cell import _RHO_GRID, _cylinder_table, soma_cylinder_response

    assert _RHO_GRID[0] == 0.0 and np.any(np.abs(_RHO_GRID - 1.0) < 1e-4)  # both special cases
    t = 1.5e-4 + np.arange(60) / RATE
    for tau in (0.005, 0.03):
        rows = np.array([soma_cylinder_response(t, tau, rho) for rho in _RHO_GRID])
        np.testing.assert_array_equal(_cylinder_table(t, tau), rows / rows[:, -1:])


def test_soma_cylinder_response_limits():
    from pipeline.fitters.cell import soma_cylinder_response

    tau = 0.02
    t = np.array([1e-3, 5e-3, 2e-2])
    # a lone soma charges as 1 - exp(-t/tau) (Johnston & Wu 1995, ch. 2)
    assert soma_cylinder_response(t, tau, 0.0) == pytest.approx(-np.expm1(-t / tau), rel=1e-12)
    # a cylinder without soma: G_inf V = erf(sqrt(t/tau)) (Rall 1969; Jack, Noble & Tsien 1975),
    # here less the soma's share, ~1/rho once the soma has charged
    rho = 1e4
    got = rho * soma_cylinder_response(t, tau, rho)
    assert got == pytest.approx([math.erf(math.sqrt(x / tau)) for x in t], abs=2 / rho)
    # continuous at the edge, rising as t/tau while the soma charges alone
    early = soma_cylinder_response(np.array([0.0, 1e-11]), tau, 20.0)
    assert early[0] == 0.0 and early[1] == pytest.approx(1e-11 / tau, rel=1e-3)


def ball_and_stick(t: np.ndarray, rho: float, el: float, modes: int = 400) -> np.ndarray:
    """Soma step response of a uniform soma + finite sealed cylinder, in units of 1/G_inf.

    Residues of 1 / (p (eps q^2 + q tanh(L q))), q = sqrt(1 + p), p = s tau, eps = 1/rho: the
    uniform mode exp(-T) and modes exp(-(1 + a_n^2) T) with tan(a_n L) = -eps a_n (the soma
    eigenvalue equation of Rall 1969, Biophys J 9:1483-1508; derived here, t in units of tau).
    """
    from scipy.optimize import brentq

    eps = 1.0 / rho
    roots = []
    for n in range(1, modes + 1):
        lo, hi = (n - 0.5) * math.pi / el, n * math.pi / el
        g = lambda a: math.sin(a * el) + eps * a * math.cos(a * el)  # noqa: E731
        roots.append(brentq(g, lo + 1e-12, hi))
    a2 = np.array(roots) ** 2
    tt = np.clip(t, 0.0, None)[:, None]
    fast = 2 * np.exp(-(1 + a2) * tt) / ((1 + a2) * (eps + el * (1 + eps**2 * a2)))
    return 1 / (eps + math.tanh(el)) - np.exp(-tt[:, 0]) / (eps + el) - fast.sum(axis=1)


def test_ball_and_stick_reference_starts_at_zero():
    # the eigen-expansion must give 0 at the edge and the cable's input conductance at the end
    got = ball_and_stick(np.array([0.0, 200.0]), rho=16.0, el=0.65)
    assert abs(got[0]) < 1e-4 * got[1]
    assert got[1] == pytest.approx(1 / (1 / 16 + math.tanh(0.65)), rel=1e-9)


def dendritic_cell(seed: int, r_err: float, noise: float = 0.15e-3, rho: float = 16.0):
    """A soma on a dendrite of electrotonic length 0.65 carrying 94% of the input conductance
    (rho = 16: like the demo day's dendritic cells), tau 25 ms, Rin 236 Mohm, with white noise
    and a bridge error through a 40 us electrode filter."""
    rng = np.random.default_rng(seed)
    tau, el, rin = 0.025, 0.65, 236e6
    t = np.arange(N) / RATE
    unit = ball_and_stick(np.arange(N) / RATE / tau, rho, el)
    unit = unit / unit[-1]  # response per unit current scaled to Rin at steady state
    on, off = np.zeros(N), np.zeros(N)
    on[ON:], off[OFF:] = unit[: N - ON], unit[: N - OFF]
    traces = []
    for a in AMPS:
        v = VREST + a * rin * (on - off) + bridge(a, r_err, tau_e=40e-6)
        traces.append(v + noise * rng.standard_normal(N))
    del t
    return cell(traces), rin


def test_dendrite_dominated_cell_noiseless_bridge():
    # no polynomial in t follows the sqrt(t) rise back to the edge: the quadratic alone reads
    # ~+6 Mohm of membrane as bridge error here; the soma-cylinder extrapolation gets within 1
    rec, rin = dendritic_cell(0, 11e6, noise=0.0)
    cf = fit_cell(rec, epochs=epochs())
    assert cf.bridge_method == "cable"
    assert cf.bridge_error_ohm == pytest.approx(11e6, abs=1e6)
    assert cf.rin_ohm == pytest.approx(rin, rel=0.005)
    plain = [f.onset_jump_v / f.step_a for f in cf.sweeps]
    assert np.median(plain) > 14e6  # what the quadratic per edge says: the bias fixed above


@pytest.mark.parametrize("seed", [3, 4])
def test_dendrite_dominated_cell_with_noise(seed):
    rec, rin = dendritic_cell(seed, 15e6)
    cf = fit_cell(rec, epochs=epochs())
    # 14 edges of <= 100 pA at 0.15 mV RMS: the pooled extrapolation's SD is ~1.5 Mohm
    assert cf.bridge_error_ohm == pytest.approx(15e6, abs=4e6)
    assert cf.rin_ohm == pytest.approx(rin, rel=0.02)


def test_a_fit_is_not_refitted_on_its_own_window():
    # A least-squares fit on the same bins is its own refit: _refit hands it back rather than
    # fitting again (a third of the sweeps' refits were of that kind).
    from pipeline.fitters import sweep as fitter

    t = np.arange(200) * 1e-4
    y = -0.07 - 5e-3 * (1 - np.exp(-t / 0.01))
    first = fitter.fit_exponential(t[10:150], y[10:150], 0.005)
    assert first.tau == pytest.approx(0.01, rel=1e-9)
    assert fitter._refit(first, t, y, 10, 149) is first
    wider = fitter._refit(first, t, y, 10, 199)
    assert wider is not first and wider.t1 == pytest.approx(t[199])
