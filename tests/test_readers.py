"""Readers and writers: round trips through NWB, NIX, CSV and every bad input's error.

Every expected value comes from the arrays the test wrote (seeded), stored as float32 where the
format stores float32, so equality checks are exact.
"""

from __future__ import annotations

import datetime as dt
import re
import warnings
from pathlib import Path

import h5py
import neo
import numpy as np
import pytest
import quantities as pq
from pynwb import NWBHDF5IO, NWBFile
from pynwb.file import Subject
from pynwb.icephys import (
    CurrentClampSeries,
    CurrentClampStimulusSeries,
    IZeroClampSeries,
    VoltageClampSeries,
    VoltageClampStimulusSeries,
)

from pipeline import recording as recording_module
from pipeline.errors import (
    BadSamplesError,
    CorruptFileError,
    NoCurrentClampError,
    RecordingError,
    ShapeError,
    UnitError,
    UnsupportedFormatError,
)
from pipeline.readers import make_sweep, open_recordings, supported_extensions
from pipeline.readers import nwb as nwb_reader
from pipeline.recording import Recording, Sweep
from pipeline.writers import write_csv, write_nix, write_nwb

RATE = 10_000.0
N = 60  # samples per sweep: tiny files, fast tests
START = dt.datetime(2026, 3, 4, 9, 30, tzinfo=dt.UTC)


def _voltage(seed: int, n: int = N) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return (-0.07 + 1e-3 * rng.standard_normal(n)).astype(np.float32)


def _current(amp: float, n: int = N) -> np.ndarray:
    i = np.zeros(n, dtype=np.float32)
    i[n // 4 : 3 * n // 4] = amp
    return i


def _as64(a: np.ndarray) -> np.ndarray:
    return np.asarray(a, dtype=np.float32).astype(np.float64)


def _nwbfile() -> NWBFile:
    return NWBFile(
        session_description="invented test day",
        identifier="test-0001",
        session_start_time=START,
        subject=Subject(subject_id="animal-7", species="Mus musculus"),
    )


def _write(nwbfile: NWBFile, path: Path) -> Path:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with NWBHDF5IO(str(path), mode="w") as io:
            io.write(nwbfile)
    return path


def _pair(nwbfile, electrode, k, *, number=True, name=None, **extra):
    """A stimulus/response pair for sweep k with known arrays (amplitude -10 pA * (k + 1))."""
    sn = {"sweep_number": np.uint64(k)} if number else {}
    tag = name or f"{electrode.name}_{k}"
    stim = CurrentClampStimulusSeries(
        name=f"stim_{tag}",
        data=_current(-10e-12 * (k + 1)),
        electrode=electrode,
        rate=RATE,
        starting_time=float(k),
        gain=1.0,
        **sn,
    )
    resp = CurrentClampSeries(
        name=f"resp_{tag}",
        data=_voltage(k),
        electrode=electrode,
        rate=RATE,
        starting_time=float(k),
        gain=1.0,
        stimulus_description="hyperpolarizing steps",
        **sn,
        **extra,
    )
    return stim, resp


def _electrode(nwbfile, name):
    dev = nwbfile.devices.get("amp") or nwbfile.create_device(name="amp")
    return nwbfile.create_icephys_electrode(name=name, device=dev, description="whole cell")


def _standard_file(path: Path, electrodes=("e1",), n_sweeps=3) -> Path:
    nwbfile = _nwbfile()
    for el_name in electrodes:
        el = _electrode(nwbfile, el_name)
        for k in range(n_sweeps):
            stim, resp = _pair(
                nwbfile,
                el,
                k,
                bias_current=-5e-12,
                bridge_balance=1.5e7,
                capacitance_compensation=3e-12,
            )
            nwbfile.add_intracellular_recording(electrode=el, stimulus=stim, response=resp)
    return _write(nwbfile, path)


def _set_attr(path: Path, obj: str, attr: str, value) -> None:
    with h5py.File(path, "r+") as f:
        f[obj].attrs[attr] = value


def _open(path) -> list[Recording]:
    """open_recordings; for an NWB file also checks that both NWB engines agree exactly.

    The default engine reads the NWB layout with h5py; pynwb is the reference it must match,
    in the Recordings it returns or in the error class and message it raises.
    """
    path = Path(path)
    got, err = _attempt(lambda: open_recordings(path))
    if path.suffix == ".nwb" and path.is_file() and path.stat().st_size > 0:
        ref, ref_err = _attempt(lambda: nwb_reader.read(path, engine="pynwb"))
        assert type(err) is type(ref_err)
        if err is None:
            _assert_identical(got, ref)
            _assert_identical(nwb_reader.read(path, engine="h5py"), ref)  # no silent fallback
        else:
            assert str(err) == str(ref_err)
    if err is not None:
        raise err
    return got


def _attempt(fn):
    try:
        return fn(), None
    except RecordingError as exc:
        return None, exc


def _assert_identical(a: list[Recording], b: list[Recording]) -> None:
    assert len(a) == len(b)
    for ra, rb in zip(a, b, strict=True):
        assert (ra.cell_id, ra.source_file, ra.electrode) == (
            rb.cell_id,
            rb.source_file,
            rb.electrode,
        )
        assert (ra.metadata, ra.skipped) == (rb.metadata, rb.skipped)
        assert len(ra.sweeps) == len(rb.sweeps)
        for sa, sb in zip(ra.sweeps, rb.sweeps, strict=True):
            assert (sa.number, sa.rate, sa.start_time) == (sb.number, sb.rate, sb.start_time)
            assert (sa.protocol, sa.settings) == (sb.protocol, sb.settings)
            np.testing.assert_array_equal(sa.voltage, sb.voltage)
            assert (sa.current is None) == (sb.current is None)
            if sa.current is not None:
                np.testing.assert_array_equal(sa.current, sb.current)


# ---- NWB --------------------------------------------------------------------------------------


def test_nwb_standard_layout_round_trips(tmp_path):
    path = _standard_file(tmp_path / "day1_slice2.nwb", electrodes=("e1", "e2"))
    recs = _open(path)
    assert [r.cell_id for r in recs] == ["day1_slice2-e1", "day1_slice2-e2"]
    assert [r.electrode for r in recs] == ["e1", "e2"]
    rec = recs[1]
    assert rec.source_file == str(path)
    assert [s.number for s in rec.sweeps] == [0, 1, 2]
    for k, s in enumerate(rec.sweeps):
        np.testing.assert_array_equal(s.voltage, _as64(_voltage(k)))
        np.testing.assert_array_equal(s.current, _as64(_current(-10e-12 * (k + 1))))
        assert s.rate == RATE
        assert s.start_time == float(k)
        assert s.protocol == "hyperpolarizing steps"
        assert s.settings == {
            "bias_current_a": -5e-12,
            "bridge_balance_ohm": 1.5e7,
            "capacitance_compensation_f": 3e-12,
        }
    assert rec.metadata == {
        "session_description": "invented test day",
        "identifier": "test-0001",
        "session_start_time": START.isoformat(),
        "subject_id": "animal-7",
        "species": "Mus musculus",
    }
    assert rec.skipped == ()


def test_nwb_one_electrode_gives_stem_as_cell_id(tmp_path):
    recs = _open(_standard_file(tmp_path / "cellA.nwb"))
    assert [r.cell_id for r in recs] == ["cellA"]


def test_nwb_pairs_by_sweep_number_without_table(tmp_path):
    nwbfile = _nwbfile()
    el = _electrode(nwbfile, "e1")
    pairs = [_pair(nwbfile, el, k) for k in range(3)]
    # Stimuli added in the reverse order, so pairing by order would mismatch them.
    for stim, _ in reversed(pairs):
        nwbfile.add_stimulus(stim, use_sweep_table=False)
    for _, resp in pairs:
        nwbfile.add_acquisition(resp, use_sweep_table=False)
    path = _write(nwbfile, tmp_path / "nosheet.nwb")
    (rec,) = _open(path)
    assert [s.number for s in rec.sweeps] == [0, 1, 2]
    for k, s in enumerate(rec.sweeps):
        np.testing.assert_array_equal(s.current, _as64(_current(-10e-12 * (k + 1))))
        np.testing.assert_array_equal(s.voltage, _as64(_voltage(k)))


def test_nwb_pairs_by_order_without_sweep_numbers(tmp_path):
    nwbfile = _nwbfile()
    el = _electrode(nwbfile, "e1")
    # Names sort as 10 < 2 < 3 alphabetically; starting_time gives the real order.
    for k, tag in enumerate(["2", "3", "10"]):
        stim, resp = _pair(nwbfile, el, k, number=False, name=tag)
        nwbfile.add_stimulus(stim, use_sweep_table=False)
        nwbfile.add_acquisition(resp, use_sweep_table=False)
    (rec,) = _open(_write(nwbfile, tmp_path / "byorder.nwb"))
    assert [s.number for s in rec.sweeps] == [0, 1, 2]
    for k, s in enumerate(rec.sweeps):
        assert s.start_time == float(k)
        np.testing.assert_array_equal(s.current, _as64(_current(-10e-12 * (k + 1))))


def _vc_pair(nwbfile, el, k):
    stim = VoltageClampStimulusSeries(
        name=f"vc_stim_{k}", data=np.zeros(N), electrode=el, rate=RATE, gain=1.0
    )
    resp = VoltageClampSeries(
        name=f"vc_resp_{k}", data=np.zeros(N), electrode=el, rate=RATE, gain=1.0
    )
    return stim, resp


def test_nwb_voltage_clamp_only_is_refused_naming_the_series(tmp_path):
    nwbfile = _nwbfile()
    el = _electrode(nwbfile, "e1")
    stim, resp = _vc_pair(nwbfile, el, 0)
    nwbfile.add_intracellular_recording(electrode=el, stimulus=stim, response=resp)
    path = _write(nwbfile, tmp_path / "vconly.nwb")
    with pytest.raises(NoCurrentClampError, match=r"vconly\.nwb: no current-clamp.*vc_resp_0"):
        _open(path)


def test_nwb_voltage_clamp_series_are_skipped_and_listed(tmp_path):
    nwbfile = _nwbfile()
    el = _electrode(nwbfile, "e1")
    stim, resp = _pair(nwbfile, el, 0)
    nwbfile.add_intracellular_recording(electrode=el, stimulus=stim, response=resp)
    vstim, vresp = _vc_pair(nwbfile, el, 1)
    nwbfile.add_intracellular_recording(electrode=el, stimulus=vstim, response=vresp)
    (rec,) = _open(_write(nwbfile, tmp_path / "mixed.nwb"))
    assert len(rec.sweeps) == 1
    assert set(rec.skipped) == {
        "vc_resp_1 (VoltageClampSeries)",
        "vc_stim_1 (VoltageClampStimulusSeries)",
    }


def test_nwb_izero_series_has_zero_current(tmp_path):
    nwbfile = _nwbfile()
    el = _electrode(nwbfile, "e1")
    resp = IZeroClampSeries(
        name="izero", data=_voltage(5), electrode=el, rate=RATE, sweep_number=np.uint64(4)
    )
    nwbfile.add_acquisition(resp, use_sweep_table=False)
    (rec,) = _open(_write(nwbfile, tmp_path / "izero.nwb"))
    (s,) = rec.sweeps
    assert s.number == 4
    np.testing.assert_array_equal(s.current, np.zeros(N))


def test_nwb_timestamps_give_the_rate_and_start(tmp_path):
    nwbfile = _nwbfile()
    el = _electrode(nwbfile, "e1")
    times = 2.5 + np.arange(N) / 20_000.0
    resp = CurrentClampSeries(name="r", data=_voltage(1), electrode=el, timestamps=times)
    nwbfile.add_acquisition(resp, use_sweep_table=False)
    (rec,) = _open(_write(nwbfile, tmp_path / "stamped.nwb"))
    (s,) = rec.sweeps
    assert s.rate == pytest.approx(20_000.0, rel=1e-12)
    assert s.start_time == 2.5
    assert s.current is None


def test_nwb_irregular_timestamps_are_refused(tmp_path):
    nwbfile = _nwbfile()
    el = _electrode(nwbfile, "e1")
    times = np.arange(N) / RATE
    times[30:] += 0.5  # a gap
    resp = CurrentClampSeries(name="r", data=_voltage(1), electrode=el, timestamps=times)
    nwbfile.add_acquisition(resp, use_sweep_table=False)
    path = _write(nwbfile, tmp_path / "gappy.nwb")
    with pytest.raises(ShapeError, match=r"gappy\.nwb: r \(CurrentClampSeries\).*irregular"):
        _open(path)


def test_nwb_table_rows_cutting_one_series(tmp_path):
    nwbfile = _nwbfile()
    el = _electrode(nwbfile, "e1")
    v = np.concatenate([_voltage(0), _voltage(1)])
    i = np.concatenate([_current(-1e-11), _current(-2e-11)])
    stim = CurrentClampStimulusSeries(name="s", data=i, electrode=el, rate=RATE, gain=1.0)
    resp = CurrentClampSeries(name="r", data=v, electrode=el, rate=RATE, gain=1.0)
    for k in range(2):
        nwbfile.add_intracellular_recording(
            electrode=el,
            stimulus=stim,
            stimulus_start_index=k * N,
            stimulus_index_count=N,
            response=resp,
            response_start_index=k * N,
            response_index_count=N,
        )
    (rec,) = _open(_write(nwbfile, tmp_path / "cut.nwb"))
    assert [s.number for s in rec.sweeps] == [0, 1]
    assert rec.sweeps[1].start_time == pytest.approx(N / RATE)
    np.testing.assert_array_equal(rec.sweeps[1].voltage, _as64(_voltage(1)))
    np.testing.assert_array_equal(rec.sweeps[1].current, _as64(_current(-2e-11)))


def test_nwb_table_row_takes_the_stimulus_protocol_when_the_response_has_none(tmp_path):
    nwbfile = _nwbfile()
    el = _electrode(nwbfile, "e1")
    for k, described in enumerate((False, True)):
        stim = CurrentClampStimulusSeries(
            name=f"stim_{k}",
            data=_current(-1e-11),
            electrode=el,
            rate=RATE,
            gain=1.0,
            sweep_number=np.uint64(k),
            stimulus_description="step family A",
        )
        extra = {"stimulus_description": "hyperpolarizing steps"} if described else {}
        resp = CurrentClampSeries(
            name=f"resp_{k}",
            data=_voltage(k),
            electrode=el,
            rate=RATE,
            gain=1.0,
            sweep_number=np.uint64(k),
            **extra,
        )
        nwbfile.add_intracellular_recording(electrode=el, stimulus=stim, response=resp)
    (rec,) = _open(_write(nwbfile, tmp_path / "protocols.nwb"))
    assert [s.protocol for s in rec.sweeps] == ["step family A", "hyperpolarizing steps"]


def test_nwb_table_row_stimulus_carries_no_made_up_fields(tmp_path, monkeypatch):
    # the h5py engine reads a row's stimulus for its samples, rate and protocol only; the
    # fields it does not read must not look read (a start time of 0 s, say)
    import math

    rows = []
    finish = nwb_reader._finish
    monkeypatch.setattr(
        nwb_reader, "_finish", lambda path, table, *a: rows.extend(table) or finish(path, table, *a)
    )
    path = _standard_file(tmp_path / "rows.nwb")
    nwb_reader.read(path, engine="h5py")
    assert len(rows) == 3
    for response, stimulus in rows:
        assert response.electrode == "e1" and response.sweep_number is not None
        assert math.isfinite(response.start_time)
        assert stimulus.name == "stim_" + response.name[5:] and stimulus.rate == RATE
        assert stimulus.electrode == "" and stimulus.sweep_number is None
        assert math.isnan(stimulus.start_time) and stimulus.settings == {}


def test_write_nwb_round_trips(tmp_path):
    recs = [_recording("a", 3), _recording("b", 2, with_current=False)]
    path = write_nwb(recs, tmp_path / "w.nwb", subject_id="animal-9", session_start_time=START)
    out = _open(path)
    assert [r.cell_id for r in out] == ["w-a", "w-b"]
    assert out[0].metadata["subject_id"] == "animal-9"
    assert out[0].metadata["session_start_time"] == START.isoformat()
    _assert_same_sweeps(out[0], recs[0])
    _assert_same_sweeps(out[1], recs[1])
    assert not list(tmp_path.glob(".*"))  # no temporary file left behind


# ---- neo / NIX --------------------------------------------------------------------------------


def _recording(electrode: str, n: int, *, with_current: bool = True) -> Recording:
    sweeps = [
        Sweep(
            voltage=_as64(_voltage(10 + k)),
            current=_as64(_current(2e-11 * (k + 1))) if with_current else None,
            rate=RATE if k != 1 else 2 * RATE,  # different rates in one cell are allowed
            number=k + 1,
            start_time=3.0 * k,
            protocol="depolarizing steps",
            settings={"bias_current_a": 1e-12, "bridge_balance_ohm": 8e6},
        )
        for k in range(n)
    ]
    return Recording("x", "", electrode, tuple(sweeps))


def _assert_same_sweeps(got: Recording, want: Recording, *, settings: bool = True) -> None:
    assert len(got.sweeps) == len(want.sweeps)
    for a, b in zip(got.sweeps, want.sweeps, strict=True):
        assert (a.number, a.rate, a.start_time) == (b.number, b.rate, b.start_time)
        np.testing.assert_array_equal(a.voltage, b.voltage)
        if b.current is None:
            assert a.current is None
        else:
            np.testing.assert_array_equal(a.current, b.current)
        if settings:
            assert a.protocol == b.protocol
            assert a.settings == b.settings


def test_write_nix_round_trips(tmp_path):
    recs = [_recording("a", 3), _recording("b", 2, with_current=False)]
    recs[0] = Recording("x", "", "a", recs[0].sweeps, metadata={"subject_id": "animal-3"})
    out = _open(write_nix(recs, tmp_path / "w.nix"))
    assert [r.cell_id for r in out] == ["w-a", "w-b"]
    assert out[1].metadata["subject_id"] == "animal-3"
    _assert_same_sweeps(out[0], recs[0])
    _assert_same_sweeps(out[1], recs[1])


def _neo_block(units_v="mV", units_i="pA", n_seg=2, channels=2, with_current=True):
    """Segments with one multi-channel voltage signal and one current signal, no annotations."""
    block = neo.Block()
    for k in range(n_seg):
        seg = neo.Segment(index=k + 5)
        v = np.stack([_voltage(20 + k + c) * 1e3 for c in range(channels)], axis=1)
        seg.analogsignals.append(
            neo.AnalogSignal(
                v,
                units=units_v,
                sampling_rate=RATE * pq.Hz,
                name="Vm",
                array_annotations={"channel_names": np.array([f"ch{c}" for c in range(channels)])},
            )
        )
        if with_current:
            i = np.stack([_current(-3.0 * (k + 1 + c)) for c in range(channels)], axis=1)
            seg.analogsignals.append(
                neo.AnalogSignal(i, units=units_i, sampling_rate=RATE * pq.Hz, name="Im")
            )
        block.segments.append(seg)
    return block


def _write_neo_nix(block, path: Path) -> Path:
    io = neo.io.NixIO(str(path), mode="ow")
    try:
        io.write_block(block)
    finally:
        io.close()
    return path


def test_nix_written_by_neo_pairs_channels_by_order(tmp_path):
    path = _write_neo_nix(_neo_block(), tmp_path / "rig.nix")
    recs = _open(path)
    assert [r.cell_id for r in recs] == ["rig-ch0", "rig-ch1"]
    for c, rec in enumerate(recs):
        # NixIO does not store Segment.index (it reads back the order), and these segments
        # carry no sweep_number annotation: numbers are the order.
        assert [s.number for s in rec.sweeps] == [0, 1]
        for k, s in enumerate(rec.sweeps):
            # mV -> V and pA -> A: values from the arrays written, within float rounding
            np.testing.assert_allclose(s.voltage, _as64(_voltage(20 + k + c)), rtol=1e-6)
            np.testing.assert_allclose(s.current, _current(-3.0 * (k + 1 + c)) * 1e-12, rtol=1e-6)
            assert s.rate == RATE


def test_nix_without_current_channel_is_allowed(tmp_path):
    block = _neo_block(channels=1, with_current=False)
    block.segments[0].irregularlysampledsignals.append(
        neo.IrregularlySampledSignal(
            [0.0, 0.3, 0.4], [1.0, 2.0, 3.0], units="mV", time_units="s", name="marks"
        )
    )
    (rec,) = _open(_write_neo_nix(block, tmp_path / "vonly.nix"))
    assert rec.cell_id == "vonly"
    assert all(s.current is None for s in rec.sweeps)
    assert rec.skipped == ("marks (IrregularlySampledSignal)",)


def test_neo_dimensionless_channel_is_a_unit_error(tmp_path):
    block = _neo_block(channels=1, units_i="dimensionless")
    path = _write_neo_nix(block, tmp_path / "nounit.nix")
    with pytest.raises(UnitError, match=r"nounit\.nix: channel 'Im'.*neither volts nor amperes"):
        _open(path)


def test_neo_unequal_channel_counts_cannot_be_paired(tmp_path):
    block = _neo_block(channels=2)
    for seg in block.segments:
        seg.analogsignals[1] = seg.analogsignals[1][:, :1]
    path = _write_neo_nix(block, tmp_path / "odd.nix")
    with pytest.raises(ShapeError, match=r"odd\.nix: sweep 0: 2 voltage channels but 1 current"):
        _open(path)


def test_other_neo_format_through_io_detection(tmp_path):
    path = tmp_path / "legacy.mat"
    neo.io.NeoMatlabIO(str(path)).write_block(_neo_block(channels=1))
    (rec,) = _open(path)
    assert rec.cell_id == "legacy"
    assert len(rec.sweeps) == 2
    np.testing.assert_allclose(rec.sweeps[1].voltage, _as64(_voltage(21)), rtol=1e-6)
    np.testing.assert_allclose(rec.sweeps[1].current, _current(-6.0) * 1e-12, rtol=1e-6)


# ---- text -------------------------------------------------------------------------------------


def test_csv_round_trips(tmp_path):
    rec = _recording("", 3)
    (out,) = _open(write_csv(rec, tmp_path / "cell7.csv"))
    assert out.cell_id == "cell7"
    assert [s.number for s in out.sweeps] == [1, 2, 3]
    for a, b in zip(out.sweeps, rec.sweeps, strict=True):
        assert a.rate == b.rate
        assert a.start_time == b.start_time
        # mV and pA as text and back: exact but for the last bit of the unit scaling
        np.testing.assert_allclose(a.voltage, b.voltage, rtol=1e-15, atol=0)
        np.testing.assert_allclose(a.current, b.current, rtol=1e-15, atol=0)
    header = (tmp_path / "cell7.csv").read_text().splitlines()[0]
    assert header == "sweep,time_s,voltage_mv,current_pa"


def test_tsv_with_ms_uv_na_comments_and_partial_nan(tmp_path):
    t_ms = np.arange(20) * 0.1
    lines = ["# invented demo cell", "Sweep\tTime_ms\tVoltage_uV\tCurrent_nA"]
    for k in (3, 4):
        for j, t in enumerate(t_ms):
            v = "nan" if (k, j) == (4, 7) else f"{-70000 + j}"
            lines.append(f"{k}\t{t:.1f}\t{v}\t{0.05 * k}")
    path = tmp_path / "tabbed.tsv"
    path.write_text("\n".join(lines) + "\n")
    (rec,) = _open(path)
    assert [s.number for s in rec.sweeps] == [3, 4]
    s = rec.sweeps[1]
    assert s.rate == pytest.approx(10_000.0, rel=1e-12)
    assert np.isnan(s.voltage[7])  # partial NaN runs are kept for the fitters to report
    assert s.voltage[8] == pytest.approx((-70000 + 8) * 1e-6, rel=1e-12)
    assert s.current[0] == pytest.approx(0.2e-9, rel=1e-12)


def test_csv_without_current_column(tmp_path):
    rows = "\n".join(f"1,{j / 1000:.3f},{-65 + 0.01 * j:.2f}" for j in range(12))
    path = tmp_path / "nocurrent.csv"
    path.write_text("sweep,time_s,voltage_mv\n" + rows + "\n")
    (rec,) = _open(path)
    assert rec.sweeps[0].current is None
    assert rec.sweeps[0].rate == pytest.approx(1000.0)


def test_csv_columns_of_other_kinds_are_ignored(tmp_path):
    # a `time_of_day` column failed the whole file: "unknown unit 'of_day'"
    rows = "\n".join(f"1,{j / 1000:.3f},{-65 + 0.01 * j:.2f},0,13:0{j % 10},x" for j in range(12))
    path = tmp_path / "extra.csv"
    path.write_text("sweep,time_s,voltage_mv,current_pa,time_of_day,current_step_label\n" + rows)
    (rec,) = _open(path)
    assert rec.sweeps[0].rate == pytest.approx(1000.0)
    assert rec.sweeps[0].voltage[0] == pytest.approx(-0.065)


# ---- bad inputs -------------------------------------------------------------------------------


def _csv(path: Path, header: str, rows: list[str]) -> Path:
    path.write_text(header + "\n" + "\n".join(rows) + "\n")
    return path


def _rows(n=12, sweep=1, v="-70", i="0", dt_s=1e-4):
    return [f"{sweep},{j * dt_s!r},{v},{i}" for j in range(n)]


def test_unknown_extension_lists_supported(tmp_path):
    path = tmp_path / "cell.xyz"
    path.write_text("data")
    with pytest.raises(UnsupportedFormatError, match=r"cell\.xyz: unknown extension.*\.nwb"):
        _open(path)


def test_folder_is_refused(tmp_path):
    folder = tmp_path / "run.nwb"
    folder.mkdir()
    with pytest.raises(UnsupportedFormatError, match=r"run\.nwb: is a folder"):
        _open(folder)


def test_missing_file(tmp_path):
    with pytest.raises(RecordingError, match=r"ghost\.nwb: no such file"):
        _open(tmp_path / "ghost.nwb")


@pytest.mark.parametrize("name", ["empty.nwb", "empty.nix", "empty.csv", "empty.abf"])
def test_zero_length_file(tmp_path, name):
    path = tmp_path / name
    path.touch()
    with pytest.raises(CorruptFileError, match=rf"{re.escape(name)}: file is empty"):
        _open(path)


def test_truncated_nwb(tmp_path):
    path = _standard_file(tmp_path / "cut_short.nwb")
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    with pytest.raises(CorruptFileError, match=r"cut_short\.nwb: cannot be read as NWB"):
        _open(path)


@pytest.mark.parametrize("name", ["junk.nwb", "junk.nix", "junk.abf"])
def test_garbage_binary(tmp_path, name):
    path = tmp_path / name
    path.write_bytes(np.random.default_rng(3).bytes(2048))
    with pytest.raises(CorruptFileError, match=rf"{re.escape(name)}: cannot be read"):
        _open(path)


def test_garbage_text(tmp_path):
    path = tmp_path / "junk.csv"
    path.write_bytes(b"\xff\xfe\x00\x01" * 50)
    with pytest.raises(CorruptFileError, match=r"junk\.csv: not a text file"):
        _open(path)


def test_nwb_response_in_amperes_is_a_unit_error(tmp_path):
    path = _standard_file(tmp_path / "amps.nwb", n_sweeps=1)
    _set_attr(path, "acquisition/resp_e1_0/data", "unit", "amperes")
    with pytest.raises(UnitError, match=r"amps\.nwb: resp_e1_0 .*'amperes' is not volts-like"):
        _open(path)


def test_nwb_unknown_unit_is_a_unit_error(tmp_path):
    path = _standard_file(tmp_path / "furlong.nwb", n_sweeps=1)
    _set_attr(path, "stimulus/presentation/stim_e1_0/data", "unit", "furlongs")
    with pytest.raises(UnitError, match=r"furlong\.nwb: stim_e1_0 .*unknown unit 'furlongs'"):
        _open(path)


@pytest.mark.parametrize("rate", [0.0, -1.0, np.nan, np.inf])
def test_nwb_bad_rate(tmp_path, rate):
    path = _standard_file(tmp_path / "norate.nwb", n_sweeps=1)
    _set_attr(path, "acquisition/resp_e1_0/starting_time", "rate", rate)
    with pytest.raises(ShapeError, match=r"norate\.nwb: resp_e1_0.*sampling rate"):
        _open(path)


def test_nwb_length_mismatch(tmp_path):
    nwbfile = _nwbfile()
    el = _electrode(nwbfile, "e1")
    stim, resp = _pair(nwbfile, el, 0)
    stim.fields["data"] = _current(1e-11, N - 5)
    nwbfile.add_intracellular_recording(electrode=el, stimulus=stim, response=resp)
    path = _write(nwbfile, tmp_path / "ragged.nwb")
    with pytest.raises(ShapeError, match=rf"ragged\.nwb: .*{N} samples but current has {N - 5}"):
        _open(path)


def test_nwb_rate_mismatch(tmp_path):
    path = _standard_file(tmp_path / "tworates.nwb", n_sweeps=1)
    _set_attr(path, "stimulus/presentation/stim_e1_0/starting_time", "rate", 2 * RATE)
    with pytest.raises(ShapeError, match=r"tworates\.nwb: .*10000 Hz but current at 20000 Hz"):
        _open(path)


def test_nwb_duplicate_sweep_numbers(tmp_path):
    nwbfile = _nwbfile()
    el = _electrode(nwbfile, "e1")
    for tag in ("a", "b"):
        stim, resp = _pair(nwbfile, el, 2, name=tag)
        nwbfile.add_intracellular_recording(electrode=el, stimulus=stim, response=resp)
    path = _write(nwbfile, tmp_path / "twice.nwb")
    with pytest.raises(ShapeError, match=r"twice\.nwb: e1: duplicate sweep numbers \[2\]"):
        _open(path)


def test_nwb_nan_current_and_all_nan_voltage(tmp_path):
    nwbfile = _nwbfile()
    el = _electrode(nwbfile, "e1")
    stim, resp = _pair(nwbfile, el, 0)
    i = _current(1e-11)
    i[3] = np.nan
    stim.fields["data"] = i
    nwbfile.add_intracellular_recording(electrode=el, stimulus=stim, response=resp)
    path = _write(nwbfile, tmp_path / "nancur.nwb")
    with pytest.raises(BadSamplesError, match=r"nancur\.nwb: .*current has 1 NaN/Inf"):
        _open(path)
    nwbfile = _nwbfile()
    el = _electrode(nwbfile, "e1")
    stim, resp = _pair(nwbfile, el, 0)
    resp.fields["data"] = np.full(N, np.inf, dtype=np.float32)
    nwbfile.add_intracellular_recording(electrode=el, stimulus=stim, response=resp)
    path = _write(nwbfile, tmp_path / "nanvolt.nwb")
    with pytest.raises(BadSamplesError, match=r"nanvolt\.nwb: .*voltage has no finite sample"):
        _open(path)


def test_nwb_partial_nan_voltage_is_kept(tmp_path):
    nwbfile = _nwbfile()
    el = _electrode(nwbfile, "e1")
    stim, resp = _pair(nwbfile, el, 0)
    v = _voltage(0)
    v[10:14] = np.nan
    resp.fields["data"] = v
    nwbfile.add_intracellular_recording(electrode=el, stimulus=stim, response=resp)
    (rec,) = _open(_write(nwbfile, tmp_path / "gap.nwb"))
    assert np.isnan(rec.sweeps[0].voltage[10:14]).all()
    assert np.isfinite(rec.sweeps[0].voltage[14:]).all()


@pytest.mark.parametrize(
    ("header", "rows", "error", "problem"),
    [
        ("sweep,time,voltage_mv", _rows(), UnitError, "column 'time' has no unit"),
        ("sweep,time_s,voltage_kv", _rows(), UnitError, "unknown unit 'kv'"),
        ("sweep,time_s,voltage_mv,current_ma", _rows(), UnitError, "unknown unit 'ma'"),
        ("sweep,time_s,current_pa", _rows(), CorruptFileError, "missing column.*voltage"),
        ("sweep,time_s,voltage_mv,current_pa", _rows(n=5), ShapeError, "fewer than 10 samples"),
        ("sweep,time_s,voltage_mv,current_pa", _rows(dt_s=0), ShapeError, "do not increase"),
        ("sweep,time_s,voltage_mv,current_pa", _rows(i="inf"), BadSamplesError, "current has"),
        ("sweep,time_s,voltage_mv,current_pa", _rows(v="nan"), BadSamplesError, "no finite"),
        ("sweep,time_s,voltage_mv,current_pa", _rows(v="abc"), CorruptFileError, "not a read"),
        (
            "sweep,time_s,voltage_mv,current_pa",
            _rows(sweep=1) + _rows(sweep=2) + _rows(sweep=1),
            ShapeError,
            r"duplicate sweep numbers \[1\]",
        ),
        ("sweep,time_s,voltage_mv,current_pa", [], ShapeError, "no samples"),
    ],
)
def test_bad_text_files(tmp_path, header, rows, error, problem):
    path = _csv(tmp_path / "bad_cell.csv", header, rows)
    with pytest.raises(error, match=rf"bad_cell\.csv: .*{problem}"):
        _open(path)


def test_supported_extensions():
    exts = supported_extensions()
    assert {".nwb", ".nix", ".csv", ".tsv", ".txt", ".abf", ".mat"} <= set(exts)
    assert ".pkl" not in exts and ".json" not in exts and ".1" not in exts
    assert list(exts) == sorted(exts)


def test_kept_neo_extensions_are_all_known_to_the_installed_neo():
    # the folder search uses a list kept in the code (so it never imports neo); every entry
    # must be an extension the installed neo really reads, and none of the excluded ones
    from pipeline.readers import _NEO_EXCLUDED, _NEO_KNOWN, _neo_extensions

    assert _NEO_KNOWN <= set(_neo_extensions())
    assert not {e.lstrip(".") for e in _NEO_KNOWN} & _NEO_EXCLUDED


def test_folder_search_and_nwb_reading_do_not_import_neo_or_matplotlib(tmp_path):
    import subprocess
    import sys

    (tmp_path / "day").mkdir()
    _standard_file(tmp_path / "day" / "cell.nwb", n_sweeps=1)
    code = (
        "import sys\n"
        "from pipeline.batch import discover_inputs\n"
        "from pipeline.readers import open_recordings\n"
        f"files = discover_inputs([{str(tmp_path / 'day')!r}])\n"
        "assert len(files) == 1, files\n"
        "open_recordings(files[0])\n"
        "print(sorted(m for m in ('neo', 'matplotlib') if m in sys.modules))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"


def test_file_of_the_wrong_format_is_corrupt_not_a_crash(tmp_path):
    nix = _write_neo_nix(_neo_block(channels=1), tmp_path / "a.nix")
    nwb = _standard_file(tmp_path / "b.nwb", n_sweeps=1)
    nix.rename(tmp_path / "really_nix.nwb")
    nwb.rename(tmp_path / "really_nwb.nix")
    with pytest.raises(CorruptFileError, match=r"really_nix\.nwb: cannot be read as NWB") as e1:
        _open(tmp_path / "really_nix.nwb")
    with pytest.raises(CorruptFileError, match=r"really_nwb\.nix: cannot be read by neo") as e2:
        _open(tmp_path / "really_nwb.nix")
    for err in (e1, e2):  # one short line, not a traceback
        assert "\n" not in str(err.value) and len(str(err.value)) < 400


def test_semicolon_delimiter_is_sniffed(tmp_path):
    rows = [f"2;{j / 1000!r};-70;5" for j in range(12)]
    path = _csv(tmp_path / "semi.csv", "sweep;time_s;voltage_mv;current_pa", rows)
    (rec,) = _open(path)
    assert rec.sweeps[0].number == 2
    np.testing.assert_allclose(rec.sweeps[0].current, 5e-12, rtol=1e-15)


def test_nwb_extension_types_are_left_to_pynwb(tmp_path, monkeypatch):
    path = _standard_file(tmp_path / "ext.nwb", n_sweeps=1)
    with h5py.File(path, "r+") as f:  # what an extension's subtype of the series looks like
        f["acquisition/resp_e1_0"].attrs["namespace"] = "ndx-invented-rig"
    with pytest.raises(nwb_reader.NotUnderstood, match="extension type"):
        nwb_reader.read(path, engine="h5py")
    # auto falls back to pynwb for what the direct path does not understand
    good = _standard_file(tmp_path / "good.nwb", n_sweeps=2)
    calls = []

    def not_understood(p):
        calls.append(p)
        raise nwb_reader.NotUnderstood("test")

    monkeypatch.setattr(nwb_reader, "_read_h5", not_understood)
    got = open_recordings(good)
    assert calls == [good]
    monkeypatch.undo()
    _assert_identical(got, nwb_reader.read(good, engine="h5py"))


@pytest.mark.parametrize("ext", ["dat", "bin", "raw", "h5", "mat", "smr", "edf", "continuous"])
def test_random_bytes_in_any_neo_format_give_a_recording_error(tmp_path, ext):
    path = tmp_path / f"noise.{ext}"
    path.write_bytes(np.random.default_rng(11).bytes(4096))
    with pytest.raises(RecordingError, match=rf"noise\.{ext}: "):
        _open(path)


def test_sweep_arrays_are_read_only_and_never_shared_with_a_writer(tmp_path, monkeypatch):
    # A Sweep keeps read-only copies of what it is given, whatever the caller does with its
    # arrays afterwards (a view taken before they were frozen still writes to them). A reader
    # that hands over arrays nothing else holds says so (take_arrays) and they are kept as they
    # are, made read-only: the NWB reader's samples are not copied.
    mine = np.linspace(-0.07, -0.06, 100).copy()
    early_view = mine[10:20]
    mine.setflags(write=False)
    sweep = Sweep(voltage=mine, current=None, rate=1e4, number=0)
    early_view[0] = 1.0
    assert sweep.voltage[10] != 1.0 and not sweep.voltage.flags.writeable
    given = np.linspace(-0.07, -0.06, 100).copy()
    taken = Sweep(voltage=given, current=None, rate=1e4, number=0, take_arrays=True)
    assert taken.voltage is given and not given.flags.writeable
    view = np.linspace(-0.07, -0.06, 100).copy()[:50]  # not its own memory: copied even so
    assert (
        Sweep(voltage=view, current=None, rate=1e4, number=0, take_arrays=True).voltage is not view
    )
    owned = np.linspace(-0.07, -0.06, 100).copy()
    built = make_sweep("x.nwb", "sweep 0", owned, owned, 1e4, 0, take_arrays=True)
    assert built.voltage is owned and built.current is owned
    assert make_sweep("x.nwb", "sweep 0", owned, None, 1e4, 0).voltage is not owned

    path = tmp_path / "handed.nwb"
    write_nwb([_recording("e0", 2)], path, identifier="handed")
    copies = []
    real = recording_module._frozen_array

    def counted(values, take=False):
        out = real(values, take)
        if out is not values:
            copies.append(values)
        return out

    monkeypatch.setattr(recording_module, "_frozen_array", counted)
    sweeps = open_recordings(path)[0].sweeps
    assert len(sweeps) == 2 and copies == []  # the reader's samples, handed over
    assert all(not arr.flags.writeable for sw in sweeps for arr in (sw.voltage, sw.current))


# Text files in a day's folder that are not recordings (notes, sheets) are left out of a folder
# search; anything that may be a recording, damaged or not, is read and says its problem.
@pytest.mark.parametrize(
    ("content", "left_out"),
    [
        (b"sweep,time_s,voltage_mv,current_pa\n0,0,-70,0\n", False),
        (b"\xef\xbb\xbfsweep;time_ms;voltage_mv\n", False),  # a spreadsheet's UTF-8 mark
        (b"# exported\n\nTIME_S\tVOLTAGE_MV\tSWEEP\n", False),
        (b"sweep time_s voltage_mv\n", False),  # space-separated: read, and its error said
        (b'" sweep"," time_s"," voltage_mv"\n', False),
        (b"voltage_kv,time_s\n", False),  # an unknown unit: read, and its error said
        (b"", False),  # empty: read, and its error said
        (b"\xff\xfe" + bytes(range(256)), False),  # binary: read, and its error said
        (b"slice 3 looked swollen\nbath at 32 \xb0C\n", True),  # a cp1252 byte further on
        (b"Time of the first recording: 10:42\n", True),
        (b"file,condition,time_of_day\ncell01.nwb,ctrl,10:42\n", True),  # a sheet's copy
    ],
)
def test_not_a_recording_tells_notes_from_recordings(tmp_path, content, left_out):
    from pipeline.readers.text import not_a_recording

    path = tmp_path / "f.txt"
    path.write_bytes(content)
    assert (not_a_recording(path) is not None) == left_out


def test_a_folder_of_notes_only_says_what_it_left_out(tmp_path):
    from pipeline.batch import InputError, discover_inputs

    (tmp_path / "notes.txt").write_text("bath at 32 C\n")
    with pytest.raises(InputError, match=r"no recording files found .*notes\.txt: left out, not "):
        discover_inputs([tmp_path])
