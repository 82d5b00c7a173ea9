"""The NWB reader's low-level h5py helpers against h5py's object API, storage kind by kind.

The direct NWB engine reads attributes, scalar datasets, links and samples through h5py's
low-level API and must give exactly what the object API gives (the reader before it used the
object API; pynwb is compared with the whole reader in test_readers.py). Each case stores one
kind in a small HDF5 file written here, then compares the helper's result (value and type, or
the exception and its message) with the object API's.
"""

from __future__ import annotations

import gc
import math

import h5py
import numpy as np
import pytest

from pipeline.readers import nwb

VLEN_ASCII = h5py.string_dtype("ascii")
VLEN_UTF8 = h5py.string_dtype("utf-8")
BIG_F8 = np.dtype(">f8")

# (name, value, dtype or None for h5py's choice)
ATTRIBUTES = [
    ("str", "CurrentClampSeries", None),
    ("str_empty", "", None),
    ("str_unicode", "Mus musculus µV", None),
    ("vlen_ascii", b"volts", VLEN_ASCII),
    ("vlen_ascii_bad_utf8", b"\xff\xfe", VLEN_ASCII),
    ("vlen_utf8_from_bytes", b"\xc2\xb5V", VLEN_UTF8),
    ("fixed_bytes", np.bytes_(b"amperes"), None),
    ("fixed_bytes_bad_utf8", np.bytes_(b"\xff\xfe"), None),
    ("fixed_utf8", b"volts", h5py.string_dtype("utf-8", 5)),
    ("fixed_padded", np.array(b"mV", dtype="S8"), None),
    ("f8", 20000.0, None),
    ("f8_nan", math.nan, None),
    ("f8_inf", -math.inf, None),
    ("f8_negative_zero", -0.0, None),
    ("f4", np.float32(1e-3), None),
    ("f2", np.float16(0.5), None),
    ("f8_big_endian", 1.5, BIG_F8),
    ("i4_big_endian", 7, np.dtype(">i4")),
    ("u8", np.uint64(2**63 + 1), None),
    ("i8", np.int64(-(2**40)), None),
    ("i2", np.int16(-3), None),
    ("u1", np.uint8(255), None),
    ("bool", True, None),
    ("enum", 1, h5py.enum_dtype({"off": 0, "on": 1}, basetype="i1")),
    ("f8_one_element", [1.0], None),
    ("u8_one_element", np.array([3], dtype=np.uint64), None),
    ("f8_two_elements", [1.0, 2.0], None),
    ("f8_one_by_one", [[1.0]], None),
    ("f8_no_elements", np.zeros(0), None),
    ("str_one_element", ["volts"], VLEN_UTF8),
    ("str_two_elements", ["volts", "amperes"], VLEN_UTF8),
    ("fixed_one_element", np.array([b"volts"]), None),
    ("empty_f8", h5py.Empty("f8"), None),
    ("empty_str", h5py.Empty(VLEN_UTF8), None),
    ("compound", np.array((1, 2.0), dtype=[("a", "i4"), ("b", "f8")]), None),
    ("array_type", np.zeros((), dtype="(3,)f8"), None),
    ("complex", 1 + 2j, None),
]


def _old_attr(obj, key):
    """The reader's attribute read before the low-level helpers (its documented behaviour)."""
    value = obj.attrs.get(key)
    if isinstance(value, bytes | str):
        return nwb._text(value)
    return value


def _old_scalar(group, key):
    ds = group.get(key)
    if ds is None:
        return None
    value = ds[()]
    return nwb._text(value) if isinstance(value, bytes) else value


def _outcome(fn, *args):
    try:
        return "value", fn(*args)
    except Exception as exc:  # noqa: BLE001 -- the exception itself is the outcome compared
        return "error", (type(exc), str(exc))


def _assert_same(got, want):
    assert got[0] == want[0], (got, want)
    if got[0] == "error":
        assert got[1] == want[1]
        return
    a, b = got[1], want[1]
    assert type(a) is type(b), (a, b)
    if isinstance(a, np.ndarray):
        assert a.dtype == b.dtype and a.shape == b.shape
        assert h5py.check_string_dtype(a.dtype) == h5py.check_string_dtype(b.dtype)
        if a.dtype.kind in "fc":
            np.testing.assert_array_equal(a, b)  # NaN matches NaN
        else:
            assert a.tolist() == b.tolist()
    elif isinstance(a, np.floating | float) and np.isnan(a):
        assert np.isnan(b) and getattr(a, "dtype", None) == getattr(b, "dtype", None)
    elif isinstance(a, h5py.Empty):
        assert a.dtype == b.dtype
    else:
        assert a == b and getattr(a, "dtype", None) == getattr(b, "dtype", None)
        if isinstance(a, float | np.floating):
            assert math.copysign(1.0, a) == math.copysign(1.0, b)  # -0.0 stays -0.0


@pytest.fixture(scope="module")
def stored(tmp_path_factory):
    """A file holding every attribute kind on the root, a group and a dataset."""
    path = tmp_path_factory.mktemp("lowlevel") / "kinds.h5"
    with h5py.File(path, "w") as f:
        group = f.create_group("series")
        data = group.create_dataset("data", data=np.zeros(4, dtype=np.float32))
        f["named_f8"] = np.dtype("f8")  # a committed datatype
        for obj in (f, group, data):
            for name, value, dtype in ATTRIBUTES:
                if dtype is None:
                    obj.attrs[name] = value
                else:
                    obj.attrs.create(name, value, dtype=dtype)
            obj.attrs.create("committed_f8", 2.5, dtype=f["named_f8"])
    return path


@pytest.mark.parametrize("where", ["/", "series", "series/data"])
@pytest.mark.parametrize("name", [a[0] for a in ATTRIBUTES] + ["committed_f8", "missing"])
def test_attribute_as_the_object_api_reads_it(stored, where, name):
    with h5py.File(stored, "r") as f:
        obj = f[where]
        want = _outcome(_old_attr, obj, name)
        _assert_same(_outcome(nwb._attr, obj.id, name), want)  # a low-level id
        _assert_same(_outcome(nwb._attr, obj, name), want)  # an h5py object
        if where == "/":
            _assert_same(_outcome(nwb._attr, f, name), _outcome(_old_attr, f, name))


PLAIN_ATTRIBUTES = {  # what the low-level path reads itself; the rest goes to the object API
    name
    for name, value, dtype in ATTRIBUTES
    if np.ndim(value) == 0
    and not isinstance(value, h5py.Empty | bool)
    and name not in ("compound", "array_type", "complex")
}


@pytest.mark.parametrize("name", sorted(PLAIN_ATTRIBUTES | {"committed_f8"}))
def test_plain_attributes_take_the_low_level_path(stored, name):
    with h5py.File(stored, "r") as f:
        assert nwb._plain_attr(f["series"].id, name) is not nwb._OTHER


def _open_files() -> set[bytes]:
    gc.collect()
    return {i.name for i in h5py.h5f.get_obj_ids(types=h5py.h5f.OBJ_FILE)}


def test_the_type_memo_outlives_the_file_that_filled_it(stored, monkeypatch):
    # A committed datatype's handle closes with its file: the memo must hold a copy of it.
    monkeypatch.setattr(nwb, "_PLAIN_TYPES", [])
    monkeypatch.setattr(nwb, "_LAST_TYPE", {})
    before = _open_files()  # other tests' readers may leave theirs to the collector
    with h5py.File(stored, "r") as f:
        assert nwb._attr(f.id, "committed_f8") == 2.5  # the first type memorised
    assert str(stored).encode() not in _open_files() - before
    with h5py.File(stored, "r") as f:
        for name in ["committed_f8"] + [a[0] for a in ATTRIBUTES]:
            _assert_same(_outcome(nwb._attr, f.id, name), _outcome(_old_attr, f, name))


SCALARS = [
    ("f8", np.float64(-5e-12)),
    ("f4", np.float32(3.5)),
    ("i8", np.int64(12)),
    ("u8_big_endian", np.array(7, dtype=">u8")),
    ("str", "2026-03-04T09:30:00+00:00"),
    ("str_bad_utf8", np.array(b"\xff", dtype=VLEN_ASCII)),
    ("fixed", np.bytes_(b"animal-7")),
    ("fixed_bad_utf8", np.bytes_(b"\xfe")),
    ("nan", np.float64(np.nan)),
    ("one_element", np.array([1.5])),
    ("two_elements", np.array([1.5, 2.5])),
    ("empty", h5py.Empty("f8")),
    ("compound", np.array((1, 2.0), dtype=[("a", "i4"), ("b", "f8")])),
    ("bool", np.bool_(True)),
]


@pytest.fixture(scope="module")
def scalars(tmp_path_factory):
    path = tmp_path_factory.mktemp("lowlevel") / "scalars.h5"
    with h5py.File(path, "w") as f:
        group = f.create_group("series")
        for name, value in SCALARS:
            group[name] = value
        group.create_group("a_group")
        group["dangling"] = h5py.SoftLink("/nowhere")
        group["soft_to_f8"] = h5py.SoftLink("/series/f8")
        f["root_str"] = "invented test day"
    return path


@pytest.mark.parametrize(
    "name", [s[0] for s in SCALARS] + ["a_group", "dangling", "soft_to_f8", "missing"]
)
def test_scalar_dataset_as_the_object_api_reads_it(scalars, name):
    with h5py.File(scalars, "r") as f:
        group = f["series"]
        want = _outcome(_old_scalar, group, name)
        _assert_same(_outcome(nwb._scalar, group.id, name), want)
        _assert_same(_outcome(nwb._scalar, group, name), want)


def test_scalar_dataset_of_the_root_and_of_a_dataset(scalars):
    with h5py.File(scalars, "r") as f:
        _assert_same(_outcome(nwb._scalar, f, "root_str"), _outcome(_old_scalar, f, "root_str"))
        ds = f["series/f8"]  # where a group should be: the object API's error
        _assert_same(_outcome(nwb._scalar, ds, "x"), _outcome(_old_scalar, ds, "x"))


SAMPLES = {
    "f4": np.array([0.1, -0.0, np.nan, np.inf, -np.inf, 1e-45, 3.4e38], dtype=np.float32),
    "f8": np.array([0.1, -0.0, np.nan, 5e-324, -1.7e308], dtype=np.float64),
    "f4_big_endian": np.array([1.1, -2.2, np.nan], dtype=">f4"),
    "f8_big_endian": np.array([1.1, -2.2, 5e-324], dtype=">f8"),
    "f2": np.array([0.1, 65504.0, -0.0], dtype=np.float16),
    "i2": np.array([-32768, 0, 32767], dtype=np.int16),
    "u8": np.array([0, 2**64 - 1, 2**53 + 1], dtype=np.uint64),
    "column": np.arange(6, dtype=np.float32).reshape(6, 1) / 3,
    "three_columns": np.zeros((4, 3), dtype=np.float32),
    "scalar": np.float32(2.0),
    "no_samples": np.zeros(0, dtype=np.float32),
    "text": np.array([b"volts"] * 3),
}
RANGES = [(0, None), (0, 3), (1, 4), (2, 100), (5, 6), (9, 12), (3, 1), (0, 0)]


@pytest.fixture(scope="module")
def samples(tmp_path_factory):
    path = tmp_path_factory.mktemp("lowlevel") / "samples.h5"
    with h5py.File(path, "w") as f:
        for name, values in SAMPLES.items():
            f[name] = values
        f.create_dataset("chunked", data=SAMPLES["f4"], chunks=(2,), compression="gzip")
        f.create_dataset("empty", data=h5py.Empty("f4"))
        f.create_group("a_group")
    return path


def _old_samples(data, start, stop):
    return np.asarray(data[start:stop], dtype=np.float64)


@pytest.mark.parametrize("name", [*SAMPLES, "chunked", "empty", "a_group"])
@pytest.mark.parametrize(("start", "stop"), RANGES)
def test_samples_as_the_object_api_reads_them(samples, name, start, stop):
    with h5py.File(samples, "r") as f:
        want = _outcome(_old_samples, f[name], start, stop)
        got = _outcome(nwb._float_samples, f[name].id, start, stop)
        _assert_same(got, want)
        if got[0] == "value":
            assert got[1].tobytes() == want[1].tobytes()  # bit for bit: NaN, -0.0, subnormals
            assert got[1].flags.writeable and got[1].flags.c_contiguous
        if name in ("f4", "f8", "column", "chunked") and got[0] == "value" and got[1].size:
            assert nwb._read_floats(f[name].id, start, stop) is not None  # the low-level path
        old_length = _outcome(nwb._declared_length, f[name])
        _assert_same(_outcome(nwb._declared_length, f[name].id), old_length)


def test_samples_of_an_array_are_a_copy():
    values = np.arange(5, dtype=np.float64)
    got = nwb._float_samples(values, 0, None)
    np.testing.assert_array_equal(got, values)
    got *= 2  # the reader scales in place: the caller's array must not change
    np.testing.assert_array_equal(values, np.arange(5))


@pytest.fixture(scope="module")
def links(tmp_path_factory):
    path = tmp_path_factory.mktemp("lowlevel") / "links.h5"
    with h5py.File(path, "w") as f:
        f.create_group("general/intracellular_ephys/e0")
        group = f.create_group("series")
        group["soft"] = h5py.SoftLink("/general/intracellular_ephys/e0")
        group["dangling"] = h5py.SoftLink("/general/intracellular_ephys/gone")
        group["external"] = h5py.ExternalLink("elsewhere.h5", "/e0")
        group["hard"] = f["general/intracellular_ephys/e0"]
    return path


def _old_link_target(group, key):
    link = group.get(key, getlink=True)
    if link is None:
        return None
    if not isinstance(link, h5py.SoftLink):
        raise nwb.NotUnderstood(f"{group.name}/{key} is not a soft link")
    return link.path


@pytest.mark.parametrize("key", ["soft", "dangling", "external", "hard"])
def test_link_target_as_the_object_api_reads_it(links, key):
    with h5py.File(links, "r") as f:
        group = f["series"]
        want = _outcome(_old_link_target, group, key)
        _assert_same(_outcome(nwb._link_target, group.id, key), want)


def test_member_is_opened_as_the_object_api_opens_it(scalars):
    with h5py.File(scalars, "r") as f:
        for key in ("f8", "a_group", "soft_to_f8", "dangling", "missing"):
            got = _outcome(nwb._member, f["series"].id, key)
            want = _outcome(lambda k: f["series"][k], key)
            assert got[0] == want[0]
            if got[0] == "error":
                assert got[1] == want[1]
            else:
                assert got[1] == want[1].id and type(nwb._wrap(got[1])) is type(want[1])


def test_table_column_as_the_object_api_reads_it(tmp_path):
    path = tmp_path / "table.h5"
    row = np.dtype([("idx_start", "<i4"), ("count", "<i4"), ("timeseries", h5py.ref_dtype)])
    with h5py.File(path, "w") as f:
        series = [f.create_group(f"acquisition/s{k}") for k in range(3)]
        table = f.create_group("table")
        rows = [(0, 60, s.ref) for s in series] + [(-1, -1, h5py.Reference())]
        table.create_dataset("responses/response", data=np.array(rows, dtype=row))
        table.create_dataset("empty/response", shape=(0,), dtype=row)
        table["plain/response"] = np.arange(3)
    with h5py.File(path, "r") as f:
        for key in ("responses/response", "empty/response", "plain/response", "missing/x"):
            want = _outcome(lambda k: f["table"][k][()], key)
            got = _outcome(nwb._column, f["table"].id, key)
            assert got[0] == want[0]
            if got[0] == "error":
                assert got[1] == want[1]
                continue
            a, b = got[1], want[1]
            assert a.dtype == b.dtype and a.shape == b.shape
            if a.dtype.names is None:
                assert a.tolist() == b.tolist()
                continue
            for name in ("idx_start", "count"):
                assert a[name].tolist() == b[name].tolist()
            names = [[f[r].name if r else None for r in x["timeseries"]] for x in (a, b)]
            assert names[0] == names[1]
