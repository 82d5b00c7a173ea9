"""Spiking measures on simulated cells whose membrane potential is known (invented cells).

The simulator gives the membrane's own voltage; the recording adds the rig's errors (bridge,
noise). The checks here are that those errors do not turn into physiology.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest

from pipeline.analysis import analyse_file, analyse_recording
from pipeline.config import load_config
from pipeline.readers import open_recordings
from pipeline.simulate import CellModel, Nuisance, SpikingChannels, StepProtocol, simulate_cell

PA = 1e-12
# a strongly adapting cell: one or two spikes at every step, then a subthreshold plateau
ADAPTING = CellModel(soma_area_m2=1e-8, rm_ohm_m2=1.0, spiking=SpikingChannels(g_m_s_per_m2=20))
LARGE_STEPS = StepProtocol(
    rate_hz=20e3, sweep_s=1.5, onset_s=0.2, step_s=1.0,
    amplitudes_a=tuple(a * PA for a in (-100, -60, -20, 200, 400, 600, 800, 1000, 1200)),
)  # fmt: skip


@pytest.mark.parametrize("bridge_ohm", [0.0, 15e6])
def test_bridge_voltage_is_not_taken_for_depolarization_block(bridge_ohm):
    # At 1.2 nA the membrane settles near -53 mV, ~10 mV below the threshold at rheobase (the
    # simulator's noise-free voltage). A 15 MOhm bridge error adds 18 mV to the recorded
    # plateau but only 6 mV to the threshold measured at 400 pA: the 1.2 nA sweep was called
    # depolarization block, its rate dropped, and max rate and f-I slope with it.
    rig = Nuisance(noise_rms_v=0.1e-3, bridge_error_ohm=bridge_ohm)
    rec = simulate_cell(ADAPTING, LARGE_STEPS, rig, seed=1, cell_id="x", source_file="x.nwb")
    result = analyse_recording(rec, load_config(None), None)
    blocked = [s["step_pa"] for s in result["sweeps"] if s["depolarization_block"]]
    assert blocked == []
    assert result["cell"]["max_rate_hz"] == pytest.approx(2.0)


def test_spikes_shrunk_below_the_amplitude_rule_are_not_a_rate():
    # The sample day's cell07 (a dendritic cell, invented) fires ever smaller events at its
    # largest steps: at 250 pA a regular train of 143 events of 20-30 mV, of which the 20 mV
    # amplitude rule (common practice) counted the 27 that noise pushed past it. The sweep got
    # a rate of 54 Hz (a false collapse of the f-I curve), and 300 pA was called block.
    path = Path(__file__).resolve().parents[1] / "sample_data" / "cell07.nix"
    result = analyse_file(str(path), load_config(None))
    cell = result["cells"][0]
    by_step = {round(s["step_pa"]): s for s in cell["sweeps"] if s["step_pa"] > 0}
    voltage = {sw.number: sw.voltage for sw in _recording(path).sweeps}
    for step in (250, 300):
        row = by_step[step]
        assert row["spike_rate_hz"] != row["spike_rate_hz"]  # NaN: not a firing rate
        assert not row["depolarization_block"]
        small = int(re.search(r"(\d+) upstrokes", row["spiking_reason"]).group(1))
        # every event, counted or not, against an independent count: upward crossings of
        # -25 mV at least 1 ms apart during the step (0.15-0.65 s at 20 kHz)
        v = voltage[row["sweep"]][3000:13000]
        up = np.flatnonzero((v[1:] >= -0.025) & (v[:-1] < -0.025))
        events = 1 + int(np.count_nonzero(np.diff(up) > 20))
        assert row["spike_count"] + small == pytest.approx(events, rel=0.03)
    assert cell["cell"]["block_step_pa"] != cell["cell"]["block_step_pa"]  # NaN: no block
    assert cell["cell"]["max_rate_hz"] == by_step[200]["spike_rate_hz"]


def _recording(path):
    return open_recordings(str(path))[0]
