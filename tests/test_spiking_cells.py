"""Spiking measures on simulated cells whose membrane potential is known (invented cells).

The simulator gives the membrane's own voltage; the recording adds the rig's errors (bridge,
noise). The checks here are that those errors do not turn into physiology.
"""

from __future__ import annotations

import pytest

from pipeline.analysis import analyse_recording
from pipeline.config import load_config
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
