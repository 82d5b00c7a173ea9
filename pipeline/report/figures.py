"""One QC figure per cell: traces with fits, I-V, residuals, properties and verdict, spiking.

Matplotlib through ``Figure`` + ``FigureCanvasAgg`` (no pyplot: no global state, safe in worker
processes). The figure only draws results computed upstream; the one thing derived here is the
residual of each charging-curve fit (data minus ``ExpFit.curve``), which is a view, not a value.
Colours are fixed across panels: each hyperpolarizing sweep keeps its colour (by step current)
in the traces and residuals; fits are black; excluded sweeps are grey and hollow.

Speed (a day has hundreds of cells): each thread keeps one built figure per layout and clears
the cell's artists after drawing (:class:`_KeptFigure`); its renderer keeps text bitmaps, layouts and
metrics (:class:`_TextRenderer`); ticks and axis-label places are drawn here the way matplotlib
would (:func:`_settle_axes`) and legends are a few plain artists (:func:`_key`).
``tests/test_figure_reuse.py`` holds kept figures to figures built from scratch, and text, ticks
and label places to matplotlib's own drawing.
"""

from __future__ import annotations

import contextlib
import gc
import hashlib
import math
import os
import re
import struct
import textwrap
import threading
import unicodedata
import weakref
import zlib
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from functools import partial
from pathlib import Path
from typing import Any, NamedTuple

import matplotlib
import numpy as np
from matplotlib.artist import Artist
from matplotlib.backends.backend_agg import FigureCanvasAgg, RendererAgg
from matplotlib.collections import LineCollection, PolyCollection
from matplotlib.colors import Normalize, to_rgba
from matplotlib.figure import Figure
from matplotlib.font_manager import FontProperties
from matplotlib.lines import Line2D
from matplotlib.patches import FancyBboxPatch, Rectangle
from matplotlib.text import Text
from matplotlib.ticker import MaxNLocator, NullLocator, ScalarFormatter
from matplotlib.transforms import Bbox, IdentityTransform

from pipeline.fitters.results import CellFit, ExpFit, SweepFit
from pipeline.fitters.sweep import PassiveSettings, remove_hum_where_flat
from pipeline.qc import CellVerdict
from pipeline.recording import Recording, Sweep
from pipeline.report.atomic import atomic_path
from pipeline.steps import StepEpoch

_UNSAFE = re.compile(r"[^A-Za-z0-9._-]+")
_WINDOWS_RESERVED = {"CON", "PRN", "AUX", "NUL"} | {f"{d}{i}" for d in ("COM", "LPT") for i in range(1, 10)}  # fmt: skip
_MAX_STEM = 80

PASS_COLOUR = "#1a7f37"
FAIL_COLOUR = "#c62828"
EXCLUDED_COLOUR = "0.65"
DEPOLARIZING_COLOUR = "0.62"
SS_COLOUR = "tab:blue"
PEAK_COLOUR = "tab:orange"
FIT_COLOUR = "black"
MISSING_COLOUR = "0.4"


def safe_name(cell_id: str) -> str:
    """A file-name stem for a cell's figure, safe on every common file system.

    Keeps ``[A-Za-z0-9._-]``; anything else (path separators, ``..``, ``:``, spaces, markup,
    non-ASCII) becomes ``_``, leading dots and dashes are dropped and the stem is at most 80
    characters. Whenever that changed the id, a short hash of the original id is appended, so
    two distinct ids never share a name (``a/b`` and ``a_b`` differ).

    Parameters
    ----------
    cell_id : str
        The cell id, any text.

    Returns
    -------
    str
        The stem, without extension (the figure is ``figures/<stem>.png``).
    """
    cell_id = str(cell_id)
    ascii_id = unicodedata.normalize("NFKD", cell_id).encode("ascii", "ignore").decode("ascii")
    stem = _UNSAFE.sub("_", ascii_id).lstrip(".-")[:_MAX_STEM]
    if not stem or stem != cell_id or stem.split(".")[0].upper() in _WINDOWS_RESERVED:
        digest = hashlib.sha256(cell_id.encode("utf-8")).hexdigest()[:8]
        stem = f"{stem}-{digest}" if stem.strip("_") else f"cell-{digest}"
    return stem


def figure_names(cell_ids: Iterable[str]) -> dict[str, str]:
    """Safe stems for a day's cells that also stay distinct on case-insensitive file systems.

    Parameters
    ----------
    cell_ids : iterable of str
        Distinct cell ids.

    Returns
    -------
    dict
        Cell id -> stem; :func:`safe_name`, plus a hash when two stems differ only in case.
    """
    ids = list(dict.fromkeys(cell_ids))
    stems = {cid: safe_name(cid) for cid in ids}
    folded: dict[str, int] = {}
    for stem in stems.values():
        folded[stem.casefold()] = folded.get(stem.casefold(), 0) + 1
    for cid, stem in stems.items():
        if folded[stem.casefold()] > 1:
            stems[cid] = f"{stem}-{hashlib.sha256(cid.encode('utf-8')).hexdigest()[:8]}"
    return stems


@dataclass(frozen=True)
class FigureSettings:
    """How cell figures look: resolution, size (inches), colour map of the step currents."""

    dpi: float = 100.0
    width_in: float = 15.0
    height_in: float = 8.6
    spikes_height_in: float = 3.6  # extra height of the spiking row
    step_cmap: str = "viridis"
    png_compress_level: int = 1  # deflate level (see png_bytes): 1 is fast, ~15 % larger than 9
    # mains hum removed from the residuals as the fitter removed it (its hum_harmonics; None
    # when it removed none)
    hum_harmonics: int | None = PassiveSettings.hum_harmonics


def _settings(
    settings: FigureSettings | Mapping[str, Any] | None, dpi: float | None
) -> FigureSettings:
    if settings is None:
        settings = FigureSettings()
    elif not isinstance(settings, FigureSettings):
        known = FigureSettings.__dataclass_fields__
        settings = FigureSettings(**{k: v for k, v in dict(settings).items() if k in known})
    if dpi is not None:
        settings = FigureSettings(**{**settings.__dict__, "dpi": float(dpi)})
    return settings


def _finite(x: Any) -> bool:
    return isinstance(x, int | float | np.floating) and math.isfinite(x)


def envelope(t: np.ndarray, v: np.ndarray, n_columns: int) -> tuple[np.ndarray, np.ndarray]:
    """Decimate a trace for drawing: the min and max of each pixel column, in time order.

    Parameters
    ----------
    t, v : numpy.ndarray
        Sample times and values (any units).
    n_columns : int
        Pixel columns the trace spans.

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        At most ``2 * n_columns`` points plus a remainder shorter than one column, which draw
        the same picture at that width.
    """
    n = v.shape[0]
    per = -(-n // max(n_columns, 1))  # ceil: at most n_columns whole blocks
    if per < 3:
        return t, v
    m = per * (n // per)
    blocks = v[:m].reshape(-1, per)
    lo_i, hi_i = blocks.argmin(axis=1), blocks.argmax(axis=1)
    first = np.minimum(lo_i, hi_i)
    second = np.maximum(lo_i, hi_i)
    rows = np.arange(blocks.shape[0]) * per
    idx = np.column_stack([rows + first, rows + second]).ravel()
    idx = np.concatenate([idx, np.arange(m, n)])
    return t[idx], v[idx]


def column_bands(
    v: np.ndarray, rate: float, n_columns: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
    """A dense trace as the band it paints at a given width: each pixel column's range.

    A trace with many samples per pixel column covers, in each column, everything from its
    lowest to its highest sample, plus the line that joins it to the last sample of the column
    before. Filling that band, flat across each column's width (widened by the line width
    when drawn), paints about what stroking the min/max zigzag paints (a one-sample extreme
    stays a full column wide), at a fraction of the rasterizing cost.

    Parameters
    ----------
    v : numpy.ndarray
        Samples (any unit), uniformly spaced from the sweep start.
    rate : float
        Sampling rate, Hz.
    n_columns : int
        Pixel columns the trace spans.

    Returns
    -------
    (numpy.ndarray, numpy.ndarray, numpy.ndarray) or None
        The band's outline: each column's first and last sample time (s from the sweep
        start), and the column's minimum and maximum at both; None when the trace has
        non-finite samples or fewer than three samples per column (draw it as a line).
    """
    n = v.shape[0]
    per = -(-n // max(n_columns, 1))  # ceil, as in envelope
    if per < 3 or n < 2 * per or not np.isfinite(v).all():
        return None
    m = per * (n // per)
    blocks = v[:m].reshape(-1, per)
    lo, hi = blocks.min(axis=1), blocks.max(axis=1)
    first = np.arange(0, m, per)
    last = first + per - 1
    if m < n:  # the remainder is one more, narrower column
        tail = v[m:]
        lo, hi = np.append(lo, tail.min()), np.append(hi, tail.max())
        first, last = np.append(first, m), np.append(last, n - 1)
    # the joining segment from the column before: its last sample
    joins = v[per - 1 : m : per]
    np.minimum(lo[1:], joins[: lo.size - 1], out=lo[1:])
    np.maximum(hi[1:], joins[: hi.size - 1], out=hi[1:])
    edges = np.column_stack([first, last]).ravel() / rate
    return edges, np.repeat(lo, 2), np.repeat(hi, 2)


@dataclass
class _SweepView:
    """What the figure knows about one sweep, gathered from the three inputs."""

    number: int
    sweep: Sweep | None
    epoch: StepEpoch | None
    fit: SweepFit | None
    step_a: float
    used: bool
    excluded_because: str
    colour: Any = DEPOLARIZING_COLOUR


def _epoch_map(
    epochs: Sequence[StepEpoch] | Mapping[int, StepEpoch] | None,
) -> dict[int, StepEpoch]:
    if epochs is None:
        return {}
    values = epochs.values() if isinstance(epochs, Mapping) else epochs
    return {int(e.sweep): e for e in values if e is not None}


def _sweep_views(
    recording: Recording | None,
    epochs: Mapping[int, StepEpoch],
    cell_fit: CellFit | None,
    verdict: CellVerdict | None,
    cmap_name: str,
) -> list[_SweepView]:
    sweeps = {s.number: s for s in recording.sweeps} if recording is not None else {}
    fits = {f.sweep: f for f in cell_fit.sweeps} if cell_fit is not None else {}
    excluded = dict(cell_fit.excluded) if cell_fit is not None else {}
    if verdict is not None and verdict.excluded:
        excluded.update(verdict.excluded)
    used = set(cell_fit.used) if cell_fit is not None else set()
    views = []
    for number in sorted(set(sweeps) | set(fits) | set(epochs)):
        fit, epoch = fits.get(number), epochs.get(number)
        step = fit.step_a if fit is not None and _finite(fit.step_a) else math.nan
        if not _finite(step) and epoch is not None and epoch.usable:
            step = epoch.amplitude
        reason = excluded.get(number, "")
        if not reason and epoch is not None and not epoch.usable:
            reason = epoch.reason or epoch.kind
        views.append(
            _SweepView(number, sweeps.get(number), epoch, fit, step, number in used, reason)
        )
    hyper = [v.step_a for v in views if _finite(v.step_a) and v.step_a < 0]
    if hyper:
        cmap = matplotlib.colormaps[cmap_name]
        norm = _step_norm(hyper)
        for v in views:
            if _finite(v.step_a) and v.step_a < 0:
                v.colour = cmap(0.9 * norm(v.step_a * 1e12))
    return views


def _step_norm(hyper_steps_a: Sequence[float]) -> Normalize:
    """Step currents (A) to 0..1: the largest hyperpolarizing step 0, the smallest 1."""
    lo, hi = min(hyper_steps_a) * 1e12, max(hyper_steps_a) * 1e12
    if hi <= lo:  # one step size: a range around it (an empty one warns and maps nothing)
        lo, hi = lo - 1.0, lo + 1.0
    return Normalize(vmin=lo, vmax=hi)


def _note(ax, text: str) -> None:
    """Say in the panel what is missing and why (and drop the meaningless 0..1 ticks)."""
    ax.set_xticks([])
    ax.set_yticks([])
    ax.text(
        0.5, 0.5, textwrap.fill(text, 38), transform=ax.transAxes, ha="center", va="center",
        color=MISSING_COLOUR, fontsize=9, style="italic",
    )  # fmt: skip


def _title(ax, text: str) -> None:
    """A panel title as plain text (``set_title`` re-lays out every draw and costs ~20 ms),
    kept in the panel from cell to cell (as ``ax.text`` would make it)."""

    def make() -> Text:
        return Text(0.0, 1.012, "", transform=ax.transAxes, fontsize=9, va="bottom", ha="left",
                    clip_on=False)  # fmt: skip

    _kept_artist(ax, ("title",), make).set_text(text)


def _axis_columns(ax, fig: Figure, dpi: float) -> int:
    return max(int(ax.get_position().width * fig.get_figwidth() * dpi), 50)


class _Trace(NamedTuple):
    """One sweep as the trace panel draws it: a column band (``hi`` set) or a line."""

    t: np.ndarray  # ms from the sweep start
    lo: np.ndarray  # mV: the line's values, or the band's bottom
    hi: np.ndarray | None  # mV: the band's top; None for a line
    colour: Any
    width: float  # line width, points
    style: str  # "-" or ":"
    hyper: bool  # a hyperpolarizing step


def _draw_traces(ax, fig, views: list[_SweepView], cell_fit: CellFit | None, dpi: float) -> None:
    drawn = [
        v for v in views
        if v.sweep is not None and v.sweep.n_samples > 1 and np.isfinite(v.sweep.voltage).any()
    ]  # fmt: skip
    if not drawn:
        _note(ax, "no traces: the recording has no finite samples to draw")
        _label_traces(ax)
        return
    longest = max(v.sweep.duration for v in drawn)
    columns = _axis_columns(ax, fig, dpi)
    traces = []  # one collection per layer, not an artist per sweep
    for v in drawn:
        hyper = _finite(v.step_a) and v.step_a < 0
        if v.excluded_because or (not hyper and not v.used):
            style = (EXCLUDED_COLOUR if hyper else DEPOLARIZING_COLOUR, 0.6, ":" if hyper else "-")
        else:
            style = (v.colour, 0.9, "-")
        n_columns = int(columns * v.sweep.duration / longest)
        band = column_bands(v.sweep.voltage, v.sweep.rate, n_columns) if style[2] == "-" else None
        if band is not None:
            traces.append(_Trace(band[0] * 1e3, band[1] * 1e3, band[2] * 1e3, *style, hyper))
        else:
            t, y = envelope(v.sweep.time() * 1e3, v.sweep.voltage * 1e3, n_columns)
            traces.append(_Trace(t, y, None, *style, hyper))
    entries, fitted = _draw_fits_and_windows(ax, views)
    tops = [np.nanmax(tr.lo if tr.hi is None else tr.hi) for tr in traces]
    spans = [(np.nanmin(tr.lo), top, tr.hyper) for tr, top in zip(traces, tops, strict=True)]
    cap = _trace_limits(ax, spans, views)
    y0, y1 = ax.get_ylim()  # set by _trace_limits: the bands' line width in mV
    mv_per_point = (y1 - y0) / max(ax.bbox.height, 1.0) * dpi / 72
    # hyperpolarizing sweeps on top; dotted ones apart, as their dots need butt caps
    for layer, dotted in ((False, False), (True, True), (True, False)):
        # spiking sweeps above the clip are faded: they are shown in the spiking panels
        sel = [
            (tr, to_rgba(tr.colour, 0.35 if cap is not None and not layer and top > cap else 1))
            for tr, top in zip(traces, tops, strict=True)
            if tr.hyper == layer and (tr.style != "-") == dotted
        ]
        bands = [(tr, c) for tr, c in sel if tr.hi is not None]
        lines = [(tr, c) for tr, c in sel if tr.hi is None]
        zorder = 2 if layer else 1
        if bands:
            _bands(ax, bands, mv_per_point, zorder)
        if lines:
            _lines(ax, [(tr.t, tr.lo) for tr, _ in lines], [c for _, c in lines],
                   [tr.width for tr, _ in lines], [tr.style for tr, _ in lines], zorder=zorder,
                   capstyle="butt" if dotted else "projecting")  # fmt: skip
    _label_traces(ax, f"; clipped above {cap:.0f} mV" if cap is not None else "")
    if entries:  # after the limits: the key goes where it covers the fewest trace samples
        _key(ax, entries, "best", [*_trace_points(traces), *fitted])


def _trace_points(traces: list[_Trace], per_trace: int = 60) -> list[tuple[float, float]]:
    """A few (ms, mV) points along each trace (both edges of a band) for the key to avoid."""
    out: list[tuple[float, float]] = []
    for tr in traces:
        step = max(1, tr.t.size // per_trace)
        for y in (tr.lo, tr.hi) if tr.hi is not None else (tr.lo,):
            pts = np.column_stack([tr.t[::step], y[::step]])
            out.extend(map(tuple, pts[np.isfinite(pts).all(axis=1)]))
    return out


def _bands(ax, bands: list[tuple[_Trace, Any]], mv_per_point: float, zorder: float) -> None:
    """Column bands filled as one PolyCollection, each widened by half its line width on
    either side, as a stroke of that width would reach."""
    polygons = []
    for tr, _ in bands:
        half = 0.5 * tr.width * mv_per_point
        outline = [np.column_stack([tr.t, tr.hi + half]), np.column_stack([tr.t, tr.lo - half])]
        polygons.append(np.concatenate([outline[0], outline[1][::-1]]))
    ax.add_collection(
        PolyCollection(
            polygons, facecolors=[c for _, c in bands], edgecolors="none", linewidths=0,
            zorder=zorder,
        )
    )  # fmt: skip


def _lines(
    ax, xy: list, colours: list, widths: list, styles: list, zorder: float,
    capstyle: str = "projecting",
) -> None:  # fmt: skip
    """Many curves as one LineCollection: drawn in one call, autoscaled like ``plot``.

    Caps and joins as Line2D draws them: projecting caps for solid lines, butt for dashes.
    """
    segments = [np.column_stack([np.asarray(x, float), np.asarray(y, float)]) for x, y in xy]
    ax.add_collection(
        LineCollection(
            segments, colors=colours, linewidths=widths, linestyles=styles, zorder=zorder,
            capstyle=capstyle, joinstyle="round",
        )
    )  # fmt: skip


def _label_traces(ax, note: str = "") -> None:
    ax.set_xlabel("time from sweep start (ms)")
    ax.set_ylabel("membrane potential (mV)")
    _title(ax, f"sweeps (hyperpolarizing coloured by step; not used: dotted grey{note})")


def _drawable(c: ExpFit) -> bool:
    """A charging fit that can be drawn: finite parameters, positive tau, a real window."""
    values = (c.t0, c.t1, c.tau, c.amp, c.v_inf)
    return all(_finite(x) for x in values) and c.tau > 0 and c.t1 > c.t0


def _draw_fits_and_windows(ax, views: list[_SweepView]) -> tuple[list, list]:
    """Fitted charging curves (grey for sweeps not used) and the windows of the sweeps used
    (of all when none is); returns the key's entries and points along the curves."""
    windows = {"charging fit": [], "steady state": [], "baseline": []}
    curves, colours = [], []
    used = [id(v) for v in views if v.fit is not None and v.used]
    shaded = set(used) if used else {id(v) for v in views}
    for v in views:
        f = v.fit
        if f is None:
            continue
        if _drawable(f.charging):
            t = np.linspace(f.charging.t0, f.charging.t1, 120)
            curves.append((t * 1e3, f.charging.curve(t) * 1e3))
            colours.append(FIT_COLOUR if v.used else EXCLUDED_COLOUR)
            if id(v) in shaded:
                windows["charging fit"].append((f.charging.t0, f.charging.t1))
        if id(v) not in shaded:
            continue
        for key, win in (("steady state", f.ss_window), ("baseline", f.baseline_window)):
            if all(_finite(x) for x in win):
                windows[key].append(win)
    if curves:
        n = len(curves)
        _lines(ax, curves, colours, [1.0] * n, ["--"] * n, zorder=3, capstyle="butt")
    shades = {"charging fit": "#9ecae1", "steady state": "#fdd0a2", "baseline": "0.88"}
    spans = {  # each kind's windows as one span, ms
        key: (min(w[0] for w in wins) * 1e3, max(w[1] for w in wins) * 1e3)
        for key, wins in windows.items()
        if wins
    }
    if spans:
        # as axvspan draws them (full height, x in data), one collection instead of a
        # Rectangle each; like axvspan, they widen the x limits only (y is in axes units)
        ax.add_collection(
            PolyCollection(
                [[(x0, 0.0), (x0, 1.0), (x1, 1.0), (x1, 0.0)] for x0, x1 in spans.values()],
                facecolors=[to_rgba(shades[key], 0.45) for key in spans], linewidths=0,
                zorder=0, transform=ax.get_xaxis_transform(which="grid"),
            ),
            autolim=False,
        )  # fmt: skip
        ends = [x for span in spans.values() for x in span]
        ax.update_datalim(np.column_stack([ends, np.zeros(len(ends))]), updatey=False)
    entries = [
        (f"{key} window", "patch", {"facecolor": shades[key], "alpha": 0.45}) for key in spans
    ]
    if FIT_COLOUR in colours:
        entries.append(
            ("fitted charging curve", "line", {"color": FIT_COLOUR, "ls": "--", "lw": 1})
        )
    if EXCLUDED_COLOUR in colours:
        entries.append(
            ("fit of a sweep not used", "line", {"color": EXCLUDED_COLOUR, "ls": "--", "lw": 1})
        )
    fitted = [(x, y) for t, c in curves for x, y in zip(t[::12], c[::12], strict=True)]
    return entries, fitted


_HOLLOW = {"marker": "o", "ms": math.sqrt(28), "mfc": "none", "mec": EXCLUDED_COLOUR, "mew": 1.0}
# matplotlib's legend places, in the order its "best" tries them: (x, y) of the box in the axes
_KEY_PLACES = {
    "upper right": (1, 1), "upper left": (0, 1), "lower left": (0, 0), "lower right": (1, 0),
    "right": (1, 0.5), "center left": (0, 0.5), "center right": (1, 0.5),
    "lower center": (0.5, 0), "upper center": (0.5, 1), "center": (0.5, 0.5),
}  # fmt: skip


def _key(
    ax, entries: list, loc: str, avoid: Sequence = (), fontsize: float = 7.0, alpha: float = 0.85
) -> None:
    """A legend as a few plain artists: a framed box of symbols and labels.

    Looks like ``ax.legend`` with matplotlib's default spacing (in font sizes: 0.4 inside the
    frame, symbols 2.0 long and 0.8 from their text, rows 0.5 apart, 0.5 from the axes edge),
    but a Legend re-lays out its box of packers on every draw, ~7 ms each. ``loc="best"``
    takes the first place (in the Legend's order) that covers the fewest ``avoid`` points.

    Parameters
    ----------
    ax : matplotlib.axes.Axes
        The panel (its limits are settled here when ``loc="best"``).
    entries : list of (str, str, dict)
        Label, symbol kind (``"patch"``, ``"line"`` or ``"marker"``) and its artist style.
    loc : str
        A legend location name, or ``"best"``.
    avoid : sequence of (float, float)
        Data points the key should not cover.
    fontsize : float
        Label size, points.
    alpha : float
        Opacity of the frame.
    """
    fig = ax.get_figure(root=True)
    renderer = fig.canvas.get_renderer()
    prop = FontProperties(size=fontsize)
    em = fontsize * fig.dpi / 72  # the legend's unit of spacing, pixels
    ascent, descent, _ = renderer._get_font_height_metrics(prop)
    if ascent is None:  # a font without metric tables: measure, as Text then does
        line = renderer.get_text_width_height_descent("lp", prop, False)[1]
    else:
        line = ascent + descent
    widths, heights = [], []
    for label, _, _ in entries:
        lines = label.split("\n")
        widths.append(max(renderer._text_width(t, prop) for t in lines))
        heights.append(max(line * (1 + 1.2 * (len(lines) - 1)), 0.7 * em))
    w = 0.8 * em + 2.8 * em + max(widths)
    h = 0.8 * em + sum(heights) + 0.5 * em * (len(entries) - 1)
    box = ax.bbox
    room_x, room_y = box.width - w - em, box.height - h - em

    def corner(place: str) -> tuple[float, float]:
        fx, fy = _KEY_PLACES[place]
        return box.x0 + 0.5 * em + fx * room_x, box.y0 + 0.5 * em + fy * room_y

    if loc == "best":
        ax.get_xlim(), ax.get_ylim()  # settle the autoscaled limits before mapping points
        pts = ax.transData.transform(np.asarray(avoid, float).reshape(-1, 2))
        covered = []
        for place in _KEY_PLACES:
            x0, y0 = corner(place)
            inside = (
                (pts[:, 0] >= x0)
                & (pts[:, 0] <= x0 + w)
                & (pts[:, 1] >= y0)
                & (pts[:, 1] <= y0 + h)
            )
            covered.append(int(inside.sum()))
        loc = list(_KEY_PLACES)[covered.index(min(covered))]
    x0, y0 = corner(loc)
    pixels = {"transform": IdentityTransform(), "clip_on": False, "zorder": 5}
    artists: list = [
        FancyBboxPatch(
            (x0, y0), w, h, boxstyle=f"round,pad=0,rounding_size={0.2 * em}", facecolor="white",
            edgecolor="0.8", alpha=alpha, lw=1.0, snap=True, **pixels,
        )
    ]  # fmt: skip
    top = y0 + h - 0.4 * em
    hx = x0 + 0.4 * em
    for (label, kind, style), row in zip(entries, heights, strict=True):
        yc = top - row / 2
        if kind == "patch":
            artists.append(
                Rectangle((hx, yc - 0.35 * em), 2 * em, 0.7 * em, lw=0, **style, **pixels)
            )
        elif kind == "line":
            artists.append(Line2D([hx, hx + 2 * em], [yc, yc], **style, **pixels))
        else:
            artists.append(Line2D([hx + em], [yc], ls="none", **style, **pixels))
        artists.append(
            Text(hx + 2.8 * em, yc, label, fontproperties=prop, va="center", ha="left", **pixels)
        )
        top -= row + 0.5 * em
    for artist in artists:
        ax.add_artist(artist)


def _trace_limits(ax, spans, views: list[_SweepView]) -> float | None:
    """Keep the passive responses readable: clip spikes (in-step or rebound); returns the cap.

    The top is a margin above the highest median level of any sweep before or during its
    step: a spiking sweep's median sits between its spikes, a subthreshold one's on its plateau.
    """
    lo, hi = min(s[0] for s in spans), max(s[1] for s in spans)
    levels = [m for v in views for m in _levels_mv(v)]
    if levels:
        top = max(levels)
        cap = top + max(0.15 * (top - lo), 8.0)
        if hi > cap:
            ax.set_ylim(lo - 0.04 * (cap - lo), cap)
            return cap
    pad = 0.04 * max(hi - lo, 1.0)
    ax.set_ylim(lo - pad, hi + pad)
    return None


def _levels_mv(v: _SweepView) -> list[float]:
    """Median voltage before and during the step (whole sweep when the step is unknown), mV.

    Each median is of at most ~2000 evenly spread samples: it only places the clip, and a full
    median costs more than the rest of the trace panel's arithmetic.
    """
    if v.sweep is None:
        return []
    volts = v.sweep.voltage
    if v.epoch is not None and v.epoch.usable and 0 < v.epoch.onset_index < v.epoch.offset_index:
        parts = [volts[: v.epoch.onset_index], volts[v.epoch.onset_index : v.epoch.offset_index]]
    else:
        parts = [volts]
    out = []
    for part in parts:
        part = part[:: 1 + part.size // 2048]
        part = part[np.isfinite(part)]
        if part.size:
            out.append(float(np.median(part)) * 1e3)
    return out


def _draw_colourbar(cax, views: list[_SweepView], cmap_name: str) -> None:
    """The step-current scale of the coloured sweeps, as an image in its fixed slot.

    A plain axes with a 256-row image: ``Figure.colorbar`` builds a new Colorbar (and its
    mesh) per figure, which cannot be kept from one cell to the next.
    """
    hyper = [v.step_a for v in views if _finite(v.step_a) and v.step_a < 0]
    if not any(_finite(v.step_a) and v.step_a < 0 and not v.excluded_because for v in views):
        return  # no sweep drawn in colour: the slot stays hidden
    norm = _step_norm(hyper)
    colours = matplotlib.colormaps[cmap_name](np.linspace(0, 0.9, 256))[:, None, :3]
    cax.set_visible(True)
    cax.imshow(
        colours, extent=(0.0, 1.0, norm.vmin, norm.vmax), origin="lower", aspect="auto",
        interpolation="nearest",
    )  # fmt: skip
    cax.set_ylim(norm.vmin, norm.vmax)
    cax.set_xticks([])
    steps = sorted({round(h * 1e12, 1) for h in hyper})
    if len(steps) <= 10:
        cax.set_yticks(steps, labels=[f"{x:.0f}" for x in steps])
    cax.set_ylabel("step current (pA)", fontsize=8)


def _points(ax, x, y, marker: str, area: float, face: Any, edge: Any, **kw: Any) -> None:
    """Markers of one style, as ``scatter(s=area)`` draws them, ~3 ms cheaper per call.

    One Line2D with markers and no line instead of a PathCollection: the same look for
    markers that all share one size and colour.
    """
    ax.plot(x, y, ls="none", marker=marker, ms=math.sqrt(area), mfc=face, mec=edge, mew=1.0, **kw)


def _draw_iv(ax, views: list[_SweepView], cell_fit: CellFit | None) -> None:
    ax.axhline(0, color="0.8", lw=0.8, zorder=0)
    ax.axvline(0, color="0.8", lw=0.8, zorder=0)
    ax.set_xlabel("step current (pA)")
    ax.set_ylabel("ΔV from baseline (mV)")
    _title(ax, "I-V: steady state ● and peak ▲")
    points = [v for v in views if v.fit is not None and _finite(v.step_a)]
    n_drawn = 0
    for key, colour, marker in (("ss_dv", SS_COLOUR, "o"), ("peak_dv", PEAK_COLOUR, "^")):
        for used in (True, False):
            sel = [v for v in points if v.used == used and _finite(getattr(v.fit, key))]
            if not sel:
                continue
            x = [v.step_a * 1e12 for v in sel]
            y = [getattr(v.fit, key) * 1e3 for v in sel]
            face = colour if used else "none"
            edge = colour if used else EXCLUDED_COLOUR
            _points(ax, x, y, marker, 28, face, edge, zorder=3)
            n_drawn += len(sel)
    if n_drawn == 0:
        _note(ax, "no steady-state or peak deflections were measured")
        return
    _draw_iv_fit(ax, points, cell_fit)


def _iv_offset_v(points: list[_SweepView], intercept_v: float) -> float:
    """The fit line's value at zero current on the ΔV axis.

    ``iv_intercept_v`` is the membrane potential at zero step current (the fitter gives the
    mean baseline of its sweeps); the plot shows deflections from each sweep's baseline, so the
    line starts at the intercept minus the mean baseline of the sweeps used.
    """
    base = [v.fit.baseline_v for v in points if v.used and _finite(v.fit.baseline_v)]
    if not base:
        return intercept_v if abs(intercept_v) < 5e-3 else 0.0
    return intercept_v - float(np.mean(base))


def _draw_iv_fit(ax, points: list[_SweepView], cell_fit: CellFit | None) -> None:
    f = cell_fit
    if f is None or not (_finite(f.iv_slope_ohm) and _finite(f.iv_intercept_v)):
        ax.text(0.03, 0.95, "no I-V fit", transform=ax.transAxes, va="top", color=MISSING_COLOUR)
        return
    xs = [v.step_a for v in points if v.used] or [v.step_a for v in points]
    curved = f.rin_method in ("quadratic", "cubic")
    # a bent V-I relation: Rin is the curve's slope at rest, drawn as its tangent near zero
    # current only (over the whole range it would miss the far points it was never meant to meet)
    reach = 0.5 if curved else 1.0
    x = np.linspace(min(min(xs), 0.0) * reach, max(max(xs), 0.0) * reach, 50)
    b, slope = _iv_offset_v(points, f.iv_intercept_v), f.iv_slope_ohm
    lo, hi = f.rin_ci_ohm
    entries: list = []
    avoid = [  # what the key should not cover: the points, the line and its band
        (v.step_a * 1e12, getattr(v.fit, k) * 1e3)
        for v in points
        for k in ("ss_dv", "peak_dv")
        if _finite(getattr(v.fit, k))
    ]
    if _finite(lo) and _finite(hi) and _finite(f.rin_ohm):
        # the slope's 95% band: Rin's interval moved onto the slope (slope = Rin + bridge error)
        y1 = (b + (slope + lo - f.rin_ohm) * x) * 1e3
        y2 = (b + (slope + hi - f.rin_ohm) * x) * 1e3
        ax.fill_between(x * 1e12, y1, y2, color=FIT_COLOUR, alpha=0.15, lw=0)
        entries.append(("95% interval", "patch", {"facecolor": FIT_COLOUR, "alpha": 0.15}))
        avoid += [*np.column_stack([x * 1e12, y1]), *np.column_stack([x * 1e12, y2])]
    label = f"steady-state fit: {slope / 1e6:.0f} MΩ"
    if curved:
        label = f"slope at 0 pA ({f.rin_method} fit): {slope / 1e6:.0f} MΩ"
    if _finite(f.bridge_error_ohm) and f.bridge_error_ohm != 0 and _finite(f.rin_ohm):
        label += (
            f"\n(Rin {f.rin_ohm / 1e6:.0f} MΩ after {f.bridge_error_ohm / 1e6:.1f} MΩ bridge error)"
        )
    ax.plot(x * 1e12, (b + slope * x) * 1e3, color=FIT_COLOUR, lw=1.2)
    entries.append((label, "line", {"color": FIT_COLOUR, "lw": 1.2}))
    entries.append(("not used in the fit", "marker", _HOLLOW))
    avoid += [*np.column_stack([x * 1e12, (b + slope * x) * 1e3])]
    _key(ax, entries, "best", avoid)


_RESID_FIRST_BIN_S = 5e-4  # the fitter's bin width: the start of the charging curve as it saw it
_RESID_BIN_GROWTH = 0.03  # later bins are 3 % of their time from the fit start


def residual_bins(n: int, rate: float) -> np.ndarray:
    """Edges (sample indices) of bins that widen with time from the fit start.

    The first bins are 0.5 ms wide, as the fitter bins the trace; from ~17 ms on each is 3 % of
    its time from the fit start. Misfit of a charging curve shows at its start (a faster,
    dendritic component) and as a slow trend later; wide late bins average out noise and mains
    hum, so both read at a glance, with ~170 points per second of fit instead of 2000.

    Parameters
    ----------
    n : int
        Samples in the fit window.
    rate : float
        Sampling rate, Hz.

    Returns
    -------
    numpy.ndarray
        Increasing edges from 0 to ``n``; every bin holds at least one first-bin width of
        samples, except when ``n`` itself is shorter.
    """
    first = max(1, round(_RESID_FIRST_BIN_S * rate))
    edges = [0]
    while edges[-1] < n:
        edges.append(edges[-1] + max(first, round(_RESID_BIN_GROWTH * edges[-1])))
    edges[-1] = n
    if len(edges) > 2 and edges[-1] - edges[-2] < first:
        del edges[-2]  # a short last bin joins the one before it
    return np.asarray(edges)


def _as_fitted(v: _SweepView, hum_harmonics: int | None) -> np.ndarray:
    """The sweep's voltage as the fitter measured it (V): with the mains hum removed by the
    fitter's own :func:`~pipeline.fitters.sweep.remove_hum_where_flat`, from the sweep's step
    onset and steady-state window. Unchanged with ``hum_harmonics`` None or when those windows
    are unknown."""
    volts = v.sweep.voltage
    if not hum_harmonics or v.epoch is None or not v.epoch.usable or v.fit is None:
        return volts
    rate, (ss0, ss1), on = v.sweep.rate, v.fit.ss_window, v.epoch.onset_index
    if not (_finite(ss0) and _finite(ss1)):
        return volts
    ss = (round(ss0 * rate), round(ss1 * rate))
    if not (0 < on <= ss[0] < ss[1] <= volts.size):
        return volts
    return remove_hum_where_flat(volts, rate, on, ss, hum_harmonics)


def _binned_residual(
    v: _SweepView, c: ExpFit, hum_harmonics: int | None
) -> tuple[np.ndarray, np.ndarray] | None:
    """Times (ms from the fit start) and means (mV) of data minus fit in widening bins.

    The data are the trace as the fitter saw it (:func:`_as_fitted`): left in, mains hum
    dominates the early bins and aliases in the wide ones.
    """
    t = v.sweep.time()
    i0, i1 = np.searchsorted(t, [c.t0, c.t1])
    if i1 - i0 < 2:
        return None
    rate = v.sweep.rate
    resid = (_as_fitted(v, hum_harmonics)[i0:i1] - c.curve(t[i0:i1])) * 1e3
    edges = residual_bins(resid.size, rate)
    finite = np.isfinite(resid)
    counts = np.add.reduceat(finite, edges[:-1])
    sums = np.add.reduceat(np.where(finite, resid, 0.0), edges[:-1])
    keep = counts > 0
    if keep.sum() < 2:
        return None
    centre_s = (edges[:-1] + edges[1:] - 1) / 2 / rate + t[i0] - c.t0
    return centre_s[keep] * 1e3, sums[keep] / counts[keep]


def _draw_residuals(ax, views: list[_SweepView], hum_harmonics: int | None) -> None:
    ax.axhline(0, color="0.6", lw=0.8)
    ax.set_xlabel("time from fit start (ms)")
    ax.set_ylabel("data − fit (mV)")
    hum = "hum removed as for the fit; " if hum_harmonics else ""
    _title(ax, f"charging-curve fit residuals ({hum}bin means, bins widen from 0.5 ms)")
    rms, rms_all, curves = [], [], []
    for v in views:
        c: ExpFit | None = v.fit.charging if v.fit is not None else None
        if c is None or not _drawable(c) or v.sweep is None:
            continue
        binned = _binned_residual(v, c, hum_harmonics)
        if binned is None:
            continue
        curves.append((*binned, v.colour if v.used else EXCLUDED_COLOUR))
        if _finite(c.resid_rms):
            (rms if v.used else rms_all).append(c.resid_rms * 1e3)
    if not curves:
        _note(ax, "no charging-curve fits to show")
        return
    xy = [(tt, rr) for tt, rr, _ in curves]
    _lines(ax, xy, [to_rgba(c) for _, _, c in curves], [0.8] * len(xy), ["-"] * len(xy), 2)
    # the sweeps behind tau; fits of sweeps left out are said to be so
    what = f"{len(rms)} used fit{'s' * (len(rms) != 1)}" if rms else "no fit used"
    rms = rms or rms_all
    if rms:
        ax.text(
            0.99, 0.96, f"fit RMS {min(rms):.2f}–{max(rms):.2f} mV, {what}",
            transform=ax.transAxes, ha="right", va="top", fontsize=7,
        )  # fmt: skip


def _draw_baselines(ax, views: list[_SweepView]) -> None:
    """Baseline of each sweep in recording order: drift and jumps at a glance."""
    ax.set_xlabel("sweep number")
    ax.xaxis.set_major_locator(MaxNLocator(8, integer=True))
    ax.set_ylabel("baseline (mV)")
    _title(ax, "baseline before each step")
    sel = [v for v in views if v.fit is not None and _finite(v.fit.baseline_v)]
    if not sel:
        _note(ax, "no baselines measured")
        return
    ax.plot(
        [v.number for v in sel],
        [v.fit.baseline_v * 1e3 for v in sel],
        color="0.5",
        lw=0.8,
        zorder=1,
    )
    ys = [v.fit.baseline_v * 1e3 for v in sel]
    mid, half = (max(ys) + min(ys)) / 2, max((max(ys) - min(ys)) / 2 * 1.15, 2.0)
    ax.set_ylim(mid - half, mid + half)  # at least 4 mV tall: noise must not look like drift
    for used in (True, False):
        pts = [v for v in sel if v.used == used]
        if pts:
            _points(
                ax, [v.number for v in pts], [v.fit.baseline_v * 1e3 for v in pts], "o", 18,
                "0.2" if used else "none", "0.2" if used else EXCLUDED_COLOUR, zorder=2,
            )  # fmt: skip


def _num(x: float, digits: int = 3) -> str:
    """``x`` to ``digits`` significant digits, whole numbers written out (``1300``, not the
    ``1.3e+03`` of ``g``)."""
    text = f"{x:.{digits}g}"
    if "e+" in text and abs(x) < 1e6:  # 999.7 rounds to 1e+03; up to a million: written out
        return f"{x:.0f}"
    return text


def _fmt(value: float, scale: float, unit: str, digits: int = 3) -> str:
    return f"{_num(value * scale, digits)} {unit}" if _finite(value) else "not measured"


def _fmt_ci(value: float, ci: tuple[float, float], scale: float, unit: str) -> str:
    text = _fmt(value, scale, unit)
    if _finite(value) and all(_finite(c) for c in ci):
        text += f" [{_num(ci[0] * scale)}, {_num(ci[1] * scale)}]"
    return text


def _drift_mv(drift_v: float) -> str:
    """A baseline drift as a person reads it: signed, to 10 uV (``+0.00 mV`` when smaller),
    never in exponent notation (``.2g`` gave ``-0.00037`` or ``1.2e+02``)."""
    mv = drift_v * 1e3
    return f"{0.0 if abs(mv) < 0.005 else mv:+.2f} mV"


def _rebound_mv(rebound_v: float) -> str:
    """A rebound as the other values (3 significant digits), but under 5 uV, which rounds to
    ``0.00 mV``, as that: the rounding error of a flat trace read ``6.86e-12 mV``."""
    if _finite(rebound_v) and abs(rebound_v) < 5e-6:
        return "0.00 mV"
    return _fmt(rebound_v, 1e3, "mV")


def _property_lines(
    cell_fit: CellFit | None, views: list[_SweepView], spikes: Any = None
) -> list[str]:
    if cell_fit is None:
        return ["no passive fit for this cell", *_spiking_lines(spikes)]
    f = cell_fit
    sag = f"{f.sag_ratio:.2f}" if _finite(f.sag_ratio) else "not measured"
    if _finite(f.sag_ratio) and _finite(f.sag_step_a):
        sag += f" (at {f.sag_step_a * 1e12:.0f} pA)"
    return [
        f"Vrest      {_fmt(f.vrest_v, 1e3, 'mV')}" + (f"  (drift {_drift_mv(f.vrest_drift_v)})" if _finite(f.vrest_drift_v) else ""),
        f"Rin        {_fmt_ci(f.rin_ohm, f.rin_ci_ohm, 1e-6, 'MΩ')}",
        f"tau        {_fmt_ci(f.tau_s, f.tau_ci_s, 1e3, 'ms')}",
        *_cm_lines(f),
        f"sag ratio  {sag}",
        f"rebound    {_rebound_mv(f.rebound_v)}",
        f"bridge err {_fmt(f.bridge_error_ohm, 1e-6, 'MΩ')}",
        # the sweeps behind Rin, tau and sag (the largest step); cells.csv's n_sweeps_used
        # also counts the spiking sweeps
        f"passive    from {len(f.used)} of {len(views)} sweeps",
        *_spiking_lines(spikes),
        "[ ] = 95% interval",
    ]  # fmt: skip


def _cm_lines(f: CellFit) -> list[str]:
    """The Cm line, naming the resistance it divides tau by: with sag that is the input
    resistance before Ih moves (``rin_frozen_mohm``), not the Rin shown above it."""
    cm = f"Cm         {_fmt_ci(f.cm_f, f.cm_ci_f, 1e12, 'pF')}"
    frozen, rin = f.rin_frozen_ohm, f.rin_ohm
    if not (_finite(frozen) and _finite(rin)) or abs(frozen - rin) <= 0.005 * abs(rin):
        return [f"{cm}  (tau/Rin)"]
    return [cm, f"           tau/R before Ih, R {_fmt(frozen, 1e-6, 'MΩ')}"]


def _spiking_lines(spikes: Any) -> list[str]:
    """Rheobase, rates and first-spike shape from a spiking result (duck-typed), if given."""
    if spikes is None:
        return []
    rheo, sweep = getattr(spikes, "rheobase_a", math.nan), getattr(spikes, "rheobase_sweep", None)
    lines = [
        f"rheobase   {_fmt(rheo, 1e12, 'pA')}" + (f" (sweep {sweep})" if sweep is not None else "")
    ]
    lines.append(f"max rate   {_fmt(getattr(spikes, 'max_rate_hz', math.nan), 1, 'Hz')}")
    first = getattr(spikes, "first_spike", None)
    if first is not None:
        thr = _fmt(getattr(first, "threshold_v", math.nan), 1e3, "mV")
        width = _fmt(getattr(first, "width_s", math.nan), 1e3, "ms", 2)
        lines += [f"1st spike  threshold {thr}", f"           width {width}"]
    return lines


def _wrap_name(text: str, width: int) -> list[str]:
    """A cell id or file name in lines of ``width``: broken at spaces, else cut anywhere (a
    long file name has none, and breaking at its hyphens would split a date)."""
    return textwrap.wrap(text, width, break_on_hyphens=False) or [text]


def _wrapped(items: Iterable[str], width: int, limit: int) -> list[str]:
    lines: list[str] = []
    for item in items:
        lines.extend(textwrap.wrap(str(item), width, initial_indent="• ", subsequent_indent="  "))
    if len(lines) > limit:
        lines = [*lines[: limit - 1], f"  … {len(lines) - limit + 1} more lines (see sweeps.csv)"]
    return lines


def _grouped_reasons(views: list[_SweepView]) -> list[str]:
    """``sweeps 1-3, 7: reason``, one line per distinct reason, in sweep order."""
    groups: dict[str, list[int]] = {}
    for v in views:
        if v.excluded_because:
            groups.setdefault(v.excluded_because, []).append(v.number)
    return [f"{'sweep' if len(n) == 1 else 'sweeps'} {_ranges(n)}: {r}" for r, n in groups.items()]


def _ranges(numbers: list[int]) -> str:
    """[1, 2, 3, 5] -> '1-3, 5'."""
    parts, start = [], numbers[0]
    for prev, cur in zip(numbers, [*numbers[1:], None], strict=True):
        if cur is None or cur != prev + 1:
            parts.append(f"{start}" if start == prev else f"{start}-{prev}")
            start = cur
    return ", ".join(parts)


class _TextColumn:
    """Stacks text blocks top-down in a figure rectangle, in exact line heights (no layout pass).

    Figure-level text, not an axes with its frame turned off: an axes costs ~20 ms to build.
    """

    def __init__(self, fig: Figure, box: Any) -> None:
        self.fig, self.x0, self.y0, self.h = fig, box.x0, box.y0, box.height
        self.y = 1.0  # fraction of the box height, from its bottom
        self.height_pt = box.height * fig.get_figheight() * 72
        self.width_pt = box.width * fig.get_figwidth() * 72

    def chars(self, size: float) -> int:
        """Characters of the monospace font that fit across the box: its advance is 0.6 em,
        which hinting rounds up to whole pixels at low dpi."""
        dpi = self.fig.dpi
        advance_px = math.ceil(0.61 * size * dpi / 72)
        return max(int(self.width_pt * dpi / 72 / advance_px), 20)

    def add(self, lines: Sequence[str], size: float = 8.5, gap: float = 0.6, **kw: Any) -> None:
        if not lines:
            return
        y = self.y0 + self.y * self.h
        self.fig.text(self.x0, y, "\n".join(lines), fontsize=size, va="top", **kw)
        self.y -= (len(lines) * 1.2 + gap) * size / self.height_pt

    def lines_left(self, size: float) -> int:
        return max(int(self.y * self.height_pt / (1.2 * size)), 0)


def _draw_text(box, fig, recording, cell_fit, verdict, views, cell_id: str, spikes: Any) -> None:
    col = _TextColumn(fig, box)
    header = _wrap_name(f"cell {cell_id}", col.chars(9))
    if recording is not None:
        header += _wrap_name(f"file {Path(recording.source_file).name}", col.chars(9))
    col.add(header, 9, family="monospace", weight="bold")
    status = cell_fit.status if cell_fit is not None else "no passive results"
    if status != "ok":
        col.add(
            textwrap.wrap(f"status: {status}", col.chars(8.5)), 8.5, family="monospace",
            color=FAIL_COLOUR,
        )  # fmt: skip
    col.add(_property_lines(cell_fit, views, spikes), 8.5, gap=1.0, family="monospace")
    passed = verdict is not None and verdict.qc_pass and status == "ok"
    word = "QC PASS" if passed else ("QC FAIL" if verdict is not None else "QC: no verdict")
    colour = PASS_COLOUR if passed else FAIL_COLOUR
    pending = list(verdict.deferred) if verdict is not None and status == "ok" else []
    if passed and pending:  # rules on the sheet's columns may still fail it: not a pass yet
        word, colour = "QC: see cells.csv", "0.3"
    col.add([word], 13, gap=0.4, weight="bold", color=colour)
    sections = []
    if pending:
        sections.append(("rules on sheet columns (verdict in cells.csv):", pending))
    if verdict is not None and (verdict.reasons or not passed):
        sections.append(
            ("failed because:", list(verdict.reasons) or ["(the QC verdict gives no reason)"])
        )
    if verdict is not None and verdict.flags:
        # a flag alone never fails a cell; under a failed verdict it is not one of the reasons
        title = "flags (cell still passes):" if passed else "flags (not why it fails):"
        sections.append((title, list(verdict.flags)))
    notes = [n for n in (cell_fit.notes.split("; ") if cell_fit is not None else []) if n]
    if notes:  # what the values leave out (no Vrest sweep, a rounded trace, a reversed sign)
        sections.append(("notes:", notes))
    excluded = _grouped_reasons(views)
    if excluded:
        sections.append(("sweeps not used:", excluded))
    for k, (title, items) in enumerate(sections):
        budget = max((col.lines_left(7.5) - 2 * (len(sections) - k)) // (len(sections) - k), 2)
        col.add([title, *_wrapped(items, col.chars(7.5), budget)], 7.5, gap=0.8, family="monospace")


def _spike_fields(spikes: Any) -> tuple[Any, list[tuple[float, float]]]:
    """Duck-typed spiking result: ``rheobase_sweep`` and ``fi`` points (step A, rate Hz)."""
    rheobase = getattr(spikes, "rheobase_sweep", None)
    raw = getattr(spikes, "fi", None) or ()
    points = []
    for p in raw:
        step = getattr(p, "step_a", None)
        rate = getattr(p, "rate_hz", None)
        if step is None and isinstance(p, Sequence) and len(p) >= 2:
            step, rate = p[0], p[1]
        if _finite(step) and _finite(rate):
            points.append((float(step), float(rate)))
    return rheobase, sorted(points)


def _spike_marks(spikes: Any, sweep: int) -> list[Any]:
    """Detected spikes of one sweep, if the result carries them (``sweeps[*].spikes``)."""
    for r in getattr(spikes, "sweeps", None) or ():
        if getattr(r, "sweep", None) == sweep:
            return list(getattr(r, "spikes", None) or ())
    return []


def _draw_rheobase(ax, fig, views: list[_SweepView], spikes: Any, dpi: float) -> None:
    rheobase, _ = _spike_fields(spikes)
    ax.set_xlabel("time from sweep start (ms)")
    ax.set_ylabel("membrane potential (mV)")
    view = {v.number: v for v in views}.get(int(rheobase)) if _finite(rheobase) else None
    if view is None or view.sweep is None:
        _title(ax, "rheobase sweep")
        why = getattr(spikes, "status", "ok")
        _note(ax, "no sweep evoked a spike" if why == "ok" else f"no spiking values: {why}")
        return
    t, y = envelope(view.sweep.time() * 1e3, view.sweep.voltage * 1e3, _axis_columns(ax, fig, dpi))
    ax.plot(t, y, color="black", lw=0.7)
    marks = _spike_marks(spikes, view.number)
    thr = [
        (m.time_s * 1e3, m.threshold_v * 1e3)
        for m in marks
        if _finite(getattr(m, "threshold_v", None))
    ]
    if thr:
        ax.plot(
            *zip(*thr, strict=True),
            ls="none",
            marker="o",
            ms=3.5,
            color=PEAK_COLOUR,
        )
        _key(
            ax,
            [("threshold", "marker", {"marker": "o", "ms": 3.5, "color": PEAK_COLOUR})],
            "upper right",
        )
    step = getattr(spikes, "rheobase_a", view.step_a)
    step_text = f"{step * 1e12:.0f} pA" if _finite(step) else "step unknown"
    count = f"{len(marks)} spike{'' if len(marks) == 1 else 's'} detected"
    _title(ax, f"rheobase sweep {view.number} ({step_text}), {count}")


def _draw_fi(ax, views: list[_SweepView], spikes: Any) -> None:
    _, points = _spike_fields(spikes)
    ax.set_xlabel("step current (pA)")
    ax.set_ylabel("firing rate (Hz)")
    if not points:
        _title(ax, "f–I")
        _note(ax, "no f–I points")
        return
    ax.plot([p[0] * 1e12 for p in points], [p[1] for p in points], "o-", color="black", ms=4, lw=1)
    top = max(p[1] for p in points)
    slope = getattr(spikes, "fi_slope_hz_per_a", math.nan)
    intercept = getattr(spikes, "fi_intercept_hz", math.nan)
    steps = {v.number: v.step_a for v in views}
    fitted = [steps[n] for n in getattr(spikes, "fi_sweeps", ()) if _finite(steps.get(n))]
    title, entries = "f–I", []
    if _finite(slope) and _finite(intercept) and len(fitted) >= 2:
        x = np.array([min(fitted), max(fitted)])
        line = intercept + slope * x
        ax.plot(x * 1e12, line, color=FAIL_COLOUR, lw=1.2, ls="--")
        top = max(top, float(np.max(line)))  # the line's end stays inside the panel
        entries.append(("slope fit", "line", {"color": FAIL_COLOUR, "lw": 1.2, "ls": "--"}))
        title += f": slope {slope * 1e-9:.0f} Hz/nA over {len(fitted)} steps"
    block = getattr(spikes, "block_step_a", math.nan)
    if _finite(block):  # its rate is not a firing rate: no point, but say where it starts
        ax.axvline(block * 1e12, color=MISSING_COLOUR, lw=1.0, ls=":")
        entries.append(("depolarization block", "line", {"color": MISSING_COLOUR, "ls": ":"}))
        ax.update_datalim([(block * 1e12, 0.0)], updatey=False)
    shrunk = [r.step_a for r in getattr(spikes, "sweeps", ()) if getattr(r, "shrunk", False)]
    if shrunk:  # steps whose spikes shrank below the amplitude rule: no rate, but a mark
        ax.axvline(min(shrunk) * 1e12, color=MISSING_COLOUR, lw=1.0, ls="--")
        entries.append(("spikes too small to count", "line", {"color": MISSING_COLOUR, "ls": "--"}))
        ax.update_datalim([(max(shrunk) * 1e12, 0.0)], updatey=False)
    top = max(top * 1.08, 5.0)
    ax.set_ylim(-0.04 * top, top)  # a little below 0 Hz: silent steps' markers are whole
    if entries:
        _key(ax, entries, "lower right", alpha=0.8)
    _title(ax, title)


def _settle_axes(ax) -> None:
    """Draw the ticks and place the axis labels of a panel as matplotlib would, cheaply.

    Matplotlib's Axis keeps a Tick per tick (two lines, two texts and a grid line) and on
    every draw updates each, lays each label out and measures all of them twice more to
    place the axis label: most of a figure's drawing time. Here, once the limits are
    settled, each axis gets its tick marks as one Line2D (the ticks' own marker style) and
    its tick labels as one :class:`_TickLabels`, at the places ``Text`` computes (same rule,
    same arithmetic); the axis label goes where ``XAxis/YAxis._update_label_position`` puts
    it (``labelpad`` beyond the tick labels, or beyond the spine with its tick marks), and
    the Axis itself is left with no ticks to update. An x axis whose numbers need an offset
    text ("+1e6") keeps matplotlib's ticks, which place that text under themselves.
    ``tests/test_figure_reuse.py`` compares the pixels and label places with matplotlib's.
    """
    fig = ax.get_figure(root=True)
    renderer = fig.canvas.get_renderer()
    px = fig.dpi / 72  # pixels per point
    box = ax.bbox
    for axis in (ax.xaxis, ax.yaxis):
        tick = axis.majorTicks[0]  # drawn ticks share its style
        first = axis.label_position in ("left", "bottom")
        label, mark = (tick.label1, tick.tick1line) if first else (tick.label2, tick.tick2line)
        locator, formatter = axis.get_major_locator(), axis.get_major_formatter()
        locs = [] if isinstance(locator, NullLocator) else list(locator())
        texts = formatter.format_ticks(locs)
        lo, hi = sorted(axis.get_view_interval())
        tol = (hi - lo) * 1e-10  # as matplotlib keeps ticks at the view's edges
        shown = [(x, t) for x, t in zip(locs, texts, strict=True) if lo - tol <= x <= hi + tol]
        stock = axis is ax.xaxis and bool(formatter.get_offset())
        # spine (no width) plus its tick marks, then the tick labels beyond the tick pad
        reach = tick.get_tick_padding() * px if shown and mark.get_visible() else 0.0
        pad = (tick.get_pad() + tick.get_tick_padding()) * px
        prop = label.get_fontproperties()
        for _, text in shown if label.get_visible() else ():
            if axis is ax.yaxis:
                size = renderer.get_text_width_height_descent(text, prop, False)[0] if text else 0.0
            else:
                size = _label_height(renderer, text, prop) if text else 0.0
            reach = max(reach, pad + size)
        reach += axis.labelpad * px
        if axis is ax.xaxis:
            y = box.y0 - reach if first else box.y1 + reach
            axis.set_label_coords(box.x0 + 0.5 * box.width, y, transform=IdentityTransform())
        else:
            x = box.x0 - reach if first else box.x1 + reach
            axis.set_label_coords(x, box.y0 + 0.5 * box.height, transform=IdentityTransform())
        if stock:
            continue  # matplotlib draws these ticks
        at = [x for x, _ in shown]
        on_x = axis is ax.xaxis
        if at and mark.get_visible():
            # the other coordinate is fixed per side, in axes units (0 or 1)
            edge = [(mark.get_ydata() if on_x else mark.get_xdata())[0]] * len(at)
            marks = _kept_artist(ax, ("marks", axis.axis_name), partial(_tick_marks, axis, mark))
            marks.set_data(at if on_x else edge, edge if on_x else at)
        if shown and label.get_visible():
            edge = label.get_position()[1 if on_x else 0]
            anchors = label.get_transform().transform(
                [(x, edge) if on_x else (edge, x) for x in at]
            )
            labels = _kept_artist(
                ax, ("labels", axis.axis_name), partial(_TickLabels, label, axis.get_zorder())
            )
            labels.set_labels(renderer, [t for _, t in shown], anchors)
        axis.set_major_locator(NullLocator())  # the kept rule comes back with the next cell


# Artists that stay in a kept figure's axes from cell to cell (tick marks and labels, panel
# titles), by axes and name: updated in place, hidden when the figure is cleared. Creating,
# adding and removing them for every cell cost ~0.2-0.3 ms each. Weak both ways: the axes
# holds its artists (and they it), so a figure that is let go is collected with them.
_KEPT_ARTISTS: weakref.WeakKeyDictionary = weakref.WeakKeyDictionary()


def _kept_artist(ax, name: tuple, make: Callable[[], Artist]) -> Any:
    """The artist ``name`` of ``ax``, made and added on first use; visible again."""
    kept = _KEPT_ARTISTS.get(ax)
    if kept is None:
        kept = _KEPT_ARTISTS[ax] = weakref.WeakValueDictionary()
    artist = kept.get(name)
    if artist is None:
        artist = kept[name] = make()
        ax.add_artist(artist)
    artist.set_visible(True)
    return artist


def _tick_marks(axis, mark: Line2D) -> Line2D:
    """One Line2D of markers in the axis's tick mark style, on the tick's transform."""
    return Line2D(
        [], [], transform=mark.get_transform(), linestyle="none", marker=mark.get_marker(),
        markersize=mark.get_markersize(), markeredgewidth=mark.get_markeredgewidth(),
        markeredgecolor=mark.get_markeredgecolor(), markerfacecolor=mark.get_markerfacecolor(),
        color=mark.get_color(), alpha=mark.get_alpha(), zorder=axis.get_zorder(), clip_on=False,
    )  # fmt: skip


class _TickLabels(Artist):
    """One axis's tick labels, drawn as ``Text.draw`` draws a one-line label of that style.

    ``template`` is the axis's first tick label (font, colour, alignment, antialiasing);
    ``anchors`` are the labels' positions in display pixels, as the tick transforms give.
    The baseline offsets follow ``Text._get_layout`` for one unrotated line.
    """

    def __init__(self, template, zorder: float) -> None:
        super().__init__()
        self._template, self._prop = template, template.get_fontproperties()
        self.set_zorder(zorder)
        self._items: list[tuple[str, float, float]] = []

    def set_labels(self, renderer, texts, anchors) -> None:
        """Place ``texts`` at ``anchors`` (display pixels), replacing the labels drawn before."""
        template = self._template
        ascent, descent, _ = renderer._get_font_height_metrics(self._prop)
        ha, va = template.get_horizontalalignment(), template.get_verticalalignment()
        self._items = []
        for text, (posx, posy) in zip(texts, anchors, strict=True):
            if not text:
                continue
            w, h, d = renderer.get_text_width_height_descent(text, self._prop, False)
            a = h - d  # ascent of the ink, at least the font's
            if ascent is not None:
                a, d = max(a, ascent), max(d, descent)
            ymin = -a - d  # the line's box: top at 0, baseline at -a
            offsetx = 0 if ha == "left" else w if ha == "right" else w / 2
            offsety = (
                ymin if va == "bottom" else 0 if va == "top" else ymin / 2 if va == "center"
                else ymin + d if va == "baseline" else -a / 2  # "center_baseline"
            )  # fmt: skip
            self._items.append((text, posx - offsetx, (-a - offsety) + posy))

    def draw(self, renderer) -> None:
        if not self.get_visible() or not self._items:
            return
        label = self._template
        gc = renderer.new_gc()
        gc.set_foreground(to_rgba(label.get_color()), isRGBA=True)
        gc.set_alpha(label.get_alpha())
        gc.set_antialiased(label.get_antialiased())
        gc.set_snap(label.get_snap())
        height = renderer.get_canvas_width_height()[1]
        angle = label.get_rotation()
        for text, x, y in self._items:
            renderer.draw_text(
                gc, x, height - y, text, self._prop, angle, ismath=False, mtext=label
            )
        gc.restore()


def _label_height(renderer, text: str, prop) -> float:
    """Height of a one-line text box as ``Text`` lays it out (at least the font's extent)."""
    _, h, d = renderer.get_text_width_height_descent(text, prop, False)
    ascent, descent, _ = renderer._get_font_height_metrics(prop)
    if ascent is None:
        return h
    return max(h - d, ascent) + max(d, descent)


def _tick_rule(axis) -> tuple:
    """The panels' tick rule: few ticks, as each tick is several artists drawn every time.

    Returns (axis, locator, formatter), kept with the figure so that clearing it only puts
    them back where a cell replaced them; the formatter's state (offset, format) is
    recomputed from the ticks at every draw.
    """
    rule = (axis, MaxNLocator(6, steps=[1, 2, 2.5, 5, 10]), ScalarFormatter())
    _apply_rule(rule)
    return rule


def _apply_rule(rule: tuple) -> None:
    axis, locator, formatter = rule
    if axis.get_major_locator() is not locator:
        axis.set_major_locator(locator)
    if axis.get_major_formatter() is not formatter:
        axis.set_major_formatter(formatter)


def _layout(fig: Figure, with_spikes: bool) -> tuple[dict[str, Any], Any, list]:
    """Build the panels once per figure: the axes by name, the text column's box, tick rules."""
    rows = 3 if with_spikes else 2
    heights = [1.25, 1.0, 1.0][:rows]
    gs = fig.add_gridspec(
        rows, 3, width_ratios=[2.1, 1.25, 1.15], height_ratios=heights,
        left=0.055, right=0.99, top=0.93, bottom=0.07 if not with_spikes else 0.05,
        wspace=0.34, hspace=0.42,
    )  # fmt: skip
    # Fixed positions (no layout engine); the colour bar's slot is cut from the traces panel.
    traces = gs[0, 0].get_position(fig)
    bar_w, gap = 0.035 * traces.width, 0.01 * traces.width
    axes = {
        "traces": fig.add_axes((traces.x0, traces.y0, traces.width - bar_w - gap, traces.height)),
        "iv": fig.add_subplot(gs[0, 1]),
        "resid": fig.add_subplot(gs[1, 0]),
        "baseline": fig.add_subplot(gs[1, 1]),
        "colourbar": fig.add_axes(
            (traces.x1 - bar_w * 0.55, traces.y0, bar_w * 0.55, traces.height)
        ),
    }
    if with_spikes:
        axes["spike_sweep"] = fig.add_subplot(gs[2, 0])
        axes["fi"] = fig.add_subplot(gs[2, 1])
    cax = axes["colourbar"]
    cax.yaxis.tick_right()
    cax.yaxis.set_label_position("right")
    cax.tick_params(labelsize=7)
    cax.set_visible(False)
    rules = [_tick_rule(axis) for ax in axes.values() for axis in (ax.xaxis, ax.yaxis)]
    for ax in axes.values():
        if to_rgba(ax.get_facecolor()) == to_rgba(fig.get_facecolor()) == (1, 1, 1, 1):
            ax.patch.set_visible(False)  # white on white: a full fill per panel for nothing
    return axes, gs[:, 2].get_position(fig), rules


@dataclass
class _KeptFigure:
    """A built figure kept for the next cell of the same layout: axes and ticks stay."""

    fig: Figure
    axes: dict[str, Any]
    text_box: Any
    tick_rules: list

    def clear(self) -> None:
        """Back to the state :func:`_layout` left: no artists (but the kept ones of
        :func:`_kept_artist`, hidden), limits, legends or tick rules.

        What a cell changes is undone here; :func:`test_figure_reuse` checks pixel for
        pixel that a cell drawn after others equals the same cell in a fresh figure.
        """
        for text in [*self.fig.texts]:
            text.remove()
        for ax in self.axes.values():
            if ax.get_legend() is not None:
                ax.get_legend().remove()
            kept = set(_KEPT_ARTISTS.get(ax, {}).values())
            for artist in [
                *ax.lines,
                *ax.patches,
                *ax.collections,
                *ax.texts,
                *ax.images,
                *ax.artists,
            ]:
                if artist in kept:
                    artist.set_visible(False)  # back when the next cell uses it
                else:
                    artist.remove()
            ax.set_prop_cycle(None)
            ax.dataLim.set_points(Bbox.null().get_points())
            ax.ignore_existing_data_limits = True
            ax.set_xlim(0.0, 1.0, auto=True)  # as a new axes: (0, 1), autoscaled
            ax.set_ylim(0.0, 1.0, auto=True)
            for axis in (ax.xaxis, ax.yaxis):
                axis.label.set_text("")
        for rule in self.tick_rules:
            _apply_rule(rule)
        self.axes["colourbar"].set_visible(False)


_KEPT = threading.local()
_MAX_KEPT = 4  # layouts kept per thread (with and without spikes, a dpi or two)


def clear_figure_cache() -> None:
    """Forget this thread's kept figures and renderers: the next figure is built anew."""
    _KEPT.value = {}
    _RENDERERS.value = {}


class _Drawing:
    """What a draw in progress has changed for the whole process (the rcParams it set and the
    collector it paused), for a child forked meanwhile by another thread to undo."""

    rc_before: dict[str, Any] | None = None
    gc_paused = False  # the collector was on when the first of the draws under way paused it
    gc_depth = 0  # draws under way (threads) that want it paused
    gc_lock = threading.Lock()


def _in_forked_child() -> None:
    """A forked child starts with no kept figure and nothing of a draw in progress.

    The kept renderers hold the parent's fonts (in their glyph layouts), which read glyphs
    lazily by seek and read on the font file; a child shares those files' offsets with its
    parent and siblings, so two workers loading glyphs at once read each other's bytes
    (FreeType: "invalid outline", "too many hints") and lose the figure. matplotlib clears its
    own font cache at a fork for the same reason. A child forked while another thread drew
    would also inherit the draw lock held (for ever: that thread is not in the child), the
    figure's rcParams and a paused collector.
    """
    global _DRAW_LOCK
    clear_figure_cache()
    _DRAW_LOCK = threading.Lock()
    if _Drawing.rc_before is not None:
        matplotlib.rcParams.update(_Drawing.rc_before)
        _Drawing.rc_before = None
    if _Drawing.gc_paused:
        gc.enable()
    _Drawing.gc_paused, _Drawing.gc_depth = False, 0
    _Drawing.gc_lock = threading.Lock()  # perhaps held by a thread the child does not have


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_in_forked_child)


def _kept_figure(cfg: FigureSettings, with_spikes: bool) -> _KeptFigure:
    """This thread's figure for the layout, built on first use (under the figure's rcParams)."""
    height = cfg.height_in + (cfg.spikes_height_in if with_spikes else 0.0)
    key = (cfg.width_in, height, cfg.dpi, with_spikes)
    pages = getattr(_KEPT, "value", None)
    if pages is None:
        pages = _KEPT.value = {}
    page = pages.pop(key, None)
    if page is None:
        fig = Figure(figsize=(cfg.width_in, height), dpi=cfg.dpi)
        _Canvas(fig)
        page = _KeptFigure(fig, *_layout(fig, with_spikes))
    while len(pages) >= _MAX_KEPT:
        pages.pop(next(iter(pages)))  # the least recently used
    return page


def _keep(cfg: FigureSettings, with_spikes: bool, page: _KeptFigure) -> None:
    height = cfg.height_in + (cfg.spikes_height_in if with_spikes else 0.0)
    _KEPT.value[(cfg.width_in, height, cfg.dpi, with_spikes)] = page


_RENDERERS = threading.local()
# No font hinting: a third less time per text object (glyphs are drawn unhinted, as in a PDF).
_RC = {
    "text.parse_math": False,
    "font.size": 8.5,
    "axes.titlesize": 9,
    "text.hinting": "no_hinting",
}


def _glyph_api() -> bool:
    """Whether this matplotlib lays out and renders glyphs one by one as 3.11 does.

    :class:`_TextRenderer` repeats those private steps to keep their result; with another
    matplotlib it draws text the stock way.
    """
    from matplotlib import ft2font
    from matplotlib.backends import backend_agg

    font = ft2font.FT2Font
    return (
        hasattr(RendererAgg, "_draw_text_glyphs_and_boxes")
        and hasattr(RendererAgg, "_prepare_font")
        and hasattr(backend_agg, "get_hinting_flag")
        and hasattr(ft2font, "RenderMode")
        and all(hasattr(font, n) for n in ("_layout", "_set_transform", "_render_glyph"))
    )


_GLYPHS_ONE_BY_ONE = _glyph_api()
_UNROTATED = np.array([[0x10000, 0], [0, 0x10000]])  # FreeType's 16.16 identity matrix
_SHAPED_CATEGORIES = ("Mn", "Me", "Cf")  # Unicode: non-spacing and enclosing marks, format
_CLEAR_OF_COVER = 1.0 - np.arange(256) / 255.0  # glyph coverage (0-255) -> light let through
_MAX_TEXT_BITMAPS = 4096  # per renderer; a text line's bitmap is a few kB


class _TextRenderer(RendererAgg):
    """Agg renderer that keeps each drawn text line as one bitmap and reuses it.

    Matplotlib 3.11 lays a string out and renders and composites it glyph by glyph on every
    draw (~1 ms per tick label). The same tick labels, axis labels and titles come back in
    every figure, so the line's glyphs are rendered once, merged into one coverage bitmap
    and composited in one call. The bitmap depends on the text, font, size, dpi, angle,
    antialiasing, hinting and the position's fraction of a pixel (FreeType's 1/64 steps),
    all of which are in the key; whole-pixel moves only move the bitmap. Where glyph boxes
    overlap, coverage is merged as two blends would be, which can differ from stock drawing
    by one level of 255.
    """

    def __init__(self, width: int, height: int, dpi: float) -> None:
        super().__init__(width, height, dpi)
        self._bitmaps: dict[tuple, tuple[np.ndarray | None, int, int]] = {}
        self._layouts: dict[tuple, list] = {}
        self._glyphs: dict[tuple, tuple[int, int, np.ndarray]] = {}
        self._heights: dict[tuple, tuple[float, float, float] | tuple[None, None, None]] = {}
        self._widths: dict[tuple, tuple[float, float, float]] = {}
        self._boxes: dict[tuple, tuple[tuple[int, int, int, int], int]] = {}
        self._font_rc: tuple = ()

    def clear(self) -> None:
        """Start a draw; forget what was kept if the font or text settings changed.

        The keys name fonts by their properties; which file that finds (and its hinting)
        depends on these settings.
        """
        super().clear()
        rc = matplotlib.rcParams
        # keys first: reading every value would resolve "backend" and import pyplot
        font_rc = tuple(str(rc[k]) for k in rc if k.startswith(("font.", "text.")))
        if font_rc != self._font_rc:
            kept_all = (self._bitmaps, self._layouts, self._glyphs, self._heights, self._widths,
                        self._boxes)  # fmt: skip
            for kept in kept_all:
                kept.clear()
            self._font_rc = font_rc

    def get_text_width_height_descent(self, s, prop, ismath) -> tuple[float, float, float]:
        """Width, height and descent of one line of text (pixels), kept per text and font.

        Text layout and the keys and axis labels all measure through here; one FreeType
        layout of a string costs ~0.3 ms.
        """
        if ismath:
            return super().get_text_width_height_descent(s, prop, ismath)
        key = (s, _prop_key(prop))
        extent = self._widths.get(key)
        if extent is None:
            if len(self._widths) >= _MAX_TEXT_BITMAPS:
                self._widths.clear()
            extent = self._measure(s, prop) if _GLYPHS_ONE_BY_ONE else None
            if extent is None:
                extent = super().get_text_width_height_descent(s, prop, False)
            self._widths[key] = extent
        return extent

    def _measure(self, s: str, prop) -> tuple[float, float, float] | None:
        """What ``FT2Font.set_text`` measures, from the layout :meth:`draw_text` keeps.

        The width is where the pen ends (the last glyph's place plus its advance); height and
        descent come from the union of the glyphs' control boxes at their places. A new
        string then costs one FreeType layout instead of two. None (the caller measures the
        stock way) when there is nothing to lay out, when the string has combining marks or
        format characters or a character drawn as several glyphs (there the shaper's advances
        differ from the glyphs' own), or when the private API differs.
        ``tests/test_figure_reuse.py`` compares it with the stock measure.
        """
        from matplotlib.backends.backend_agg import get_hinting_flag

        if any(unicodedata.category(ch) in _SHAPED_CATEGORIES for ch in s):
            return None  # marks and format characters: the shaper's advances differ
        flags = get_hinting_flag()
        line = (s, _prop_key(prop), self.dpi, flags, None, None)
        try:
            items = self._layouts.get(line) or self._glyph_layout(line, s, prop, flags, None, None)
            if not items or len(items) > len(s):
                return None  # nothing to lay out, or a character made of several glyphs
            size = prop.get_size_in_points()
            low, high = math.inf, -math.inf
            for ft_object, glyph_index, _, dy in items:
                box, _ = self._glyph_box(ft_object, glyph_index, size, flags)
                low = min(low, box[1] + round(64 * dy))
                high = max(high, box[3] + round(64 * dy))
            ft_object, glyph_index, dx, _ = items[-1]
            advance = self._glyph_box(ft_object, glyph_index, size, flags)[1]
        except (AttributeError, TypeError, ValueError):
            return None
        return (round(64 * dx) + advance) / 64, (high - low) / 64, -low / 64

    def _glyph_box(self, ft_object, glyph_index: int, size: float, flags) -> tuple:
        """A glyph's control box (26.6 subpixels, at the origin) and advance, kept."""
        key = (ft_object.fname, size, self.dpi, glyph_index, flags)
        kept = self._boxes.get(key)
        if kept is None:
            ft_object.set_size(size, self.dpi)
            ft_object._set_transform(_UNROTATED, [0, 0])  # drawing leaves its own transform
            glyph = ft_object.load_glyph(glyph_index, flags)
            if len(self._boxes) >= _MAX_TEXT_BITMAPS:
                self._boxes.clear()
            kept = self._boxes[key] = (tuple(glyph.bbox), glyph.horiAdvance)
        return kept

    def _text_width(self, s: str, prop) -> float:
        return self.get_text_width_height_descent(s, prop, False)[0]

    def _get_font_height_metrics(self, prop) -> tuple:
        """Ascent, descent and line gap of a font (pixels), kept per font and size.

        ``Text`` asks the renderer for these if it can answer (a hook matplotlib's PDF and
        PS backends use); otherwise it reads them from the font's tables on every layout,
        ~0.1 ms per text. Same values as that reading (``matplotlib.text.Text._get_layout``).
        """
        key = _prop_key(prop)
        metrics = self._heights.get(key)
        if metrics is None:
            metrics = self._heights[key] = _font_height_metrics(prop, self.dpi)
        return metrics

    def draw_text(self, gc, x, y, s, prop, angle, ismath=False, mtext=None) -> None:
        global _GLYPHS_ONE_BY_ONE
        if ismath or angle not in (0, 90) or not _GLYPHS_ONE_BY_ONE:
            # other angles: glyph offsets are not whole 1/64 px, so a bitmap would not repeat
            return super().draw_text(gc, x, y, s, prop, angle, ismath, mtext)
        from matplotlib.backends.backend_agg import get_hinting_flag

        features = mtext.get_fontfeatures() if mtext is not None else None
        language = mtext.get_language() if mtext is not None else None
        flags = get_hinting_flag()
        antialiased = bool(gc.get_antialiased())
        tx, ty = round(64 * x), round(64 * (self.height - y))  # 26.6 fixed point, y upwards
        line = (s, _prop_key(prop), self.dpi, flags, _hashable(features), _hashable(language))
        key = (line, angle, antialiased, tx & 63, ty & 63)
        entry = self._bitmaps.get(key)
        if entry is None:
            try:
                items = self._layouts.get(line)
                if items is None:
                    items = self._glyph_layout(line, s, prop, flags, features, language)
                entry = self._line_bitmap(items, prop, x, y, angle, antialiased, flags,
                                          tx >> 6, ty >> 6)  # fmt: skip
            except (AttributeError, TypeError, ValueError):
                _GLYPHS_ONE_BY_ONE = False  # private API changed: stock drawing from now on
                return super().draw_text(gc, x, y, s, prop, angle, ismath, mtext)
            if len(self._bitmaps) >= _MAX_TEXT_BITMAPS:
                self._bitmaps.pop(next(iter(self._bitmaps)))
            self._bitmaps[key] = entry
        image, left, top = entry
        if image is not None:
            top += ty >> 6
            # draw_text_image's y is downwards and the bitmap's bottom side
            self._renderer.draw_text_image(
                image, (tx >> 6) + left, int(self.height) - top + image.shape[0], 0, gc
            )

    def _glyph_layout(self, line: tuple, s, prop, flags, features, language) -> list:
        """The glyphs of a line and their offsets, as ``RendererAgg.draw_text`` lays them out."""
        font = self._prepare_font(prop)
        items = [
            (item.ft_object, item.glyph_index, item.x, item.y)
            for item in font._layout(s, flags=flags, features=features, language=language)
        ]
        if len(self._layouts) >= _MAX_TEXT_BITMAPS:
            self._layouts.pop(next(iter(self._layouts)))
        self._layouts[line] = items
        return items

    def _line_bitmap(
        self, items, prop, x, y, angle, antialiased, flags, bx, by
    ) -> tuple[np.ndarray | None, int, int]:
        """Render the glyphs as ``RendererAgg._draw_text_glyphs_and_boxes`` does; merge them.

        Returns the merged coverage (uint8) and its left and top pixel relative to the
        whole-pixel part of the position (``bx``, ``by``; y upwards).
        """
        from matplotlib.ft2font import RenderMode

        size = prop.get_size_in_points()
        cos, sin = math.cos(math.radians(angle)), math.sin(math.radians(angle))
        matrix = (0x10000 * np.array([[cos, -sin], [sin, cos]])).round().astype(int)
        mode = RenderMode.NORMAL if antialiased else RenderMode.MONO
        glyphs = []
        for ft_object, glyph_index, dx, dy in items:
            gx = round(0x40 * (x + dx * cos - dy * sin))
            gy = round(0x40 * (self.height - y + dx * sin + dy * cos))
            # a glyph's bitmap depends on its position's fraction of a pixel only
            key = (
                ft_object.fname,
                size,
                self.dpi,
                glyph_index,
                flags,
                mode,
                angle,
                gx & 63,
                gy & 63,
            )
            glyph = self._glyphs.get(key)
            if glyph is None:
                ft_object.set_size(size, self.dpi)
                ft_object._set_transform(matrix, [gx, gy])
                bitmap = ft_object._render_glyph(glyph_index, flags, mode)
                cover = np.array(bitmap.buffer)
                if not antialiased:
                    cover *= 255
                if len(self._glyphs) >= _MAX_TEXT_BITMAPS:
                    self._glyphs.pop(next(iter(self._glyphs)))
                glyph = self._glyphs[key] = (bitmap.left - (gx >> 6), bitmap.top - (gy >> 6), cover)
            if glyph[2].size:
                glyphs.append((glyph[0] + (gx >> 6), glyph[1] + (gy >> 6), glyph[2]))
        if not glyphs:
            return None, 0, 0
        left, top = min(g[0] for g in glyphs), max(g[1] for g in glyphs)
        right = max(g[0] + g[2].shape[1] for g in glyphs)
        bottom = min(g[1] - g[2].shape[0] for g in glyphs)
        clear = np.ones((top - bottom, right - left))  # 1 - coverage, as successive blends
        for g_left, g_top, cover in glyphs:
            r, c = top - g_top, g_left - left
            clear[r : r + cover.shape[0], c : c + cover.shape[1]] *= _CLEAR_OF_COVER[cover]
        image = np.round(255.0 * (1.0 - clear)).astype(np.uint8)
        return image, left - bx, top - by


def _prop_key(prop) -> tuple:
    """A snapshot of a FontProperties (they are mutable, so not kept as keys themselves)."""
    return (
        tuple(prop.get_family()), prop.get_style(), prop.get_variant(), prop.get_weight(),
        prop.get_stretch(), prop.get_size_in_points(), prop.get_file(),
    )  # fmt: skip


def _font_height_metrics(prop, dpi: float) -> tuple:
    """As ``Text._get_layout`` reads them: OS/2 typographic metrics, else hhea, else None."""
    from matplotlib.font_manager import fontManager, get_font

    font = get_font(fontManager._find_fonts_by_props(prop))
    for table_name, gap, ascent, descent in (
        ("OS/2", "sTypoLineGap", "sTypoAscender", "sTypoDescender"),
        ("hhea", "lineGap", "ascent", "descent"),
    ):
        table = font.get_sfnt_table(table_name)
        if table is None:
            continue
        scale = 1 / font.get_sfnt_table("head")["unitsPerEm"] * prop.get_size_in_points() * dpi / 72
        return table[ascent] * scale, -table[descent] * scale, table[gap] * scale
    return None, None, None


def _hashable(value: Any) -> Any:
    if value is None or isinstance(value, str):
        return value
    return tuple(tuple(v) if isinstance(v, list) else v for v in value)


class _Canvas(FigureCanvasAgg):
    """Agg canvas that reuses this thread's renderer for figures of the same pixel size.

    Matplotlib caches text extents per renderer, and :class:`_TextRenderer` keeps text
    bitmaps: with a fresh renderer per figure every label would be measured and rendered
    again. Writes PNGs with :func:`png_bytes`.
    """

    def get_renderer(self) -> RendererAgg:
        w, h = self.get_width_height(physical=True)
        key = (w, h, self.figure.dpi)
        kept = getattr(_RENDERERS, "value", None)
        if kept is None:
            kept = _RENDERERS.value = {}
        renderer = kept.get(key)
        if renderer is None:
            while len(kept) >= _MAX_KEPT:
                kept.pop(next(iter(kept)))
            renderer = kept[key] = _TextRenderer(w, h, self.figure.dpi)
        self.renderer = renderer
        return renderer

    def print_png(
        self, filename_or_obj: Any, *, metadata: Any = None, pil_kwargs: Any = None, **_: Any
    ) -> None:
        """Draw and write an RGBA PNG, as matplotlib's own writer does (savefig's facecolor
        etc. are already applied).

        The canvas buffer is encoded as it is: dropping its opaque alpha would cost a copy
        that takes longer than deflating the extra, constant channel.
        """
        from matplotlib.cbook import open_file_cm

        FigureCanvasAgg.draw(self)
        rgba = np.asarray(self.renderer.buffer_rgba())
        level = (pil_kwargs or {}).get("compress_level", 1)
        with open_file_cm(filename_or_obj, "wb") as fh:
            fh.write(png_bytes(rgba, self.figure.dpi, level))


def _deflater() -> Any:
    """ISA-L's deflate (the ``isal`` package) when installed, else the standard library's zlib.

    Both write standard zlib streams. On these plots ISA-L's level 1 is ~7x faster than zlib's
    fastest levels, for files ~15 % larger; zlib is the fallback where isal has no wheel.
    """
    try:
        from isal import isal_zlib
    except ImportError:  # pragma: no cover - isal is a declared dependency
        return zlib
    return isal_zlib


_DEFLATE = _deflater()


def png_bytes(image: np.ndarray, dpi: float = 100.0, level: int = 1) -> bytes:
    """Encode an RGB or RGBA image as a PNG, losslessly, every row with the "Up" filter.

    Pillow tries all five PNG filters on every row, which is most of its encoding time; one
    fixed filter compresses these plots (white, straight edges, thin lines) as well, twice as
    fast. PNG layout: ISO/IEC 15948 (W3C PNG spec).

    Parameters
    ----------
    image : numpy.ndarray
        (height, width, 3) RGB or (height, width, 4) RGBA uint8 pixels (straight alpha, as
        Agg's buffer holds them), top row first.
    dpi : float
        Resolution stored in the ``pHYs`` chunk, dots per inch.
    level : int
        Deflate level: 0-3 with ISA-L (higher levels are taken as 3), 0-9 with zlib.

    Returns
    -------
    bytes
        The PNG file.
    """
    image = np.ascontiguousarray(image, dtype=np.uint8)  # the filter is 3x slower if strided
    h, w, channels = image.shape
    if channels not in (3, 4):
        raise ValueError(f"png_bytes needs RGB or RGBA pixels, not {channels} channels")
    rows = np.empty((h, 1 + channels * w), np.uint8)
    rows[:, 0] = 2  # filter type "Up": each byte minus the byte above it
    pixels = rows[:, 1:].reshape(h, w, channels)
    pixels[0] = image[0]
    np.subtract(image[1:], image[:-1], out=pixels[1:], dtype=np.uint8)
    per_metre = round(dpi / 0.0254)
    if _DEFLATE is not zlib:
        level = min(max(level, 0), 3)

    def chunk(tag: bytes, data: bytes) -> bytes:
        return struct.pack(">I", len(data)) + tag + data + struct.pack(">I", zlib.crc32(tag + data))

    return b"".join(
        (
            b"\x89PNG\r\n\x1a\n",
            # 8 bits per sample; colour type 2 is RGB, 6 RGBA
            chunk(b"IHDR", struct.pack(">IIBBBBB", w, h, 8, 2 if channels == 3 else 6, 0, 0, 0)),
            chunk(b"pHYs", struct.pack(">IIB", per_metre, per_metre, 1)),
            chunk(b"IDAT", _DEFLATE.compress(rows, level)),  # the buffer itself, not a copy
            chunk(b"IEND", b""),
        )
    )


def cell_figure(
    recording: Recording | None,
    epochs: Sequence[StepEpoch] | Mapping[int, StepEpoch] | None,
    cell_fit: CellFit | None,
    verdict: CellVerdict | None,
    path: str | Path,
    *,
    spikes: Any = None,
    settings: FigureSettings | Mapping[str, Any] | None = None,
    dpi: float | None = None,
) -> None:
    """Draw one cell's QC figure and write it as a PNG (atomically).

    Panels: the sweeps overlaid (hyperpolarizing ones coloured by step current) with the fitted
    charging curves and the fit, steady-state and baseline windows; the I-V plot (steady-state
    and peak deflection vs step current) with the fitted line and the 95% interval of its slope,
    excluded sweeps hollow grey; the fit residuals; the baseline of each sweep; the properties
    with their intervals and the QC verdict with its reasons and the excluded sweeps; with
    ``spikes``, the rheobase sweep and the f-I curve. Whatever is missing (NaN values, failed
    fits, no sweeps, ``status != "ok"``) is drawn as far as it exists and named in its panel.

    Parameters
    ----------
    recording : Recording or None
        The cell's sweeps (V, s); None when they could not be read.
    epochs : sequence or mapping of StepEpoch, or None
        Step epochs, one per sweep (matched by sweep number).
    cell_fit : CellFit or None
        Passive results (SI units).
    verdict : CellVerdict or None
        QC outcome.
    path : str or pathlib.Path
        Destination PNG; its folder must exist.
    spikes : object, optional
        Spiking result with ``rheobase_sweep`` (sweep number or None) and ``fi`` (points with
        ``step_a`` in A and ``rate_hz`` in Hz, or ``(step_a, rate_hz)`` pairs).
    settings : FigureSettings or Mapping, optional
        Size, resolution, colour map.
    dpi : float, optional
        Resolution, dots per inch; overrides ``settings.dpi``.
    """
    cfg = _settings(settings, dpi)
    # absurd results (inf, huge) are drawn or skipped, not raised
    with np.errstate(all="ignore"), _gc_paused():
        _cell_figure(recording, epochs, cell_fit, verdict, Path(path), spikes, cfg)


@contextlib.contextmanager
def _gc_paused():
    """No cyclic garbage collection while a figure is built and drawn.

    A figure allocates tens of thousands of small objects; each allocation burst starts
    collections that walk the whole heap of a worker (imported libraries included), ~10 % of the
    figure's time. The figure's own garbage is collected once it is done.
    """
    with _Drawing.gc_lock:  # counted: the last of several drawing threads turns it back on
        if _Drawing.gc_depth == 0:
            _Drawing.gc_paused = gc.isenabled()
            gc.disable()
        _Drawing.gc_depth += 1
    try:
        yield
    finally:
        with _Drawing.gc_lock:
            _Drawing.gc_depth -= 1
            if _Drawing.gc_depth == 0 and _Drawing.gc_paused:
                gc.enable()
                _Drawing.gc_paused = False


def _cell_figure(
    recording, epochs, cell_fit, verdict, path: Path, spikes, cfg: FigureSettings
) -> None:
    with_spikes = spikes is not None
    # One figure at a time per process: rc_context changes the global rcParams.
    with _DRAW_LOCK:
        _Drawing.rc_before = {k: matplotlib.rcParams[k] for k in _RC}
        try:
            with matplotlib.rc_context(_RC):
                page = _kept_figure(cfg, with_spikes)
                _draw_kept(page, recording, epochs, cell_fit, verdict, path, spikes, cfg)
                # kept only when drawn and cleared without error: a failure may leave any state
                page.clear()
                _keep(cfg, with_spikes, page)
        finally:
            _Drawing.rc_before = None


_DRAW_LOCK = threading.Lock()


def _draw_kept(
    page: _KeptFigure, recording, epochs, cell_fit, verdict, path: Path, spikes, cfg: FigureSettings
) -> None:
    fig, axes = page.fig, page.axes
    cell_id = (
        recording.cell_id if recording is not None else (cell_fit.cell_id if cell_fit else "?")
    )
    views = _sweep_views(recording, _epoch_map(epochs), cell_fit, verdict, cfg.step_cmap)
    fig.text(0.055, 0.985, cell_id, fontsize=12, ha="left", va="top", weight="bold")
    _draw_traces(axes["traces"], fig, views, cell_fit, cfg.dpi)
    _draw_colourbar(axes["colourbar"], views, cfg.step_cmap)
    _draw_iv(axes["iv"], views, cell_fit)
    _draw_residuals(axes["resid"], views, cfg.hum_harmonics)
    _draw_baselines(axes["baseline"], views)
    _draw_text(page.text_box, fig, recording, cell_fit, verdict, views, cell_id, spikes)
    if spikes is not None:
        _draw_rheobase(axes["spike_sweep"], fig, views, spikes, cfg.dpi)
        _draw_fi(axes["fi"], views, spikes)
    for ax in axes.values():
        if ax.get_visible():
            _settle_axes(ax)
    with atomic_path(path) as tmp:
        fig.savefig(
            tmp,
            format="png",
            dpi=cfg.dpi,
            pil_kwargs={"compress_level": cfg.png_compress_level},
        )
