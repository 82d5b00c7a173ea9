"""Spiking properties from current steps: spikes, firing per sweep, rheobase and the f-I slope.

A spike starts where the smoothed dV/dt rises through a threshold (20 V/s = 20 mV/ms by default;
10-20 mV/ms is *common practice*). It counts only when a peak follows within ``max_rise_s`` at
least ``min_amplitude_v`` above that threshold and the voltage falls back below half the
amplitude within ``max_fall_s``; crossings right after a step edge are the bridge artefact and
never count. Injected current positive = depolarizing; rheobase and the f-I curve use
depolarizing steps only, rebound spikes after any step are counted apart.

SI units inside (V, A, s, Hz); ``*_row(s)`` methods give report units (mV, pA, ms, Hz/nA).
"""

from __future__ import annotations

import bisect
import functools
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, fields, replace
from typing import NamedTuple

import numpy as np

from pipeline.recording import Recording, Sweep
from pipeline.steps import StepEpoch

NAN = math.nan


def _is_real(value: object) -> bool:
    """True for a finite int or float (not bool)."""
    return isinstance(value, int | float) and not isinstance(value, bool) and math.isfinite(value)


@dataclass(frozen=True)
class SpikeSettings:
    """How spikes are found and summarised; the ``[spikes]`` table of the config.

    Raises ValueError naming the field when a value is impossible (negative duration, zero
    threshold, too few spikes or sweeps for a fit).
    """

    # spike threshold: where the smoothed dV/dt rises through this, V/s (20 V/s = 20 mV/ms)
    dvdt_threshold_v_per_s: float = 20.0
    # Savitzky-Golay window (quadratic) of the dV/dt used for the threshold, s
    dvdt_window_s: float = 2e-4
    # a spike's threshold must come at least this long after the previous one, s
    refractory_s: float = 1e-3
    # peak minus threshold must reach this, V
    min_amplitude_v: float = 0.02
    # the peak itself must reach this, V
    min_peak_v: float = -0.02
    # the peak must follow the threshold crossing within this time, s
    max_rise_s: float = 0.005
    # after the peak the voltage must fall below half amplitude within this time, s
    max_fall_s: float = 0.01
    # dV/dt crossings this soon after a step onset or offset are the bridge artefact, s
    edge_guard_s: float = 2e-4
    # spikes up to this long after the step offset are counted as rebound spikes, s
    rebound_window_s: float = 0.1
    # the after-hyperpolarization trough is searched this long after a spike (or to the next), s
    ahp_window_s: float = 0.05
    # pre-step window in which the dV/dt noise is measured, s
    noise_window_s: float = 0.02
    # sweeps whose baseline dV/dt noise (robust SD) exceeds this get NaN spike values, V/s
    max_dvdt_noise_v_per_s: float = 10.0
    # no spikes for this long (and 2 x the longest ISI) at the step end, above threshold = block, s
    block_min_s: float = 0.05
    # sweeps sampled slower than this cannot resolve spikes, Hz
    min_sampling_rate_hz: float = 5000.0
    # in-step spikes needed for the adaptation index (3 give one ISI pair)
    adaptation_min_spikes: int = 4
    # suprathreshold sweeps needed for the f-I slope
    fi_min_sweeps: int = 3
    # depolarizing steps closer than this count as the same amplitude, A
    step_tolerance_a: float = 1e-12

    def __post_init__(self) -> None:
        minimum_count = {"adaptation_min_spikes": 3, "fi_min_sweeps": 2}
        for f in fields(self):
            value = getattr(self, f.name)
            if f.name in minimum_count:
                need = f"an integer >= {minimum_count[f.name]}"
                ok = isinstance(value, int) and value >= minimum_count[f.name]
            elif f.name == "min_peak_v":
                need, ok = "a finite number", _is_real(value)
            elif f.name == "dvdt_threshold_v_per_s":
                need, ok = "a number > 0", _is_real(value) and value > 0
            else:
                need, ok = "a number >= 0", _is_real(value) and value >= 0
            if not ok:  # ValueError: the config loader adds the file and table to the message
                raise ValueError(f"{f.name} must be {need}, got {value!r}")


@dataclass(frozen=True)
class Spike:
    """One action potential. Times in s from the sweep start, voltages in V.

    Parameters
    ----------
    time_s : float
        Threshold crossing: where the smoothed dV/dt rises through the threshold (interpolated).
    threshold_v : float
        Membrane potential at that time, V.
    peak_v, peak_time_s : float
        Maximum of the spike, V, and its time, s.
    amplitude_v : float
        ``peak_v - threshold_v``, V.
    width_s : float
        Width at half amplitude (``threshold_v + amplitude_v / 2``), linearly interpolated, s.
    ahp_v : float
        After-hyperpolarization depth: ``threshold_v`` minus the trough after the spike, V
        (positive when the trough lies below threshold).
    ahp_time_s : float
        Delay from ``time_s`` to that trough, s.
    max_rise_v_per_s, max_fall_v_per_s : float
        Largest and most negative dV/dt of the spike (unsmoothed), V/s; the fall is negative.
    in_step : bool
        True when the threshold crossing lies within the step, False for a rebound spike.
    note : str
        Empty for a normal spike. Set when dV/dt was still above threshold at the end of the edge
        guard (a step larger than C * threshold): the threshold is then the dV/dt minimum before
        the upstroke, or unknown (NaN threshold-based values) when dV/dt only rises. Also set
        when the step ended before the AHP's trough (``ahp_v`` and ``ahp_time_s`` NaN).
    """

    time_s: float
    threshold_v: float
    peak_v: float
    peak_time_s: float
    amplitude_v: float
    width_s: float
    ahp_v: float
    ahp_time_s: float
    max_rise_v_per_s: float
    max_fall_v_per_s: float
    in_step: bool
    note: str = ""  # why threshold-based or AHP values are NaN


@dataclass(frozen=True)
class SweepSpiking:
    """Firing of one sweep. NaN where a value could not be measured; ``reason`` says why.

    ``spike_count`` counts in-step spikes only (NaN when the sweep could not be analysed);
    ``rate_hz`` is that count over the step duration (NaN in depolarization block, and when
    most of the step's upstrokes have shrunk below ``min_amplitude_v``: ``shrunk``);
    ``adaptation_index`` is the mean over consecutive in-step ISI pairs of
    ``(isi[n+1] - isi[n]) / (isi[n+1] + isi[n])`` (0 = regular, > 0 = slowing down).
    """

    sweep: int
    step_a: float = NAN  # step current relative to holding, A (positive = depolarizing)
    duration_s: float = NAN  # step duration, s
    analysed: bool = False  # False when spikes could not be looked for (see reason)
    spikes: tuple[Spike, ...] = ()  # in-step and rebound spikes, in time order
    spike_count: int | float = NAN
    rebound_spike_count: int | float = NAN
    rate_hz: float = NAN
    latency_s: float = NAN  # first in-step spike time from step onset
    isis_s: tuple[float, ...] = ()  # in-step inter-spike intervals
    adaptation_index: float = NAN
    block: bool = False  # depolarization block: silent above threshold at the step end
    shrunk: bool = False  # most upstrokes too small to count: the count is not a firing rate
    reason: str = ""  # why values are NaN, '; '-separated


@dataclass(frozen=True)
class SpikeFit:
    """Spiking properties of one cell (SI units).

    Rheobase is the smallest depolarizing step that evoked at least one in-step spike; it is
    known only to the step resolution (``subthreshold_max_a`` < true rheobase <= ``rheobase_a``).
    The f-I slope is a least-squares line through the suprathreshold steps from rheobase up to,
    not including, the first step in block or whose rate falls below a smaller step's rate.
    """

    cell_id: str
    sweeps: tuple[SweepSpiking, ...] = ()
    excluded: dict[int, str] = field(default_factory=dict)  # sweep number -> reason left out
    rheobase_a: float = NAN
    rheobase_sweep: int | None = None
    subthreshold_max_a: float = NAN  # largest depolarizing step below rheobase without spikes
    step_resolution_a: float = NAN  # smallest increment between distinct depolarizing steps
    fi: tuple[tuple[float, float], ...] = ()  # (step_a, rate_hz) of depolarizing sweeps
    fi_slope_hz_per_a: float = NAN
    fi_intercept_hz: float = NAN
    fi_sweeps: tuple[int, ...] = ()  # sweep numbers the slope was fitted on
    max_rate_hz: float = NAN
    first_spike: Spike | None = None  # first spike at rheobase
    first_spike_latency_s: float = NAN
    block_step_a: float = NAN  # smallest step in depolarization block
    status: str = "ok"  # 'ok' or why the cell has no spiking values
    reason: str = ""  # why some values are NaN, '; '-separated

    def cell_row(self) -> dict[str, object]:
        """Cell values in report units (mV, pA, ms, Hz/nA)."""
        s = self.first_spike
        return {
            "rheobase_pa": self.rheobase_a * 1e12,
            "rheobase_sweep": self.rheobase_sweep,
            "subthreshold_max_pa": self.subthreshold_max_a * 1e12,
            "step_resolution_pa": self.step_resolution_a * 1e12,
            "fi_slope_hz_per_na": self.fi_slope_hz_per_a * 1e-9,
            "fi_n_sweeps": len(self.fi_sweeps),
            "max_rate_hz": self.max_rate_hz,
            "first_spike_threshold_mv": s.threshold_v * 1e3 if s else NAN,
            "first_spike_amplitude_mv": s.amplitude_v * 1e3 if s else NAN,
            "first_spike_width_ms": s.width_s * 1e3 if s else NAN,
            "first_spike_peak_mv": s.peak_v * 1e3 if s else NAN,
            "first_spike_ahp_mv": s.ahp_v * 1e3 if s else NAN,
            "first_spike_latency_ms": self.first_spike_latency_s * 1e3,
            "block_step_pa": self.block_step_a * 1e12,
            "spiking_status": self.status,
            "spiking_reason": self.reason,
        }

    def sweep_rows(self) -> list[dict[str, object]]:
        """One dict per analysed (or excluded) sweep, report units."""
        return [
            {
                "sweep": r.sweep,
                "spike_count": r.spike_count,
                "rebound_spike_count": r.rebound_spike_count,
                "spike_rate_hz": r.rate_hz,
                "first_spike_latency_ms": r.latency_s * 1e3,
                "mean_isi_ms": float(np.mean(r.isis_s)) * 1e3 if r.isis_s else NAN,
                "adaptation_index": r.adaptation_index,
                "depolarization_block": r.block,
                "spiking_reason": r.reason,
            }
            for r in self.sweeps
        ]

    def spike_rows(self) -> list[dict[str, object]]:
        """One dict per spike (``spike`` counts from 1 within its sweep), report units."""
        return [
            {
                "sweep": r.sweep,
                "spike": i,
                "time_ms": s.time_s * 1e3,
                "threshold_mv": s.threshold_v * 1e3,
                "peak_mv": s.peak_v * 1e3,
                "amplitude_mv": s.amplitude_v * 1e3,
                "width_ms": s.width_s * 1e3,
                "ahp_mv": s.ahp_v * 1e3,
                "ahp_time_ms": s.ahp_time_s * 1e3,
                "max_rise_v_per_s": s.max_rise_v_per_s,
                "max_fall_v_per_s": s.max_fall_v_per_s,
                "in_step": s.in_step,
                "spike_note": s.note,
            }
            for r in self.sweeps
            for i, s in enumerate(r.spikes, start=1)
        ]


# ---------------------------------------------------------------- numerics
# Small numpy versions of three scipy functions: importing scipy.signal (which pulls in
# scipy.stats), scipy.ndimage and scipy.stats costs ~1 s per worker process, more than the
# spiking analysis of a whole cell. tests/test_spikes.py checks them against scipy.


@functools.lru_cache(maxsize=8)
def _savgol_weights(window: int, order: int) -> np.ndarray:
    """Weights ``m`` with ``m[p] @ y`` = first derivative (per sample) at sample ``p`` of the
    least-squares polynomial of ``order`` through the ``window`` samples ``y``; read-only."""
    x = np.arange(window) - window // 2  # centred powers keep the fit well conditioned
    pinv = np.linalg.pinv(np.vander(x.astype(float), order + 1, increasing=True))
    # d/dx sum_k a_k x^k = sum_k k a_k x^(k-1)
    slope = np.vander(x.astype(float), order, increasing=True) * np.arange(1, order + 1)
    m = slope @ pinv[1:]
    m.setflags(write=False)
    return m


def savgol_derivative(v: np.ndarray, window: int, order: int, dt: float) -> np.ndarray:
    """First derivative of ``v`` by a Savitzky-Golay filter.

    The same definition as ``scipy.signal.savgol_filter(v, window, order, deriv=1, delta=dt)``
    (its default ``mode='interp'``): each sample gets the slope of the least-squares polynomial
    of degree ``order`` through the ``window`` samples centred on it, and the ``window // 2``
    samples at each end the slope of the polynomial through the first or last ``window``.

    Parameters
    ----------
    v : numpy.ndarray
        Samples (e.g. V), at least ``window`` of them.
    window : int
        Odd window length, samples.
    order : int
        Polynomial degree, below ``window``.
    dt : float
        Sample interval, s.

    Returns
    -------
    numpy.ndarray
        dv/dt, units of ``v`` per s, same length as ``v``.
    """
    m, h, n = _savgol_weights(window, order), window // 2, v.size
    out = np.empty(n)
    out[h : n - h] = np.correlate(v, m[h], mode="valid")
    out[:h] = m[:h] @ v[:window]
    out[n - h :] = m[window - h :] @ v[n - window :]
    out /= dt
    return out


def max_ahead(v: np.ndarray, at: np.ndarray, size: int) -> np.ndarray:
    """Largest sample of ``v[i : i + size]`` (cut at the end of ``v``) for each index ``i``.

    Equals ``scipy.ndimage.maximum_filter1d(v, size, origin=-(size // 2), mode='nearest')[at]``
    (a window starting at the sample; past the end the last sample repeats), computed only at
    the indices asked for.

    Parameters
    ----------
    v : numpy.ndarray
        Samples, e.g. V.
    at : numpy.ndarray of int
        Indices into ``v`` (0 <= i < v.size).
    size : int
        Window length, samples (>= 1).

    Returns
    -------
    numpy.ndarray
        One maximum per index, units of ``v``.
    """
    if at.size == 0:
        return np.empty(0, dtype=v.dtype)
    padded = np.append(v, v[-1])  # reduceat needs every bound below its array's length
    bounds = np.empty(2 * at.size, dtype=np.intp)
    bounds[0::2] = at
    bounds[1::2] = np.minimum(at + size, v.size)
    return np.maximum.reduceat(padded, bounds)[0::2]


def _gradient(v: np.ndarray, a: int, b: int, dt: float) -> np.ndarray:
    """``np.gradient(v, dt)[a:b]`` (0 <= a < b <= v.size, v.size >= 2) computed on that span
    only: central differences inside, one-sided ones at the ends of ``v``; units of v per s."""
    n = v.size
    out = np.empty(b - a)
    lo, hi = max(a, 1), min(b, n - 1)
    if hi > lo:
        out[lo - a : hi - a] = (v[lo + 1 : hi + 1] - v[lo - 1 : hi - 1]) / (2.0 * dt)
    if a == 0:
        out[0] = (v[1] - v[0]) / dt
    if b == n:
        out[-1] = (v[n - 1] - v[n - 2]) / dt
    return out


def least_squares_line(x: Sequence[float], y: Sequence[float]) -> tuple[float, float]:
    """Slope and intercept of the ordinary least-squares line ``y = slope * x + intercept``.

    The formulas of ``scipy.stats.linregress``: slope = cov(x, y) / var(x) (population
    moments), intercept = mean(y) - slope * mean(x).

    Parameters
    ----------
    x, y : sequence of float
        At least two points, not all ``x`` equal.

    Returns
    -------
    tuple of float
        Slope (units of y per unit of x) and intercept (units of y).
    """
    x, y = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
    ssxm, ssxym, _, _ = np.cov(x, y, bias=True).flat
    slope = ssxym / ssxm
    return float(slope), float(np.mean(y) - slope * np.mean(x))


# ---------------------------------------------------------------- detection


def _window_samples(settings: SpikeSettings, rate: float) -> int:
    """Odd Savitzky-Golay window length (>= 3 samples) for the threshold dV/dt."""
    n = max(3, int(round(settings.dvdt_window_s * rate)))
    return n if n % 2 else n + 1


def _analysis_span(n: int, rate: float, epoch: StepEpoch, settings: SpikeSettings) -> tuple:
    """Sample span analysed: the noise window before onset to the end of the rebound window."""
    start = max(0, epoch.onset_index - int(round(settings.noise_window_s * rate)))
    stop = min(n, epoch.offset_index + int(round(settings.rebound_window_s * rate)))
    return start, stop


def _precheck(sweep: Sweep, epoch: StepEpoch, settings: SpikeSettings) -> str:
    """Why the sweep cannot be searched for spikes, or '' when it can."""
    if not epoch.usable:
        return epoch.reason or f"step not usable ({epoch.kind})"
    if sweep.rate < settings.min_sampling_rate_hz:
        return (
            f"sampling rate {sweep.rate / 1e3:g} kHz is below "
            f"{settings.min_sampling_rate_hz / 1e3:g} kHz, too slow to resolve spikes"
        )
    n = sweep.n_samples
    if not 0 <= epoch.onset_index < epoch.offset_index <= n:
        return f"step samples {epoch.onset_index}-{epoch.offset_index} outside the sweep (0-{n})"
    start, stop = _analysis_span(n, sweep.rate, epoch, settings)
    if stop - start < _window_samples(settings, sweep.rate) + 2:
        return "step too short to look for spikes"
    bad = int(np.count_nonzero(~np.isfinite(sweep.voltage[start:stop])))
    if bad:
        return f"{bad} NaN or infinite voltage samples in the step window"
    return ""


def _median(x: np.ndarray) -> float:
    """``np.median`` of a finite 1-D array without its checks (a few times faster on the short
    windows measured here): the middle value, or the mean of the middle two."""
    m = x.size // 2
    if x.size % 2:
        return float(np.partition(x, m)[m])
    part = np.partition(x, (m - 1, m))
    return float((part[m - 1] + part[m]) / 2.0)


def _robust_sd(x: np.ndarray) -> float:
    """Standard deviation from the median absolute deviation (insensitive to a few spikes)."""
    return float(1.4826 * _median(np.abs(x - _median(x)))) if x.size else NAN


def _crossings(dvdt: np.ndarray, threshold: float) -> np.ndarray:
    """Indices i where dvdt[i - 1] < threshold <= dvdt[i]."""
    above = dvdt >= threshold
    return np.flatnonzero(~above[:-1] & above[1:]) + 1


def _interp_cross(y: np.ndarray, i: int, level: float) -> float:
    """Fractional index between i - 1 and i where y crosses level."""
    y0, y1 = y[i - 1], y[i]
    return i - 1 + (level - y0) / (y1 - y0) if y1 != y0 else float(i)


class _Found(NamedTuple):
    """A spike located in the analysis span (sample indices relative to its start)."""

    x: float  # fractional index of the threshold point
    v_thr: float  # V at the threshold point
    peak: int
    down: int  # first sample below half amplitude after the peak
    start: int  # sample of the threshold point (rounded up)
    knee: bool  # dV/dt was above threshold from a step edge on (no crossing)
    hidden: bool  # ... and only rose after the guard: the foot is inside the guard


def _candidates(
    dvdt: np.ndarray, thr: float, edges: tuple[int, int], guard_pre: int, guard: int
) -> tuple[np.ndarray, list[int]]:
    """Rising dV/dt crossings from onset on, outside the edge guards, plus knee candidates."""
    cand = _crossings(dvdt, thr)
    keep = cand >= edges[0]
    knees = []
    for edge in edges:
        keep &= (cand < edge - guard_pre) | (cand > edge + guard)
        # a step larger than C * threshold keeps dV/dt above threshold past the guard: a spike
        # rising straight out of it starts at the dV/dt minimum (knee) instead of a crossing
        if edge + guard + 1 < dvdt.size and dvdt[edge + guard + 1] >= thr:
            knees.append(edge + guard + 1)
    return np.union1d(cand[keep], knees).astype(int), knees


def _locate(
    v: np.ndarray,
    dvdt: np.ndarray,
    cand: np.ndarray,
    knees: list[int],
    rate: float,
    s: SpikeSettings,
) -> list[_Found]:
    """Spikes among the candidates: a peak, enough amplitude, repolarization, refractory gap."""
    n, thr = v.size, s.dvdt_threshold_v_per_s
    rise_n = max(2, int(round(s.max_rise_s * rate)))
    fall_n = max(2, int(round(s.max_fall_s * rate)))
    refr_n = int(round(s.refractory_s * rate))
    guard_peak = _window_samples(s, rate) // 2 + 1  # the smoothed zero may lead the raw peak
    # vectorised pre-filter (noise makes many candidates): the largest V within max_rise_s ahead
    ahead = max_ahead(v, cand, rise_n)
    ok = (ahead - v[cand] >= s.min_amplitude_v) & (ahead >= s.min_peak_v)
    found: list[_Found] = []
    resume = 0
    for c in cand[ok]:
        if c < resume:
            continue
        # the peak: highest V up to where dV/dt first turns negative (not a later spike's)
        falling = np.flatnonzero(dvdt[c : min(c + rise_n, n)] < 0)
        stop = c + int(falling[0]) + guard_peak if falling.size else c + rise_n
        p = c + int(np.argmax(v[c : min(stop, n)]))
        m = c + int(np.argmax(dvdt[c : p + 1]))
        c = int(cand[np.searchsorted(cand, m, side="right") - 1])  # last crossing before m
        knee = hidden = c in knees
        if knee:
            k = int(np.argmin(dvdt[c : m + 1]))
            hidden, c = k == 0, c + k
            x, v_thr = float(c), float(v[c])
        else:
            x = float(_interp_cross(dvdt, c, thr))
            v_thr = float(np.interp(x, (c - 1, c), v[c - 1 : c + 1]))
        amp = v[p] - v_thr
        if amp < s.min_amplitude_v or v[p] < s.min_peak_v:
            continue
        below = np.flatnonzero(v[p : min(p + fall_n, n)] < v_thr + amp / 2)
        if below.size == 0:  # no repolarization: a plateau, not a spike
            resume = p
            continue
        found.append(_Found(x, v_thr, p, p + int(below[0]), c, knee, hidden))
        resume = max(p + int(below[0]), c + refr_n)
    return found


def _shape(
    v: np.ndarray, f: _Found, end: int, in_step: bool, dt: float, t0: float, cut: bool = False
) -> Spike:
    """Measure one located spike; ``end`` bounds the after-hyperpolarization trough search.

    ``cut``: ``end`` is the step's offset, before the AHP window's end. A trough found at that
    edge is where the step ended, not where the AHP turned (the membrane was still falling, or
    the fall is the step's own): the AHP is then unknown, with a note, rather than a depth of
    -26 mV for the last spike of a train.
    """
    trough = f.down + int(np.argmin(v[f.down : max(end, f.down + 1)]))
    ahp_unknown = cut and trough >= end - 2
    amp = float(v[f.peak] - f.v_thr)
    half = f.v_thr + amp / 2
    up = f.peak - int(np.flatnonzero(v[f.start - 1 : f.peak + 1][::-1] < half)[0])
    width = float(_interp_cross(v, f.down, half) - _interp_cross(v, up + 1, half)) * dt
    unknown = NAN if f.hidden else 1.0  # threshold-based values of a hidden foot are NaN
    return Spike(
        time_s=float(t0 + f.x * dt),
        threshold_v=f.v_thr * unknown,
        peak_v=float(v[f.peak]),
        peak_time_s=float(t0 + f.peak * dt),
        amplitude_v=amp * unknown,
        width_s=width * unknown,
        ahp_v=NAN if ahp_unknown else float(f.v_thr - v[trough]) * unknown,
        ahp_time_s=NAN if ahp_unknown else float((trough - f.x) * dt),
        max_rise_v_per_s=float(_gradient(v, f.start - 1, f.peak + 1, dt).max()),
        max_fall_v_per_s=float(_gradient(v, f.peak, trough + 1, dt).min()),
        in_step=in_step,
        note="; ".join(
            filter(None, (_knee_note(f.hidden) if f.knee else "", _CUT_AHP if ahp_unknown else ""))
        ),
    )


_CUT_AHP = "AHP not measured: the step ended before its trough"


def _detect(
    v: np.ndarray, rate: float, onset: int, offset: int, settings: SpikeSettings, t0: float
) -> tuple[list[Spike], float, int]:
    """Find spikes in ``v`` (cut to the analysis span; ``onset``/``offset`` relative to it).

    Returns the spikes (times from ``t0``, s), the baseline dV/dt noise (robust SD, V/s; NaN
    without a baseline) and the count of in-step upstrokes too small to be spikes
    (:func:`_small_upstrokes`).
    """
    dt = 1.0 / rate
    w = _window_samples(settings, rate)
    dvdt = savgol_derivative(v, w, 2, dt)  # exact for quadratic onsets
    guard_pre = w // 2 + 2  # the smoothing spreads an edge jump this far back
    guard = int(round(settings.edge_guard_s * rate))
    noise = _robust_sd(dvdt[: max(0, onset - guard_pre)])
    cand, knees = _candidates(
        dvdt, settings.dvdt_threshold_v_per_s, (onset, offset), guard_pre, guard
    )
    found = _locate(v, dvdt, cand, knees, rate, settings)
    ahp_n = max(1, int(round(settings.ahp_window_s * rate)))
    spikes = []
    for k, f in enumerate(found):
        in_step = bool(onset <= f.x < offset)
        end = min(f.down + ahp_n, offset if in_step else v.size)
        cut = in_step and end == offset < f.down + ahp_n
        if k + 1 < len(found) and found[k + 1].start < end:
            end, cut = found[k + 1].start, False  # the trough lies before the next spike
        spikes.append(_shape(v, f, end, in_step, dt, t0, cut))
    return spikes, noise, _small_upstrokes(v, cand, found, (onset, offset), rate, settings)


def _small_upstrokes(
    v: np.ndarray,
    cand: np.ndarray,
    found: list[_Found],
    step: tuple[int, int],
    rate: float,
    s: SpikeSettings,
) -> int:
    """In-step upstrokes of half ``min_amplitude_v`` up to it, peaking above ``min_peak_v``,
    one per refractory period and away from the spikes counted: spikes shrunk too small to
    count, as when strong depolarization inactivates the sodium current. A simulated cell's
    regular train of 20-30 mV events had 27 of its 143 counted (those whose amplitude noise
    pushed past 20 mV): a rate of 54 Hz instead of ~290."""
    c = cand[(cand >= step[0]) & (cand < step[1])]
    if c.size == 0:
        return 0
    ahead = max_ahead(v, c, max(2, int(round(s.max_rise_s * rate))))
    rise = ahead - v[c]
    c = c[(rise >= s.min_amplitude_v / 2) & (rise < s.min_amplitude_v) & (ahead >= s.min_peak_v)]
    refr = int(round(s.refractory_s * rate))
    spans = sorted((f.start - refr, f.down + refr) for f in found)
    starts = [a for a, _ in spans]
    count, last = 0, None
    for x in c:
        k = bisect.bisect_right(starts, x) - 1
        if (k >= 0 and x <= spans[k][1]) or (last is not None and x - last <= refr):
            continue
        count, last = count + 1, x
    return count


def _knee_note(hidden: bool) -> str:
    """Note of a spike whose dV/dt was still above threshold when the edge guard ended."""
    if hidden:
        return "rises straight out of the step edge: threshold unknown, time = end of edge guard"
    return "dV/dt above threshold since the step edge: threshold at the dV/dt minimum (knee)"


def _detect_in_span(
    sweep: Sweep, epoch: StepEpoch, settings: SpikeSettings
) -> tuple[list[Spike], float, int]:
    """Spikes (times from the sweep start), baseline dV/dt noise and small upstrokes (see
    :func:`_detect`) of a checked sweep."""
    start, stop = _analysis_span(sweep.n_samples, sweep.rate, epoch, settings)
    return _detect(
        sweep.voltage[start:stop],
        sweep.rate,
        epoch.onset_index - start,
        epoch.offset_index - start,
        settings,
        start / sweep.rate,
    )


def detect_spikes(
    sweep: Sweep, epoch: StepEpoch, settings: SpikeSettings | None = None
) -> list[Spike]:
    """Spikes from step onset to ``rebound_window_s`` after its offset.

    Parameters
    ----------
    sweep : Sweep
        Voltage in V, rate in Hz.
    epoch : StepEpoch
        The sweep's step (onset and offset sample indices are used).
    settings : SpikeSettings, optional
        Detection criteria; defaults when omitted.

    Returns
    -------
    list of Spike
        In time order, times in s from the sweep start. Empty when the sweep cannot be searched
        (NaN samples, unusable step, sampling too slow): :func:`measure_spiking` gives the reason.
    """
    settings = settings or SpikeSettings()
    if _precheck(sweep, epoch, settings):
        return []
    return _detect_in_span(sweep, epoch, settings)[0]


# ---------------------------------------------------------------- per sweep


def adaptation_index(isis: Sequence[float]) -> float:
    """Mean over consecutive ISI pairs of ``(isi[n+1] - isi[n]) / (isi[n+1] + isi[n])``.

    Parameters
    ----------
    isis : sequence of float
        Inter-spike intervals, s, in order.

    Returns
    -------
    float
        0 for regular firing, positive when firing slows, negative when it speeds up; NaN with
        fewer than two intervals.
    """
    isi = np.asarray(isis, dtype=float)
    if isi.size < 2:
        return NAN
    return float(np.mean(np.diff(isi) / (isi[1:] + isi[:-1])))


def _silent_tail(
    v: np.ndarray, rate: float, epoch: StepEpoch, step: list[Spike], s: SpikeSettings
) -> tuple[float, float]:
    """Start (s) of the spike-free end of the step and the median V of its last half."""
    if step:
        t_end = step[-1].time_s + (step[-1].ahp_time_s if math.isfinite(step[-1].ahp_time_s) else 0)
    else:
        t_end = epoch.onset + s.edge_guard_s
    i0 = int(round((epoch.offset - s.block_min_s / 2) * rate))
    tail = v[max(i0, 0) : epoch.offset_index]
    return t_end, _median(tail) if tail.size else NAN


def _with_block(
    r: SweepSpiking,
    sweep: Sweep,
    epoch: StepEpoch,
    threshold_v: float,
    s: SpikeSettings,
    bridge_v: float = 0.0,
) -> SweepSpiking:
    """``r`` with depolarization block assessed against ``threshold_v`` (V).

    Block: no spike for at least ``block_min_s`` (and twice the sweep's longest ISI) before the
    step offset while the membrane sits above the threshold; the sweep's rate is then NaN (it
    says nothing about the f-I relation). ``bridge_v`` (V) is what the bridge error adds to
    this sweep's recorded voltage beyond what it added to the threshold's (the step currents'
    difference times the bridge error): without it, a large step's bridge voltage (18 mV at
    1.2 nA over 15 MOhm) put a subthreshold membrane above threshold.
    """
    if not r.analysed or r.step_a <= 0 or r.shrunk:  # shrunk: its reason says what it is
        return r
    step = [sp for sp in r.spikes if sp.in_step]
    if not math.isfinite(threshold_v):
        threshold_v = next((sp.threshold_v for sp in step if math.isfinite(sp.threshold_v)), NAN)
    t_end, v_tail = _silent_tail(sweep.voltage, sweep.rate, epoch, step, s)
    v_tail -= bridge_v
    # silent for block_min_s and for twice the longest ISI: a slow, adapting train is not block
    silence = max(s.block_min_s, 2 * max(r.isis_s, default=0.0))
    if not (epoch.offset - t_end >= silence and v_tail >= threshold_v):
        return r
    since = f"after {(step[-1].time_s - epoch.onset) * 1e3:.0f} ms" if step else "at all"
    reason = (
        f"depolarization block: no spikes {since} while the membrane stays at "
        f"{v_tail * 1e3:.1f} mV{' (bridge-corrected)' if bridge_v else ''}, above the "
        f"{threshold_v * 1e3:.1f} mV threshold"
    )
    return replace(r, rate_hz=NAN, block=True, reason="; ".join(filter(None, (r.reason, reason))))


def _measure(sweep: Sweep, epoch: StepEpoch, settings: SpikeSettings) -> SweepSpiking:
    """Spikes and firing of one sweep, block not yet assessed."""
    base = dict(sweep=sweep.number, step_a=epoch.amplitude, duration_s=epoch.duration)
    problem = _precheck(sweep, epoch, settings)
    if problem:
        return SweepSpiking(**base, reason=problem)
    spikes, noise, small = _detect_in_span(sweep, epoch, settings)
    if noise > settings.max_dvdt_noise_v_per_s:
        return SweepSpiking(
            **base,
            reason=f"baseline dV/dt noise {noise:.3g} V/s exceeds "
            f"{settings.max_dvdt_noise_v_per_s:g} V/s: spike threshold unreliable",
        )
    step = [s for s in spikes if s.in_step]
    isis = tuple(float(d) for d in np.diff([s.time_s for s in step]))
    reasons = []
    if not step:
        reasons.append("no spikes during the step")
    if len(step) < settings.adaptation_min_spikes:
        reasons.append(
            f"adaptation index needs {settings.adaptation_min_spikes} spikes, got {len(step)}"
        )
    shrunk = small >= max(5, len(step))
    if shrunk:
        reasons.append(
            f"{small} upstrokes of {settings.min_amplitude_v * 500:g}-"
            f"{settings.min_amplitude_v * 1e3:g} mV were too small to count as spikes (their "
            "amplitude collapses, as near depolarization block): the count is not a rate"
        )
    return SweepSpiking(
        **base,
        analysed=True,
        spikes=tuple(spikes),
        spike_count=len(step),
        rebound_spike_count=len(spikes) - len(step),
        rate_hz=NAN if shrunk else len(step) / epoch.duration,
        shrunk=shrunk,
        latency_s=step[0].time_s - epoch.onset if step else NAN,
        isis_s=isis,
        adaptation_index=(
            adaptation_index(isis) if len(step) >= settings.adaptation_min_spikes else NAN
        ),
        reason="; ".join(reasons),
    )


def measure_spiking(
    sweep: Sweep,
    epoch: StepEpoch,
    settings: SpikeSettings | None = None,
    block_threshold_v: float = NAN,
) -> SweepSpiking:
    """Detect spikes in one sweep and summarise its firing.

    Parameters
    ----------
    sweep : Sweep
        Voltage in V, rate in Hz.
    epoch : StepEpoch
        The sweep's step; ``amplitude`` in A, positive = depolarizing.
    settings : SpikeSettings, optional
        Detection criteria; defaults when omitted.
    block_threshold_v : float, optional
        Threshold (V) above which a silent membrane is in depolarization block; NaN (default)
        uses the sweep's first spike threshold. :func:`fit_spiking` passes the cell's threshold
        at rheobase.

    Returns
    -------
    SweepSpiking
        NaN values carry a reason: NaN samples, too much noise, no spikes, block...
    """
    settings = settings or SpikeSettings()
    return _with_block(_measure(sweep, epoch, settings), sweep, epoch, block_threshold_v, settings)


# ---------------------------------------------------------------- per cell


def _distinct(values: Sequence[float], tol: float) -> np.ndarray:
    """Sorted values with near-duplicates (closer than tol) merged."""
    v = np.sort(np.asarray(values, dtype=float))
    if v.size == 0:
        return v
    return v[np.concatenate(([True], np.diff(v) > tol))]


def _fi_slope(depol: list[SweepSpiking], rheobase: float, settings: SpikeSettings):
    """Slope (Hz/A), intercept (Hz) and sweeps of the f-I line below saturation or block."""
    tol, used = settings.step_tolerance_a, []
    for r in sorted(depol, key=lambda r: r.step_a):
        if r.step_a < rheobase - tol:
            continue
        below = [u.rate_hz for u in used if u.step_a < r.step_a - tol]  # repeats don't compete
        if r.block or r.shrunk or (below and r.rate_hz < max(below)):
            break  # block, collapsing spikes or a rate below a smaller step's: it is over
        used.append(r)
    amps = _distinct([r.step_a for r in used], settings.step_tolerance_a)
    if len(used) < settings.fi_min_sweeps or amps.size < 2:
        return (
            NAN,
            NAN,
            tuple(r.sweep for r in used),
            (
                f"f-I slope needs {settings.fi_min_sweeps} suprathreshold sweeps at 2 or more "
                f"amplitudes before saturation or block, got {len(used)}"
            ),
        )
    slope, intercept = least_squares_line([r.step_a for r in used], [r.rate_hz for r in used])
    return slope, intercept, tuple(r.sweep for r in used), ""


def fit_spiking(
    recording: Recording,
    epochs: Sequence[StepEpoch],
    settings: SpikeSettings | None = None,
    exclude: Mapping[int, str] | None = None,
    bridge_ohm: float = 0.0,
) -> SpikeFit:
    """Spiking properties of one cell from its step sweeps.

    Parameters
    ----------
    recording : Recording
        The cell's sweeps (V, A, Hz).
    epochs : sequence of StepEpoch
        One per sweep, matched by sweep number; unusable ones are skipped.
    settings : SpikeSettings, optional
        Detection criteria; defaults when omitted.
    exclude : mapping of int to str, optional
        Sweep number -> reason; those sweeps get NaN rows and are left out of the cell values.
    bridge_ohm : float
        The cell's bridge error, ohm (:func:`pipeline.fitters.cell.bridge_estimate`), for
        judging depolarization block at steps larger than rheobase; the spike voltages
        themselves are reported as recorded.

    Returns
    -------
    SpikeFit
        Rheobase (to the step resolution), f-I slope, max rate, first spike at rheobase.
    """
    settings = settings or SpikeSettings()
    exclude = {int(k): str(v) for k, v in (exclude or {}).items()}
    by_number = {s.number: s for s in recording.sweeps}
    rows, used = [], []
    for ep in epochs:
        if not ep.usable or ep.sweep not in by_number:
            continue
        if ep.sweep in exclude:
            reason = f"excluded: {exclude[ep.sweep]}"
            rows.append(SweepSpiking(ep.sweep, ep.amplitude, ep.duration, reason=reason))
        else:
            rows.append(_measure(by_number[ep.sweep], ep, settings))
            used.append((len(rows) - 1, ep))
    # block is judged against the cell's threshold at rheobase where the cell has one
    rheo = _rheobase_sweep([r for r in rows if r.analysed and r.step_a > 0])
    ref = next((sp.threshold_v for sp in rheo.spikes if sp.in_step), NAN) if rheo else NAN
    for k, ep in used:
        above = rheo is not None and rows[k].step_a > rheo.step_a + settings.step_tolerance_a
        extra = (rows[k].step_a - rheo.step_a) * bridge_ohm if above and rheo else 0.0
        rows[k] = _with_block(
            rows[k], by_number[ep.sweep], ep, ref if above else NAN, settings, extra
        )
    return _summarise(recording.cell_id, tuple(rows), exclude, settings)


def _rheobase_sweep(depol: list[SweepSpiking]) -> SweepSpiking | None:
    """The smallest depolarizing step with an in-step spike (the first of equal steps)."""
    spiking = [r for r in depol if r.spike_count >= 1]
    return min(spiking, key=lambda r: r.step_a) if spiking else None


def _summarise(
    cell_id: str, rows: tuple[SweepSpiking, ...], exclude: dict[int, str], s: SpikeSettings
) -> SpikeFit:
    """Cell values from the per-sweep results."""
    base = dict(cell_id=cell_id, sweeps=rows, excluded=exclude)
    if not any(r.step_a > 0 for r in rows):
        return SpikeFit(**base, status="no usable depolarizing sweeps")
    depol = [r for r in rows if r.analysed and r.step_a > 0]
    if not depol:
        why = sorted({r.reason for r in rows if r.step_a > 0})
        return SpikeFit(
            **base, status="no depolarizing sweep could be analysed: " + "; ".join(why[:3])
        )
    amps = _distinct([r.step_a for r in depol], s.step_tolerance_a)
    resolution = float(np.diff(amps).min()) if amps.size > 1 else NAN
    fi = tuple(sorted((r.step_a, r.rate_hz) for r in depol if math.isfinite(r.rate_hz)))
    rates = [r.rate_hz for r in depol if math.isfinite(r.rate_hz)]
    blocked = [r.step_a for r in depol if r.block]
    base.update(
        step_resolution_a=resolution,
        fi=fi,
        max_rate_hz=max(rates) if rates else NAN,
        block_step_a=min(blocked) if blocked else NAN,
    )
    reasons = [] if amps.size > 1 else ["step resolution needs 2 depolarizing amplitudes"]
    rheo = _rheobase_sweep(depol)
    if rheo is None:
        largest = max(r.step_a for r in depol) * 1e12
        return SpikeFit(
            **base,
            status=f"no spikes in {len(depol)} depolarizing sweeps (largest step {largest:.4g} pA)",
            reason="; ".join(reasons),
        )
    below = [
        r.step_a
        for r in depol
        if r.spike_count == 0 and r.step_a < rheo.step_a - s.step_tolerance_a
    ]
    if not below:
        reasons.append("rheobase is at or below the smallest analysed depolarizing step")
    slope, intercept, fi_sweeps, why = _fi_slope(depol, rheo.step_a, s)
    if why:
        reasons.append(why)
    first = next(sp for sp in rheo.spikes if sp.in_step)
    if first.note:  # the first_spike_* values it leaves empty need their reason in the cell row
        reasons.append(f"first spike at rheobase (sweep {rheo.sweep}): {first.note}")
    return SpikeFit(
        **base,
        rheobase_a=rheo.step_a,
        rheobase_sweep=rheo.sweep,
        subthreshold_max_a=max(below) if below else NAN,
        fi_slope_hz_per_a=slope,
        fi_intercept_hz=intercept,
        fi_sweeps=fi_sweeps,
        first_spike=first,
        first_spike_latency_s=rheo.latency_s,
        reason="; ".join(reasons),
    )
