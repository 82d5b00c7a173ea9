"""Tables and run record: column order, one CSV dialect, Parquet, atomic writes, NaN handling."""

from __future__ import annotations

import json
import math
import os

import numpy as np
import pandas as pd
import pyarrow.parquet
import pytest

import pipeline
from pipeline.cache import file_sha256 as sha256_file
from pipeline.report import atomic
from pipeline.report.atomic import atomic_path, atomic_write_bytes, atomic_write_text
from pipeline.report.tables import (
    Table,
    cells_frame,
    cells_table,
    frame_to_csv,
    read_table_csv,
    spikes_frame,
    sweeps_frame,
    sweeps_table,
    table_to_csv,
    write_run_json,
    write_tables,
)


def _cell_rows() -> list[dict]:
    rng = np.random.default_rng(5)
    rows = []
    for i in range(4):
        rows.append(
            {
                "n_sweeps": 12,
                "cell_id": f"cell{i}",
                "rin_mohm": float(rng.uniform(80, 300)),
                "tau_ms": float(rng.uniform(5, 40)) if i != 2 else math.nan,
                "condition": "ctrl" if i % 2 else "drug",
                "source_file": f"day/cell{i}.nwb",
                "qc_pass": np.bool_(i != 1),
                "qc_reasons": ("Vrest -41 mV above -50 mV", "noise 0.9 mV") if i == 1 else (),
                "status": "ok",
                "slice": i // 2,
                "notes": "",  # empty for every cell: must survive CSV and Parquet alike
            }
        )
    rows.append(
        {"cell_id": "broken", "source_file": "day/broken.nwb", "status": "error: no sweeps"}
    )
    return rows


def test_cells_frame_column_order_and_types():
    frame = cells_frame(_cell_rows(), sheet_columns=("condition", "animal", "slice"))
    assert list(frame.columns[:5]) == ["cell_id", "source_file", "condition", "animal", "slice"]
    # the rest in the order first seen in the rows
    assert list(frame.columns[5:]) == [
        "n_sweeps", "rin_mohm", "tau_ms", "qc_pass", "qc_reasons", "status", "notes"
    ]  # fmt: skip
    assert frame["qc_pass"].dtype == bool
    # a cell without a verdict has not passed
    assert frame["qc_pass"].tolist() == [True, False, True, True, False]
    assert frame.loc[1, "qc_reasons"] == "Vrest -41 mV above -50 mV; noise 0.9 mV"
    assert frame["animal"].isna().all()
    assert math.isnan(frame.loc[2, "tau_ms"]) and math.isnan(frame.loc[4, "rin_mohm"])


def test_sweeps_and_spikes_lead_columns():
    sw = sweeps_frame(
        [{"step_pa": -50.0, "sweep": 3, "cell_id": "a", "used": False, "excluded_because": "drift"}]
    )
    assert list(sw.columns[:2]) == ["cell_id", "sweep"] and sw["used"].dtype == bool
    empty = spikes_frame([])
    assert list(empty.columns) == ["cell_id", "sweep", "spike"] and len(empty) == 0


def test_write_tables_round_trip(tmp_path):
    cells = cells_frame(_cell_rows(), sheet_columns=("condition",))
    sweeps = sweeps_frame(
        [
            {"cell_id": "cell0", "sweep": k, "step_pa": -10.0 * k, "ss_dv_mv": -1.234567891234 * k,
             "used": k != 2, "excluded_because": "noise" if k == 2 else ""}
            for k in range(1, 5)
        ]
    )  # fmt: skip
    spikes = spikes_frame([{"cell_id": "cell0", "sweep": 9, "spike": 0, "peak_mv": 31.5}])
    written = write_tables(tmp_path / "out", cells, sweeps, spikes)
    assert sorted(written) == ["cells.csv", "cells.parquet", "spikes.csv", "sweeps.csv"]
    text = (tmp_path / "out" / "cells.csv").read_text(encoding="utf-8")
    header, first = text.splitlines()[:2]
    assert header.startswith("cell_id,source_file,condition,")
    assert ",true," in first and "\r" not in text
    # NaN written as an empty field, not 'nan'
    assert "nan" not in text.lower().replace("nan_", "")
    back = read_table_csv(tmp_path / "out" / "cells.csv")
    pd.testing.assert_frame_equal(back, cells, check_dtype=False)
    parquet = pd.read_parquet(tmp_path / "out" / "cells.parquet")
    pd.testing.assert_frame_equal(parquet, cells)
    sw_back = read_table_csv(tmp_path / "out" / "sweeps.csv")
    pd.testing.assert_frame_equal(sw_back, sweeps, check_dtype=False)
    assert sw_back["ss_dv_mv"].tolist() == sweeps["ss_dv_mv"].tolist()  # exact floats


def test_mixed_sheet_column_survives_parquet(tmp_path):
    rows = [
        {"cell_id": "a", "source_file": "a.nwb", "slice": 3, "qc_pass": True},
        {"cell_id": "b", "source_file": "b.nwb", "slice": "3b", "qc_pass": "false"},
    ]
    frame = cells_frame(rows, ("slice",))
    assert frame["slice"].tolist() == ["3", "3b"] and frame["qc_pass"].tolist() == [True, False]
    write_tables(tmp_path, frame, sweeps_frame([]))
    assert pd.read_parquet(tmp_path / "cells.parquet")["slice"].tolist() == ["3", "3b"]
    assert not (tmp_path / "spikes.csv").exists()


def _leftovers(folder) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if p.name.startswith("."))


def test_failing_writer_keeps_old_file(tmp_path, monkeypatch):
    cells = cells_table(_cell_rows())
    sweeps = sweeps_table([])
    write_tables(tmp_path, cells, sweeps)
    old_csv = (tmp_path / "cells.csv").read_bytes()
    old_parquet = (tmp_path / "cells.parquet").read_bytes()

    def broken_write_table(table, path, *args, **kwargs):
        with open(path, "wb") as fh:
            fh.write(b"PAR1 half")  # a partial file, then the writer dies
        raise OSError("disk full")

    monkeypatch.setattr(pyarrow.parquet, "write_table", broken_write_table)
    changed = cells_table([{**row, "rin_mohm": 1.0} for row in _cell_rows()])
    with pytest.raises(OSError, match="disk full"):
        write_tables(tmp_path, changed, sweeps)
    assert (tmp_path / "cells.parquet").read_bytes() == old_parquet
    assert _leftovers(tmp_path) == []
    # the CSV was written before the failure, completely
    assert (tmp_path / "cells.csv").read_bytes() != old_csv
    assert read_table_csv(tmp_path / "cells.csv")["rin_mohm"].eq(1.0).all()


def test_atomic_write_failure_midway(tmp_path, monkeypatch):
    target = tmp_path / "run.json"
    atomic_write_text(target, "old\n")

    def broken_fsync(fd):
        raise OSError("I/O error")

    monkeypatch.setattr(atomic.os, "fsync", broken_fsync)
    with pytest.raises(OSError, match="I/O error"):
        atomic_write_bytes(target, b"new content")
    assert target.read_text() == "old\n"
    assert _leftovers(tmp_path) == []


def test_atomic_path_keeps_suffix_and_mode(tmp_path):
    with atomic_path(tmp_path / "fig.png") as tmp:
        assert tmp.parent == tmp_path and tmp.suffix == ".png" and tmp.name != "fig.png"
        tmp.write_bytes(b"x")
    mode = (tmp_path / "fig.png").stat().st_mode & 0o777
    umask = os.umask(0)
    os.umask(umask)
    assert mode == 0o666 & ~umask
    with pytest.raises(ValueError), atomic_path(tmp_path / "never.txt") as tmp:
        tmp.write_text("partial")
        raise ValueError("writer failed")
    assert not (tmp_path / "never.txt").exists() and _leftovers(tmp_path) == []


def _mixed_rows(seed: int, n: int) -> list[dict]:
    """Rows whose columns hold every kind a run makes: numbers with gaps, whole numbers, text
    with separators and quotes, bools with gaps, tuples of reasons, numpy scalars, nothing."""
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(n):
        row = {
            "cell_id": f"c{i}",
            "source_file": f"day/c{i}.nwb",
            "rin_mohm": float(rng.uniform(50, 400)) * 10.0 ** int(rng.integers(-9, 9)),
            "tau_ms": math.nan if i % 3 == 0 else np.float64(rng.uniform(5, 40)),
            "n_sweeps": int(rng.integers(0, 20)),
            "slice": int(i) if i % 4 else None,
            "condition": ["ctrl", 'a "b", c', "", "é; ü"][i % 4],
            "qc_pass": [True, False, None, "true"][i % 4],
            "spiking": bool(i % 2) if i % 5 else None,
            "qc_reasons": ("noise 0.9 mV", "drift") if i % 2 else (),
            "notes": "",
            "peak": np.int64(i),
        }
        if i % 3 == 1:
            row["extra"] = float(rng.normal())
        rows.append(row)
    return rows


@pytest.mark.parametrize("n", [1, 7, 40])
def test_tables_are_written_as_pandas_writes_them(tmp_path, n):
    # The reference is pandas itself (to_csv, and to_parquet through pyarrow) writing the same
    # table as a DataFrame: the project's writers (csv module, Arrow buffers) must agree with it
    # to the byte for CSV and to the value and type for Parquet.
    table = cells_table(_mixed_rows(seed=n, n=n), ("condition", "animal"))
    frame = table.to_frame()
    assert table.kinds["rin_mohm"] == "float" and table.kinds["n_sweeps"] == "int"
    assert table.kinds["condition"] == "text" and table.kinds["animal"] == "float"
    assert table.kinds["qc_pass"] == "bool" and table.kinds["notes"] == "float"
    shown = frame.copy()
    for col in shown.columns:
        if shown[col].dtype == bool:
            shown[col] = shown[col].map({True: "true", False: "false"})
    assert table_to_csv(table) == shown.to_csv(index=False, na_rep="", lineterminator="\n")
    write_tables(tmp_path / "ours", table, sweeps_table([]))
    frame.to_parquet(tmp_path / "pandas.parquet", index=False, engine="pyarrow")
    ours = pyarrow.parquet.read_table(tmp_path / "ours" / "cells.parquet")
    theirs = pyarrow.parquet.read_table(tmp_path / "pandas.parquet")
    assert ours.schema.remove_metadata() == theirs.schema.remove_metadata()
    assert ours.to_pylist() == theirs.to_pylist()  # missing values are nulls in both
    pd.testing.assert_frame_equal(ours.to_pandas(), theirs.to_pandas())
    assert [ours[c].null_count for c in ours.column_names] == [
        theirs[c].null_count for c in theirs.column_names
    ]
    pd.testing.assert_frame_equal(pd.read_parquet(tmp_path / "ours" / "cells.parquet"), frame)


def test_a_dataframe_is_written_by_pandas_as_its_table_is_by_ours(tmp_path):
    # a run's tables go through our writers; a DataFrame a user hands in goes through pandas'
    # (its own dtypes: Int64, float32, dates...); for a run's table the two agree
    frame = cells_frame(_mixed_rows(seed=3, n=9))
    table = cells_table(_mixed_rows(seed=3, n=9))
    assert table_to_csv(table) == frame_to_csv(frame)  # ours against pandas' writer
    assert Table.from_frame(frame).kinds == table.kinds
    odd = pd.DataFrame({"n": pd.array([1, None], dtype="Int64"), "x": np.float32([0.1, 2])})
    assert table_to_csv(odd) == "n,x\n1,0.1\n,2.0\n"
    write_tables(tmp_path, odd, sweeps_frame([]))
    assert pd.read_parquet(tmp_path / "cells.parquet").dtypes.tolist() == odd.dtypes.tolist()


def test_frame_to_csv_dialect():
    frame = pd.DataFrame({"a": [1.5, math.nan], "b": ["x,y", "é"], "ok": [True, False]})
    assert frame_to_csv(frame) == 'a,b,ok\n1.5,"x,y",true\n,é,false\n'


def test_sha256_and_run_json(tmp_path):
    data = tmp_path / "x.bin"
    data.write_bytes(b"abc")
    # FIPS 180-2 test vector for "abc"
    assert sha256_file(data) == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    path = write_run_json(
        tmp_path,
        {
            "config": {"qc": {"max_noise_v": np.float64(5e-4), "bad": math.nan}},
            "inputs": [{"path": data, "sha256": sha256_file(data)}],
            "counts": {"cells": np.int64(3)},
            "started": math.inf,
            "errors": [{"file": "y.nwb", "message": "no sweeps"}],
        },
    )
    record = json.loads(path.read_text(encoding="utf-8"))
    assert record["version"] == pipeline.__version__ and record["started"] is None
    assert record["config"]["qc"] == {"max_noise_v": 5e-4, "bad": None}
    assert record["inputs"][0]["path"] == str(data) and record["counts"]["cells"] == 3
    assert record["errors"][0]["message"] == "no sweeps"


def test_numbers_of_a_text_column_are_what_pandas_makes_of_it():
    # the summary plot's values: pandas' to_numeric(errors="coerce") is the reference
    values = ["1.5", " -2e3 ", "1_000", "\u0663", "\uff11\uff12", "inf", "x", None, ""]
    table = Table(("a",), {"a": "text"}, {"a": values})
    want = pd.to_numeric(pd.Series(values, dtype=object), errors="coerce").to_numpy(float)
    np.testing.assert_array_equal(table.numbers("a"), want)
