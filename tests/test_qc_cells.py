"""Each default QC rule fires on a simulated cell built to break it, and stays quiet on a clean
one. The thresholds are common practice (from memory; see configs/default.toml), not a standard.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from day_factory import PA, RIG, SHORT

from pipeline.analysis import analyse_recording
from pipeline.config import config_from_dict, load_config, merge_tables
from pipeline.fitters.sweep import coarse_rounding
from pipeline.recording import Recording
from pipeline.simulate import CellModel, Nuisance, StepProtocol, simulate_cell

CLEAN = CellModel(soma_area_m2=9000e-12, rm_ohm_m2=2.0)  # Rin ~220 MΩ, tau 20 ms
CONFIG = load_config()


def _cell(model=CLEAN, nuisance=RIG, protocol=SHORT, seed=3) -> Recording:
    return simulate_cell(model, protocol, nuisance, seed=seed, cell_id="x")


def _run(recording, config=CONFIG):
    result = analyse_recording(recording, config)
    return result["cell"], {r["sweep"]: r for r in result["sweeps"]}


def _edit(recording, sweep_index, change):
    """A copy of ``recording`` with one sweep's voltage changed by ``change(t, v) -> v``."""
    sweeps = list(recording.sweeps)
    s = sweeps[sweep_index]
    sweeps[sweep_index] = dataclasses.replace(s, voltage=change(s.time(), s.voltage.copy()))
    return dataclasses.replace(recording, sweeps=tuple(sweeps))


def test_clean_cell_passes_every_rule():
    cell, sweeps = _run(_cell())
    assert cell["qc_pass"], cell["qc_reasons"]
    assert cell["qc_flags"] == ""
    assert all(r["used"] for r in sweeps.values())


def test_current_stored_with_the_wrong_sign_is_named_as_the_likely_cause():
    # Positive current depolarizes (the convention every reader converts to); a file whose
    # current channel has the opposite sign gives a negative Rin, which no membrane has.
    clean = _cell()
    flipped = dataclasses.replace(
        clean, sweeps=tuple(dataclasses.replace(s, current=-s.current) for s in clean.sweeps)
    )
    cell, _ = _run(flipped)
    assert not cell["qc_pass"]
    assert cell["rin_mohm"] < 0
    assert "current's sign reversed (the file's current, or the [steps] schedule" in cell["notes"]
    assert "sign" not in (_run(clean)[0]["notes"] or "")


def test_noisy_baseline_sweeps_are_left_out_and_the_cell_fails_for_lack_of_sweeps():
    cell, sweeps = _run(_cell(nuisance=dataclasses.replace(RIG, noise_rms_v=0.9e-3)))
    assert all("baseline noise" in r["excluded_because"] for r in sweeps.values())
    assert not cell["qc_pass"]
    assert "no usable hyperpolarizing sweep" in cell["qc_reasons"]


def test_baseline_shift_within_a_sweep_leaves_it_out():
    def shift(t, v):
        v[t > 0.5] += 3e-3  # the baseline jumps 3 mV after the step
        return v

    cell, sweeps = _run(_edit(_cell(), 1, shift))
    assert "baseline moved" in sweeps[1]["excluded_because"]
    assert not sweeps[1]["used"] and sweeps[0]["used"]
    assert cell["qc_pass"], cell["qc_reasons"]  # the other sweeps carry the cell
    assert cell["n_sweeps_used"] == len(sweeps) - 1


def test_nan_run_leaves_the_sweep_out():
    def holes(t, v):
        v[(t > 0.3) & (t < 0.31)] = np.nan
        return v

    cell, sweeps = _run(_edit(_cell(), 2, holes))
    assert "NaN or infinite samples" in sweeps[2]["excluded_because"]
    assert cell["qc_pass"], cell["qc_reasons"]


def _rounded(recording, step_v=1e-3):
    """``recording`` with every voltage rounded to ``step_v`` (a text file written at 1 mV)."""
    sweeps = [
        dataclasses.replace(s, voltage=np.round(s.voltage / step_v) * step_v)
        for s in recording.sweeps
    ]
    return dataclasses.replace(recording, sweeps=tuple(sweeps))


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_voltage_rounded_to_1_mv_is_not_read_as_clipped_and_the_cell_says_so(seed):
    # Noise of 0.1 mV under 1 mV steps: every level, the extremes too, repeats for many samples.
    cell, sweeps = _run(_rounded(_cell(seed=seed)))
    assert all(r["clipped_samples"] == 0 for r in sweeps.values())
    assert cell["qc_pass"], cell["qc_reasons"]
    assert "voltage on a grid of 1 mV steps, coarser than its noise" in cell["notes"]
    assert cell["rin_mohm"] == pytest.approx(_run(_cell(seed=seed))[0]["rin_mohm"], rel=0.03)


@pytest.mark.parametrize("step_v", [1e-4, 3e-5])  # a 0.1 mV export; a 16-bit digitizer's step
def test_a_rail_is_still_clipping_in_a_trace_rounded_finer_than_its_noise(step_v):
    rail = Nuisance(**{**RIG.__dict__, "clip_v": (-0.085, 0.05)})
    cell, sweeps = _run(_rounded(_cell(nuisance=rail), step_v))
    assert "clipped" in sweeps[0]["excluded_because"]  # -80 pA drives it past -85 mV
    assert sweeps[3]["used"]
    assert "rounded" not in (cell["notes"] or "")


def test_a_rail_in_a_quiet_digitizer_trace_is_still_clipping():
    # A 16-bit step (30.5 uV) above 20 uV of noise: neighbours mostly differ, so the grid is
    # not coarse, and the flat run at -85 mV is the rail it is.
    quiet = Nuisance(noise_rms_v=20e-6, bridge_error_ohm=5e6, electrode_tau_s=40e-6)
    rail = dataclasses.replace(quiet, clip_v=(-0.085, 0.05))
    cell, sweeps = _run(_rounded(_cell(nuisance=rail), 30.5e-6))
    assert "clipped" in sweeps[0]["excluded_because"]
    assert "grid" not in (cell["notes"] or "")


def test_hum_does_not_hide_that_a_1_mv_export_is_rounded():
    # 1.2 mV of hum moves the trace across levels; between neighbouring samples it does not.
    humming = dataclasses.replace(RIG, hum_rms_v=1.2e-3)
    cell, sweeps = _run(_rounded(_cell(nuisance=humming)))
    assert all(r["clipped_samples"] == 0 for r in sweeps.values())
    assert cell["qc_pass"], cell["qc_reasons"]


def test_coarse_rounding_is_told_from_float_and_digitizer_traces():
    rng = np.random.default_rng(5)
    v = -0.07 + 1e-4 * rng.standard_normal(5000)  # 0.1 mV of noise
    v[2000:4000] -= np.linspace(0.0, 0.0052, 2000)  # a step from sample 2000
    assert np.isnan(coarse_rounding(v))  # floats: no grid
    assert np.isnan(coarse_rounding(np.round(v / 3e-5) * 3e-5))  # grid finer than noise
    assert coarse_rounding(np.round(v / 1e-3) * 1e-3) == pytest.approx(1e-3)
    assert np.isnan(coarse_rounding(np.full(5000, -0.07)))  # noiseless and flat
    smooth = -0.07 - 0.005 * (1 - np.exp(-np.arange(5000) / 400.0))
    assert np.isnan(coarse_rounding(smooth))  # noiseless and smooth: no grid


def test_clipped_sweep_is_left_out():
    rail = Nuisance(**{**RIG.__dict__, "clip_v": (-0.085, 0.05)})
    cell, sweeps = _run(_cell(nuisance=rail))
    assert "clipped" in sweeps[0]["excluded_because"]  # -80 pA drives it past -85 mV
    assert sweeps[3]["used"]


def test_poor_charging_fit_leaves_the_sweep_out():
    def wobble(t, v):
        inside = (t >= 0.1) & (t < 0.45)
        v[inside] += 4e-3 * np.sin(2 * np.pi * 7 * t[inside])  # not a charging curve
        return v

    cell, sweeps = _run(_edit(_cell(), 1, wobble))
    assert "fit R²" in sweeps[1]["excluded_because"], sweeps[1]


def test_depolarized_cell_fails():
    cell, _ = _run(_cell(CellModel(soma_area_m2=9000e-12, rm_ohm_m2=2.0, e_leak_v=-0.045)))
    assert not cell["qc_pass"]
    assert "resting potential -45.0 mV is above -50 mV" in cell["qc_reasons"]


def test_drifting_baseline_fails():
    cell, _ = _run(_cell(nuisance=dataclasses.replace(RIG, drift_v_per_s=0.3e-3)))
    assert not cell["qc_pass"]
    assert "baseline drifted" in cell["qc_reasons"]


def test_unbalanced_bridge_fails():
    cell, _ = _run(_cell(nuisance=dataclasses.replace(RIG, bridge_error_ohm=35e6)))
    assert not cell["qc_pass"]
    assert "bridge balance off by" in cell["qc_reasons"]


def test_input_resistance_that_changes_fails():
    repeated = StepProtocol(
        rate_hz=SHORT.rate_hz,
        sweep_s=SHORT.sweep_s,
        onset_s=SHORT.onset_s,
        step_s=SHORT.step_s,
        amplitudes_a=(-60 * PA, -30 * PA),
    )
    early = _cell(protocol=repeated)
    late = _cell(dataclasses.replace(CLEAN, rm_ohm_m2=1.4), protocol=repeated, seed=4)
    sweeps = [
        dataclasses.replace(s, number=i, start_time=10.0 * i)
        for i, s in enumerate(early.sweeps + late.sweeps)
    ]
    cell, _ = _run(dataclasses.replace(early, sweeps=tuple(sweeps)))
    assert cell["rin_change_pct"] == pytest.approx(-30, abs=3)  # Rm 2.0 -> 1.4
    assert "input resistance changed" in cell["qc_reasons"]


def test_repeats_are_the_same_step_within_a_picoampere():
    # measured currents of one nominal step differ by a fraction of a pA; rounded to 0.1 pA,
    # -50.07 and -49.90 pA were two steps and the first repeat was left out of the comparison
    from pipeline.analysis import _rin_change_pct

    rows = [
        {"step_pa": -50.07, "rin_mohm": 200.0},
        {"step_pa": -100.02, "rin_mohm": 190.0},
        {"step_pa": -49.90, "rin_mohm": 160.0},
        {"step_pa": -99.96, "rin_mohm": 171.0},
    ]
    # pairs (200, 160) and (190, 171): first mean 195, last mean 165.5 (the -100 pA pair
    # alone, as before, gave -10%)
    same_step_pa = load_config(None).spikes.step_tolerance_a * 1e12  # the config's default
    assert _rin_change_pct(rows, same_step_pa) == pytest.approx(100 * (165.5 - 195) / 195)


def test_too_few_hyperpolarizing_sweeps_fails():
    two = dataclasses.replace(SHORT, amplitudes_a=(-40 * PA, -20 * PA, 60 * PA))
    cell, _ = _run(_cell(protocol=two))
    assert not cell["qc_pass"]
    assert "only 2 usable hyperpolarizing sweeps (need 3)" in cell["qc_reasons"]


def test_implausible_input_resistance_fails():
    tiny = CellModel(soma_area_m2=300e-12, rm_ohm_m2=2.0)  # ~6.7 GΩ
    small_steps = dataclasses.replace(SHORT, amplitudes_a=(-8 * PA, -6 * PA, -4 * PA, -2 * PA))
    cell, _ = _run(_cell(tiny, protocol=small_steps))
    assert "outside the plausible 10–3000 MΩ" in cell["qc_reasons"]


def test_implausible_time_constant_fails():
    slow = CellModel(soma_area_m2=9000e-12, rm_ohm_m2=2.0, cm_f_per_m2=0.15)  # tau 300 ms
    long = dataclasses.replace(SHORT, sweep_s=4.0, step_s=2.5)
    cell, _ = _run(_cell(slow, protocol=long))
    assert "membrane time constant" in cell["qc_reasons"], cell["qc_reasons"]


def test_a_rule_added_in_a_user_config_works():
    user = {
        "qc": {
            "rule": [
                {
                    "name": "lab-tau",
                    "column": "tau_ms",
                    "scope": "cell",
                    "max": 15.0,
                    "action": "flag",
                    "message": "tau {value:.0f} ms above the lab's 15 ms",
                },
                {
                    "name": "lab-steps",
                    "column": "step_pa",
                    "scope": "sweep",
                    "min": -70.0,
                    "action": "exclude",
                    "message": "step beyond -70 pA",
                },
            ]
        }
    }
    import tomllib

    from pipeline.config import default_config_text

    config = config_from_dict(merge_tables(tomllib.loads(default_config_text()), user))
    cell, sweeps = _run(_cell(), config)
    assert cell["qc_pass"]
    assert cell["qc_flags"] == "tau 20 ms above the lab's 15 ms"
    assert sweeps[0]["excluded_because"] == "step beyond -70 pA"
    assert sweeps[2]["used"]


def test_spikes_that_do_not_overshoot_fail_and_cells_without_spikes_pass():
    from pipeline.simulate import SpikingChannels

    # A low sodium reversal: spikes that stop short of 0 mV (common practice: a sign of a poor cell or
    # poor access). A passive cell has no spike and is not judged on this rule.
    weak = CellModel(
        soma_area_m2=9000e-12,
        rm_ohm_m2=2.0,
        spiking=SpikingChannels(g_na_s_per_m2=120.0, e_na_v=0.010),
    )
    steps = dataclasses.replace(
        SHORT, amplitudes_a=(-60 * PA, -40 * PA, -20 * PA, 150 * PA, 250 * PA)
    )
    cell, _ = _run(_cell(weak, protocol=steps))
    assert cell["first_spike_peak_mv"] < 0, cell["first_spike_peak_mv"]
    assert "no overshoot" in cell["qc_reasons"]
    healthy = CellModel(soma_area_m2=9000e-12, rm_ohm_m2=2.0, spiking=SpikingChannels())
    cell, _ = _run(_cell(healthy, protocol=steps))
    assert cell["first_spike_peak_mv"] > 0 and "no overshoot" not in cell["qc_reasons"]
    cell, _ = _run(_cell())
    assert cell["qc_pass"]


def test_vrest_missing_for_lack_of_baselines_says_so_not_that_no_sweep_is_at_zero_current():
    def holes(t, v):
        v[(t > 0.02) & (t < 0.03)] = np.nan  # in the baseline window of every sweep
        return v

    recording = _cell()
    for k in range(len(recording.sweeps)):
        recording = _edit(recording, k, holes)
    cell, _ = _run(recording)
    assert "no zero-current sweep left for Vrest (6 left out, sweep 0: " in cell["notes"]
    assert "NaN or infinite samples" in cell["notes"]
    assert "no sweep at zero holding" not in cell["notes"]
    # notes are "; "-joined (the figure lists them apart): the note must not hold that itself
    (vrest,) = [n for n in cell["notes"].split("; ") if "Vrest" in n]
    assert vrest.endswith("NaN or infinite samples)")
