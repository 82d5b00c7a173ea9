"""The day's batch: executors agree, the cache is used, runs resume, the sheet joins, exit codes."""

from __future__ import annotations

import concurrent.futures
import json
import shutil

import pandas as pd
import pytest
from day_factory import write_day

from pipeline import cache, cli
from pipeline.batch import OutputFolderError, run_batch


@pytest.fixture(scope="module")
def day(tmp_path_factory):
    folder = tmp_path_factory.mktemp("day")
    write_day(folder, 3)
    return folder


def _cells(out):
    return pd.read_csv(out / "cells.csv")


def test_run_writes_every_output_and_joins_the_sheet(day, tmp_path):
    out = tmp_path / "out"
    result = run_batch([day], out=out, workers=1, progress=False)
    assert result.exit_status == 0
    for name in (
        "cells.csv",
        "cells.parquet",
        "sweeps.csv",
        "spikes.csv",
        "index.html",
        "run.json",
        "patchbatch.log",
    ):
        assert (out / name).is_file(), name
    cells = _cells(out)
    assert list(cells["cell_id"]) == ["c00", "c01", "c02"]
    assert list(cells["condition"]) == ["ctrl", "drug", "ctrl"]
    assert cells["status"].eq("ok").all()
    # The depolarized cell (leak -45 mV) fails on its resting potential, with the reason.
    by_id = cells.set_index("cell_id")
    assert not by_id.loc["c02", "qc_pass"]
    assert "resting potential" in by_id.loc["c02", "qc_reasons"]
    assert by_id.loc["c00", "qc_pass"], by_id.loc["c00", "qc_reasons"]
    assert (out / "figures" / "c00.png").stat().st_size > 10_000
    info = json.loads((out / "run.json").read_text())
    assert info["counts"]["cells"] == 3 and len(info["inputs"]) == 3
    assert all(len(i["sha256"]) == 64 for i in info["inputs"])
    assert info["warnings"] == []
    # what ran it, not the config's 0 (= all cores) whatever -j said
    assert info["executor"] == {"scheduler": None, "workers": 1}


def test_pool_and_dask_give_identical_tables(day, tmp_path):
    pytest.importorskip("distributed")
    one = tmp_path / "one"
    two = tmp_path / "two"
    dask = tmp_path / "dask"
    run_batch([day], out=one, workers=1, figures=False, progress=False)
    run_batch([day], out=two, workers=2, figures=False, progress=False)
    run_batch([day], out=dask, workers=2, scheduler="local", figures=False, progress=False)
    for name in ("cells.csv", "sweeps.csv", "spikes.csv"):
        reference = (one / name).read_bytes()
        assert (two / name).read_bytes() == reference, name
        assert (dask / name).read_bytes() == reference, name


def test_second_run_uses_the_cache_and_writes_identical_tables(day, tmp_path, monkeypatch):
    out = tmp_path / "out"
    run_batch([day], out=out, workers=1, figures=False, progress=False)
    first = {n: (out / n).read_bytes() for n in ("cells.csv", "sweeps.csv")}

    def boom(*args, **kwargs):
        raise AssertionError("re-analysed a cached file")

    monkeypatch.setattr("pipeline.batch.analyse_file", boom)
    result = run_batch([day], out=out, workers=1, figures=False, progress=False)
    assert result.info["counts"]["cached"] == 3 and result.info["counts"]["analysed"] == 0
    for name, data in first.items():
        assert (out / name).read_bytes() == data


def test_killed_run_resumes_from_what_was_cached(day, tmp_path, monkeypatch):
    out = tmp_path / "out"
    from pipeline import analysis

    real = analysis.analyse_file
    calls = []

    def dies_on_third(path, config, figure_dir=None, **kwargs):
        calls.append(path)
        if len(calls) == 3:
            raise KeyboardInterrupt  # the user pressed Ctrl-C (or the machine went down)
        return real(path, config, figure_dir, **kwargs)

    monkeypatch.setattr("pipeline.batch.analyse_file", dies_on_third)
    with pytest.raises(KeyboardInterrupt):
        run_batch([day], out=out, workers=1, figures=False, progress=False)
    entries = [p for p in (out / cache.CACHE_DIR).glob("*.json") if p.name != "owner.json"]
    assert len(entries) == 2
    assert not (out / "cells.csv").exists()
    monkeypatch.setattr("pipeline.batch.analyse_file", real)
    result = run_batch([day], out=out, workers=1, figures=False, progress=False)
    assert result.info["counts"]["cached"] == 2 and result.info["counts"]["analysed"] == 1
    assert len(_cells(out)) == 3


def test_changed_config_needs_force(day, tmp_path):
    out = tmp_path / "out"
    run_batch([day], out=out, workers=1, figures=False, progress=False)
    lab = tmp_path / "lab.toml"
    lab.write_text("[passive]\nss_window_s = 0.1\n")
    with pytest.raises(OutputFolderError, match="other inputs or another config"):
        run_batch([day], config=lab, out=out, workers=1, figures=False, progress=False)
    result = run_batch(
        [day], config=lab, out=out, workers=1, figures=False, force=True, progress=False
    )
    assert result.info["counts"]["analysed"] == 3


def test_sheet_mismatches_are_reported(day, tmp_path):
    folder = tmp_path / "day"
    shutil.copytree(day, folder)
    (folder / "metadata.csv").write_text("file,condition\nc00.nwb,ctrl\nghost.nwb,drug\n")
    result = run_batch([folder], out=tmp_path / "out", workers=1, figures=False, progress=False)
    warnings = result.info["warnings"]
    assert any("no row for cell c01" in w for w in warnings)
    assert any("ghost.nwb" in w and "matches no input file" in w for w in warnings)
    assert result.exit_status == 0


def test_a_sheet_in_any_letter_case_or_given_by_path_is_not_a_recording(day, tmp_path):
    # "Metadata.csv" was read as a recording (an error row, exit 1) and never joined; a sheet
    # given with --sheet that lies in the input folder was analysed as well
    folder = tmp_path / "day"
    shutil.copytree(day, folder)
    (folder / "metadata.csv").rename(folder / "Metadata.csv")
    result = run_batch([folder], out=tmp_path / "out", workers=1, figures=False, progress=False)
    assert result.exit_status == 0
    assert list(result.cells["cell_id"]) == ["c00", "c01", "c02"]
    assert list(result.cells["condition"]) == ["ctrl", "drug", "ctrl"]
    (folder / "Metadata.csv").unlink()
    given = folder / "sheet_2026-03-14.csv"
    given.write_text("file,condition\nc00,ctrl\nc01,ctrl\nc02,drug\n")
    for inputs in ([folder], [*sorted(folder.glob("*.nwb")), given]):  # a shell's glob too
        result = run_batch(inputs, out=tmp_path / "out2", sheet=given, workers=1, figures=False,
                           progress=False, force=True)  # fmt: skip
        assert result.exit_status == 0 and result.info["warnings"] == []
        assert list(result.cells["condition"]) == ["ctrl", "ctrl", "drug"]


def test_unreadable_file_is_a_row_and_exit_1(day, tmp_path, capsys):
    folder = tmp_path / "day"
    shutil.copytree(day, folder)
    (folder / "broken.nwb").write_bytes(b"not an hdf5 file at all")
    out = tmp_path / "out"
    status = cli.main(["run", str(folder), "-o", str(out), "-j", "1", "--no-figures", "-q"])
    assert status == 1
    cells = _cells(out).set_index("cell_id")
    assert "broken.nwb" in cells.loc["broken", "status"]
    assert not cells.loc["broken", "qc_pass"]
    assert (cells.drop(index="broken")["status"] == "ok").all()
    assert "Traceback" not in capsys.readouterr().err


def test_rule_on_a_misspelt_column_is_reported_with_a_suggestion(day, tmp_path):
    lab = tmp_path / "lab.toml"
    lab.write_text(
        '[[qc.rule]]\nname = "lab-tau"\ncolumn = "tau_msec"\nscope = "cell"\nmax = 50\n'
        'action = "fail"\n'
    )
    result = run_batch(
        [day], config=lab, out=tmp_path / "out", workers=1, figures=False, progress=False
    )
    assert any("'tau_msec'" in w and "did you mean 'tau_ms'" in w for w in result.info["warnings"])
    assert not result.cells["qc_pass"].any()  # the cells say why, too
    assert result.cells["qc_reasons"].str.contains("tau_msec").all()


@pytest.mark.parametrize(
    ("method", "figures", "expect"),
    [
        ("fork", True, ["scipy.optimize", "pipeline.report.figures"]),
        ("fork", False, ["scipy.optimize"]),
        ("spawn", True, []),  # spawned workers start afresh: nothing to inherit
    ],
)
def test_pool_workers_inherit_heavy_imports_when_forked(monkeypatch, method, figures, expect):
    import importlib
    import multiprocessing

    from pipeline import batch

    loaded = []
    monkeypatch.setattr(importlib, "import_module", loaded.append)
    batch._preload(multiprocessing.get_context(method), figures)
    assert loaded == expect


@pytest.mark.parametrize("figures", [True, False])
def test_forkserver_preloads_the_heavy_imports_in_its_server(monkeypatch, figures):
    import multiprocessing

    from pipeline import batch

    context = multiprocessing.get_context("forkserver")
    asked = []
    monkeypatch.setattr(context, "set_forkserver_preload", asked.append)
    batch._preload(context, figures)
    expect = ["__main__", "scipy.optimize"] + (["pipeline.report.figures"] if figures else [])
    assert asked == [expect]


@pytest.mark.parametrize("method", ["spawn", "forkserver"])
def test_pool_gives_the_same_tables_whatever_its_start_method(day, tmp_path, method):
    # fork is Linux's default before Python 3.14, forkserver from 3.14, spawn on macOS and
    # Windows: workers that import everything afresh must give the same results as the
    # in-process run (which test_pool_and_dask_give_identical_tables compares with fork)
    import subprocess
    import sys

    run_batch([day], out=tmp_path / "in_process", workers=1, figures=False, progress=False)
    code = (
        "import multiprocessing\n"
        "from pipeline.batch import run_batch\n"
        "if __name__ == '__main__':\n"
        f"    multiprocessing.set_start_method({method!r})\n"
        f"    run_batch([{str(day)!r}], out={str(tmp_path / method)!r}, workers=2,"
        " progress=False)\n"
    )
    script = tmp_path / "run_with_start_method.py"
    script.write_text(code)
    done = subprocess.run([sys.executable, str(script)], capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    for name in ("cells.csv", "sweeps.csv", "spikes.csv"):
        got, want = (tmp_path / d / name for d in (method, "in_process"))
        assert got.read_bytes() == want.read_bytes(), name
    assert len(list((tmp_path / method / "figures").glob("*.png"))) == 3


@pytest.mark.parametrize("preload", [True, False])
def test_forkserver_workers_start_with_the_preloaded_modules(tmp_path, preload):
    # the server skips a preload name that fails to import without a word: check in a worker
    import subprocess
    import sys

    code = (
        "import multiprocessing, sys\n"
        "from concurrent.futures import ProcessPoolExecutor\n"
        "from pipeline import batch\n"
        "def loaded(names):\n"
        "    return [n in sys.modules for n in names]\n"
        "if __name__ == '__main__':\n"
        "    context = multiprocessing.get_context('forkserver')\n"
        f"    if {preload}:\n"
        "        batch._preload(context, figures=True)\n"
        "    with ProcessPoolExecutor(1, mp_context=context) as pool:\n"
        "        names = ['scipy.optimize', 'pipeline.report.figures']\n"
        "        print(pool.submit(loaded, names).result())\n"
    )
    script = tmp_path / "forkserver_worker.py"
    script.write_text(code)
    done = subprocess.run([sys.executable, str(script)], capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == str([preload, preload])


def test_the_command_is_the_quick_exit_entry_point():
    import tomllib
    from pathlib import Path

    project = tomllib.loads((Path(__file__).parents[1] / "pyproject.toml").read_text())
    assert project["project"]["scripts"]["patchbatch"] == "pipeline.cli:entry"
    main_module = (Path(cli.__file__).parent / "__main__.py").read_text()
    assert "sys.exit(entry())" in main_module


def test_the_command_exits_with_its_status_and_everything_written(day, tmp_path):
    # `python -m pipeline` is the command as a user runs it: a whole process, whose shutdown
    # skips the collector's pass over every object (cli.entry). Its output must be complete:
    # the summary line on stdout, the log, the tables; and the status must be main()'s.
    import subprocess
    import sys

    folder = tmp_path / "day"
    shutil.copytree(day, folder)
    (folder / "broken.nwb").write_bytes(b"not an hdf5 file at all")
    out = tmp_path / "out"
    done = subprocess.run(
        [sys.executable, "-m", "pipeline", "run", str(folder), "-o", str(out), "-j", "1"],
        capture_output=True,
        text=True,
    )
    assert done.returncode == 1, done.stderr
    assert done.stdout.rstrip().endswith(f"Open {out}/index.html"), done.stdout
    # "3 cell(s) from 4 file(s)" read as if the cells came from all four files
    said = "4 file(s): 3 cell(s) analysed, 2 pass QC; 1 file(s) could not be analysed"
    assert said in done.stdout
    assert f"{said}; wrote {out}" in (out / "patchbatch.log").read_text()
    assert "broken.nwb" in (out / "patchbatch.log").read_text()
    assert len(_cells(out)) == 4
    assert len(list((out / "figures").glob("*.png"))) == 3


def test_entry_freezes_the_collector_only_after_main(monkeypatch):
    import gc

    seen = []
    monkeypatch.setattr(cli, "main", lambda: seen.append("main") or 7)
    monkeypatch.setattr(gc, "freeze", lambda: seen.append("frozen"))
    assert cli.entry() == 7
    assert seen == ["main", "frozen"]


def test_a_failed_early_import_is_left_for_the_report_stage(monkeypatch):
    # imported early only to overlap the workers: a failure there must not throw away the
    # results being computed (the report stage meets it again, after they are cached)
    import importlib

    from pipeline import batch

    asked = []

    def broken(name):
        asked.append(name)
        raise ImportError(f"no module named {name}")

    monkeypatch.setattr(importlib, "import_module", broken)
    batch._import_report_modules(figures=True)
    assert asked == ["pyarrow.parquet"]


def test_a_fresh_folder_hashes_each_file_before_its_analysis_but_not_all_first(
    day, tmp_path, monkeypatch
):
    # nothing to look up in a fresh folder: the hashes of the later files wait here until the
    # first analysis has begun, so a batch that hashed everything first would time out
    import threading
    from pathlib import Path

    from pipeline import analysis

    began = threading.Event()
    real_hash, real_analyse = cache.file_sha256, analysis.analyse_file
    files = sorted(day.glob("*.nwb"))
    events, waited = [], []

    def hash_after_an_analysis(path):
        if Path(path) != files[0]:
            waited.append(began.wait(timeout=10))
        digest = real_hash(path)
        events.append(("hashed", Path(path).name))
        return digest

    def analyse(path, *args, **kwargs):
        events.append(("analysed", Path(path).name))
        began.set()
        return real_analyse(path, *args, **kwargs)

    monkeypatch.setattr(cache, "file_sha256", hash_after_an_analysis)
    monkeypatch.setattr("pipeline.batch.analyse_file", analyse)
    out = tmp_path / "out"
    result = run_batch([day], out=out, workers=1, figures=False, progress=False)
    assert waited == [True, True]
    # each file is hashed before it is analysed (a file rewritten meanwhile must not have its
    # old results stored under its new hash)
    for path in files:
        assert events.index(("hashed", path.name)) < events.index(("analysed", path.name))
    # the results are stored under the keys a lookup computes, and run.json has the hashes
    digest = result.info["config_digest"]
    for path, listed in zip(files, result.info["inputs"], strict=True):
        assert listed == {"file": str(path), "sha256": real_hash(path)}
        key = cache.entry_key(real_hash(path), digest, str(path))
        assert cache.load_entry(out, key) is not None
    monkeypatch.setattr("pipeline.batch.analyse_file", None)  # a re-run must not analyse
    again = run_batch([day], out=out, workers=1, figures=False, progress=False)
    assert again.info["counts"]["cached"] == 3


@pytest.mark.parametrize("workers", [1, 2])
def test_a_file_rewritten_after_its_analysis_is_analysed_again(day, tmp_path, monkeypatch, workers):
    # a rig still writing into the day's folder: c02 gets other bytes (c00's) once analysed
    import multiprocessing
    import threading

    from pipeline import analysis

    if workers > 1 and multiprocessing.get_start_method() != "fork":
        pytest.skip("only forked workers see the patched analysis")

    folder = tmp_path / "day"
    shutil.copytree(day, folder)
    real_hash, real_analyse = cache.file_sha256, analysis.analyse_file

    def slow_hash(path):  # the hashing lags behind the analysis
        threading.Event().wait(0.3)
        return real_hash(path)

    def analyse_then_rewrite(path, *args, **kwargs):
        result = real_analyse(path, *args, **kwargs)
        if path.endswith("c02.nwb"):
            shutil.copyfile(folder / "c00.nwb", path)
        return result

    monkeypatch.setattr(cache, "file_sha256", slow_hash)
    monkeypatch.setattr("pipeline.batch.analyse_file", analyse_then_rewrite)
    out = tmp_path / "out"
    run_batch([folder], out=out, workers=workers, figures=False, progress=False)
    monkeypatch.setattr("pipeline.batch.analyse_file", real_analyse)
    again = run_batch([folder], out=out, workers=1, figures=False, progress=False)
    assert (again.info["counts"]["cached"], again.info["counts"]["analysed"]) == (2, 1)
    cells = again.cells.set_index("cell_id")
    assert cells.loc["c02", "rin_mohm"] == pytest.approx(cells.loc["c00", "rin_mohm"], rel=1e-9)
    fresh = run_batch([folder], out=tmp_path / "fresh", workers=1, figures=False, progress=False)
    pd.testing.assert_frame_equal(again.cells, fresh.cells)


def test_a_pool_hashes_before_each_submit_and_survives_a_worker_dying_meanwhile(
    day, tmp_path, monkeypatch
):
    # spawn and forkserver pools (macOS, Linux from Python 3.14) submit each file once it is
    # hashed; a worker dying meanwhile breaks the pool at the next submit: the files not yet
    # submitted go to a new pool (none of them broke it), those in flight are re-run solo
    import multiprocessing
    import threading
    from concurrent.futures import Future
    from concurrent.futures.process import BrokenProcessPool
    from pathlib import Path

    events, pools = [], []
    first_in_second_pool = threading.Event()
    real_hash = cache.file_sha256

    def hash_and_note(path):
        if Path(path).name == "c02.nwb":  # hashed only once c01 is done in the second pool:
            first_in_second_pool.wait(timeout=10)  # a submit that did not wait comes first
            threading.Event().wait(0.2)
        digest = real_hash(path)
        events.append(("hashed", Path(path).name))
        return digest

    class Pool:  # runs jobs in this process; the first shared pool breaks at its 2nd submit
        def __init__(self, max_workers, mp_context):
            self.kind = "solo" if max_workers == 1 else f"shared {len(pools)}"
            self.submitted = 0
            pools.append(self)

        def __enter__(self):
            return self

        def __exit__(self, *exc):
            return False

        def submit(self, fn, *args):
            if self.kind == "shared 0" and self.submitted == 1:
                raise BrokenProcessPool("a child process terminated abruptly")
            self.submitted += 1
            events.append(("submitted", Path(fn.__self__.path).name, self.kind))
            done = Future()
            done.set_result(fn(*args))
            if self.kind == "shared 1":
                first_in_second_pool.set()
            return done

    spawn = multiprocessing.get_context("spawn")
    monkeypatch.setattr(multiprocessing, "get_context", lambda *args: spawn)
    monkeypatch.setattr(cache, "file_sha256", hash_and_note)
    monkeypatch.setattr(concurrent.futures, "ProcessPoolExecutor", Pool)
    result = run_batch([day], out=tmp_path / "out", workers=2, figures=False, progress=False)
    assert result.exit_status == 0
    assert list(result.cells["status"]) == ["ok", "ok", "ok"]
    submitted = [e[1:] for e in events if e[0] == "submitted"]
    assert submitted == [("c00.nwb", "shared 0"), ("c01.nwb", "shared 1"), ("c02.nwb", "shared 1")]
    for name, _ in submitted:
        assert events.index(("hashed", name)) < events.index(("submitted", name, _))


def test_a_re_run_with_a_new_file_of_the_same_name_renames_the_cached_cell(day, tmp_path):
    # rig1/c00 was cached as "c00"; once rig2/c00 joins the day, its id needs its folder
    folder = tmp_path / "day"
    (folder / "rig1").mkdir(parents=True)
    shutil.copyfile(day / "c00.nwb", folder / "rig1" / "c00.nwb")
    out = tmp_path / "out"
    first = run_batch([folder], out=out, workers=1, figures=False, progress=False)
    assert list(first.cells["cell_id"]) == ["c00"]
    (folder / "rig2").mkdir()
    shutil.copyfile(day / "c01.nwb", folder / "rig2" / "c00.nwb")
    again = run_batch([folder], out=out, workers=1, figures=False, progress=False)
    assert list(again.cells["cell_id"]) == ["rig1-c00", "rig2-c00"]


def test_a_figure_drawn_under_another_config_is_drawn_again(day, tmp_path):
    # figures are named by cell id alone: a --force run at another dpi redraws c00.png, and a
    # run back under the first config must not take that PNG for its cached result's
    from pipeline.config import load_config

    out = tmp_path / "out"
    small = tmp_path / "small.toml"
    small.write_text("[report]\nfigure_dpi = 50\n")
    first = run_batch([day], out=out, workers=1, progress=False)
    drawn = (out / "figures" / "c00.png").read_bytes()
    run_batch([day], load_config(small), out=out, workers=1, progress=False, force=True)
    assert (out / "figures" / "c00.png").read_bytes() != drawn
    again = run_batch([day], out=out, workers=1, progress=False, force=True)
    assert again.info["counts"]["analysed"] == 3  # its cached results, but not their figures
    assert (out / "figures" / "c00.png").read_bytes() == drawn
    pd.testing.assert_frame_equal(again.cells, first.cells)
    # untouched figures are taken from the cache
    third = run_batch([day], out=out, workers=1, progress=False)
    assert third.info["counts"]["cached"] == 3


def test_a_cache_entry_naming_a_figure_outside_the_figure_folder_is_not_used(day, tmp_path):
    # a tampered entry must not make the batch read some other file (a FIFO, /dev/zero...)
    out = tmp_path / "out"
    run_batch([day], out=out, workers=1, progress=False)
    outside = tmp_path / "elsewhere.png"
    shutil.copyfile(out / "figures" / "c00.png", outside)
    for entry in (out / cache.CACHE_DIR).glob("*.json"):
        data = json.loads(entry.read_text())
        if data.get("cells") and data["cells"][0]["cell"]["cell_id"] == "c00":
            data["cells"][0]["figure"] = "../../elsewhere.png"  # same bytes as its digest
            entry.write_text(json.dumps(data))
    again = run_batch([day], out=out, workers=1, progress=False)
    assert (again.info["counts"]["cached"], again.info["counts"]["analysed"]) == (2, 1)


def test_files_with_the_same_bytes_keep_their_own_rows_on_a_re_run(day, tmp_path):
    # a copy of a recording under another name is another row, not the first file's row twice
    folder = tmp_path / "day"
    folder.mkdir()
    for name in ("c00", "copy_of_c00"):
        shutil.copyfile(day / "c00.nwb", folder / f"{name}.nwb")
    out = tmp_path / "out"
    first = run_batch([folder], out=out, workers=1, figures=False, progress=False)
    again = run_batch([folder], out=out, workers=1, figures=False, progress=False)
    assert again.info["counts"]["cached"] == 2
    for result in (first, again):
        assert list(result.cells["cell_id"]) == ["c00", "copy_of_c00"]
        assert list(result.cells["source_file"]) == [str(folder / "c00.nwb"),
                                                     str(folder / "copy_of_c00.nwb")]  # fmt: skip


def test_no_other_thread_runs_when_a_fork_pool_forks(day, tmp_path, monkeypatch):
    import multiprocessing
    import threading

    from pipeline import batch

    if multiprocessing.get_start_method() != "fork":
        pytest.skip("the pool does not fork here")
    real_hash, real_pool = cache.file_sha256, concurrent.futures.ProcessPoolExecutor
    threads_at_fork = []

    def slow_hash(path):  # still hashing when the pool starts, unless it is waited for
        threading.Event().wait(0.3)
        return real_hash(path)

    def pool(*args, **kwargs):
        threads_at_fork.append(set(threading.enumerate()))
        return real_pool(*args, **kwargs)

    monkeypatch.setattr(cache, "file_sha256", slow_hash)
    monkeypatch.setattr(batch, "_preload", lambda *args: None)  # no imports to hash beside
    monkeypatch.setattr(concurrent.futures, "ProcessPoolExecutor", pool)
    # threads started before (an earlier test's Dask client leaves its IO loop) are not ours
    before = set(threading.enumerate())
    # with the progress bar shown, which is the default on a terminal
    result = run_batch([day], out=tmp_path / "out", workers=2, figures=False, progress=True)
    assert result.exit_status == 0 and threads_at_fork
    assert all(alive <= before for alive in threads_at_fork), (before, threads_at_fork)


def test_an_interrupted_run_stops_hashing(day, tmp_path, monkeypatch):
    import threading

    hashed = []

    def slow_hash(path):
        hashed.append(path)
        if len(hashed) > 1:  # the second file is still being hashed when the run stops
            threading.Event().wait(2.0)
        return "0" * 64

    def interrupted(*args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(cache, "file_sha256", slow_hash)
    monkeypatch.setattr("pipeline.batch.analyse_file", interrupted)
    with pytest.raises(KeyboardInterrupt):
        run_batch([day], out=tmp_path / "out", workers=1, figures=False, progress=False)
    # the first file was hashed (it is before its analysis); the third never is
    assert 1 <= len(hashed) <= 2
    assert not any(t.name.startswith("patchbatch-sha256") for t in threading.enumerate())


def _two_cells(path, electrodes, seeds=(1, 2)):
    """A file holding two short passive cells, recorded on ``electrodes``."""
    from dataclasses import replace as with_

    from day_factory import RIG, SHORT

    from pipeline.simulate import CellModel, simulate_cell
    from pipeline.writers import write_nwb

    recs = []
    for electrode, seed, area in zip(electrodes, seeds, (9000e-12, 15000e-12), strict=True):
        model = CellModel(soma_area_m2=area, rm_ohm_m2=2.0)
        rec = simulate_cell(model, SHORT, RIG, seed=seed, cell_id=electrode, source_file=str(path))
        recs.append(with_(rec, electrode=electrode))
    write_nwb(recs, path, identifier=path.stem, subject_id="A0")
    return path


def test_a_file_of_one_cell_named_like_another_files_cell_keeps_every_cell_apart(day, tmp_path):
    # pair.nwb holds electrodes e0 and e1 ("pair-e0", "pair-e1"); pair-e0.nwb holds one cell,
    # "pair-e0" by its stem. Each cell must keep its own row, figure and cache entry.
    folder = tmp_path / "day"
    folder.mkdir()
    _two_cells(folder / "pair.nwb", ("e0", "e1"))
    shutil.copyfile(day / "c00.nwb", folder / "pair-e0.nwb")
    out = tmp_path / "out"
    first = run_batch([folder], out=out, workers=1, progress=False)
    assert first.exit_status == 0
    assert list(first.cells["cell_id"]) == ["pair-e0", "pair.nwb-e0", "pair.nwb-e1"]
    assert first.cells["status"].eq("ok").all()
    rin = first.cells.set_index("cell_id")["rin_mohm"]
    assert abs(rin["pair-e0"] - rin["pair.nwb-e0"]) > 10  # two different cells
    figures = {p.name: p.read_bytes() for p in (out / "figures").glob("*.png")}
    assert sorted(figures) == ["pair-e0.png", "pair.nwb-e0.png", "pair.nwb-e1.png"]
    assert figures["pair-e0.png"] != figures["pair.nwb-e0.png"]
    assert set(first.sweeps["cell_id"]) == {"pair-e0", "pair.nwb-e0", "pair.nwb-e1"}
    again = run_batch([folder], out=out, workers=1, progress=False)
    assert again.info["counts"]["cached"] == 2
    pd.testing.assert_frame_equal(again.cells, first.cells)
    # without pair-e0.nwb beside it, pair.nwb names its cells by its stem, as DESIGN says
    (folder / "pair-e0.nwb").unlink()
    alone = run_batch([folder], out=tmp_path / "alone", workers=1, progress=False)
    assert list(alone.cells["cell_id"]) == ["pair-e0", "pair-e1"]


def test_files_of_one_stem_in_one_folder_get_ids_that_name_their_type(day, tmp_path):
    from day_factory import write_csv_cell

    folder = tmp_path / "day"
    folder.mkdir()
    shutil.copyfile(day / "c00.nwb", folder / "c00.nwb")
    write_csv_cell(folder / "c00.csv")
    (folder / "rig2").mkdir()
    shutil.copyfile(day / "c01.nwb", folder / "rig2" / "c00.nwb")
    result = run_batch([folder], out=tmp_path / "out", workers=1, progress=False)
    assert list(result.cells["cell_id"]) == ["day-csv-c00", "day-nwb-c00", "rig2-c00"]
    assert len(list((tmp_path / "out" / "figures").glob("*.png"))) == 3


def test_cell_ids_that_still_repeat_fail_with_the_files_to_rename(tmp_path):
    # contrived: electrode names with a dash. a.nwb's "b-c" and a-b.nwb's "c" are both "a-b-c".
    folder = tmp_path / "day"
    folder.mkdir()
    _two_cells(folder / "a.nwb", ("b-c", "x"))
    _two_cells(folder / "a-b.nwb", ("c", "d"), seeds=(3, 4))
    out = tmp_path / "out"
    result = run_batch([folder], out=out, workers=1, progress=False)
    assert result.exit_status == 1
    cells = result.cells.set_index("source_file")
    ids = list(result.cells["cell_id"])
    assert sorted(ids) == ["a-b-c", "a-b-c", "a-b-d", "a-x"]
    repeated = result.cells[result.cells["cell_id"] == "a-b-c"]
    for source, status in zip(repeated["source_file"], repeated["status"], strict=True):
        other = str(folder / ("a.nwb" if source.endswith("a-b.nwb") else "a-b.nwb"))
        assert "cell id 'a-b-c' is also (ignoring case) that of a cell in " + other in status
        assert "rename one of the files" in status
    assert not repeated["qc_pass"].any()
    assert "a-b-c" not in set(result.sweeps["cell_id"])  # whose rows they are is unknown
    assert cells.loc[str(folder / "a.nwb")].shape[0] == 2
    page = (out / "index.html").read_text()
    assert 'figures/a-b-c.png"' not in page
    assert sum(e["stage"] == "ids" for e in result.info["errors"]) == 2
    assert result.info["counts"]["cells_pass"] == int(result.cells["qc_pass"].sum())


def test_the_cache_key_of_a_file_with_no_id_to_avoid_is_unchanged():
    import hashlib

    from pipeline import __version__

    text = f"h:c:{__version__}:p-:/d/x.nwb"
    assert (
        cache.entry_key("h", "c", "/d/x.nwb", "p-")
        == hashlib.sha256(text.encode()).hexdigest()[:32]
    )
    assert cache.entry_key("h", "c", "/d/x.nwb", "p-", ("x-e0",)) != cache.entry_key(
        "h", "c", "/d/x.nwb", "p-"
    )


def _kept_figure_state() -> tuple[bool, bool]:
    from pipeline.report import figures

    return bool(getattr(figures._KEPT, "value", None)), bool(
        getattr(figures._RENDERERS, "value", None)
    )


@pytest.mark.skipif(
    "fork" not in __import__("multiprocessing").get_all_start_methods(), reason="no fork here"
)
def test_a_forked_worker_keeps_none_of_the_parents_figures_or_renderers():
    # Their text layouts hold the parent's fonts, read by seek and read on shared descriptors:
    # two workers drawing at once through them read each other's bytes.
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor

    from pipeline.report import figures

    figures._KEPT.value = {"a kept figure": object()}  # as after drawing in this process
    figures._RENDERERS.value = {"a kept renderer": object()}
    try:
        assert _kept_figure_state() == (True, True)
        with ProcessPoolExecutor(1, mp_context=multiprocessing.get_context("fork")) as pool:
            assert pool.submit(_kept_figure_state).result() == (False, False)
        assert _kept_figure_state() == (True, True)  # the parent keeps its own
    finally:
        figures.clear_figure_cache()


def test_figures_are_all_drawn_by_a_pool_after_a_run_in_this_process(day, tmp_path):
    # The race above lost figures ("FT_Load_Glyph ... invalid outline") when a program ran an
    # in-process batch and then a pool. A race: without the fix this failed about 1 run in 7;
    # the deterministic guard is the test above.
    run_batch([day], out=tmp_path / "first", workers=1, progress=False)
    folder = tmp_path / "day"
    for sub in ("rig1", "rig2", "rig3"):
        (folder / sub).mkdir(parents=True)
        for name in ("c00", "c01", "c02"):
            shutil.copyfile(day / f"{name}.nwb", folder / sub / f"{name}.nwb")
    result = run_batch([folder], out=tmp_path / "pool", workers=2, progress=False)
    assert [w for w in result.info["warnings"] if "figure not drawn" in w] == []
    assert len(list((tmp_path / "pool" / "figures").glob("*.png"))) == 9


def test_sheet_rows_with_folders_join_the_file_in_those_folders(day, tmp_path):
    folder = tmp_path / "day"
    for sub, name in (("rig1", "c00"), ("rig2", "c01")):
        (folder / sub).mkdir(parents=True)
        shutil.copyfile(day / f"{name}.nwb", folder / sub / "cell01.nwb")
    (folder / "metadata.csv").write_text(
        "file,condition,animal\nrig1/cell01.nwb,standard,A1\nrig2/cell01.nwb,enriched,A2\n"
    )
    result = run_batch([folder], out=tmp_path / "out", workers=1, figures=False, progress=False)
    cells = result.cells.set_index("cell_id")
    assert list(cells.loc[["rig1-cell01", "rig2-cell01"], "condition"]) == ["standard", "enriched"]
    assert list(cells.loc[["rig1-cell01", "rig2-cell01"], "animal"]) == ["A1", "A2"]
    assert result.info["warnings"] == []
    # a bare name is both files' best match: a guess, so neither gets it, and the run says so
    (folder / "metadata.csv").write_text("file,condition\ncell01.nwb,standard\n")
    again = run_batch([folder], out=tmp_path / "again", workers=1, figures=False, progress=False)
    assert all(pd.isna(v) or v == "" for v in again.cells["condition"])
    shared = [w for w in again.info["warnings"] if "matches several files" in w]
    assert len(shared) == 1 and "joined to none" in shared[0]
    assert str(folder / "rig1" / "cell01.nwb") in shared[0]


def test_each_input_folder_is_joined_to_its_own_sheet(day, tmp_path):
    # two days, each with a cell01.nwb and its own metadata.csv: only the first folder's sheet
    # was read, so the second day's cell took the first day's row (or none) with no word
    days = {"day1": ("c00", "standard"), "day2": ("c01", "enriched")}
    for name, (source, condition) in days.items():
        (tmp_path / name).mkdir()
        shutil.copyfile(day / f"{source}.nwb", tmp_path / name / "cell01.nwb")
        (tmp_path / name / "metadata.csv").write_text(
            f"file,condition,{name}_slice\ncell01.nwb,{condition},{name[-1]}\n"
        )
    loose = tmp_path / "loose" / "c02.nwb"  # a file given by itself: under no sheet's folder
    loose.parent.mkdir()
    shutil.copyfile(day / "c02.nwb", loose)
    inputs = [tmp_path / "day1", tmp_path / "day2", loose]
    result = run_batch(inputs, out=tmp_path / "out", workers=1, figures=False, progress=False)
    cells = _cells(tmp_path / "out").set_index("cell_id")
    assert list(cells.loc[["day1-cell01", "day2-cell01"], "condition"]) == [
        "standard",
        "enriched",
    ]
    # a column only one sheet has is empty for the other sheet's cells
    assert cells.loc["day1-cell01", "day1_slice"] == 1 and pd.isna(
        cells.loc["day2-cell01", "day1_slice"]
    )
    assert pd.isna(cells.loc["c02", "condition"])
    assert result.info["sheets"] == [str(tmp_path / d / "metadata.csv") for d in days]
    said = [w for w in result.info["warnings"] if "c02" in w]
    assert len(said) == 1 and "no metadata sheet" in said[0], result.info["warnings"]
    assert len(result.info["warnings"]) == 1, result.info["warnings"]


@pytest.mark.parametrize(
    "paths, expected",
    [
        # a prefixed id that equals another file's stem goes one folder deeper
        (["/d/day/rig1/c.nwb", "/d/day/rig2/c.nwb", "/d/day/rig1-c.nwb"],
         ["day-rig1-", "rig2-", ""]),
        # ids that differ only in case share a figure file on macOS and Windows
        (["/d/day/CELL01.nwb", "/d/day/rig2/cell01.nwb"], ["day-", "rig2-"]),
        # folder names with dashes: equal folder tuples are not the test, equal ids are
        (["/d/X/2024-01/05/c.nwb", "/d/Y/2024/01-05/c.nwb", "/d/Z/05/c.nwb"],
         ["2024-01-05-", "01-05-", "Z-05-"]),
        (["/d/day/c.nwb", "/d/day/c.csv"], ["day-nwb-", "day-csv-"]),
        (["/d/day/a.nwb", "/d/day/b.nwb"], ["", ""]),
    ],
)  # fmt: skip
def test_id_prefixes_keep_every_id_apart_ignoring_case(paths, expected):
    from pathlib import Path

    from pipeline.batch import id_prefixes

    files = [Path(p) for p in paths]
    prefixes = id_prefixes(files)
    assert prefixes == expected
    ids = [(pre + f.stem).casefold() for pre, f in zip(prefixes, files, strict=True)]
    assert len(set(ids)) == len(ids)


def test_ids_to_avoid_ignore_case():
    from pathlib import Path

    from pipeline.batch import ids_to_avoid

    files = [Path("/d/Pair.nwb"), Path("/d/pair-e0.nwb"), Path("/d/pairs.nwb"), Path("/d/q.nwb")]
    assert ids_to_avoid(files, [""] * 4) == [("pair-e0",), (), (), ()]


def test_a_file_of_several_cells_avoids_an_id_that_differs_only_in_case(day, tmp_path):
    folder = tmp_path / "day"
    folder.mkdir()
    _two_cells(folder / "Pair.nwb", ("e0", "e1"))
    shutil.copyfile(day / "c00.nwb", folder / "pair-e0.nwb")
    result = run_batch([folder], out=tmp_path / "out", workers=1, progress=False)
    assert list(result.cells["cell_id"]) == ["Pair.nwb-e0", "Pair.nwb-e1", "pair-e0"]
    names = [p.name.casefold() for p in (tmp_path / "out" / "figures").glob("*.png")]
    assert len(set(names)) == 3


def test_a_file_of_one_cell_keeps_its_cache_entry_when_a_longer_stem_joins(day, tmp_path):
    folder = tmp_path / "day"
    folder.mkdir()
    shutil.copyfile(day / "c00.nwb", folder / "cell1.nwb")
    out = tmp_path / "out"
    run_batch([folder], out=out, workers=1, figures=False, progress=False)
    shutil.copyfile(day / "c01.nwb", folder / "cell1-retry.nwb")
    again = run_batch([folder], out=out, workers=1, figures=False, progress=False)
    assert (again.info["counts"]["cached"], again.info["counts"]["analysed"]) == (1, 1)
    assert list(again.cells["cell_id"]) == ["cell1-retry", "cell1"]


def _draw_state() -> tuple[bool, bool, str]:
    import gc

    import matplotlib

    from pipeline.report import figures

    return figures._DRAW_LOCK.locked(), gc.isenabled(), str(matplotlib.rcParams["text.hinting"])


@pytest.mark.skipif(
    "fork" not in __import__("multiprocessing").get_all_start_methods(), reason="no fork here"
)
def test_a_child_forked_while_another_thread_draws_can_draw(monkeypatch, tmp_path):
    # The drawing thread is not in the child: its lock, rcParams and paused collector must not be.
    import gc
    import multiprocessing
    import threading
    from concurrent.futures import ProcessPoolExecutor

    import matplotlib

    from pipeline.report import figures

    inside, leave = threading.Event(), threading.Event()

    def blocked(*args, **kwargs):
        inside.set()
        leave.wait(30)

    monkeypatch.setattr(figures, "_draw_kept", blocked)
    before = (False, gc.isenabled(), str(matplotlib.rcParams["text.hinting"]))
    drawer = threading.Thread(
        target=figures.cell_figure, args=(None, None, None, None, tmp_path / "x.png")
    )
    drawer.start()
    try:
        assert inside.wait(30)
        assert _draw_state() != before  # mid-draw: locked, collector paused, its rcParams
        with ProcessPoolExecutor(1, mp_context=multiprocessing.get_context("fork")) as pool:
            assert pool.submit(_draw_state).result(timeout=60) == before
    finally:
        leave.set()
        drawer.join(30)
        figures.clear_figure_cache()
    assert _draw_state() == before


def test_a_forced_run_leaves_only_its_own_figures(day, tmp_path):
    out = tmp_path / "out"
    run_batch([day], out=out, workers=1, progress=False)
    assert sorted(p.name for p in (out / "figures").glob("*.png")) == [
        "c00.png", "c01.png", "c02.png"
    ]  # fmt: skip
    (out / "figures" / "notes.txt").write_text("a file of the lab's own")
    run_batch([day / "c01.nwb"], out=out, workers=1, progress=False, force=True)
    assert sorted(p.name for p in (out / "figures").iterdir()) == ["c01.png", "notes.txt"]


def test_only_a_forced_run_prunes_figures_and_never_through_a_linked_folder(day, tmp_path):
    out = tmp_path / "out"
    (out / "figures").mkdir(parents=True)
    (out / "figures" / "poster_panel.png").write_bytes(b"not ours")
    run_batch([day / "c00.nwb"], out=out, workers=1, progress=False)
    assert (out / "figures" / "poster_panel.png").exists()  # not a --force run
    shared = tmp_path / "shared"
    shared.mkdir()
    (shared / "other_run.png").write_bytes(b"another run's")
    linked = tmp_path / "linked"
    linked.mkdir()
    (linked / "figures").symlink_to(shared)
    run_batch([day / "c01.nwb"], out=linked, workers=1, progress=False, force=True)
    assert (shared / "other_run.png").exists()


def test_the_figure_of_a_file_gone_from_the_day_is_removed_on_the_next_run(day, tmp_path):
    folder = tmp_path / "day"
    shutil.copytree(day, folder)
    out = tmp_path / "out"
    run_batch([folder], out=out, workers=1, progress=False)
    (out / "figures" / "poster_panel.png").write_bytes(b"not ours")
    (folder / "c01.nwb").unlink()  # a recording taken out of the day's folder
    run_batch([folder], out=out, workers=1, figures=False, progress=False)
    assert (out / "figures" / "c01.png").exists()  # a run without figures leaves them be
    run_batch([folder], out=out, workers=1, progress=False)
    names = sorted(p.name for p in (out / "figures").iterdir())
    assert names == ["c00.png", "c02.png", "poster_panel.png"]  # never a file not ours


def test_an_earlier_runs_tables_in_the_input_tree_are_not_read_as_recordings(day, tmp_path):
    # `patchbatch run . -o reports`, then `-o reports2`: reports/cells.csv, sweeps.csv and
    # spikes.csv were analysed as recordings (3 failed inputs, exit 1)
    folder = tmp_path / "day"
    shutil.copytree(day, folder)
    first = run_batch([folder], out=folder / "reports", workers=1, figures=False, progress=False)
    second = run_batch([folder], out=folder / "again", workers=1, figures=False, progress=False)
    assert first.exit_status == second.exit_status == 0
    assert list(second.cells["cell_id"]) == ["c00", "c01", "c02"]


def test_the_input_folder_can_be_the_output_folder(day, tmp_path):
    # every input was left out as lying in the output folder: "no recording files found"
    folder = tmp_path / "day"
    shutil.copytree(day, folder)
    for _ in range(2):  # the second run finds its own tables there and leaves them out
        result = run_batch([folder], out=folder, workers=1, figures=False, progress=False)
        assert result.exit_status == 0 and len(result.cells) == 3


def test_a_missing_input_alone_gives_its_error_and_no_rule_warnings(tmp_path):
    # with no cell analysed, every QC rule's column was reported missing from the tables
    result = run_batch([tmp_path / "nothere.nwb"], out=tmp_path / "out", progress=False)
    assert result.exit_status == 1
    assert "no such file" in result.errors[0]["message"]
    assert result.info["warnings"] == []


def test_a_sheet_column_named_like_a_result_is_not_joined(day, tmp_path):
    # a `source_file` column replaced the recording's path in cells.csv without a word
    sheet = tmp_path / "sheet.csv"
    sheet.write_text(
        "file,condition,source_file,rin_mohm\n"
        + "".join(f"c0{i}.nwb,ctrl,elsewhere.nwb,1\n" for i in range(3))
    )
    result = run_batch([day], out=tmp_path / "out", sheet=sheet, workers=1, figures=False,
                       progress=False)  # fmt: skip
    cells = result.cells
    assert cells["source_file"].str.endswith(tuple(f"c0{i}.nwb" for i in range(3))).all()
    assert (cells["rin_mohm"] > 10).all() and (cells["condition"] == "ctrl").all()
    said = " ".join(result.info["warnings"])
    assert "'source_file' is not joined" in said and "'rin_mohm' is not joined" in said
    assert list(cells.columns[:3]) == ["cell_id", "source_file", "condition"]


def test_qc_rules_on_sheet_columns_are_judged_after_the_join(day, tmp_path):
    # a cell rule on a sheet column (the README and the config allow it) failed every cell with
    # "names column 'age_days', not in the cell table": the analysis judges a cell before the
    # sheet is joined. It is now judged after the join; a column no sheet gives still fails.
    sheet = tmp_path / "sheet.csv"
    sheet.write_text("file,age_days\nc00.nwb,21\nc01.nwb,30\nc02.nwb,40\n")
    config = tmp_path / "qc.toml"
    config.write_text(
        '[[qc.rule]]\nname = "age"\ncolumn = "age_days"\nscope = "cell"\nmin = 25\n'
        'action = "fail"\nmessage = "too young: {value:g} days"\n'
        '[[qc.rule]]\nname = "old"\ncolumn = "age_days"\nscope = "cell"\nmax = 35\n'
        'action = "flag"\n'
    )
    out = tmp_path / "out"
    result = run_batch([day], config, out=out, sheet=sheet, workers=1, progress=False)
    by_id = _cells(out).set_index("cell_id")
    assert (
        not by_id.loc["c00", "qc_pass"] and by_id.loc["c00", "qc_reasons"] == "too young: 21 days"
    )
    assert by_id.loc["c01", "qc_pass"], by_id.loc["c01", "qc_reasons"]
    # the depolarized cell keeps its own reason; the flag joins it
    assert not by_id.loc["c02", "qc_pass"]
    assert "resting potential" in by_id.loc["c02", "qc_reasons"]
    assert "age_days = 40" in by_id.loc["c02", "qc_flags"]
    assert result.cells.set_index("cell_id").loc["c01", "qc_pass"]
    assert (out / "figures" / "c01.png").is_file()
    # without the sheet the column is missing: the rule fails the cells, naming it
    bare = run_batch([day], config, out=tmp_path / "bare", workers=1, figures=False,
                     progress=False)  # fmt: skip
    assert bare.cells["qc_reasons"].str.contains("names column 'age_days'").all()


def test_sample_into_a_file_is_a_usage_error(tmp_path, capsys):
    target = tmp_path / "afile"
    target.write_text("")
    assert cli.main(["sample", str(target)]) == 2
    assert "cannot make the sample folder" in capsys.readouterr().err


def test_an_unreachable_scheduler_is_said_in_the_log_file_too(day, tmp_path, monkeypatch):
    # the run had already written its owner record and opened its log: the log said nothing
    distributed = pytest.importorskip("distributed")

    def refuse(address, *args, **kwargs):
        raise OSError("connection refused")

    monkeypatch.setattr(distributed, "Client", refuse)
    out = tmp_path / "out"
    code = cli.main(["run", str(day), "-o", str(out), "-q", "--scheduler", "tcp://127.0.0.1:9"])
    assert code == 2
    assert "cannot reach the Dask scheduler" in (out / "patchbatch.log").read_text()


def test_the_heap_is_unfrozen_after_a_run_unless_the_caller_froze_it(day, tmp_path):
    # A run freezes its imported modules out of the garbage collector (gc.freeze; each full
    # collection walked scipy, pandas and matplotlib's objects); the Python API's caller gets
    # its collector back as it was: unfrozen, or frozen as it had left it.
    import gc

    assert gc.get_freeze_count() == 0
    run_batch([day], out=tmp_path / "one", workers=1, figures=False, progress=False)
    assert gc.get_freeze_count() == 0
    try:
        gc.freeze()
        mine = gc.get_freeze_count()
        run_batch([day], out=tmp_path / "two", workers=1, figures=False, progress=False)
        assert 0 < gc.get_freeze_count() <= mine  # nothing more frozen (some may have died)
    finally:
        gc.unfreeze()
