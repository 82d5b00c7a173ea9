"""The ``inspect`` table: one header line and one row per sweep, values in report units."""

from __future__ import annotations

import numpy as np
import pytest

from pipeline import simulate as sm
from pipeline.errors import RecordingError
from pipeline.inspection import COLUMNS, inspect_file, inspect_recordings, sweep_table
from pipeline.recording import Recording, Sweep
from pipeline.steps import StepSettings

SETTINGS = StepSettings()
PROTO = sm.StepProtocol(sweep_s=0.5, onset_s=0.1, step_s=0.3, amplitudes_a=(-100e-12, 40e-12))


def _cell() -> Recording:
    rec = sm.simulate_cell(
        sm.CellModel(e_leak_v=-0.068),
        PROTO,
        sm.Nuisance(),
        seed=1,
        cell_id="d1c2",
        source_file="d1.nwb",
    )
    n = PROTO.n_samples
    ramp_current = np.linspace(0.0, 100e-12, n)
    holed = np.full(n, -0.065)
    holed[:50] = np.nan  # NaN inside the baseline window: the mean skips it
    blank = np.full(n, np.nan)
    extra = (
        Sweep(holed, ramp_current, PROTO.rate_hz, 2, protocol="ramp"),
        Sweep(blank, np.zeros(n), PROTO.rate_hz, 3),
    )
    return Recording(
        rec.cell_id,
        rec.source_file,
        "e0",
        rec.sweeps + extra,
        skipped=("vc_series_1 (voltage clamp)",),
    )


def test_sweep_table_values_in_report_units() -> None:
    table = sweep_table(_cell(), SETTINGS)
    assert tuple(table.columns) == COLUMNS
    assert table["sweep"].tolist() == [0, 1, 2, 3]
    first = table.iloc[0]
    assert first["rate_khz"] == pytest.approx(20.0)
    assert first["duration_ms"] == pytest.approx(500.0)
    assert first["onset_ms"] == pytest.approx(100.0)
    assert first["step_ms"] == pytest.approx(300.0)
    assert first["amplitude_pa"] == pytest.approx(-100.0)
    assert first["holding_pa"] == pytest.approx(0.0)
    assert first["baseline_mv"] == pytest.approx(-68.0)
    assert first["status"] == "ok"
    assert table.iloc[2]["status"].startswith("ramp: ")
    assert table.iloc[2]["holding_pa"] == pytest.approx(0.0, abs=0.1)  # current at the start
    assert np.isnan(table.iloc[2]["onset_ms"])
    assert table.iloc[3]["status"].startswith("no change: ")
    assert np.isnan(table.iloc[3]["baseline_mv"])  # an all-NaN voltage has no baseline


def test_baseline_is_nan_aware() -> None:
    rec = _cell()
    current = np.zeros(PROTO.n_samples)
    current[2000:8000] = -50e-12
    voltage = np.full(PROTO.n_samples, -0.07)
    voltage[:1000] = np.nan
    voltage[1000:2000] = -0.066
    sweep = Sweep(voltage, current, PROTO.rate_hz, 9)
    table = sweep_table(Recording("c", "c.csv", "e0", (sweep,)), SETTINGS)
    assert table.iloc[0]["baseline_mv"] == pytest.approx(-66.0)
    assert rec.sweeps  # the simulated sweeps are untouched


def test_text_has_header_and_aligned_rows() -> None:
    text = inspect_recordings([_cell()], SETTINGS)
    lines = text.strip().splitlines()
    header = lines[0]
    for part in ("cell d1c2", "electrode e0", "file d1.nwb", "4 sweeps, 2 usable", "vc_series_1"):
        assert part in header
    assert lines[1].split() == list(COLUMNS)
    assert len(lines) == 2 + 4
    row0 = lines[2].split()
    assert row0[:4] == ["0", "20", "500.0", "current"]  # protocol "current steps" follows
    assert "-100.0" in row0 and "100.00" in row0 and "-68.00" in row0 and row0[-1] == "ok"
    # numbers are right-aligned under their header: each amplitude ends where its header ends
    end = lines[1].index("amplitude_pa") + len("amplitude_pa")
    assert all(line[end - 1] != " " and line[end] == " " for line in lines[2:])
    assert lines[3][lines[1].index("status") :].startswith("ok")  # text is left-aligned


def test_schedule_and_no_current_rows() -> None:
    n = PROTO.n_samples
    sweeps = tuple(Sweep(np.full(n, -0.07), None, PROTO.rate_hz, i) for i in range(2))
    rec = Recording("c", "c.abf", "", sweeps)
    with_schedule = StepSettings(
        schedule_onset_s=0.1,
        schedule_duration_s=0.3,
        schedule_first_a=-20e-12,
        schedule_increment_a=20e-12,
    )
    table = sweep_table(rec, with_schedule)
    assert table["status"].tolist()[0] == "ok (schedule)"
    assert table["status"].tolist()[1].startswith("no change")
    text = inspect_recordings([rec], SETTINGS)
    assert "no current: no current stored" in text and "electrode ?" in text
    assert inspect_recordings([], SETTINGS) == "no current-clamp recordings found"


def test_inspect_file_reads_a_csv(tmp_path) -> None:
    # The plain-text layout of pipeline/readers/text.py: sweep, time, voltage, current columns.
    rate, n = 10_000.0, 3000
    lines = ["sweep,time_s,voltage_mv,current_pa"]
    for sweep, amp in ((1, -40.0), (2, 0.0)):
        current = np.where((np.arange(n) >= 500) & (np.arange(n) < 2500), amp, 0.0)
        lines += [f"{sweep},{i / rate:.6f},-70.0,{current[i]:.1f}" for i in range(n)]
    path = tmp_path / "day3_cell1.csv"
    path.write_text("\n".join(lines) + "\n")
    text = inspect_file(path, SETTINGS)
    assert "day3_cell1.csv" in text.splitlines()[0]
    assert "-40.0" in text and "50.00" in text and "200.00" in text
    assert "no change" in text
    broken = tmp_path / "broken.nwb"
    broken.write_bytes(b"not an nwb file")
    with pytest.raises(RecordingError, match="broken.nwb"):
        inspect_file(broken, SETTINGS)
