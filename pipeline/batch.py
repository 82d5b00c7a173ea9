"""The day's batch: find inputs, analyse each file in parallel, join the sheet, write the report.

Executors: a local process pool (``workers`` processes), or a Dask distributed cluster
(``scheduler="tcp://HOST:PORT"`` for an existing one, ``"local"`` to start a ``LocalCluster``).
Every executor runs the same :func:`pipeline.analysis.analyse_file`, and results are assembled in
input order, so the tables are identical whatever the executor and worker count.
"""

from __future__ import annotations

import bisect
import contextlib
import contextvars
import functools
import gc
import json
import logging
import os
import re
import sys
import time
from collections.abc import Callable, Iterable, Iterator, Sequence
from concurrent.futures import ThreadPoolExecutor, as_completed
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from pipeline import __version__, cache
from pipeline.analysis import analyse_file
from pipeline.config import Config, load_config
from pipeline.errors import PatchbatchError
from pipeline.sheet import Sheet, read_sheet

log = logging.getLogger("patchbatch")

SHEET_NAME = "metadata.csv"
OUTPUT_NAMES = ("cells.csv", "cells.parquet", "sweeps.csv", "spikes.csv", "index.html", "run.json")


class OutputFolderError(PatchbatchError):
    """The output folder cannot be used as asked (exit status 2)."""


class InputError(PatchbatchError):
    """The inputs name nothing to analyse (exit status 2)."""


class SchedulerError(PatchbatchError):
    """The Dask scheduler named by ``--scheduler`` is not an address or cannot be reached."""


_ADDRESS = re.compile(r"^(tcp|tls|ucx|inproc)://[^\s/:]+(:\d+)?$")


def check_scheduler(scheduler: str | None) -> None:
    """Reject a ``--scheduler`` value that is neither ``local`` nor ``PROTOCOL://HOST:PORT``."""
    if scheduler is None or scheduler == "local" or _ADDRESS.match(scheduler):
        return
    raise SchedulerError(
        f"--scheduler {scheduler!r} is not a scheduler address: give tcp://HOST:PORT of a "
        "running Dask scheduler, or 'local' to start one on this machine"
    )


@dataclass
class BatchResult:
    """What a run produced: the tables (:class:`pipeline.report.tables.Table`) and the run's
    record; ``cells``, ``sweeps`` and ``spikes`` give the tables as DataFrames, made (and pandas
    imported) on first use."""

    tables: dict[str, Any]
    info: dict[str, Any]
    errors: list[dict[str, Any]] = field(default_factory=list)
    _frames: dict[str, Any] = field(default_factory=dict, repr=False, compare=False)

    def _frame(self, name: str) -> Any:
        if name not in self._frames:
            self._frames[name] = self.tables[name].to_frame()
        return self._frames[name]

    @property
    def cells(self) -> Any:
        """The cells table (pandas.DataFrame)."""
        return self._frame("cells")

    @property
    def sweeps(self) -> Any:
        """The sweeps table (pandas.DataFrame)."""
        return self._frame("sweeps")

    @property
    def spikes(self) -> Any:
        """The spikes table (pandas.DataFrame)."""
        return self._frame("spikes")

    @property
    def exit_status(self) -> int:
        """0 when every input was analysed (cells failing QC included), else 1."""
        return 1 if self.errors else 0


def discover_inputs(
    inputs: Sequence[str | Path],
    exclude: Path | None = None,
    sheet: str | Path | None = None,
    left_out: list[str] | None = None,
) -> list[Path]:
    """Files to analyse: the files given, and supported files found recursively in folders.

    The metadata sheets (``metadata.csv`` in any letter case, and ``sheet``, the one given with
    ``--sheet``, even when named as an input) and the tables this program writes (in
    ``exclude``, the output folder, or in an earlier run's output folder) are left out. So are
    text files found in a folder that are plainly not recording tables (notes, other tables:
    see :func:`pipeline.readers.text.not_a_recording`); each is said in ``left_out`` when
    given. A file named as an input is always read. A path that does not exist is returned as
    is, so that it becomes an error row.

    Raises
    ------
    InputError
        Nothing at all to analyse (e.g. a folder that holds no recording).
    """
    from pipeline.readers import supported_extensions

    exts = {e.lower() for e in supported_extensions()}
    given = Path(sheet).resolve() if sheet is not None else None  # a sheet is never a recording
    named = {Path(p).resolve() for p in inputs if not Path(p).is_dir()}  # always read
    said: list[str] = []
    found: list[Path] = []
    for item in map(Path, inputs):
        if item.is_dir():
            for path in sorted(item.rglob("*")):
                if not (path.is_file() and path.suffix.lower() in exts and _wanted(path, exclude)):
                    continue
                real = path.resolve()
                if real != given and (real in named or _is_recording(real, said)):
                    found.append(path)
        else:
            found.append(item)
    unique = [p for p in dict.fromkeys(p.resolve() for p in found) if p != given]
    said = list(dict.fromkeys(said))  # a folder given twice
    if left_out is not None:
        left_out.extend(said)
    if not unique:
        why = f"; {'; '.join(said)}" if said else ""
        raise InputError(
            f"{', '.join(map(str, inputs)) or 'no input given'}: no recording files found "
            f"(looked for {', '.join(sorted(exts))}){why}"
        )
    for item in map(Path, inputs):
        if item.is_dir() and not any(p.is_relative_to(item.resolve()) for p in unique):
            log.warning("%s: no recording files found in this folder", item)
    return unique


def _is_recording(path: Path, left_out: list[str]) -> bool:
    """False for a text file that is plainly not a recording table (said in ``left_out``)."""
    from pipeline.readers import TEXT_EXTENSIONS

    if path.suffix.lower() not in TEXT_EXTENSIONS:
        return True
    from pipeline.readers.text import not_a_recording

    why = not_a_recording(path)
    if why is not None:
        left_out.append(f"{path}: left out, not a recording table ({why})")
    return why is None


def _wanted(path: Path, exclude: Path | None) -> bool:
    """Not the sheet, not hidden, and not a table this program wrote: one in the output folder
    (which may be the input folder itself) or in an earlier run's output folder (one holding
    a cache) that lies in the input tree."""
    if path.name.lower() == SHEET_NAME or any(part.startswith(".") for part in path.parts[-2:]):
        return False
    if path.name not in OUTPUT_NAMES:
        return True
    folder = path.parent
    here = exclude is not None and folder.resolve() == exclude.resolve()
    return not (here or (folder / cache.CACHE_DIR).is_dir())


def find_sheets(inputs: Sequence[str | Path]) -> list[Path]:
    """The ``metadata.csv`` of every input folder that has one, in input order.

    The name is matched in any letter case (``Metadata.csv``, as some systems save it); a
    folder holding several such names uses ``metadata.csv`` itself, else the first in sorted
    order, and says so.
    """
    found: dict[Path, Path] = {}
    for item in map(Path, inputs):
        if not item.is_dir():
            continue
        names = sorted(p for p in item.iterdir() if p.name.lower() == SHEET_NAME and p.is_file())
        if not names:
            continue
        chosen = next((p for p in names if p.name == SHEET_NAME), names[0])
        if len(names) > 1:
            log.warning(
                "%s: several metadata sheets (%s); using %s",
                item,
                ", ".join(p.name for p in names),
                chosen.name,
            )
        found.setdefault(chosen.resolve(), chosen)
    return list(found.values())


def _read_sheets(sheet: str | Path | None, inputs: Sequence[str | Path]) -> list[_Scoped]:
    """The sheets to join: ``--sheet`` for every file; else the input folders' own. One found
    sheet describes every file (it may name files of other inputs by their folders); with
    several, each describes the files under its folder, so that two days' folders, each with
    its own ``cell01.nwb`` row, are joined to their own sheets."""
    if sheet is not None:
        return [_Scoped(read_sheet(sheet), None)]
    found = find_sheets(inputs)
    if len(found) == 1:
        return [_Scoped(read_sheet(found[0]), None)]
    return [_Scoped(read_sheet(path), path.parent.resolve()) for path in found]


@dataclass(frozen=True)
class _Scoped:
    """A metadata sheet and the folder whose files it describes (None: every file)."""

    sheet: Sheet
    folder: Path | None


def run_batch(
    inputs: Sequence[str | Path],
    config: Config | str | Path | None = None,
    out: str | Path = "reports",
    *,
    sheet: str | Path | None = None,
    workers: int | None = None,
    scheduler: str | None = None,
    figures: bool | None = None,
    force: bool = False,
    progress: bool | None = None,
) -> BatchResult:
    """Analyse a day's recordings and write the tables, figures, page and run record.

    Parameters
    ----------
    inputs : sequence of path
        Files and folders (searched recursively for supported extensions).
    config : Config or path, optional
        A loaded config, a TOML file, or None for the defaults.
    out : path
        Output folder (created).
    sheet : path, optional
        Metadata sheet for every file; by default each input folder's ``metadata.csv``, for
        the files under that folder (one found sheet is used for every file).
    workers : int, optional
        Local processes; default from the config (0 = all cores).
    scheduler : str, optional
        ``"tcp://HOST:PORT"`` (an existing Dask cluster) or ``"local"`` (a LocalCluster).
    figures : bool, optional
        Write per-cell figures; default from the config.
    force : bool
        Allow writing into a folder that holds another run's outputs.
    progress : bool, optional
        Show a progress bar; default: when stderr is a terminal.

    Returns
    -------
    BatchResult
    """
    started = datetime.now(UTC)
    check_scheduler(scheduler)
    config = config if isinstance(config, Config) else load_config(config)
    outdir = Path(out)
    figures = config.report.figures if figures is None else figures
    inputs_given = [str(Path(p).resolve()) for p in inputs]
    # Usage errors (sheet, output folder) stop the run before anything is written.
    sheets = _read_sheets(sheet, inputs)
    left_out: list[str] = []
    files = discover_inputs(inputs, exclude=outdir, sheet=sheet, left_out=left_out)
    _prepare_outdir(outdir, inputs_given, config, force)
    handler = _log_to_file(outdir)
    freezing = _FREEZE.set(gc.get_freeze_count() == 0)  # a caller's own freeze is left alone
    try:
        log.info("patchbatch %s: %d input file(s) -> %s", __version__, len(files), outdir)
        try:
            results, hashes, stats = _analyse_all(
                files, config, outdir, figures, workers, scheduler, progress
            )
            run = {"inputs_given": inputs_given, "started": started, "hashes": hashes, **stats}
            run |= {"force": force, "executor": _executor(config, workers, scheduler)}
            run |= {"left_out": left_out}
            return _assemble(files, results, run, config, outdir, sheets, figures)
        except PatchbatchError as exc:  # e.g. an unreachable scheduler: in the log file too
            _log_stop(handler, str(exc))
            raise
        except OSError as exc:  # a full disk, a folder gone: say where, keep what is cached
            where = exc.filename or outdir
            stop = OutputFolderError(
                f"{where}: could not write ({exc.strerror or exc}); what was analysed is kept "
                "in the cache, so the same command resumes"
            )
            _log_stop(handler, str(stop))
            raise stop from None
    finally:
        logging.getLogger("patchbatch").removeHandler(handler)
        handler.close()
        if _FREEZE.get():
            gc.unfreeze()
        _FREEZE.reset(freezing)


def _prepare_outdir(outdir: Path, inputs: list[str], config: Config, force: bool) -> None:
    if outdir.exists() and not outdir.is_dir():
        raise OutputFolderError(f"{outdir}: exists and is not a folder")
    try:
        outdir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputFolderError(f"{outdir}: cannot create the output folder ({exc})") from None
    if not os.access(outdir, os.W_OK):
        raise OutputFolderError(f"{outdir}: the output folder is not writable")
    identity = {"inputs_given": inputs, "config_digest": config.digest()}
    # The owner record is written before any output, so a run that died while writing is
    # still recognised as ours; run.json is written last, when the run is complete.
    owner = outdir / cache.CACHE_DIR / "owner.json"
    previous = next((p for p in (owner, outdir / "run.json") if p.exists()), None)
    if not force:
        if previous is None and any((outdir / n).exists() for n in OUTPUT_NAMES):
            raise OutputFolderError(
                f"{outdir}: holds outputs of an unknown run (no run.json); use --force to "
                "overwrite them"
            )
        if previous is not None and _identity(previous) != identity:
            raise OutputFolderError(
                f"{outdir}: holds the outputs of a run with other inputs or another config; "
                "choose another folder or use --force to replace them"
            )
    from pipeline.report.atomic import atomic_write_text

    owner.parent.mkdir(exist_ok=True)
    atomic_write_text(owner, json.dumps(identity))


def _identity(path: Path) -> dict[str, Any]:
    try:
        info = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    return {k: info.get(k) for k in ("inputs_given", "config_digest")}


def _analyse_all(files, config, outdir, figures, workers, scheduler, progress):
    """Analyse every file not in the cache; returns results in input order and counts.

    A folder with cache entries waits for each input's hash to look it up. A fresh folder has
    nothing to look up: each file's analysis waits only for its own hash, so the analysis (or a
    pool's preload) runs beside the hashing of the rest.
    """
    digest = config.digest()
    figure_dir = str(outdir / "figures") if figures else None
    prefixes = id_prefixes(files)
    avoid = ids_to_avoid(files, prefixes)
    hashes = _Hashes(files)

    def key(i: int, several: bool) -> str | None:
        # A file of one cell keeps its stem whatever the other inputs: its key leaves out the
        # ids its cells must avoid, so a new "<stem>-..." file beside it costs no re-analysis.
        file_hash = hashes.get(i)
        if not file_hash:
            return None
        ids = avoid[i] if several else ()
        return cache.entry_key(file_hash, digest, str(files[i]), prefixes[i], ids)

    def cached(i: int) -> dict[str, Any] | None:
        hit = cache.load_entry(outdir, k) if (k := key(i, several=False)) else None
        if avoid[i] and (hit is None or len(hit["cells"]) > 1):  # a file of several cells
            hit = cache.load_entry(outdir, k) if (k := key(i, several=True)) else None
        return hit

    try:
        results: dict[int, dict[str, Any]] = {}
        todo: list[Job] = []
        look_up = cache.has_entries(outdir)
        for i, path in enumerate(files):
            hit = cached(i) if look_up else None
            if hit is not None and _figures_present(hit, figure_dir):
                results[i] = hit
            else:
                todo.append(Job(i, str(path), prefixes[i], avoid[i]))
        stats = {"cached": len(results), "analysed": len(todo)}
        log.info("%d file(s) from the cache, %d to analyse", len(results), len(todo))
        bar = _progress(len(todo), progress)
        finished = _execute(todo, config, figure_dir, workers, scheduler, hashes)
        for i, result in finished:
            # Fresh results take the same JSON form as cached ones: identical tables.
            results[i] = cache.normalise(result)
            if result["error"] is None and (k := key(i, len(result["cells"]) > 1)):
                cache.store_entry(outdir, k, results[i])
            _report_one(result, bar)
        if bar is not None:
            bar.close()
        return [results[i] for i in range(len(files))], hashes.finish(), stats
    finally:
        hashes.stop()  # an interrupted run does not hash the remaining inputs first


class _Hashes:
    """The inputs' sha256 (None for a file that cannot be read), computed in a thread in input
    order: hashlib lets go of the GIL while it digests, so this overlaps the analysis or a
    pool's imports (~0.1 s of the 0.12-0.16 s it takes for the bench day's 150 MB)."""

    def __init__(self, files: Sequence[Path]) -> None:
        self._pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="patchbatch-sha256")
        self._done = [self._pool.submit(_sha_or_none, path) for path in files]

    def get(self, i: int) -> str | None:
        return self._done[i].result()

    def finish(self) -> list[str | None]:
        """All hashes, with the thread ended (as it must be before a fork)."""
        self._pool.shutdown(wait=True)
        return [done.result() for done in self._done]

    def stop(self) -> None:
        self._pool.shutdown(wait=True, cancel_futures=True)


@dataclass(frozen=True)
class Job:
    """One file to analyse: its place in the input order, cell-id prefix and the other
    inputs' ids its cells must not take."""

    index: int
    path: str
    id_prefix: str = ""
    avoid: tuple[str, ...] = ()

    def run(self, config: Config, figure_dir: str | None) -> dict[str, Any]:
        return analyse_file(
            self.path, config, figure_dir, id_prefix=self.id_prefix, avoid=self.avoid
        )


def id_prefixes(files: Sequence[Path]) -> list[str]:
    """Cell-id prefixes that keep the files' ids apart when stems repeat.

    A stem that no other file's id equals keeps its plain id (the file stem, as DESIGN says).
    Files whose ids are equal (ignoring case: a figure per id must stay apart on macOS and
    Windows) get the names of their parent folders, one more per round while they clash
    (``rig1-cell01``), and the file's type too where files of that stem share a folder
    (``day-csv-cell01``). In a clash between a prefixed id and a plain one (``rig1/c.nwb`` is
    ``rig1-c``, as is ``rig1-c.nwb``), the prefixed one goes deeper. Ids still equal after
    every folder are left to :func:`_repeated_ids`.
    """
    files = list(files)
    typed = _shares_its_folder(files)
    depth = [0] * len(files)
    for _ in range(1 + max((len(p.parts) for p in files), default=0)):
        ids = [_prefix(p, d, t) + p.stem for p, d, t in zip(files, depth, typed, strict=True)]
        groups: dict[str, list[int]] = {}
        for i, cell_id in enumerate(ids):
            groups.setdefault(cell_id.casefold(), []).append(i)
        deeper = False
        for group in (g for g in groups.values() if len(g) > 1):
            can = [i for i in group if depth[i] < len(files[i].parts) - 1]
            prefixed = [i for i in can if depth[i]]
            for i in prefixed or can:
                depth[i] += 1
                deeper = True
        if not deeper:
            break
    return [_prefix(p, d, t) for p, d, t in zip(files, depth, typed, strict=True)]


def _shares_its_folder(files: Sequence[Path]) -> list[bool]:
    """Whether another file of the same stem (ignoring case) lies in the same folder."""
    seen: dict[tuple[Path, str], int] = {}
    for path in files:
        key = (path.parent, path.stem.casefold())
        seen[key] = seen.get(key, 0) + 1
    return [seen[(p.parent, p.stem.casefold())] > 1 for p in files]


def _prefix(path: Path, depth: int, typed: bool) -> str:
    """The last ``depth`` folders of ``path``, and its type where ``typed``, as an id prefix."""
    if not depth:
        return ""
    parts = path.parts[-1 - depth : -1]
    return "-".join((*parts, path.suffix.lstrip(".")) if typed else parts) + "-"


def ids_to_avoid(files: Sequence[Path], prefixes: Sequence[str]) -> list[tuple[str, ...]]:
    """For each file, the other inputs' cell ids that its own ``<stem>-<electrode>`` ids could
    equal, ignoring case (``pair-e0`` of ``pair-e0.nwb``, for ``pair.nwb``); empty for almost
    every file. Found by bisection in the sorted ids, not by comparing every pair."""
    bases = [prefix + path.stem for path, prefix in zip(files, prefixes, strict=True)]
    ordered = sorted((b.casefold(), b) for b in bases)
    keys = [k for k, _ in ordered]
    out = []
    for base in bases:
        start = base.casefold() + "-"
        j = bisect.bisect_left(keys, start)
        found = []
        while j < len(keys) and keys[j].startswith(start):
            found.append(ordered[j][1])
            j += 1
        out.append(tuple(sorted(set(found))))
    return out


def _figures_present(result: dict[str, Any], figure_dir: str | None) -> bool:
    """Whether every cell's figure is there as this result drew it (the same bytes)."""
    if figure_dir is None:
        return True
    return all(
        c.get("figure") and _same_file(Path(figure_dir) / c["figure"], c.get("figure_sha256"))
        for c in result["cells"]
    )


def _same_file(path: Path, sha256: str | None) -> bool:
    # a regular file only: hashing a FIFO or a device would wait or read for ever
    return path.is_file() and _sha_or_none(path) == sha256


def _execute(todo, config, figure_dir, workers, scheduler, hashes) -> Iterator[tuple[int, dict]]:
    """Yield (input index, result) as files finish, on the chosen executor.

    A file's hash is complete before its analysis starts, so a file rewritten meanwhile has the
    results of its new bytes stored under its old hash (a key never asked for again), never the
    other way round; a fork pool waits for all of them, as it must not fork beside a thread.
    """
    if not todo:
        return
    _settle_heap()  # the interpreter's, numpy's and our own modules
    if scheduler:
        yield from _execute_dask(todo, config, figure_dir, scheduler, workers, hashes)
        return
    n = _worker_count(config, workers)
    n = max(1, min(n, len(todo)))
    if n == 1:
        for k, job in enumerate(todo):
            hashes.get(job.index)
            result = job.run(config, figure_dir)
            if k == 0:
                _settle_heap()  # the first file imported the fitters' and figures' modules
            yield job.index, result
        return
    yield from _execute_pool(todo, config, figure_dir, n, hashes)


# What every pool worker imports on its first file: scipy.optimize for the fits, matplotlib
# for the figures (DEVELOPERS.md, "Where the time goes", gives their cost).
_WORKER_MODULES = ("scipy.optimize",)
_FIGURE_MODULES = ("pipeline.report.figures",)


def _preload(context, figures: bool) -> None:
    """Have the workers' heavy modules imported once, not once per worker.

    With fork (Linux before Python 3.14) they are imported here and the workers inherit them;
    the main process needs matplotlib for the page's summary plot anyway. With forkserver
    (Linux from Python 3.14) the server imports them when it starts and every worker forked
    from it inherits them. Spawned workers (macOS, Windows) start afresh: nothing to do.
    A forkserver preload list set by a program calling :func:`run_batch` is replaced.
    """
    import importlib

    names = _WORKER_MODULES + (_FIGURE_MODULES if figures else ())
    method = context.get_start_method()
    if method == "forkserver":
        # "__main__" is the standard library's default preload; a server already running
        # (an earlier run in this process) keeps what it has
        context.set_forkserver_preload(["__main__", *names])
    elif method == "fork":
        for name in names:
            importlib.import_module(name)


def _execute_pool(todo, config, figure_dir, n, hashes) -> Iterator[tuple[int, dict]]:
    """The process pool. A worker that dies (a crash in a C library, an OOM kill) breaks the
    whole pool; the files that were then unfinished are re-run one per fresh process, so only
    the file that kills its worker is lost. Files not yet submitted when the pool broke (it
    waits for each one's hash on spawn and forkserver) go to a new pool: none of them did it."""
    import multiprocessing  # here, with the pool: a one-worker run never loads them (~20 ms)
    from concurrent.futures import ProcessPoolExecutor
    from concurrent.futures.process import BrokenProcessPool

    context = multiprocessing.get_context()  # the pools' start method, and the preload's
    _preload(context, figure_dir is not None)
    _settle_heap()
    if context.get_start_method() == "fork":
        hashes.finish()  # the solo pools below fork later still: no thread of ours runs then
    unfinished, unsubmitted = [], []
    with ProcessPoolExecutor(max_workers=n, mp_context=context) as pool:
        futures = {}
        for k, job in enumerate(todo):
            try:
                futures[_submit(pool.submit, job, hashes, config, figure_dir)] = job
            except BrokenProcessPool:  # a worker died while the later files were hashed
                unsubmitted = todo[k:]  # a fresh pool never breaks at its first submit
                break
        _import_report_modules(figure_dir is not None)
        _settle_heap()
        for future in as_completed(futures):
            job = futures[future]
            try:
                yield job.index, future.result()
            except BrokenProcessPool:
                unfinished.append(job)
            except Exception as exc:
                yield job.index, _worker_failed(job, exc)
    if unsubmitted:
        yield from _execute_pool(unsubmitted, config, figure_dir, n, hashes)
    if unfinished:
        log.warning("a worker died; re-running %d unfinished file(s) one by one", len(unfinished))
    for job in sorted(unfinished, key=lambda j: j.index):
        with ProcessPoolExecutor(max_workers=1, mp_context=context) as solo:
            try:
                yield job.index, _submit(solo.submit, job, hashes, config, figure_dir).result()
            except Exception as exc:
                yield job.index, _worker_failed(job, exc)


def _submit(submit, job: Job, hashes, *args: Any) -> Any:
    hashes.get(job.index)  # hashed before it is analysed (see _execute)
    return submit(job.run, *args)


_FREEZE: contextvars.ContextVar[bool] = contextvars.ContextVar("patchbatch_freeze", default=False)


def _settle_heap() -> None:
    """Leave the objects alive now (mostly the modules just imported) out of later garbage
    collections (``gc.freeze``). With scipy, pandas and matplotlib loaded, each full collection
    walked them all: ~0.16 s of a pool run's main process, mostly in its serial parts. Before a
    fork it also spares the workers' copies of those pages (the gc module's documentation).
    :func:`run_batch` unfreezes them when it ends; a caller that froze objects of its own
    keeps its collector as it was (nothing is frozen then)."""
    if _FREEZE.get():
        gc.freeze()


def _import_report_modules(figures: bool) -> None:
    """Import what the tables and the page need (pyarrow's Parquet writer, jinja2 and,
    for the summary plot, matplotlib) while the workers analyse: the main process would only
    wait then, and after the last file it is the one process working (DEVELOPERS.md, "Where
    the time goes"). A fork pool's main process has the figure module already.

    Any failure is left for the report stage to meet again, after every result is cached.
    """
    import importlib

    names = ["pyarrow.parquet", "pipeline.report.tables", "pipeline.report.page"]
    names += list(_FIGURE_MODULES) if figures else []
    with contextlib.suppress(Exception):
        for name in names:
            importlib.import_module(name)


def _execute_dask(
    todo, config, figure_dir, scheduler, workers, hashes
) -> Iterator[tuple[int, dict]]:
    from distributed import Client, LocalCluster
    from distributed import as_completed as dask_completed

    cluster = None
    if scheduler == "local":
        n = _worker_count(config, workers)
        cluster = LocalCluster(
            n_workers=n,
            threads_per_worker=1,
            processes=True,
            host="127.0.0.1",
            dashboard_address=None,
        )
        address = cluster
    else:
        address = scheduler
    try:
        try:
            client = Client(address)
        except (OSError, TimeoutError) as exc:  # not an OSError of the output folder
            raise SchedulerError(f"{scheduler}: cannot reach the Dask scheduler ({exc})") from None
        with client:
            submit = functools.partial(client.submit, pure=False)
            futures = {_submit(submit, job, hashes, config, figure_dir): job for job in todo}
            _import_report_modules(figure_dir is not None)
            for future in dask_completed(list(futures)):
                job = futures[future]
                try:
                    yield job.index, future.result()
                except Exception as exc:  # e.g. KilledWorker after Dask's own retries
                    yield job.index, _worker_failed(job, exc)
    finally:
        if cluster is not None:
            cluster.close()


def _worker_failed(job: Job, exc: BaseException) -> dict[str, Any]:
    """The row of a file whose worker died or raised outside the analysis' own guard."""
    message = f"{job.path}: worker failed: {type(exc).__name__}: {exc}"
    return {
        "file": job.path,
        "cell_id": job.id_prefix + Path(job.path).stem,
        "cells": [],
        "error": {"stage": "worker", "message": message},
        "seconds": {},
    }


def _progress(total: int, progress: bool | None):
    show = sys.stderr.isatty() if progress is None else progress
    if not show or total == 0:
        return None
    from tqdm import tqdm

    class Bar(tqdm):
        # no monitor thread (it tunes bars updated many times a second): a fork pool forks
        # after the bar exists, and forking while another thread runs can deadlock a child
        monitor_interval = 0

    return Bar(total=total, unit="file", desc="patchbatch", file=sys.stderr)


def _report_one(result: dict[str, Any], bar) -> None:
    name = Path(result["file"]).name
    if result["error"]:
        log.error("%s", result["error"]["message"])
    else:
        for c in result["cells"]:
            row = c["cell"]
            state = "pass" if row.get("qc_pass") else f"fail ({row.get('qc_reasons')})"
            log.info("%s: cell %s %s", name, row.get("cell_id"), state)
    if bar is not None:
        bar.update(1)


def _assemble(files, results, run, config, outdir, sheets, figures):
    from pipeline.report import page, tables

    _settle_heap()  # jinja2 and the report modules, imported just now

    cell_rows, sweep_rows, spike_rows, errors, fig_map = [], [], [], [], {}
    figure_problems: list[str] = []
    seconds: dict[str, float] = {}
    repeated = _repeated_ids(results)
    for result in results:
        for stage, s in (result.get("seconds") or {}).items():
            seconds[stage] = seconds.get(stage, 0.0) + s
        if result["error"]:
            errors.append({"file": result["file"], **result["error"]})
            cell_rows.append(_error_row(result))
            continue
        for cell in result["cells"]:
            if str(cell["cell"]["cell_id"]).casefold() in repeated:
                row = _repeated_row(cell["cell"], repeated)
                errors.append({"file": result["file"], "stage": "ids", "message": row["status"]})
                cell_rows.append(row)
                continue
            cell_rows.append(dict(cell["cell"]))
            sweep_rows.extend(cell["sweeps"])
            spike_rows.extend(cell["spikes"])
            if cell.get("figure"):
                fig_map[cell["cell"]["cell_id"]] = f"figures/{cell['figure']}"
            if cell.get("figure_error"):
                figure_problems.append(cell["figure_error"])
            if cell.get("traceback"):
                errors.append(
                    {
                        "file": cell["cell"]["source_file"],
                        "stage": "analysis",
                        "message": cell["cell"]["status"],
                        "traceback": cell["traceback"],
                    }
                )
    sheet_columns, warnings = _join_sheets(cell_rows, sheets)
    _judge_joined(config, cell_rows)
    warnings = run.get("left_out", []) + warnings + figure_problems
    t0 = time.perf_counter()
    cells = tables.cells_table(cell_rows, sheet_columns)
    sweeps = tables.sweeps_table(sweep_rows)
    spikes = tables.spikes_table(spike_rows)
    if sweep_rows:  # a cell was measured: else no table has the rules' columns
        warnings += _rule_column_problems(config, cells, sweeps)
    tables.write_tables(outdir, cells, sweeps, spikes)
    seconds["tables"] = time.perf_counter() - t0
    n_pass = sum(cells.data["qc_pass"])
    info = _run_info(files, results, run, config, errors, warnings, sheets, seconds, n_pass)
    t0 = time.perf_counter()
    page.write_page(
        outdir,
        cells,
        run_info=info,
        figures=fig_map,
        group_column=config.report.group_column,
        plots=figures,
        plot_cache=outdir / cache.CACHE_DIR,
    )
    seconds["page"] = time.perf_counter() - t0
    if run.get("force"):  # only what --force replaces: never files of unknown origin
        _prune_figures(outdir / "figures", fig_map.values())
    elif figures:  # figures drawn here for cells this run no longer has (inputs gone)
        _prune_figures(outdir / "figures", fig_map.values(), ours=lambda: cache.figures(outdir))
    info["finished"] = datetime.now(UTC).isoformat()
    tables.write_run_json(outdir, info)
    for w in warnings:
        log.warning("%s", w)
    log.info("%s; wrote %s", summary_line(info["counts"]), outdir)
    return BatchResult({"cells": cells, "sweeps": sweeps, "spikes": spikes}, info, errors)


def summary_line(counts: dict[str, int]) -> str:
    """The run's counts in words (the log's last line and the command's summary): the files,
    the cells analysed in those that could be read, how many pass QC, the files that could not
    be analysed."""
    return (
        f"{counts['files']} file(s): {counts['cells']} cell(s) analysed, "
        f"{counts['cells_pass']} pass QC; {counts['files_failed']} file(s) could not be analysed"
    )


def _prune_figures(
    folder: Path, linked: Iterable[str], ours: Callable[[], set[str]] | None = None
) -> None:
    """Remove the PNGs in the figure folder that this run's page does not link: with
    ``--force`` every one (those of the run it replaces), else only those ``ours`` names (the
    figures the folder's cache entries drew, asked for only when there is one to remove).
    Only plain ``.png`` files there, not through a linked folder; a file that cannot be
    removed stays."""
    keep = {Path(name).name for name in linked}
    if folder.is_symlink():  # perhaps shared with another run's figures
        return
    try:
        entries = list(os.scandir(folder))
    except OSError:  # no figure folder
        return
    stale = [e for e in entries if e.name.endswith(".png") and e.name not in keep]
    if stale and ours is not None:
        known = ours()
        stale = [e for e in stale if e.name in known]
    for entry in stale:
        if entry.is_file(follow_symlinks=False):
            with contextlib.suppress(OSError):
                os.unlink(entry.path)


def _rule_column_problems(config: Config, cells, sweeps) -> list[str]:
    """QC rules whose column is in neither table: most likely a typo in the lab's config."""
    import difflib

    out = []
    for rule in config.qc.rules:
        table = cells if rule.scope == "cell" else sweeps
        if not rule.enabled or not len(table) or rule.column in table.columns:
            continue
        close = difflib.get_close_matches(rule.column, list(table.columns), n=1)
        hint = f" (did you mean {close[0]!r}?)" if close else ""
        out.append(
            f"QC rule {rule.name!r} names column {rule.column!r}, not in the {rule.scope} "
            f"table{hint}"
        )
    return out


def _repeated_ids(results: Sequence[dict[str, Any]]) -> dict[str, list[str]]:
    """Cell ids (case-folded) that more than one cell or failed file of the day was given, with
    the file of each.

    The batch's prefixes and ``avoid`` lists leave none but in contrived cases (electrode
    names that hold a dash and the rest of another file's stem; folders whose names differ
    only in case).
    """
    files: dict[str, list[str]] = {}
    for result in results:
        ids = [c["cell"]["cell_id"] for c in result["cells"]] if not result["error"] else []
        if result["error"]:
            ids = [_error_row(result)["cell_id"]]
        for cell_id in ids:
            files.setdefault(str(cell_id).casefold(), []).append(result["file"])
    return {cell_id: where for cell_id, where in files.items() if len(where) > 1}


def _repeated_row(row: dict[str, Any], repeated: dict[str, list[str]]) -> dict[str, Any]:
    """A cell whose id another cell also has: a failed row (its figure, sheet row and sweep
    rows could be the other cell's), saying which files to rename."""
    cell_id, source = row["cell_id"], row.get("source_file", "")
    where = repeated[str(cell_id).casefold()]
    others = [f for f in where if f != source] or where
    message = (
        f"{source}: cell id {cell_id!r} is also (ignoring case) that of a cell in "
        f"{', '.join(others)}; rename one of the files so that every cell has its own id"
    )
    keep = ("cell_id", "source_file", "electrode", "n_sweeps")
    return {
        **{k: row[k] for k in keep if k in row},
        "n_sweeps_used": 0,
        "qc_pass": False,
        "qc_reasons": message,
        "status": message,
    }


def _error_row(result: dict[str, Any]) -> dict[str, Any]:
    path = Path(result["file"])
    return {
        "cell_id": result.get("cell_id") or path.stem,
        "source_file": str(path),
        "n_sweeps": 0,
        "n_sweeps_used": 0,
        "qc_pass": False,
        "qc_reasons": result["error"]["message"],
        "status": result["error"]["message"],
    }


def _judge_joined(config: Config, cell_rows: list[dict[str, Any]]) -> None:
    """The cell rules' verdict on each analysed cell's row, once its sheet is joined.

    The analysis judged the cell without the sheet (for its figure), deferring rules on columns
    its row lacks; here every rule is judged on the whole row, so a rule on a sheet column
    counts, and one on a column no sheet gave fails the cell, naming the rule. A value the
    cache stored as null is judged as the NaN it was (:meth:`pipeline.qc.Rule.fires`).
    """
    from pipeline import qc

    rules = config.qc.for_scope("cell")
    for row in cell_rows:
        if row.get("status") == "ok":
            verdict = qc.judge_cell(rules, row)
            row.update(
                qc_pass=verdict.qc_pass,
                qc_reasons="; ".join(verdict.reasons),
                qc_flags="; ".join(verdict.flags),
            )


def _join_sheets(
    cell_rows: list[dict[str, Any]], sheets: Sequence[_Scoped]
) -> tuple[tuple[str, ...], list[str]]:
    """Join each cell row to its sheet (:func:`_join_sheet`); returns the columns joined, in
    the order the sheets give them (a cell whose sheet lacks one has it empty), and the
    warnings. A cell under no sheet's folder is said."""
    if not sheets:
        return (), []
    results = {column for row in cell_rows for column in row}
    groups: dict[int, list[dict[str, Any]]] = {}
    warnings: list[str] = []
    for row in cell_rows:
        k = _sheet_of(str(row["source_file"]), sheets)
        if k is None:
            warnings.append(
                f"no metadata sheet for cell {row['cell_id']} ({row['source_file']}): it is "
                "under none of the input folders with a metadata.csv"
            )
        groups.setdefault(-1 if k is None else k, []).append(row)
    joined: dict[str, None] = {}
    for k, scoped in enumerate(sheets):
        columns, said = _join_sheet(groups.get(k, []), scoped.sheet, results)
        joined |= dict.fromkeys(columns)
        warnings += said
    for row in cell_rows:
        for column in joined:
            row.setdefault(column, "")
    return tuple(joined), list(dict.fromkeys(warnings))


def _sheet_of(source_file: str, sheets: Sequence[_Scoped]) -> int | None:
    """Index of the sheet describing a file: the one for every file, else the sheet of the
    innermost folder holding it (None when no sheet's folder holds it)."""
    if sheets[0].folder is None:
        return 0
    path = Path(source_file).resolve()
    inside = [k for k, s in enumerate(sheets) if s.folder and path.is_relative_to(s.folder)]
    return max(inside, key=lambda k: len(sheets[k].folder.parts), default=None)


def _join_sheet(
    cell_rows: list[dict[str, Any]], sheet: Sheet, results: set[str]
) -> tuple[tuple[str, ...], list[str]]:
    """Add the sheet's columns to each cell row; report cells and rows that found no partner.

    A row that is the best match of cells of several files (``cell01.nwb`` in ``rig1/`` and
    ``rig2/``) is joined to none of them: which one it meant is a guess. A sheet column named
    like a result column (``source_file``, ``rin_mohm``...) is not joined: the result stays.
    Returns the columns joined and the warnings.
    """
    clashes = [c for c in sheet.columns if c in results]
    joined = tuple(c for c in sheet.columns if c not in results)
    hits = [sheet.lookup(str(row["cell_id"]), str(row["source_file"])) for row in cell_rows]
    files: dict[int, set[str]] = {}  # sheet row -> the files of the cells it matched
    for row, hit in zip(cell_rows, hits, strict=True):
        if hit is not None:
            files.setdefault(hit[0], set()).add(str(row["source_file"]))
    shared = {index: sorted(f) for index, f in files.items() if len(f) > 1}
    warnings = [
        f"{sheet.path}: column {c!r} is not joined: the cell table has a result column of "
        "that name; rename it in the sheet"
        for c in clashes
    ]
    warnings += [
        f"{sheet.path}: {sheet.describe_row(index)} matches several files ({', '.join(f)}); "
        "joined to none: give each file's row the folders that tell them apart "
        "(rig1/cell01.nwb)"
        for index, f in shared.items()
    ]
    for row, hit in zip(cell_rows, hits, strict=True):
        if hit is None or hit[0] in shared:
            if hit is None:
                warnings.append(
                    f"{sheet.path}: no row for cell {row['cell_id']} ({row['source_file']})"
                )
            row.update(dict.fromkeys(joined, ""))
            continue
        row.update({c: v for c, v in hit[1].items() if c in joined})
    for index in range(len(sheet.rows)):
        if index not in files:
            warnings.append(f"{sheet.path}: {sheet.describe_row(index)} matches no input file")
    return joined, list(dict.fromkeys(warnings))


def _run_info(files, results, run, config, errors, warnings, sheets, secs, n_pass):
    return {
        "version": __version__,
        "started": run["started"].isoformat(),
        "inputs_given": run["inputs_given"],
        "inputs": [
            {"file": str(p), "sha256": h} for p, h in zip(files, run["hashes"], strict=True)
        ],
        "sheets": [s.sheet.path for s in sheets],
        "executor": run["executor"],
        "config": config.to_dict(),
        "config_digest": config.digest(),
        "counts": {
            "files": len(files),
            "files_failed": sum(1 for r in results if r["error"]),
            "cells": sum(len(r["cells"]) for r in results),
            "cells_pass": n_pass,  # of the table: a cell whose id repeats has failed
            "cached": run["cached"],
            "analysed": run["analysed"],
        },
        "seconds": {k: round(v, 4) for k, v in secs.items()},
        "errors": errors,
        "warnings": warnings,
    }


def _executor(config: Config, workers: int | None, scheduler: str | None) -> dict[str, Any]:
    """What ran the analysis, for run.json: the config's ``workers`` (0 = all cores) is not
    what ``-j`` asked for. A cluster's own workers are its business (None)."""
    if scheduler and scheduler != "local":
        return {"scheduler": scheduler, "workers": None}
    return {"scheduler": scheduler, "workers": _worker_count(config, workers)}


def _worker_count(config: Config, workers: int | None) -> int:
    """Local processes: ``-j``, else the config's ``workers`` (0 = all cores)."""
    return workers or config.run.workers or os.cpu_count() or 1


def _sha_or_none(path: Path) -> str | None:
    try:
        return cache.file_sha256(path)
    except OSError:
        return None


def _log_stop(handler: logging.FileHandler, message: str) -> None:
    """The error that stops a run, into its log file only: the caller raises it, and the
    command line prints it once (through the logger, the console handler would print it too,
    even with -q)."""
    handler.handle(log.makeRecord(log.name, logging.ERROR, __file__, 0, "%s", (message,), None))


def _log_to_file(outdir: Path) -> logging.FileHandler:
    """The run's log file: every message, whatever the console shows."""
    logger = logging.getLogger("patchbatch")
    logger.setLevel(logging.INFO)
    handler = logging.FileHandler(outdir / "patchbatch.log", encoding="utf-8")
    handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(message)s"))
    logger.addHandler(handler)
    return handler
