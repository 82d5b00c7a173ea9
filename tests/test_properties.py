"""Property tests: readers, step finder and fitters never crash on arbitrary input.

Whatever the text file, current trace or voltage trace, the answer is a Recording, a
RecordingError naming the file, or values that are NaN with a reason; never another exception,
never an infinity, never a silent NaN. Hypothesis runs derandomized (the same examples every run)
with modest example counts; the arrays are drawn from a numpy generator seeded by Hypothesis, so
every example is reproducible from its printed seed.
"""

from __future__ import annotations

import gc
import math
import tempfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from pipeline.analysis import analyse_recording
from pipeline.config import Config
from pipeline.errors import RecordingError
from pipeline.readers import MIN_SAMPLES, open_recordings
from pipeline.recording import Recording, Sweep
from pipeline.steps import StepSettings, find_step

FAST = settings(
    max_examples=80,
    deadline=None,
    derandomize=True,
    database=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)
KINDS = {"step", "no change", "ramp", "noise", "train", "multi-step", "too short", "no current"}


@pytest.fixture(scope="module")
def scratch():
    with tempfile.TemporaryDirectory() as folder:
        yield Path(folder)


def _read_or_error(path: Path) -> list[Recording] | RecordingError:
    """open_recordings, with a RecordingError returned; any other exception fails the test."""
    try:
        return open_recordings(path)
    except RecordingError as exc:
        return exc


def _check_recordings(recordings: list[Recording], path: Path) -> None:
    """What every reader promises about a Recording it returns."""
    assert recordings, "a reader returned no cell and no error"
    for rec in recordings:
        numbers = [s.number for s in rec.sweeps]
        assert len(set(numbers)) == len(numbers)
        assert rec.source_file == str(path)
        for s in rec.sweeps:
            assert s.n_samples >= MIN_SAMPLES
            assert math.isfinite(s.rate) and s.rate > 0
            assert np.isfinite(s.voltage).any()
            assert s.current is None or np.isfinite(s.current).all()
            assert s.current is None or s.current.shape == s.voltage.shape


# ---- text reader: random headers and contents ---------------------------------------------------

COLUMN_NAMES = [
    "sweep",
    "Sweep",
    "time_s",
    "time_ms",
    "time",
    "time_h",
    "voltage_mv",
    "VOLTAGE_V",
    "voltage_uv",
    "voltage_kv",
    "voltage",
    "current_pa",
    "current_na",
    "current_ma",
    "current",
    "temperature_c",
    "",
    "sweep ",
    '"voltage_mv"',
]
CELLS = st.one_of(
    st.integers(-5, 5).map(str),
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.sampled_from(["", "nan", "NaN", "inf", "-inf", "1e400", "0x10", "1,5", '"', "#", " "]),
    st.text(max_size=6),
)


@FAST
@given(
    header=st.lists(st.sampled_from(COLUMN_NAMES), min_size=0, max_size=6),
    rows=st.lists(st.lists(CELLS, min_size=0, max_size=7), max_size=30),
    sep=st.sampled_from([",", "\t", ";", " ", "|"]),
    comment=st.booleans(),
    raw_tail=st.binary(max_size=8),
)
def test_text_reader_on_random_tables_gives_recordings_or_a_recording_error(
    scratch, header, rows, sep, comment, raw_tail
):
    path = scratch / "random_table.csv"
    lines = (["# exported by an invented rig"] if comment else []) + [sep.join(header)]
    lines += [sep.join(r) for r in rows]
    path.write_bytes("\n".join(lines).encode("utf-8", "surrogatepass") + raw_tail)
    got = _read_or_error(path)
    if isinstance(got, RecordingError):
        assert str(got).startswith(f"{path}: ") and len(str(got)) > len(str(path)) + 5
        assert "\n" not in str(got)  # one line, not a traceback
    else:
        _check_recordings(got, path)


@st.composite
def valid_tables(draw):
    """A table in the documented layout, with random sweeps, rates, units and column order."""
    n_sweeps = draw(st.integers(1, 3))
    rate = draw(st.sampled_from([1_000.0, 10_000.0, 20_000.0, 50_000.0]))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    t_unit, t_scale = draw(st.sampled_from([("s", 1.0), ("ms", 1e3)]))
    v_unit, v_scale = draw(st.sampled_from([("mv", 1e3), ("v", 1.0), ("uv", 1e6)]))
    i_unit, i_scale = draw(st.sampled_from([("pa", 1e12), ("na", 1e9), ("a", 1.0)]))
    numbers = draw(st.lists(st.integers(0, 999), min_size=n_sweeps, max_size=n_sweeps, unique=True))
    sweeps = []
    for k, number in enumerate(numbers):
        n = int(rng.integers(MIN_SAMPLES, 60))
        v = np.round(rng.normal(-0.07, 0.02, n) * v_scale, 4)  # in the file's unit
        i = np.round(rng.normal(0.0, 50e-12, n) * i_scale, 4 if i_unit == "pa" else 12)
        sweeps.append((number, 10.0 * k, n, v, i))
    names = {
        "sweep": "sweep",
        "time": f"time_{t_unit}",
        "voltage": f"voltage_{v_unit}",
        "current": f"current_{i_unit}",
    }
    order = draw(st.permutations(list(names)))
    upper = draw(st.booleans())
    sep = draw(st.sampled_from([",", "\t", ";"]))
    header = sep.join(names[c].upper() if upper else names[c] for c in order)
    lines = [header]
    for number, start, n, v, i in sweeps:
        for j in range(n):
            cells = {
                "sweep": str(number),
                "time": repr((start + j / rate) * t_scale),
                "voltage": repr(float(v[j])),
                "current": repr(float(i[j])),
            }
            lines.append(sep.join(cells[c] for c in order))
    return "\n".join(lines) + "\n", sweeps, rate, (v_scale, i_scale)


@FAST
@given(table=valid_tables())
def test_text_reader_reads_back_what_the_documented_layout_holds(scratch, table):
    text, sweeps, rate, (v_scale, i_scale) = table
    path = scratch / "valid_table.tsv"
    path.write_text(text, encoding="utf-8")
    (rec,) = open_recordings(path)
    sweeps = sorted(sweeps, key=lambda s: s[0])  # recording order: by sweep number
    assert [s.number for s in rec.sweeps] == [s[0] for s in sweeps]
    for got, (_, start, n, v, i) in zip(rec.sweeps, sweeps, strict=True):
        assert got.n_samples == n
        assert got.rate == pytest.approx(rate, rel=1e-9)
        assert got.start_time == pytest.approx(start, abs=1e-9)
        np.testing.assert_allclose(got.voltage, v / v_scale, rtol=1e-12, atol=0)
        np.testing.assert_allclose(got.current, i / i_scale, rtol=1e-12, atol=0)


# ---- step finder: random current arrays ---------------------------------------------------------


@st.composite
def currents(draw):
    """Current traces, A: steps, trains, ramps, noise, NaN/Inf, huge and tiny values, anything."""
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    n = draw(st.sampled_from([8, 20, 100, 1000, 5000]))
    i = np.full(n, draw(st.floats(-1e-9, 1e-9)))
    for _ in range(draw(st.integers(0, 4))):  # rectangular pieces anywhere
        a, b = np.sort(rng.integers(0, n + 1, 2))
        i[a:b] += draw(st.floats(-2e-9, 2e-9))
    if draw(st.booleans()):
        i += rng.normal(0.0, draw(st.sampled_from([0.0, 1e-13, 1e-12, 1e-11, 1e-10])), n)
    if draw(st.booleans()):
        i += np.linspace(0.0, draw(st.floats(-1e-9, 1e-9)), n)
    corrupt = draw(st.sampled_from(["none", "nan", "inf", "huge", "tiny", "all-nan", "zero"]))
    if corrupt in ("nan", "inf"):
        a = int(rng.integers(0, n))
        i[a : a + int(rng.integers(1, 50))] = np.nan if corrupt == "nan" else np.inf
    elif corrupt == "huge":
        i *= 1e30
    elif corrupt == "tiny":
        i *= 1e-300
    elif corrupt == "all-nan":
        i[:] = np.nan
    elif corrupt == "zero":
        i[:] = 0.0
    rate = draw(st.sampled_from([1_000.0, 10_000.0, 50_000.0]))
    return i, rate


@FAST
@given(trace=currents())
def test_step_finder_on_random_currents_returns_an_epoch_with_a_reason(trace):
    current, rate = trace
    sweep = Sweep(np.full(current.size, -0.07), current, rate, 3)
    epoch = find_step(sweep, StepSettings())
    assert epoch.sweep == 3 and epoch.kind in KINDS
    if epoch.usable:
        assert epoch.kind == "step" and epoch.reason == ""
        assert 0 < epoch.onset_index < epoch.offset_index < current.size
        assert math.isfinite(epoch.amplitude) and abs(epoch.amplitude) >= 1e-12
        assert math.isfinite(epoch.holding)
        assert epoch.onset == pytest.approx(epoch.onset_index / rate)
    else:
        assert epoch.reason.strip(), epoch
    for value in (epoch.holding, epoch.amplitude, epoch.onset, epoch.offset):
        assert not math.isinf(value)


@FAST
@given(
    seed=st.integers(0, 2**32 - 1),
    holding=st.floats(-200e-12, 200e-12),
    amplitude=st.floats(5e-12, 800e-12),
    sign=st.sampled_from([-1.0, 1.0]),
    onset_s=st.floats(0.01, 0.2),
    duration_s=st.floats(0.01, 0.5),
    noise=st.sampled_from([0.0, 0.2e-12, 1e-12]),
)
def test_step_finder_finds_a_clean_step_where_it_is(
    seed, holding, amplitude, sign, onset_s, duration_s, noise
):
    rate = 10_000.0
    on, off = round(onset_s * rate), round((onset_s + duration_s) * rate)
    n = off + round(0.05 * rate)
    current = np.full(n, holding)
    current[on:off] += sign * amplitude
    current += np.random.default_rng(seed).normal(0.0, noise, n)
    epoch = find_step(Sweep(np.full(n, -0.07), current, rate, 0), StepSettings())
    assert epoch.usable, epoch.reason
    assert abs(epoch.onset_index - on) <= 1 and abs(epoch.offset_index - off) <= 1
    # the plateau mean of >= 100 samples: within 4 standard errors of the noise, plus rounding
    assert epoch.amplitude == pytest.approx(sign * amplitude, abs=4 * noise / 10 + 1e-15)
    assert epoch.holding == pytest.approx(holding, abs=4 * noise / 10 + 1e-15)


# ---- fitters: random voltage arrays on a valid step epoch ---------------------------------------

RATE = 10_000.0
N = 5_000  # 0.5 s sweeps: 0.1 s baseline, 0.25 s step, 0.15 s after
ON, OFF = 1_000, 3_500
STEPS_A = (-60e-12, -40e-12, -20e-12, 40e-12)
MODES = ["response", "chaos", "constant", "quantised", "spiky"]
CORRUPTIONS = ["none", "nan-run", "inf-run", "clip", "huge", "tiny", "mostly-nan", "jumps"]


def _voltage(rng: np.random.Generator, mode: str, step: float, p: dict) -> np.ndarray:
    t = np.arange(N) / RATE
    if mode == "chaos":
        return rng.standard_normal(N) * p["scale"] + p["offset"]
    if mode == "constant":
        return np.full(N, p["offset"])
    v = np.full(N, p["offset"])
    rise = 1.0 - np.exp(-(t[ON:OFF] - t[ON]) / p["tau"])
    v[ON:OFF] += step * p["rin"] * rise
    v[OFF:] += step * p["rin"] * rise[-1] * np.exp(-(t[OFF:] - t[OFF]) / p["tau"])
    v += rng.normal(0.0, p["noise"], N)
    if mode == "quantised":
        q = p["scale"] * 1e-3 + 1e-6
        v = np.round(v / q) * q
    elif mode == "spiky":
        for k in rng.integers(0, N - 20, 12):
            v[k : k + 10] += np.hanning(10) * 0.1
    return v


def _corrupt(rng: np.random.Generator, v: np.ndarray, how: str) -> np.ndarray:
    v = v.copy()
    a = int(rng.integers(0, N - 1))
    if how in ("nan-run", "inf-run"):
        v[a : a + int(rng.integers(1, 400))] = np.nan if how == "nan-run" else -np.inf
    elif how == "clip":
        v = np.clip(v, np.quantile(v, 0.3), np.quantile(v, 0.9))
    elif how == "huge":
        v = v * 1e3  # millivolts stored as volts: the readers let it through
    elif how == "tiny":
        v = v * 1e-200
    elif how == "mostly-nan":
        keep = v[a]
        v[:] = np.nan
        v[a] = keep  # the readers let through any sweep with one finite sample
    elif how == "jumps":
        v[a:] += 0.05
    return v


@st.composite
def cells(draw, max_tau_s: float = 1.0):
    """A cell of 4 sweeps whose current is a clean step and whose voltage is anything."""
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    sweeps = []
    for k, step in enumerate(STEPS_A):
        mode = draw(st.sampled_from(MODES))
        p = {
            "scale": draw(st.sampled_from([0.0, 1e-9, 1e-3, 1.0, 1e3])),
            "offset": draw(st.floats(-0.1, 0.05)),
            "tau": draw(st.floats(1e-4, max_tau_s)),
            "rin": draw(st.floats(1e6, 1e10)),
            "noise": draw(st.sampled_from([0.0, 1e-5, 3e-4, 5e-3])),
        }
        v = _corrupt(rng, _voltage(rng, mode, step, p), draw(st.sampled_from(CORRUPTIONS)))
        current = np.zeros(N)
        current[ON:OFF] = step
        sweeps.append(Sweep(v, current, RATE, k, start_time=5.0 * k))
    return Recording("random", "random.nwb", "e0", tuple(sweeps))


def _numbers(row: dict) -> dict[str, float]:
    return {k: v for k, v in row.items() if isinstance(v, float)}


def _check_analysis(recording: Recording) -> None:
    result = analyse_recording(recording, Config())
    cell = result["cell"]
    assert not str(cell["status"]).startswith("analysis failed"), result.get("traceback")
    assert cell["status"] == "ok" or cell["status"].strip()
    infinite = [k for k, v in _numbers(cell).items() if math.isinf(v)]
    assert infinite == [], {k: cell[k] for k in infinite}
    if cell["status"] == "ok" and math.isnan(cell["rin_mohm"]):
        assert cell["notes"] or cell["qc_reasons"], cell
    assert [r["sweep"] for r in result["sweeps"]] == [0, 1, 2, 3]
    for row in result["sweeps"]:
        infinite = [k for k, v in _numbers(row).items() if math.isinf(v)]
        assert infinite == [], (row["sweep"], {k: row[k] for k in infinite})
        for key in ("baseline_mv", "ss_dv_mv", "rin_mohm", "tau_ms"):
            if math.isnan(row[key]):
                assert row["fit_reason"].strip(), (row["sweep"], key, row)
        if not row["used"]:
            assert row["excluded_because"].strip(), row


@settings(FAST, max_examples=40)
@given(recording=cells())
def test_fitters_on_random_voltages_give_values_or_nan_with_a_reason(recording):
    _check_analysis(recording)


@FAST
@given(recording=cells())
def test_spike_detection_on_random_voltages_never_raises(recording):
    from pipeline.fitters.spikes import SpikeSettings, fit_spiking
    from pipeline.steps import find_steps

    epochs = find_steps(recording, StepSettings())
    spikes = fit_spiking(recording, epochs, SpikeSettings())
    rows = spikes.sweep_rows()
    assert [r["sweep"] for r in rows] == [e.sweep for e in epochs if e.usable]
    for row in rows:
        infinite = [k for k, v in _numbers(row).items() if math.isinf(v)]
        assert infinite == [], row
    cell = spikes.cell_row()
    assert not [k for k, v in _numbers(cell).items() if math.isinf(v)], cell


def _clean_cell(tau_s: float, steps_a=STEPS_A) -> Recording:
    t = np.arange(N) / RATE
    sweeps = []
    for k, step in enumerate(steps_a):
        v = np.full(N, -0.07)
        rise = 1.0 - np.exp(-(t[ON:OFF] - t[ON]) / tau_s)
        v[ON:OFF] += step * 1e8 * rise
        v[OFF:] += step * 1e8 * rise[-1] * np.exp(-(t[OFF:] - t[OFF]) / tau_s)
        current = np.zeros(N)
        current[ON:OFF] = step
        sweeps.append(Sweep(v, current, RATE, k, start_time=5.0 * k))
    return Recording("slow", "slow.nwb", "e0", tuple(sweeps))


def test_noise_free_cell_with_tau_longer_than_the_step_is_not_lost():
    # 100 MOhm, tau 0.3 s, 0.25 s steps: the charging curve never levels off
    result = analyse_recording(_clean_cell(0.3), Config())
    assert not result["cell"]["status"].startswith("analysis failed"), result["cell"]["status"]


@pytest.mark.parametrize("steps_pa", [(-60,), (-60, 40, 80)], ids=["one-step", "one-hyper"])
def test_cell_with_a_single_hyperpolarizing_step_is_not_lost(steps_pa):
    # one hyperpolarizing step is a common protocol (Rin check before a depolarizing family)
    result = analyse_recording(_clean_cell(0.02, [a * 1e-12 for a in steps_pa]), Config())
    cell = result["cell"]
    assert cell["status"] == "ok", cell["status"]
    assert cell["rin_mohm"] == pytest.approx(100.0, rel=0.02)  # 100 MOhm simulated


# ---- NWB and NIX readers: files damaged object by object ----------------------------------------


def _small_recording() -> Recording:
    i = np.zeros(200)
    i[50:150] = -20e-12
    sweeps = [
        Sweep(-0.07 + 1e-3 * np.sin(np.arange(200) / 7.0), i, 10_000.0, k, start_time=float(k))
        for k in range(2)
    ]
    return Recording("fuzz", "", "e0", tuple(sweeps))


@pytest.fixture(scope="module")
def small_files(scratch):
    """One small NWB and one small NIX file (2 sweeps x 200 samples), as bytes."""
    from pipeline.writers import write_nix, write_nwb

    rec = _small_recording()
    return {
        ".nwb": write_nwb([rec], scratch / "small.nwb", identifier="fuzz").read_bytes(),
        ".nix": write_nix([rec], scratch / "small.nix").read_bytes(),
    }


def _objects(f) -> list[str]:
    names: list[str] = []
    f.visit(names.append)
    return sorted(names)


ATTRIBUTE_VALUES = st.sampled_from(
    ["", "volts", "amperes", "mV", "furlongs", -1, 0, 2**40, np.nan, np.inf, -1e300, b"\xff\xfe"]
)
DATA_VALUES = st.sampled_from(
    ["empty", "2d", "text", "ints", "nan", "inf", "scalar", "huge", "one"]
)


def _replacement(kind: str, n: int):
    return {
        "empty": np.zeros(0),
        "2d": np.zeros((n, 3)),
        "text": np.array([b"volts"] * max(n, 1)),
        "ints": np.arange(n, dtype=np.int64),
        "nan": np.full(n, np.nan),
        "inf": np.full(n, -np.inf),
        "scalar": np.float64(3.0),
        "huge": np.full(n, 1e30),
        "one": np.zeros(1),
    }[kind]


@settings(FAST, max_examples=50)
@given(suffix=st.sampled_from([".nwb", ".nix"]), data=st.data())
def test_readers_on_files_damaged_object_by_object(scratch, small_files, suffix, data):
    """Delete objects, overwrite attributes and datasets of a written file (through h5py, so
    the file stays valid HDF5): a RecordingError naming the file, or checked Recordings."""
    import h5py

    path = scratch / f"damaged{suffix}"
    path.write_bytes(small_files[suffix])
    with h5py.File(path, "r+") as f:
        for _ in range(data.draw(st.integers(1, 3), label="n_changes")):
            names = _objects(f)
            if not names:
                break
            name = data.draw(st.sampled_from(names), label="object")
            obj = f[name]
            action = data.draw(st.sampled_from(["delete", "attribute", "data"]), label="action")
            if action == "delete":
                del f[name]
            elif action == "attribute" and len(obj.attrs):
                key = data.draw(st.sampled_from(sorted(obj.attrs)), label="attribute")
                obj.attrs[key] = data.draw(ATTRIBUTE_VALUES, label="value")
            elif action == "data" and isinstance(obj, h5py.Dataset):
                n = obj.shape[0] if obj.shape else 1
                del f[name]
                f[name] = _replacement(data.draw(DATA_VALUES, label="replacement"), n)
    got = _read_or_error(path)
    if isinstance(got, RecordingError):
        assert str(got).startswith(f"{path}: ") and "\n" not in str(got)
        got = str(got)  # drop the exception: its traceback may hold the file open
    else:
        _check_recordings(got, path)
    gc.collect()
    open_files = [
        h5py.h5f.FileID.get_name(i) for i in h5py.h5f.get_obj_ids(types=h5py.h5f.OBJ_FILE)
    ]
    assert open_files == [], got  # a reader left the file open


# ---- metadata sheet: random bytes -------------------------------------------------------------

SHEET_CELLS = st.one_of(
    st.sampled_from(["file", "cell_id", "condition", "", '"', "a.nwb", "x", ",", ";", "\t"]),
    st.text(max_size=5),
)


@settings(FAST, max_examples=80)
@given(
    rows=st.lists(st.lists(SHEET_CELLS, max_size=4), max_size=6),
    sep=st.sampled_from([",", ";", "\t", "|"]),
    raw=st.binary(max_size=6),
)
@example(rows=[['"']], sep=",", raw=b"")  # Python 3.13 sniffed a dialect csv.reader refused
def test_sheet_reader_on_random_text_gives_a_sheet_or_a_sheet_error(scratch, rows, sep, raw):
    from pipeline.sheet import Sheet, SheetError, read_sheet

    path = scratch / "sheet.csv"
    text = "\n".join(sep.join(r) for r in rows)
    path.write_bytes(text.encode("utf-8", "surrogatepass") + raw)
    try:
        sheet = read_sheet(path)
    except SheetError as exc:
        assert str(exc).startswith(f"{path}: ") and "\n" not in str(exc)
        return
    assert isinstance(sheet, Sheet) and not {"cell_id", "file"} & set(sheet.columns)
