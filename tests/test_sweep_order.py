"""The order sweeps are stored in does not change a cell's results.

Truth comes from the simulation (invented data): a passive cell whose resting potential drifts at
a known rate, so the resting potential at the first sweep and the drift over the recording are
known. Recording order is the order of sweep numbers; time-dependent values (Vrest read at the
start, its drift) follow the sweeps' start times.
"""

from __future__ import annotations

from dataclasses import replace

import pytest

from pipeline.analysis import analyse_file
from pipeline.config import load_config
from pipeline.simulate import CellModel, Nuisance, StepProtocol, simulate_cell
from pipeline.writers import write_csv, write_nwb

PA = 1e-12
DRIFT_V_PER_S = 0.05e-3
PROTOCOL = StepProtocol(
    rate_hz=10_000.0,
    sweep_s=1.0,
    onset_s=0.15,
    step_s=0.5,
    interval_s=10.0,
    amplitudes_a=tuple(a * PA for a in (-100, -80, -60, -40, -20, 50, 100)),
)


@pytest.fixture(scope="module")
def cell():
    model = CellModel(soma_area_m2=1e-8, rm_ohm_m2=1.5)
    rig = Nuisance(noise_rms_v=0.1e-3, drift_v_per_s=DRIFT_V_PER_S)
    return simulate_cell(model, PROTOCOL, rig, seed=1, cell_id="c", source_file="c")


def _vrest(path):
    result = analyse_file(str(path), load_config(None))
    assert result["error"] is None, result["error"]
    row = result["cells"][0]["cell"]
    return (
        row["vrest_mv"],
        row["vrest_drift_mv"],
        [r["sweep"] for r in result["cells"][0]["sweeps"]],
    )


def test_a_file_storing_its_sweeps_backwards_gives_the_same_cell(cell, tmp_path):
    forwards = _vrest(write_csv(cell, tmp_path / "forwards.csv", decimals=5))
    backwards = _vrest(
        write_csv(replace(cell, sweeps=cell.sweeps[::-1]), tmp_path / "backwards.csv", decimals=5)
    )
    assert backwards[2] == forwards[2] == sorted(forwards[2])
    assert backwards[:2] == pytest.approx(forwards[:2], abs=1e-9)
    # the simulation's truth: -70 mV at the first sweep, 0.05 mV/s over 6 intervals of 10 s
    # (baseline windows, not the sweep starts, are 60 s apart)
    assert forwards[0] == pytest.approx(-70.0, abs=0.3)
    assert forwards[1] == pytest.approx(DRIFT_V_PER_S * 60.0 * 1e3, abs=0.3)


def test_sweep_numbers_running_against_time_leave_vrest_at_the_earliest_sweep(cell, tmp_path):
    n = len(cell.sweeps)
    renumbered = [replace(s, number=n - 1 - k) for k, s in enumerate(cell.sweeps)]
    vrest, drift, _ = _vrest(
        write_nwb([replace(cell, sweeps=tuple(renumbered))], tmp_path / "c.nwb")
    )
    assert vrest == pytest.approx(-70.0, abs=0.3)
    assert drift == pytest.approx(DRIFT_V_PER_S * 60.0 * 1e3, abs=0.3)
