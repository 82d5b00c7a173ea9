"""Cell figures: written for normal, failed-fit and error cells; safe, distinct file names."""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest
from matplotlib.image import imread

from pipeline.fitters.results import CellFit, ExpFit, SweepFit
from pipeline.qc import CellVerdict
from pipeline.recording import Recording, Sweep
from pipeline.report.figures import (
    FAIL_COLOUR,
    PASS_COLOUR,
    _drift_mv,
    cell_figure,
    column_bands,
    envelope,
    figure_names,
    residual_bins,
    safe_name,
)
from pipeline.steps import StepEpoch

RATE = 20_000.0
ONSET, OFFSET, LENGTH = 0.2, 1.0, 1.5  # s
RIN, TAU, VREST = 150e6, 0.02, -0.070  # ohm, s, V


def fake_cell(
    cell_id: str = "cell01", n_sweeps: int = 15, seed: int = 1
) -> tuple[Recording, list[StepEpoch], CellFit, CellVerdict]:
    """An RC cell (Rin 150 MOhm, tau 20 ms) with steps -100..+180 pA, spikes above +100 pA,
    and the results an ideal fitter would report; sweep 2 is excluded."""
    rng = np.random.default_rng(seed)
    t = np.arange(int(LENGTH * RATE)) / RATE
    i0, i1 = int(ONSET * RATE), int(OFFSET * RATE)
    sweeps, epochs, fits = [], [], []
    for k in range(n_sweeps):
        step = (-100 + 20 * k) * 1e-12
        dv = step * RIN
        v = np.full_like(t, VREST)
        on = (t >= ONSET) & (t < OFFSET)
        v[on] += dv * (1 - np.exp(-(t[on] - ONSET) / TAU))
        after = t >= OFFSET
        v[after] += dv * (1 - np.exp(-(OFFSET - ONSET) / TAU)) * np.exp(-(t[after] - OFFSET) / TAU)
        if step > 100e-12:  # a few crude spikes so the clipping and spike panels have work
            for ts in np.arange(ONSET + 0.05, OFFSET, 0.08):
                v += 0.11 * np.exp(-(((t - ts) / 4e-4) ** 2))
        v += rng.normal(0, 2e-4, t.size)
        current = np.where(on, step, 0.0)
        sweeps.append(Sweep(v, current, RATE, k + 1))
        epochs.append(StepEpoch(k + 1, True, "step", "", 0.0, step, ONSET, OFFSET, i0, i1))
        passive = step < 0
        charging = ExpFit(ONSET, ONSET + 5 * TAU, TAU, -dv, VREST + dv, 0.999, 2e-4)
        fits.append(
            SweepFit(
                sweep=k + 1,
                step_a=step,
                baseline_v=VREST + rng.normal(0, 3e-4),
                ss_dv=dv if step <= 100e-12 else math.nan,
                peak_dv=dv * 1.04 if passive else math.nan,
                ss_window=(OFFSET - 0.1, OFFSET),
                baseline_window=(0.05, ONSET),
                charging=charging if passive else ExpFit(),
                rin_ohm=RIN if step != 0 else math.nan,
                reason="" if passive else "not a hyperpolarizing step",
            )
        )
    used = tuple(f.sweep for f in fits if f.step_a < 0 and f.sweep != 2)
    cell = CellFit(
        cell_id=cell_id,
        sweeps=tuple(fits),
        used=used,
        excluded={2: "baseline moved 2.4 mV during the sweep"},
        vrest_v=VREST,
        rin_ohm=RIN,
        rin_ci_ohm=(RIN * 0.96, RIN * 1.04),
        iv_slope_ohm=RIN,
        iv_intercept_v=float(np.mean([f.baseline_v for f in fits if f.sweep in used])),
        tau_s=TAU,
        tau_ci_s=(TAU * 0.97, TAU * 1.03),
        cm_f=TAU / RIN,
        cm_ci_f=(TAU / RIN * 0.95, TAU / RIN * 1.05),
        sag_ratio=0.04,
        sag_step_a=-100e-12,
        bridge_error_ohm=2e6,
    )
    verdict = CellVerdict(True, flags=("tau from 4 sweeps only",), excluded=dict(cell.excluded))
    recording = Recording(cell_id, f"/data/day/{cell_id}.nwb", "e0", tuple(sweeps))
    return recording, epochs, cell, verdict


def _colour_pixels(img: np.ndarray, hex_colour: str, tol: float = 0.04) -> int:
    rgb = np.array([int(hex_colour[i : i + 2], 16) for i in (1, 3, 5)]) / 255
    return int(np.all(np.abs(img[..., :3] - rgb) < tol, axis=-1).sum())


def _png(path: Path) -> np.ndarray:
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    return imread(path)


def test_normal_cell_figure(tmp_path):
    rec, epochs, fit, verdict = fake_cell()
    out = tmp_path / "cell01.png"
    cell_figure(rec, epochs, fit, verdict, out, dpi=100)
    img = _png(out)
    # 15 x 8.6 in at 100 dpi
    assert img.shape[:2] == (860, 1500)
    # the PASS colour (#1a7f37) is on the page: the verdict was drawn
    # the verdict is drawn in the PASS colour, and nothing in the FAIL colour
    assert _colour_pixels(img, PASS_COLOUR) > 50 and _colour_pixels(img, FAIL_COLOUR) == 0
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]


def test_figure_with_spikes_is_taller(tmp_path):
    rec, epochs, fit, verdict = fake_cell()
    spikes = SimpleNamespace(
        rheobase_sweep=12,
        fi=[
            SimpleNamespace(step_a=(20 * k - 100) * 1e-12, rate_hz=12.5 * (k - 10))
            for k in range(11, 15)
        ],
    )
    cell_figure(rec, epochs, fit, verdict, tmp_path / "s.png", spikes=spikes, settings={"dpi": 60})
    assert _png(tmp_path / "s.png").shape[:2] == (int(round((8.6 + 3.6) * 60)), 900)
    # tuple points and a missing rheobase are accepted too
    cell_figure(
        rec,
        epochs,
        fit,
        verdict,
        tmp_path / "s2.png",
        spikes=SimpleNamespace(rheobase_sweep=None, fi=[(1e-10, 5.0)]),
        dpi=40,
    )
    _png(tmp_path / "s2.png")


def test_iv_line_starts_at_zero_deflection():
    """The fitter's intercept is the membrane potential at zero current (the mean baseline);
    on the ΔV axis the line must start at 0."""
    from pipeline.report.figures import _iv_offset_v, _sweep_views

    rec, epochs, fit, verdict = fake_cell()
    views = _sweep_views(rec, {e.sweep: e for e in epochs}, fit, verdict, "viridis")
    assert abs(_iv_offset_v(views, fit.iv_intercept_v)) < 1e-12
    assert _iv_offset_v(views, fit.iv_intercept_v + 1e-3) == pytest.approx(1e-3)


def test_figure_with_spike_fit_record(tmp_path):
    """The spiking panels read the real SpikeFit record (duck-typed), spikes marked."""
    from pipeline.fitters.spikes import Spike, SpikeFit, SweepSpiking

    rec, epochs, fit, verdict = fake_cell()
    spike = Spike(0.25, -0.045, 0.03, 0.2505, 0.075, 8e-4, 0.01, 2e-3, 300.0, -150.0, True)
    rheo = SweepSpiking(sweep=12, step_a=120e-12, analysed=True, spikes=(spike,) * 3, rate_hz=12.5)
    spikes = SpikeFit(
        cell_id="cell01", sweeps=(rheo,), rheobase_a=120e-12, rheobase_sweep=12,
        fi=((120e-12, 12.5), (140e-12, 25.0), (160e-12, 37.5)), fi_slope_hz_per_a=6.25e11,
        fi_intercept_hz=-62.5, fi_sweeps=(12, 13, 14),
    )  # fmt: skip
    cell_figure(rec, epochs, fit, verdict, tmp_path / "spk.png", spikes=spikes, dpi=60)
    img = _png(tmp_path / "spk.png")
    assert img.shape[0] == round((8.6 + 3.6) * 60)
    # the f-I slope line is drawn in the FAIL colour (dashed red)
    assert _colour_pixels(img, FAIL_COLOUR, 0.08) > 10
    silent = SpikeFit(cell_id="cell01", status="no depolarizing sweep")
    cell_figure(rec, epochs, fit, verdict, tmp_path / "silent.png", spikes=silent, dpi=40)
    _png(tmp_path / "silent.png")


def test_failed_fits_figure(tmp_path):
    rec, epochs, fit, _ = fake_cell("nofit")
    nan_sweeps = tuple(
        SweepFit(sweep=f.sweep, step_a=f.step_a, reason="fit did not converge") for f in fit.sweeps
    )
    failed = CellFit(
        cell_id="nofit",
        sweeps=nan_sweeps,
        excluded={s.sweep: "fit did not converge" for s in nan_sweeps},
    )
    verdict = CellVerdict(
        False, reasons=("no usable hyperpolarizing sweep",), excluded=failed.excluded
    )
    out = tmp_path / "nofit.png"
    cell_figure(rec, epochs, failed, verdict, out, dpi=80)
    img = _png(out)
    assert _colour_pixels(img, FAIL_COLOUR) > 50 and _colour_pixels(img, PASS_COLOUR) == 0


def test_error_cell_figure(tmp_path):
    rec, epochs, fit, _ = fake_cell("err")
    error = CellFit(cell_id="err", sweeps=(), status="error: sweeps have different rates")
    cell_figure(
        rec, [], error, CellVerdict(False, reasons=(error.status,)), tmp_path / "err.png", dpi=50
    )
    _png(tmp_path / "err.png")
    # nothing at all: no recording, no fit, no verdict
    cell_figure(None, None, None, None, tmp_path / "none.png", dpi=40)
    _png(tmp_path / "none.png")
    # a recording with an empty sweep and NaN samples
    bad = Recording(
        "bad",
        "bad.nwb",
        "e0",
        (Sweep(np.array([]), None, RATE, 1), Sweep(np.full(100, np.nan), None, RATE, 2)),
    )
    cell_figure(
        bad,
        None,
        CellFit("bad", (), status="error: NaN samples"),
        None,
        tmp_path / "bad.png",
        dpi=40,
    )
    _png(tmp_path / "bad.png")


def test_absurd_numbers_do_not_crash(tmp_path):
    """Infinite, negative and NaN results (a fitter gone wrong) are drawn as far as they go."""
    rec, epochs, fit, verdict = fake_cell(n_sweeps=6)
    bad_fit = ExpFit(ONSET, ONSET + 0.1, -1e-4, math.inf, math.nan, -3.0, math.inf)
    sweeps = tuple(
        dataclasses.replace(f, charging=bad_fit, ss_dv=math.inf if f.sweep == 1 else f.ss_dv)
        for f in fit.sweeps
    )
    weird = dataclasses.replace(
        fit, sweeps=sweeps, rin_ohm=-5e6, rin_ci_ohm=(math.inf, -math.inf), iv_slope_ohm=math.inf,
        tau_s=math.nan, cm_ci_f=(math.nan, 1.0), sag_step_a=math.inf,
    )  # fmt: skip
    stray = [*epochs, StepEpoch(99, False, "ramp", "a ramp, not a step", 0, 0, 0, 0, 0, 0)]
    with np.errstate(all="raise"):  # no silent numpy warnings either
        cell_figure(
            rec, stray, weird, CellVerdict(False, excluded=None), tmp_path / "w.png", dpi=40
        )
    _png(tmp_path / "w.png")


def test_failed_write_leaves_no_file(tmp_path, monkeypatch):
    from matplotlib.figure import Figure

    def broken(self, *args, **kwargs):
        raise OSError("disk full")

    monkeypatch.setattr(Figure, "savefig", broken)
    rec, epochs, fit, verdict = fake_cell()
    with pytest.raises(OSError, match="disk full"):
        cell_figure(rec, epochs, fit, verdict, tmp_path / "x.png", dpi=40)
    assert list(tmp_path.iterdir()) == []


def test_envelope_keeps_extremes():
    rng = np.random.default_rng(3)
    v = rng.normal(size=30_000)
    v[12_345] = 9.0  # a spike one sample wide must survive decimation
    t = np.arange(v.size) / RATE
    td, vd = envelope(t, v, 800)
    assert vd.size <= 2 * 800 + 37 and vd.max() == 9.0 and vd.min() == v.min()
    assert np.all(np.diff(td) >= 0)


@pytest.mark.parametrize("n", [30_000, 30_017, 3_000])
def test_column_bands_cover_every_sample_and_every_join(n):
    """Each column's band holds its samples and the segment from the column before, so a
    one-sample spike and an instantaneous jump (a bridge step) are both painted."""
    rng = np.random.default_rng(4)
    v = rng.normal(size=n)
    v[n // 3] = 9.0
    v[n // 2 :] -= 20.0  # a jump between two samples
    t, lo, hi = column_bands(v, RATE, 800)
    per = -(-n // 800)
    columns = -(-n // per)
    assert lo.size == hi.size == t.size == 2 * columns
    # flat across each column: from its first to its last sample
    assert np.allclose(t[0::2] * RATE, np.arange(columns) * per)
    assert np.allclose(t[1::2] * RATE, np.minimum(np.arange(1, columns + 1) * per, n) - 1)
    assert np.array_equal(lo[0::2], lo[1::2]) and np.array_equal(hi[0::2], hi[1::2])
    for k in range(columns):
        part = v[max(k * per - 1, 0) : (k + 1) * per]  # its samples and the join before
        assert lo[2 * k] == part.min() and hi[2 * k] == part.max()
    assert hi.max() == 9.0 and lo.min() == v.min()
    spike = np.flatnonzero(hi == 9.0)  # the one-sample spike: a whole column wide
    assert t[spike[-1]] - t[spike[0]] >= (per - 1) / RATE - 1e-12


def test_column_bands_leave_sparse_or_gappy_traces_to_lines():
    v = np.zeros(2_000)
    assert column_bands(v, RATE, 1_000) is None  # two samples a column: drawn as a line
    v[5] = np.nan
    assert column_bands(v, RATE, 100) is None  # a gap a polygon cannot show


HOSTILE = [
    "../x",
    "a/b",
    "a_b",
    "c:d",
    "<script>",
    "a b",
    "..",
    "",
    "é-cell",
    "e-cell",
    "CON",
    "x" * 300,
    "a\\b",
]


def test_safe_name_hostile_ids(tmp_path):
    names = [safe_name(h) for h in HOSTILE]
    assert len(set(names)) == len(HOSTILE)
    for name in names:
        assert name and not name.startswith(".") and len(name) <= 90
        assert all(ch.isascii() and (ch.isalnum() or ch in "._-") for ch in name)
        path = (tmp_path / "figures" / f"{name}.png").resolve()
        assert path.parent == (tmp_path / "figures").resolve()
    # plain ids keep their name; the same id always gets the same name
    assert safe_name("2026-03-01_cell-3.e1") == "2026-03-01_cell-3.e1"
    assert safe_name("a/b") == safe_name("a/b") != safe_name("a_b") == "a_b"


def test_figure_names_case_insensitive():
    stems = figure_names(["Cell1", "cell1", "cell2"])
    assert len({s.casefold() for s in stems.values()}) == 3 and stems["cell2"] == "cell2"


def test_real_hostile_files_written(tmp_path):
    rec, epochs, fit, verdict = fake_cell(n_sweeps=4)
    for h in ("../x", "<script>", "$\\frac{a$_^"):  # "$" must not start mathtext
        rec2 = dataclasses.replace(rec, cell_id=h)
        cell_figure(rec2, epochs, fit, verdict, tmp_path / f"{safe_name(h)}.png", dpi=30)
    assert sorted(p.suffix for p in tmp_path.iterdir()) == [".png"] * 3


# --- the residual panel: widening bins, hum removed ---------------------------------------


@pytest.mark.parametrize("rate", [10_000.0, 20_000.0, 50_000.0])
@pytest.mark.parametrize("n_s", [0.0004, 0.003, 0.3, 1.0])
def test_residual_bins_start_at_the_fitter_width_and_widen(rate, n_s):
    n = max(2, round(n_s * rate))
    edges = residual_bins(n, rate)
    widths = np.diff(edges)
    first = round(5e-4 * rate)
    assert edges[0] == 0 and edges[-1] == n and (widths > 0).all()
    if n >= first:
        assert (widths >= first).all()  # no bin narrower than the fitter's (the last merged)
        assert widths[0] == first
    # each bin but the merged last one is 0.5 ms or 3 % of its start, whichever is wider
    expect = np.maximum(first, np.round(0.03 * edges[:-1]))[:-1]
    assert np.array_equal(widths[:-1], expect)
    if n_s == 1.0:
        assert len(widths) < 250  # ~170 points per second instead of 2000


@pytest.mark.parametrize("tau", [0.004, 0.01, 0.02, 0.2])
def test_residual_panel_removes_mains_hum_as_the_fitter_does_and_keeps_misfit(tau):
    """Hum is fitted where the membrane is flat (before the step, the steady-state window),
    as the fitter does, so the panel shows the misfit of a poor fit as it is, even for a fit
    window of one or two hum periods (tau 4 ms: a 20 ms window)."""
    from pipeline.report.figures import _binned_residual, _SweepView

    rate, onset, offset = 20_000.0, 0.1, 1.1
    t = np.arange(int(1.2 * rate)) / rate
    on, off = round(onset * rate), round(offset * rate)
    true = ExpFit(onset, onset + 5 * tau, tau, 0.01, -0.08, 0.99, 1e-5)
    clean = np.where(t >= onset, true.curve(t), -0.07)
    clean[t >= offset] = -0.07
    hum = 3e-4 * np.sin(2 * np.pi * 50 * t + 0.3) + 1e-4 * np.sin(
        2 * np.pi * 100 * t
    )  # 2 harmonics
    poor = dataclasses.replace(true, tau=0.75 * tau)  # a fit that misses: a bump of ~1 mV
    epoch = StepEpoch(1, True, "step", "", 0.0, -1e-10, onset, offset, on, off)
    sweep_fit = SweepFit(sweep=1, step_a=-1e-10, ss_window=(1.0, offset), charging=poor)

    def binned(v, harmonics):
        view = _SweepView(1, Sweep(v, None, rate, 1), epoch, sweep_fit, -1e-10, True, "")
        return _binned_residual(view, poor, harmonics)

    t_true, misfit = binned(clean, None)
    assert np.abs(misfit).max() > 0.5  # mV: there is a misfit to show
    t_hum, shown = binned(clean + hum, 2)
    assert np.array_equal(t_true, t_hum)
    assert np.abs(shown - misfit).max() < 0.01  # 0.3 mV of hum gone, the misfit kept
    _, left_in = binned(clean + hum, None)  # as the fitter with remove_hum = false
    assert np.abs(left_in - misfit).max() > 0.05


def test_trace_panel_clips_spikes_just_above_the_highest_plateau():
    """Spikes would squash the passive responses: the panel's top sits a margin (at least
    8 mV) above the highest median level of any sweep, far below the spike peaks."""
    from matplotlib.figure import Figure

    from pipeline.report.figures import _Canvas, _draw_traces, _epoch_map, _sweep_views

    rec, epochs, fit, verdict = fake_cell()
    views = _sweep_views(rec, _epoch_map(epochs), fit, verdict, "viridis")
    fig = Figure(figsize=(6, 3), dpi=40)
    _Canvas(fig)  # the figures' own canvas: its renderer answers font metrics
    ax = fig.add_subplot()
    _draw_traces(ax, fig, views, fit, 40.0)
    plateaus = [  # full medians during each step, mV
        1e3 * float(np.median(s.voltage[e.onset_index : e.offset_index]))
        for s, e in zip(rec.sweeps, epochs, strict=True)
    ]
    top = ax.get_ylim()[1]
    assert max(plateaus) + 7.9 < top < max(plateaus) + 12
    assert top < 1e3 * max(float(s.voltage.max()) for s in rec.sweeps) - 30


def test_a_window_outside_the_traces_widens_the_panel_as_axvspan_would():
    from matplotlib.figure import Figure

    from pipeline.report.figures import _Canvas, _draw_traces, _epoch_map, _sweep_views

    rec, epochs, fit, verdict = fake_cell()
    first = dataclasses.replace(fit.sweeps[0], baseline_window=(-0.1, 0.0))  # hand-made
    fit = dataclasses.replace(fit, sweeps=(first, *fit.sweeps[1:]))
    views = _sweep_views(rec, _epoch_map(epochs), fit, verdict, "viridis")
    fig = Figure(figsize=(6, 3), dpi=40)
    _Canvas(fig)
    ax = fig.add_subplot()
    _draw_traces(ax, fig, views, fit, 40.0)
    assert ax.get_xlim()[0] <= -100.0  # ms: the window is shown, not cut off


@pytest.mark.parametrize(
    ("drift_v", "text"),
    [
        (-3.7e-7, "+0.00 mV"),  # .2g gave "-0.00037 mV": a false precision of 0.1 uV
        (0.0123, "+12.30 mV"),
        (-0.123, "-123.00 mV"),  # .2g gave "-1.2e+02 mV"
        (-0.0051e-3, "-0.01 mV"),
    ],
)
def test_baseline_drift_reads_in_hundredths_of_a_millivolt(drift_v, text):
    assert _drift_mv(drift_v) == text


def test_a_cell_with_one_hyperpolarizing_step_draws_without_warnings(tmp_path):
    # one step size: the colour bar's range must not collapse (matplotlib warns of identical
    # limits and maps nothing)
    import warnings

    from pipeline.analysis import analyse_recording
    from pipeline.config import load_config
    from pipeline.simulate import CellModel, Nuisance, StepProtocol, simulate_cell

    protocol = StepProtocol(
        rate_hz=10_000.0, sweep_s=0.7, onset_s=0.1, step_s=0.35,
        amplitudes_a=(-20e-12, 40e-12, 80e-12),
    )  # fmt: skip
    rec = simulate_cell(CellModel(), protocol, Nuisance(), seed=0, cell_id="one", source_file="x")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        result = analyse_recording(rec, load_config(None), str(tmp_path))
    assert result["figure"] == "one.png" and (tmp_path / "one.png").stat().st_size > 10_000
    assert [str(w.message) for w in caught if "identical" in str(w.message)] == []
