"""Small NEURON cells with known passive properties, wrapped as patchbatch recordings.

Ground truth for the passive fitters (tests/test_passive_neuron.py, benchmarks/accuracy.py).
Everything crossing this module's interface is SI (V, A, s, ohm, F, m); NEURON's own units
(mV, nA, ms, um, S/cm2, uF/cm2, ohm cm) appear only inside ``_build`` and ``NeuronCell.run``,
where each conversion is spelled out.

Three kinds of cell, all driven by an IClamp at the soma (positive amplitude = depolarizing,
NEURON's convention too):

* single compartment with ``pas``: Rin = Rm / area, tau = Rm * Cm, C = Cm * area;
* ball-and-stick: the same soma plus one sealed-end dendrite, ``pas`` everywhere with uniform
  Rm, Cm (truth from Rall's cable formulas, see ``rall_cable_conductance``);
* either of those with ``hsag`` (tests/mod/ih.mod), a small HCN-like current of our own;
  truth then comes from a noiseless NEURON run (see ``noiseless_truth``).

NEURON loads a compiled mechanism library once per process, so ``load_mechanisms`` compiles
into a folder of the caller's choice, and does nothing when NEURON already knows ``hsag``.
"""

from __future__ import annotations

import math
import shutil
import subprocess
import sys
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from pipeline.recording import Recording, Sweep

MOD_DIR = Path(__file__).resolve().parent / "mod"
IH_MECHANISM = "hsag"

# Unit conversions at the NEURON boundary (SI value * factor = NEURON value).
M_TO_UM = 1e6
S_TO_MS = 1e3
V_TO_MV = 1e3
A_TO_NA = 1e9
F_PER_M2_TO_UF_PER_CM2 = 100.0  # 1 F/m2 = 1e6 uF / 1e4 cm2
S_PER_M2_TO_S_PER_CM2 = 1e-4  # 1 S/m2 = 1 S / 1e4 cm2
OHM_M_TO_OHM_CM = 100.0
UM2_TO_M2 = 1e-12

_h = None  # neuron.h, imported on first use so importing this module stays cheap


def _hoc():
    """Return ``neuron.h`` with the standard run system loaded (imported once)."""
    global _h
    if _h is None:
        from neuron import h

        h.load_file("stdrun.hoc")
        _h = h
    return _h


# --------------------------------------------------------------------------- mechanisms


def mechanism_available(name: str) -> bool:
    """True when NEURON knows a density mechanism called ``name`` in this process."""
    h = _hoc()
    mt = h.MechanismType(0)
    ref = h.ref("")
    for i in range(int(mt.count())):
        mt.select(i)
        mt.selected(ref)
        if ref[0] == name:
            return True
    return False


def compile_mechanisms(build_dir: Path, mod_dir: Path = MOD_DIR) -> Path:
    """Compile the .mod files of ``mod_dir`` with nrnivmodl inside ``build_dir``.

    Returns
    -------
    pathlib.Path
        The shared library to hand to ``h.nrn_load_dll``.
    """
    build_dir = Path(build_dir)
    build_dir.mkdir(parents=True, exist_ok=True)
    for mod in sorted(mod_dir.glob("*.mod")):
        shutil.copy(mod, build_dir / mod.name)
    nrnivmodl = Path(sys.executable).with_name("nrnivmodl")
    exe = str(nrnivmodl) if nrnivmodl.exists() else "nrnivmodl"
    done = subprocess.run([exe, "."], cwd=build_dir, capture_output=True, text=True)
    libs = sorted(build_dir.glob("*/libnrnmech.so")) + sorted(
        build_dir.glob("*/.libs/libnrnmech.so")
    )
    if done.returncode != 0 or not libs:
        raise RuntimeError(f"nrnivmodl failed in {build_dir}:\n{done.stdout}\n{done.stderr}")
    return libs[0]


def load_mechanisms(build_dir: Path) -> None:
    """Make ``hsag`` available in this process: compile into ``build_dir`` and load, once.

    A second call (from another fixture, or after a test session already loaded it) is a no-op,
    because NEURON refuses to load a second library defining the same mechanism.
    """
    if mechanism_available(IH_MECHANISM):
        return
    lib = compile_mechanisms(build_dir)
    _hoc().nrn_load_dll(str(lib))
    if not mechanism_available(IH_MECHANISM):
        raise RuntimeError(f"{lib} loaded but NEURON does not know {IH_MECHANISM!r}")


# --------------------------------------------------------------------------- cells


@dataclass(frozen=True)
class CellSpec:
    """Geometry and membrane of a simulated cell, SI units.

    Parameters
    ----------
    rm_ohm_m2 : float
        Specific membrane resistance, ohm m2 (1 ohm m2 = 1e4 ohm cm2).
    cm_f_m2 : float
        Specific membrane capacitance, F/m2 (0.01 F/m2 = 1 uF/cm2).
    soma_diam_m, soma_length_m : float
        Soma cylinder, m. Its membrane area is pi * diam * length (NEURON counts no end caps).
    dend_diam_m, dend_length_m : float
        Dendrite cylinder, m, attached at the soma's end; length 0 means no dendrite.
    ri_ohm_m : float
        Axial resistivity, ohm m (1 ohm m = 100 ohm cm).
    dend_nseg : int
        Segments of the dendrite (odd, so that 0.5 is a node).
    gh_s_m2 : float
        Peak conductance density of ``hsag``, S/m2; 0 means the mechanism is not inserted.
    vrest_v : float
        Resting potential, V. ``e_pas`` is set so the cell rests exactly here.
    """

    rm_ohm_m2: float = 2.0
    cm_f_m2: float = 0.01
    soma_diam_m: float = 20e-6
    soma_length_m: float = 20e-6
    dend_diam_m: float = 2e-6
    dend_length_m: float = 0.0
    ri_ohm_m: float = 1.5
    dend_nseg: int = 101
    gh_s_m2: float = 0.0
    vrest_v: float = -0.070

    @property
    def has_dendrite(self) -> bool:
        """True for a ball-and-stick cell."""
        return self.dend_length_m > 0

    @property
    def kind(self) -> str:
        """``"single"``, ``"ball-stick"``, with ``"+ih"`` when hsag is inserted."""
        base = "ball-stick" if self.has_dendrite else "single"
        return base + ("+ih" if self.gh_s_m2 > 0 else "")

    @property
    def soma_area_m2(self) -> float:
        """Lateral area of the soma cylinder, m2."""
        return math.pi * self.soma_diam_m * self.soma_length_m

    @property
    def dend_area_m2(self) -> float:
        """Lateral area of the dendrite, m2 (0 without one)."""
        return math.pi * self.dend_diam_m * self.dend_length_m if self.has_dendrite else 0.0

    @property
    def tau_m_s(self) -> float:
        """Membrane time constant Rm * Cm, s."""
        return self.rm_ohm_m2 * self.cm_f_m2

    @property
    def total_capacitance_f(self) -> float:
        """Capacitance of all the membrane, F."""
        return self.cm_f_m2 * (self.soma_area_m2 + self.dend_area_m2)


def electrotonic_length(diam_m: float, length_m: float, rm_ohm_m2: float, ri_ohm_m: float) -> float:
    """Electrotonic length L = length / lambda, lambda = sqrt(Rm d / (4 Ri)) (dimensionless).

    References
    ----------
    Rall W (1959) Exp Neurol 1:491-527; Johnston D, Wu SM-S (1995) Foundations of Cellular
    Neurophysiology, MIT Press, ch. 4.
    """
    lam = math.sqrt(rm_ohm_m2 * diam_m / (4.0 * ri_ohm_m))
    return length_m / lam


def rall_cable_conductance(
    diam_m: float, length_m: float, rm_ohm_m2: float, ri_ohm_m: float
) -> float:
    """Input conductance of a finite sealed-end cylinder, S.

    G_in = G_inf * tanh(L), G_inf = (pi / 2) * d^(3/2) / sqrt(Rm * Ri).

    References
    ----------
    Rall W (1959) Exp Neurol 1:491-527; Johnston & Wu (1995) ch. 4.
    """
    g_inf = (math.pi / 2.0) * diam_m**1.5 / math.sqrt(rm_ohm_m2 * ri_ohm_m)
    return g_inf * math.tanh(electrotonic_length(diam_m, length_m, rm_ohm_m2, ri_ohm_m))


def passive_truth(spec: CellSpec) -> dict[str, float]:
    """Analytic Rin (ohm), tau (s) and capacitances (F) of a purely passive cell.

    ``cm_f`` is tau / Rin, the capacitance an isopotential fit can see; ``c_total_f`` is all the
    membrane's. They agree for a single compartment; for a ball-and-stick tau / Rin is smaller
    (Golowasch et al. 2009, J Neurophysiol 102:2161-2175).
    """
    if spec.gh_s_m2 > 0:
        raise ValueError("passive_truth: cells with hsag need noiseless_truth")
    g = spec.soma_area_m2 / spec.rm_ohm_m2  # isopotential soma (Ohm's law, Johnston & Wu ch. 2)
    if spec.has_dendrite:  # ball-and-stick: G_N = G_soma + G_cable (Rall 1959)
        g += rall_cable_conductance(
            spec.dend_diam_m, spec.dend_length_m, spec.rm_ohm_m2, spec.ri_ohm_m
        )
    rin = 1.0 / g
    tau = spec.tau_m_s  # tau0 = Rm Cm for uniform membrane with sealed ends (Rall 1969)
    return {
        "rin_ohm": rin,
        "tau_s": tau,
        "cm_f": tau / rin,
        "c_total_f": spec.total_capacitance_f,
        "vrest_v": spec.vrest_v,
    }


@dataclass(frozen=True)
class Protocol:
    """A family of current steps, one per sweep.

    Parameters
    ----------
    amplitudes_a : sequence of float
        Step current per sweep, A (positive = depolarizing).
    rate_hz : float
        Sampling rate, Hz; also the simulation's time step (Crank-Nicolson, see ``NeuronCell``).
    sweep_s, onset_s, duration_s : float
        Sweep length, step onset and step duration, s.
    interval_s : float
        Time from one sweep's start to the next, s.

    No holding current: every sweep starts from rest at 0 A (the cell is reinitialised).
    """

    amplitudes_a: tuple[float, ...]
    rate_hz: float = 20e3
    sweep_s: float = 1.5
    onset_s: float = 0.2
    duration_s: float = 1.0
    interval_s: float = 5.0

    def __post_init__(self) -> None:
        object.__setattr__(self, "amplitudes_a", tuple(float(a) for a in self.amplitudes_a))

    @property
    def n_samples(self) -> int:
        """Samples per sweep."""
        return int(round(self.sweep_s * self.rate_hz))

    @property
    def onset_index(self) -> int:
        """Index of the first sample of the step."""
        return int(round(self.onset_s * self.rate_hz))

    @property
    def offset_index(self) -> int:
        """Index of the first sample after the step."""
        return int(round((self.onset_s + self.duration_s) * self.rate_hz))

    def command(self, amplitude_a: float) -> np.ndarray:
        """Injected current of one sweep, A, sample by sample."""
        i = np.zeros(self.n_samples)
        i[self.onset_index : self.offset_index] += amplitude_a
        return i


def steps_protocol(
    rin_ohm: float, n_sweeps: int = 15, n_hyper: int = 10, dv_v: float = 2e-3, **kwargs: float
) -> Protocol:
    """Steps from ``-n_hyper`` to ``n_sweeps - n_hyper - 1`` increments, each about ``dv_v`` V.

    The increment is rounded to whole pA, as a rig's protocol editor would be (common practice).
    """
    inc = max(1e-12, round(dv_v / rin_ohm * 1e12) * 1e-12)
    amps = tuple((k - n_hyper) * inc for k in range(n_sweeps))
    return Protocol(amplitudes_a=amps, **kwargs)


class NeuronCell:
    """One simulated cell in NEURON, built from a ``CellSpec``.

    Fixed time step equal to the sampling interval, cvode off, Crank-Nicolson
    (``h.secondorder = 2``): against the analytic RC charging curve this is accurate to ~1e-6
    relative at 20 kHz, where backward Euler at the same step is off by ~1e-3. On a fine
    dendrite, Crank-Nicolson rings for a few samples after a step edge (measured: < 3 uV on a
    29 mV step against backward Euler at dt/32), far below any noise the tests add.
    Keep the object alive while running; drop it to remove its sections from NEURON.
    """

    def __init__(self, spec: CellSpec) -> None:
        self.spec = spec
        self._build()

    def _build(self) -> None:
        h = _hoc()
        s = self.spec
        self.soma = h.Section(name="soma")
        self.soma.L = s.soma_length_m * M_TO_UM
        self.soma.diam = s.soma_diam_m * M_TO_UM
        self.soma.nseg = 1
        self.sections = [self.soma]
        if s.has_dendrite:
            self.dend = h.Section(name="dend")
            self.dend.L = s.dend_length_m * M_TO_UM
            self.dend.diam = s.dend_diam_m * M_TO_UM
            self.dend.nseg = s.dend_nseg
            self.dend.connect(self.soma(1))
            self.sections.append(self.dend)
        for sec in self.sections:
            sec.Ra = s.ri_ohm_m * OHM_M_TO_OHM_CM
            sec.cm = s.cm_f_m2 * F_PER_M2_TO_UF_PER_CM2
            sec.insert("pas")
            for seg in sec:
                seg.pas.g = S_PER_M2_TO_S_PER_CM2 / s.rm_ohm_m2  # g = 1/Rm, S/cm2
                seg.pas.e = s.vrest_v * V_TO_MV
            if s.gh_s_m2 > 0:
                sec.insert(IH_MECHANISM)
                for seg in sec:
                    getattr(seg, IH_MECHANISM).gbar = s.gh_s_m2 * S_PER_M2_TO_S_PER_CM2
        self.stim = h.IClamp(self.soma(0.5))
        self._rest_at(s.vrest_v * V_TO_MV)

    def _rest_at(self, v_mv: float) -> None:
        """Set e_pas so that pas + hsag balance at ``v_mv`` (then the initial state is rest).

        g_pas (v - e_pas) + i_h(v) = 0  =>  e_pas = v + i_h(v) / g_pas (mA/cm2 / S/cm2 = mV).
        """
        if self.spec.gh_s_m2 <= 0:
            return
        h = _hoc()
        h.finitialize(v_mv)
        for sec in self.sections:
            for seg in sec:
                seg.pas.e = v_mv + getattr(seg, IH_MECHANISM).i / seg.pas.g

    def area_m2(self) -> float:
        """Membrane area NEURON integrates over, m2."""
        h = _hoc()
        return sum(h.area(seg.x, sec=sec) for sec in self.sections for seg in sec) * UM2_TO_M2

    def run(self, amplitude_a: float, protocol: Protocol) -> np.ndarray:
        """Simulate one sweep from rest; returns the soma's membrane potential, V."""
        h = _hoc()
        dt_ms = S_TO_MS / protocol.rate_hz
        h.cvode_active(0)
        h.secondorder = 2
        h.dt = dt_ms
        h.steps_per_ms = 1.0 / dt_ms
        self.stim.delay = protocol.onset_s * S_TO_MS
        self.stim.dur = protocol.duration_s * S_TO_MS
        self.stim.amp = amplitude_a * A_TO_NA
        vec = h.Vector()
        vec.record(self.soma(0.5)._ref_v, dt_ms)
        h.finitialize(self.spec.vrest_v * V_TO_MV)
        h.continuerun(protocol.sweep_s * S_TO_MS)
        v = np.array(vec)[: protocol.n_samples] / V_TO_MV
        if v.size < protocol.n_samples:
            raise RuntimeError(f"NEURON returned {v.size} of {protocol.n_samples} samples")
        return v

    def is_linear(self) -> bool:
        """True when only ``pas`` is inserted (responses then scale with the current)."""
        return self.spec.gh_s_m2 <= 0


def simulate(spec: CellSpec, protocol: Protocol, superpose: bool | None = None) -> list[np.ndarray]:
    """Noiseless membrane potential (V) of every sweep of ``protocol``.

    Parameters
    ----------
    superpose : bool or None
        For a purely passive cell the response is linear in the step current, so one run with a
        unit step, scaled, gives every sweep (superposition; exact up to rounding). ``None``
        chooses it whenever the cell is linear.
    """
    cell = NeuronCell(spec)
    if superpose is None:
        superpose = cell.is_linear()
    if not superpose:
        return [cell.run(a, protocol) for a in protocol.amplitudes_a]
    unit = 100e-12
    dv = cell.run(unit, protocol) - spec.vrest_v
    return [spec.vrest_v + dv * (a / unit) for a in protocol.amplitudes_a]


# --------------------------------------------------------------------------- nuisances


@dataclass(frozen=True)
class Nuisances:
    """What a real rig adds to the membrane potential, SI units.

    Parameters
    ----------
    noise_rms_v : float
        White voltage noise, V RMS.
    hum_v, hum_hz : float
        Mains hum amplitude (V, peak) and frequency (Hz, 50 or 60); phase runs on across sweeps.
    bridge_ohm : float
        Unbalanced bridge (series resistance left uncompensated), ohm.
    electrode_tau_s : float
        First-order electrode filter the bridge error passes through, s.
    drift_v : float
        Slow linear drift, V from the first sweep's start (0 there: the cell is at ``vrest_v``
        when the recording starts, the drift is the rig's) to the last sweep's end.
    current_noise_a : float
        White noise on the recorded current, A RMS.
    """

    noise_rms_v: float = 0.0
    hum_v: float = 0.0
    hum_hz: float = 50.0
    bridge_ohm: float = 0.0
    electrode_tau_s: float = 30e-6
    drift_v: float = 0.0
    current_noise_a: float = 0.0


def filtered_current(command: np.ndarray, rate_hz: float, tau_s: float) -> np.ndarray:
    """A piecewise-constant current seen through a first-order filter, exact at the samples, A.

    Each change of the command at sample j (time j / rate) adds
    dI * (1 - exp(-(t - t_j) / tau)) for t >= t_j.
    """
    out = np.full(command.shape, float(command[0]))
    if tau_s <= 0:
        return command.astype(float)
    t = np.arange(command.size) / rate_hz
    for j in np.flatnonzero(np.diff(command)) + 1:
        step = command[j] - command[j - 1]
        out[j:] += step * -np.expm1(-(t[j:] - t[j]) / tau_s)
    return out


def add_nuisances(
    vm: np.ndarray,
    command: np.ndarray,
    protocol: Protocol,
    nuisances: Nuisances,
    rng: np.random.Generator,
    start_s: float,
    recording_s: float,
) -> tuple[np.ndarray, np.ndarray]:
    """Recorded voltage and current of one sweep: V_rec = V_m + R_err * I_filtered + noise + hum
    + drift; I_rec = command + noise. Returns (V, A)."""
    n = nuisances
    t_abs = start_s + np.arange(vm.size) / protocol.rate_hz
    v = vm + n.bridge_ohm * filtered_current(command, protocol.rate_hz, n.electrode_tau_s)
    v = v + n.hum_v * np.sin(2.0 * np.pi * n.hum_hz * t_abs)
    v = v + n.drift_v * t_abs / recording_s
    v = v + rng.normal(0.0, n.noise_rms_v, vm.size) if n.noise_rms_v > 0 else v
    i = command + rng.normal(0.0, n.current_noise_a, vm.size) if n.current_noise_a > 0 else command
    return v, i


def random_nuisances(rng: np.random.Generator) -> Nuisances:
    """Nuisances drawn in the ranges of the task: noise 0.1-0.6 mV RMS, 50/60 Hz hum,
    bridge error 2-20 Mohm through a 20-80 us filter, drift up to +/-1 mV, 2-5 pA current noise."""
    return Nuisances(
        noise_rms_v=rng.uniform(0.1e-3, 0.6e-3),
        hum_v=rng.uniform(0.05e-3, 0.3e-3),
        hum_hz=float(rng.choice([50.0, 60.0])),
        bridge_ohm=rng.uniform(2e6, 20e6),
        electrode_tau_s=rng.uniform(20e-6, 80e-6),
        drift_v=rng.uniform(-1e-3, 1e-3),
        current_noise_a=rng.uniform(2e-12, 5e-12),
    )


# --------------------------------------------------------------------------- recordings


def make_recording(
    cell_id: str,
    voltages: Sequence[np.ndarray],
    protocol: Protocol,
    nuisances: Nuisances | None = None,
    seed: int = 0,
) -> Recording:
    """Wrap simulated sweeps into a ``Recording`` (V, A with positive = depolarizing, Hz)."""
    rng = np.random.default_rng(seed)
    n = nuisances or Nuisances()
    total_s = (len(voltages) - 1) * protocol.interval_s + protocol.sweep_s
    sweeps = []
    for k, (vm, amp) in enumerate(zip(voltages, protocol.amplitudes_a, strict=True)):
        start = k * protocol.interval_s
        v, i = add_nuisances(vm, protocol.command(amp), protocol, n, rng, start, total_s)
        sweeps.append(
            Sweep(
                voltage=v,
                current=i,
                rate=protocol.rate_hz,
                number=k + 1,
                start_time=start,
                protocol="neuron steps",
            )
        )
    return Recording(
        cell_id=cell_id,
        source_file=f"<neuron:{cell_id}>",
        electrode="soma",
        sweeps=tuple(sweeps),
        metadata={"simulator": "NEURON"},
    )


@dataclass(frozen=True)
class SimulatedCell:
    """A simulated recording with its noiseless traces and truth (SI units)."""

    spec: CellSpec
    protocol: Protocol
    nuisances: Nuisances
    recording: Recording
    clean: tuple[np.ndarray, ...]  # noiseless membrane potential per sweep, V
    truth: dict[str, float] = field(default_factory=dict)


def simulate_cell(
    cell_id: str,
    spec: CellSpec,
    protocol: Protocol,
    nuisances: Nuisances | None = None,
    seed: int = 0,
) -> SimulatedCell:
    """Run NEURON, add the nuisances (seeded) and attach the truth.

    Truth is analytic for purely passive cells (``passive_truth``) and comes from the noiseless
    run for cells with hsag (``noiseless_truth``).
    """
    n = nuisances or Nuisances()
    clean = simulate(spec, protocol)
    rec = make_recording(cell_id, clean, protocol, n, seed)
    truth = passive_truth(spec) if spec.gh_s_m2 <= 0 else noiseless_truth(spec, protocol, clean)
    return SimulatedCell(spec, protocol, n, rec, tuple(clean), truth)


def with_amplitudes(protocol: Protocol, amplitudes_a: Sequence[float]) -> Protocol:
    """The same protocol with other step currents."""
    return replace(protocol, amplitudes_a=tuple(amplitudes_a))


# --------------------------------------------------------------------------- truth with hsag

SS_WINDOW_S = 0.1  # steady state: mean over the last 100 ms of the step (common practice)


def step_measures(vm: np.ndarray, protocol: Protocol) -> dict[str, float]:
    """Baseline, steady-state and peak deflection of one noiseless sweep (V).

    ``peak_dv`` is the extreme deflection (sign of the step) during the step; ``sag`` is
    (V_peak - V_ss) / (V_peak - V_base), 0 without a sag.
    """
    on, off = protocol.onset_index, protocol.offset_index
    base = float(np.mean(vm[:on]))
    n_ss = int(round(SS_WINDOW_S * protocol.rate_hz))
    ss = float(np.mean(vm[off - n_ss : off]))
    during = vm[on:off]
    peak = float(during.min() if ss < base else during.max())
    span = peak - base
    sag = (peak - ss) / span if span != 0 else 0.0
    return {"base_v": base, "ss_dv": ss - base, "peak_dv": span, "sag": sag}


def rest_conductances(spec: CellSpec) -> dict[str, float]:
    """Membrane at rest (NEURON, initialised at ``vrest_v``): g_pas and the hsag chord
    conductance gbar * m_inf(V_rest), both S/m2, and the frozen-gate time constant
    Cm / (g_pas + g_h), s — the membrane time constant seen before the h gate moves."""
    cell = NeuronCell(spec)
    h = _hoc()
    h.finitialize(spec.vrest_v * V_TO_MV)
    seg = cell.soma(0.5)
    g_pas = seg.pas.g / S_PER_M2_TO_S_PER_CM2
    g_h = getattr(seg, IH_MECHANISM).g / S_PER_M2_TO_S_PER_CM2 if spec.gh_s_m2 > 0 else 0.0
    return {"g_pas_s_m2": g_pas, "g_h_s_m2": g_h, "tau_frozen_s": spec.cm_f_m2 / (g_pas + g_h)}


def rin_at_rest(spec: CellSpec, protocol: Protocol, probe_a: float = 2e-12) -> float:
    """Steady-state input resistance at rest from two noiseless NEURON runs of +/- ``probe_a``:
    (V_ss(+I) - V_ss(-I)) / 2I, ohm (a central difference, so Ih's curvature cancels to first
    order)."""
    up, down = simulate(spec, with_amplitudes(protocol, (probe_a, -probe_a)), superpose=False)
    return (step_measures(up, protocol)["ss_dv"] - step_measures(down, protocol)["ss_dv"]) / (
        2.0 * probe_a
    )


def noiseless_truth(
    spec: CellSpec, protocol: Protocol, clean: Sequence[np.ndarray]
) -> dict[str, float]:
    """Truth for a cell with hsag, from noiseless NEURON runs (SI units).

    ``rin_ohm`` is the steady-state input resistance at rest (``rin_at_rest``); ``rin_fit_ohm``
    the slope of the noiseless steady-state V-I line over the protocol's steps at or below 0 A
    (what a V-I fit over those steps should give); ``tau_s`` the frozen-gate time constant
    Cm / (g_pas + g_h(V_rest)), the membrane's before the h gate moves (the gate's time constant,
    ~80 ms at rest, is not always far slower than the membrane's, so this truth is approximate);
    ``rin_frozen_ohm`` the input resistance with the gate frozen at rest and ``cm_f`` =
    tau / rin_frozen (Cm * area for one compartment; less for a ball-and-stick, as with pas
    alone); ``c_total_f`` Cm * area; ``sag`` of the largest hyperpolarizing step,
    with ``sag_step_a`` its current (``step_measures`` gives any other step's).
    """
    rest = rest_conductances(spec)
    # frozen gates: a uniform passive membrane with Rm = 1 / (g_pas + g_h), so Rall's formulas
    # give its input resistance and tau / Rin the capacitance a fit can see (as for pas alone)
    frozen = passive_truth(
        replace(spec, rm_ohm_m2=1.0 / (rest["g_pas_s_m2"] + rest["g_h_s_m2"]), gh_s_m2=0.0)
    )
    amps = np.asarray(protocol.amplitudes_a)
    measures = [step_measures(v, protocol) for v in clean]
    ss = np.array([m["ss_dv"] for m in measures])
    low = amps <= 0
    rin_fit = float(np.polyfit(amps[low], ss[low], 1)[0]) if low.sum() >= 2 else math.nan
    k = int(np.argmin(amps))
    return {
        "rin_ohm": rin_at_rest(spec, protocol),
        "rin_fit_ohm": rin_fit,
        "tau_s": rest["tau_frozen_s"],
        "tau_m_s": spec.tau_m_s,
        "rin_frozen_ohm": frozen["rin_ohm"],
        "cm_f": frozen["cm_f"],
        "c_total_f": spec.total_capacitance_f,
        "vrest_v": spec.vrest_v,
        "sag": measures[k]["sag"],
        "sag_step_a": float(amps[k]),
    }
