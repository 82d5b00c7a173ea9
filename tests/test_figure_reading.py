"""A cell figure must not mislead the person checking it: what each number is computed from,
which fits were used, where the text and key sit. Each case is one a reviewer found wrong."""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
from matplotlib.collections import LineCollection
from matplotlib.colors import to_rgba
from matplotlib.figure import Figure
from matplotlib.patches import FancyBboxPatch

import tests.test_report_figures as base
from pipeline.qc import CellVerdict
from pipeline.report.figures import (
    EXCLUDED_COLOUR,
    FIT_COLOUR,
    _Canvas,
    _draw_colourbar,
    _draw_iv,
    _draw_residuals,
    _draw_text,
    _draw_traces,
    _epoch_map,
    _fmt_ci,
    _layout,
    _property_lines,
    _step_norm,
    _sweep_views,
)


def _views(rec, epochs, fit, verdict):
    return _sweep_views(rec, _epoch_map(epochs), fit, verdict, "viridis")


def _axes(size=(6, 3), dpi=60):
    fig = Figure(figsize=size, dpi=dpi)
    _Canvas(fig)  # the figures' own canvas: its renderer answers font metrics
    return fig, fig.add_subplot()


def test_cm_line_names_the_resistance_tau_is_divided_by():
    # With sag, Cm = tau / R before Ih moves (rin_frozen), not tau / Rin: the figure showed
    # "(tau/Rin)" beside a Cm 2.5x off tau/Rin.
    rec, epochs, fit, verdict = base.fake_cell()
    sagging = dataclasses.replace(fit, rin_frozen_ohm=2 * fit.rin_ohm, cm_f=fit.tau_s / 300e6)
    lines = _property_lines(sagging, _views(rec, epochs, sagging, verdict))
    text = "\n".join(lines)
    assert "(tau/Rin)" not in text
    assert "tau/R before Ih, R 300 MΩ" in text
    # without sag (R frozen equal to Rin, or not measured) the plain label stays
    for frozen in (fit.rin_ohm, math.nan):
        plain = dataclasses.replace(fit, rin_frozen_ohm=frozen)
        assert "(tau/Rin)" in "\n".join(_property_lines(plain, _views(rec, epochs, plain, verdict)))


def test_large_values_are_written_out_not_in_exponent_notation():
    assert _fmt_ci(1.3e9, (1.19e9, 1.41e9), 1e-6, "MΩ") == "1300 MΩ [1190, 1410]"
    assert _fmt_ci(44.6e6, (43.9e6, 45.2e6), 1e-6, "MΩ") == "44.6 MΩ [43.9, 45.2]"


def _texts(fig, verdict, cell_id="cell01", reasons=None, source=None):
    rec, epochs, fit, _ = base.fake_cell(cell_id)
    if source is not None:
        rec = dataclasses.replace(rec, source_file=source)
    if reasons is not None:
        fit = dataclasses.replace(fit, excluded=reasons)
    views = _views(rec, epochs, fit, verdict)
    _, box, _ = _layout(fig, False)
    _draw_text(box, fig, rec, fit, verdict, views, cell_id, None)
    return fig.texts


def test_flags_under_a_failed_verdict_do_not_say_the_cell_passes():
    fig = Figure(figsize=(15, 8.6), dpi=50)
    _Canvas(fig)
    verdict = CellVerdict(False, reasons=("Rin 3 MΩ below 30",), flags=("tau from 2 sweeps",))
    text = "\n".join(t.get_text() for t in _texts(fig, verdict))
    assert "QC FAIL" in text and "still passes" not in text
    assert "flags (not why it fails):" in text


def test_the_cells_notes_are_on_its_figure_and_a_flat_rebound_reads_zero():
    # the notes (a rounded trace, a reversed current, no Vrest sweep) were in cells.csv only,
    # and a rebound of float rounding error read "6.86e-12 mV"
    rec, epochs, fit, verdict = base.fake_cell()
    noted = dataclasses.replace(
        fit, notes="voltage on a grid of 1 mV steps; no charging fit on the small steps",
        rebound_v=6.86e-15,
    )  # fmt: skip
    fig = Figure(figsize=(15, 8.6), dpi=50)
    _Canvas(fig)
    _, box, _ = _layout(fig, False)
    _draw_text(box, fig, rec, noted, verdict, _views(rec, epochs, noted, verdict), "c", None)
    text = "\n".join(t.get_text() for t in fig.texts)
    assert "notes:\n• voltage on a grid of 1 mV steps\n• no charging fit on the small steps" in text
    assert "rebound    0.00 mV" in text


@pytest.mark.parametrize("dpi", [60, 100])
def test_the_text_column_stays_inside_the_figure(dpi):
    # long ids, file names and exclusion reasons were cut at the figure's right edge
    fig = Figure(figsize=(15, 8.6), dpi=dpi)
    canvas = _Canvas(fig)
    reasons = {k: f"baseline noise 1.{k}0 mV RMS above 0.5 mV; charging-curve fit R² 0.7" for k in
               range(1, 8)}  # fmt: skip
    name = "2026-03-14_animalA1_slice3_cell12_layer5_rig2_run1"
    verdict = CellVerdict(False, reasons=("no usable hyperpolarizing sweep " * 3,))
    texts = _texts(fig, verdict, name, reasons, f"/data/{name}.nwb")
    renderer = canvas.get_renderer()
    width = fig.get_figwidth() * dpi
    for t in texts:
        assert t.get_window_extent(renderer).x1 <= width, t.get_text()
    # nothing was dropped by the wrapping: the whole name is there, the date in one piece
    joined = "".join(t.get_text().replace("\n", "") for t in texts)
    assert name in joined and "2026-03-14" in "\n".join(t.get_text() for t in texts)


def test_the_step_colour_scale_covers_every_step():
    # the scale stopped at a tenth of the largest step: a -10 pA sweep of a -200..-10 pA
    # series got a colour missing from the bar, and its tick stretched the bar
    norm = _step_norm([-200e-12, -100e-12, -10e-12])
    assert norm(-200.0) == 0.0 and norm(-10.0) == 1.0
    rec, epochs, fit, verdict = base.fake_cell()
    views = _views(rec, epochs, fit, verdict)
    fig, cax = _axes()
    _draw_colourbar(cax, views, "viridis")
    lo, hi = cax.get_ylim()
    steps = [v.step_a * 1e12 for v in views if v.step_a < 0]
    assert (lo, hi) == pytest.approx((min(steps), max(steps)))


def test_no_colour_bar_when_no_sweep_is_drawn_in_colour():
    rec, epochs, fit, verdict = base.fake_cell()
    every = {f.sweep: "baseline noise 1.6 mV RMS above 0.5 mV" for f in fit.sweeps}
    fit = dataclasses.replace(fit, excluded=every, used=())
    fig, cax = _axes()
    cax.set_visible(False)  # as the kept layout leaves the slot
    _draw_colourbar(cax, _views(rec, epochs, fit, verdict), "viridis")
    assert not cax.get_visible()


def _dashed_colours(ax):
    out = []
    for c in ax.collections:
        # dashed (the fits), not dotted (excluded traces): dashes longer than 2 points
        if isinstance(c, LineCollection) and any(d[1] and d[1][0] > 2 for d in c.get_linestyles()):
            out += [tuple(x) for x in c.get_colors()]
    return out


def test_fits_of_sweeps_not_used_are_drawn_apart_and_not_counted():
    rec, epochs, fit, verdict = base.fake_cell()
    views = _views(rec, epochs, fit, verdict)
    fig, ax = _axes()
    _draw_traces(ax, fig, views, fit, 60.0)
    colours = _dashed_colours(ax)
    n_used = sum(1 for v in views if v.used and v.step_a < 0)
    n_unused = sum(1 for v in views if not v.used and v.step_a < 0)  # sweep 2, excluded
    assert colours.count(to_rgba(FIT_COLOUR)) == n_used
    assert colours.count(to_rgba(EXCLUDED_COLOUR)) == n_unused == 1
    labels = [t.get_text() for t in ax.get_children() if hasattr(t, "get_text")]
    assert "fit of a sweep not used" in labels
    fig, ax = _axes()
    _draw_residuals(ax, views, None)
    note = [t.get_text() for t in ax.texts if "fit RMS" in t.get_text()]
    assert note and note[0].endswith(f"{n_used} used fits")


def test_the_trace_key_goes_where_it_covers_the_fewest_traces(monkeypatch):
    # a step that ends late puts the plateaus in the lower right corner, where the key sat
    # whatever the traces; hyperpolarizing sweeps only, so the panel's top has room
    monkeypatch.setattr(base, "OFFSET", 1.45)
    rec, epochs, fit, verdict = base.fake_cell(n_sweeps=5)
    views = _views(rec, epochs, fit, verdict)
    fig, ax = _axes((8, 4), 60)
    _draw_traces(ax, fig, views, fit, 60.0)
    frame = next(a for a in ax.get_children() if isinstance(a, FancyBboxPatch))
    w, h = frame.get_width(), frame.get_height()
    pts = np.concatenate(
        [np.column_stack([s.time() * 1e3, s.voltage * 1e3])[::20] for s in rec.sweeps]
    )
    pts = ax.transData.transform(pts)

    def covered(x0, y0):
        inside = (
            (pts[:, 0] >= x0) & (pts[:, 0] <= x0 + w) & (pts[:, 1] >= y0) & (pts[:, 1] <= y0 + h)
        )
        return int(inside.sum())

    box = ax.bbox
    lower_right = covered(box.x1 - w - 5, box.y0 + 5)
    assert lower_right > 100  # the case: the old place hid the plateaus
    # no place is free here (the panel is fitted to the traces): the least covered one wins
    assert covered(frame.get_x(), frame.get_y()) < lower_right / 1.5


def test_a_curved_iv_is_drawn_as_its_tangent_near_rest_and_said_so():
    # Rin of a bent V-I relation is the slope at 0 pA; drawn over the whole range as
    # "steady-state fit" it missed the far points and looked like a bad fit
    rec, epochs, fit, verdict = base.fake_cell()
    fit = dataclasses.replace(fit, rin_method="quadratic")
    views = _views(rec, epochs, fit, verdict)
    fig, ax = _axes()
    _draw_iv(ax, views, fit)
    line = next(ln for ln in ax.lines if ln.get_color() == FIT_COLOUR and len(ln.get_xdata()) > 2)
    used = [v.step_a * 1e12 for v in views if v.used]
    assert min(line.get_xdata()) == pytest.approx(min(used) / 2)
    labels = [t.get_text() for t in ax.get_children() if hasattr(t, "get_text")]
    assert any(lab.startswith("slope at 0 pA (quadratic fit)") for lab in labels)


def test_fi_panel_keeps_its_fit_line_and_markers_inside_and_marks_block():
    # the slope line ran above the panel's top, silent steps' markers were cut in half at
    # 0 Hz, and a step in depolarization block (no rate) was dropped without a mark
    from types import SimpleNamespace

    from pipeline.report.figures import MISSING_COLOUR, _draw_fi

    rec, epochs, fit, verdict = base.fake_cell()
    views = _views(rec, epochs, fit, verdict)
    steps = {v.number: v.step_a for v in views}
    fi = [SimpleNamespace(step_a=steps[n], rate_hz=r) for n, r in ((11, 0.0), (12, 10.0),
          (13, 20.0), (14, 30.0))]  # fmt: skip
    spikes = SimpleNamespace(
        fi=fi, fi_sweeps=(12, 13, 14), fi_slope_hz_per_a=6e11, fi_intercept_hz=-60.0,
        block_step_a=steps[15],
    )  # fmt: skip
    fig, ax = _axes()
    _draw_fi(ax, views, spikes)
    lo, hi = ax.get_ylim()
    line_top = -60.0 + 6e11 * steps[14]  # 36 Hz at 160 pA, above the highest point
    assert lo < 0 and hi >= line_top
    block = [ln for ln in ax.lines if ln.get_color() == MISSING_COLOUR]
    assert block and block[0].get_xdata()[0] == pytest.approx(steps[15] * 1e12)


def test_fi_panel_marks_the_steps_whose_spikes_shrank_too_small_to_count():
    # such a step has no rate (its count is not one): the f-I points simply stopped before it
    from types import SimpleNamespace

    from pipeline.report.figures import MISSING_COLOUR, _draw_fi

    rec, epochs, fit, verdict = base.fake_cell()
    views = _views(rec, epochs, fit, verdict)
    steps = {v.number: v.step_a for v in views}
    fi = [SimpleNamespace(step_a=steps[n], rate_hz=r) for n, r in ((11, 0.0), (12, 10.0))]
    rows = [SimpleNamespace(step_a=steps[n], shrunk=n >= 13) for n in (11, 12, 13, 14)]
    spikes = SimpleNamespace(fi=fi, sweeps=rows)
    fig, ax = _axes()
    _draw_fi(ax, views, spikes)
    marks = [ln for ln in ax.lines if ln.get_color() == MISSING_COLOUR]
    assert marks and marks[0].get_xdata()[0] == pytest.approx(steps[13] * 1e12)
    assert ax.get_xlim()[1] >= steps[14] * 1e12
    labels = [t.get_text() for t in ax.findobj(lambda a: hasattr(a, "get_text"))]
    assert "spikes too small to count" in labels


def test_overlapping_draws_in_two_threads_leave_the_collector_as_they_found_it():
    # a flag, not a count: the second thread's draw recorded "was off", the first one's end
    # turned the collector on mid-draw, and a child forked then kept it off for good
    import gc
    import threading

    from pipeline.report.figures import _Drawing, _gc_paused, _in_forked_child

    assert gc.isenabled()
    first_in, second_in, first_out = threading.Event(), threading.Event(), threading.Event()
    seen = {}

    def first():
        with _gc_paused():
            first_in.set()
            second_in.wait(10)
        first_out.set()

    def second():
        first_in.wait(10)
        with _gc_paused():
            second_in.set()
            first_out.wait(10)
            seen["during"] = gc.isenabled()
            seen["flag"] = _Drawing.gc_paused

    threads = [threading.Thread(target=f) for f in (first, second)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(20)
    assert seen == {"during": False, "flag": True}  # still paused for the second draw
    assert gc.isenabled() and _Drawing.gc_depth == 0
    # a child forked while another thread drew turns it back on (the state it inherits, and
    # the fork's handler, set up by hand: the drawing thread is not in the child)
    gc.disable()
    _Drawing.gc_paused, _Drawing.gc_depth = True, 1
    _in_forked_child()
    assert gc.isenabled() and _Drawing.gc_depth == 0 and not _Drawing.gc_paused


def test_values_just_below_a_thousand_are_not_in_exponent_notation():
    from pipeline.report.figures import _num

    assert _num(999.7) == "1000" and _num(999.4) == "999"
