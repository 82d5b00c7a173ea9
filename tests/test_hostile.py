"""Hostile inputs: markup in ids and sheet values, path characters in ids, pickles, a tampered cache.

Text from files and sheets must reach the page as text (escaped), cell ids must never steer
where a figure is written, and nothing from the inputs or the cache is evaluated or unpickled.
All data are short invented simulations.
"""

from __future__ import annotations

import contextlib
import io
import json
import logging
import pickle
import re
from dataclasses import replace
from html.parser import HTMLParser
from pathlib import Path
from urllib.parse import unquote

import numpy as np
import pandas as pd
import pytest

from pipeline.cache import CACHE_DIR
from pipeline.cli import main
from pipeline.simulate import CellModel, Nuisance, StepProtocol, simulate_cell
from pipeline.writers import write_csv, write_nix, write_nwb

PROTOCOL = StepProtocol(
    rate_hz=10_000.0,
    sweep_s=0.7,
    onset_s=0.1,
    step_s=0.3,
    amplitudes_a=tuple(a * 1e-12 for a in (-80, -60, -40, -20, 40, 80)),
)
MODEL = CellModel(
    soma_area_m2=9000e-12, rm_ohm_m2=2.0
)  # one compartment: Rin = Rm / area = 222 MOhm
SCRIPT = "<script>alert(1)</script>"
ELECTRODES = (SCRIPT, "../../escape", "C:\\evil:1", "x/y", "x_y", "long" * 80)
IMG_STEM = "<img src=x onerror=alert(2)>"
SHEET_VALUE = '"><svg onload=alert(3)>'


def _cell(cell_id: str, seed: int, electrode: str = "e0"):
    rec = simulate_cell(MODEL, PROTOCOL, Nuisance(noise_rms_v=1e-4), seed=seed, cell_id=cell_id)
    return replace(rec, electrode=electrode)


def _drop_console_handlers() -> None:
    logger = logging.getLogger("patchbatch")
    for handler in list(logger.handlers):
        if getattr(handler, "_patchbatch_console", False):
            logger.removeHandler(handler)


def run_cli(args: list) -> tuple[int, str]:
    """``patchbatch run ARGS -q`` in this process; exit status and stderr."""
    _drop_console_handlers()
    err = io.StringIO()
    try:
        with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
            code = main(["run", *map(str, args), "-q"])
    finally:
        _drop_console_handlers()
    return code, err.getvalue()


class _Page(HTMLParser):
    """Collects tags, their attributes and the text of an HTML page."""

    def __init__(self) -> None:
        super().__init__()
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_data(self, data):
        self.text.append(data)


def _parse(path: Path) -> _Page:
    page = _Page()
    page.feed(path.read_text(encoding="utf-8"))
    return page


@pytest.fixture(scope="module")
def hostile_day(tmp_path_factory):
    """A day whose file names, electrode names and sheet values are markup and paths."""
    root = tmp_path_factory.mktemp("hostile")
    day = root / "day"
    day.mkdir()
    recs = [_cell(f"r{k}", 10 + k, electrode=e) for k, e in enumerate(ELECTRODES)]
    write_nix(recs, day / "rig.nix")
    write_csv(_cell(IMG_STEM, 30), day / f"{IMG_STEM}.csv", decimals=3)
    sheet = pd.DataFrame(
        {
            "cell_id": [f"rig-{SCRIPT}", IMG_STEM],
            "condition": [SCRIPT, SHEET_VALUE],
        }
    )
    sheet.to_csv(day / "metadata.csv", index=False)
    out = root / "out"
    before = sorted(p for p in root.rglob("*"))
    code, err = run_cli([day, "-o", out, "-j", "1"])
    assert code == 0, err
    return root, day, out, before


def test_markup_in_ids_and_sheet_values_is_shown_as_text(hostile_day):
    _, _, out, _ = hostile_day
    html = (out / "index.html").read_text(encoding="utf-8")
    for payload in (SCRIPT, IMG_STEM, SHEET_VALUE, "<svg"):
        assert payload not in html, payload
    page = _parse(out / "index.html")
    text = "".join(page.text)
    assert f"rig-{SCRIPT}" in text and IMG_STEM in text and SHEET_VALUE in text  # as text
    scripts = [t for t, _ in page.tags if t == "script"]
    assert len(scripts) == 2  # the page's own two scripts only
    assert not [t for t, _ in page.tags if t == "svg"]
    handlers = [(t, k) for t, a in page.tags for k in a if k.lower().startswith("on")]
    assert handlers == []


def test_ids_with_path_characters_give_safe_figure_names_inside_figures(hostile_day):
    root, day, out, before = hostile_day
    cells = pd.read_csv(out / "cells.csv")
    assert (cells["status"] == "ok").all(), cells["status"].tolist()
    assert len(cells) == len(ELECTRODES) + 1 and cells["cell_id"].is_unique
    by_id = cells.set_index("cell_id")["condition"]
    assert by_id[f"rig-{SCRIPT}"] == SCRIPT and by_id[IMG_STEM] == SHEET_VALUE  # kept verbatim
    assert f"rig-{ELECTRODES[1]}" in by_id.index and f"rig-{ELECTRODES[2]}" in by_id.index
    figures = sorted((out / "figures").iterdir())
    assert len(figures) == len(cells)  # one each: 'x/y' and 'x_y' do not share a file
    for fig in figures:
        assert re.fullmatch(r"[A-Za-z0-9_][A-Za-z0-9._-]{0,100}\.png", fig.name), fig.name
        assert fig.stat().st_size > 1000
    # Nothing was written anywhere but the output folder (no 'escape.png' two levels up).
    outside = sorted(p for p in root.rglob("*") if not p.is_relative_to(out))
    assert outside == before
    assert not list(root.parent.glob("*escape*"))
    # Every link on the page stays in figures/ and names a figure that exists.
    page = _parse(out / "index.html")
    links = [a.get("href") or a.get("src") for t, a in page.tags if t in ("a", "img")]
    files = [unquote(v) for v in links if v and not v.startswith(("data:", "#"))]
    assert files and all(f.split("/")[0] == "figures" and ".." not in f.split("/") for f in files)
    assert all(":" not in f for f in files)
    assert {out / f for f in files} == set(figures)


def _marker_pickle(marker: Path) -> bytes:
    class Touch:  # unpickling this creates the marker file
        def __reduce__(self):
            return (Path.touch, (marker,))

    return pickle.dumps(Touch())


def test_pickles_and_other_side_files_in_the_folder_are_not_read(tmp_path):
    day = tmp_path / "day"
    day.mkdir()
    write_nwb([_cell("good", 1)], day / "good.nwb")
    marker = tmp_path / "unpickled"
    payload = _marker_pickle(marker)
    for name in ("evil.pkl", "evil.pickle", "evil.json", "evil.npy", "run.json"):
        (day / name).write_bytes(payload)
    np.save(day / "evil_obj.npy", np.array([object()], dtype=object), allow_pickle=True)
    code, err = run_cli([day, "-o", tmp_path / "out", "-j", "1", "--no-figures"])
    assert code == 0, err
    assert not marker.exists()
    assert pd.read_csv(tmp_path / "out" / "cells.csv")["cell_id"].tolist() == ["good"]


def test_a_pickle_given_by_name_is_refused_unread(tmp_path):
    marker = tmp_path / "unpickled"
    evil = tmp_path / "evil.pkl"
    evil.write_bytes(_marker_pickle(marker))
    code, err = run_cli([evil, "-o", tmp_path / "out", "-j", "1", "--no-figures"])
    assert code == 1
    assert not marker.exists()
    status = pd.read_csv(tmp_path / "out" / "cells.csv").set_index("cell_id").loc["evil", "status"]
    assert re.fullmatch(rf"{re.escape(str(evil))}: unknown extension '\.pkl'; .*", status)


@pytest.fixture
def cached_run(tmp_path):
    """Two cells analysed once; their cache entries and tables."""
    day = tmp_path / "day"
    day.mkdir()
    write_nwb([_cell("one", 1)], day / "one.nwb")
    write_nwb([_cell("two", 2)], day / "two.nwb")
    out = tmp_path / "out"
    args = [day, "-o", out, "-j", "1", "--no-figures"]
    code, err = run_cli(args)
    assert code == 0, err
    entries = sorted(
        p for p in (out / CACHE_DIR).glob("*.json") if re.fullmatch(r"[0-9a-f]{32}", p.stem)
    )
    assert len(entries) == 2
    return args, out, entries, (out / "cells.csv").read_bytes()


def _rerun(args, out) -> tuple[dict, bytes]:
    code, err = run_cli(args)
    assert code == 0, err
    info = json.loads((out / "run.json").read_text(encoding="utf-8"))
    return info["counts"], (out / "cells.csv").read_bytes()


def test_cache_entry_replaced_by_a_pickle_is_ignored_not_unpickled(cached_run, tmp_path):
    args, out, entries, cells = cached_run
    marker = tmp_path / "unpickled"
    entries[0].write_bytes(_marker_pickle(marker))
    counts, again = _rerun(args, out)
    assert not marker.exists()
    assert (counts["cached"], counts["analysed"]) == (1, 1)  # the bad entry was re-analysed
    assert again == cells


def test_cache_entry_of_another_input_is_ignored(cached_run):
    args, out, entries, cells = cached_run
    entries[1].write_bytes(entries[0].read_bytes())  # right file name, another input's result
    counts, again = _rerun(args, out)
    assert (counts["cached"], counts["analysed"]) == (1, 1)
    assert again == cells


def test_truncated_cache_entry_is_ignored(cached_run):
    args, out, entries, cells = cached_run
    text = entries[0].read_bytes()
    entries[0].write_bytes(text[: len(text) // 2])
    counts, again = _rerun(args, out)
    assert (counts["cached"], counts["analysed"]) == (1, 1)
    assert again == cells


def test_cache_entry_with_the_right_key_but_wrong_shape_is_rejected(cached_run):
    args, out, entries, cells = cached_run
    data = json.loads(entries[0].read_text(encoding="utf-8"))
    entries[0].write_text(json.dumps({"key": data["key"], "cells": "tampered"}), encoding="utf-8")
    counts, again = _rerun(args, out)
    assert (counts["cached"], counts["analysed"]) == (1, 1)
    assert again == cells


def test_symlink_loop_in_the_input_folder_is_not_followed(tmp_path):
    day = tmp_path / "day"
    (day / "sub").mkdir(parents=True)
    write_nwb([_cell("good", 1)], day / "sub" / "good.nwb")
    (day / "sub" / "loop").symlink_to(day, target_is_directory=True)  # day/sub/loop -> day
    (day / "dangling.nwb").symlink_to(tmp_path / "nowhere.nwb")
    code, err = run_cli([day, "-o", tmp_path / "out", "-j", "1", "--no-figures"])
    assert code == 0, err
    assert pd.read_csv(tmp_path / "out" / "cells.csv")["cell_id"].tolist() == ["good"]


def test_sheet_columns_cannot_overwrite_results(tmp_path):
    day = tmp_path / "day"
    day.mkdir()
    write_nwb([_cell("good", 1)], day / "good.nwb")
    (day / "broken.nwb").write_bytes(b"\x89HDF\r\n\x1a\n" + bytes(100))  # an HDF5 that ends early
    sheet = "file,status,qc_pass,rin_mohm,condition\ngood.nwb,ok,true,1,ctrl\nbroken.nwb,ok,true,1,ctrl\n"
    (day / "metadata.csv").write_text(sheet)
    code, err = run_cli([day, "-o", tmp_path / "out", "-j", "1", "--no-figures"])
    assert code == 1, err
    cells = pd.read_csv(tmp_path / "out" / "cells.csv").set_index("cell_id")
    status = cells.loc["broken", "status"]
    assert re.fullmatch(r".*broken\.nwb: cannot be read as NWB \(.*\)", status), status
    assert not cells.loc["broken", "qc_pass"]
    assert cells.loc["good", "rin_mohm"] == pytest.approx(222.2, rel=0.03)  # not the sheet's 1
    assert list(cells["condition"]) == ["ctrl", "ctrl"]
    for column in ("status", "qc_pass", "rin_mohm"):
        assert re.search(rf"column '{column}' is not joined: the cell table has a result", err), err


def test_nwb_declaring_more_samples_than_a_sweep_holds_is_refused_unread(tmp_path, monkeypatch):
    # A small gzip-compressed file can declare billions of samples; the reader must refuse on
    # the declared length, before reading. The limit is lowered so a regression stays harmless.
    import h5py

    from pipeline.readers import nwb

    monkeypatch.setattr(nwb, "MAX_SERIES_SAMPLES", 10_000)
    path = write_nwb([_cell("bomb", 1)], tmp_path / "bomb.nwb")
    with h5py.File(path, "r+") as f:
        group = f["acquisition/e0_response_0000"]
        attrs = dict(group["data"].attrs)
        del group["data"]
        data = group.create_dataset(
            "data",
            shape=(50_000,),
            dtype="f4",
            chunks=(5_000,),
            compression="gzip",
            fillvalue=-0.07,
        )
        data.attrs.update(attrs)
        del f["general/intracellular_ephys/intracellular_recordings"]  # whole series are read
    code, err = run_cli([path, "-o", tmp_path / "out", "-j", "1", "--no-figures"])
    assert code == 1
    status = pd.read_csv(tmp_path / "out" / "cells.csv").loc[0, "status"]
    assert re.fullmatch(
        r".*bomb\.nwb: e0_response_0000 \(CurrentClampSeries\): 50000 samples, more than the "
        r"10000 one sweep may hold",
        status,
    ), status
