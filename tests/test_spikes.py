"""Spike detection and spiking summaries on analytic waveforms with known answers.

Threshold as the dV/dt crossing of 20 mV/ms and width at half the threshold-to-peak amplitude
are *common practice* (see REFERENCES.md, "Spiking"); the expected values below follow from the
waveforms' formulas, not from the code under test.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import brentq

from pipeline.fitters.spikes import (
    SpikeSettings,
    SweepSpiking,
    adaptation_index,
    detect_spikes,
    fit_spiking,
    measure_spiking,
)
from pipeline.recording import Recording, Sweep
from pipeline.steps import StepEpoch

RATE = 50_000.0  # Hz
DT = 1 / RATE
V0 = -0.065  # V, resting level of the synthetic traces
ONSET, OFFSET, END = 0.1, 0.6, 0.8  # s


def epoch(number: int = 0, amp: float = 100e-12, onset=ONSET, offset=OFFSET) -> StepEpoch:
    """A usable step epoch built by hand (the step finder is another module)."""
    return StepEpoch(
        sweep=number,
        usable=True,
        kind="step",
        reason="",
        holding=0.0,
        amplitude=amp,
        onset=onset,
        offset=offset,
        onset_index=int(round(onset * RATE)),
        offset_index=int(round(offset * RATE)),
    )


def sweep(v: np.ndarray, number: int = 0, amp: float = 100e-12) -> Sweep:
    """A sweep with its step current."""
    t = np.arange(v.size) * DT
    i = np.where((t >= ONSET - DT / 2) & (t < OFFSET - DT / 2), amp, 0.0)
    return Sweep(voltage=v, current=i, rate=RATE, number=number)


def flat(level: float = V0) -> np.ndarray:
    """A flat trace of the whole sweep length."""
    return np.full(int(round(END * RATE)), level)


# Piecewise spike (knots on the sample grid): quadratic foot V0 + a*(t-t0)^2/2 for 0.4 ms, linear
# rise at RISE to the peak in 0.4 ms, linear fall at -FALL for 0.9 ms, linear recovery to V0 in 5 ms.
A_FOOT, RISE, FALL = 1e5, 200.0, 100.0  # V/s^2, V/s, V/s


def add_piecewise_spike(v: np.ndarray, t0: float, notch_s: float = 0.0) -> None:
    """Overwrite ``v`` with the piecewise spike starting at ``t0`` (s, on the sample grid).

    ``notch_s`` > 0 inserts a 10 V/s stretch of that length halfway up the upstroke.
    """
    t = np.arange(v.size) * DT - t0
    top = V0 + A_FOOT * (0.4e-3) ** 2 / 2
    mid = top + RISE * 0.2e-3
    knots_t = [0.4e-3, 0.6e-3, 0.6e-3 + notch_s, 0.8e-3 + notch_s, 1.7e-3 + notch_s]
    peak = mid + 10.0 * notch_s + RISE * 0.2e-3
    knots_v = [top, mid, mid + 10.0 * notch_s, peak, peak - FALL * 0.9e-3]
    knots_t.append(knots_t[-1] + 5e-3)
    knots_v.append(V0)
    foot = (t >= 0) & (t < knots_t[0])
    v[foot] = V0 + A_FOOT * t[foot] ** 2 / 2
    rest = (t >= knots_t[0]) & (t <= knots_t[-1])
    v[rest] = np.interp(t[rest], knots_t, knots_v)


def piecewise_truth(t0: float, thr: float = 20.0) -> dict[str, float]:
    """Threshold, peak, width... of the piecewise spike, from its formulas."""
    t_thr = thr / A_FOOT  # dV/dt = a*t reaches thr
    v_thr = V0 + A_FOOT * t_thr**2 / 2
    top = V0 + A_FOOT * (0.4e-3) ** 2 / 2
    peak = top + RISE * 0.4e-3
    half = (v_thr + peak) / 2
    t_up = 0.4e-3 + (half - top) / RISE
    t_down = 0.8e-3 + (peak - half) / FALL
    trough = peak - FALL * 0.9e-3
    return {
        "time_s": t0 + t_thr,
        "threshold_v": v_thr,
        "peak_v": peak,
        "width_s": t_down - t_up,
        "ahp_v": v_thr - trough,
        "ahp_time_s": 1.7e-3 - t_thr,
        "max_rise_v_per_s": RISE,
        "max_fall_v_per_s": -FALL,
    }


def test_piecewise_spike_exact_threshold_width_and_ahp():
    # the quadratic foot makes the Savitzky-Golay dV/dt exact there, so the interpolated
    # crossing is exact; the linear flanks make the half-amplitude crossings exact
    v = flat()
    t0 = 0.2
    add_piecewise_spike(v, t0)
    spikes = detect_spikes(sweep(v), epoch())
    assert len(spikes) == 1
    s = spikes[0]
    for key, expected in piecewise_truth(t0).items():
        assert getattr(s, key) == pytest.approx(expected, rel=1e-6, abs=1e-9), key
    assert s.amplitude_v == pytest.approx(s.peak_v - s.threshold_v)
    assert s.in_step


def test_ahp_cut_by_the_step_end_is_unknown():
    # the last spike of a train, 1.2 ms before the offset: its fall is still going when the
    # step ends and the membrane drops with it. The trough search stopped at the offset and
    # reported a "trough" above threshold (an AHP of -36 mV here) with no note.
    v = flat()
    t0 = OFFSET - 1.2e-3
    add_piecewise_spike(v, t0)
    v[int(round(OFFSET * RATE)) :] -= 0.010  # the step's end: 100 pA off through 100 MOhm
    spikes = detect_spikes(sweep(v), epoch())
    assert len(spikes) == 1 and spikes[0].in_step
    s = spikes[0]
    assert math.isnan(s.ahp_v) and math.isnan(s.ahp_time_s)
    assert "step ended before" in s.note
    # its rise is measured as usual (formulas of the piecewise spike)
    truth = piecewise_truth(t0)
    for key in ("threshold_v", "peak_v"):
        assert getattr(s, key) == pytest.approx(truth[key], rel=1e-6, abs=1e-9), key


def test_threshold_follows_the_setting():
    v = flat()
    add_piecewise_spike(v, 0.2)
    settings = SpikeSettings(dvdt_threshold_v_per_s=30.0)
    s = detect_spikes(sweep(v), epoch(), settings)[0]
    expected = piecewise_truth(0.2, thr=30.0)
    assert s.time_s == pytest.approx(expected["time_s"], abs=1e-9)
    assert s.threshold_v == pytest.approx(expected["threshold_v"], abs=1e-9)


def gaussian_spike(t: np.ndarray, tc: float, amp: float, sigma: float) -> np.ndarray:
    return V0 + amp * np.exp(-((t - tc) ** 2) / (2 * sigma**2))


def test_gaussian_spike_threshold_and_half_width():
    # truth from the analytic derivative: solve dV/dt = 20 V/s on the rising flank (brentq), then
    # the half-amplitude level of a Gaussian is crossed at tc +- sigma*sqrt(2 ln(amp / h))
    tc, amp, sigma = 0.3, 0.09, 3e-4
    t = np.arange(int(round(END * RATE))) * DT
    v = gaussian_spike(t, tc, amp, sigma)

    def slope(x: float) -> float:
        return -amp * (x - tc) / sigma**2 * math.exp(-((x - tc) ** 2) / (2 * sigma**2)) - 20.0

    t_thr = brentq(slope, tc - 10 * sigma, tc - sigma)
    v_thr = float(gaussian_spike(np.array([t_thr]), tc, amp, sigma)[0])
    half = (v_thr + V0 + amp) / 2
    width = 2 * sigma * math.sqrt(2 * math.log(amp / (half - V0)))
    s = detect_spikes(sweep(v), epoch())
    assert len(s) == 1
    assert s[0].time_s == pytest.approx(t_thr, abs=1e-5)  # half a sample
    # the 0.2 ms smoothing window moves the crossing on this steep foot by < half a sample
    assert s[0].threshold_v == pytest.approx(v_thr, abs=2e-4)
    assert s[0].width_s == pytest.approx(width, rel=0.01)
    assert s[0].max_rise_v_per_s == pytest.approx(amp / sigma * math.exp(-0.5), rel=0.01)


def test_notched_upstroke_is_one_spike():
    # halfway up the upstroke dV/dt drops to 10 V/s for 0.3 ms (below threshold) and then rises
    # through the threshold again: still one spike, with the first threshold
    v = flat()
    add_piecewise_spike(v, 0.2, notch_s=0.3e-3)
    s = detect_spikes(sweep(v), epoch())
    assert len(s) == 1
    assert s[0].time_s == pytest.approx(piecewise_truth(0.2)["time_s"], abs=1e-9)
    assert s[0].peak_time_s == pytest.approx(0.2 + 1.1e-3, abs=1e-9)


def test_refractory_guard():
    v = flat()
    add_piecewise_spike(v, 0.2)
    add_piecewise_spike(v, 0.203)  # thresholds 3 ms apart
    assert len(detect_spikes(sweep(v), epoch(), SpikeSettings(refractory_s=1e-3))) == 2
    assert len(detect_spikes(sweep(v), epoch(), SpikeSettings(refractory_s=4e-3))) == 1


def bridge_artefact(v: np.ndarray, jump: float, spike: float, lag: float = 1.6e-4) -> None:
    """Bridge jump while the step is on plus a fast capacitive overshoot (tau 30 us) at each
    edge, ``lag`` s after the edges (a slow electrode and the amplifier filter)."""
    t = np.arange(v.size) * DT - lag
    v[(t >= ONSET) & (t < OFFSET)] += jump
    for edge, sign in ((ONSET, 1.0), (OFFSET, -1.0)):
        after = t >= edge
        v[after] += sign * spike * np.exp(-(t[after] - edge) / 30e-6)


def test_onset_and_offset_artefacts_are_not_spikes():
    v = flat()
    bridge_artefact(v, jump=0.015, spike=0.04)
    assert detect_spikes(sweep(v), epoch()) == []
    # a hyperpolarizing step puts the upward overshoot at the offset
    v_neg = flat()
    bridge_artefact(v_neg, jump=-0.015, spike=-0.06)
    assert detect_spikes(sweep(v_neg, amp=-100e-12), epoch(amp=-100e-12)) == []
    # without the guard the overshoot would pass as a spike: the guard is what rejects it
    assert len(detect_spikes(sweep(v), epoch(), SpikeSettings(edge_guard_s=0.0))) == 1
    no_guard = detect_spikes(
        sweep(v_neg, amp=-100e-12), epoch(amp=-100e-12), SpikeSettings(edge_guard_s=0.0)
    )
    assert len(no_guard) == 1 and not no_guard[0].in_step


def test_spike_right_after_the_artefact_still_counts():
    v = flat()
    bridge_artefact(v, jump=0.01, spike=0.04)
    spike = flat()
    add_piecewise_spike(spike, ONSET + 2e-3)
    v += spike - V0  # the spike rides on the bridge jump
    s = detect_spikes(sweep(v), epoch())
    assert len(s) == 1
    truth = piecewise_truth(ONSET + 2e-3)
    assert s[0].time_s == pytest.approx(truth["time_s"], abs=1e-7)
    assert s[0].threshold_v == pytest.approx(truth["threshold_v"] + 0.01, abs=1e-6)


def test_noise_without_spikes_gives_none():
    rng = np.random.default_rng(7)
    v = flat() + rng.normal(0, 0.3e-3, int(round(END * RATE)))
    t = np.arange(v.size) * DT
    v += np.where((t >= ONSET) & (t < OFFSET), 0.01 * (1 - np.exp(-(t - ONSET) / 0.02)), 0)
    r = measure_spiking(sweep(v), epoch())
    assert r.analysed and r.spike_count == 0 and r.spikes == ()
    assert math.isnan(r.latency_s) and "no spikes" in r.reason


def test_spikes_found_through_moderate_noise():
    rng = np.random.default_rng(11)
    v = flat()
    for k in range(5):
        add_piecewise_spike(v, 0.15 + 0.05 * k)
    v += rng.normal(0, 0.2e-3, v.size)
    r = measure_spiking(sweep(v), epoch())
    assert r.spike_count == 5
    expected = [piecewise_truth(0.15 + 0.05 * k)["time_s"] for k in range(5)]
    np.testing.assert_allclose([s.time_s for s in r.spikes], expected, atol=1e-4)


def test_large_noise_gives_nan_with_reason():
    rng = np.random.default_rng(3)
    v = flat() + rng.normal(0, 3e-3, int(round(END * RATE)))
    r = measure_spiking(sweep(v), epoch())
    assert not r.analysed and math.isnan(r.spike_count) and math.isnan(r.rate_hz)
    assert "noise" in r.reason


def test_depolarization_block_spike_then_plateau():
    v = flat()
    add_piecewise_spike(v, 0.11)
    t = np.arange(v.size) * DT
    # after the spike the membrane settles on a plateau above threshold with small ringing
    late = (t > 0.1117) & (t < OFFSET)
    v[late] = -0.035 + 0.004 * np.exp(-(t[late] - 0.1117) / 0.01) * np.sin(
        2 * np.pi * 80 * (t[late] - 0.1117)
    )
    r = measure_spiking(sweep(v), epoch())
    assert r.spike_count == 1
    assert r.block and math.isnan(r.rate_hz) and "block" in r.reason
    # the same single spike followed by a return below threshold is not block
    v2 = flat()
    add_piecewise_spike(v2, 0.11)
    r2 = measure_spiking(sweep(v2), epoch())
    assert not r2.block and r2.rate_hz == pytest.approx(1 / (OFFSET - ONSET))


def test_plateau_without_repolarization_is_not_a_spike():
    v = flat()
    t = np.arange(v.size) * DT
    rise = (t >= 0.2) & (t < OFFSET)
    v[rise] = V0 + np.minimum((t[rise] - 0.2) * 200.0, 0.09)  # fast rise to +25 mV, stays
    assert detect_spikes(sweep(v), epoch()) == []


def test_nan_run_gives_nan_with_reason():
    v = flat()
    add_piecewise_spike(v, 0.2)
    v[int(0.3 * RATE) : int(0.3 * RATE) + 50] = np.nan
    r = measure_spiking(sweep(v), epoch())
    assert not r.analysed and math.isnan(r.spike_count) and "NaN" in r.reason
    assert detect_spikes(sweep(v), epoch()) == []
    v_late = flat()
    add_piecewise_spike(v_late, 0.2)
    v_late[-10:] = np.nan  # beyond the rebound window: harmless
    assert measure_spiking(sweep(v_late), epoch()).spike_count == 1


def test_rebound_spike_counted_apart():
    v = flat()
    add_piecewise_spike(v, OFFSET + 0.02)
    r = measure_spiking(sweep(v, amp=-100e-12), epoch(amp=-100e-12))
    assert r.spike_count == 0 and r.rebound_spike_count == 1
    assert not r.spikes[0].in_step


def test_latency_isis_and_adaptation():
    starts = [0.12, 0.14, 0.17, 0.21, 0.26]  # ISIs 20, 30, 40, 50 ms
    v = flat()
    for t0 in starts:
        add_piecewise_spike(v, t0)
    r = measure_spiking(sweep(v), epoch())
    assert r.spike_count == 5
    assert r.latency_s == pytest.approx(0.02 + 2e-4, abs=1e-8)
    np.testing.assert_allclose(r.isis_s, np.diff(starts), atol=1e-8)
    expected = np.mean([10 / 50, 10 / 70, 10 / 90])  # (isi[n+1]-isi[n])/(isi[n+1]+isi[n])
    assert r.adaptation_index == pytest.approx(expected, rel=1e-6)
    assert adaptation_index([0.01, 0.01, 0.01]) == 0.0
    assert math.isnan(adaptation_index([0.01]))


def cell(amps_pa, counts, block_at=None) -> tuple[Recording, list[StepEpoch]]:
    """Synthetic cell: sweep k gets ``counts[k]`` evenly spread spikes in its 0.5 s step."""
    sweeps, epochs = [], []
    for k, (amp_pa, n) in enumerate(zip(amps_pa, counts, strict=True)):
        v = flat()
        for j in range(n):
            add_piecewise_spike(v, round((ONSET + 0.01 + j * 0.45 / max(n, 1)) / DT) * DT)
        if k == block_at:
            v = flat()
            add_piecewise_spike(v, 0.11)
            v[int(0.1117 * RATE) : int(OFFSET * RATE)] = -0.03
        sweeps.append(sweep(v, number=k + 1, amp=amp_pa * 1e-12))
        epochs.append(epoch(k + 1, amp_pa * 1e-12))
    return Recording("c1", "c1.nwb", "e0", tuple(sweeps)), epochs


def test_cell_rheobase_fi_slope_and_block():
    amps = [-40, -20, 20, 40, 60, 80, 100, 120, 140]
    counts = [0, 0, 0, 0, 2, 4, 6, 8, 0]  # 4 Hz more per 20 pA: 0.2 Hz/pA = 200 Hz/nA
    rec, eps = cell(amps, counts, block_at=8)
    fit = fit_spiking(rec, eps)
    assert fit.status == "ok"
    assert fit.rheobase_a == pytest.approx(60e-12) and fit.rheobase_sweep == 5
    assert fit.subthreshold_max_a == pytest.approx(40e-12)
    assert fit.step_resolution_a == pytest.approx(20e-12)
    assert fit.fi_slope_hz_per_a == pytest.approx(0.2e12, rel=1e-9)
    assert fit.fi_sweeps == (5, 6, 7, 8)
    assert fit.block_step_a == pytest.approx(140e-12)
    assert fit.max_rate_hz == pytest.approx(16.0)
    row = fit.cell_row()
    assert row["rheobase_pa"] == pytest.approx(60) and row["fi_slope_hz_per_na"] == pytest.approx(
        200
    )
    assert row["first_spike_threshold_mv"] == pytest.approx(piecewise_truth(0)["threshold_v"] * 1e3)
    assert row["spiking_status"] == "ok"
    sweeps = fit.sweep_rows()
    assert [r["sweep"] for r in sweeps] == list(range(1, 10))
    assert sweeps[8]["depolarization_block"] and math.isnan(sweeps[8]["spike_rate_hz"])
    spikes = fit.spike_rows()
    assert len(spikes) == sum(counts) + 1
    assert set(spikes[0]) == {
        "sweep",
        "spike",
        "time_ms",
        "threshold_mv",
        "peak_mv",
        "amplitude_mv",
        "width_ms",
        "ahp_mv",
        "ahp_time_ms",
        "max_rise_v_per_s",
        "max_fall_v_per_s",
        "in_step",
        "spike_note",
    }


def test_fi_stops_at_saturation_and_excluded_sweeps_are_left_out():
    amps = [20, 40, 60, 80, 100, 120]
    counts = [0, 2, 4, 6, 4, 8]  # the rate falls at 100 pA: the linear part ends there
    rec, eps = cell(amps, counts)
    fit = fit_spiking(rec, eps)
    assert fit.fi_sweeps == (2, 3, 4)
    assert fit.fi_slope_hz_per_a == pytest.approx(0.2e12)
    fit_ex = fit_spiking(rec, eps, exclude={2: "baseline drift"})
    assert fit_ex.rheobase_a == pytest.approx(60e-12)
    assert fit_ex.subthreshold_max_a == pytest.approx(20e-12)  # the 20 pA step is silent
    row = next(r for r in fit_ex.sweep_rows() if r["sweep"] == 2)
    assert math.isnan(row["spike_count"]) and "baseline drift" in row["spiking_reason"]
    assert fit_ex.excluded == {2: "baseline drift"}


def test_first_spike_values_left_empty_at_rheobase_say_why():
    # the rheobase sweep's only spike has its foot in the edge guard: its threshold, and the
    # amplitude and width measured from it, are unknown. The cell row's first-spike columns are
    # then empty, and its spiking_reason says why (it used to say nothing).
    rec, eps = cell([20, 40, 60], [0, 2, 4])
    v = flat()
    add_piecewise_spike(v, ONSET - 0.2e-3)  # crosses 20 V/s at the onset sample
    sweeps = (rec.sweeps[0], sweep(v, number=2, amp=40e-12), rec.sweeps[2])
    fit = fit_spiking(Recording("c1", "c1.nwb", "e0", sweeps), eps)
    assert fit.rheobase_sweep == 2
    row = fit.cell_row()
    assert math.isnan(row["first_spike_threshold_mv"]) and math.isnan(row["first_spike_width_ms"])
    assert "first spike at rheobase (sweep 2): " in row["spiking_reason"]
    assert "threshold unknown" in row["spiking_reason"]
    # a measured first spike adds nothing
    assert "first spike" not in fit_spiking(rec, eps).cell_row()["spiking_reason"]


def test_cell_without_spikes_or_depolarizing_steps():
    rec, eps = cell([20, 40, 60], [0, 0, 0])
    fit = fit_spiking(rec, eps)
    assert math.isnan(fit.rheobase_a) and fit.rheobase_sweep is None
    assert fit.status.startswith("no spikes in 3 depolarizing sweeps")
    assert fit.cell_row()["max_rate_hz"] == 0.0
    rec, eps = cell([-60, -40, -20], [0, 0, 0])
    fit = fit_spiking(rec, eps)
    assert fit.status == "no usable depolarizing sweeps"
    assert math.isnan(fit.cell_row()["first_spike_width_ms"])
    assert fit_spiking(Recording("c0", "c0.nwb", "e0", ()), []).status == (
        "no usable depolarizing sweeps"
    )


def test_rheobase_at_smallest_step_is_only_an_upper_bound():
    rec, eps = cell([20, 40, 60], [2, 4, 6])
    fit = fit_spiking(rec, eps)
    assert fit.rheobase_a == pytest.approx(20e-12)
    assert math.isnan(fit.subthreshold_max_a) and "smallest" in fit.reason


def test_bad_epochs_and_slow_sampling_give_reasons():
    v = flat()
    bad = StepEpoch(0, False, "ramp", "current is a ramp", 0.0, 1e-10, 0.1, 0.6, 5000, 30000)
    assert measure_spiking(sweep(v), bad).reason == "current is a ramp"
    slow = Sweep(voltage=v[::25], current=None, rate=RATE / 25, number=0)
    r = measure_spiking(slow, epoch())
    assert not r.analysed and "sampling rate" in r.reason
    outside = epoch(onset=0.1, offset=2.0)
    assert "outside the sweep" in measure_spiking(sweep(v), outside).reason


@pytest.mark.parametrize(
    ("field", "value"),
    [
        ("dvdt_threshold_v_per_s", 0.0),
        ("refractory_s", -1e-3),
        ("min_peak_v", math.nan),
        ("fi_min_sweeps", 1),
        ("adaptation_min_spikes", 2.5),
    ],
)
def test_settings_validation_names_the_field(field, value):
    with pytest.raises(ValueError, match=rf"^{field} must be"):
        SpikeSettings(**{field: value})


def test_spike_rising_out_of_a_large_step_uses_the_knee():
    # a step with I/C = 40 V/s (twice the threshold) charging with tau = 2 ms: dV/dt stays above
    # 20 V/s from the edge into the spike, so there is no crossing; the threshold is the dV/dt
    # minimum before the upstroke, where the spike's foot starts
    t = np.arange(int(round(END * RATE))) * DT
    on = t >= ONSET
    v = flat()
    v[on] += 40.0 * 2e-3 * (1 - np.exp(-(t[on] - ONSET) / 2e-3))
    spike = flat()
    t0 = ONSET + 1e-3
    add_piecewise_spike(spike, t0)
    v += spike - V0
    s = detect_spikes(sweep(v), epoch())
    assert len(s) == 1 and "knee" in s[0].note
    assert s[0].time_s == pytest.approx(t0, abs=1e-4)
    # the smoothing window (0.2 ms) lets the minimum lead the foot by up to half a window,
    # at 24 V/s about 2.4 mV
    assert s[0].threshold_v == pytest.approx(np.interp(t0, t, v), abs=2.5e-3)
    assert math.isfinite(s[0].width_s)


def test_spike_whose_foot_lies_in_the_guard_counts_without_threshold():
    v = flat()
    add_piecewise_spike(v, ONSET - 0.2e-3)  # crosses 20 V/s exactly at the onset sample
    r = measure_spiking(sweep(v), epoch())
    assert r.spike_count == 1
    s = r.spikes[0]
    assert "threshold unknown" in s.note
    assert math.isnan(s.threshold_v) and math.isnan(s.width_s) and math.isnan(s.amplitude_v)
    assert s.peak_v == pytest.approx(piecewise_truth(0)["peak_v"])


@pytest.mark.parametrize("seed", range(8))
def test_random_trains_found_exactly(seed):
    rng = np.random.default_rng(seed)
    starts, t = [], ONSET + rng.uniform(2e-3, 30e-3)
    while t < OFFSET - 10e-3:
        starts.append(round(t / DT) * DT)
        t += rng.uniform(3e-3, 60e-3)  # ISIs longer than the 1.7 ms spike plus 1 ms guard
    v = flat()
    for t0 in starts:
        add_piecewise_spike(v, t0)
    v += rng.normal(0, rng.uniform(0.05e-3, 0.3e-3), v.size)
    r = measure_spiking(sweep(v), epoch())
    assert r.spike_count == len(starts)
    expected = [piecewise_truth(t0)["time_s"] for t0 in starts]
    np.testing.assert_allclose([s.time_s for s in r.spikes], expected, atol=5e-5)
    np.testing.assert_allclose(
        [s.width_s for s in r.spikes], piecewise_truth(0)["width_s"], rtol=0.02
    )


def test_block_without_spikes_is_judged_against_the_rheobase_threshold():
    rec, eps = cell([20, 40, 60, 80], [0, 2, 4, 0])
    v = flat()
    v[int(ONSET * RATE) : int(OFFSET * RATE)] = -0.03  # held far above threshold, silent
    sweeps = (*rec.sweeps[:3], sweep(v, number=4, amp=80e-12))
    fit = fit_spiking(Recording("c1", "c1.nwb", "e0", sweeps), eps)
    last = fit.sweeps[-1]
    assert last.block and math.isnan(last.rate_hz) and "block" in last.reason
    assert fit.block_step_a == pytest.approx(80e-12)
    # alone, the silent sweep has no threshold of its own to compare with
    alone = measure_spiking(sweeps[3], eps[3])
    assert not alone.block and alone.rate_hz == 0.0
    ref = piecewise_truth(0)["threshold_v"]
    assert measure_spiking(sweeps[3], eps[3], block_threshold_v=ref).block


def test_cell_survives_a_nan_sweep_and_a_noisy_sweep():
    rec, eps = cell([20, 40, 60, 80, 100], [0, 2, 4, 6, 8])
    bad = rec.sweeps[2].voltage.copy()
    bad[int(0.2 * RATE)] = np.nan
    noisy = rec.sweeps[3].voltage + np.random.default_rng(5).normal(0, 3e-3, bad.size)
    sweeps = list(rec.sweeps)
    sweeps[2] = sweep(bad, number=3, amp=60e-12)
    sweeps[3] = sweep(noisy, number=4, amp=80e-12)
    fit = fit_spiking(Recording("c1", "c1.nwb", "e0", tuple(sweeps)), eps)
    rows = {r["sweep"]: r for r in fit.sweep_rows()}
    assert "NaN" in rows[3]["spiking_reason"] and math.isnan(rows[3]["spike_count"])
    assert "noise" in rows[4]["spiking_reason"] and math.isnan(rows[4]["spike_rate_hz"])
    assert fit.rheobase_a == pytest.approx(40e-12)
    assert fit.fi_sweeps == (2, 5)  # the unreadable sweeps are not f-I points


def test_repeated_steps_do_not_end_the_fi_line():
    # two sweeps at 60 pA with 4 and 2 spikes: repeats of one step do not mean saturation
    rec, eps = cell([40, 60, 60, 80, 100], [0, 4, 2, 6, 8])
    fit = fit_spiking(rec, eps)
    assert fit.fi_sweeps == (2, 3, 4, 5)
    expected = np.polyfit([60, 60, 80, 100], [8, 4, 12, 16], 1)[0] * 1e12  # Hz/A
    assert fit.fi_slope_hz_per_a == pytest.approx(expected)
    assert fit.step_resolution_a == pytest.approx(20e-12)


def test_slow_adapting_train_is_not_block():
    # ISIs 40, 80, 160 ms; after the last spike the membrane sits 2 mV above the first spike's
    # threshold for about 200 ms: longer than block_min_s, shorter than twice the last ISI
    thr = piecewise_truth(0)["threshold_v"]

    def train(starts: list[float]) -> SweepSpiking:
        v = flat()
        for t0 in starts:
            add_piecewise_spike(v, t0)
        v[int(round((starts[-1] + 0.01) * RATE)) : int(round(OFFSET * RATE))] = thr + 0.002
        return measure_spiking(sweep(v), epoch())

    slow = train([0.11, 0.15, 0.23, 0.39])
    assert not slow.block and slow.rate_hz == pytest.approx(4 / 0.5)
    # the same silence after a fast burst (ISIs 10 ms) is block
    fast = train([0.11, 0.12, 0.13, 0.14])
    assert fast.block and math.isnan(fast.rate_hz)


# ---------------------------------------------------------------- numpy stand-ins for scipy
# The detector uses small numpy versions of three scipy functions (importing scipy.signal,
# scipy.ndimage and scipy.stats costs ~1 s per worker process); scipy is the reference here.


def _traces(rng: np.random.Generator, n: int) -> list[np.ndarray]:
    """Random walks near rest, white noise, a constant, a quadratic and a step."""
    t = np.arange(n) * DT
    return [
        V0 + np.cumsum(rng.normal(0.0, 2e-4, n)),
        rng.normal(0.0, 1.0, n),
        np.full(n, V0),
        V0 + 3e4 * (t - t[n // 2]) ** 2,
        np.where(np.arange(n) < n // 2, V0, V0 + 0.02),
    ]


@pytest.mark.parametrize(
    ("n", "window", "order"),
    [(4000, 5, 2), (4000, 11, 2), (500, 9, 3), (200, 3, 1), (5, 5, 2), (7, 5, 2), (3, 3, 2)],
)
def test_savgol_derivative_matches_scipy(n, window, order):
    # scipy.signal.savgol_filter documents mode='interp' (its default): a least-squares
    # polynomial of degree polyorder through each window, and for the window_length // 2
    # samples at either end the polynomial fitted to the first or last window_length samples
    from scipy.signal import savgol_filter

    from pipeline.fitters.spikes import savgol_derivative

    rng = np.random.default_rng(n + window + order)
    for v in _traces(rng, n):
        got = savgol_derivative(v, window, order, DT)
        want = savgol_filter(v, window, order, deriv=1, delta=DT)
        # rounding: a few ulps of the samples' size per sample interval
        np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-12 * np.abs(v).max() / DT)


def test_savgol_derivative_is_exact_on_a_quadratic():
    from pipeline.fitters.spikes import savgol_derivative

    t = np.arange(50) * DT
    v = V0 + 2.0 * t + 3e4 * t**2
    np.testing.assert_allclose(savgol_derivative(v, 7, 2, DT), 2.0 + 6e4 * t, rtol=1e-9)


@pytest.mark.parametrize(("n", "size"), [(3000, 250), (3000, 1), (3000, 2), (40, 100), (1, 3)])
def test_max_ahead_matches_scipy(n, size):
    # scipy.ndimage.maximum_filter1d with origin=-(size // 2) puts the window at [i, i + size)
    # (origin shifts it; scipy.ndimage docs), mode='nearest' repeats the last sample past the end
    from scipy.ndimage import maximum_filter1d

    from pipeline.fitters.spikes import max_ahead

    rng = np.random.default_rng(n + size)
    for v in [*_traces(rng, n), np.round(rng.normal(0, 1, n))]:  # rounded: ties
        at = np.unique(np.concatenate(([0, n - 1], rng.integers(0, n, 300))))
        want = maximum_filter1d(v, size=size, origin=-(size // 2), mode="nearest")[at]
        np.testing.assert_array_equal(max_ahead(v, at, size), want)
    assert max_ahead(np.ones(5), np.array([], dtype=int), 3).size == 0


@pytest.mark.parametrize(
    ("x", "y"),
    [
        ([40e-12, 60e-12, 80e-12, 100e-12], [4.0, 9.0, 12.0, 17.0]),  # f-I like scales
        ([1.0, 2.0], [3.0, -1.0]),  # two points
        ([1.0, 2.0, 3.0], [5.0, 5.0, 5.0]),  # flat
        ([0.0, 1.0, 1.0, 2.0], [0.0, 2.0, 2.0, 4.0]),  # exact line with a repeat
        ([1e6 + 1, 1e6 + 2, 1e6 + 4], [1.0, 2.0, 3.5]),  # far from the origin
    ],
)
def test_least_squares_line_matches_scipy(x, y):
    # scipy.stats.linregress: slope = ssxym / ssxm from np.cov(x, y, bias=1),
    # intercept = mean(y) - slope * mean(x)
    from scipy.stats import linregress

    from pipeline.fitters.spikes import least_squares_line

    want = linregress(x, y)
    slope, intercept = least_squares_line(x, y)
    assert slope == pytest.approx(want.slope, rel=1e-12)
    assert intercept == pytest.approx(want.intercept, rel=1e-12, abs=1e-12 * max(map(abs, y)))


def test_least_squares_line_matches_scipy_on_random_points():
    from scipy.stats import linregress

    from pipeline.fitters.spikes import least_squares_line

    rng = np.random.default_rng(3)
    for n in range(2, 30):
        x, y = rng.normal(0, 1e-10, n), rng.normal(20, 5, n)
        want = linregress(x, y)
        slope, intercept = least_squares_line(x, y)
        assert slope == pytest.approx(want.slope, rel=1e-12)
        assert intercept == pytest.approx(want.intercept, rel=1e-12)


def test_spiking_imports_no_scipy_signal_ndimage_or_stats():
    # each of these costs 0.3-1 s per worker process; a fresh interpreter shows what is loaded
    import subprocess
    import sys

    code = (
        "import sys, numpy as np\n"
        "from pipeline.fitters.spikes import fit_spiking\n"
        "from pipeline.recording import Recording, Sweep\n"
        "from pipeline.steps import StepEpoch\n"
        "rate, v = 50000.0, np.full(40000, -0.065)\n"
        "t = np.arange(v.size) / rate\n"
        "for t0 in (0.2, 0.3, 0.4):\n"
        "    v += 0.1 * np.exp(-((t - t0) ** 2) / (2 * 3e-4 ** 2))\n"
        "fit = None\n"
        "sweeps, eps = [], []\n"
        "for k, amp in enumerate((20e-12, 40e-12, 60e-12)):\n"
        "    sweeps.append(Sweep(voltage=v.copy(), current=None, rate=rate, number=k))\n"
        "    eps.append(StepEpoch(k, True, 'step', '', 0.0, amp, 0.1, 0.6, 5000, 30000))\n"
        "fit = fit_spiking(Recording('c', 'c.nwb', 'e0', tuple(sweeps)), eps)\n"
        "assert fit.first_spike is not None and len(fit.fi_sweeps) == 3, fit\n"
        "print(sorted(m for m in ('scipy.signal', 'scipy.ndimage', 'scipy.stats')"
        " if m in sys.modules))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"


def test_gradient_on_a_span_equals_numpy_gradient():
    from pipeline.fitters.spikes import _gradient

    rng = np.random.default_rng(8)
    for n in (2, 3, 50):
        v = rng.normal(V0, 0.01, n)
        full = np.gradient(v, DT)
        for a in range(n):
            for b in range(a + 1, n + 1):
                np.testing.assert_array_equal(_gradient(v, a, b, DT), full[a:b])


def test_median_equals_numpy_median():
    from pipeline.fitters.spikes import _median

    rng = np.random.default_rng(9)
    for n in range(1, 60):
        for x in (rng.normal(size=n), np.round(rng.normal(size=n)), np.full(n, V0)):
            assert _median(x) == np.median(x)
