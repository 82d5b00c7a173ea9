"""Passive measurements of one current-step sweep, and the settings of the passive fitters.

Every measurement is taken on the trace after mains hum has been fitted and removed (sine and
cosine at 50 and 60 Hz and their harmonics, fitted where the membrane is flat: before the step
and late in it). Windows are in seconds; values in SI units. Injected current positive =
depolarizing, so a hyperpolarizing step has ``step_a < 0`` and negative deflections.

- Baseline and steady state: means over windows that span whole hum cycles.
- Peak: extreme of a boxcar-smoothed trace. Rebound: the same after the step.
- Edge jumps (bridge error x I): the membrane response just after the electrode settles,
  extrapolated back to the edge by a quadratic (and, kept for the cell to choose, a quadratic
  with a t^1.5 term: a small soma charging its dendrite bends the early response).
- Charging curve (hyperpolarizing steps): a single exponential in a window chosen per sweep --
  from ``fit_start_fraction`` of the peak, moved past the faster (dendritic equalisation)
  components found by peeling the early residual, to ``fit_span_tau`` time constants (or to the
  peak when the response sags) -- so tau is the slowest time constant tau0, not the blend a fit
  from onset gives. Where the response sags (Ih) the step response of a membrane with one slow
  restoring gate is fitted instead, and tau is the membrane's frozen-gate time constant.

References
----------
Johnston D, Wu SM-S (1995) Foundations of Cellular Neurophysiology, ch. 2 (RC charging).
Rall W (1969) Time constants and electrotonic length of membrane cylinders and neurons.
Biophys J 9:1483-1508 (peeling of exponentials, tau0 = Rm*Cm).
"""

from __future__ import annotations

import contextlib
import functools
import math
import warnings
from dataclasses import dataclass, replace

import numpy as np

from pipeline.fitters.results import NAN, BiExpFit, ExpFit, SweepFit, sag_response
from pipeline.recording import Sweep
from pipeline.steps import StepEpoch

# span after the settling of the early responses kept for the cell's pooled (soma-cylinder) fit
# of the edges, s: 3 ms, where a soma on a finite dendrite (L ~ 0.6, tau ~ 20 ms) still looks
# semi-infinite yet the sqrt(t) rise is resolved (measured on the demo day's dendritic cells)
EDGE_POOL_S = 3e-3


@dataclass(frozen=True)
class PassiveSettings:
    """How passive properties are measured; the ``[passive]`` table of the config."""

    # pre-step baseline window ending at onset; 0.1 s spans whole 50 and 60 Hz cycles
    baseline_window_s: float = 0.1
    # steady-state window ending at the step offset (the late part of the step)
    ss_window_s: float = 0.2
    # shortest baseline or steady-state window accepted
    min_window_s: float = 0.02
    # relaxation allowed after the offset before the 'after' baseline window may start
    after_delay_s: float = 0.15
    # electrode/amplifier settling after a step edge, left out of every fit
    settle_s: float = 3e-4
    # span after settling used to extrapolate the membrane response back to an edge
    jump_fit_s: float = 2e-3
    # boxcar length for the noise-robust peak and rebound
    peak_smooth_s: float = 0.02
    # bin width of the trace fed to the exponential fits
    bin_s: float = 5e-4
    # the tau fit starts once the response reaches this fraction of its peak...
    fit_start_fraction: float = 0.2
    # ...and not before this time after onset (fit_cell raises it to the cell's equalisation)
    fit_start_min_s: float = 0.0
    # the tau fit ends at this fraction of the peak (or at the peak when the sweep sags)
    fit_end_fraction: float = 0.95
    # without sag, the single-exponential fit runs this many tau after onset (or to the step end)
    fit_span_tau: float = 6.0
    # the fit starts this many fast (dendritic equalising) time constants after onset
    equalization_factor: float = 5.0
    # fewest bins accepted in a charging-curve fit
    min_fit_bins: int = 8
    # 'exp' (single exponential), 'exp+sag' (frozen-gate tau under an Ih sag), 'auto' (exp+sag
    # where the sweep sags), or 'none' (no charging fit)
    charging_model: str = "auto"
    # bins averaged together in the slow part of the exp+sag fit
    sag_coarse_bins: int = 10
    # fit and subtract mains hum (50 and 60 Hz) before measuring
    remove_hum: bool = True
    # harmonics of 50 and 60 Hz fitted (1 = fundamentals only)
    hum_harmonics: int = 2
    # a flat run this long at the trace's extreme counts as clipped, samples
    clip_run_samples: int = 5
    # window after the offset searched for the rebound depolarization
    rebound_window_s: float = 0.3
    # |membrane deflection| bound of the linear part of the V-I relation
    linear_range_v: float = 0.01
    # |peak membrane deflection| bound of the hyperpolarizing sweeps whose fits give tau
    tau_range_v: float = 0.025
    # the same bound for exp+sag fits (the gate's linearisation holds near rest only)
    sag_tau_range_v: float = 0.008
    # smallest hyperpolarizing steps used when fewer lie in the linear range
    n_small_steps: int = 3
    # |membrane deflection| bound of the sweeps where V-I curvature is tested (and fitted)
    iv_range_v: float = 0.025
    # p-value of the F-test below which a higher-degree V-I polynomial is used (slope at rest)
    curvature_p: float = 0.01
    # p-value of the pooled F-test below which the edge jumps are extrapolated with a t^1.5 term
    jump_curvature_p: float = 1e-4
    # subtract the bridge error estimated from the edge jumps
    bridge_correction: bool = True
    # correct deflections for the baseline drift measured across sweeps
    drift_correction: bool = True
    # |holding + bias| below this counts as zero current (sweeps used for Vrest)
    zero_current_a: float = 2e-12
    # membrane potential at the peak where sag_ratio_at_target is read
    sag_target_v: float = -0.09
    # also fit two exponentials (Rall peeling): tau0, tau1, electrotonic length
    two_exp: bool = False
    # tau0/tau1 below this: the fast component is "not resolvable"
    min_tau_ratio: float = 3.0
    # level of the reported intervals
    confidence: float = 0.95

    def __post_init__(self) -> None:
        models = ("auto", "exp", "exp+sag", "none")
        if self.charging_model not in models:
            raise ValueError(
                f"charging_model must be one of {', '.join(models)}; got {self.charging_model!r}"
            )
        for name, low in (("n_small_steps", 1), ("hum_harmonics", 1), ("clip_run_samples", 2),
                          ("min_fit_bins", 4), ("sag_coarse_bins", 1)):  # fmt: skip
            if getattr(self, name) < low:
                raise ValueError(f"{name} must be >= {low}, got {getattr(self, name)!r}")
        for name in ("curvature_p", "jump_curvature_p"):
            if not 0.0 < getattr(self, name) < 1.0:
                raise ValueError(f"{name} must be between 0 and 1, got {getattr(self, name)!r}")


@dataclass(frozen=True)
class _Windows:
    """Sample index ranges [start, stop) of the measurement windows of one sweep."""

    base: tuple[int, int]
    ss: tuple[int, int]
    after: tuple[int, int] | None
    settle: int
    jump: int
    pool: int  # samples after the settling kept for the cell's pooled fit of the edges


def count_nonfinite(v: np.ndarray) -> int:
    """Number of NaN or infinite samples in ``v``."""
    return int(v.size - np.count_nonzero(np.isfinite(v)))


def clipped_runs(v: np.ndarray, min_run: int) -> list[tuple[int, int]]:
    """Sample ranges [start, stop) where the trace sits flat at its maximum or minimum.

    An amplifier or digitizer at its rail returns the same value repeatedly, entered and left
    with a real step; noise never does. Runs touching the sweep's ends, or entered or left by
    less than 1 nV (a noiseless simulated plateau reached asymptotically), are not counted.
    """
    top, bottom = v.max(), v.min()
    if not (math.isfinite(top) and math.isfinite(bottom)):  # NaN or inf: the finite extremes
        finite = v[np.isfinite(v)]
        if finite.size == 0:
            return []
        top, bottom = finite.max(), finite.min()
    runs = []
    for extreme in (top, bottom):
        at = np.flatnonzero(v == extreme)  # few samples unless clipped
        if at.size < min_run:
            continue
        breaks = np.flatnonzero(np.diff(at) > 1)
        starts = np.concatenate(([at[0]], at[breaks + 1]))
        stops = np.concatenate((at[breaks], [at[-1]])) + 1
        for a, b in zip(starts, stops, strict=True):
            if b - a < min_run or a == 0 or b == v.size:
                continue
            if abs(v[a - 1] - extreme) > 1e-9 and abs(v[b] - extreme) > 1e-9:
                runs.append((int(a), int(b)))
    return runs


def coarse_rounding(v: np.ndarray) -> float:
    """The step of the grid the trace lies on (V) when that grid is coarser than its noise,
    else NaN.

    On a grid: every change between neighbouring samples is a whole multiple of the smallest.
    Coarser than the noise: most neighbours away from the extremes are equal (over 70%: white
    noise rounded to steps of 1, 2, 3, 4 SD leaves 27, 50, 74, 90% of neighbours equal; filtered
    noise, whose neighbours are alike, more). A text file written at 1 mV with 0.1 mV of noise is
    such a trace, and there a flat run at its extreme is rounding as often as a rail. Slow
    hum does not count (it moves the trace by less than a step between samples); samples at
    the extremes are left out (a rail's own run). A full pass: for clipped sweeps only.
    """
    finite = v[np.isfinite(v)]
    if finite.size < 3:
        return NAN
    steps = np.diff(finite)
    moved = np.abs(steps[steps != 0])
    if moved.size == 0:
        return NAN
    q = float(moved.min())
    ratio = moved / q
    if np.abs(ratio - np.round(ratio)).max() > 0.01:  # not on a grid: not rounded
        return NAN
    inner = (finite > finite.min()) & (finite < finite.max())
    pairs = inner[:-1] & inner[1:]
    if pairs.sum() < 100:
        return NAN
    return q if float(np.mean(steps[pairs] == 0)) > 0.7 else NAN


def count_clipped(v: np.ndarray, min_run: int) -> int:
    """Number of samples in clipped runs (see :func:`clipped_runs`)."""
    return sum(b - a for a, b in clipped_runs(v, min_run))


@functools.lru_cache(maxsize=8)
def _hum_basis(n: int, rate: float, harmonics: int) -> np.ndarray:
    """Sine/cosine columns at 50 and 60 Hz and harmonics over one period of the hum, shape
    (rows, 4*harmonics); row ``i`` of a sweep is row ``i % rows``. Cached per sweep shape so a
    cell's sweeps share it.

    50 and 60 Hz and all their harmonics repeat every 100 ms, so at rates that are a multiple
    of 10 Hz one period of rows (2000 at 20 kHz) gives every sample's columns exactly (better
    than the sines of a long sweep's large arguments) and the hum of a sweep is that period
    repeated: a fifteenth of the work of the whole basis on a 1.5 s sweep. At any other rate
    the basis spans the sweep. Frequencies within a tenth of the Nyquist frequency of the fit's
    rows (or above it) are left out: there a sine is no longer told apart from its neighbours.
    """
    period = rate / 10.0
    rows = int(period) if period.is_integer() and 0 < period < n else n
    t = np.arange(rows) / rate
    top = 0.45 * rate / _hum_stride(rate)
    cols = []
    for base in (50.0, 60.0):
        for k in range(1, harmonics + 1):
            if base * k < top:
                w = 2 * math.pi * base * k * t
                cols += [np.sin(w), np.cos(w)]
    basis = np.column_stack(cols) if cols else np.empty((rows, 0))
    basis.setflags(write=False)
    return basis


def remove_hum(
    v: np.ndarray, rate: float, regions: list[tuple[int, int]], harmonics: int
) -> np.ndarray:
    """Subtract mains hum fitted on flat regions of the trace.

    Parameters
    ----------
    v : numpy.ndarray
        Voltage, V.
    rate : float
        Sampling rate, Hz.
    regions : list of (start, stop)
        Sample ranges where the membrane is near flat; each gets its own offset and slope so
        slow trends do not leak into the hum.
    harmonics : int
        Harmonics of 50 and 60 Hz fitted.

    Returns
    -------
    numpy.ndarray
        ``v`` minus the fitted hum (NaN samples stay NaN).
    """
    basis = _hum_basis(v.size, rate, harmonics)
    if basis.shape[1] == 0:  # sampled too slowly to see any hum
        return v
    stride = _hum_stride(rate)
    rows = [np.arange(a, b, stride) for a, b in regions]
    if all(np.isfinite(v[r]).all() for r in rows):  # the usual case: the cell's sweeps share it
        fit = _hum_design(v.size, rate, harmonics, tuple(regions))
    else:
        fit = _design(basis, rate, regions, [r[np.isfinite(v[r])] for r in rows])
    if fit is None:
        return v
    idx, design, gram = fit
    try:
        coef = np.linalg.solve(gram, design.T @ v[idx])
    except np.linalg.LinAlgError:
        return v
    hum = np.resize(basis @ coef[: basis.shape[1]], v.size)  # the period, repeated
    return np.subtract(v, hum, out=hum)  # in place: one full-length temporary fewer


def remove_hum_where_flat(
    v: np.ndarray, rate: float, onset_index: int, ss: tuple[int, int], harmonics: int
) -> np.ndarray:
    """``v`` minus the mains hum fitted where a step's membrane is flat, as the fitter does.

    The hum is fitted before the step (samples ``0 .. onset_index``) and in the steady-state
    window ``ss`` (samples): the charging curve would leak into the sinusoids, and so would
    the after-step tail, which still relaxes (and rebounds). A steady-state window that is not
    flat (spikes on a depolarizing step) is left out too: spikes leaked into the fitted hum,
    whose removal then put a spurious sinusoid of ~1 mV into the baseline, and the sweeps that
    fired most failed the noisy-baseline rule. See :func:`remove_hum`.
    """
    before = (0, onset_index)
    return remove_hum(
        v, rate, [before, ss] if _as_flat(v, rate, ss, before) else [before], harmonics
    )


def _hum_stride(rate: float) -> int:
    """Samples of a trace per row of the hum fit: 2.5 kHz is ample for 240 Hz and keeps the
    fit cheap."""
    return max(1, int(rate // 2500))


def _as_flat(v: np.ndarray, rate: float, region: tuple[int, int], flat: tuple[int, int]) -> bool:
    """Whether ``region`` spans at most 3 times the range of the flat ``flat`` (samples as the
    hum fit takes them: a spike's upper half, ~0.5 ms, holds some). False with NaN in either."""
    stride = _hum_stride(rate)
    ranges = [np.ptp(v[a:b:stride]) if b > a else 0.0 for a, b in (region, flat)]
    return bool(ranges[0] <= 3.0 * ranges[1])


def _design(basis: np.ndarray, rate: float, regions, rows: list[np.ndarray]):
    """Rows ``idx`` of the hum fit, its design (hum columns, then an offset and a slope per
    region) and the normal matrix; None with too few rows."""
    idx = np.concatenate(rows)
    if idx.size < 4 * basis.shape[1]:
        return None
    local = np.zeros((idx.size, 2 * len(regions)))
    pos = 0
    for j, ((a, b), r) in enumerate(zip(regions, rows, strict=True)):
        local[pos : pos + r.size, 2 * j] = 1.0
        local[pos : pos + r.size, 2 * j + 1] = (r - (a + b) / 2) / rate
        pos += r.size
    design = np.hstack([basis[idx % basis.shape[0]], local])
    # normal equations: columns are O(1) and few, and this avoids LAPACK's thread start-up cost
    gram = design.T @ design
    for a in (idx, design, gram):
        a.setflags(write=False)
    return idx, design, gram


@functools.lru_cache(maxsize=8)
def _hum_design(n: int, rate: float, harmonics: int, regions: tuple):
    """:func:`_design` of finite sweeps of ``n`` samples, cached: a cell's sweeps share it."""
    stride = _hum_stride(rate)
    rows = [np.arange(a, b, stride) for a, b in regions]
    return _design(_hum_basis(n, rate, harmonics), rate, regions, rows)


def _windows(sweep: Sweep, epoch: StepEpoch, s: PassiveSettings) -> tuple[_Windows | None, str]:
    """Measurement windows of a sweep, or None and the reason they do not fit in it."""
    n, rate = sweep.n_samples, sweep.rate
    on, off = epoch.onset_index, epoch.offset_index
    if not 0 < on < off <= n:
        return None, f"step edges {on}..{off} outside the sweep of {n} samples"
    min_n = max(2, round(s.min_window_s * rate))
    for name, window_s in (("baseline", s.baseline_window_s), ("steady-state", s.ss_window_s)):
        if round(window_s * rate) < min_n:  # time enough, too few samples: the rate is the cause
            return None, (
                f"too few samples: the {name} window of {window_s * 1e3:g} ms holds "
                f"{round(window_s * rate)} at {rate:g} Hz, fewer than the {min_n} needed "
                "(check the sampling rate or the unit of the times)"
            )
    nb = min(round(s.baseline_window_s * rate), on)
    if nb < min_n:
        return None, f"too short: {on / rate * 1e3:.1f} ms before the step for the baseline"
    nss = min(round(s.ss_window_s * rate), (off - on) // 2)
    settle, jump = max(1, round(s.settle_s * rate)), max(4, round(s.jump_fit_s * rate))
    if nss < min_n or off - on < 4 * (settle + jump):
        return None, f"too short: step of {(off - on) / rate * 1e3:.1f} ms"
    after = None
    na = round(s.baseline_window_s * rate)
    if n - na >= off + round(s.after_delay_s * rate):
        after = (n - na, n)
    pool = max(jump, round(EDGE_POOL_S * rate))
    pool = min(pool, (off - on) // 4 - settle)
    return _Windows((on - nb, on), (off - nss, off), after, settle, jump, pool), ""


def _finite(v: np.ndarray, a: int, b: int) -> bool:
    return bool(np.isfinite(v[a:b]).all())


@functools.lru_cache(maxsize=32)
def _extrapolation_weights(first: int, count: int, degree: int) -> np.ndarray:
    """Weights ``w`` such that ``w @ y`` is the least-squares polynomial of ``degree`` through
    ``y`` (samples ``first .. first+count-1`` after an edge) evaluated at the edge (sample 0)."""
    x = (np.arange(first, first + count) - (first + count / 2)) / count
    x0 = -(first + count / 2) / count
    design = np.vander(x, degree + 1, increasing=True)
    w = np.vander([x0], degree + 1, increasing=True) @ np.linalg.pinv(design)
    w = w.ravel()
    w.setflags(write=False)
    return w


def _edge_level(v: np.ndarray, edge: int, first: int, count: int, degree: int = 2) -> float:
    """Level at sample ``edge`` (V) of a polynomial fitted to ``v[edge+first : edge+first+count]``
    (``first`` may be negative: samples before the edge)."""
    a, b = edge + first, edge + first + count
    if a < 0 or b > v.size:
        return NAN
    y = v[a:b]
    if not np.isfinite(y).all():
        return NAN
    return float(_extrapolation_weights(first, count, degree) @ y)


def _boxcar(v: np.ndarray, k: int) -> np.ndarray:
    """Moving average of ``k`` samples ('valid' part), via cumulative sums."""
    k = max(1, min(k, v.size))
    c = np.empty(v.size + 1)
    c[0] = 0.0
    np.cumsum(v, out=c[1:])
    out = np.subtract(c[k:], c[:-k])
    out /= k
    return out


def _bin(
    v: np.ndarray, start: int, stop: int, k: int, rate: float
) -> tuple[np.ndarray, np.ndarray]:
    """Means of ``k``-sample bins of ``v[start:stop]`` and their centre times (s from sweep start)."""
    m = (stop - start) // k
    y = v[start : start + m * k].reshape(m, k).mean(axis=1)
    t = (start + k * np.arange(m) + (k - 1) / 2) / rate
    return t, y


@contextlib.contextmanager
def _quiet():
    """Silence overflow in trial parameters and covariance warnings during a fit: the caller
    checks the result (finite parameters and covariance) and gives a reason instead."""
    from scipy.optimize import OptimizeWarning

    with warnings.catch_warnings(), np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        warnings.simplefilter("ignore", OptimizeWarning)
        yield


def curve_fit(*args, **kwargs):
    """:func:`scipy.optimize.curve_fit`, imported on first use: a cache re-run, which fits
    nothing, never pays for scipy.optimize (DEVELOPERS.md gives the cost)."""
    from scipy.optimize import curve_fit as fit

    return fit(*args, **kwargs)


def _exp(t: np.ndarray, v_inf: float, amp: float, tau: float) -> np.ndarray:
    return v_inf + amp * np.exp(-t / tau)


def _exp_jac(t: np.ndarray, v_inf: float, amp: float, tau: float) -> np.ndarray:
    e = np.exp(-t / tau)
    return np.column_stack([np.ones_like(t), e, amp * t * e / tau**2])


def fit_exponential(t: np.ndarray, y: np.ndarray, tau_guess: float) -> ExpFit:
    """Least-squares fit of ``y = v_inf + amp * exp(-(t - t[0]) / tau)``.

    Parameters
    ----------
    t : numpy.ndarray
        Times, s.
    y : numpy.ndarray
        Voltage, V.
    tau_guess : float
        Starting time constant, s.

    Returns
    -------
    ExpFit
        With NaN values if the fit did not converge.
    """
    t0 = float(t[0])
    tt = t - t0
    e = np.exp(-tt / tau_guess)
    amp0, vinf0 = np.linalg.lstsq(np.column_stack([e, np.ones_like(e)]), y, rcond=None)[0]
    try:
        with _quiet():
            p, cov = curve_fit(_exp, tt, y, p0=(vinf0, amp0, tau_guess), jac=_exp_jac, maxfev=400)
    except (RuntimeError, ValueError):
        return ExpFit(t0=t0, t1=float(t[-1]))
    if not (p[2] > 0 and np.isfinite(cov).all()):
        return ExpFit(t0=t0, t1=float(t[-1]))
    resid = y - _exp(tt, *p)
    ss_tot = float(np.sum((y - y.mean()) ** 2))
    return ExpFit(
        t0=t0,
        t1=float(t[-1]),
        tau=float(p[2]),
        amp=float(p[1]),
        v_inf=float(p[0]),
        r2=1.0 - float(resid @ resid) / ss_tot if ss_tot > 0 else NAN,
        resid_rms=float(np.sqrt(np.mean(resid**2))),
        tau_se=float(np.sqrt(cov[2, 2])),
    )


def _first_crossing(r: np.ndarray, level: float) -> int:
    """Index of the first element of ``r`` at or above ``level``, or -1."""
    hit = np.flatnonzero(r >= level)
    return int(hit[0]) if hit.size else -1


def _fast_tau(t: np.ndarray, resid: np.ndarray, noise: float) -> float:
    """Time constant of the early excess over a slow exponential (one peel), s, or NaN."""
    keep = resid > 3 * noise
    if keep.sum() < 3:
        return NAN
    slope = np.polyfit(t[keep], np.log(resid[keep]), 1)[0]
    return -1.0 / slope if slope < 0 else NAN


def _charging_fit(
    t: np.ndarray,
    y: np.ndarray,
    r: np.ndarray,
    i_peak: int,
    sagging: bool,
    noise: float,
    onset: float,
    s: PassiveSettings,
) -> tuple[ExpFit, float, str]:
    """Fit of the charging curve in an automatically chosen window.

    ``t``, ``y`` are binned times and voltages over the step from just after the onset
    settling; ``r`` is the membrane response normalised to its peak (bridge jump removed), so it
    rises from ~0 to ~1; ``i_peak`` is the bin of the peak. A single exponential is fitted from
    ``fit_start_fraction`` of the peak (and ``fit_start_min_s``) up to the peak when the response
    sags, else over ``fit_span_tau`` time constants; its start then moves past the equalising
    components found by peeling. With sag (``charging_model`` 'auto' and a sag, or 'exp+sag') the
    gate model of :func:`pipeline.fitters.results.sag_response` is fitted from that start to the
    step end, and tau is its frozen-gate time constant. Returns the fit, the peeled fast time
    constant (or NaN), and a reason when there is no fit.
    """
    rs = np.convolve(r, np.ones(5) / 5, mode="same")  # crossings of a smoothed response
    i0 = _first_crossing(rs, s.fit_start_fraction)
    i1 = _first_crossing(rs, s.fit_end_fraction)
    i1 = i_peak if i1 < 0 or (sagging and i1 > i_peak) else i1
    if i0 < 0 or i1 - i0 + 1 < s.min_fit_bins:
        return ExpFit(), NAN, "charging curve too short or too noisy to fit"
    guess = (t[i1] - t[i0]) / math.log(
        (1 - s.fit_start_fraction) / (1 - min(s.fit_end_fraction, 0.99))
    )
    fit = fit_exponential(t[i0 : i1 + 1], y[i0 : i1 + 1], max(guess, 1e-4))
    if not fit.ok:
        return fit, NAN, "charging-curve fit did not converge"
    if not sagging:  # the plateau pins v_inf down: run the fit towards steady state
        i1 = min(t.size - 1, int(np.searchsorted(t, t[0] + s.fit_span_tau * fit.tau)))
        fit = _refit(fit, t, y, i0, i1)
    use_sag = s.charging_model == "exp+sag" or (s.charging_model == "auto" and sagging)

    def fit_from(j: int) -> ExpFit:
        if use_sag:
            gated = fit_sag_model(t[j:], y[j:], onset, fit, t[i_peak], s.sag_coarse_bins)
            if gated.ok and math.isfinite(gated.tau_se):
                return gated
        return _refit(
            fit, t, y, j, max(i1, min(t.size - 1, j + s.min_fit_bins)) if not sagging else i1
        )

    # peel: a fit starting one tau in is free of the faster equalising components; the early
    # excess of the data over it gives their time constant, and the fit starts after they decay
    # (skipped when the cell's equalisation time is given: fit_cell found it on larger steps)
    j0, tau_fast = i0, NAN
    if s.fit_start_min_s <= 0:
        j_late = int(np.searchsorted(t, t[0] + fit.tau))
        room = j_late - i0 >= s.min_fit_bins and t.size - j_late >= s.min_fit_bins
        late = fit_from(j_late) if room else fit
        excess = (y[:j_late] - late.curve(t[:j_late])) * np.sign(fit.amp)  # > 0: data lags
        tau_fast = _fast_tau(t[:j_late], excess, noise)
        if np.isfinite(tau_fast) and tau_fast < late.tau / 2:
            j0 = max(j0, int(np.searchsorted(t, t[0] + s.equalization_factor * tau_fast)))
    j0 = max(j0, int(np.searchsorted(t, onset + s.fit_start_min_s)))
    if not use_sag and sagging and i1 - j0 + 1 < s.min_fit_bins:
        return ExpFit(), tau_fast, "charging-curve fit window ends before it can start"
    return fit_from(j0), tau_fast, ""


def _rebin(t: np.ndarray, y: np.ndarray, edges: list[int], sizes: list[int]):
    """Average groups of ``sizes[j]`` bins between ``edges[j]`` and ``edges[j+1]``; also return
    the number of fine bins in each (for the fit weights)."""
    ts, ys, counts = [], [], []
    for a, b, k in zip(edges[:-1], edges[1:], sizes, strict=True):
        m = max(0, b - a) // k
        ts.append(t[a : a + m * k].reshape(m, k).mean(axis=1))
        ys.append(y[a : a + m * k].reshape(m, k).mean(axis=1))
        counts.append(np.full(m, float(k)))
    return np.concatenate(ts), np.concatenate(ys), np.concatenate(counts)


def fit_sag_model(
    t: np.ndarray, y: np.ndarray, onset: float, first: ExpFit, t_peak: float, coarse: int = 10
) -> ExpFit:
    """Fit the step response of a membrane with a slow restoring gate (Ih-like sag).

    Parameters
    ----------
    t, y : numpy.ndarray
        Binned times (s from the sweep start) and voltages (V), from the fit start to the step end.
    onset : float
        Step onset, s (time origin of the model).
    first : ExpFit
        Single-exponential fit of the rise, for starting values.
    t_peak : float
        Time of the peak deflection, s.
    coarse : int
        Bins averaged together after the first few membrane time constants (the slow sag
        needs no finer sampling; keeps the fit cheap).

    Returns
    -------
    ExpFit
        With ``model="exp+sag"``; ``tau`` the frozen-gate membrane time constant. NaN if the fit
        failed.
    """
    if t.size < 12 or not first.ok:
        return ExpFit()
    # fine bins for the first tau, 4 together up to 4 tau, ``coarse`` together for the slow sag
    near, far = (int(np.searchsorted(t, t[0] + k * first.tau)) for k in (1.0, 4.0))
    tb, yb, count = _rebin(t, y, [0, near, max(near, far), t.size], [1, 4, coarse])
    if tb.size < 12:
        return ExpFit()
    v_on = first.v_inf + first.amp * math.exp((first.t0 - onset) / first.tau)
    v_inf = float(y[-max(1, y.size // 10) :].mean())
    g0 = v_inf - v_on
    g_inst = first.v_inf - v_on
    kappa0 = max(0.02, g_inst / g0 - 1.0) if g0 != 0 else 0.1
    tau_sag0 = max(2 * first.tau, t_peak - onset)
    tt = tb - onset

    last: dict = {}  # x(t) at the last parameters: the Jacobian is asked where f just was

    def shape(x, log_tau, log_tau_sag, kappa):
        key = (log_tau, log_tau_sag, kappa)
        if last.get("key") != key:
            last.update(key=key, x=sag_response(x, math.exp(log_tau), math.exp(log_tau_sag), kappa))
        return last["x"]

    def model(x, v_inf, g, log_tau, log_tau_sag, kappa):
        return v_inf - g + g * shape(x, log_tau, log_tau_sag, kappa)

    def jac(x, v_inf, g, log_tau, log_tau_sag, kappa):
        # x(t) is shared by all columns: 3 extra evaluations instead of curve_fit's 5
        base = shape(x, log_tau, log_tau_sag, kappa)
        cols = [np.ones_like(x), base - 1.0]
        for k, h in ((0, 1e-6), (1, 1e-6), (2, 1e-6 * max(1.0, abs(kappa)))):
            q = [log_tau, log_tau_sag, kappa]
            q[k] += h
            cols.append(g * (sag_response(x, math.exp(q[0]), math.exp(q[1]), q[2]) - base) / h)
        return np.column_stack(cols)

    p0 = (v_inf, g0, math.log(first.tau), math.log(tau_sag0), kappa0)
    try:
        with _quiet():
            p, cov = curve_fit(model, tt, yb, p0=p0, sigma=1 / np.sqrt(count), jac=jac, maxfev=600)
    except (RuntimeError, ValueError, OverflowError, ZeroDivisionError):
        return ExpFit()
    if not (np.isfinite(p).all() and np.isfinite(cov).all()):
        return ExpFit()
    resid = yb - model(tt, *p)
    w = count / count.sum()
    ss_tot = float(w @ (yb - w @ yb) ** 2)
    tau = math.exp(p[2])
    return ExpFit(
        t0=float(t[0]),
        t1=float(t[-1]),
        tau=tau,
        amp=float(p[1]),
        v_inf=float(p[0]),
        r2=1.0 - float(w @ resid**2) / ss_tot if ss_tot > 0 else NAN,
        resid_rms=float(np.sqrt(w @ resid**2)),
        tau_se=tau * float(np.sqrt(cov[2, 2])),
        model="exp+sag",
        onset=onset,
        tau_sag=math.exp(p[3]),
        kappa=float(p[4]),
        kappa_se=float(np.sqrt(cov[4, 4])),
    )


def _refit(fit: ExpFit, t: np.ndarray, y: np.ndarray, i0: int, i1: int) -> ExpFit:
    """Refit on bins ``i0..i1``, keeping the previous fit if the new one fails, or if it was
    fitted on those very bins (a least-squares fit is its own refit; a third of the sweeps'
    refits were of that kind)."""
    if i1 - i0 < 3 or (fit.ok and fit.t0 == float(t[i0]) and fit.t1 == float(t[i1])):
        return fit
    refit = fit_exponential(t[i0 : i1 + 1], y[i0 : i1 + 1], fit.tau)
    return refit if refit.ok else fit


def _biexp(t, v_inf, a0, tau0, a1, tau1):
    return v_inf + a0 * np.exp(-t / tau0) + a1 * np.exp(-t / tau1)


def fit_two_exponentials(t: np.ndarray, y: np.ndarray, slow: ExpFit, tau_fast: float) -> BiExpFit:
    """Fit ``y = v_inf + a0 exp(-(t-t0)/tau0) + a1 exp(-(t-t0)/tau1)`` started from a slow fit.

    Parameters
    ----------
    t, y : numpy.ndarray
        Binned times (s) and voltages (V) from just after the onset settling.
    slow : ExpFit
        Single-exponential fit of the late part (starting values for v_inf, tau0).
    tau_fast : float
        Peeled fast time constant, s (starting value for tau1; NaN: tau0 / 10).

    Returns
    -------
    BiExpFit
        NaN values if the fit failed.
    """
    t0 = float(t[0])
    tt = t - t0
    tau1 = tau_fast if np.isfinite(tau_fast) else slow.tau / 10
    a0 = slow.amp * math.exp(-(t0 - slow.t0) / slow.tau)
    a1 = float(y[0] - slow.v_inf - a0)
    try:
        with _quiet():
            p, cov = curve_fit(_biexp, tt, y, p0=(slow.v_inf, a0, slow.tau, a1, tau1), maxfev=2000)
    except (RuntimeError, ValueError):
        return BiExpFit(t0=t0, t1=float(t[-1]))
    if p[4] > p[2]:  # keep tau0 the slow one
        p = p[[0, 3, 4, 1, 2]]
        cov = cov[np.ix_([0, 3, 4, 1, 2], [0, 3, 4, 1, 2])]
    if not (p[2] > 0 and p[4] > 0 and np.isfinite(cov).all()):
        return BiExpFit(t0=t0, t1=float(t[-1]))
    resid = y - _biexp(tt, *p)
    return BiExpFit(
        t0=t0,
        t1=float(t[-1]),
        v_inf=float(p[0]),
        amp0=float(p[1]),
        tau0=float(p[2]),
        amp1=float(p[3]),
        tau1=float(p[4]),
        tau0_se=float(np.sqrt(cov[2, 2])),
        tau1_se=float(np.sqrt(cov[4, 4])),
        resid_rms=float(np.sqrt(np.mean(resid**2))),
    )


@functools.lru_cache(maxsize=32)
def _jump_design(first: int, count: int, curved: bool) -> tuple[np.ndarray, np.ndarray]:
    """Design (powers of the time since the edge) and its pseudo-inverse for extrapolating the
    membrane response back to an edge: 1, t, t^2, plus t^1.5 when ``curved`` (the early
    response of a soma with a dendritic cable bends like a power series in sqrt(t))."""
    x = np.arange(first, first + count) / count
    powers = (0.0, 1.0, 1.5, 2.0) if curved else (0.0, 1.0, 2.0)
    design = np.column_stack([x**p for p in powers])
    pinv = np.linalg.pinv(design)
    design.setflags(write=False)
    pinv.setflags(write=False)
    return design, pinv


def _edge_extrapolations(v: np.ndarray, edge: int, first: int, count: int):
    """Level at ``edge`` (V) from the plain and the curved design, and their residual sums of
    squares (V^2); NaNs when the samples run out or are not finite."""
    y = v[edge + first : edge + first + count]
    if y.size < count or not np.isfinite(y).all():
        return NAN, NAN, NAN, NAN
    out = []
    for curved in (False, True):
        design, pinv = _jump_design(first, count, curved)
        coef = pinv @ y
        resid = y - design @ coef
        out += [float(coef[0]), float(resid @ resid)]
    return out[0], out[2], out[1], out[3]


@functools.lru_cache(maxsize=8)
def _centred(n: int) -> tuple[np.ndarray, float]:
    """Sample positions centred on the middle of ``n`` samples, and their sum of squares."""
    x = np.arange(n) - (n - 1) / 2
    x.setflags(write=False)
    return x, float(x @ x)


def _scatter_about_line(y: np.ndarray, mean: float) -> float:
    """RMS scatter (units of ``y``) of ``y`` about its least-squares line (``mean`` = its mean),
    as ``np.std(y - line)``; in closed form (polyfit costs 20 times more)."""
    x, sxx = _centred(y.size)
    r = y - mean
    r -= (float(x @ y) / sxx) * x
    r -= r.mean()
    return math.sqrt(float(r @ r) / y.size)


# a rise this far above baseline and steady state within a step is a spike (subthreshold
# overshoot from a deactivating sag current is a few mV)
_SPIKE_V = 0.02


def _edge_jumps(
    v: np.ndarray, w: _Windows, edges: tuple[int, int], base: float, rms: float, rate: float
) -> dict:
    """Fast jumps (V) at onset and offset: the membrane response extrapolated back to each edge
    from just after the electrode settling, minus the level just before the edge (the baseline
    mean; a line through the steady-state window at the offset). Both the plain and the curved
    extrapolation are kept, with the residual sums that let the cell choose between them, and
    the early responses themselves for the cell's pooled fit.

    The offset is not measured when the membrane was not steady before it: a steady-state window
    scattered about its line by more than twice the baseline noise holds spikes (or the like),
    whose after-potentials would be read as the edge's jump. Neither edge is measured in a
    sweep that spikes during the step (``v`` more than :data:`_SPIKE_V` above both the baseline
    and the steady state): sodium current bends its early response before the first spike.
    """
    on, off = edges
    ss = v[slice(*w.ss)]
    ss_mean = float(ss.mean())
    spiking = float(np.max(v[on:off])) - max(base, ss_mean) > _SPIKE_V
    nss = w.ss[1] - w.ss[0]
    pre = _edge_level(v, off, -nss, nss, degree=1)
    steady = _scatter_about_line(ss, ss_mean) <= 2.0 * rms + 1e-9
    j: dict = {}
    drop = ssr = dof = 0.0
    for name, edge, level in (("onset", on, base), ("offset", off, pre)):
        plain, curved, ssr_p, ssr_c = _edge_extrapolations(v, edge, w.settle, w.jump)
        if spiking or (name == "offset" and not steady):
            plain = curved = ssr_c = NAN
        j[f"{name}_jump_v"] = plain - level
        j[f"{name}_jump_curved_v"] = curved - level
        seg = v[edge + w.settle : edge + w.settle + w.pool]
        ok = math.isfinite(plain) and seg.size == w.pool and bool(np.isfinite(seg).all())
        j[f"{name}_edge_v"] = tuple((seg - level).tolist()) if ok else ()
        if math.isfinite(ssr_c):
            drop, ssr, dof = drop + ssr_p - ssr_c, ssr + ssr_c, dof + w.jump - 4
    j.update(jump_ssr_drop_v2=drop, jump_ssr_v2=ssr, jump_dof=int(dof))
    j.update(edge_start_s=w.settle / rate, edge_dt_s=1.0 / rate)
    return j


def fit_sweep(sweep: Sweep, epoch: StepEpoch, settings: PassiveSettings) -> SweepFit:
    """Passive measurements of one step sweep.

    Parameters
    ----------
    sweep : Sweep
        The recorded sweep (V, A, Hz).
    epoch : StepEpoch
        Its step epoch (from :func:`pipeline.steps.find_steps` or built by hand).
    settings : PassiveSettings
        Windows and fit options.

    Returns
    -------
    SweepFit
        Baseline (mean and RMS), steady-state and peak deflections, edge jumps, the charging fit
        (hyperpolarizing steps only), sag ratio and rebound (hyperpolarizing steps), apparent
        input resistance ``ss_dv / step_a`` (bridge error included). Values that could not be
        measured are NaN and ``reason`` says why; bad input never raises.

    Notes
    -----
    ``sag_ratio = (V_peak - V_ss) / (V_peak - V_base)``, 0 = no sag, with the bridge jump removed
    from the peak deflection (*common practice* definition, one of several in use).
    """
    return complete_sweep(measure_sweep(sweep, epoch, settings), settings)


@dataclass(frozen=True, eq=False)  # compared by identity: it holds arrays and dicts
class SweepMeasure:
    """A hyperpolarizing sweep measured up to its charging-curve fit.

    What :func:`complete_sweep` needs to fit the charging curve, so that a cell's second pass
    (other ``fit_start_min_s`` or ``charging_model``) re-reads no trace. Times in s from the
    sweep start, voltages in V.
    """

    settings: PassiveSettings  # those it was measured with
    head: dict  # SweepFit fields known before any window is measured
    fit: dict  # SweepFit fields measured so far
    reasons: tuple[str, ...]  # why some of them are NaN
    t: np.ndarray  # bin centres over the step from just after the onset settling, s
    y: np.ndarray  # bin means, V (hum removed)
    r: np.ndarray  # membrane response normalised to its peak (bridge jump removed)
    i_peak: int  # bin of the peak
    sagging: bool  # the response sags back from its peak by more than the noise
    noise: float  # SD of a bin mean, V
    onset: float  # step onset, s
    ss_mid: float  # middle of the steady-state window, s

    def same_charging(self, a: PassiveSettings, b: PassiveSettings) -> bool:
        """True when the charging fit of this sweep is the same computation under ``a`` and
        ``b`` (e.g. 'auto' and 'exp+sag' for a sweep that sags)."""
        return _effective_model(a, self.sagging) == _effective_model(b, self.sagging)


def _effective_model(s: PassiveSettings, sagging: bool) -> PassiveSettings:
    """``s`` with ``charging_model`` resolved to what a sweep that does (not) sag gets."""
    model = s.charging_model
    if model == "auto":
        model = "exp+sag" if sagging else "exp"
    return replace(s, charging_model=model)


def measure_sweep(
    sweep: Sweep, epoch: StepEpoch, settings: PassiveSettings
) -> SweepFit | SweepMeasure:
    """Everything :func:`fit_sweep` measures before the charging-curve fit.

    Parameters
    ----------
    sweep : Sweep
        The recorded sweep (V, A, Hz).
    epoch : StepEpoch
        Its step epoch.
    settings : PassiveSettings
        Windows and fit options.

    Returns
    -------
    SweepFit or SweepMeasure
        The finished SweepFit when the sweep gets no charging fit (depolarizing, unusable,
        within the noise...), else what :func:`complete_sweep` fits it from.
    """
    v = sweep.voltage
    clipped = count_clipped(v, settings.clip_run_samples)
    rounding = coarse_rounding(v) if clipped else NAN
    head = dict(
        sweep=sweep.number,
        step_a=float(epoch.amplitude),
        holding_a=float(epoch.holding),
        bias_a=_bias(sweep),
        start_time_s=sweep.start_time,
        onset_s=float(epoch.onset),
        nonfinite_samples=count_nonfinite(v),
        # a trace rounded more coarsely than its noise sits on its extreme levels for long
        # runs: they cannot be told from a rail, so they are not counted (the cell says so)
        clipped_samples=0 if math.isfinite(rounding) else clipped,
        rounding_v=rounding,
    )
    if not epoch.usable:
        return SweepFit(**head, reason=epoch.reason or f"not a single step ({epoch.kind})")
    if not (math.isfinite(epoch.amplitude) and epoch.amplitude != 0):
        return SweepFit(**head, reason="zero step amplitude")
    w, why = _windows(sweep, epoch, settings)
    if w is None:
        return SweepFit(**head, reason=why)
    return _measure(sweep, epoch, settings, w, head)


def complete_sweep(m: SweepFit | SweepMeasure, settings: PassiveSettings) -> SweepFit:
    """Fit the charging curve of a measured sweep.

    Parameters
    ----------
    m : SweepFit or SweepMeasure
        From :func:`measure_sweep`; a SweepFit is returned as it is.
    settings : PassiveSettings
        Those ``m`` was measured with, up to ``fit_start_min_s`` and ``charging_model`` (the
        only ones the charging fit reads that a cell's second pass changes).

    Returns
    -------
    SweepFit
        As :func:`fit_sweep` gives it.

    Raises
    ------
    ValueError
        When ``settings`` differs from those of ``m`` in anything else.
    """
    if isinstance(m, SweepFit):
        return m
    if not _same_but_fit(settings, m.settings):
        raise ValueError("complete_sweep: settings differ from the measurement's beyond the fit")
    reasons = list(m.reasons)
    if settings.charging_model == "none":
        return SweepFit(
            **m.head, **m.fit, reason="; ".join(reasons + ["charging curve not fitted"])
        )
    charging, tau_fast, why = _charging_fit(
        m.t, m.y, m.r, m.i_peak, m.sagging, m.noise, m.onset, settings
    )
    if why:
        reasons.append(why)
    fit = dict(m.fit, charging=charging, tau_fast_s=tau_fast)
    left = math.exp(-(m.ss_mid - m.onset) / charging.tau) if charging.ok else 0
    if left > 0.01:  # the steady-state window is still on the charging curve
        reasons.append(f"steady state not reached: {100 * left:.0f}% of the charging left")
    if settings.two_exp and charging.ok and charging.model == "exp":
        end = int(np.searchsorted(m.t, charging.t1, side="right"))
        fit["charging2"] = fit_two_exponentials(m.t[:end], m.y[:end], charging, tau_fast)
    return SweepFit(**m.head, **fit, reason="; ".join(reasons))


@functools.lru_cache(maxsize=32)
def _same_but_fit(a: PassiveSettings, b: PassiveSettings) -> bool:
    """True when ``a`` and ``b`` differ at most in what the charging fit alone reads; cached
    (a cell's sweeps ask with the same few settings)."""
    return replace(a, charging_model=b.charging_model, fit_start_min_s=b.fit_start_min_s) == b


def _bias(sweep: Sweep) -> float:
    value = sweep.settings.get("bias_current_a", 0.0)
    try:
        return float(value)
    except (TypeError, ValueError):
        return NAN


def _measure(
    sweep: Sweep, epoch: StepEpoch, s: PassiveSettings, w: _Windows, head: dict
) -> SweepFit | SweepMeasure:
    """The measurements proper, once the windows are known to fit in the sweep."""
    raw, rate = sweep.voltage, sweep.rate
    on, off = epoch.onset_index, epoch.offset_index
    reasons: list[str] = []
    clipped = _clip_mask(raw, s.clip_run_samples) if head["clipped_samples"] else None

    def usable(a: int, b: int, what: str) -> bool:
        if not _finite(raw, a, b):
            reasons.append(f"non-finite samples in the {what} window")
            return False
        if clipped is not None and clipped[a:b].any():
            reasons.append(f"clipped samples in the {what} window")
            return False
        return True

    if not usable(*w.base, "baseline"):
        return SweepFit(**head, baseline_window=_secs(w.base, rate), reason="; ".join(reasons))
    v = remove_hum_where_flat(raw, rate, on, w.ss, s.hum_harmonics) if s.remove_hum else raw
    base = float(v[slice(*w.base)].mean())
    # the noise the fits see: mains hum, removed above, is not noise of the recording's own
    rms = float(v[slice(*w.base)].std())
    after = NAN
    if w.after is None:
        reasons.append("no relaxed window after the step for the 'after' baseline")
    elif usable(*w.after, "after-step"):
        after = float(v[slice(*w.after)].mean())
    fit = dict(
        baseline_v=base,
        baseline_rms_v=rms,
        baseline_after_v=after,
        baseline_window=_secs(w.base, rate),
        ss_window=_secs(w.ss, rate),
    )
    if not usable(on, off, "step"):
        return SweepFit(**head, **fit, reason="; ".join(reasons))
    ss_dv = float(v[slice(*w.ss)].mean()) - base
    jumps = _edge_jumps(v, w, (on, off), base, rms, rate)
    j_on, j_off = jumps["onset_jump_v"], jumps["offset_jump_v"]
    sign = 1.0 if epoch.amplitude > 0 else -1.0
    smooth = _boxcar(v[on + w.settle : off], max(1, round(s.peak_smooth_s * rate)))
    k_peak = int(np.argmax(smooth) if sign > 0 else np.argmin(smooth))
    peak_dv = float(smooth[k_peak]) - base
    fit.update(ss_dv=ss_dv, peak_dv=peak_dv, **jumps)
    fit["rin_ohm"] = ss_dv / epoch.amplitude
    if sign > 0:
        reasons.append("depolarizing step: no charging fit, sag or rebound")
        return SweepFit(**head, **fit, reason="; ".join(reasons))
    jump = _mean_jump(j_on, j_off)
    if not math.isfinite(jump):
        reasons.append("edge jumps not measurable")
        jump = 0.0
    peak_m = peak_dv - jump
    fit["sag_ratio"] = (peak_dv - ss_dv) / peak_m if peak_m < 0 else NAN
    fit["rebound_v"] = _rebound(
        v, off + w.settle, round(s.rebound_window_s * rate), s, rate, base, reasons
    )
    ksm = max(1, round(s.peak_smooth_s * rate))
    if not (-peak_dv > max(5 * rms / math.sqrt(ksm), 1e-7) and peak_m < 0):  # 5 SD, smoothed
        reasons.append("deflection within the noise: no charging fit")
        return SweepFit(**head, **fit, reason="; ".join(reasons))
    k = max(1, round(s.bin_s * rate))
    t, y = _bin(v, on + w.settle, off, k, rate)
    r = (y - base - jump) / peak_m
    i_peak = min(int((k_peak + ksm / 2) // k), t.size - 1)
    noise = max(rms / math.sqrt(k), 1e-7)  # floor: noiseless traces still have rounding
    # a sag peaks and then relaxes: a peak inside the steady-state window is a response still
    # charging there (a step short for its tau), not a restoring gate
    before_ss = on + w.settle + k_peak + ksm // 2 < w.ss[0]
    sagging = before_ss and ss_dv - peak_dv > max(5 * rms / math.sqrt(ksm), 0.01 * abs(peak_m))
    ss_mid = float(np.mean(w.ss)) / rate
    return SweepMeasure(
        s, head, fit, tuple(reasons), t, y, r, i_peak, sagging, noise, epoch.onset, ss_mid
    )


def _mean_jump(j_on: float, j_off: float) -> float:
    """Onset jump estimate (V) from both edges: the offset jump is the mirror of the onset one."""
    vals = [x for x in (j_on, -j_off) if math.isfinite(x)]
    return float(np.mean(vals)) if vals else NAN


def _rebound(v, start, count, s, rate, base, reasons) -> float:
    """Largest smoothed depolarization above baseline after a hyperpolarizing step, V."""
    seg = v[start : start + count]
    k = round(s.peak_smooth_s * rate)
    if seg.size < 2 * k:
        reasons.append("no room after the step for the rebound")
        return NAN
    if not np.isfinite(seg).all():
        reasons.append("non-finite samples in the rebound window")
        return NAN
    return float(_boxcar(seg, k).max()) - base


def _clip_mask(v: np.ndarray, min_run: int) -> np.ndarray:
    """Boolean mask of samples in clipped runs."""
    mask = np.zeros(v.size, dtype=bool)
    for a, b in clipped_runs(v, min_run):
        mask[a:b] = True
    return mask


def _secs(window: tuple[int, int], rate: float) -> tuple[float, float]:
    return (window[0] / rate, window[1] / rate)
