"""Spike detection and rheobase against NEURON's Hodgkin-Huxley soma and its own detectors.

Model: NEURON's built-in ``hh`` = Hodgkin & Huxley (1952), J Physiol 117:500-544, at 6.3 degC in
a 30 um isopotential compartment. References are NEURON's NetCon threshold detectors (one on v at
0 mV for counts, one on the capacitive current at cm * 20 V/s for threshold times) and a bisection
of the step amplitude run in NEURON. The 20 mV/ms dV/dt threshold is *common practice*.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest

pytest.importorskip("neuron")

from neuron_hh import HHSoma  # noqa: E402

from pipeline.fitters.spikes import SpikeSettings, fit_spiking, measure_spiking  # noqa: E402
from pipeline.recording import Recording, Sweep  # noqa: E402
from pipeline.steps import StepEpoch  # noqa: E402

pytestmark = pytest.mark.neuron

SETTINGS = SpikeSettings()


@pytest.fixture(scope="module")
def cell() -> HHSoma:
    return HHSoma(diam_um=30.0)


def in_step(times: np.ndarray, run) -> np.ndarray:
    return times[(times >= run.epoch.onset) & (times < run.epoch.offset)]


def downsample(run, factor: int) -> tuple[Sweep, StepEpoch]:
    sweep, ep = run.sweep, run.epoch
    slow = Sweep(
        voltage=sweep.voltage[::factor],
        current=sweep.current[::factor],
        rate=sweep.rate / factor,
        number=sweep.number,
    )
    return slow, replace(
        ep, onset_index=ep.onset_index // factor, offset_index=ep.offset_index // factor
    )


@pytest.mark.parametrize("density", [2.5, 4.0, 6.5, 10.0, 15.0, 30.0])  # uA/cm2
def test_counts_and_times_match_netcon(cell, density):
    run = cell.run(cell.density_to_amps(density))
    ours = measure_spiking(run.sweep, run.epoch, SETTINGS)
    # counts: NetCon on v at 0 mV (NEURON's usual spike detector)
    assert ours.spike_count == in_step(run.v_spike_times_s, run).size > 0
    # times: NetCon on i_cap = cm * dV/dt, i.e. NEURON's own dV/dt crossing 20 V/s; events in
    # the edge guard are the step itself (I / C above threshold), not spike onsets, and a spike
    # rising out of it has no NetCon crossing of its own (our note marks those)
    ref = in_step(run.dvdt_times_s, run)
    ref = ref[ref > run.epoch.onset + SETTINGS.edge_guard_s]
    mine = np.array([s.time_s for s in ours.spikes if s.in_step and not s.note])
    assert mine.size == ref.size
    np.testing.assert_allclose(mine, ref, atol=2e-4)  # the brief's ~0.2 ms
    assert np.max(np.abs(mine - ref)) < 2 * run.sweep.dt  # in fact within two samples
    # the same at 20 kHz
    slow = measure_spiking(*downsample(run, 2), SETTINGS)
    assert slow.spike_count == ours.spike_count
    slow_t = np.array([s.time_s for s in slow.spikes if s.in_step and not s.note])
    np.testing.assert_allclose(slow_t, ref, atol=2e-4)


def test_spike_shape_is_plausible_for_hh(cell):
    # HH at 6.3 degC: overshooting spikes of ~1 ms (from memory: peak near +40 mV, width about
    # 1-2 ms at half amplitude); checks that the shape measures are in the right units and range
    run = cell.run(cell.density_to_amps(10.0))
    s = measure_spiking(run.sweep, run.epoch, SETTINGS).spikes[0]
    assert 0.02 < s.peak_v < 0.06
    assert -0.06 < s.threshold_v < -0.04
    assert 0.5e-3 < s.width_s < 2.5e-3
    assert s.max_rise_v_per_s > 100 > -s.max_fall_v_per_s > 20
    assert s.ahp_v > 0.005  # the trough lies below threshold


def step_cell(cell: HHSoma, amps_a: list[float]) -> tuple[Recording, list, list]:
    runs = [cell.run(a, number=k + 1) for k, a in enumerate(amps_a)]
    rec = Recording("hh", "hh.nwb", "soma", tuple(r.sweep for r in runs))
    return rec, [r.epoch for r in runs], runs


@pytest.fixture(scope="module")
def bisected(cell) -> float:
    # NEURON's rheobase for the 300 ms step: smallest amplitude with a NetCon spike, to 0.01 pA
    return cell.bisect_rheobase(0.0, cell.density_to_amps(10.0), 1e-14)


@pytest.mark.parametrize("increment_pa", [10.0, 2.0])
def test_rheobase_brackets_the_neuron_bisection(cell, bisected, increment_pa):
    amps = np.arange(1, 16) * increment_pa * 1e-12 + (40e-12 if increment_pa < 5 else 0.0)
    rec, epochs, _ = step_cell(cell, list(amps))
    fit = fit_spiking(rec, epochs, SETTINGS)
    assert fit.status == "ok"
    assert fit.step_resolution_a == pytest.approx(increment_pa * 1e-12)
    # rheobase is known to the step resolution: the true value lies in (silent step, rheobase]
    assert fit.subthreshold_max_a < bisected <= fit.rheobase_a
    assert fit.rheobase_a - fit.subthreshold_max_a == pytest.approx(fit.step_resolution_a)


def test_subthreshold_steps_give_no_spikes(cell, bisected):
    for frac in (0.5, 0.9, 0.99):
        run = cell.run(frac * bisected)
        r = measure_spiking(run.sweep, run.epoch, SETTINGS)
        assert run.v_spike_times_s.size == 0
        assert r.spike_count == 0 and r.rebound_spike_count == 0
        assert math.isnan(r.latency_s)


def test_anode_break_rebound_spike(cell):
    # HH's anode break excitation: release from a long hyperpolarization fires one spike
    # (Hodgkin & Huxley 1952, the section on anode break excitation; from memory)
    for density, expected in ((-1.0, 0), (-10.0, 1)):
        run = cell.run(cell.density_to_amps(density))
        r = measure_spiking(run.sweep, run.epoch, SETTINGS)
        after = run.v_spike_times_s[run.v_spike_times_s >= run.epoch.offset]
        assert after.size == expected
        assert r.spike_count == 0 and r.rebound_spike_count == expected


def test_fi_and_depolarization_block(cell):
    densities = [1, 2, 3, 4, 6, 7, 8, 10, 15, 20, 30, 50, 100, 200]  # uA/cm2
    rec, epochs, runs = step_cell(cell, [cell.density_to_amps(d) for d in densities])
    fit = fit_spiking(rec, epochs, SETTINGS)
    by_sweep = {r.sweep: r for r in fit.sweeps}
    # outside block, our rates are NetCon's in-step counts over the step duration
    for run in runs:
        r = by_sweep[run.epoch.sweep]
        if not r.block:
            expected = in_step(run.v_spike_times_s, run).size / run.epoch.duration
            assert r.rate_hz == pytest.approx(expected)
    # HH stops firing at large currents with the membrane held depolarized: block
    blocked = [d for d, run in zip(densities, runs, strict=True) if by_sweep[run.epoch.sweep].block]
    assert blocked and min(blocked) >= 50 and 200 in blocked
    assert fit.block_step_a == pytest.approx(cell.density_to_amps(min(blocked)))
    # the f-I line uses only steps below block, from rheobase up
    fi_amps = [by_sweep[k].step_a for k in fit.fi_sweeps]
    assert max(fi_amps) < fit.block_step_a and min(fi_amps) == fit.rheobase_a
    assert fit.fi_slope_hz_per_a > 0
    assert fit.max_rate_hz == pytest.approx(max(rate for _, rate in fit.fi))


def test_counts_survive_bridge_error_and_noise(cell):
    # rig nuisances on top of the simulation: an unbalanced bridge (20 Mohm: a jump of I * R at
    # both edges, common practice) and 0.2 mV white noise; counts and times stay NetCon's
    run = cell.run(cell.density_to_amps(10.0))
    rng = np.random.default_rng(2)
    v = run.sweep.voltage + run.sweep.current * 20e6 + rng.normal(0, 0.2e-3, run.sweep.n_samples)
    noisy = Sweep(voltage=v, current=run.sweep.current, rate=run.sweep.rate, number=0)
    r = measure_spiking(noisy, run.epoch, SETTINGS)
    assert r.analysed and r.spike_count == in_step(run.v_spike_times_s, run).size
    ref = in_step(run.dvdt_times_s, run)
    ref = ref[ref > run.epoch.onset + SETTINGS.edge_guard_s]
    np.testing.assert_allclose([s.time_s for s in r.spikes if s.in_step], ref, atol=2e-4)
