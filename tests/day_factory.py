"""Small simulated days for the batch tests (invented data; truth checks live elsewhere)."""

from __future__ import annotations

from pathlib import Path

from pipeline.simulate import (
    CellModel,
    IhChannel,
    Nuisance,
    SpikingChannels,
    StepProtocol,
    simulate_cell,
)
from pipeline.writers import write_csv, write_nwb

PA = 1e-12
SHORT = StepProtocol(
    rate_hz=10_000.0,
    sweep_s=0.7,
    onset_s=0.1,
    step_s=0.35,
    amplitudes_a=tuple(a * PA for a in (-80, -60, -40, -20, 60, 120)),
)
RIG = Nuisance(noise_rms_v=0.1e-3, hum_rms_v=0.05e-3, bridge_error_ohm=5e6, electrode_tau_s=40e-6)


def write_day(folder: Path, n_cells: int = 3, *, sheet: bool = True) -> list[Path]:
    """Write ``n_cells`` short NWB cells (the last one depolarized) and a metadata sheet."""
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    rows = ["file,condition,animal"]
    for i in range(n_cells):
        leak = -0.045 if i == n_cells - 1 and n_cells > 2 else -0.070
        model = CellModel(
            soma_area_m2=(8000 + 1000 * i) * 1e-12,
            rm_ohm_m2=2.0,
            e_leak_v=leak,
            ih=IhChannel(g_s_per_m2=0.5) if i % 2 else None,
            spiking=SpikingChannels() if leak < -0.06 else None,
        )
        path = folder / f"c{i:02d}.nwb"
        rec = simulate_cell(model, SHORT, RIG, seed=i, cell_id=path.stem, source_file=str(path))
        write_nwb([rec], path, subject_id=f"A{i % 2}", identifier=f"test-{i}")
        paths.append(path)
        rows.append(f"{path.name},{'ctrl' if i % 2 == 0 else 'drug'},A{i % 2}")
    if sheet:
        (folder / "metadata.csv").write_text("\n".join(rows) + "\n")
    return paths


def write_csv_cell(path: Path, seed: int = 7) -> Path:
    """One short passive cell as CSV."""
    model = CellModel(soma_area_m2=9000e-12, rm_ohm_m2=2.0)
    rec = simulate_cell(model, SHORT, RIG, seed=seed, cell_id=path.stem, source_file=str(path))
    return write_csv(rec, path, decimals=4)
