"""Kept figures and text bitmaps: a cell drawn after others equals the cell drawn from scratch.

``cell_figure`` keeps one figure per layout and thread (axes and ticks stay, the cell's
artists go) and its renderer keeps text bitmaps. These tests draw each cell in a new figure
(``clear_figure_cache``) and after other cells of every kind, and ask for the same pixels.
"""

from __future__ import annotations

import dataclasses
import io
import math
import sys
import threading

import matplotlib
import numpy as np
import pytest
from matplotlib.figure import Figure
from PIL import Image
from test_report_figures import ONSET, RATE, fake_cell

import pipeline.report.figures as figures
from pipeline.fitters.results import CellFit, ExpFit, SweepFit
from pipeline.fitters.spikes import Spike, SpikeFit, SweepSpiking
from pipeline.qc import CellVerdict
from pipeline.recording import Recording, Sweep
from pipeline.report.figures import cell_figure, clear_figure_cache
from pipeline.steps import StepEpoch

DPI = 40  # small pictures; the drawing code is the same at any resolution


def _cells() -> dict[str, tuple[tuple, dict]]:
    """Cells that leave different state behind: (positional args, keyword args)."""
    rec, epochs, fit, verdict = fake_cell("A")
    other = fake_cell("B", n_sweeps=5, seed=2)
    spike = Spike(0.25, -0.045, 0.03, 0.2505, 0.075, 8e-4, 0.01, 2e-3, 300.0, -150.0, True)
    spiking = SpikeFit(
        cell_id="A", sweeps=(SweepSpiking(sweep=12, step_a=120e-12, analysed=True, spikes=(spike,) * 3, rate_hz=12.5),),
        rheobase_a=120e-12, rheobase_sweep=12,
        fi=((120e-12, 12.5), (140e-12, 25.0), (160e-12, 37.5)), fi_slope_hz_per_a=6.25e11,
        fi_intercept_hz=-62.5, fi_sweeps=(12, 13, 14),
    )  # fmt: skip
    silent = SpikeFit(cell_id="B", status="no depolarizing sweep")
    nan_sweeps = tuple(
        SweepFit(sweep=f.sweep, step_a=f.step_a, reason="fit did not converge") for f in fit.sweeps
    )
    failed = CellFit(
        "nofit", nan_sweeps, excluded={s.sweep: "did not converge" for s in nan_sweeps}
    )
    failed_verdict = CellVerdict(False, reasons=("no usable sweep",), excluded=failed.excluded)
    error = CellFit(cell_id="err", sweeps=(), status="error: sweeps have different rates")
    bad_rec = Recording(
        "bad", "bad.nwb", "e0", (Sweep(np.array([]), None, RATE, 1), Sweep(np.full(100, np.nan), None, RATE, 2))
    )  # fmt: skip
    bad_exp = ExpFit(ONSET, ONSET + 0.1, -1e-4, math.inf, math.nan, -3.0, math.inf)
    weird = dataclasses.replace(
        fit, sweeps=tuple(dataclasses.replace(f, charging=bad_exp) for f in fit.sweeps),
        rin_ohm=-5e6, rin_ci_ohm=(math.inf, -math.inf), iv_slope_ohm=math.inf, tau_s=math.nan,
    )  # fmt: skip
    stray = [*epochs, StepEpoch(99, False, "ramp", "a ramp, not a step", 0, 0, 0, 0, 0, 0)]
    far = 1_000_000  # sweep numbers the baseline axis writes with an offset ("+1e6")
    renumbered = (
        dataclasses.replace(rec, sweeps=tuple(dataclasses.replace(w, number=w.number + far) for w in rec.sweeps)),
        [dataclasses.replace(e, sweep=e.sweep + far) for e in epochs],
        dataclasses.replace(
            fit, sweeps=tuple(dataclasses.replace(f, sweep=f.sweep + far) for f in fit.sweeps),
            used=tuple(u + far for u in fit.used), excluded={k + far: r for k, r in fit.excluded.items()},
        ),
        dataclasses.replace(verdict, excluded={k + far: r for k, r in verdict.excluded.items()}),
    )  # fmt: skip
    return {
        "normal": ((rec, epochs, fit, verdict), {}),
        "other": (other, {}),
        "spiking": ((rec, epochs, fit, verdict), {"spikes": spiking}),
        "spiking, other cell": (other, {"spikes": SpikeFit(cell_id="B")}),
        "silent": ((rec, epochs, fit, verdict), {"spikes": silent}),
        "failed fits": ((rec, epochs, failed, failed_verdict), {}),
        "failed fits, spiking row": ((rec, epochs, failed, failed_verdict), {"spikes": silent}),
        "error": ((rec, [], error, CellVerdict(False, reasons=(error.status,))), {}),
        "no recording": ((None, None, None, None), {}),
        "no recording, spiking row": ((None, None, None, None), {"spikes": silent}),
        "NaN samples": ((bad_rec, None, CellFit("bad", (), status="error: NaN"), None), {}),
        "absurd values": ((rec, stray, weird, CellVerdict(False)), {}),
        "offset tick labels": (renumbered, {}),
    }


def _draw(cell: tuple[tuple, dict], path) -> np.ndarray:
    args, kwargs = cell
    cell_figure(*args, path, dpi=DPI, **kwargs)
    return np.asarray(Image.open(path))


@pytest.fixture(scope="module")
def fresh(tmp_path_factory) -> dict[str, np.ndarray]:
    """Each cell drawn in a new figure with a new renderer (no kept text bitmaps)."""
    out = tmp_path_factory.mktemp("fresh")
    pictures = {}
    for name, cell in _cells().items():
        clear_figure_cache()
        pictures[name] = _draw(cell, out / "fresh.png")
    clear_figure_cache()
    return pictures


def _differs(a: np.ndarray, b: np.ndarray) -> str:
    if a.shape != b.shape:
        return f"shape {a.shape} != {b.shape}"
    rows, cols = np.nonzero(np.any(a != b, axis=-1))
    return f"{rows.size} pixels differ, in rows {rows.min()}-{rows.max()}, columns {cols.min()}-{cols.max()}"


def test_kept_figure_draws_each_cell_as_a_new_one(tmp_path, fresh):
    cells = _cells()
    names = list(cells)
    order = names + names[::-1]  # each cell after two different ones
    clear_figure_cache()
    seen_figures = set()
    for k, name in enumerate(order):
        picture = _draw(cells[name], tmp_path / "kept.png")
        assert np.array_equal(picture, fresh[name]), (
            f"{name} after {order[k - 1] if k else 'nothing'}: {_differs(picture, fresh[name])}"
        )
        seen_figures |= {id(p.fig) for p in figures._KEPT.value.values()}
    # the figures were kept: one per layout (with and without the spiking row), not per cell
    assert len(seen_figures) == 2


def test_figure_after_a_failed_draw(tmp_path, fresh, monkeypatch):
    """A draw that fails half-way must not leave its artists in the next cell's figure."""
    cells = _cells()
    clear_figure_cache()
    _draw(cells["other"], tmp_path / "x.png")

    def broken(self, *args, **kwargs):
        raise OSError("disk full")

    with monkeypatch.context() as patch:
        patch.setattr(Figure, "savefig", broken)
        with pytest.raises(OSError, match="disk full"):
            _draw(cells["spiking"], tmp_path / "y.png")
        with pytest.raises(OSError, match="disk full"):
            _draw(cells["normal"], tmp_path / "y.png")
    for name in ("normal", "spiking"):
        assert np.array_equal(_draw(cells[name], tmp_path / "z.png"), fresh[name]), name


def test_figures_let_go_are_collected(tmp_path, monkeypatch):
    """Figures dropped after a failed draw or by clear_figure_cache are freed (a kept
    artist must not hold its axes, and so its figure, alive)."""
    import gc
    import weakref

    cells = _cells()
    clear_figure_cache()
    _draw(cells["normal"], tmp_path / "a.png")
    dropped = [weakref.ref(p.fig) for p in figures._KEPT.value.values()]

    def broken(self, *args, **kwargs):
        raise OSError("disk full")

    with monkeypatch.context() as patch:
        patch.setattr(Figure, "savefig", broken)
        with pytest.raises(OSError, match="disk full"):
            _draw(cells["normal"], tmp_path / "b.png")  # this page is not kept
    clear_figure_cache()
    gc.collect()
    assert dropped and all(ref() is None for ref in dropped)
    assert not any(ax.figure for ax in figures._KEPT_ARTISTS.keys())


def test_threads_keep_their_own_figures(tmp_path, fresh):
    """Dask workers may draw in several threads: each thread's figures give the same pixels."""
    cells = _cells()
    names = list(cells)
    start = threading.Barrier(3)
    results: dict[int, list] = {}

    def work(k: int) -> None:
        order = names[k:] + names[:k]
        start.wait()
        clear_figure_cache()
        results[k] = [(n, _draw(cells[n], tmp_path / f"t{k}.png")) for n in order]
        results[k].append(("pages", {id(p.fig) for p in figures._KEPT.value.values()}))

    threads = [threading.Thread(target=work, args=(k,)) for k in range(3)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    pages = set()
    for k in range(3):
        *drawn, (_, ids) = results[k]
        pages |= ids
        assert len(drawn) == len(names)
        for name, picture in drawn:
            assert np.array_equal(picture, fresh[name]), f"thread {k}, {name}"
    assert len(pages) == 6  # two layouts in each of three threads


# -- text bitmaps against matplotlib's own glyph-by-glyph text drawing ----------------------


def _text_figure() -> Figure:
    """Texts of every kind the figures use (and some they do not), at fractional positions."""
    fig = Figure(figsize=(6, 4), dpi=100)
    figures._Canvas(fig)
    ax = fig.add_axes((0.1, 0.1, 0.5, 0.5))
    ax.set_xlabel("time from sweep start (ms)")
    ax.set_ylabel("ΔV from baseline (mV)")
    ax.plot([0, 1], [0, 1])
    ax.legend(["fitted charging curve"], fontsize=7)
    ax.text(0.9, 0.5, "clipped against the axes edge", clip_on=True, fontsize=10)
    samples = [
        ("QC PASS", {"fontsize": 13, "weight": "bold", "color": "#1a7f37"}),
        ("Rin  134 MΩ [132, 137]\nCm   82.3 pF", {"family": "monospace"}),
        ("fit finished: office, fiddle", {"style": "italic", "fontsize": 9}),
        ("● ▲ − … • ½", {"fontsize": 8, "alpha": 0.5}),
        ("not antialiased", {"antialiased": False, "fontsize": 9}),
        ("step current (pA)", {"rotation": 90, "fontsize": 8}),
        ("at thirty degrees", {"rotation": 30}),
        ("   ", {}),
        ("", {}),
    ]
    for k, (text, style) in enumerate(samples):
        for j, dx in enumerate((0.0, 0.37 / 600, 1 / 600, 0.37 / 600 + 3 / 600)):
            fig.text(0.62 + dx + 0.09 * (j % 2), 0.95 - 0.1 * k - 0.02 * j, text, **style)
    return fig


def _png(fig: Figure) -> np.ndarray:
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png")
    return np.asarray(Image.open(buffer)).astype(int)


@pytest.mark.skipif(not figures._glyph_api(), reason="this matplotlib renders text whole")
def test_text_bitmaps_match_stock_drawing(monkeypatch):
    clear_figure_cache()
    cached = _png(_text_figure())
    renderer = next(iter(figures._RENDERERS.value.values()))
    assert len(renderer._bitmaps) > 10  # the bitmaps were made and used
    again = _png(_text_figure())  # now from kept bitmaps
    clear_figure_cache()
    monkeypatch.setattr(figures, "_GLYPHS_ONE_BY_ONE", False)
    stock = _png(_text_figure())
    assert not next(iter(figures._RENDERERS.value.values()))._bitmaps
    assert np.array_equal(again, cached)
    diff = np.abs(cached - stock)
    ink = np.any(stock < 250, axis=-1).sum()
    # only where two glyph boxes overlap may merged coverage round differently
    assert diff.max() <= 2 and np.any(diff > 0, axis=-1).sum() < 0.002 * ink
    clear_figure_cache()


# -- ticks drawn and axis labels placed by the figure code, against matplotlib's Axis -------


def _label_places(cell, path, monkeypatch=None) -> tuple[dict, np.ndarray]:
    """Where each axis label and offset text ends up (display pixels), and the picture."""
    clear_figure_cache()
    kept: dict = {}
    draw_page = figures._draw_kept

    def spy(page, *args):
        draw_page(page, *args)  # draws and writes the PNG; the page is cleared after this
        for name, ax in page.axes.items():
            if ax.get_visible():
                for axis in (ax.xaxis, ax.yaxis):
                    for what, label in (("label", axis.label), ("offset", axis.offsetText)):
                        kept[(name, axis.axis_name, what)] = (
                            label.get_text(),
                            *label.get_transform().transform(label.get_position()),
                        )

    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(figures, "_draw_kept", spy)
        if monkeypatch is not None:
            patch.setattr(figures, "_settle_axes", monkeypatch)
        picture = _draw(cell, path)
    clear_figure_cache()
    return kept, picture


@pytest.mark.parametrize(
    ("name", "dpi"),
    [("normal", 40), ("spiking", 40), ("failed fits, spiking row", 40), ("absurd values", 40),
     ("offset tick labels", 40), ("spiking", 100)],
)  # fmt: skip
def test_ticks_and_axis_labels_as_matplotlib_draws_them(tmp_path, name, dpi, monkeypatch):
    """The figure's own tick drawing and label placing give matplotlib's Axis's pixels.

    With ``_settle_axes`` switched off, matplotlib's Axis draws the ticks and places each
    axis label itself (measuring all tick labels to find the place).
    """
    monkeypatch.setattr(sys.modules[__name__], "DPI", dpi)
    cell = _cells()[name]
    ours, drawn = _label_places(cell, tmp_path / "ours.png")
    theirs, stock = _label_places(cell, tmp_path / "theirs.png", monkeypatch=lambda ax: None)
    assert np.array_equal(drawn, stock), _differs(drawn, stock)
    assert ours.keys() == theirs.keys() and len(ours) >= 20
    for key, (text, *place) in ours.items():
        assert text == theirs[key][0], key
        if text:  # an empty text's place does not matter
            assert place == pytest.approx(theirs[key][1:], abs=1e-6), key
    if name == "offset tick labels":
        assert ours[("baseline", "x", "offset")][0] == "+1e6"


@pytest.mark.skipif(not figures._glyph_api(), reason="this matplotlib renders text whole")
@pytest.mark.parametrize(
    "style",
    [
        {"family": "DejaVu Sans"},
        {"family": "monospace"},
        {"family": "monospace", "weight": "bold"},
        {"family": "DejaVu Sans", "weight": "bold"},
        {"family": "DejaVu Sans", "style": "italic"},
    ],
)
def test_text_measured_from_the_kept_layout_as_freetype_measures_it(style):
    """Width, height and descent from the kept layout equal the stock measure (set_text)."""
    import random

    from matplotlib.backends.backend_agg import RendererAgg
    from matplotlib.font_manager import FontProperties

    chars = "abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789 .,;:()[]{}-+−–=/%°µΩΔ●▲•…½'\"_"
    rng = random.Random(5)
    texts = [
        "   ",
        " a",
        "a ",
        "Rin        118 MΩ [116, 119]",
        "office fiddle AVATAR Te",
        "−20",
        "j",
    ]
    texts += ["".join(rng.choice(chars) for _ in range(rng.randint(1, 40))) for _ in range(40)]
    # left to the stock measure: a combining mark, format characters, characters of two glyphs
    others = ["x\u0301", "cell\u00ad", "a\u200bb", "\ufeffid", "\u01fa", "\u01fb x"]
    with matplotlib.rc_context(figures._RC):
        ours = figures._TextRenderer(200, 100, 100.0)
        stock = RendererAgg(200, 100, 100.0)
        ours.clear()
        for size in (7, 8.5, 13):
            prop = FontProperties(size=size, **style)
            for text in texts:
                got = ours._measure(text, prop)
                want = RendererAgg.get_text_width_height_descent(stock, text, prop, False)
                assert got == want, (text, size)
            for text in others:
                want = RendererAgg.get_text_width_height_descent(stock, text, prop, False)
                assert ours._measure(text, prop) in (None, want), text
                assert ours.get_text_width_height_descent(text, prop, False) == want, text
        assert ours._measure("", FontProperties(size=8)) is None  # measured the stock way
