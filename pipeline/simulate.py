"""Simulated current-clamp step recordings with known truth: the demo day and the benchmarks.

Model (SI units throughout: V, A, s, ohm, F, S, m)
---------------------------------------------------
A soma (compartment 0, area ``a_0``) and, optionally, a uniform sealed-end dendrite cut into
``N`` equal compartments of length ``dx = length / N`` (compartments 1..N). With
``u_i = V_i - E_leak``::

    C_i du_i/dt = -u_i / R_i - sum_j g_ij (u_i - u_j) + [i = 0] (I_inj(t) + I_ion)

    C_i = Cm a_i,   R_i = Rm / a_i,   g_(i,i+1) = pi d^2 / (4 Ri dx)  (Ri: axial resistivity),

the soma-to-first-compartment coupling uses half a compartment (``dx / 2``), as the nodes sit at
the compartment centres. In matrix form ``C du/dt = -K u + e_0 (I_inj + I_ion)``.

Ion currents (soma only, optional), ``I_ion = -sum_c g_c (V_0 - E_c)``:

* Ih (HCN-like): ``g_h r``, ``r_inf = 1 / (1 + exp((V - V_half) / k))``, constant ``tau_r``;
  reversal about -30 mV, so it depolarizes the rest, gives sag and rebound.
* spiking: Na ``g_Na m^3 h``, delayed-rectifier K ``g_Kd n^4`` and a slow M-like K ``g_M p``
  (adaptation). Rate functions are those of the minimal cortical models of Pospischil et al.,
  *Biol Cybern* 99:427-441 (2008), with the threshold parameter ``v_t`` (values from memory).

Integration. A cell without ion currents is solved exactly: the eigen-decomposition of
``C^-1 K`` (symmetrised) gives the soma's response to each constant piece of current. With ion
currents, every sample step ``dt`` propagates the linear part exactly (``exp(-C^-1 K dt)``,
the current held constant over the step), treats the soma's ion conductance implicitly (stable
for any conductance) and advances the gates by exponential Euler from look-up tables; all
sweeps are integrated together, one time loop over arrays shaped (n_sweeps, n_compartments).
Each sweep starts from the steady state under the holding current. The injected current of
sample ``i`` holds over ``[t_i, t_i+1)``, so the voltage first moves at sample ``onset + 1``.

Recording nuisances are added to the soma voltage afterwards:
``V_rec = V_0 + R_err I_f + noise + hum + drift (t_start + t) + offset``, with ``I_f`` the
injected current through a first-order electrode filter; the stored current is the injected one
through the amplifier filter plus noise. Injected current is positive = depolarizing.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, replace

import numpy as np
from scipy import optimize, signal, special

from pipeline.recording import Recording, Sweep

# --------------------------------------------------------------------------- model records


@dataclass(frozen=True)
class Dendrite:
    """A uniform passive cylinder with a sealed end, attached to the soma.

    Parameters
    ----------
    length_m, diameter_m : float
        Geometry, m.
    ri_ohm_m : float
        Axial resistivity, ohm m (1.5 ohm m = 150 ohm cm).
    n_compartments : int
        Compartments the cable is cut into; the discretisation error of the input conductance
        falls as ``(dx / lambda)^2``.
    """

    length_m: float = 500e-6
    diameter_m: float = 2e-6
    ri_ohm_m: float = 1.5
    n_compartments: int = 20


@dataclass(frozen=True)
class IhChannel:
    """An HCN-like current at the soma: ``g r (V - e_rev)``, ``r`` opens on hyperpolarization.

    Parameters
    ----------
    g_s_per_m2 : float
        Maximal conductance density, S/m^2 (1 S/m^2 = 0.1 mS/cm^2).
    e_rev_v, v_half_v, slope_v : float
        Reversal, half-activation and slope of ``r_inf``, V.
    tau_s : float
        Time constant of ``r``, s (constant).
    """

    g_s_per_m2: float = 2.0
    e_rev_v: float = -0.030
    v_half_v: float = -0.085
    slope_v: float = 0.008
    tau_s: float = 0.08


@dataclass(frozen=True)
class SpikingChannels:
    """Na, delayed-rectifier K and slow (M-like) K at the soma.

    Parameters
    ----------
    g_na_s_per_m2, g_kd_s_per_m2, g_m_s_per_m2 : float
        Maximal conductance densities, S/m^2.
    e_na_v, e_k_v : float
        Reversal potentials, V.
    v_t_v : float
        Threshold parameter of the Na and Kd rate functions, V (more negative = lower
        threshold).
    tau_m_max_s : float
        Largest time constant of the M-like gate, s (adaptation).
    """

    g_na_s_per_m2: float = 500.0
    g_kd_s_per_m2: float = 100.0
    g_m_s_per_m2: float = 3.0
    e_na_v: float = 0.050
    e_k_v: float = -0.090
    v_t_v: float = -0.058
    tau_m_max_s: float = 0.5


@dataclass(frozen=True)
class CellModel:
    """Geometry and membrane of a simulated cell.

    Parameters
    ----------
    soma_diameter_m : float
        Diameter of a spherical soma, m (area ``pi d^2``), unless ``soma_area_m2`` is given.
    rm_ohm_m2 : float
        Specific membrane resistance, ohm m^2 (1 ohm m^2 = 10 kohm cm^2), soma and dendrite.
    cm_f_per_m2 : float
        Specific membrane capacitance, F/m^2 (0.01 F/m^2 = 1 uF/cm^2).
    e_leak_v : float
        Leak reversal, V.
    dendrite, ih, spiking : optional
        Parts left out when ``None``.
    soma_area_m2 : float or None
        Soma membrane area, m^2, overriding the sphere.
    """

    soma_diameter_m: float = 25e-6
    rm_ohm_m2: float = 1.5
    cm_f_per_m2: float = 0.01
    e_leak_v: float = -0.070
    dendrite: Dendrite | None = None
    ih: IhChannel | None = None
    spiking: SpikingChannels | None = None
    soma_area_m2: float | None = None

    @property
    def soma_area(self) -> float:
        """Soma membrane area, m^2."""
        if self.soma_area_m2 is not None:
            return self.soma_area_m2
        return math.pi * self.soma_diameter_m**2

    @property
    def is_linear(self) -> bool:
        """True when the cell has no voltage-gated current."""
        return self.ih is None and self.spiking is None


@dataclass(frozen=True)
class StepProtocol:
    """A family of current steps, one per sweep.

    Parameters
    ----------
    rate_hz : float
        Sampling rate, Hz.
    sweep_s, onset_s, step_s : float
        Sweep length, step onset and step duration, s.
    amplitudes_a : tuple of float
        Step current of each sweep relative to holding, A (positive = depolarizing).
    holding_a : float
        Holding (bias) current, A.
    interval_s : float
        Start-to-start interval between sweeps, s.
    """

    rate_hz: float = 20_000.0
    sweep_s: float = 1.5
    onset_s: float = 0.2
    step_s: float = 1.0
    amplitudes_a: tuple[float, ...] = tuple(a * 1e-12 for a in range(-100, 201, 20))
    holding_a: float = 0.0
    interval_s: float = 5.0

    @property
    def n_samples(self) -> int:
        """Samples per sweep."""
        return round(self.sweep_s * self.rate_hz)

    @property
    def onset_index(self) -> int:
        """First sample of the step."""
        return round(self.onset_s * self.rate_hz)

    @property
    def offset_index(self) -> int:
        """First sample after the step."""
        return round((self.onset_s + self.step_s) * self.rate_hz)

    def injected(self) -> np.ndarray:
        """Injected current of every sweep, shape (n_sweeps, n_samples), A."""
        current = np.full((len(self.amplitudes_a), self.n_samples), self.holding_a)
        current[:, self.onset_index : self.offset_index] += np.asarray(self.amplitudes_a)[:, None]
        return current


@dataclass(frozen=True)
class Nuisance:
    """What the rig adds to the recording.

    Parameters
    ----------
    noise_rms_v : float
        White noise on the voltage, V RMS.
    hum_rms_v, hum_hz : float
        Mains hum, V RMS and Hz (phase continuous across the recording, random start).
    bridge_error_ohm : float
        Uncompensated electrode resistance, ohm: adds ``R_err * I_filtered`` to the voltage.
    electrode_tau_s : float
        Time constant of the first-order electrode filter on that term, s.
    drift_v_per_s : float
        Baseline drift across the recording, V/s.
    offset_v : float
        Constant offset of the recorded voltage (e.g. an uncorrected junction potential), V.
    current_noise_a : float
        White noise on the stored current, A RMS.
    current_tau_s : float
        First-order amplifier filter on the stored current, s.
    clip_v : tuple of float or None
        Amplifier rails (low, high), V; the recorded voltage is clipped to them.
    nan_run_s : float
        Length of a run of NaN samples put at a random place in every sweep's voltage, s.
    store_current : bool
        False to store no current (the step schedule must then come from the config).
    """

    noise_rms_v: float = 0.0
    hum_rms_v: float = 0.0
    hum_hz: float = 50.0
    bridge_error_ohm: float = 0.0
    electrode_tau_s: float = 30e-6
    drift_v_per_s: float = 0.0
    offset_v: float = 0.0
    current_noise_a: float = 0.0
    current_tau_s: float = 0.0
    clip_v: tuple[float, float] | None = None
    nan_run_s: float = 0.0
    store_current: bool = True


# --------------------------------------------------------------------------- linear structure


@dataclass(frozen=True)
class _Linear:
    """``C du/dt = -K u + e_0 I`` and its symmetrised eigen-decomposition."""

    capacitance: np.ndarray  # F, per compartment
    k: np.ndarray  # S, conductance matrix
    rates: np.ndarray  # 1/s, eigenvalues of C^-1 K, ascending
    modes: np.ndarray  # eigenvectors of C^-1/2 K C^-1/2 (columns)


def _structure(cell: CellModel, soma_g: float = 0.0) -> _Linear:
    """Capacitances and conductance matrix of the cell, with ``soma_g`` (S) added at the
    soma."""
    area = [cell.soma_area]
    axial: list[float] = []
    if cell.dendrite is not None:
        den = cell.dendrite
        dx = den.length_m / den.n_compartments
        g_ax = math.pi * den.diameter_m**2 / (4.0 * den.ri_ohm_m * dx)
        area += [math.pi * den.diameter_m * dx] * den.n_compartments
        axial = [2.0 * g_ax] + [g_ax] * (den.n_compartments - 1)
    area_arr = np.asarray(area)
    k = np.diag(area_arr / cell.rm_ohm_m2)
    k[0, 0] += soma_g
    for i, g in enumerate(axial):
        k[i, i] += g
        k[i + 1, i + 1] += g
        k[i, i + 1] -= g
        k[i + 1, i] -= g
    cap = area_arr * cell.cm_f_per_m2
    scale = 1.0 / np.sqrt(cap)
    rates, modes = np.linalg.eigh(k * scale[:, None] * scale[None, :])
    return _Linear(cap, k, rates, modes)


def _soma_step_response(lin: _Linear, t: np.ndarray) -> np.ndarray:
    """Soma potential change after a unit current (1 A) switched on at t = 0, V; t in s."""
    weight = lin.modes[0] ** 2 / lin.capacitance[0] / lin.rates  # ohm, per mode
    t = np.clip(t, 0.0, None)
    return -np.expm1(-np.outer(t, lin.rates)) @ weight


# --------------------------------------------------------------------------- ion channels


def _pospischil_rates(v: np.ndarray, sp: SpikingChannels) -> dict[str, tuple]:
    """Steady states and time constants (s) of m, h, n, p at ``v`` (V)."""
    mv = v * 1e3 - sp.v_t_v * 1e3  # mV above the threshold parameter
    per_ms = 1e3  # rates in 1/ms -> 1/s
    a_m = 0.32 * 4.0 / special.exprel(-(mv - 13.0) / 4.0)
    b_m = 0.28 * 5.0 / special.exprel((mv - 40.0) / 5.0)
    a_h = 0.128 * np.exp(-(mv - 17.0) / 18.0)
    b_h = 4.0 / (1.0 + np.exp(-(mv - 40.0) / 5.0))
    a_n = 0.032 * 5.0 / special.exprel(-(mv - 15.0) / 5.0)
    b_n = 0.5 * np.exp(-(mv - 10.0) / 40.0)
    x = v * 1e3 + 35.0  # the M gate is not shifted with v_t
    p_inf = 1.0 / (1.0 + np.exp(-x / 10.0))
    tau_p = sp.tau_m_max_s / (3.3 * np.exp(x / 20.0) + np.exp(-x / 20.0))
    gates = {}
    for name, a, b in (("m", a_m, b_m), ("h", a_h, b_h), ("n", a_n, b_n)):
        gates[name] = (a / (a + b), 1.0 / ((a + b) * per_ms))
    gates["p"] = (p_inf, tau_p)
    return gates


@dataclass(frozen=True)
class _Channels:
    """Gates (steady state, tau), powers and per-channel conductance (S) and reversal (V)."""

    names: tuple[str, ...]
    powers: np.ndarray
    g: np.ndarray  # per gate column: conductance of the channel it closes (S), 0 for co-gates
    e: np.ndarray  # reversal of that channel, V
    gates: Callable[
        [np.ndarray], tuple[np.ndarray, np.ndarray]
    ]  # v -> (x_inf, tau), (..., n_gates)


def _channels(cell: CellModel) -> _Channels:
    names: list[str] = []
    powers: list[float] = []
    g: list[float] = []
    e: list[float] = []
    area = cell.soma_area
    sp, ih = cell.spiking, cell.ih
    if sp is not None:
        names += ["m", "h", "n", "p"]
        powers += [3.0, 1.0, 4.0, 1.0]
        g += [sp.g_na_s_per_m2 * area, 0.0, sp.g_kd_s_per_m2 * area, sp.g_m_s_per_m2 * area]
        e += [sp.e_na_v, 0.0, sp.e_k_v, sp.e_k_v]
    if ih is not None:
        names.append("r")
        powers.append(1.0)
        g.append(ih.g_s_per_m2 * area)
        e.append(ih.e_rev_v)

    def gates(v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        v = np.asarray(v, dtype=np.float64)
        inf, tau = [], []
        if sp is not None:
            rates = _pospischil_rates(v, sp)
            for name in "mhnp":
                inf.append(rates[name][0])
                tau.append(rates[name][1])
        if ih is not None:
            inf.append(1.0 / (1.0 + np.exp((v - ih.v_half_v) / ih.slope_v)))
            tau.append(np.full_like(v, ih.tau_s))
        return np.stack(inf, axis=-1), np.stack(tau, axis=-1)

    return _Channels(tuple(names), np.asarray(powers), np.asarray(g), np.asarray(e), gates)


def _open(ch: _Channels, x: np.ndarray) -> np.ndarray:
    """Open fraction per gate column (the Na column carries m^3 h, its h column 0 weight)."""
    o = x**ch.powers
    if "m" in ch.names:
        o[..., 0] *= o[..., 1]
    return o


def _ion_current(ch: _Channels, v: np.ndarray) -> np.ndarray:
    """Steady-state ion current at ``v`` (V), A (positive = depolarizing)."""
    x_inf, _ = ch.gates(v)
    return (_open(ch, x_inf) * ch.g * (ch.e - v[..., None])).sum(axis=-1)


# --------------------------------------------------------------------------- steady state, truth


def _steady_soma(cell: CellModel, ch: _Channels | None, lin0: _Linear, holding: float) -> float:
    """Soma potential at steady state under ``holding`` current (A), V; the root nearest the
    leak reversal."""
    r_passive = float(np.linalg.solve(lin0.k, np.eye(lin0.k.shape[0])[0])[0])
    if ch is None:
        return cell.e_leak_v + r_passive * holding
    grid = cell.e_leak_v + np.linspace(-0.12, 0.12, 2401)
    resid = grid - cell.e_leak_v - r_passive * (holding + _ion_current(ch, grid))
    flips = np.flatnonzero(np.sign(resid[:-1]) != np.sign(resid[1:]))
    if flips.size == 0:
        raise ValueError("the model cell has no steady state within 120 mV of its leak reversal")
    guess = cell.e_leak_v + r_passive * holding
    i = flips[np.argmin(np.abs(grid[flips] - guess))]

    def f(v: float) -> float:
        return float(v - cell.e_leak_v - r_passive * (holding + _ion_current(ch, np.array(v))))

    return optimize.brentq(f, grid[i], grid[i + 1], xtol=1e-13)


def true_properties(cell: CellModel) -> dict[str, float]:
    """Properties of the model cell at rest (no injected current), SI units.

    Returns
    -------
    dict
        ``vrest_v``; ``rin_ohm`` (steady-state slope resistance at rest: the gates follow);
        ``rin_instant_ohm`` (gates frozen at rest); ``tau0_s`` and ``tau1_s`` (slowest and
        second slowest time constants of the linearised system with gates frozen at rest;
        ``tau1_s`` is NaN for a single compartment); ``tau_m_s`` (Rm Cm); ``cm_total_f``;
        ``soma_area_m2``, ``membrane_area_m2``; ``dendrite_l`` (electrotonic length, NaN without
        dendrite); ``g_ion_rest_s`` (ion chord conductance at rest); with Ih also ``ih_g_rest_s``
        and ``sag_ratio_small_step``: ``(V_peak - V_ss) / (V_peak - V_base)`` for a small
        hyperpolarizing step, ``1 - rin_ohm / R_peak`` with R_peak the resistance while Ih is
        still frozen (exact when tau_r >> tau0; an upper bound otherwise).
    """
    ch = None if cell.is_linear else _channels(cell)
    lin0 = _structure(cell)
    v_rest = _steady_soma(cell, ch, lin0, 0.0)
    out = {"vrest_v": v_rest, "tau_m_s": cell.rm_ohm_m2 * cell.cm_f_per_m2}
    chord = slope = frozen_ih = 0.0
    if ch is not None:
        x_inf, _ = ch.gates(np.array(v_rest))
        per_gate = _open(ch, x_inf) * ch.g
        chord = float(per_gate.sum())
        dv = 1e-6
        pair = np.array([v_rest - dv, v_rest + dv])
        slope = float(-(np.diff(_ion_current(ch, pair))[0]) / (2 * dv))
        if cell.ih is not None:
            g_h = float(per_gate[ch.names.index("r")])
            out["ih_g_rest_s"] = g_h
            # Ih frozen at its rest value: slope of everything else plus Ih's chord conductance
            without = _channels(replace(cell, ih=None))
            frozen_ih = g_h
            if without.names:
                frozen_ih += float(-(np.diff(_ion_current(without, pair))[0]) / (2 * dv))
    lin = _structure(cell, chord)
    unit = np.eye(lin.k.shape[0])[0]
    out["g_ion_rest_s"] = chord
    out["rin_ohm"] = float(np.linalg.solve(_structure(cell, slope).k, unit)[0])
    out["rin_instant_ohm"] = float(np.linalg.solve(lin.k, unit)[0])
    out["tau0_s"] = float(1.0 / lin.rates[0])
    out["tau1_s"] = float(1.0 / lin.rates[1]) if lin.rates.size > 1 else math.nan
    out["cm_total_f"] = float(lin.capacitance.sum())
    out["soma_area_m2"] = cell.soma_area
    out["membrane_area_m2"] = float(lin.capacitance.sum() / cell.cm_f_per_m2)
    out["dendrite_l"] = math.nan
    if cell.dendrite is not None:
        den = cell.dendrite
        lam = math.sqrt(cell.rm_ohm_m2 * den.diameter_m / (4.0 * den.ri_ohm_m))
        out["dendrite_l"] = den.length_m / lam
    if cell.ih is not None:
        r_peak = float(np.linalg.solve(_structure(cell, frozen_ih).k, unit)[0])
        out["sag_ratio_small_step"] = 1.0 - out["rin_ohm"] / r_peak
    return out


# --------------------------------------------------------------------------- integration


def _passive_voltage(cell: CellModel, protocol: StepProtocol) -> np.ndarray:
    """Exact soma potential of a linear cell for every sweep, V, shape (n_sweeps, n)."""
    lin = _structure(cell)
    t = np.arange(protocol.n_samples) / protocol.rate_hz
    on, off = protocol.onset_index / protocol.rate_hz, protocol.offset_index / protocol.rate_hz
    unit = _soma_step_response(lin, t - on) - _soma_step_response(lin, t - off)
    r_in = float(_soma_step_response(lin, np.array([np.inf]))[0])
    base = cell.e_leak_v + r_in * protocol.holding_a
    return base + np.asarray(protocol.amplitudes_a)[:, None] * unit[None, :]


def _gate_tables(ch: _Channels, dt: float, lo: float, hi: float, step: float) -> np.ndarray:
    """Exponential-Euler factors on a voltage grid, ``x_next = x * A + B``, with the
    difference to the next grid point for linear interpolation: shape (n_grid, 4, n_gates)
    holding A, B, dA, dB."""
    grid = np.arange(lo, hi + 2 * step, step)
    x_inf, tau = ch.gates(grid)
    decay = np.exp(-dt / tau)
    table = np.stack([decay, (1.0 - decay) * x_inf], axis=1)
    return np.concatenate([table[:-1], np.diff(table, axis=0)], axis=1)


def _propagator(lin: _Linear, dt: float) -> tuple[np.ndarray, np.ndarray]:
    """Exact one-step propagator of ``C du/dt = -K u + e_0 I`` for constant I over ``dt``:
    ``u_next = u @ prop_t + I * gain`` (u as rows); gain in V/A."""
    left = lin.modes / np.sqrt(lin.capacitance)[:, None]  # C^-1/2 U
    right = lin.modes.T * np.sqrt(lin.capacitance)[None, :]  # U^T C^1/2
    prop = (left * np.exp(-lin.rates * dt)) @ right  # exp(-C^-1 K dt)
    gain = (left * (-np.expm1(-lin.rates * dt) / lin.rates)) @ left[0]
    return prop.T.copy(), gain


def _integrate(cell: CellModel, protocol: StepProtocol) -> np.ndarray:
    """Soma potential of every sweep by the time loop (any cell), V, shape (n_sweeps, n)."""
    dt = 1.0 / protocol.rate_hz
    ch = None if cell.is_linear else _channels(cell)
    lin = _structure(cell)
    prop_t, gain = _propagator(lin, dt)
    injected = protocol.injected().T.copy()  # (n, n_sweeps): one contiguous row per step
    n_sweeps = injected.shape[1]
    v0 = _steady_soma(cell, ch, lin, protocol.holding_a)
    profile = np.linalg.solve(lin.k, np.eye(lin.k.shape[0])[0])  # steady state per A at soma
    u = np.tile(profile * (v0 - cell.e_leak_v) / profile[0], (n_sweeps, 1))
    out = np.empty_like(injected)
    out[0] = u[:, 0]
    if ch is None:
        for i in range(out.shape[0] - 1):
            u = u @ prop_t + injected[i][:, None] * gain
            out[i + 1] = u[:, 0]
        return out.T + cell.e_leak_v
    _gated_loop(cell, ch, dt, v0, u, prop_t, gain, injected, out)
    return out.T + cell.e_leak_v


def _gated_loop(
    cell: CellModel,
    ch: _Channels,
    dt: float,
    v0: float,
    u: np.ndarray,
    prop_t: np.ndarray,
    gain: np.ndarray,
    injected: np.ndarray,
    out: np.ndarray,
) -> None:
    """The time loop with soma ion currents; writes the soma's ``u`` into ``out``.

    Gates advance by exponential Euler at the step's starting voltage; the conductance they
    give is then taken implicitly at the soma: with ``p = u @ prop_t`` and ``q0 = gain[0]``,
    ``u0_next = p0 + q0 (I + gE - g u0_next)``, i.e. the soma current is
    ``s = (I + gE - g p0) / (1 + q0 g)`` and ``u_next = p + s gain``.
    """
    lo, step = -0.2, 5e-5  # look-up grid, V (linear interpolation between points)
    table = _gate_tables(ch, dt, lo, 0.1, step)
    top = table.shape[0] - 1.0 - 1e-9  # keeps the row index inside the table
    weights = np.stack([ch.g, ch.g * (ch.e - cell.e_leak_v)], axis=1)  # (n_gates, 2)
    has_na = "m" in ch.names
    powers = ch.powers
    x = np.tile(ch.gates(np.array(v0))[0], (u.shape[0], 1))
    shift, inv, q0 = cell.e_leak_v - lo, 1.0 / step, float(gain[0])
    for i in range(out.shape[0] - 1):
        pos = (u[:, 0] + shift) * inv
        np.minimum(pos, top, out=pos)
        np.maximum(pos, 0.0, out=pos)
        idx = pos.astype(np.intp)
        pos -= idx
        f = table[idx]
        x *= f[:, 0] + pos[:, None] * f[:, 2]
        x += f[:, 1] + pos[:, None] * f[:, 3]
        o = x**powers
        if has_na:
            o[:, 0] *= o[:, 1]
        g, g_e = (o @ weights).T
        p = u @ prop_t
        soma = (injected[i] + g_e - g * p[:, 0]) / (1.0 + q0 * g)
        u = p + soma[:, None] * gain
        out[i + 1] = u[:, 0]


# --------------------------------------------------------------------------- recording


def _first_order(x: np.ndarray, rate: float, tau: float) -> np.ndarray:
    """``x`` (rows, sample-and-hold) through a first-order low-pass of time constant ``tau``
    (s), starting at steady state."""
    if tau <= 0:
        return x.copy()
    a = math.exp(-1.0 / (rate * tau))
    b, den = [0.0, 1.0 - a], [1.0, -a]
    # steady state for the first sample: the filter's state for a unit input, times that sample
    y, _ = signal.lfilter(b, den, x, axis=-1, zi=signal.lfilter_zi(b, den) * x[:, :1])
    return y


def _positive(**values: float) -> None:
    for name, value in values.items():
        if not (math.isfinite(value) and value > 0):
            raise ValueError(f"{name} must be a positive number, got {value!r}")


def _non_negative(**values: float) -> None:
    for name, value in values.items():
        if not (math.isfinite(value) and value >= 0):
            raise ValueError(f"{name} must be zero or positive, got {value!r}")


def validate(cell: CellModel, protocol: StepProtocol, nuisance: Nuisance) -> None:
    """Check a simulation's inputs; raise ValueError naming the first bad parameter."""
    _positive(
        soma_area=cell.soma_area,
        rm_ohm_m2=cell.rm_ohm_m2,
        cm_f_per_m2=cell.cm_f_per_m2,
        rate_hz=protocol.rate_hz,
        sweep_s=protocol.sweep_s,
        step_s=protocol.step_s,
    )
    if cell.dendrite is not None:
        den = cell.dendrite
        _positive(length_m=den.length_m, diameter_m=den.diameter_m, ri_ohm_m=den.ri_ohm_m)
        if den.n_compartments < 1:
            raise ValueError(f"n_compartments must be at least 1, got {den.n_compartments}")
    if cell.ih is not None:
        _positive(slope_v=cell.ih.slope_v, tau_s=cell.ih.tau_s)
        _non_negative(g_s_per_m2=cell.ih.g_s_per_m2)
    _non_negative(onset_s=protocol.onset_s, interval_s=protocol.interval_s)
    if protocol.onset_index >= protocol.n_samples:
        raise ValueError(
            f"onset_s ({protocol.onset_s} s) must fall inside the sweep ({protocol.sweep_s} s)"
        )
    if not protocol.amplitudes_a or not all(map(math.isfinite, protocol.amplitudes_a)):
        raise ValueError(
            f"amplitudes_a must be one or more finite currents, got {protocol.amplitudes_a!r}"
        )
    _non_negative(
        noise_rms_v=nuisance.noise_rms_v,
        hum_rms_v=nuisance.hum_rms_v,
        hum_hz=nuisance.hum_hz,
        bridge_error_ohm=nuisance.bridge_error_ohm,
        electrode_tau_s=nuisance.electrode_tau_s,
        current_noise_a=nuisance.current_noise_a,
        current_tau_s=nuisance.current_tau_s,
        nan_run_s=nuisance.nan_run_s,
    )


def simulate_cell(
    cell: CellModel,
    protocol: StepProtocol,
    nuisance: Nuisance,
    *,
    seed: int,
    cell_id: str,
    source_file: str = "",
) -> Recording:
    """Simulate one cell's step family, as the rig would record it.

    Parameters
    ----------
    cell : CellModel
        The model cell.
    protocol : StepProtocol
        Sampling and steps (current positive = depolarizing).
    nuisance : Nuisance
        Noise, hum, bridge error, drift... added to the recording.
    seed : int
        Seed of every random draw; the same seed gives identical output.
    cell_id, source_file : str
        Stored in the Recording.

    Returns
    -------
    Recording
        Voltage in V, current in A (or None), one sweep per amplitude, numbered from 0, with
        ``start_time = index * interval_s``.

    Raises
    ------
    ValueError
        For a parameter out of range (the message names it).
    """
    validate(cell, protocol, nuisance)
    rng = np.random.default_rng(seed)
    rate, n = protocol.rate_hz, protocol.n_samples
    vm = _passive_voltage(cell, protocol) if cell.is_linear else _integrate(cell, protocol)
    injected = protocol.injected()
    n_sweeps = injected.shape[0]
    start = np.arange(n_sweeps) * protocol.interval_s
    t_abs = start[:, None] + np.arange(n)[None, :] / rate

    v = vm + nuisance.bridge_error_ohm * _first_order(injected, rate, nuisance.electrode_tau_s)
    v += nuisance.offset_v + nuisance.drift_v_per_s * t_abs
    if nuisance.hum_rms_v:
        phase = rng.uniform(0.0, 2.0 * math.pi)
        v += (
            nuisance.hum_rms_v
            * math.sqrt(2.0)
            * np.sin(2 * math.pi * nuisance.hum_hz * t_abs + phase)
        )
    if nuisance.noise_rms_v:
        v += rng.normal(0.0, nuisance.noise_rms_v, v.shape)
    if nuisance.clip_v is not None:
        np.clip(v, nuisance.clip_v[0], nuisance.clip_v[1], out=v)
    run = round(nuisance.nan_run_s * rate)
    if run > 0:
        for row, first in zip(v, rng.integers(0, max(1, n - run), n_sweeps), strict=True):
            row[first : first + run] = np.nan
    current = None
    if nuisance.store_current:
        current = _first_order(injected, rate, nuisance.current_tau_s)
        if nuisance.current_noise_a:
            current = current + rng.normal(0.0, nuisance.current_noise_a, current.shape)
    sweeps = tuple(
        Sweep(
            voltage=v[i],
            current=None if current is None else current[i],
            rate=rate,
            number=i,
            start_time=float(start[i]),
            protocol="current steps",
            settings={"bias_current_a": protocol.holding_a},
        )
        for i in range(n_sweeps)
    )
    metadata = {"simulated": "true", "seed": str(seed)}
    return Recording(cell_id, source_file, "e0", sweeps, metadata)


def first_spike_current(
    cell: CellModel,
    *,
    step_s: float = 1.0,
    rate_hz: float = 20_000.0,
    max_a: float = 1e-9,
    resolution_a: float = 1e-12,
    spike_v: float = -0.01,
) -> float:
    """Smallest step current from rest that evokes a spike (the model's rheobase), A.

    Found by successive grids of 16 steps (all sweeps simulated together) until the bracket
    is narrower than ``resolution_a``; a spike is an upward crossing of ``spike_v`` (V).

    Parameters
    ----------
    cell : CellModel
        A cell with ``spiking`` channels.
    step_s, rate_hz : float
        Step length (s) and integration rate (Hz); match the protocol whose rheobase you need.
    max_a, resolution_a : float
        Largest current tried and bracket width at which to stop, A.
    spike_v : float
        Spike detection level, V.

    Returns
    -------
    float
        The upper end of the final bracket, A (within ``resolution_a`` above the true value);
        NaN when no step up to ``max_a`` fires.
    """
    if cell.spiking is None:
        return math.nan
    lo, hi = 0.0, max_a
    while hi - lo > resolution_a:
        amps = np.linspace(lo, hi, 17)[1:]
        proto = StepProtocol(
            rate_hz=rate_hz,
            sweep_s=0.05 + step_s,
            onset_s=0.05,
            step_s=step_s,
            amplitudes_a=tuple(amps),
        )
        v = _integrate(cell, proto)
        fired = ((v[:, 1:] >= spike_v) & (v[:, :-1] < spike_v)).any(axis=1)
        if not fired.any():
            return math.nan
        first = int(np.argmax(fired))
        lo, hi = (amps[first - 1] if first else lo), amps[first]
    return float(hi)
