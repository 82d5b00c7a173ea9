"""Find the current step of each sweep (holding level, onset, offset, amplitude).

Sign convention: amplitude is the injected current relative to holding, positive =
depolarizing.

How a sweep is read (all vectorized numpy, only the current is looked at):

1. The current's noise is estimated per window from second differences (blind to steps and
   ramps); windows much louder than the quiet ones mark a noise stimulus.
2. Edges are where the difference of the means of the ``k`` samples after and before a sample
   (``k`` = ``edge_window_s``) exceeds a threshold set by the noise and ``min_amplitude_a``.
   An edge spread over more than ``3 k`` samples is a ramp.
3. The plateaus between edges (less ``k`` samples each side) give the levels (means, or
   means near the median when outliers pull); a plateau whose first and last thirds differ by
   more than the threshold is a ramp. Levels then tell a single step (out and back to
   holding) from a train (back to holding between pulses of one size) and a multi-step (any
   other sequence, e.g. a staircase or a prepulse before the step).
4. Onset and offset come from the 50% crossing of each edge (linear interpolation between
   samples; common practice), read 0.4 sample early: exact on a clean command; within one
   sample on a filtered edge (single pole, tau up to ~1 sample; 2-pole Bessel at rate/4) with
   3 pA RMS noise on a 20 pA step. Stronger filters delay the crossing by their group delay.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

from pipeline.recording import Recording, Sweep

NAN = math.nan
# A sharp edge crosses 50% half a sample before its first step sample; a causal filter moves the
# crossing later. Reading the crossing 0.4 sample early keeps sharp edges exact and puts
# single-pole edges (tau up to ~1 sample) within one sample even with noise.
_CROSSING_SHIFT = 0.4
_SIGMA_PER_MAD2 = 1.0 / (0.6745 * math.sqrt(6.0))  # second difference of white noise: var 6s^2
_EPS = float(np.finfo(np.float64).eps)


@dataclass(frozen=True)
class StepSettings:
    """How steps are found; the ``[steps]`` table of the config.

    Schedule fields are used only for sweeps that store no current: onset (s) and duration (s)
    of the step, the first sweep's amplitude (A) and the increment per sweep (A).

    Parameters
    ----------
    min_amplitude_a : float
        Steps smaller than this (A) count as no change.
    edge_window_s : float
        Averaging window on each side of an edge, s; also the guard left out of each plateau.
    min_before_s, min_after_s : float
        Least baseline before the onset and relaxation after the offset, s.
    min_duration_s : float
        Shortest usable step, s.
    noise_limit_a : float
        A current whose noise RMS exceeds this (A) everywhere is taken as a noise stimulus.
    """

    schedule_onset_s: float | None = None
    schedule_duration_s: float | None = None
    schedule_first_a: float | None = None
    schedule_increment_a: float | None = None
    min_amplitude_a: float = 1e-12
    edge_window_s: float = 5e-4
    min_before_s: float = 5e-3
    min_after_s: float = 5e-3
    min_duration_s: float = 2e-3
    noise_limit_a: float = 20e-12


@dataclass(frozen=True)
class StepEpoch:
    """The step epoch of one sweep.

    Parameters
    ----------
    sweep : int
        Sweep number.
    usable : bool
        True when the sweep is a single rectangular step the fitters can use.
    kind : str
        ``"step"``, or what the sweep is instead: ``"no change"``, ``"ramp"``, ``"noise"``,
        ``"train"``, ``"multi-step"``, ``"too short"``, ``"no current"``.
    reason : str
        Empty when usable; otherwise a sentence saying why the sweep cannot be used.
    holding : float
        Holding current before the step, A.
    amplitude : float
        Step current relative to holding, A (positive = depolarizing).
    onset : float
        Step onset, s from the sweep start (time of the first sample of the step).
    offset : float
        Step offset, s from the sweep start (time of the first sample after the step).
    onset_index, offset_index : int
        The same as sample indices.
    source : str
        ``"recorded"`` (from the stored current) or ``"schedule"`` (from the config).
    noise_a : float
        Robust RMS noise of the recorded current, A (NaN for a schedule).

    Unusable epochs keep what could be measured (holding, first onset, last offset, largest
    excursion for trains and staircases); the rest is NaN and indices are -1.
    """

    sweep: int
    usable: bool
    kind: str
    reason: str
    holding: float
    amplitude: float
    onset: float
    offset: float
    onset_index: int
    offset_index: int
    source: str = "recorded"
    noise_a: float = NAN

    @property
    def duration(self) -> float:
        """Step duration, s."""
        return self.offset - self.onset


def find_steps(recording: Recording, settings: StepSettings) -> tuple[StepEpoch, ...]:
    """Find the step epoch of every sweep of a cell.

    Parameters
    ----------
    recording : Recording
        The cell; sweeps are numbered by their position for the schedule (0 = first sweep).
    settings : StepSettings
        Thresholds and the fallback schedule.

    Returns
    -------
    tuple of StepEpoch
        One per sweep, in recording order.
    """
    return tuple(find_step(sw, settings, i) for i, sw in enumerate(recording.sweeps))


def find_step(sweep: Sweep, settings: StepSettings, index: int = 0) -> StepEpoch:
    """Find the step epoch of one sweep from its injected current (or the schedule).

    Parameters
    ----------
    sweep : Sweep
        The sweep; only ``current`` (A, positive = depolarizing) and ``rate`` (Hz) are read.
    settings : StepSettings
        Thresholds and the fallback schedule.
    index : int
        Position of the sweep in its recording; the schedule's amplitude is
        ``schedule_first_a + index * schedule_increment_a``.

    Returns
    -------
    StepEpoch
        ``usable`` only for a single rectangular step with room before and after it.
    """
    if sweep.current is None:
        return _from_schedule(sweep, settings, index)
    current = np.asarray(sweep.current, dtype=np.float64)
    exact = _exact_pulse(sweep, current, settings)  # before the NaN check: it costs as much
    if exact is not None:
        return exact
    finite = np.isfinite(current)
    if finite.all() and current.size:
        return _from_current(sweep, current, settings)
    if not finite.any():
        return _unusable(sweep, "no current", "the stored current is all NaN")
    idx = np.arange(current.size)
    epoch = _from_current(sweep, np.interp(idx, idx[finite], current[finite]), settings)
    if epoch.usable:
        return epoch
    gaps = f" (the current's {current.size - int(finite.sum())} NaN samples were bridged)"
    return replace(epoch, reason=epoch.reason + gaps)


def _unusable(sweep: Sweep, kind: str, reason: str, **values: float) -> StepEpoch:
    fields = dict(
        holding=NAN, amplitude=NAN, onset=NAN, offset=NAN, onset_index=-1, offset_index=-1
    )
    fields.update(values)
    for key in ("onset_index", "offset_index"):
        fields[key] = int(fields[key])
    return StepEpoch(sweep=sweep.number, usable=False, kind=kind, reason=reason, **fields)


def _from_schedule(sweep: Sweep, settings: StepSettings, index: int) -> StepEpoch:
    onset, duration, first = (
        settings.schedule_onset_s,
        settings.schedule_duration_s,
        settings.schedule_first_a,
    )
    if onset is None or duration is None or first is None:
        return _unusable(
            sweep,
            "no current",
            "no current stored and no step schedule in the config "
            "(set all four: steps.schedule_onset_s, schedule_duration_s, schedule_first_a "
            "and schedule_increment_a)",
            source="schedule",
        )
    amplitude = first + index * (settings.schedule_increment_a or 0.0)
    on, off = round(onset * sweep.rate), round((onset + duration) * sweep.rate)
    epoch = _check_step(sweep, settings, 0.0, amplitude, on, off)
    return replace(epoch, source="schedule")


def _check_step(
    sweep: Sweep,
    settings: StepSettings,
    holding: float,
    amplitude: float,
    on: int,
    off: int,
    noise: float = NAN,
) -> StepEpoch:
    """Build the epoch of a single step, unusable when it leaves too little room."""
    rate, n = sweep.rate, sweep.n_samples
    values = dict(holding=holding, amplitude=amplitude, onset=on / rate, offset=off / rate)
    values.update(onset_index=on, offset_index=off, noise_a=noise)
    if abs(amplitude) < settings.min_amplitude_a:
        return _unusable(
            sweep,
            "no change",
            f"step of {amplitude * 1e12:.3g} pA is below min_amplitude_a",
            **values,
        )
    problems = []
    if on < settings.min_before_s * rate:
        problems.append(f"only {on / rate * 1e3:.3g} ms of baseline before the step")
    if n - off < settings.min_after_s * rate:
        problems.append(f"only {(n - off) / rate * 1e3:.3g} ms after the step")
    if off - on < settings.min_duration_s * rate:
        problems.append(f"the step lasts only {(off - on) / rate * 1e3:.3g} ms")
    if problems:
        return _unusable(sweep, "too short", "; ".join(problems), **values)
    return StepEpoch(sweep.number, True, "step", "", **values)


def _window_noise(current: np.ndarray, width: int) -> np.ndarray:
    """Robust RMS noise per window of ``width`` samples from second differences, A."""
    d2 = np.diff(current, 2)
    np.abs(d2, out=d2)  # in place: one full-length temporary fewer
    n_win = d2.size // width
    windows = d2[: n_win * width].reshape(n_win, width)
    windows.partition(width // 2, axis=1)  # the (upper) median of each window, in place
    return windows[:, width // 2] * _SIGMA_PER_MAD2


def _median(values: np.ndarray) -> float:
    """Upper median (no averaging of the middle pair, no NaN checks: a few times faster)."""
    middle = values.size // 2
    return float(np.partition(values, middle)[middle])


def _level(part: np.ndarray, spread: float | None = None) -> float:
    """Level of a plateau, A: the median of at most ~1000 evenly spread samples (robust and
    fast); with ``spread`` (A), the plateau's mean instead (more precise), taken over the
    samples within ``spread`` of the median when outliers pull the plain mean away."""
    level = _median(part[:: 1 + part.size // 1024])
    if spread is None:
        return level
    mean = float(part.mean())
    if abs(mean - level) <= spread / 20:  # no outliers: the usual case, and the fast one
        return mean
    near = np.abs(part - level) <= spread
    return float(part.mean(where=near)) if near.any() else level


def _edges(d: np.ndarray, threshold: float) -> list[tuple[int, int]]:
    """Runs (start, stop) of the edge detector above half the threshold with one sign that
    peak above the threshold."""
    half = 0.5 * threshold
    idx = np.flatnonzero((d > half) | (d < -half))  # |d| > half without a float temporary
    if idx.size == 0:
        return []
    rising = d[idx] > 0
    breaks = np.flatnonzero((np.diff(idx) > 1) | (rising[1:] != rising[:-1])) + 1
    runs = []
    for part in np.split(np.arange(idx.size), breaks):
        if np.abs(d[idx[part]]).max() > threshold:
            runs.append((int(idx[part[0]]), int(idx[part[-1]]) + 1))
    return runs


def _crossing(current: np.ndarray, lo: int, hi: int, before: float, after: float) -> int:
    """First sample past the 50% crossing between levels ``before`` and ``after`` nearest the
    middle of samples ``lo..hi``."""
    lo, hi = max(lo, 1), min(hi, current.size - 1)
    x = (current[lo - 1 : hi + 1] - 0.5 * (before + after)) * np.sign(after - before)
    up = np.flatnonzero((x[1:] >= 0) & (x[:-1] < 0))
    if up.size == 0:
        return (lo + hi) // 2
    frac = -x[up] / (x[up + 1] - x[up])  # fractional position of the crossing past sample up
    t_cross = lo - 1 + up + frac
    centre = 0.5 * (lo + hi)
    best = np.argmin(np.abs(t_cross - centre))
    return int(math.floor(t_cross[best] - _CROSSING_SHIFT)) + 1


def _edge_window(sweep: Sweep, settings: StepSettings) -> tuple[int, int]:
    """Samples averaged each side of an edge (``k``), and the fewest samples a sweep needs:
    eight edge windows, and one window of the noise estimate (its second differences)."""
    k = max(3, round(settings.edge_window_s * sweep.rate))
    return k, max(8 * k, _noise_width(k) + 2)


def _noise_width(k: int) -> int:
    return max(32, 4 * k)


def _from_current(sweep: Sweep, current: np.ndarray, settings: StepSettings) -> StepEpoch:
    rate, n = sweep.rate, current.size
    k, least = _edge_window(sweep, settings)
    if n < least:
        return _unusable(sweep, "too short", f"the sweep has only {n} samples")
    noise_win = _window_noise(current, _noise_width(k))
    quiet = np.partition(noise_win, noise_win.size // 10)[noise_win.size // 10]
    loud = noise_win > max(4.0 * quiet, 0.5 * settings.min_amplitude_a)
    sigma = _median(noise_win[~loud]) if (~loud).any() else float(quiet)
    if loud.sum() >= max(5, 0.02 * loud.size) or sigma > settings.noise_limit_a:
        rms, share = (float(np.median(noise_win[loud])), loud.mean()) if loud.any() else (sigma, 1)
        return _unusable(
            sweep,
            "noise",
            f"a noise-like current ({rms * 1e12:.3g} pA RMS over {share:.0%} of the sweep)",
            noise_a=sigma,
        )

    cum = np.empty(n + 1)
    cum[0] = 0.0
    np.cumsum(current, out=cum[1:])
    # mean after - mean before sample i+k: (cum[2k:] - 2 cum[k:-k] + cum[:-2k]) / k, in place
    d = np.multiply(cum[k:-k], 2.0)
    np.subtract(cum[2 * k :], d, out=d)
    np.add(d, cum[: -2 * k], out=d)
    d /= k
    threshold = max(settings.min_amplitude_a, 6.0 * sigma * math.sqrt(2.0 / k))
    runs = [(a + k, b + k) for a, b in _edges(d, threshold)]  # as sample indices
    wide = [(a, b) for a, b in runs if b - a > 3 * k]
    if wide:
        a, b = wide[0]
        return _unusable(
            sweep,
            "ramp",
            f"the current changes gradually over {(b - a) / rate * 1e3:.3g} ms "
            f"from {a / rate * 1e3:.4g} ms",
            noise_a=sigma,
        )
    levels, drift = _plateaus(current, runs, 3 * k, max(6.0 * sigma, 0.5 * threshold))
    if drift is not None:
        change, s0, s1 = drift
        if abs(change) > threshold:
            return _unusable(
                sweep,
                "ramp",
                f"the current drifts by {change * 1e12:.3g} pA between {s0 / rate * 1e3:.4g} "
                f"and {s1 / rate * 1e3:.4g} ms",
                holding=_level(current[:k]),  # the current at the sweep start
                noise_a=sigma,
            )
    return _classify(sweep, settings, current, runs, levels, threshold, sigma)


def _exact_pulse(sweep: Sweep, current: np.ndarray, settings: StepSettings) -> StepEpoch | None:
    """The epoch of a command stored as exact levels: one pulse from holding and back, with
    three edge windows or more before, during and after it; None for anything else.

    A stimulus series usually stores the command itself, whose samples change at the two edges
    only. Read from where they change, its epoch is the one the general detector finds (edges
    on the first sample of each level, no noise), in a twelfth of the time (6.2 -> 0.5 ms a cell
    on the benchmark day); any other current (noise, filtered edges, ramps, trains, steps too
    small or too near the ends) is left to the general detector. Two finite levels are all its
    samples hold: there is no NaN to bridge.
    """
    k, least = _edge_window(sweep, settings)  # the general detector's
    if current.size < least:
        return None
    changes = np.flatnonzero(current[1:] != current[:-1])  # a NaN differs from everything
    if changes.size != 2:
        return None
    on, off = int(changes[0]) + 1, int(changes[1]) + 1
    holding, level = float(current[0]) + 0.0, float(current[on])  # + 0.0: no -0.0 holding
    if not (math.isfinite(holding) and math.isfinite(level)):
        return None
    # near the smallest step the general detector's running sums decide: their rounding grows
    # with the samples summed and the holding current
    near = settings.min_amplitude_a * 1e-6 + 64 * current.size * _EPS * abs(holding)
    if current[off] != current[0] or abs(level - holding) <= settings.min_amplitude_a + near:
        return None
    if min(on, off - on, current.size - off) < 3 * k:
        return None
    return _check_step(sweep, settings, holding, level - holding, on, off, 0.0)


def _plateaus(
    current: np.ndarray, runs: list[tuple[int, int]], min_length: int, spread: float
) -> tuple[list[float], tuple[float, int, int] | None]:
    """Level of each plateau between edge runs (A; clipped mean within ``spread`` of the
    median), and the largest change from the first to the last third of a plateau (A) with
    that plateau's bounds (samples)."""
    starts = [0] + [b for _, b in runs]
    stops = [a for a, _ in runs] + [current.size]
    levels: list[float] = []
    drift: tuple[float, int, int] | None = None
    for s0, s1 in zip(starts, stops, strict=True):
        if s1 <= s0:  # edges closer than the guard: take the sample between them
            levels.append(float(current[min((s0 + s1) // 2, current.size - 1)]))
            continue
        part = current[s0:s1]
        levels.append(_level(part, spread))
        if part.size >= min_length:
            third = part.size // 3
            change = _level(part[-third:]) - _level(part[:third])
            if drift is None or abs(change) > abs(drift[0]):
                drift = (change, s0, s1)
    return levels, drift


def _classify(
    sweep: Sweep,
    settings: StepSettings,
    current: np.ndarray,
    runs: list[tuple[int, int]],
    levels: list[float],
    threshold: float,
    sigma: float,
) -> StepEpoch:
    """Tell a single step from no change, a lone edge, a train and a staircase."""
    rate = sweep.rate
    holding = levels[0]
    if not runs:
        return _unusable(
            sweep,
            "no change",
            f"no step above {threshold * 1e12:.3g} pA in the current",
            holding=holding,
            amplitude=0.0,
            noise_a=sigma,
        )
    edges = [_crossing(current, a, b, levels[j], levels[j + 1]) for j, (a, b) in enumerate(runs)]
    excursion = np.asarray(levels) - holding
    largest = float(excursion[np.argmax(np.abs(excursion))])
    known = dict(holding=holding, amplitude=largest, noise_a=sigma)
    known.update(onset=edges[0] / rate, onset_index=edges[0])
    if len(runs) == 1:
        return _unusable(
            sweep,
            "too short",
            f"the current changes once only (at {edges[0] / rate * 1e3:.4g} ms): "
            "no baseline before or no return after the step",
            **known,
        )
    known.update(offset=edges[-1] / rate, offset_index=edges[-1])
    at_holding = np.abs(excursion) <= threshold
    if len(runs) == 2 and at_holding[2]:
        amplitude = levels[1] - holding
        return _check_step(sweep, settings, holding, amplitude, edges[0], edges[1], sigma)
    pulses = excursion[1::2]
    alternates = at_holding[::2].all() and not at_holding[1::2].any()
    alike = np.ptp(pulses) <= max(threshold, 0.1 * np.abs(pulses).max())
    if alternates and alike:  # back to holding between pulses of one size
        return _unusable(sweep, "train", f"{len(runs) // 2} pulses instead of one step", **known)
    return _unusable(
        sweep,
        "multi-step",
        f"{len(runs)} current changes instead of one step (levels "
        + ", ".join(f"{lv * 1e12:.3g}" for lv in levels)
        + " pA)",
        **known,
    )
