"""The invented demo day behind ``patchbatch sample``.

Scenario (made up for the demo; no real study, animals or people): slices from two animals of
an invented housing study, "standard" versus "enriched" cages, recorded one afternoon on a rig
that is not perfectly tuned. Eight cells of a made-up cortical region, simulated with
:mod:`pipeline.simulate`: realistic noise, 50 Hz hum, bridge balance off by a few MΩ, one cell
with strong Ih sag, dendritic cells with multi-exponential charging, and one cell a careful
analyst would reject (depolarized rest). Six cells are NWB files, one NIX, one CSV (an older
export at 10 kHz); ``metadata.csv`` maps files to condition, animal and slice.

Everything here is invented data for trying the tool; tests check against outside references.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, replace
from pathlib import Path

from pipeline.errors import PatchbatchError
from pipeline.simulate import (
    CellModel,
    Dendrite,
    IhChannel,
    Nuisance,
    SpikingChannels,
    StepProtocol,
    simulate_cell,
)

_PA = 1e-12
_STEPS = tuple(a * _PA for a in (-100, -80, -60, -40, -20, 50, 100, 150, 200, 250, 300))
PROTOCOL = StepProtocol(
    rate_hz=20_000.0, sweep_s=1.0, onset_s=0.15, step_s=0.5, amplitudes_a=_STEPS
)
_OLD_RIG = StepProtocol(
    rate_hz=10_000.0,
    sweep_s=1.0,
    onset_s=0.15,
    step_s=0.5,
    amplitudes_a=tuple(a * _PA for a in (-90, -60, -30, 60, 120, 180, 240)),
)
_SPIKES = SpikingChannels()
_RIG = Nuisance(
    noise_rms_v=0.15e-3,
    hum_rms_v=0.08e-3,
    hum_hz=50.0,
    bridge_error_ohm=6e6,
    electrode_tau_s=40e-6,
    current_noise_a=2e-12,
    current_tau_s=20e-6,
)


@dataclass(frozen=True)
class SampleCell:
    """One cell of the demo day and where it goes."""

    stem: str
    fmt: str  # "nwb", "nix" or "csv"
    condition: str
    animal: str
    slice: str
    model: CellModel
    nuisance: Nuisance = _RIG
    protocol: StepProtocol = PROTOCOL


def _cells() -> tuple[SampleCell, ...]:
    # Single compartments stand for compact cells (soma_area_m2 = the whole membrane); the
    # dendritic ones have a soma and a cable of electrotonic length ~0.7.
    dend = Dendrite(length_m=800e-6, diameter_m=4e-6, ri_ohm_m=1.5, n_compartments=15)
    mild_ih = IhChannel(g_s_per_m2=0.4)
    strong_ih = IhChannel(g_s_per_m2=2.5, tau_s=0.06)
    um2 = 1e-12

    def rig(**changes: float) -> Nuisance:
        return replace(_RIG, **changes)

    return (
        SampleCell(
            "cell01",
            "nwb",
            "standard",
            "A1",
            "S1",
            CellModel(soma_area_m2=11000 * um2, rm_ohm_m2=2.2, ih=mild_ih, spiking=_SPIKES),
        ),
        SampleCell(
            "cell02",
            "nwb",
            "standard",
            "A1",
            "S1",
            CellModel(soma_diameter_m=18e-6, rm_ohm_m2=2.5, dendrite=dend, spiking=_SPIKES),
            rig(bridge_error_ohm=11e6),
        ),
        SampleCell(
            "cell03",
            "nwb",
            "standard",
            "A1",
            "S2",
            CellModel(soma_area_m2=13000 * um2, rm_ohm_m2=3.0, ih=strong_ih, spiking=_SPIKES),
            rig(hum_rms_v=0.15e-3),
        ),
        SampleCell(
            "cell04",
            "nwb",
            "enriched",
            "A2",
            "S3",
            CellModel(soma_area_m2=9000 * um2, rm_ohm_m2=1.8, ih=mild_ih, spiking=_SPIKES),
        ),
        # The cell to reject: depolarized rest (leaky, run-down), noisier recording.
        SampleCell(
            "cell05",
            "nwb",
            "enriched",
            "A2",
            "S3",
            CellModel(soma_area_m2=10000 * um2, rm_ohm_m2=1.0, e_leak_v=-0.044),
            rig(noise_rms_v=0.3e-3, drift_v_per_s=0.02e-3),
        ),
        SampleCell(
            "cell06",
            "nwb",
            "enriched",
            "A2",
            "S4",
            CellModel(
                soma_diameter_m=20e-6, rm_ohm_m2=2.0, dendrite=dend, ih=mild_ih, spiking=_SPIKES
            ),
            rig(noise_rms_v=0.3e-3, bridge_error_ohm=15e6),
        ),
        SampleCell(
            "cell07",
            "nix",
            "enriched",
            "A2",
            "S4",
            CellModel(soma_diameter_m=16e-6, rm_ohm_m2=2.4, dendrite=dend, spiking=_SPIKES),
        ),
        SampleCell(
            "cell08",
            "csv",
            "standard",
            "A1",
            "S2",
            CellModel(soma_area_m2=12000 * um2, rm_ohm_m2=2.0, ih=mild_ih, spiking=_SPIKES),
            protocol=_OLD_RIG,
        ),
    )


SHEET_HEADER = "file,condition,animal,slice"


def write_sample_day(folder: str | Path) -> list[Path]:
    """Simulate the demo day and write its files and metadata sheet into ``folder``.

    Parameters
    ----------
    folder : str or Path
        Created if missing; existing sample files are overwritten.

    Returns
    -------
    list of Path
        The files written (recordings, then ``metadata.csv``).
    """
    from pipeline.report.atomic import atomic_write_text
    from pipeline.writers import write_csv, write_nix, write_nwb

    out = Path(folder)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:  # a file of that name, a read-only parent...
        raise PatchbatchError(f"{out}: cannot make the sample folder ({exc.strerror})") from None
    written, sheet = [], [SHEET_HEADER]
    start = dt.datetime(2026, 3, 14, 13, 0, tzinfo=dt.UTC)
    for i, cell in enumerate(_cells()):
        path = out / f"{cell.stem}.{cell.fmt}"
        recording = simulate_cell(
            cell.model,
            cell.protocol,
            cell.nuisance,
            seed=1000 + i,
            cell_id=cell.stem,
            source_file=str(path),
        )
        if cell.fmt == "nwb":
            write_nwb(
                [recording],
                path,
                session_description="invented demo day: housing study, current steps",
                subject_id=cell.animal,
                session_start_time=start + dt.timedelta(minutes=25 * i),
                identifier=f"demo-day-{cell.stem}",
                digitize=True,  # int16 with a conversion, as acquisition systems store it
            )
        elif cell.fmt == "nix":
            write_nix([recording], path)
        else:
            write_csv(recording, path, decimals=3)  # µV and fA: below the noise
        written.append(path)
        sheet.append(f"{path.name},{cell.condition},{cell.animal},{cell.slice}")
    sheet_path = out / "metadata.csv"
    atomic_write_text(sheet_path, "\n".join(sheet) + "\n")
    written.append(sheet_path)
    return written
