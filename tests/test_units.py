"""Unit conversions in the readers: every format gives volts and amperes.

Expected values are the written arrays times the SI prefix factor (SI prefixes, BIPM SI
Brochure, 9th ed., 2019, table 7: milli 1e-3, micro 1e-6, nano 1e-9, pico 1e-12) and, for NWB,
the schema's scaling rule value = data * conversion + offset (NWB core schema 2.x,
TimeSeries.data attributes ``conversion`` and ``offset``).
"""

from __future__ import annotations

import datetime as dt
import warnings

import h5py
import neo
import numpy as np
import pytest
import quantities as pq
from pynwb import NWBHDF5IO, NWBFile
from pynwb.icephys import CurrentClampSeries, CurrentClampStimulusSeries

from pipeline.errors import UnitError
from pipeline.readers import nwb as nwb_reader
from pipeline.readers import open_recordings, parse_unit

RATE = 5_000.0
N = 40


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("volts", ("V", 1.0)),
        ("V", ("V", 1.0)),
        ("mV", ("V", 1e-3)),
        ("millivolts", ("V", 1e-3)),
        ("uV", ("V", 1e-6)),
        ("µV", ("V", 1e-6)),
        ("amperes", ("A", 1.0)),
        ("A", ("A", 1.0)),
        ("nA", ("A", 1e-9)),
        ("pA", ("A", 1e-12)),
        ("picoamperes", ("A", 1e-12)),
        ("ohm", None),
        ("", None),
        ("dimensionless", None),
        ("kV", None),
    ],
)
def test_parse_unit(text, expected):
    assert parse_unit(text) == expected


def _ramp(n: int = N) -> np.ndarray:
    return np.linspace(-80.0, -60.0, n)


def _plausible(v_factor: float, i_factor: float) -> tuple[np.ndarray, np.ndarray]:
    """-80..-60 mV and -200..200 pA, written in units of ``v_factor`` V and ``i_factor`` A
    (the readers refuse magnitudes no recording has in its stated unit)."""
    return _ramp() * (1e-3 / v_factor), np.linspace(-200.0, 200.0, N) * (1e-12 / i_factor)


def _nwb(path, v_data, v_kwargs, i_data, i_kwargs):
    nwbfile = NWBFile(
        session_description="units",
        identifier="u",
        session_start_time=dt.datetime(2026, 1, 2, tzinfo=dt.UTC),
    )
    dev = nwbfile.create_device(name="amp")
    el = nwbfile.create_icephys_electrode(name="e", device=dev, description="wc")
    stim = CurrentClampStimulusSeries(
        name="stim", data=i_data, electrode=el, rate=RATE, gain=1.0, **i_kwargs
    )
    resp = CurrentClampSeries(
        name="resp", data=v_data, electrode=el, rate=RATE, gain=1.0, **v_kwargs
    )
    nwbfile.add_intracellular_recording(electrode=el, stimulus=stim, response=resp)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with NWBHDF5IO(str(path), mode="w") as io:
            io.write(nwbfile)
    return path


@pytest.mark.parametrize("engine", ["h5py", "pynwb"])
def test_nwb_conversion_on_volts_and_amperes(tmp_path, engine):
    # Integer samples in mV and pA, with the conversion to the base unit stored beside them.
    v_mv = np.round(_ramp()).astype(np.int16)
    i_pa = np.arange(N, dtype=np.int16) - 20
    path = _nwb(tmp_path / "conv.nwb", v_mv, {"conversion": 1e-3}, i_pa, {"conversion": 1e-12})
    (s,) = nwb_reader.read(path, engine=engine)[0].sweeps
    np.testing.assert_allclose(s.voltage, v_mv * 1e-3, rtol=1e-15)
    np.testing.assert_allclose(s.current, i_pa * 1e-12, rtol=1e-15)


@pytest.mark.parametrize("engine", ["h5py", "pynwb"])
def test_nwb_offset_is_added_after_conversion(tmp_path, engine):
    counts = np.arange(N, dtype=np.int16)
    path = _nwb(
        tmp_path / "offset.nwb",
        counts,
        {"conversion": 1e-4, "offset": -0.08},
        np.zeros(N),
        {},
    )
    (s,) = nwb_reader.read(path, engine=engine)[0].sweeps
    np.testing.assert_allclose(s.voltage, counts * 1e-4 - 0.08, rtol=1e-14)


@pytest.mark.parametrize("engine", ["h5py", "pynwb"])
def test_nwb_unit_with_prefix_is_honoured(tmp_path, engine):
    # A file whose unit attribute says mV (pynwb would silently reset it to volts).
    v = _ramp()
    path = _nwb(tmp_path / "mv_unit.nwb", v, {}, np.full(N, 25.0), {})
    with h5py.File(path, "r+") as f:
        f["acquisition/resp/data"].attrs["unit"] = "mV"
        f["stimulus/presentation/stim/data"].attrs["unit"] = "pA"
    (s,) = nwb_reader.read(path, engine=engine)[0].sweeps
    np.testing.assert_allclose(s.voltage, v * 1e-3, rtol=1e-15)
    np.testing.assert_allclose(s.current, np.full(N, 25e-12), rtol=1e-15)


@pytest.mark.parametrize(
    ("v_unit", "v_factor", "i_unit", "i_factor"),
    [("mV", 1e-3, "pA", 1e-12), ("uV", 1e-6, "nA", 1e-9), ("V", 1.0, "A", 1.0)],
)
def test_neo_units_to_si(tmp_path, v_unit, v_factor, i_unit, i_factor):
    v, i = _plausible(v_factor, i_factor)
    seg = neo.Segment()
    seg.analogsignals += [
        neo.AnalogSignal(v, units=v_unit, sampling_rate=RATE * pq.Hz, name="Vm"),
        neo.AnalogSignal(i, units=i_unit, sampling_rate=RATE * pq.Hz, name="I"),
    ]
    block = neo.Block()
    block.segments.append(seg)
    path = tmp_path / "units.nix"
    io = neo.io.NixIO(str(path), mode="ow")
    io.write_block(block)
    io.close()
    (s,) = open_recordings(path)[0].sweeps
    np.testing.assert_allclose(s.voltage, v * v_factor, rtol=1e-12)
    np.testing.assert_allclose(s.current, i * i_factor, rtol=1e-12)


@pytest.mark.parametrize(
    ("t_col", "t_factor", "v_col", "v_factor", "i_col", "i_factor"),
    [
        ("time_s", 1.0, "voltage_v", 1.0, "current_a", 1.0),
        ("time_ms", 1e-3, "voltage_mv", 1e-3, "current_pa", 1e-12),
        ("time_ms", 1e-3, "voltage_uv", 1e-6, "current_na", 1e-9),
    ],
)
def test_text_units_to_si(tmp_path, t_col, t_factor, v_col, v_factor, i_col, i_factor):
    t = np.arange(N) * (1.0 / RATE) / t_factor  # sample times in the column's unit
    v, i = _plausible(v_factor, i_factor)
    lines = [f"sweep,{t_col},{v_col},{i_col}"]
    lines += [f"0,{float(t[j])!r},{float(v[j])!r},{float(i[j])!r}" for j in range(N)]
    path = tmp_path / "units.csv"
    path.write_text("\n".join(lines) + "\n")
    (s,) = open_recordings(path)[0].sweeps
    assert s.rate == pytest.approx(RATE, rel=1e-12)
    np.testing.assert_allclose(s.voltage, v * v_factor, rtol=1e-15)
    np.testing.assert_allclose(s.current, i * i_factor, rtol=1e-15)


# Magnitudes that cannot be in the stated unit. Membrane potentials stay within about
# +-0.2 V and current-clamp steps within tens of nA (common practice, no source).


def _text_cell(path, v_col, v, i_col, i):
    t = np.arange(v.size) / RATE
    lines = [f"sweep,time_s,{v_col},{i_col}"]
    lines += [f"0,{t[j]:.9g},{v[j]:.9g},{i[j]:.9g}" for j in range(v.size)]
    path.write_text("\n".join(lines) + "\n")
    return path


def test_millivolts_under_a_volts_label_are_refused(tmp_path):
    path = _text_cell(tmp_path / "mv.csv", "voltage_v", _ramp(), "current_pa", np.zeros(N))
    with pytest.raises(UnitError, match=r"mv\.csv: .*typically [6-8]\d V.*millivolts\?"):
        open_recordings(path)


@pytest.mark.parametrize("engine", ["h5py", "pynwb"])
def test_picoamperes_under_an_amperes_label_are_refused(tmp_path, engine):
    # NWB: the stimulus stored in pA numbers while its unit says amperes
    i_pa = np.where(np.arange(N) >= 10, -100.0, 0.0)
    path = _nwb(tmp_path / "pa.nwb", _ramp() * 1e-3, {}, i_pa, {})
    with pytest.raises(UnitError, match=r"pa\.nwb: .*current up to 100 A.*pA or nA\?"):
        nwb_reader.read(path, engine=engine)


def test_glitches_do_not_make_volts_implausible(tmp_path):
    # Saturated samples at 10 V in a trace at -70 mV, where the check samples it (every 64th):
    # the median decides, not the maximum.
    v = np.full(2000, -0.07)
    v[[0, 64, 128]] = 10.0
    path = _text_cell(tmp_path / "glitch.csv", "voltage_v", v, "current_a", np.zeros(2000))
    (s,) = open_recordings(path)[0].sweeps
    assert s.voltage.max() == 10.0
