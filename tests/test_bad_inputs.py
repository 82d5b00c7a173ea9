"""A matrix of broken inputs, each run through ``patchbatch run`` in-process beside good cells.

Every case expects one exact outcome: a row of ``cells.csv`` whose ``status`` names the file and
the problem (exit 1), a cell that is analysed with the damaged sweeps left out and the reason
written down (exit 0), or a usage error that names the sheet, config or folder (exit 2, nothing
half-written). In every run the good cells' rows must be complete and ``ok``, and no temporary or
partial file may be left in the output folder.

Good cells are short simulated recordings (invented data: 6 sweeps of 0.7 s at 10 kHz) so each
run takes well under a second; figures are off except where a case is about them.
"""

from __future__ import annotations

import contextlib
import errno
import io
import json
import logging
import math
import os
import re
import warnings
from collections.abc import Callable
from dataclasses import dataclass, replace
from pathlib import Path

import h5py
import neo
import numpy as np
import pandas as pd
import pytest
import quantities as pq
from pynwb import NWBHDF5IO, NWBFile
from pynwb.icephys import (
    CurrentClampSeries,
    CurrentClampStimulusSeries,
    VoltageClampSeries,
    VoltageClampStimulusSeries,
)

from pipeline.cli import main
from pipeline.errors import CorruptFileError
from pipeline.readers import open_recordings
from pipeline.recording import Recording, Sweep
from pipeline.simulate import CellModel, IhChannel, Nuisance, StepProtocol, simulate_cell
from pipeline.writers import write_csv, write_nwb

PA = 1e-12
PROTOCOL = StepProtocol(
    rate_hz=10_000.0,
    sweep_s=0.7,
    onset_s=0.1,
    step_s=0.3,
    amplitudes_a=tuple(a * PA for a in (-80, -60, -40, -20, 40, 80)),
)
RIG = Nuisance(noise_rms_v=0.1e-3, current_noise_a=1e-12)
# One isopotential compartment: Rin = Rm / area = 2 / 9e-9 = 222 MOhm, tau = Rm Cm = 20 ms
# (the RC circuit's analytic values; the simulator solves it exactly).
PASSIVE = CellModel(soma_area_m2=9000e-12, rm_ohm_m2=2.0)
WITH_IH = CellModel(soma_area_m2=12000e-12, rm_ohm_m2=2.0, ih=IhChannel(g_s_per_m2=0.5))
GOOD = ("good_a", "good_b")


def simulate(name: str, protocol: StepProtocol = PROTOCOL, nuisance: Nuisance = RIG, seed=7):
    """A short passive cell (invented data)."""
    return simulate_cell(PASSIVE, protocol, nuisance, seed=seed, cell_id=name)


@dataclass(frozen=True)
class Goods:
    """The good files every run includes, and a template recording to damage."""

    files: tuple[Path, ...]
    template: Recording


@pytest.fixture(scope="module")
def goods(tmp_path_factory) -> Goods:
    folder = tmp_path_factory.mktemp("goods")
    a = simulate_cell(PASSIVE, PROTOCOL, RIG, seed=1, cell_id="good_a")
    b = simulate_cell(WITH_IH, PROTOCOL, RIG, seed=2, cell_id="good_b")
    files = (write_nwb([a], folder / "good_a.nwb"), write_csv(b, folder / "good_b.csv", decimals=4))
    return Goods(files, simulate("template", seed=3))


# ---- running the command in-process ------------------------------------------------------------


@dataclass
class Outcome:
    code: int
    stderr: str
    out: Path

    def cells(self) -> pd.DataFrame:
        return pd.read_csv(self.out / "cells.csv").set_index("cell_id")

    def sweeps(self) -> pd.DataFrame:
        return pd.read_csv(self.out / "sweeps.csv")

    def info(self) -> dict:
        return json.loads((self.out / "run.json").read_text(encoding="utf-8"))


def _drop_console_handlers() -> None:
    # cli.main adds a stderr handler bound to the stream of the moment; drop it between runs so
    # each run's messages land in its own capture.
    logger = logging.getLogger("patchbatch")
    for handler in list(logger.handlers):
        if getattr(handler, "_patchbatch_console", False):
            logger.removeHandler(handler)


def run_cli(args: list[str], out: Path) -> Outcome:
    """``patchbatch run ARGS -o OUT -q`` in this process; exit status and stderr."""
    _drop_console_handlers()
    err = io.StringIO()
    try:
        with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
            code = main(["run", *map(str, args), "-o", str(out), "-q"])
    finally:
        _drop_console_handlers()
    return Outcome(code, err.getvalue(), out)


def leftovers(out: Path) -> list[str]:
    """Temporary or hidden files the writers left behind (the cache folder is expected)."""
    if not out.exists():
        return []
    return sorted(
        str(p.relative_to(out))
        for p in out.rglob("*")
        if (".tmp" in p.name or p.name.startswith("."))
        and not p.relative_to(out).parts[0] == ".patchbatch-cache"
    )


def assert_good_cells_complete(outcome: Outcome) -> None:
    cells = outcome.cells()
    for cell_id in GOOD:
        row = cells.loc[cell_id]
        assert row["status"] == "ok", (cell_id, row["status"])
        assert math.isfinite(row["rin_mohm"]) and math.isfinite(row["tau_ms"]), cell_id
        assert row["n_sweeps"] == 6 and row["n_sweeps_used"] >= 4, cell_id
    sweeps = outcome.sweeps()
    for cell_id in GOOD:
        assert (sweeps["cell_id"] == cell_id).sum() == 6, cell_id
    assert leftovers(outcome.out) == []


# ---- builders of broken files --------------------------------------------------------------------


def _rec(template: Recording, sweeps) -> Recording:
    return replace(template, sweeps=tuple(sweeps))


def _set_attr(path: Path, obj: str, attr: str, value) -> Path:
    with h5py.File(path, "r+") as f:
        f[obj].attrs[attr] = value
    return path


RESP0 = "acquisition/e0_response_0000"
STIM0 = "stimulus/presentation/e0_stimulus_0000"


def _nwb_of(g: Goods, path: Path, sweeps=None) -> Path:
    return write_nwb([_rec(g.template, sweeps if sweeps is not None else g.template.sweeps)], path)


def _write_pynwb(nwbfile: NWBFile, path: Path) -> Path:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with NWBHDF5IO(str(path), mode="w") as io_:
            io_.write(nwbfile)
    return path


def _nwbfile() -> tuple[NWBFile, object]:
    import datetime as dt

    nwbfile = NWBFile(
        session_description="invented broken file",
        identifier="broken-0001",
        session_start_time=dt.datetime(2026, 3, 4, 9, 30, tzinfo=dt.UTC),
    )
    device = nwbfile.create_device(name="amp")
    electrode = nwbfile.create_icephys_electrode(name="e1", device=device, description="whole cell")
    return nwbfile, electrode


def _series(cls, g: Goods, k: int, electrode, data=None, **extra):
    sweep = g.template.sweeps[k]
    if data is None:
        data = (sweep.current if "Stimulus" in cls.__name__ else sweep.voltage).astype(np.float32)
    return cls(
        name=f"{cls.__name__}_{k}",
        data=data,
        electrode=electrode,
        rate=sweep.rate,
        starting_time=float(k),
        gain=1.0,
        **extra,
    )


def build_empty(tmp: Path, g: Goods) -> Path:
    path = tmp / "bad_empty.nwb"
    path.touch()
    return path


def build_random_nwb(tmp: Path, g: Goods) -> Path:
    path = tmp / "bad_random.nwb"
    path.write_bytes(np.random.default_rng(11).bytes(4096))
    return path


def build_random_nix(tmp: Path, g: Goods) -> Path:
    path = tmp / "bad_random.nix"
    path.write_bytes(np.random.default_rng(12).bytes(4096))
    return path


def build_random_csv(tmp: Path, g: Goods) -> Path:
    path = tmp / "bad_random.csv"
    path.write_bytes(b"\xff\xfe" + np.random.default_rng(13).bytes(4096))
    return path


def build_truncated(tmp: Path, g: Goods) -> Path:
    path = _nwb_of(g, tmp / "bad_truncated.nwb")
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    return path


def build_plain_hdf5(tmp: Path, g: Goods) -> Path:
    path = tmp / "bad_plain.nwb"
    with h5py.File(path, "w") as f:
        f["voltage"] = g.template.sweeps[0].voltage
    return path


def build_voltage_clamp_only(tmp: Path, g: Goods) -> Path:
    nwbfile, el = _nwbfile()
    for k in range(2):
        stim = _series(VoltageClampStimulusSeries, g, k, el, data=np.zeros(100, np.float32))
        resp = _series(VoltageClampSeries, g, k, el, data=np.zeros(100, np.float32))
        nwbfile.add_intracellular_recording(electrode=el, stimulus=stim, response=resp)
    return _write_pynwb(nwbfile, tmp / "bad_vclamp.nwb")


def build_stimulus_only(tmp: Path, g: Goods) -> Path:
    nwbfile, el = _nwbfile()
    for k in range(2):
        nwbfile.add_stimulus(_series(CurrentClampStimulusSeries, g, k, el))
    return _write_pynwb(nwbfile, tmp / "bad_stimonly.nwb")


def build_unpaired(tmp: Path, g: Goods) -> Path:
    nwbfile, el = _nwbfile()  # two responses, one stimulus, no sweep numbers, no table
    for k in range(2):
        nwbfile.add_acquisition(_series(CurrentClampSeries, g, k, el))
    nwbfile.add_stimulus(_series(CurrentClampStimulusSeries, g, 0, el))
    return _write_pynwb(nwbfile, tmp / "bad_unpaired.nwb")


def build_duplicate_numbers(tmp: Path, g: Goods) -> Path:
    sweeps = [replace(s, number=1 if s.number == 3 else s.number) for s in g.template.sweeps]
    path = tmp / "bad_dupes.csv"
    return write_csv(_rec(g.template, sweeps), path, decimals=3)


def build_current_in_volts(tmp: Path, g: Goods) -> Path:
    return _set_attr(_nwb_of(g, tmp / "bad_i_volts.nwb"), f"{STIM0}/data", "unit", "volts")


def build_voltage_in_amperes(tmp: Path, g: Goods) -> Path:
    return _set_attr(_nwb_of(g, tmp / "bad_v_amps.nwb"), f"{RESP0}/data", "unit", "amperes")


def build_unknown_unit_nwb(tmp: Path, g: Goods) -> Path:
    return _set_attr(_nwb_of(g, tmp / "bad_unit.nwb"), f"{RESP0}/data", "unit", "furlongs")


def build_mv_labelled_volts(tmp: Path, g: Goods) -> Path:
    path = write_csv(g.template, tmp / "bad_mv_as_v.csv", decimals=3)
    return _relabel(path, "voltage_mv", "voltage_v")  # -70 read as -70 V


def build_pa_labelled_amperes(tmp: Path, g: Goods) -> Path:
    path = write_csv(g.template, tmp / "bad_pa_as_a.csv", decimals=3)
    return _relabel(path, "current_pa", "current_a")  # -80 read as -80 A


def build_unknown_unit_csv(tmp: Path, g: Goods) -> Path:
    path = write_csv(g.template, tmp / "bad_unit.csv", decimals=3)
    text = path.read_text().replace("voltage_mv", "voltage_kv", 1)
    path.write_text(text)
    return path


def build_dimensionless_nix(tmp: Path, g: Goods) -> Path:
    from neo.io import NixIO

    block = neo.Block(name="recordings")
    seg = neo.Segment(name="sweep 0", index=0)
    seg.analogsignals.append(
        neo.AnalogSignal(
            g.template.sweeps[0].voltage.reshape(-1, 1),
            units=pq.dimensionless,
            sampling_rate=10_000 * pq.Hz,
            name="amplifier out",
        )
    )
    block.segments.append(seg)
    path = tmp / "bad_units.nix"
    io_ = NixIO(str(path), mode="ow")
    try:
        io_.write_block(block)
    finally:
        io_.close()
    return path


def _neo_nix(path: Path, signals: list[tuple[np.ndarray, str, str]]) -> Path:
    """A NIX file of one segment holding the given (samples, units, name) signals."""
    from neo.io import NixIO

    block = neo.Block(name="recordings")
    seg = neo.Segment(name="sweep 0", index=0)
    for data, units, name in signals:
        seg.analogsignals.append(
            neo.AnalogSignal(
                data.reshape(-1, 1), units=units, sampling_rate=10_000 * pq.Hz, name=name
            )
        )
    block.segments.append(seg)
    io_ = NixIO(str(path), mode="ow")
    try:
        io_.write_block(block)
    finally:
        io_.close()
    return path


def build_current_only_nix(tmp: Path, g: Goods) -> Path:
    s = g.template.sweeps[0]
    return _neo_nix(tmp / "bad_current_only.nix", [(s.current * 1e12, "pA", "I")])


def build_unpairable_nix(tmp: Path, g: Goods) -> Path:
    s = g.template.sweeps[0]
    signals = [(s.voltage * 1e3, "mV", "V1"), (s.voltage * 1e3, "mV", "V2")]
    return _neo_nix(tmp / "bad_unpairable.nix", [*signals, (s.current * 1e12, "pA", "I")])


def build_truncated_nix(tmp: Path, g: Goods) -> Path:
    from pipeline.writers import write_nix

    path = write_nix([g.template], tmp / "bad_truncated.nix")
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 3])
    return path


def build_zero_rate(tmp: Path, g: Goods) -> Path:
    path = _nwb_of(g, tmp / "bad_rate.nwb")
    return _set_attr(path, f"{RESP0}/starting_time", "rate", 0.0)


def build_length_mismatch(tmp: Path, g: Goods) -> Path:
    s = g.template.sweeps[0]
    nwbfile, el = _nwbfile()  # our writer keeps arrays equal; pynwb writes what it is given
    stim = _series(CurrentClampStimulusSeries, g, 0, el, data=s.current[:-100].astype(np.float32))
    resp = _series(CurrentClampSeries, g, 0, el)
    nwbfile.add_intracellular_recording(electrode=el, stimulus=stim, response=resp)
    return _write_pynwb(nwbfile, tmp / "bad_ragged.nwb")


def build_nan_current(tmp: Path, g: Goods) -> Path:
    s = g.template.sweeps[1]
    i = np.array(s.current)
    i[2000:2010] = np.nan
    sweeps = [replace(s, current=i) if s.number == 1 else s for s in g.template.sweeps]
    return _nwb_of(g, tmp / "bad_nan_current.nwb", sweeps)


def build_all_nan_voltage(tmp: Path, g: Goods) -> Path:
    sweeps = [
        replace(s, voltage=np.full(s.n_samples, np.nan)) if s.number == 4 else s
        for s in g.template.sweeps
    ]
    return _nwb_of(g, tmp / "bad_all_nan.nwb", sweeps)


def build_three_samples(tmp: Path, g: Goods) -> Path:
    tiny = Sweep(np.full(3, -0.07), np.zeros(3), 10_000.0, 9, start_time=60.0)
    return write_csv(_rec(g.template, [*g.template.sweeps, tiny]), tmp / "bad_tiny.csv")


def build_three_samples_nwb(tmp: Path, g: Goods) -> Path:
    tiny = Sweep(np.full(3, -0.07), np.zeros(3), 10_000.0, 9, start_time=60.0)
    return _nwb_of(g, tmp / "bad_tiny.nwb", [*g.template.sweeps, tiny])


def build_missing(tmp: Path, g: Goods) -> Path:
    return tmp / "bad_ghost.nwb"


def build_unknown_extension(tmp: Path, g: Goods) -> Path:
    path = tmp / "bad_cell.xyz"
    path.write_text("sweep,time_s,voltage_mv\n")
    return path


def build_header_only(tmp: Path, g: Goods) -> Path:
    path = tmp / "bad_header.csv"
    path.write_text("sweep,time_s,voltage_mv,current_pa\n")
    return path


def build_dangling_reference(tmp: Path, g: Goods) -> Path:
    path = _nwb_of(g, tmp / "bad_dangling.nwb")
    with h5py.File(path, "r+") as f:  # a table row pointing at an object that is not stored
        rows = f["general/intracellular_ephys/intracellular_recordings/stimuli/stimulus"]
        row = rows[0]
        row["timeseries"] = f.create_group(None).ref  # unlinked: gone when the file closes
        rows[0] = row
    return path


def _row_at_a_dataset(tmp: Path, g: Goods, column: str, typed: bool) -> Path:
    """A file whose recordings-table row 1 points its ``column`` ("response" or "stimulus")
    at a large dataset, typed as a series or not."""
    path = _nwb_of(g, tmp / f"bad_row_{column}_at_dataset.nwb")
    with h5py.File(path, "r+") as f:
        fake = f.create_dataset("acquisition/not_a_series", data=np.zeros(200_000))
        if typed:
            fake.attrs["neurodata_type"] = "CurrentClampSeries"
            fake.attrs["namespace"] = "core"
        table = f["general/intracellular_ephys/intracellular_recordings"]
        rows = table[{"response": "responses/response", "stimulus": "stimuli/stimulus"}[column]]
        row = rows[1]
        row["timeseries"] = fake.ref
        rows[1] = row
    return path


def build_row_at_a_dataset(tmp: Path, g: Goods) -> Path:
    return _row_at_a_dataset(tmp, g, "response", typed=True)


def build_decimal_commas(tmp: Path, g: Goods) -> Path:
    path = write_csv(g.template, tmp / "bad_decimal_comma.csv", decimals=3)
    path.write_text(path.read_text().replace(",", ";").replace(".", ","))  # a spreadsheet export
    return path


# (id, builder, the whole status after "<resolved path>: ", as a regex)
READ_FAILURES = [
    ("zero-length", build_empty, r"file is empty \(0 bytes\)"),
    ("random-bytes-nwb", build_random_nwb, r"cannot be read as NWB \(OSError: .*signature.*\)"),
    ("random-bytes-nix", build_random_nix, r"cannot be read by neo \(OSError: .*signature.*\)"),
    ("random-bytes-csv", build_random_csv, r"not a text file \(not UTF-8\)"),
    ("hdf5-truncated", build_truncated, r"cannot be read as NWB \(OSError: .*truncated file.*\)"),
    ("hdf5-not-nwb", build_plain_hdf5, r"cannot be read as NWB \(.*not a valid NWB file.*\)"),
    (
        "voltage-clamp-only",
        build_voltage_clamp_only,
        r"no current-clamp series; skipped: VoltageClampSeries_0 \(VoltageClampSeries\), .*"
        r"VoltageClampStimulusSeries_1 \(VoltageClampStimulusSeries\)",
    ),
    (
        "stimulus-no-response",
        build_stimulus_only,
        r"no current-clamp series; skipped: CurrentClampStimulusSeries_0 "
        r"\(CurrentClampStimulusSeries without a response\), CurrentClampStimulusSeries_1 .*",
    ),
    (
        "unpaired-series",
        build_unpaired,
        r"electrode 'e1': 2 current-clamp series but 1 stimulus series and no sweep numbers to "
        r"pair them",
    ),
    (
        "duplicate-sweeps",
        build_duplicate_numbers,
        r"bad_dupes: duplicate sweep numbers \[1\] in one cell",
    ),
    (
        "current-in-volts",
        build_current_in_volts,
        r"e0_stimulus_0000 \(CurrentClampStimulusSeries\): unit 'volts' is not amperes-like",
    ),
    (
        "voltage-in-amperes",
        build_voltage_in_amperes,
        r"e0_response_0000 \(CurrentClampSeries\): unit 'amperes' is not volts-like",
    ),
    (
        "unknown-unit-nwb",
        build_unknown_unit_nwb,
        r"e0_response_0000 \(CurrentClampSeries\): unknown unit 'furlongs' \(expected volts\)",
    ),
    # A membrane potential stays within ~0.2 V and current-clamp steps within tens of nA
    # (common practice): -70 "V" and -80 "A" are samples in another unit than the header says.
    (
        "millivolts-as-volts",
        build_mv_labelled_volts,
        r"bad_mv_as_v: membrane potential of typically [\d.]+ V in magnitude; a membrane potential "
        r"stays within about 0\.2 V, so the voltage samples are most likely in another unit "
        r"\(millivolts\?\) than the file states",
    ),
    (
        "picoamps-as-amperes",
        build_pa_labelled_amperes,
        r"bad_pa_as_a: injected current up to [\d.]+ A in magnitude; .* most likely in another "
        r"unit \(pA or nA\?\) than the file states",
    ),
    (
        "unknown-unit-csv",
        build_unknown_unit_csv,
        r"column 'voltage_kv' has unknown unit 'kv'; expected one of voltage_v, voltage_mv, "
        r"voltage_uv",
    ),
    (
        "dimensionless-nix",
        build_dimensionless_nix,
        r"channel 'amplifier out': units 'dimensionless' are neither volts nor amperes",
    ),
    ("current-only-nix", build_current_only_nix, r"no voltage channel in any segment"),
    (
        "unpairable-channels-nix",
        build_unpairable_nix,
        r"sweep 0: 2 voltage channels but 1 current channels; cannot pair them",
    ),
    ("truncated-nix", build_truncated_nix, r"cannot be read by neo \(OSError: .*truncated.*\)"),
    (
        "zero-rate",
        build_zero_rate,
        r"e0_response_0000 \(CurrentClampSeries\): sampling rate 0.0 Hz is not finite and > 0",
    ),
    (
        "length-mismatch",
        build_length_mismatch,
        r"CurrentClampSeries_0 \(CurrentClampSeries\) with stimulus CurrentClampStimulusSeries_0: "
        r"voltage has 7000 samples but current has 6900",
    ),
    (
        "nan-in-current",
        build_nan_current,
        r"e0_response_0001 \(CurrentClampSeries\): injected current has 10 NaN/Inf samples",
    ),
    (
        "all-nan-voltage",
        build_all_nan_voltage,
        r"e0_response_0004 \(CurrentClampSeries\): voltage has no finite sample \(all NaN or Inf\)",
    ),
    ("three-sample-sweep-csv", build_three_samples, r"sweep 9: fewer than 10 samples \(3\)"),
    (
        "three-sample-sweep-nwb",
        build_three_samples_nwb,
        r"e0_response_0009 \(CurrentClampSeries\): fewer than 10 samples \(3\)",
    ),
    ("missing-file", build_missing, r"no such file"),
    (
        "unknown-extension",
        build_unknown_extension,
        r"unknown extension '\.xyz'; supported: \.csv, \.nix, \.nwb, .*",
    ),
    ("header-only-csv", build_header_only, r"the table has a header but no samples"),
    (
        "dangling-reference-nwb",
        build_dangling_reference,
        r"cannot be read as NWB \(KeyError: 'Unable to open object by token.*'\)",
    ),
    (
        "row-at-a-dataset-nwb",
        build_row_at_a_dataset,
        r"cannot be read as NWB \(row 1 of the intracellular recordings table, counting from 0: "
        r"its response points at /acquisition/not_a_series, which is not a series group\)",
    ),
    (
        "decimal-commas-csv",
        build_decimal_commas,
        r"not a readable table \(ValueError: could not convert string to float: '[-0-9,]+'\); "
        r"numbers need '\.' as the decimal point, not ','",
    ),
]


@pytest.mark.parametrize(
    ("build", "status"),
    [pytest.param(b, s, id=i) for i, b, s in READ_FAILURES],
)
def test_unreadable_file_is_an_error_row_beside_complete_good_cells(goods, tmp_path, build, status):
    bad = build(tmp_path, goods)
    outcome = run_cli([*goods.files, bad, "--no-figures"], tmp_path / "out")
    assert outcome.code == 1, outcome.stderr
    assert "Traceback" not in outcome.stderr
    cells = outcome.cells()
    assert list(cells.index) == [*GOOD, bad.stem]  # input order kept
    row = cells.loc[bad.stem]
    pattern = rf"{re.escape(str(bad.resolve()))}: {status}"
    assert re.fullmatch(pattern, row["status"]), row["status"]
    assert not row["qc_pass"] and row["n_sweeps"] == 0
    assert re.search(pattern, outcome.stderr), outcome.stderr  # also logged for the user
    (error,) = outcome.info()["errors"]
    assert Path(error["file"]).name == bad.name and error["message"] == row["status"]
    assert "traceback" not in error  # an expected error, not a reader bug
    assert outcome.info()["counts"]["files_failed"] == 1
    assert_good_cells_complete(outcome)


def test_a_folder_of_junk_beside_good_cells_on_two_workers(goods, tmp_path):
    """All the unreadable files at once, in one folder searched recursively, on a process pool."""
    day = tmp_path / "day"
    day.mkdir()
    bad = []
    for case, build, _ in READ_FAILURES:
        if build in (build_missing, build_unknown_extension):  # not found by a folder search
            continue
        path = build(day, goods)
        bad.append(path.rename(day / f"{case}{path.suffix}"))  # distinct stems, distinct rows
    for good in goods.files:
        (day / good.name).write_bytes(good.read_bytes())
    outcome = run_cli([day, "-j", "2"], tmp_path / "out")
    assert outcome.code == 1, outcome.stderr
    cells = outcome.cells()
    assert set(cells.index) == {*GOOD, *(p.stem for p in bad)}
    for path in bad:
        status = cells.loc[path.stem, "status"]
        assert status.startswith(str(path.resolve())), status
    assert outcome.info()["counts"]["files_failed"] == len(bad)
    assert all("traceback" not in e for e in outcome.info()["errors"])
    assert_good_cells_complete(outcome)
    figures = sorted(p.name for p in (outcome.out / "figures").iterdir())
    assert figures == ["good_a.png", "good_b.png"]  # no figure for a file that was not read
    page = (outcome.out / "index.html").read_text(encoding="utf-8")
    assert all(path.stem in page for path in bad)  # failed cells are listed on the page


def test_notes_and_other_tables_in_a_day_folder_are_left_out_and_said(goods, tmp_path):
    day = tmp_path / "day"
    day.mkdir()
    for good in goods.files:
        (day / good.name).write_bytes(good.read_bytes())
    (day / "notes.txt").write_text("slice 3 looked swollen\nbath at 32 C\n")
    (day / "sheet_copy.csv").write_text("file,condition\ngood_a.nwb,ctrl\n")
    (day / "header_typo.csv").write_text("sweep,tme_s,voltage_mv\n0,0.0,-70\n")  # kept: a cell
    outcome = run_cli([day, "--no-figures"], tmp_path / "out")
    assert outcome.code == 1, outcome.stderr  # the damaged recording, not the notes
    assert sorted(outcome.cells().index) == sorted([*GOOD, "header_typo"])
    said = outcome.info()["warnings"]
    for name in ("notes.txt", "sheet_copy.csv"):
        line = f"{(day / name).resolve()}: left out, not a recording table"
        assert any(w.startswith(line) for w in said), said
        assert line in outcome.stderr
    # named on the command line, a file is always read (and its problem said)
    named = run_cli([*goods.files, day / "notes.txt", "--no-figures"], tmp_path / "out2")
    assert named.code == 1 and "notes" in named.cells().index


def test_a_folder_named_like_a_file_is_searched_not_opened(goods, tmp_path):
    day = tmp_path / "day"
    nested = day / "x.nwb"  # a folder with a recording's suffix
    nested.mkdir(parents=True)
    (day / "empty.nix").mkdir()
    (nested / "good_a.nwb").write_bytes(goods.files[0].read_bytes())
    (day / "good_b.csv").write_bytes(goods.files[1].read_bytes())
    outcome = run_cli([day, "--no-figures"], tmp_path / "out")
    assert outcome.code == 0, outcome.stderr
    assert sorted(outcome.cells().index) == list(GOOD)
    assert_good_cells_complete(outcome)


def test_a_folder_named_like_a_file_given_as_a_file_is_searched(goods, tmp_path):
    folder = tmp_path / "x.nwb"
    folder.mkdir()
    (folder / "good_a.nwb").write_bytes(goods.files[0].read_bytes())
    outcome = run_cli([folder, goods.files[1], "--no-figures"], tmp_path / "out")
    assert outcome.code == 0, outcome.stderr
    assert_good_cells_complete(outcome)


# ---- damaged but readable cells: analysed, the damage left out with its reason ---------------------


def _damage_sweeps(g: Goods, numbers: set[int], change: Callable[[np.ndarray], None]):
    out = []
    for s in g.template.sweeps:
        v = np.array(s.voltage)
        if s.number in numbers:
            change(v)
        out.append(replace(s, voltage=v))
    return out


def build_nan_runs(tmp: Path, g: Goods) -> Path:
    def nan_run(v):
        v[5000:5040] = np.nan  # in the relaxation after the step

    return _nwb_of(g, tmp / "bad_nanrun.nwb", _damage_sweeps(g, {0, 2}, nan_run))


def build_inf_runs(tmp: Path, g: Goods) -> Path:
    def inf_run(v):
        v[3000:3005] = np.inf  # during the step

    path = tmp / "bad_infrun.csv"
    return write_csv(_rec(g.template, _damage_sweeps(g, {1}, inf_run)), path)


def build_clipped(tmp: Path, g: Goods) -> Path:
    rec = simulate("clipped", nuisance=replace(RIG, clip_v=(-0.085, 0.05)))
    return write_nwb([rec], tmp / "bad_clipped.nwb")


def build_zero_step(tmp: Path, g: Goods) -> Path:
    steps = tuple(a * PA for a in (-80, -60, 0, -40, -20, 40))
    rec = simulate("zero", replace(PROTOCOL, amplitudes_a=steps))
    return write_nwb([rec], tmp / "bad_zero_step.nwb")


def build_no_hyperpolarizing(tmp: Path, g: Goods) -> Path:
    steps = tuple(a * PA for a in (20, 40, 60, 80, 100, 120))
    rec = simulate("depol", replace(PROTOCOL, amplitudes_a=steps))
    return write_nwb([rec], tmp / "bad_no_hyper.nwb")


def build_short_steps(tmp: Path, g: Goods) -> Path:
    rec = simulate("short", replace(PROTOCOL, step_s=0.03))  # 30 ms < the 200 ms ss window
    return write_nwb([rec], tmp / "bad_short_steps.nwb")


def build_mixed_rates(tmp: Path, g: Goods) -> Path:
    fast = simulate("fast", replace(PROTOCOL, rate_hz=20_000.0), seed=5)
    sweeps = [*g.template.sweeps[:3], *fast.sweeps[3:]]
    return write_nwb([_rec(g.template, sweeps)], tmp / "bad_mixed_rates.nwb")


def _relabel(path: Path, old: str, new: str) -> Path:
    path.write_text(path.read_text().replace(old, new, 1))
    return path


def build_no_current(tmp: Path, g: Goods) -> Path:
    sweeps = [replace(s, current=None) for s in g.template.sweeps]
    return write_csv(_rec(g.template, sweeps), tmp / "bad_no_current.csv", decimals=3)


def build_one_hyperpolarizing(tmp: Path, g: Goods) -> Path:
    rec = simulate("one", replace(PROTOCOL, amplitudes_a=(-50 * PA, 50 * PA, 100 * PA)))
    return write_nwb([rec], tmp / "bad_one_hyper.nwb")


def build_ms_labelled_seconds(tmp: Path, g: Goods) -> Path:
    path = write_csv(g.template, tmp / "bad_ms_as_s.csv", decimals=3)
    lines = path.read_text().splitlines()
    rows = [line.split(",") for line in lines[1:]]
    text = [lines[0]] + [",".join([r[0], repr(float(r[1]) * 1e3), *r[2:]]) for r in rows]
    path.write_text("\n".join(text) + "\n")  # times in ms under time_s: read at 10 Hz
    return path


def build_start_times_zero(tmp: Path, g: Goods) -> Path:
    sweeps = [replace(s, start_time=0.0) for s in g.template.sweeps]  # each sweep from 0
    return _nwb_of(g, tmp / "odd_t0.nwb", sweeps)


def build_start_times_backwards(tmp: Path, g: Goods) -> Path:
    sweeps = [replace(s, start_time=100.0 - 5.0 * s.number) for s in g.template.sweeps]
    return _nwb_of(g, tmp / "odd_backwards.nwb", sweeps)


def build_mixed_lengths(tmp: Path, g: Goods) -> Path:
    longer = simulate("long", replace(PROTOCOL, sweep_s=1.0), seed=5)
    return _nwb_of(g, tmp / "odd_lengths.nwb", [*g.template.sweeps[:3], *longer.sweeps[3:]])


def build_sparse_numbers(tmp: Path, g: Goods) -> Path:
    numbers = (5, 17, 200, 201, 999, 1000)
    sweeps = [replace(s, number=n) for s, n in zip(g.template.sweeps, numbers, strict=True)]
    return _nwb_of(g, tmp / "odd_sparse.nwb", sweeps)


def check_nan_runs(cells, sweeps, stem):
    mine = sweeps[sweeps.cell_id == stem].set_index("sweep")
    for k in (0, 2):
        assert not mine.loc[k, "used"]
        assert mine.loc[k, "excluded_because"] == "40 NaN or infinite samples"
    assert mine.loc[[1, 3, 4, 5], "used"].all()
    assert cells.loc[stem, "status"] == "ok" and cells.loc[stem, "n_sweeps_used"] == 4
    assert math.isfinite(cells.loc[stem, "rin_mohm"])


def check_inf_runs(cells, sweeps, stem):
    mine = sweeps[sweeps.cell_id == stem].set_index("sweep")
    assert mine.loc[1, "excluded_because"] == "5 NaN or infinite samples"
    assert mine.loc[1, "nonfinite_samples"] == 5
    assert cells.loc[stem, "status"] == "ok" and cells.loc[stem, "n_sweeps_used"] == 5


def check_clipped(cells, sweeps, stem):
    mine = sweeps[sweeps.cell_id == stem].set_index("sweep")
    # -80 pA x 222 MOhm = -17.8 mV from -70 mV: only the -80 pA sweep reaches the -85 mV rail
    assert re.fullmatch(
        r"amplifier clipped \(\d+ samples at the rail\)", mine.loc[0, "excluded_because"]
    )
    assert mine.loc[0, "clipped_samples"] > 100
    assert mine.loc[1:, "used"].all()
    assert cells.loc[stem, "status"] == "ok"


def check_zero_step(cells, sweeps, stem):
    mine = sweeps[sweeps.cell_id == stem].set_index("sweep")
    assert mine.loc[2, "step_kind"] == "no change"
    assert not mine.loc[2, "used"]
    assert cells.loc[stem, "status"] == "ok" and cells.loc[stem, "n_sweeps_used"] == 5


def check_zero_step_reason(cells, sweeps, stem):
    mine = sweeps[sweeps.cell_id == stem].set_index("sweep")
    assert mine.loc[2, "excluded_because"].startswith("not a usable step: "), mine.loc[
        2, "excluded_because"
    ]


def check_no_hyperpolarizing(cells, sweeps, stem):
    row = cells.loc[stem]
    assert row["status"] == "no usable hyperpolarizing sweep"
    assert not row["qc_pass"] and row["qc_reasons"] == "no usable hyperpolarizing sweep"
    assert math.isnan(row["rin_mohm"]) and math.isnan(row["tau_ms"])
    assert row["n_hyperpolarizing_used"] == 0


def check_short_steps(cells, sweeps, stem):
    mine = sweeps[sweeps.cell_id == stem]
    assert (mine["fit_reason"] == "too short: step of 30.0 ms").all()
    assert mine["rin_mohm"].isna().all() and mine["tau_ms"].isna().all()
    assert cells.loc[stem, "status"] == "no usable hyperpolarizing sweep"
    assert not cells.loc[stem, "qc_pass"]


def check_mixed_rates(cells, sweeps, stem):
    mine = sweeps[sweeps.cell_id == stem].set_index("sweep")
    assert list(mine["rate_khz"]) == [10.0, 10.0, 10.0, 20.0, 20.0, 20.0]
    assert cells.loc[stem, "status"] == "ok" and cells.loc[stem, "n_sweeps_used"] == 6
    # the same cell at either rate: Rin from the -80..-20 pA sweeps of both rates
    assert cells.loc[stem, "rin_mohm"] == pytest.approx(222.2, rel=0.03)


def check_no_current(cells, sweeps, stem):
    mine = sweeps[sweeps.cell_id == stem]
    assert (mine["step_kind"] == "no current").all()
    assert (
        mine["excluded_because"]
        == "not a usable step: no current stored and no step schedule in the config (set all "
        "four: steps.schedule_onset_s, schedule_duration_s, schedule_first_a and "
        "schedule_increment_a)"
    ).all()
    assert cells.loc[stem, "status"] == "no usable hyperpolarizing sweep"


def check_one_hyperpolarizing(cells, sweeps, stem):
    assert cells.loc[stem, "status"] == "ok", cells.loc[stem, "status"]
    assert cells.loc[stem, "rin_mohm"] == pytest.approx(222.2, rel=0.03)


def check_ms_labelled_seconds(cells, sweeps, stem):
    mine = sweeps[sweeps.cell_id == stem]
    assert (mine["rate_khz"] == 0.01).all()  # the 10 Hz shows in the table
    assert mine["rin_mohm"].isna().all() and mine["fit_reason"].str.len().gt(0).all()
    assert cells.loc[stem, "status"] == "no usable hyperpolarizing sweep"


def check_ms_labelled_seconds_reason(cells, sweeps, stem):
    # the reason names the cause (too few samples at 10 Hz), not the time (plenty of it)
    reasons = sweeps.loc[sweeps.cell_id == stem, "fit_reason"]
    assert reasons.str.contains(r"10 Hz|sample", regex=True).all(), reasons.iloc[0]
    assert not reasons.str.contains("too short").any(), reasons.iloc[0]


def check_plain_cell(cells, sweeps, stem):
    assert cells.loc[stem, "status"] == "ok" and cells.loc[stem, "n_sweeps_used"] == 6
    assert cells.loc[stem, "rin_mohm"] == pytest.approx(222.2, rel=0.03)
    assert cells.loc[stem, "tau_ms"] == pytest.approx(20.0, rel=0.05)


ANALYSED = [
    pytest.param(build_nan_runs, check_nan_runs, id="nan-runs"),
    pytest.param(build_inf_runs, check_inf_runs, id="inf-runs"),
    pytest.param(build_clipped, check_clipped, id="clipped-at-rail"),
    pytest.param(build_zero_step, check_zero_step, id="zero-amplitude-step"),
    pytest.param(build_no_hyperpolarizing, check_no_hyperpolarizing, id="no-hyperpolarizing"),
    pytest.param(build_short_steps, check_short_steps, id="steps-shorter-than-windows"),
    pytest.param(build_mixed_rates, check_mixed_rates, id="mixed-rates-in-one-cell"),
    pytest.param(build_no_current, check_no_current, id="no-current-no-schedule"),
    pytest.param(build_ms_labelled_seconds, check_ms_labelled_seconds, id="milliseconds-as-s"),
    pytest.param(
        build_ms_labelled_seconds, check_ms_labelled_seconds_reason, id="milliseconds-as-s-reason"
    ),
    pytest.param(build_start_times_zero, check_plain_cell, id="start-times-all-zero"),
    pytest.param(build_start_times_backwards, check_plain_cell, id="start-times-backwards"),
    pytest.param(build_mixed_lengths, check_plain_cell, id="sweeps-of-two-lengths"),
    pytest.param(build_sparse_numbers, check_plain_cell, id="sparse-sweep-numbers"),
    pytest.param(
        build_one_hyperpolarizing, check_one_hyperpolarizing, id="one-hyperpolarizing-step"
    ),
    pytest.param(
        build_zero_step,
        check_zero_step_reason,
        id="zero-amplitude-step-reason",
    ),
]


@pytest.mark.parametrize(("build", "check"), ANALYSED)
def test_damaged_cell_is_analysed_with_reasons(goods, tmp_path, build, check):
    bad = build(tmp_path, goods)
    outcome = run_cli([*goods.files, bad, "--no-figures"], tmp_path / "out")
    assert outcome.code == 0, outcome.stderr
    assert "Traceback" not in outcome.stderr
    assert outcome.info()["errors"] == []
    check(outcome.cells(), outcome.sweeps(), bad.stem)
    assert_good_cells_complete(outcome)


def test_files_with_the_same_stem_get_distinct_cell_ids_and_figures(goods, tmp_path):
    day = tmp_path / "day"
    for sub in ("rig1", "rig2"):
        (day / sub).mkdir(parents=True)
        (day / sub / "good_a.nwb").write_bytes(goods.files[0].read_bytes())
    outcome = run_cli([day], tmp_path / "out")
    ids = list(outcome.cells().index)
    assert len(ids) == 2 and len(set(ids)) == 2, ids
    assert len(list((outcome.out / "figures").glob("*.png"))) == 2


# ---- usage errors: sheet, config, output folder (exit 2, nothing half-written) ---------------------


def sheet(text: str | bytes) -> Callable[[Path, Goods], list[str]]:
    def build(tmp: Path, g: Goods) -> list[str]:
        path = tmp / "sheet.csv"
        path.write_bytes(text.encode() if isinstance(text, str) else text)
        return ["--sheet", str(path)]

    return build


def config(text: str) -> Callable[[Path, Goods], list[str]]:
    def build(tmp: Path, g: Goods) -> list[str]:
        path = tmp / "lab.toml"
        path.write_text(text, encoding="utf-8")
        return ["-c", str(path)]

    return build


USAGE_ERRORS = [
    pytest.param(
        sheet("animal,condition\nA1,ctrl\n"),
        r"\S*/sheet\.csv: needs a 'file' or 'cell_id' column to match cells; found columns: "
        r"animal, condition",
        id="sheet-missing-key-column",
    ),
    pytest.param(
        sheet("cell_id,condition\ngood_a,ctrl\ngood_b,ctrl\ngood_a,drug\n"),
        r"\S*/sheet\.csv: cell_id 'good_a' appears twice \(rows 2 and 4\)",
        id="sheet-duplicate-ids",
    ),
    pytest.param(
        sheet(b"file,condition\ngood_a.nwb,contr\xf4le\n"),
        r"\S*/sheet\.csv: not UTF-8 text \(byte 31: b'\\xf4'\); save the sheet as UTF-8 CSV",
        id="sheet-not-utf8",
    ),
    pytest.param(
        sheet(""),
        r"\S*/sheet\.csv: not a readable CSV table.*",
        id="sheet-empty",
    ),
    pytest.param(
        sheet("file,condition, condition\ngood_a.nwb,ctrl,drug\n"),
        r"\S*/sheet\.csv: .*column 'condition' .*twice.*",
        id="sheet-duplicate-column-names",
    ),
    pytest.param(
        lambda tmp, g: ["--sheet", str(tmp / "nowhere.csv")],
        r"\S*/nowhere\.csv: metadata sheet not found",
        id="sheet-missing",
    ),
    pytest.param(
        config("[passive]\nbaseline_windw_s = 0.1\n"),
        r"config error: \S*/lab\.toml: \[passive\] unknown key 'baseline_windw_s' \(did you mean "
        r"'baseline_window_s'\?\); allowed: baseline_window_s, .*",
        id="config-unknown-key",
    ),
    pytest.param(
        config("[passive]\nss_window_s = 'long'\n"),
        r"config error: \S*/lab\.toml: \[passive\] ss_window_s must be a number, got 'long' \(str\)",
        id="config-wrong-type",
    ),
    pytest.param(
        config("[passive]\nbaseline_window_s = 0.01\nmin_window_s = 0.05\n"),
        r"config error: \S*/lab\.toml: \[passive\] min_window_s is longer than baseline_window_s or ss_window_s: no window could "
        r"ever be accepted",
        id="config-contradictory-windows",
    ),
    pytest.param(
        config("[passive\nss_window_s = 0.2\n"),
        r"config error: \S*/lab\.toml: not valid TOML \(Expected ']' at the end of a table declaration \(at line 1, "
        r"column 9\)\)",
        id="config-not-toml",
    ),
    pytest.param(
        lambda tmp, g: ["-j", "0"],
        r"config error: -j/--workers must be at least 1, got 0",
        id="zero-workers",
    ),
]


@pytest.mark.parametrize(("build", "message"), USAGE_ERRORS)
def test_usage_error_exits_2_naming_the_problem_and_writes_no_outputs(
    goods, tmp_path, build, message
):
    extra = build(tmp_path, goods)
    outcome = run_cli([*goods.files, *extra, "--no-figures"], tmp_path / "out")
    assert outcome.code == 2
    assert re.fullmatch(rf"patchbatch: {message}\n", outcome.stderr), outcome.stderr
    assert "Traceback" not in outcome.stderr
    written = sorted(p.name for p in outcome.out.iterdir()) if outcome.out.exists() else []
    assert set(written) <= {"patchbatch.log"}, written  # no tables, page or run record


def test_sheet_rows_naming_missing_files_are_warnings(goods, tmp_path):
    text = "file,condition\ngood_a.nwb,ctrl\ngood_b.csv,drug\nghost.nwb,ctrl\n"
    extra = sheet(text)(tmp_path, goods)
    outcome = run_cli([*goods.files, *extra, "--no-figures"], tmp_path / "out")
    assert outcome.code == 0, outcome.stderr
    warning = r"sheet\.csv: row 4 \(file='ghost\.nwb'\) matches no input file"
    assert any(re.search(warning, w) for w in outcome.info()["warnings"])
    assert re.search(warning, outcome.stderr)
    assert list(outcome.cells()["condition"]) == ["ctrl", "drug"]
    assert_good_cells_complete(outcome)


def _file(tmp: Path) -> Path:
    path = tmp / "plain_file"
    path.write_text("not a folder")
    return path


OUT_FOLDER_ERRORS = [
    pytest.param(
        lambda tmp: _file(tmp) / "out",
        r"plain_file/out: cannot create the output folder \(.*Not a directory.*\)",
        id="out-parent-is-a-file",
    ),
    pytest.param(
        lambda tmp: _file(tmp),
        r"plain_file: exists and is not a folder",
        id="out-is-a-file",
    ),
]


@pytest.mark.parametrize(("where", "message"), OUT_FOLDER_ERRORS)
def test_unusable_output_folder_exits_2(goods, tmp_path, where, message):
    out = where(tmp_path)
    before = sorted(tmp_path.rglob("*"))
    outcome = run_cli([*goods.files, "--no-figures"], out)
    assert outcome.code == 2
    assert re.search(rf"^patchbatch: .*{message}$", outcome.stderr, flags=re.M), outcome.stderr
    assert sorted(tmp_path.rglob("*")) == before  # nothing created anywhere


def test_output_folder_not_writable_exits_2(goods, tmp_path, monkeypatch):
    # Tests run as root, whom permissions do not stop: the batch's own check is made to say no.
    out = tmp_path / "locked"
    real_access = os.access
    monkeypatch.setattr(
        "pipeline.batch.os.access",
        lambda p, mode: False if Path(p) == out and mode & os.W_OK else real_access(p, mode),
    )
    outcome = run_cli([*goods.files, "--no-figures"], out)
    assert outcome.code == 2
    assert re.search(r"locked: the output folder is not writable", outcome.stderr)
    assert list(out.iterdir()) == []


def test_folder_holding_another_runs_outputs_needs_force(goods, tmp_path):
    out = tmp_path / "out"
    assert run_cli([goods.files[0], "--no-figures"], out).code == 0
    before = {p.name: p.read_bytes() for p in out.iterdir() if p.is_file()}
    outcome = run_cli([goods.files[1], "--no-figures"], out)
    assert outcome.code == 2
    assert re.search(r"holds the outputs of a run with other inputs .*--force", outcome.stderr)
    after = {p.name: p.read_bytes() for p in out.iterdir() if p.is_file()}
    assert {k: v for k, v in after.items() if k != "patchbatch.log"} == {
        k: v for k, v in before.items() if k != "patchbatch.log"
    }


# ---- a write that fails midway --------------------------------------------------------------------


def _failing_page_writer(monkeypatch) -> list[Path]:
    """Make the page's writer write half its text, then fail as a full disk does."""
    from pipeline.report import atomic

    attempts: list[Path] = []

    def half_then_enospc(path, text, encoding="utf-8"):
        attempts.append(Path(path))
        with atomic.atomic_path(path) as tmp, open(tmp, "w", encoding=encoding) as fh:
            fh.write(text[: len(text) // 2])
            fh.flush()
            raise OSError(errno.ENOSPC, "No space left on device", str(tmp))

    monkeypatch.setattr("pipeline.report.page.atomic_write_text", half_then_enospc)
    return attempts


def _run_allowing_a_crash(args, out) -> Outcome | OSError:
    try:
        return run_cli(args, out)
    except OSError as exc:  # the command should not crash; the state on disk is checked anyway
        return exc


def _tables_complete(out: Path) -> None:
    cells = pd.read_csv(out / "cells.csv").set_index("cell_id")
    assert list(cells.index) == list(GOOD) and (cells["status"] == "ok").all()
    assert pd.read_parquet(out / "cells.parquet")["cell_id"].tolist() == list(GOOD)
    assert (pd.read_csv(out / "sweeps.csv")["cell_id"].value_counts() == 6).all()


def test_failed_page_write_leaves_no_partial_file_and_earlier_outputs_intact(
    goods, tmp_path, monkeypatch
):
    out = tmp_path / "out"
    attempts = _failing_page_writer(monkeypatch)
    _run_allowing_a_crash([*goods.files, "--no-figures"], out)
    assert attempts == [out / "index.html"]
    assert not (out / "index.html").exists()  # no half page
    assert not (out / "run.json").exists()  # the run is not recorded as finished
    assert leftovers(out) == []
    _tables_complete(out)  # written before the failure: whole and readable


def test_failed_page_write_keeps_the_previous_page(goods, tmp_path, monkeypatch):
    out = tmp_path / "out"
    args = [*goods.files, "--no-figures"]
    assert run_cli(args, out).code == 0
    page, record = (out / "index.html").read_bytes(), (out / "run.json").read_bytes()
    _failing_page_writer(monkeypatch)
    _run_allowing_a_crash(args, out)  # the same command again: allowed, served from the cache
    assert (out / "index.html").read_bytes() == page
    assert (out / "run.json").read_bytes() == record
    assert leftovers(out) == []
    _tables_complete(out)


def test_failed_write_exits_2_naming_the_file(goods, tmp_path, monkeypatch):
    _failing_page_writer(monkeypatch)
    outcome = _run_allowing_a_crash([*goods.files, "--no-figures"], tmp_path / "out")
    assert isinstance(outcome, Outcome)
    assert outcome.code == 2
    assert re.search(r"index\.html.*No space left on device", outcome.stderr)
    # said once on the console (it was printed twice, by the logger and by the command), and
    # in the run's log file, which had no word of why the run stopped
    assert outcome.stderr.count("No space left on device") == 1, outcome.stderr
    log_text = (tmp_path / "out" / "patchbatch.log").read_text()
    assert re.search(r"ERROR .*index\.html.*No space left on device", log_text), log_text


def test_same_command_after_a_failed_write_completes_the_run(goods, tmp_path, monkeypatch):
    out = tmp_path / "out"
    args = [*goods.files, "--no-figures"]
    with monkeypatch.context() as patch:
        _failing_page_writer(patch)
        _run_allowing_a_crash(args, out)
    outcome = run_cli(args, out)
    assert outcome.code == 0, outcome.stderr
    assert (out / "index.html").is_file() and (out / "run.json").is_file()


def test_cell_without_current_is_analysed_from_the_config_schedule(goods, tmp_path):
    bad = build_no_current(tmp_path, goods)
    lab = tmp_path / "lab.toml"
    lab.write_text(
        "[steps]\nschedule_onset_s = 0.1\nschedule_duration_s = 0.3\n"
        "schedule_first_a = -80e-12\nschedule_increment_a = 20e-12\n"
    )
    outcome = run_cli([*goods.files, bad, "-c", lab, "--no-figures"], tmp_path / "out")
    assert outcome.code == 0, outcome.stderr
    sweeps = outcome.sweeps()
    mine = sweeps[sweeps.cell_id == bad.stem]
    # the schedule says -80, -60, ... +20 pA; the file holds -80..-20, +40, +80: the first four agree
    assert list(mine["step_pa"].round(6))[:4] == [-80.0, -60.0, -40.0, -20.0]
    row = outcome.cells().loc[bad.stem]
    assert row["status"] == "ok" and row["rin_mohm"] == pytest.approx(222.2, rel=0.03)
    assert_good_cells_complete(outcome)


def test_bom_and_crlf_text_file_is_read_like_any_other(goods, tmp_path):
    day = tmp_path / "day"
    day.mkdir()
    (day / "good_a.nwb").write_bytes(goods.files[0].read_bytes())
    text = goods.files[1].read_bytes().replace(b"\n", b"\r\n")
    (day / "good_b.csv").write_bytes(b"\xef\xbb\xbf" + text)  # a spreadsheet's UTF-8 export
    outcome = run_cli([day, "--no-figures"], tmp_path / "out")
    assert outcome.code == 0, outcome.stderr
    assert_good_cells_complete(outcome)


def test_the_same_file_given_twice_is_analysed_once(goods, tmp_path):
    twice = [goods.files[0], goods.files[0].parent / ".." / "goods0" / goods.files[0].name]
    outcome = run_cli([*twice, goods.files[1], "--no-figures"], tmp_path / "out")
    assert outcome.code == 0, outcome.stderr
    assert list(outcome.cells().index) == list(GOOD)


def test_qc_rule_naming_a_missing_column_warns_and_fails_the_cells(goods, tmp_path):
    lab = tmp_path / "lab.toml"
    lab.write_text(
        '[[qc.rule]]\nname = "typo"\ncolumn = "rin_mohms"\nscope = "cell"\nmax = 3\n'
        'action = "fail"\n'
    )
    outcome = run_cli([*goods.files, "-c", lab, "--no-figures"], tmp_path / "out")
    assert outcome.code == 0, outcome.stderr
    assert re.search(
        r"QC rule 'typo' names column 'rin_mohms', not in the cell table \(did you mean "
        r"'rin_mohm'\?\)",
        outcome.stderr,
    )
    cells = outcome.cells()
    assert (cells["status"] == "ok").all() and not cells["qc_pass"].any()
    assert cells["qc_reasons"].str.contains("QC rule 'typo' names column 'rin_mohms'").all()


def test_a_folder_without_recordings_is_reported(tmp_path):
    empty = tmp_path / "day"
    empty.mkdir()
    (empty / "notes.docx").write_bytes(b"invented lab notes")
    outcome = run_cli([empty, "--no-figures"], tmp_path / "out")
    assert re.search(r"day: no recording files? found", outcome.stderr), outcome.stderr


def test_nwb_the_direct_reader_finds_corrupt_is_not_handed_to_pynwb(goods, tmp_path, monkeypatch):
    # Found by mutating bytes of a written file: for some damaged files the pynwb fallback
    # crashed the process (segfault in h5py under hdmf), which takes a pool's other cells with it.
    from pipeline.readers import nwb

    calls = []
    monkeypatch.setattr(nwb, "_read_pynwb", lambda path: calls.append(path) or [])
    bad = build_dangling_reference(tmp_path, goods)
    with pytest.raises(CorruptFileError, match=r"bad_dangling\.nwb: cannot be read as NWB"):
        open_recordings(bad)
    assert calls == []


@pytest.mark.parametrize(
    ("column", "typed"), [("response", True), ("response", False), ("stimulus", False)]
)
def test_a_table_row_at_a_dataset_is_refused_without_reading_it(
    goods, tmp_path, monkeypatch, column, typed
):
    # Treated as a series, the dataset was first read element by element (seconds for a large
    # one) only to fail on its missing members; an untyped one was skipped as voltage clamp.
    bad = _row_at_a_dataset(tmp_path, goods, column, typed)
    reads = []
    monkeypatch.setattr(h5py.Dataset, "__iter__", lambda self: reads.append(self.name) or iter(()))
    with pytest.raises(CorruptFileError, match=rf"its {column} points at /acquisition/not_a_s"):
        open_recordings(bad)
    assert reads == []


def _dies_on_crash_files(path, *args, **kwargs):
    """analyse_file, except that a worker handed a file named crash* dies (as on a segfault)."""
    import signal

    from pipeline.analysis import analyse_file

    if "crash" in Path(path).name:
        os.kill(os.getpid(), signal.SIGKILL)
    return analyse_file(path, *args, **kwargs)


def test_a_worker_that_dies_loses_only_its_own_file(goods, tmp_path, monkeypatch):
    # Pool workers are forked, so they inherit the patched function (Linux default start).
    # The first file kills its worker at once, while the others are running or queued.
    monkeypatch.setattr("pipeline.batch.analyse_file", _dies_on_crash_files)
    day = tmp_path / "day"
    day.mkdir()
    names = ["a0-crash.nwb", "a1.nwb", "a2.nwb", "a3.nwb", "a4.nwb", "a5.nwb"]
    for name in names:
        (day / name).write_bytes(goods.files[0].read_bytes())
    outcome = run_cli([day, "-j", "2", "--no-figures"], tmp_path / "out")
    assert outcome.code == 1, outcome.stderr
    cells = outcome.cells()
    assert sorted(cells.index) == [Path(n).stem for n in names]
    assert re.fullmatch(r".*a0-crash\.nwb: worker failed: .*", cells.loc["a0-crash", "status"])
    survivors = cells.drop(index="a0-crash")
    assert (survivors["status"] == "ok").all(), survivors["status"].to_dict()


@pytest.mark.parametrize(
    ("build", "status"),
    [pytest.param(b, s, id=i) for i, b, s in READ_FAILURES],
)
def test_inspect_names_the_file_and_the_problem(goods, tmp_path, build, status):
    bad = build(tmp_path, goods)
    err = io.StringIO()
    with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()) as out:
        code = main(["inspect", str(bad)])
    assert code == 1, out.getvalue()
    pattern = rf"patchbatch: {re.escape(str(bad))}: {status}\n"
    assert re.fullmatch(pattern, err.getvalue()), err.getvalue()


def test_scheduler_address_that_is_not_one_exits_2(goods, tmp_path):
    outcome = run_cli([*goods.files, "--scheduler", "nonsense", "--no-figures"], tmp_path / "o")
    assert outcome.code == 2
    assert re.fullmatch(r"patchbatch: .*'nonsense'.*\n", outcome.stderr), outcome.stderr


def test_unreachable_scheduler_exits_2_naming_it(goods, tmp_path):
    import dask
    import distributed  # noqa: F401  (its defaults must be in the config before set() saves it)

    with dask.config.set({"distributed.comm.timeouts.connect": "1s"}):
        outcome = run_cli(
            [*goods.files, "--scheduler", "tcp://127.0.0.1:9", "--no-figures"], tmp_path / "o"
        )
    assert outcome.code == 2
    assert "tcp://127.0.0.1:9" in outcome.stderr and "could not write" not in outcome.stderr
    assert outcome.stderr.count("cannot reach") == 1, outcome.stderr  # once, not twice


def test_nix_segment_with_current_only_is_listed_as_skipped(goods, tmp_path):
    from neo.io import NixIO

    block = neo.Block(name="recordings")
    for s in goods.template.sweeps:
        seg = neo.Segment(name=f"sweep {s.number}", index=s.number, sweep_number=s.number)
        for data, units, name in ((s.voltage, "V", "Vm"), (s.current, "A", "I")):
            seg.analogsignals.append(
                neo.AnalogSignal(
                    data.reshape(-1, 1), units=units, sampling_rate=s.rate * pq.Hz, name=name
                )
            )
        block.segments.append(seg)
    extra = neo.Segment(name="sweep 6", index=6, sweep_number=6)  # the voltage was not saved
    extra.analogsignals.append(
        neo.AnalogSignal(np.zeros((100, 1)), units="pA", sampling_rate=1e4 * pq.Hz, name="I")
    )
    block.segments.append(extra)
    path = tmp_path / "odd_current_only_sweep.nix"
    io_ = NixIO(str(path), mode="ow")
    try:
        io_.write_block(block)
    finally:
        io_.close()
    (rec,) = open_recordings(path)
    assert [s.number for s in rec.sweeps] == [0, 1, 2, 3, 4, 5]
    assert rec.skipped == ("sweep 6 (current only, no voltage channel)",)
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        assert main(["inspect", str(path)]) == 0
    assert "skipped: sweep 6 (current only, no voltage channel)" in out.getvalue()


def test_a_figure_that_fails_midway_loses_only_that_figure(goods, tmp_path, monkeypatch):
    from pipeline.report import atomic, figures

    real = figures.cell_figure

    def half_png_then_enospc(recording, *args, **kwargs):
        if recording.cell_id != "good_b":
            return real(recording, *args, **kwargs)
        path = args[3]
        with atomic.atomic_path(path) as tmp, open(tmp, "wb") as fh:
            fh.write(b"\x89PNG\r\n\x1a\n" + bytes(500))  # a PNG cut short
            raise OSError(errno.ENOSPC, "No space left on device", str(tmp))

    monkeypatch.setattr(figures, "cell_figure", half_png_then_enospc)
    outcome = run_cli([*goods.files], tmp_path / "out")
    assert outcome.code == 0, outcome.stderr  # every input analysed; a warning, not an error
    assert_good_cells_complete(outcome)  # good_b's values are kept
    assert sorted(p.name for p in (outcome.out / "figures").iterdir()) == ["good_a.png"]
    messages = [e["message"] for e in outcome.info()["errors"]] + outcome.info()["warnings"]
    assert any(
        re.search(r"good_b: figure not drawn \(OSError: .*No space left", m) for m in messages
    )
    page = (outcome.out / "index.html").read_text(encoding="utf-8")
    assert "figures/good_b.png" not in page


def test_failed_table_write_leaves_no_partial_table_and_the_rerun_completes(
    goods, tmp_path, monkeypatch
):
    from pipeline.report import atomic

    out = tmp_path / "out"
    args = [*goods.files, "--no-figures"]
    real = atomic.atomic_write_text

    def sweeps_fail(path, text, encoding="utf-8"):
        if Path(path).name != "sweeps.csv":
            return real(path, text, encoding)
        with atomic.atomic_path(path) as tmp, open(tmp, "w", encoding=encoding) as fh:
            fh.write(text[: len(text) // 3])
            raise OSError(errno.ENOSPC, "No space left on device", str(tmp))

    with monkeypatch.context() as patch:
        patch.setattr("pipeline.report.tables.atomic_write_text", sweeps_fail)
        failed = _run_allowing_a_crash(args, out)
    assert isinstance(failed, Outcome) and failed.code == 2
    assert re.search(r"sweeps\.csv.*No space left on device", failed.stderr), failed.stderr
    assert not (out / "sweeps.csv").exists() and leftovers(out) == []
    assert not (out / "run.json").exists()
    outcome = run_cli(args, out)  # the same command again brings the folder up to date
    assert outcome.code == 0, outcome.stderr
    assert_good_cells_complete(outcome)
    assert outcome.info()["counts"]["cached"] == 2  # nothing analysed twice


def test_bad_files_on_a_dask_cluster_give_the_same_tables(goods, tmp_path):
    pytest.importorskip("distributed")
    day = tmp_path / "day"
    day.mkdir()
    for build in (build_empty, build_truncated, build_unpaired, build_nan_runs, build_zero_step):
        build(day, goods)
    for good in goods.files:
        (day / good.name).write_bytes(good.read_bytes())
    local = run_cli([day, "-j", "1", "--no-figures"], tmp_path / "local")
    dask = run_cli([day, "--scheduler", "local", "-j", "2", "--no-figures"], tmp_path / "dask")
    assert local.code == dask.code == 1, dask.stderr
    for name in ("cells.csv", "sweeps.csv"):
        assert (dask.out / name).read_bytes() == (local.out / name).read_bytes(), name
    assert_good_cells_complete(dask)
