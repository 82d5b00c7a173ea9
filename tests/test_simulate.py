"""The cell simulator against analytic results, its own linearised truth, and its nuisances.
Every random draw is seeded."""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest

from pipeline import simulate as sm
from pipeline.steps import StepSettings, find_steps

RATE = 20_000.0
SHORT = sm.StepProtocol(sweep_s=0.5, onset_s=0.1, step_s=0.3, amplitudes_a=(-50e-12, 30e-12))
CLEAN = sm.Nuisance()
BALL_STICK = sm.CellModel(
    soma_diameter_m=20e-6,
    rm_ohm_m2=2.0,
    cm_f_per_m2=0.009,
    dendrite=sm.Dendrite(length_m=800e-6, diameter_m=1.5e-6, ri_ohm_m=1.5, n_compartments=100),
)
IH_CELL = sm.CellModel(ih=sm.IhChannel(g_s_per_m2=2.0, tau_s=0.12))
SPIKING = sm.CellModel(dendrite=sm.Dendrite(), ih=sm.IhChannel(), spiking=sm.SpikingChannels())


def _voltages(rec) -> np.ndarray:
    return np.array([s.voltage for s in rec.sweeps])


def test_single_compartment_is_the_rc_charging_curve() -> None:
    cell = sm.CellModel(soma_diameter_m=25e-6, rm_ohm_m2=1.5, cm_f_per_m2=0.01, e_leak_v=-0.072)
    rec = sm.simulate_cell(cell, SHORT, CLEAN, seed=0, cell_id="rc")
    area = math.pi * 25e-6**2
    r_in, tau = 1.5 / area, 1.5 * 0.01
    t = np.arange(SHORT.n_samples) / RATE
    on, off = SHORT.onset_index, SHORT.offset_index
    for amp, v in zip(SHORT.amplitudes_a, _voltages(rec), strict=True):
        # V(t) = V_inf + (V0 - V_inf) exp(-t / tau), tau = Rm Cm (Johnston & Wu 1995, ch. 2)
        v_inf = -0.072 + amp * r_in
        expected = v_inf + (-0.072 - v_inf) * np.exp(-(t[on:off] - t[on]) / tau)
        assert np.allclose(v[on:off], expected, rtol=1e-6, atol=0)
        assert np.all(v[:on] == pytest.approx(-0.072, abs=1e-15))
    truth = sm.true_properties(cell)
    assert truth["rin_ohm"] == pytest.approx(r_in, rel=1e-12)
    assert truth["tau0_s"] == pytest.approx(tau, rel=1e-12)
    assert truth["cm_total_f"] == pytest.approx(0.01 * area, rel=1e-12)
    assert math.isnan(truth["tau1_s"])


def test_time_loop_matches_exact_solution_for_a_passive_cell() -> None:
    # The stepping used for cells with ion currents is exact for linear ones (round-off only).
    assert (
        np.abs(sm._integrate(BALL_STICK, SHORT) - sm._passive_voltage(BALL_STICK, SHORT)).max()
        < 1e-12
    )


def test_ball_and_stick_truth_against_rall() -> None:
    cell = BALL_STICK
    den = cell.dendrite
    truth = sm.true_properties(cell)
    # Rall 1959 (Johnston & Wu 1995, ch. 4): sealed-end cylinder G_in = G_inf tanh(L),
    # G_inf = (pi/2) d^(3/2) / sqrt(Rm Ri), L = length / sqrt(Rm d / (4 Ri)); ball-and-stick
    # G_N = G_soma + G_cable.
    lam = math.sqrt(cell.rm_ohm_m2 * den.diameter_m / (4 * den.ri_ohm_m))
    big_l = den.length_m / lam
    g_inf = math.pi / 2 * den.diameter_m**1.5 / math.sqrt(cell.rm_ohm_m2 * den.ri_ohm_m)
    g_n = cell.soma_area / cell.rm_ohm_m2 + g_inf * math.tanh(big_l)
    # Discretisation error of the compartments (nodes at their centres): about (L/N)^2 / 12
    # relative, 1.6e-5 here; we allow 5e-5.
    assert truth["rin_ohm"] * g_n == pytest.approx(1.0, abs=5e-5)
    assert truth["dendrite_l"] == pytest.approx(big_l, rel=1e-12)
    # Rall 1969: with uniform Rm and Cm the slowest time constant is tau_m = Rm Cm, exactly
    # (the uniform mode has no axial current), whatever the discretisation.
    assert truth["tau0_s"] == pytest.approx(cell.rm_ohm_m2 * cell.cm_f_per_m2, rel=1e-9)
    assert truth["tau1_s"] < truth["tau0_s"] / 5
    # The simulated steady state agrees with the truth it reports.
    long = sm.StepProtocol(sweep_s=0.6, onset_s=0.05, step_s=0.5, amplitudes_a=(-20e-12,))
    v = _voltages(sm.simulate_cell(cell, long, CLEAN, seed=0, cell_id="bs"))[0]
    dv = v[long.offset_index - 1] - v[0]  # 27 tau after onset
    assert dv / -20e-12 == pytest.approx(truth["rin_ohm"], rel=1e-9)


def test_cylinder_equalizing_time_constant_against_rall() -> None:
    # A cylinder with a negligible soma: tau1 = tau0 / (1 + (pi / L)^2) (Rall 1969).
    # Discretisation error about (pi/N)^2 / 12 relative (8e-5 at N = 100); we allow 2e-4.
    cell = sm.CellModel(
        soma_area_m2=1e-16,
        dendrite=sm.Dendrite(length_m=1000e-6, diameter_m=2e-6, n_compartments=100),
    )
    truth = sm.true_properties(cell)
    tau_m = cell.rm_ohm_m2 * cell.cm_f_per_m2
    expected = tau_m / (1 + (math.pi / truth["dendrite_l"]) ** 2)
    assert truth["tau1_s"] == pytest.approx(expected, rel=2e-4)
    # ... so L is recovered from the two time constants: L = pi / sqrt(tau0 / tau1 - 1).
    recovered = math.pi / math.sqrt(truth["tau0_s"] / truth["tau1_s"] - 1)
    assert recovered == pytest.approx(truth["dendrite_l"], rel=2e-4)


def test_ih_cell_sag_rebound_and_linearised_truth() -> None:
    truth = sm.true_properties(IH_CELL)
    # Ih (reversal -30 mV) is partly open at rest, so the rest sits above E_leak
    # (parallel conductance equation, Vm = sum g_i E_i / sum g_i).
    g_leak = IH_CELL.soma_area / IH_CELL.rm_ohm_m2
    g_h = truth["ih_g_rest_s"]
    assert truth["vrest_v"] == pytest.approx(
        (g_leak * -0.070 + g_h * -0.030) / (g_leak + g_h), abs=1e-9
    )
    assert truth["rin_ohm"] < truth["rin_instant_ohm"]
    small = sm.StepProtocol(
        sweep_s=2.0, onset_s=0.1, step_s=1.5, amplitudes_a=(-2e-12, 2e-12, -80e-12)
    )
    v = _voltages(sm.simulate_cell(IH_CELL, small, CLEAN, seed=0, cell_id="ih"))
    off = small.offset_index
    base = v[:, 0]
    assert base == pytest.approx(truth["vrest_v"], abs=1e-12)
    # Small steps: steady-state slope resistance of the linearised model (gates follow V).
    r_ss = (v[1, off - 1] - v[0, off - 1]) / 4e-12
    assert r_ss == pytest.approx(truth["rin_ohm"], rel=2e-3)
    # Sag: the deflection peaks and relaxes; for a small step the ratio approaches
    # 1 - Rin / R_peak from below (tau_r = 120 ms is only 8 tau0 here).
    peak = v[0, :off].min()
    sag = (peak - v[0, off - 1]) / (peak - base[0])
    assert 0.8 * truth["sag_ratio_small_step"] < sag <= truth["sag_ratio_small_step"]
    # A large hyperpolarizing step: clear sag and a rebound above rest after the offset.
    big = v[2]
    assert big[:off].min() < big[off - 1] - 0.005
    assert big[off:].max() > base[2] + 0.002


def test_spiking_cell_fires_on_depolarizing_steps_with_adaptation() -> None:
    proto = sm.StepProtocol(
        sweep_s=1.0, onset_s=0.1, step_s=0.8, amplitudes_a=(-100e-12, 20e-12, 100e-12, 200e-12)
    )
    v = _voltages(sm.simulate_cell(SPIKING, proto, CLEAN, seed=0, cell_id="sp"))
    ups = [np.flatnonzero((row[1:] > 0.0) & (row[:-1] <= 0.0)) for row in v]
    counts = [len(u) for u in ups]
    assert counts[0] == 0 and counts[1] == 0  # -100 pA, +20 pA: below threshold
    assert 0 < counts[2] < counts[3]  # rate grows with current
    isi = np.diff(ups[3])
    assert isi[-1] > 1.2 * isi[0]  # slow K: the rate adapts
    assert v.max() < SPIKING.spiking.e_na_v
    # One sample per step is accurate enough: against four substeps per sample, spike counts
    # agree within one and the first spike within 0.2 ms; below threshold within microvolts.
    fine = sm._integrate(SPIKING, replace(proto, rate_hz=4 * proto.rate_hz))[:, ::4]
    fine_ups = [np.flatnonzero((r[1:] > 0.0) & (r[:-1] <= 0.0)) for r in fine]
    assert all(abs(len(f) - c) <= 1 for f, c in zip(fine_ups, counts, strict=True))
    assert abs(fine_ups[2][0] - ups[2][0]) <= 4 and abs(fine_ups[3][0] - ups[3][0]) <= 4
    assert np.abs(fine[0] - v[0]).max() < 2e-5


def test_nuisances_have_the_size_and_frequency_asked_for() -> None:
    cell = sm.CellModel()
    proto = sm.StepProtocol(sweep_s=1.0, onset_s=0.2, step_s=0.6, amplitudes_a=(0.0, -100e-12))
    clean = _voltages(sm.simulate_cell(cell, proto, CLEAN, seed=3, cell_id="c"))
    for noise, hum, hz in ((0.3e-3, 0.0, 50.0), (0.0, 0.2e-3, 60.0)):
        nuis = sm.Nuisance(noise_rms_v=noise, hum_rms_v=hum, hum_hz=hz)
        extra = _voltages(sm.simulate_cell(cell, proto, nuis, seed=3, cell_id="c")) - clean
        rms = np.sqrt(np.mean(extra**2))
        assert rms == pytest.approx(noise or hum, rel=0.02)
        if hum:
            spectrum = np.abs(np.fft.rfft(extra[0]))
            freqs = np.fft.rfftfreq(extra.shape[1], 1 / RATE)
            assert freqs[np.argmax(spectrum)] == pytest.approx(hz, abs=1.0)


def test_bridge_error_drift_offset_and_current() -> None:
    cell = sm.CellModel()
    proto = sm.StepProtocol(
        sweep_s=1.0, onset_s=0.2, step_s=0.6, amplitudes_a=(-100e-12, 50e-12), interval_s=4.0
    )
    nuis = sm.Nuisance(
        bridge_error_ohm=15e6,
        electrode_tau_s=40e-6,
        drift_v_per_s=1e-4,
        offset_v=0.004,
        current_noise_a=3e-12,
        current_tau_s=20e-6,
    )
    clean = _voltages(sm.simulate_cell(cell, proto, CLEAN, seed=5, cell_id="c"))
    rec = sm.simulate_cell(cell, proto, nuis, seed=5, cell_id="c", source_file="c.nwb")
    extra = _voltages(rec) - clean
    t_abs = (
        np.array([s.start_time for s in rec.sweeps])[:, None] + np.arange(proto.n_samples) / RATE
    )
    amps = np.array(proto.amplitudes_a)[:, None]
    on = proto.onset_index
    filt = np.zeros_like(t_abs)
    filt[:, on : proto.offset_index] = -np.expm1(
        -(np.arange(proto.offset_index - on)) / RATE / 40e-6
    )
    filt[:, proto.offset_index :] = np.exp(
        -(np.arange(proto.n_samples - proto.offset_index)) / RATE / 40e-6
    ) - np.exp(-(np.arange(proto.offset_index, proto.n_samples) - on) / RATE / 40e-6)
    expected = 0.004 + 1e-4 * t_abs + 15e6 * amps * filt  # V_rec = V_m + R_err I_filtered + ...
    assert np.abs(extra - expected).max() < 1e-12
    assert rec.sweeps[1].start_time == 4.0 and rec.source_file == "c.nwb"
    current = np.array([s.current for s in rec.sweeps])
    residual = current - proto.injected()
    assert np.std(residual[:, :on]) == pytest.approx(3e-12, rel=0.05)
    epochs = find_steps(rec, StepSettings())
    assert all(e.usable for e in epochs)
    assert all(abs(e.onset_index - on) <= 1 for e in epochs)
    assert [round(e.amplitude * 1e12) for e in epochs] == [-100, 50]


def test_clipping_nan_runs_and_no_current() -> None:
    cell = sm.CellModel()
    nuis = sm.Nuisance(clip_v=(-0.09, 0.0), nan_run_s=0.01, store_current=False)
    rec = sm.simulate_cell(cell, SHORT, nuis, seed=9, cell_id="c")
    v = _voltages(rec)
    assert np.nanmin(v) == -0.09  # -50 pA through 764 Mohm would reach -108 mV
    assert (np.isnan(v).sum(axis=1) == round(0.01 * RATE)).all()
    assert all(s.current is None for s in rec.sweeps)


def test_seeds_give_identical_output() -> None:
    nuis = sm.Nuisance(noise_rms_v=0.2e-3, hum_rms_v=0.1e-3, current_noise_a=2e-12, nan_run_s=0.002)

    def run(seed: int) -> tuple[np.ndarray, np.ndarray]:
        rec = sm.simulate_cell(IH_CELL, SHORT, nuis, seed=seed, cell_id="s")
        return _voltages(rec), np.array([s.current for s in rec.sweeps])

    (va, ca), (vb, cb), (vc, _) = run(1), run(1), run(2)
    assert np.array_equal(va, vb, equal_nan=True) and np.array_equal(ca, cb)
    assert not np.array_equal(va, vc, equal_nan=True)


def test_first_spike_current_brackets_the_threshold() -> None:
    rheobase = sm.first_spike_current(SPIKING, step_s=0.3, resolution_a=2e-12)
    assert 10e-12 < rheobase < 200e-12  # a few tens of pA, as for small cortical cells
    proto = sm.StepProtocol(
        sweep_s=0.35, onset_s=0.05, step_s=0.3, amplitudes_a=(rheobase - 2e-12, rheobase)
    )
    v = _voltages(sm.simulate_cell(SPIKING, proto, CLEAN, seed=0, cell_id="rb"))
    fired = ((v[:, 1:] >= -0.01) & (v[:, :-1] < -0.01)).any(axis=1)
    assert fired.tolist() == [False, True]
    assert np.isnan(sm.first_spike_current(sm.CellModel()))


@pytest.mark.parametrize(
    ("cell", "protocol", "nuisance", "words"),
    [
        (sm.CellModel(rm_ohm_m2=-1.0), SHORT, CLEAN, "rm_ohm_m2"),
        (sm.CellModel(dendrite=sm.Dendrite(n_compartments=0)), SHORT, CLEAN, "n_compartments"),
        (sm.CellModel(), replace(SHORT, onset_s=0.6), CLEAN, "onset_s"),
        (sm.CellModel(), replace(SHORT, amplitudes_a=()), CLEAN, "amplitudes_a"),
        (sm.CellModel(), SHORT, sm.Nuisance(noise_rms_v=-1e-3), "noise_rms_v"),
    ],
)
def test_bad_parameters_are_named(cell, protocol, nuisance, words: str) -> None:
    with pytest.raises(ValueError, match=words):
        sm.simulate_cell(cell, protocol, nuisance, seed=0, cell_id="bad")


def test_electrode_filter_starts_at_steady_state_and_charges_as_an_rc_circuit() -> None:
    # A held input stays where it is from the first sample (no start-up glitch); a step is
    # the sampled RC charging curve 1 - exp(-t/tau) (Johnston & Wu 1995, ch. 2).
    rate, tau = 20_000.0, 20e-6
    held = sm._first_order(np.full((2, 8), -50e-12), rate, tau)
    np.testing.assert_allclose(held, -50e-12, rtol=1e-12)
    step = np.ones((1, 40))
    step[0, 0] = 0.0  # the input steps to 1 at the second sample
    t = np.arange(39) / rate  # time since the step, at the samples after it
    np.testing.assert_allclose(
        sm._first_order(step, rate, tau)[0, 1:], 1 - np.exp(-t / tau), atol=1e-12
    )


def test_a_held_current_through_an_unbalanced_bridge_gives_no_glitch_at_the_sweep_start() -> None:
    rig = sm.Nuisance(bridge_error_ohm=20e6, electrode_tau_s=20e-6)
    protocol = replace(SHORT, holding_a=-50e-12)
    rec = sm.simulate_cell(sm.CellModel(), protocol, rig, seed=0, cell_id="held")
    for sweep in rec.sweeps:
        early = sweep.voltage[:20]
        assert np.ptp(early) < 1e-6, np.ptp(early)  # flat: no jump of I * R_err at the start
