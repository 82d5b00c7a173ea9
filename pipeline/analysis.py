"""The per-file analysis chain: read -> steps -> fitters -> QC -> (figure), as plain rows.

:func:`analyse_file` is the unit of work the batch sends to a process pool or a Dask cluster: a
top-level function taking and returning plain data (paths, the frozen :class:`Config`, dicts of
numbers and strings), so the same function serves every executor. One bad file becomes a result
whose ``error`` says what went wrong; it never raises.
"""

from __future__ import annotations

import math
import time
import traceback
from collections.abc import Sequence
from dataclasses import replace
from pathlib import Path
from typing import Any

from pipeline.cache import file_sha256
from pipeline.config import Config
from pipeline.errors import RecordingError
from pipeline.recording import Recording


def analyse_file(
    path: str,
    config: Config,
    figure_dir: str | None = None,
    *,
    id_prefix: str = "",
    avoid: Sequence[str] = (),
) -> dict[str, Any]:
    """Analyse every cell of one input file.

    Parameters
    ----------
    path : str
        Input file.
    config : Config
        Resolved configuration.
    figure_dir : str, optional
        Folder for the per-cell PNG figures; None writes no figures.
    id_prefix : str
        Put before every cell id (the batch uses it when files share a stem).
    avoid : sequence of str
        Other inputs' cell ids. A file of several cells, one of whose ``<stem>-<electrode>``
        ids is among them, names its cells by its file name instead (``pair.nwb-e0`` beside
        ``pair-e0.nwb``).

    Returns
    -------
    dict
        ``file``, ``cells`` (one dict per cell: ``cell`` row, ``sweeps`` rows, ``spikes`` rows,
        ``figure`` file name or None, ``figure_sha256`` its digest or None, ``figure_error``
        why it was not drawn or None), ``error`` (None, or ``{"stage", "message"}`` when the
        file could not be read), ``seconds`` per stage.
    """
    from pipeline.readers import open_recordings

    timings: dict[str, float] = {}
    start = time.perf_counter()
    try:
        recordings = open_recordings(path)
    except RecordingError as exc:
        return _failed(path, id_prefix, "read", str(exc))
    except Exception as exc:  # a reader bug must not stop the batch; keep the evidence
        message = f"{path}: unexpected {type(exc).__name__}: {exc}"
        return _failed(path, id_prefix, "read", message, exc)
    timings["read"] = time.perf_counter() - start
    recordings = _named(recordings, Path(path), id_prefix, avoid)
    cells = [analyse_recording(rec, config, figure_dir, timings) for rec in recordings]
    return {"file": str(path), "cells": cells, "error": None, "seconds": timings}


def analyse_recording(
    recording: Recording,
    config: Config,
    figure_dir: str | None = None,
    timings: dict[str, float] | None = None,
) -> dict[str, Any]:
    """Run steps, fitters, QC and the figure on one cell; errors become the cell's status."""
    timings = {} if timings is None else timings
    try:
        return _analyse(recording, config, figure_dir, timings)
    except Exception as exc:  # keep the cell as a row with its error, never lose the batch
        message = f"analysis failed: {type(exc).__name__}: {exc}"
        row = {
            "cell_id": recording.cell_id,
            "source_file": recording.source_file,
            "electrode": recording.electrode,
            "n_sweeps": len(recording.sweeps),
            "qc_pass": False,
            "qc_reasons": message,
            "status": message,
        }
        return {
            "cell": row,
            "sweeps": [],
            "spikes": [],
            "figure": None,
            "figure_sha256": None,
            "traceback": traceback.format_exc(limit=8),
        }


def _analyse(
    recording: Recording, config: Config, figure_dir: str | None, timings: dict[str, float]
) -> dict[str, Any]:
    from pipeline import qc
    from pipeline.fitters.cell import bridge_estimate
    from pipeline.fitters.passive import fit_sweeps, summarize_cell
    from pipeline.fitters.spikes import fit_spiking
    from pipeline.steps import find_steps

    t0 = time.perf_counter()
    epochs = find_steps(recording, config.steps)
    by_number = {s.number: s for s in recording.sweeps}
    fits = fit_sweeps([(by_number[e.sweep], e) for e in epochs if e.usable], config.passive)
    bridge = bridge_estimate(fits, config.passive)  # block is judged on the membrane's voltage
    spikes_all = fit_spiking(recording, epochs, config.spikes, bridge_ohm=bridge)
    sweep_rows = _sweep_rows(recording, epochs, fits, spikes_all)
    _add(timings, "fit", time.perf_counter() - t0)

    t0 = time.perf_counter()
    excluded = {e.sweep: f"not a usable step: {e.reason}" for e in epochs if not e.usable}
    usable = {e.sweep for e in epochs if e.usable}
    by_qc = qc.sweep_exclusions(
        config.qc.for_scope("sweep"), [r for r in sweep_rows if r["sweep"] in usable]
    )
    excluded.update(by_qc)
    cell_fit = summarize_cell(recording.cell_id, fits, config.passive, exclude=excluded)
    # The fitters already skip unusable steps; re-fit spiking only when QC left sweeps out.
    spikes = (
        fit_spiking(recording, epochs, config.spikes, exclude=excluded, bridge_ohm=bridge)
        if by_qc
        else spikes_all
    )
    for row in sweep_rows:
        reason = excluded.get(row["sweep"], "") or _nothing_measured(row)
        row["used"] = not reason
        row["excluded_because"] = reason
    cell_row = {
        "cell_id": recording.cell_id,
        "source_file": recording.source_file,
        "electrode": recording.electrode,
        **cell_fit.row(),
        **spikes.cell_row(),
        **_derived(sweep_rows, config.spikes.step_tolerance_a * 1e12),
    }
    cell_row["n_sweeps"] = len(recording.sweeps)
    cell_row["n_sweeps_used"] = sum(1 for r in sweep_rows if r["used"])
    # rules on a metadata sheet's columns wait for the sheet: the batch joins it and judges them
    verdict = qc.judge_cell(config.qc.for_scope("cell"), cell_row, excluded, defer_missing=True)
    cell_row["qc_pass"] = verdict.qc_pass
    cell_row["qc_reasons"] = "; ".join(verdict.reasons)
    cell_row["qc_flags"] = "; ".join(verdict.flags)
    _add(timings, "qc", time.perf_counter() - t0)

    figure, figure_sha256, figure_error = None, None, None
    if figure_dir is not None:
        t0 = time.perf_counter()
        try:
            drawn = _figure(recording, epochs, cell_fit, verdict, spikes, figure_dir, config)
            # the cache keeps the figure's digest: a PNG drawn since under another config
            # (figures are named by cell id alone) is not taken for this result's
            figure_sha256 = file_sha256(Path(figure_dir) / drawn)
            figure = drawn
        except Exception as exc:  # a drawing problem must not cost the cell its numbers
            figure_error = f"{recording.cell_id}: figure not drawn ({type(exc).__name__}: {exc})"
        _add(timings, "figures", time.perf_counter() - t0)
    spike_rows = [{"cell_id": recording.cell_id, **r} for r in spikes.spike_rows()]
    return {
        "cell": cell_row,
        "sweeps": sweep_rows,
        "spikes": spike_rows,
        "figure": figure,
        "figure_sha256": figure_sha256,
        "figure_error": figure_error,
    }


def _sweep_rows(recording, epochs, fits, spikes) -> list[dict[str, Any]]:
    """One row per sweep: step finder, passive and spiking columns side by side."""
    fit_by = {f.sweep: f.row() for f in fits}
    spike_by = {r["sweep"]: r for r in spikes.sweep_rows()}
    rows = []
    for sweep, epoch in zip(recording.sweeps, epochs, strict=True):
        row: dict[str, Any] = {
            "cell_id": recording.cell_id,
            "sweep": sweep.number,
            "protocol": sweep.protocol,
            "rate_khz": sweep.rate / 1e3,
            "step_kind": epoch.kind,
            "step_pa": epoch.amplitude * 1e12 if epoch.usable else math.nan,
            "holding_pa": epoch.holding * 1e12,
            "step_onset_ms": epoch.onset * 1e3,
            "step_duration_ms": epoch.duration * 1e3,
        }
        row.update(fit_by.get(sweep.number, {}))
        row.update({k: v for k, v in spike_by.get(sweep.number, {}).items() if k != "sweep"})
        rows.append(row)
    return rows


def _nothing_measured(row: dict[str, Any]) -> str:
    """Why a usable step gave no value at all (neither passive nor spiking), or ''."""
    if _finite(row.get("ss_dv_mv")) or _finite(row.get("spike_count")):
        return ""
    why = "; ".join(r for r in (row.get("fit_reason"), row.get("spiking_reason")) if r)
    return f"nothing could be measured: {why or 'no reason given'}"


def _derived(sweep_rows: list[dict[str, Any]], same_step_pa: float) -> dict[str, Any]:
    """Cell columns that QC rules read and that come from counting sweeps."""
    hyper = [r for r in sweep_rows if r["used"] and _finite(r.get("step_pa")) and r["step_pa"] < 0]
    change = _rin_change_pct(hyper, same_step_pa)
    return {"n_hyperpolarizing_used": len(hyper), "rin_change_pct": change}


def _rin_change_pct(hyper: list[dict[str, Any]], same_step_pa: float) -> float:
    """Change of per-sweep ΔV/I between the first and last repeats of the same step, %.

    Only steps given more than once say anything about stability (a single family of different
    steps confounds time with amplitude, Ih and rectification), so this is NaN without repeats.
    Repeats are steps within ``same_step_pa`` of each other (the config's
    ``spikes.step_tolerance_a``, in pA): a measured current varies a little from sweep to
    sweep (-50.07 and -49.90 pA for one nominal -50 pA step).
    """
    groups: list[tuple[float, list[float]]] = []  # (first step, Rin in recording order)
    for row in hyper:  # rows are in recording order
        if not _finite(row.get("rin_mohm")):
            continue
        step = row["step_pa"]
        near = [g for g in groups if abs(g[0] - step) <= same_step_pa]
        if near:
            min(near, key=lambda g: abs(g[0] - step))[1].append(row["rin_mohm"])
        else:
            groups.append((step, [row["rin_mohm"]]))
    pairs = [(v[0], v[-1]) for _, v in groups if len(v) > 1]
    if not pairs:
        return math.nan
    first = sum(p[0] for p in pairs) / len(pairs)
    last = sum(p[1] for p in pairs) / len(pairs)
    return 100.0 * (last - first) / first if first else math.nan


def _figure(recording, epochs, cell_fit, verdict, spikes, figure_dir, config) -> str:
    from pipeline.report.figures import FigureSettings, cell_figure, safe_name

    name = f"{safe_name(recording.cell_id)}.png"
    Path(figure_dir).mkdir(parents=True, exist_ok=True)
    cell_figure(
        recording,
        epochs,
        cell_fit,
        verdict,
        Path(figure_dir) / name,
        spikes=spikes,
        settings=FigureSettings(
            dpi=float(config.report.figure_dpi),
            # the residuals show the trace as the fitter saw it
            hum_harmonics=config.passive.hum_harmonics if config.passive.remove_hum else None,
        ),
    )
    return name


def _named(
    recordings: list[Recording], path: Path, id_prefix: str, avoid: Sequence[str]
) -> list[Recording]:
    """The recordings with the batch's cell ids (see :func:`analyse_file`)."""
    named = [replace(r, cell_id=id_prefix + r.cell_id) for r in recordings]
    taken = {a.casefold() for a in avoid}  # a figure per id: apart on macOS and Windows too
    if len(named) > 1 and any(r.cell_id.casefold() in taken for r in named):
        # several cells are "<stem>-<electrode>": the file's name keeps them off the other's id
        cut = len(id_prefix) + len(path.stem)
        named = [replace(r, cell_id=id_prefix + path.name + r.cell_id[cut:]) for r in named]
    return named


def _failed(
    path: str, id_prefix: str, stage: str, message: str, exc: Exception | None = None
) -> dict[str, Any]:
    error = {"stage": stage, "message": message}
    if exc is not None:
        error["traceback"] = traceback.format_exc(limit=8)
    cell_id = id_prefix + Path(path).stem
    return {"file": str(path), "cell_id": cell_id, "cells": [], "error": error, "seconds": {}}


def _add(timings: dict[str, float], stage: str, seconds: float) -> None:
    timings[stage] = timings.get(stage, 0.0) + seconds


def _finite(value: Any) -> bool:
    return isinstance(value, int | float) and math.isfinite(value)
