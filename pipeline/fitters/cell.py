"""Passive properties of one cell from its sweep measurements (cheap: no trace is re-read).

- Vrest: the resting potential at the start of the recording -- a line through the baselines
  of the sweeps at zero holding and bias current against time, read at the first of them --
  and its drift over the recording; the drift rate also corrects every deflection for the
  baseline's change between its baseline and steady-state windows.
- Bridge error: slope through the origin of the edge jumps against the current (onset: +I,
  offset: -I), robust to a few bad edges; the t^1.5 extrapolation of the jumps is used when a
  pooled F-test says the early responses bend.
- Rin is the bridge-corrected steady-state slope near rest: the slope through the origin of
  (step current, steady-state deflection) over the hyperpolarizing sweeps whose membrane
  deflection lies within ``linear_range_v`` (at least the ``n_small_steps`` smallest); where the
  V-I relation bends (Ih, inward rectification; F-tests of a quadratic and a cubic through the
  origin over the sweeps within ``iv_range_v``) the slope at zero current of that polynomial;
  minus the bridge error. ``iv_curvature`` = chord at the largest step / Rin - 1.
- Tau: inverse-variance weighted mean (Birge-scaled interval) of the per-sweep tau0 fits within
  ``tau_range_v``; where the cell sags those are frozen-gate time constants of the exp+sag
  model (within ``sag_tau_range_v``).
- Cm = tau / R_frozen, R_frozen the input resistance before the slow gate moves: Rin plus the
  part of each deflection the gate took back (kappa times the gated mode's deflection), read at
  rest from a line through the sweeps' values; R_frozen = Rin without sag. Interval from the
  relative half-widths in quadrature, on the log scale (Cm * exp(-+rel): never below zero).

References
----------
Johnston D, Wu SM-S (1995) Foundations of Cellular Neurophysiology, ch. 2 (Rin = dV/dI,
tau = Rin*Cm). Rall W (1969) Biophys J 9:1483-1508 (L = pi / sqrt(tau0/tau1 - 1)).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from pipeline.fitters.results import NAN, CellFit, SweepFit
from pipeline.fitters.sweep import PassiveSettings


@dataclass(frozen=True)
class _Slope:
    """A regression slope with its standard error and degrees of freedom."""

    value: float = NAN
    se: float = NAN
    dof: int = 0


def _through_origin(x: np.ndarray, y: np.ndarray) -> _Slope:
    """Least-squares slope of ``y = b x`` (ΔV is 0 at zero step current by construction)."""
    if x.size == 0:
        return _Slope()
    sxx = float(x @ x)
    b = float(x @ y) / sxx
    dof = x.size - 1
    se = math.sqrt(float(np.sum((y - b * x) ** 2)) / dof / sxx) if dof > 0 else NAN
    return _Slope(b, se, dof)


def _polynomial_at_rest(x: np.ndarray, y: np.ndarray, degree: int) -> tuple[_Slope, float]:
    """Slope at zero of ``y = a1 x + ... + ad x**d`` (through the origin) and its residual sum
    of squares."""
    scale = float(np.max(np.abs(x)))  # unit-scaled powers keep the design well conditioned
    design = np.vander(x / scale, degree + 1, increasing=True)[:, 1:]
    coef, *_ = np.linalg.lstsq(design, y, rcond=None)
    dof = x.size - degree
    resid = y - design @ coef
    ssr = float(resid @ resid)
    if dof <= 0:  # as many sweeps as coefficients: a slope, no error estimate
        return _Slope(float(coef[0]) / scale, NAN, 0), ssr
    cov = ssr / dof * np.linalg.inv(design.T @ design)
    return _Slope(float(coef[0]) / scale, float(math.sqrt(cov[0, 0])) / scale, dof), ssr


def _curved_slope(x: np.ndarray, y: np.ndarray, p_max: float) -> tuple[_Slope, int]:
    """Slope at rest of the lowest-degree polynomial through the origin (1 to 3) that no higher
    degree beats by an F-test at ``p_max``; returns it and the degree."""
    best, ssr = _polynomial_at_rest(x, y, 1)
    degree = 1
    for d in (2, 3):
        if x.size < d + 3:
            break
        cand, ssr_d = _polynomial_at_rest(x, y, d)
        f = (ssr - ssr_d) / (ssr_d / cand.dof) if ssr_d > 0 else math.inf
        if _f_sf(1, cand.dof, f) >= p_max:
            break
        best, ssr, degree = cand, ssr_d, d
    return best, degree


def _robust_origin_fit(x: np.ndarray, y: np.ndarray) -> tuple[_Slope, np.ndarray]:
    """Through-origin slope after dropping points beyond 5 robust SD (a spike at an edge), and
    the mask of the points kept."""
    fit = _through_origin(x, y)
    everything = np.ones(x.size, dtype=bool)
    if x.size < 4:
        return fit, everything
    resid = y - fit.value * x
    mad = 1.4826 * float(np.median(np.abs(resid - np.median(resid))))
    keep = np.abs(resid) <= 5 * mad if mad > 0 else everything
    return (_through_origin(x[keep], y[keep]), keep) if keep.sum() >= 2 else (fit, everything)


def _robust_origin_slope(x: np.ndarray, y: np.ndarray) -> _Slope:
    """Through-origin slope after dropping points beyond 5 robust SD (a spike at an edge)."""
    return _robust_origin_fit(x, y)[0]


def _f_sf(dfn: int, dfd: int, f: float) -> float:
    """Upper tail of the F distribution (as scipy.stats.f.sf, without importing scipy.stats);
    a statistic at or below 0 (rounding) has p = 1."""
    from scipy import special  # here, not at import: scipy costs ~0.3 s a process

    if f <= 0:
        return 1.0
    return 0.0 if math.isinf(f) else float(special.fdtrc(dfn, dfd, f))


def _interval(value: float, se: float, dof: int, level: float) -> tuple[float, float]:
    """Two-sided t interval (normal when dof is 0 and se is known)."""
    from scipy import special  # here, not at import: scipy costs ~0.3 s a process

    if not (math.isfinite(value) and math.isfinite(se)):
        return (NAN, NAN)
    q = special.stdtrit(dof, 0.5 + level / 2) if dof > 0 else special.ndtri(0.5 + level / 2)
    return (value - q * se, value + q * se)


def _weighted_mean(values: np.ndarray, se: np.ndarray, level: float):
    """Inverse-variance mean, its interval (scaled by the Birge ratio when the spread exceeds the
    fit errors) and the standard error."""
    w = 1.0 / se**2
    mean = float(w @ values / w.sum())
    err = 1.0 / math.sqrt(w.sum())
    dof = values.size - 1
    if dof > 0:
        birge = float(w @ (values - mean) ** 2) / dof
        err *= math.sqrt(max(1.0, birge))
    return mean, _interval(mean, err, dof, level), err


def _vrest(
    fits: list[SweepFit], s: PassiveSettings, notes: list[str], excluded: Mapping[int, str]
) -> tuple[float, float, float]:
    """Resting potential at the start of the recording (V), its drift over the recording (V) and
    the drift rate (V/s), from a line through the baselines of the zero-current sweeps against
    time (the median baseline when fewer than 3 sweeps or no start times). ``fits`` holds every
    sweep; those in ``excluded`` (sweep number -> reason) are not used."""
    zero = [
        f
        for f in fits
        if math.isfinite(f.bias_a) and abs(f.holding_a + f.bias_a) <= s.zero_current_a
    ]
    rest = [f for f in zero if f.sweep not in excluded and math.isfinite(f.baseline_v)]
    if not rest:
        if zero:  # the sweeps are there; their baselines are not usable (NaN runs, clipping)
            f = zero[0]
            why = excluded.get(f.sweep) or f.reason or "baseline not measured"
            why = why.replace("; ", ", ")  # notes are joined by "; "
            notes.append(
                f"no zero-current sweep left for Vrest ({len(zero)} left out, sweep {f.sweep}: "
                f"{why})"
            )
        else:
            notes.append("no sweep at zero holding and bias current for Vrest")
        return NAN, NAN, 0.0
    v = np.array([f.baseline_v for f in rest])
    t = np.array([f.start_time_s + np.mean(f.baseline_window) for f in rest])
    if np.isfinite(t).all():  # in time order, whatever the sweep numbers say
        order = np.argsort(t, kind="stable")
        v, t = v[order], t[order]
    if len(rest) < 3 or not np.isfinite(t).all() or np.ptp(t) <= 0:
        return float(np.median(v)), float(v[-1] - v[0]), 0.0
    slope, intercept = np.polyfit(t - t[0], v, 1)
    return float(intercept), float(slope * (t[-1] - t[0])), float(slope)


def bridge_estimate(fits: Sequence[SweepFit], settings: PassiveSettings) -> float:
    """The bridge error from the edge jumps alone, before any fit of the cell (ohm).

    Parameters
    ----------
    fits : sequence of SweepFit
        The cell's sweep fits (:func:`pipeline.fitters.passive.fit_sweeps`).
    settings : PassiveSettings
        The passive settings; with ``bridge_correction`` off the answer is 0.

    Returns
    -------
    float
        Slope of the edge jumps against the step current, ohm; 0 when not measurable. It is
        what the spiking stage needs to compare recorded voltages of different steps (the
        cell's ``bridge_error_mohm`` may refine it with the soma-cylinder shape).
    """
    if not settings.bridge_correction:
        return 0.0
    value = _bridge(list(fits), settings, [])[0].value
    return value if math.isfinite(value) else 0.0


def _bridge(fits: list[SweepFit], s: PassiveSettings, notes: list[str]) -> tuple[_Slope, str]:
    """Bridge error (ohm): slope of the edge jumps against the current step through them.

    The jumps come from the plain (quadratic) extrapolation unless the curved one (with a t^1.5
    term) fits the early responses better by a pooled F-test at ``jump_curvature_p`` -- as it does
    where a small soma charges its dendrite within the first milliseconds.
    """
    drop = sum(f.jump_ssr_drop_v2 for f in fits)
    ssr = sum(f.jump_ssr_v2 for f in fits)
    dof = sum(f.jump_dof for f in fits)
    edges = 2 * sum(1 for f in fits if f.jump_dof > 0)
    curved = False
    if edges and dof > edges and ssr > 0:
        curved = bool(_f_sf(edges, dof, (drop / edges) / (ssr / dof)) < s.jump_curvature_p)
    elif edges and ssr == 0 and drop > 0:
        curved = True
    x, y = [], []
    for f in fits:
        on, off = (
            (f.onset_jump_curved_v, f.offset_jump_curved_v)
            if curved
            else (f.onset_jump_v, f.offset_jump_v)
        )
        if math.isfinite(on):
            x.append(f.step_a)
            y.append(on)
        if math.isfinite(off):
            x.append(-f.step_a)
            y.append(off)
    if len(x) < 2:
        notes.append("edge jumps not measurable: Rin not bridge-corrected")
        return _Slope(), ""
    return _robust_origin_slope(np.array(x), np.array(y)), ("curved" if curved else "quadratic")


# cable-to-soma conductance ratios tried for the soma-cylinder extrapolation (0 first: no cable)
_RHO_GRID = np.concatenate(([0.0], np.geomspace(0.1, 1000.0, 61)))
# chi^2 gain over a lone soma that calls for the cable: the 0.001 point of chi^2 with 1 dof
_CABLE_GAIN = 10.83


def soma_cylinder_response(t: np.ndarray, tau: float, rho: float) -> np.ndarray:
    """Soma potential after a unit current step into a soma on a semi-infinite cylinder.

    Parameters
    ----------
    t : numpy.ndarray
        Time since the step, s.
    tau : float
        Membrane time constant Rm*Cm, s (uniform membrane: soma and cylinder share it).
    rho : float
        Input conductance of the cylinder over that of the soma membrane, G_inf / G_s (0: a
        lone soma).

    Returns
    -------
    numpy.ndarray
        ``V(t) * G_s`` (V per A times S: dimensionless), ``T = t / tau``::

            [rho erf(sqrt T) - 1 + exp(-T) erfcx(rho sqrt T)] / (rho^2 - 1)

        continuous at 0, rising as ``t / tau`` while the soma charges alone, then as
        ``(2 rho / (rho^2 - 1)) sqrt(T / pi)`` on the cable, towards ``1 / (1 + rho)``.

    Notes
    -----
    The inverse Laplace transform of ``1 / (s (G_s (1 + s tau) + G_inf sqrt(1 + s tau)))``,
    the input admittance of a soma with a semi-infinite cylinder (Rall 1960, Exp Neurol
    2:503-532; Jack, Noble & Tsien 1975, Electric Current Flow in Excitable Cells, ch. 7;
    both from memory); derived here by partial fractions in ``sqrt(s + 1/tau)``.
    """
    tt = np.clip(np.asarray(t, dtype=float) / tau, 0.0, None)
    if rho == 0.0:
        return -np.expm1(-tt)
    return _with_cylinder(tt, rho)


def _with_cylinder(tt: np.ndarray, rho: float | np.ndarray) -> np.ndarray:
    """The soma-with-cylinder response at ``tt = t / tau`` for ratios ``rho > 0``; an array
    of ratios broadcasts against ``tt`` (one row per ratio)."""
    from scipy import special  # here, not at import: scipy costs ~0.3 s a process

    rho = np.where(np.abs(rho - 1.0) < 1e-4, 1.0 + 1e-4, rho)  # removable singularity: off it
    root = np.sqrt(tt)
    num = rho * special.erf(root) - 1.0 + np.exp(-tt) * special.erfcx(rho * root)
    return num / (rho * rho - 1.0)


def _cylinder_table(t: np.ndarray, tau: float) -> np.ndarray:
    """:func:`soma_cylinder_response` at ``t`` for every ratio of ``_RHO_GRID``, one row each,
    scaled to 1 at the last sample."""
    # all ratios at once (one row each, the same arithmetic): 62 calls cost ~1.5 ms a cell
    tt = np.clip(np.asarray(t, dtype=float) / tau, 0.0, None)
    u = np.empty((_RHO_GRID.size, tt.size))
    u[0] = -np.expm1(-tt)  # the lone soma (rho = 0)
    u[1:] = _with_cylinder(tt, _RHO_GRID[1:, None])
    return u / u[:, -1:]


@dataclass(frozen=True)
class _Edges:
    """The early edge responses of a cell's sweeps that share one sampling."""

    y: np.ndarray  # (edges, samples) response minus the level before the edge, V
    di: np.ndarray  # current change at each edge, A (onset +I, offset -I)
    w: np.ndarray  # weights, 1/V^2 (baseline noise)
    t: np.ndarray  # time of each sample after the edge, s


def _edges(fits: list[SweepFit]) -> _Edges | None:
    """Collect the stored early responses (the most common sampling only); None if < 3."""
    rows: dict[tuple, list] = {}
    for f in fits:
        key0 = (f.edge_start_s, f.edge_dt_s)
        rms = f.baseline_rms_v if math.isfinite(f.baseline_rms_v) and f.baseline_rms_v > 0 else 1.0
        for seg, di in ((f.onset_edge_v, f.step_a), (f.offset_edge_v, -f.step_a)):
            if len(seg) >= 6 and math.isfinite(di) and di != 0:
                rows.setdefault((*key0, len(seg)), []).append((seg, di, 1.0 / rms**2))
    if not rows:
        return None
    (start, dt, n), got = max(rows.items(), key=lambda kv: len(kv[1]))
    if len(got) < 3 or not (math.isfinite(start) and math.isfinite(dt)):
        return None
    return _Edges(
        np.array([g[0] for g in got]),
        np.array([g[1] for g in got]),
        np.array([g[2] for g in got]),
        start + dt * np.arange(n),
    )


def _pooled_misfit(design: np.ndarray, ybar: np.ndarray) -> tuple[np.ndarray, float]:
    """Least-squares coefficients of ``design`` on ``ybar`` and the residual sum of squares."""
    coef, *_ = np.linalg.lstsq(design, ybar, rcond=None)
    resid = ybar - design @ coef
    return coef, float(resid @ resid)


@dataclass(frozen=True)
class _CableFit:
    """The soma-cylinder fit of a cell's pooled early responses."""

    shape: np.ndarray  # membrane part per unit current at the edge samples, ohm
    rho: float  # cable-to-soma conductance ratio of the best fit
    gain: float  # chi^2 the best rho gains over a lone soma (rho = 0)
    lead: float  # AIC by which it beats the best polynomial in t (negative: it loses)
    jump_se: float  # SE of the pooled jump per unit current, ohm (noise and rho's profile)


def _cable_shape(e: _Edges, keep: np.ndarray, tau: float) -> _CableFit:
    """Fit the current-weighted mean response of the kept edges (per unit current) with the
    soma-cylinder shape over a grid of rho, and score it against the quadratic and the curved
    (t^1.5) polynomial by AIC, the noise taken from the edges' scatter about their mean."""
    dI, w, y, t = e.di[keep], e.w[keep], e.y[keep], e.t
    big_w = float(w @ dI**2)
    ybar = (w * dI) @ y / big_w
    dof = (dI.size - 1) * t.size
    s2 = float(np.sum(w[:, None] * (y - dI[:, None] * ybar) ** 2)) / dof if dof > 0 else 0.0
    scale = big_w / s2 if s2 > 0 else 1.0  # chi^2 per unit residual sum of squares of ybar
    x = t / t[-1]  # unit-scaled powers keep the designs well conditioned
    one = np.ones_like(x)
    poly = math.inf
    for cols, k in (([x, x**2], 3), ([x, x**1.5, x**2], 4)):
        poly = min(poly, scale * _pooled_misfit(np.column_stack([one, *cols]), ybar)[1] + 2 * k)
    # every rho at once: J + A u_rho(t) is a straight line in u, fitted in closed form
    u = _cylinder_table(t, tau)
    mean_u = u.mean(axis=1)
    du = u - mean_u[:, None]
    dy = ybar - ybar.mean()
    suu = np.einsum("ij,ij->i", du, du)
    amp = du @ dy / suu
    chi2 = scale * (dy @ dy - amp * (du @ dy))
    jump = ybar.mean() - amp * mean_u
    k = int(np.argmin(chi2))
    # profile over rho (chi^2 within 1 of the best) in quadrature with the linear fit's SE
    near = jump[chi2 <= chi2[k] + 1.0]
    se_lin = math.sqrt((1.0 / t.size + mean_u[k] ** 2 / suu[k]) / scale)
    se = math.hypot(se_lin, (near.max() - near.min()) / 2)
    return _CableFit(
        amp[k] * u[k], float(_RHO_GRID[k]), float(chi2[0] - chi2[k]), poly - chi2[k] - 6, se
    )


def _cable_bridge(fits: list[SweepFit], tau: float) -> _Slope | None:
    """Bridge error (ohm) from the soma-cylinder extrapolation of the pooled early responses,
    or None when the responses do not call for a cable (a lone soma fits as well, or a
    polynomial in t fits better) or there is too little to pool.

    All edges of a linear membrane share one response shape, scaled by the current step; it is
    fitted once on their current-weighted mean (the shape's sqrt(t) rise, which no polynomial
    in t follows back to the edge, comes from a dendrite charging through the soma). Each
    edge's jump is then its mean excess over that shape, and the bridge error the robust slope
    of the jumps on the current; edges it rejects are left out of the shape, once. The cable is
    used when it beats a lone soma by a likelihood-ratio test at p < 0.001 (chi^2 gain > 10.8,
    one parameter) and no polynomial beats it by more than 2 in AIC (Burnham & Anderson 2002,
    Model Selection and Multimodel Inference, sec. 2.6; from memory). The SE adds the fitted
    shape's own uncertainty, which every edge shares, to the slope's.
    """
    e = _edges(fits)
    if e is None or not (math.isfinite(tau) and tau > 0):
        return None
    keep = np.ones(e.di.size, dtype=bool)
    for _ in range(2):
        fit = _cable_shape(e, keep, tau)
        if fit.gain <= _CABLE_GAIN or fit.lead < -2.0:
            return None
        jumps = (e.y - e.di[:, None] * fit.shape[None, :]).mean(axis=1)
        slope, inside = _robust_origin_fit(e.di, jumps)
        if inside.all() or inside.sum() < 3 or (inside == keep).all():
            break
        keep = inside
    se = math.hypot(slope.se, fit.jump_se) if math.isfinite(slope.se) else fit.jump_se
    return _Slope(slope.value, se, slope.dof)


def _pick_small(hyper: list[SweepFit], dv_m: np.ndarray, s: PassiveSettings) -> list[int]:
    """Indices of the sweeps in the linear range, or the n smallest steps if too few are."""
    inside = [i for i in range(len(hyper)) if abs(dv_m[i]) <= s.linear_range_v]
    if len(inside) >= s.n_small_steps:
        return inside
    order = np.argsort([-f.step_a for f in hyper])  # smallest |step| first (steps are negative)
    return sorted(int(i) for i in order[: s.n_small_steps])


def summarize_cell(
    cell_id: str,
    sweep_fits: Sequence[SweepFit],
    settings: PassiveSettings,
    exclude: Mapping[int, str] | None = None,
) -> CellFit:
    """Cell passive properties from per-sweep fits, leaving out ``exclude``.

    Parameters
    ----------
    cell_id : str
        Cell identifier.
    sweep_fits : sequence of SweepFit
        Every sweep's measurements (from :func:`pipeline.fitters.passive.fit_sweeps`, or
        :func:`pipeline.fitters.sweep.fit_sweep` one by one).
    settings : PassiveSettings
        Linear range, number of small steps, corrections, sag target, interval level.
    exclude : mapping of int to str, optional
        Sweep number -> reason, for sweeps to leave out (e.g. by QC).

    Returns
    -------
    CellFit
        Rin (bridge-corrected steady-state slope near rest, ohm) with its interval, Rin from the
        peak deflections, the bridge error, tau (s), Cm (F), Vrest (V, at the start of the
        recording) and its drift, sag ratio ``(V_peak - V_ss) / (V_peak - V_base)`` (0 = no sag,
        bridge jump removed) at the most hyperpolarizing step and at ``sag_target_v``, rebound.
        ``status`` is ``'ok'`` or why there are no values; ``notes`` lists lesser gaps.
    """
    s = settings
    excluded = dict(exclude or {})
    fits = [f for f in sweep_fits if f.sweep not in excluded]
    notes: list[str] = []
    rounded = [f.rounding_v for f in sweep_fits if math.isfinite(f.rounding_v)]
    if rounded:
        notes.append(
            f"voltage on a grid of {max(rounded) * 1e3:.3g} mV steps, coarser than its noise "
            "(a text export rounded too far, or a digitizer range too wide for the signal): "
            "flat runs at a trace's extremes are not counted as clipping (a real rail would "
            "pass unseen), and small deflections carry rounding error"
        )
    vrest, drift, rate = _vrest(list(sweep_fits), s, notes, excluded)
    common = dict(cell_id=cell_id, sweeps=tuple(sweep_fits), vrest_v=vrest, vrest_drift_v=drift)
    hyper = [
        f for f in fits if f.step_a < 0 and math.isfinite(f.ss_dv) and math.isfinite(f.peak_dv)
    ]
    for f in fits:
        if f.step_a < 0 and f not in hyper:
            excluded[f.sweep] = f.reason or "no steady-state deflection"
    if not hyper:
        return CellFit(
            **common,
            excluded=excluded,
            status="no usable hyperpolarizing sweep",
            notes="; ".join(notes),
        )
    hyper.sort(key=lambda f: -f.step_a)
    bridge, bridge_method = (
        _bridge(fits, s, notes) if s.bridge_correction else (_Slope(0.0, 0.0, 0), "")
    )
    re = bridge.value if math.isfinite(bridge.value) else 0.0
    i = np.array([f.step_a for f in hyper])
    if s.bridge_correction:  # the soma-cylinder shape needs tau, which needs the jumps removed
        tau0 = _tau(hyper, np.array([f.peak_dv for f in hyper]) - re * i, s)[0]
        cable = _cable_bridge(fits, tau0)
        if cable is not None and math.isfinite(cable.value):
            bridge, bridge_method, re = cable, "cable", cable.value
    shift = np.array([_drift_shift(f, rate) for f in hyper]) if s.drift_correction else 0.0
    ss = np.array([f.ss_dv for f in hyper]) - shift
    peak = np.array([f.peak_dv for f in hyper]) - shift
    pick = _pick_small(hyper, ss - re * i, s)
    apparent, method = _through_origin(i[pick], ss[pick]), "linear"
    wide = np.flatnonzero(np.abs(ss - re * i) <= s.iv_range_v)
    curved, degree = _curved_slope(i[wide], ss[wide], s.curvature_p) if wide.size else (None, 1)
    if degree > 1:  # the V-I relation bends (Ih, rectification): slope at rest of the curve
        apparent, method, pick = curved, ("quadratic", "cubic")[degree - 2], list(wide)
    rin = apparent.value - re
    rin_se = math.hypot(apparent.se, bridge.se if math.isfinite(bridge.se) else 0.0)
    rin_peak = _through_origin(i[pick], peak[pick]).value - re
    chord = ss[-1] / i[-1] - re
    tau, tau_ci, tau_se, tau_used = _tau(hyper, peak - re * i, s)
    wide_tau = [f for f, p in zip(hyper, peak - re * i, strict=True) if abs(p) <= s.tau_range_v]
    excess, excess_half = _frozen_excess(wide_tau, re, s.confidence)
    if excess < 0:  # a restoring gate (Ih) lowers R as it opens; the model fits none here
        notes.append(
            "the sag model gave a resistance before the slow gate moves below Rin (no "
            "restoring gate): Cm from tau/Rin"
        )
        excess, excess_half = 0.0, 0.0
    rin_ci = _interval(rin, rin_se, apparent.dof, s.confidence)
    if (rin_ci[1] if math.isfinite(rin_ci[1]) else rin) < 0:  # no passive membrane does that
        notes.append(
            "the voltage moves against the injected current (Rin < 0): is the current's sign "
            "reversed (the file's current, or the [steps] schedule of a file without one)? "
            "patchbatch takes positive current as depolarizing"
        )
    rin_frozen = rin * (1.0 + excess)
    cm, cm_ci = _cm(tau, tau_ci, rin_frozen, rin_ci, excess_half / (1.0 + excess))
    sag, at_target = _sag(hyper, i, ss, peak, re, s)
    used = sorted({hyper[k].sweep for k in pick} | {hyper[-1].sweep} | tau_used)
    picked = [hyper[k] for k in pick]  # the sweeps behind Rin
    peel = _peel(picked, s) if s.two_exp else {}
    return CellFit(
        **common,
        used=tuple(used),
        excluded=excluded,
        rin_ohm=rin,
        rin_ci_ohm=rin_ci,
        rin_frozen_ohm=rin_frozen,
        ss_charge_left=_charge_left(picked, tau),
        rin_peak_ohm=rin_peak,
        rin_apparent_ohm=apparent.value,
        rin_method=method,
        iv_slope_ohm=apparent.value,
        iv_intercept_v=float(np.mean([hyper[k].baseline_v for k in pick])),
        iv_curvature=chord / rin - 1.0 if len(hyper) > 1 and rin > 0 else NAN,
        bridge_error_ohm=bridge.value,
        bridge_error_se_ohm=bridge.se,
        bridge_method=bridge_method,
        tau_s=tau,
        tau_ci_s=tau_ci,
        cm_f=cm,
        cm_ci_f=cm_ci,
        sag_ratio=sag,
        sag_step_a=hyper[-1].step_a,
        sag_ratio_at_target=at_target,
        rebound_v=hyper[-1].rebound_v,
        two_exp=s.two_exp,
        notes="; ".join(
            notes + ([] if math.isfinite(tau) else ["no charging fit on the small steps"])
        ),
        **peel,
    )


def _drift_shift(f: SweepFit, rate: float) -> float:
    """Baseline drift between the baseline and steady-state window centres, V."""
    return rate * (float(np.mean(f.ss_window)) - float(np.mean(f.baseline_window)))


def _tau(hyper: list[SweepFit], peak_m: np.ndarray, s: PassiveSettings):
    """Weighted tau over the fitted sweeps whose peak membrane deflection is within
    ``tau_range_v`` (``sag_tau_range_v`` for exp+sag fits, whose linearised gate holds only
    near rest); else over the smallest fitted ones."""
    fitted = [
        f
        for f, p in zip(hyper, peak_m, strict=True)
        if _tau_ok(f)
        and abs(p) <= (s.sag_tau_range_v if f.charging.model == "exp+sag" else s.tau_range_v)
    ]
    if len(fitted) < min(s.n_small_steps, sum(_tau_ok(f) for f in hyper)):
        fitted = [f for f in hyper if _tau_ok(f)][: s.n_small_steps]
    if not fitted:
        fitted = [f for f in hyper if _tau_ok(f)][: s.n_small_steps]
    if not fitted:
        return NAN, (NAN, NAN), NAN, set()
    taus = np.array([f.charging.tau for f in fitted])
    ses = np.array([f.charging.tau_se for f in fitted])
    mean, ci, se = _weighted_mean(taus, ses, s.confidence)
    return mean, ci, se, {f.sweep for f in fitted}


def _tau_ok(f: SweepFit) -> bool:
    return f.charging.ok and math.isfinite(f.charging.tau_se) and f.charging.tau_se > 0


def _charge_left(fits: list[SweepFit], tau: float) -> float:
    """Fraction of the charging still to come where the steady-state window starts, exp(-t/tau)
    with t from the step onset (the largest among the sweeps behind Rin): a step too short for
    its tau is measured before steady state, and Rin comes out low."""
    left = [
        math.exp(-(f.ss_window[0] - f.onset_s) / tau)
        for f in fits
        if math.isfinite(f.ss_window[0]) and math.isfinite(f.onset_s)
    ]
    return max(left) if left and math.isfinite(tau) and tau > 0 else NAN


def _frozen_excess(fits: list[SweepFit], re: float, level: float) -> tuple[float, float]:
    """How much the input resistance before the slow gate moves exceeds Rin, as a fraction at
    rest (0 without exp+sag fits), and its interval half-width.

    A sweep's frozen-gate deflection is its steady deflection plus kappa times the steady
    deflection of the gated mode (``amp``), so the fraction is ``kappa * amp / dV_ss`` (bridge
    jump removed). It grows with the step (the gate opens further): read at zero current from
    an error-weighted line through the sweeps' values (their weighted mean below 3 sweeps).
    """
    pts = []
    for f in fits:
        c = f.charging
        dv = f.ss_dv - re * f.step_a
        if c.model == "exp+sag" and dv != 0:
            pts.append((f.step_a, c.kappa * c.amp / dv, c.kappa_se * abs(c.amp / dv)))
    pts = np.array([p for p in pts if np.isfinite(p).all() and p[2] > 0]).reshape(-1, 3)
    if pts.shape[0] == 0:
        return 0.0, 0.0
    x, y, w = pts[:, 0] / np.max(np.abs(pts[:, 0])), pts[:, 1], 1.0 / pts[:, 2]
    if pts.shape[0] < 3:
        mean, ci, _ = _weighted_mean(y, pts[:, 2], level)
        return mean, (ci[1] - ci[0]) / 2
    design = np.column_stack([np.ones_like(x), x])
    coef, *_ = np.linalg.lstsq(design * w[:, None], y * w, rcond=None)
    resid = (y - design @ coef) * w
    dof = x.size - 2
    scale = max(1.0, float(resid @ resid) / dof)  # Birge ratio, as for tau
    cov = scale * np.linalg.inv((design * w[:, None]).T @ (design * w[:, None]))
    lo, hi = _interval(float(coef[0]), math.sqrt(cov[0, 0]), dof, level)
    return float(coef[0]), (hi - lo) / 2


def _cm(tau, tau_ci, r_inst, rin_ci, excess_rel):
    """Cm = tau / R_inst (F), R_inst the input resistance before any slow gate moves, and its
    interval from the relative half-widths of tau, Rin and the frozen excess in quadrature.

    The quadrature is the propagation of errors on ln Cm = ln tau - ln R, so the interval is
    taken there too: Cm * exp(-+rel), which is Cm * (1 -+ rel) for small errors and never
    reaches zero or below when the errors are large (a cell whose frozen excess is barely
    known)."""
    if not (math.isfinite(tau) and math.isfinite(r_inst) and r_inst > 0):
        return NAN, (NAN, NAN)
    cm = tau / r_inst
    rin = (rin_ci[0] + rin_ci[1]) / 2
    rel = math.sqrt(
        ((tau_ci[1] - tau_ci[0]) / 2 / tau) ** 2
        + ((rin_ci[1] - rin_ci[0]) / 2 / rin) ** 2
        + excess_rel**2
    )
    if not (math.isfinite(rel) and rel < 700):  # exp overflows a float past ~709: no interval
        return cm, (NAN, NAN)
    return cm, (cm * math.exp(-rel), cm * math.exp(rel))


def _sag(hyper, i, ss, peak, re, s: PassiveSettings) -> tuple[float, float]:
    """Sag ratio at the most hyperpolarizing step and interpolated at the target potential."""
    peak_m = peak - re * i
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(peak_m < 0, (peak - ss) / peak_m, np.nan)
    v_peak = np.array([f.baseline_v for f in hyper]) + peak_m
    ok = np.isfinite(ratio) & np.isfinite(v_peak)
    at_target = NAN
    if ok.sum() >= 2:
        vp, rr = v_peak[ok], ratio[ok]
        order = np.argsort(vp)
        if vp.min() <= s.sag_target_v <= vp.max():
            at_target = float(np.interp(s.sag_target_v, vp[order], rr[order]))
    return float(ratio[-1]), at_target


def _peel(small: list[SweepFit], s: PassiveSettings) -> dict:
    """Cell tau0, tau1 and electrotonic length from the sweeps' two-exponential fits."""
    fits = [f.charging2 for f in small if f.charging2 is not None and f.charging2.ok]
    fits = [
        b for b in fits if math.isfinite(b.tau0_se) and math.isfinite(b.tau1_se) and b.tau1_se > 0
    ]
    if not fits:
        return dict(peel_status="no two-exponential fit converged")
    tau0, ci0, _ = _weighted_mean(
        np.array([b.tau0 for b in fits]), np.array([b.tau0_se for b in fits]), s.confidence
    )
    tau1, ci1, _ = _weighted_mean(
        np.array([b.tau1 for b in fits]), np.array([b.tau1_se for b in fits]), s.confidence
    )
    out = dict(tau0_s=tau0, tau1_s=tau1, tau1_ci_s=ci1)
    if tau0 / tau1 < s.min_tau_ratio:
        return out | dict(
            peel_status=f"not resolvable: tau0/tau1 = {tau0 / tau1:.2f} < {s.min_tau_ratio:g}"
        )
    if ci1[1] >= ci0[0] or ci1[0] <= 0:
        return out | dict(peel_status="not resolvable: tau1 interval reaches tau0 or zero")
    return out | dict(electrotonic_length=math.pi / math.sqrt(tau0 / tau1 - 1.0), peel_status="ok")
