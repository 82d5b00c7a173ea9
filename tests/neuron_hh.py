"""NEURON helpers for single-compartment Hodgkin-Huxley cells (NEURON's built-in ``hh``).

The ``hh`` mechanism is the squid axon model of Hodgkin & Huxley (1952), J Physiol 117:500-544,
run at its original 6.3 degC. NEURON's own threshold detectors (NetCon) give the reference spike
times: one watching v (spike counts) and one watching the capacitive current, which is
cm * dV/dt computed by NEURON itself, so the dV/dt threshold is checked without our derivative.

Units here follow the tests' Sweep contract (SI); NEURON's own units (mV, ms, nA, um) stay inside.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from neuron import h

from pipeline.recording import Sweep
from pipeline.steps import StepEpoch

h.load_file("stdrun.hoc")

HH_CELSIUS = 6.3  # degC, the temperature of Hodgkin & Huxley's 1952 rate constants
V_INIT_MV = -65.0  # hh resting potential, mV (NEURON's default for the mechanism)


@dataclass(frozen=True)
class HHRun:
    """One simulated step sweep and NEURON's reference spike times.

    ``v_spike_times_s``: upward crossings of ``v_threshold_mv`` (NetCon on v).
    ``dvdt_times_s``: upward crossings of the dV/dt threshold (NetCon on i_cap).
    """

    sweep: Sweep
    epoch: StepEpoch
    v_spike_times_s: np.ndarray
    dvdt_times_s: np.ndarray


class HHSoma:
    """A single isopotential compartment with ``hh`` and an IClamp at its centre.

    Parameters
    ----------
    diam_um : float
        Diameter and length of the cylinder, um (area = pi * diam**2).
    """

    def __init__(self, diam_um: float = 30.0) -> None:
        self.soma = h.Section(name="hh_soma")
        self.soma.L = self.soma.diam = diam_um
        self.soma.nseg = 1
        self.soma.cm = 1.0  # uF/cm2
        self.soma.insert("hh")
        self.stim = h.IClamp(self.soma(0.5))

    @property
    def area_cm2(self) -> float:
        """Membrane area, cm2."""
        return float(self.soma(0.5).area()) * 1e-8

    def density_to_amps(self, ua_per_cm2: float) -> float:
        """A current density (uA/cm2) as the injected current for this soma, A."""
        return ua_per_cm2 * 1e-6 * self.area_cm2

    def run(
        self,
        amp_a: float,
        delay_s: float = 0.05,
        dur_s: float = 0.3,
        tstop_s: float = 0.45,
        dt_s: float = 25e-6,
        v_threshold_mv: float = 0.0,
        dvdt_threshold_v_per_s: float = 20.0,
        number: int = 0,
    ) -> HHRun:
        """Run one step (positive ``amp_a`` = depolarizing) and record v every time step."""
        # NEURON's settings are global to the process: set every one this run relies on, as
        # other test modules change them (e.g. secondorder = 2 for passive cells).
        h.cvode_active(0)
        h.secondorder = 0
        h.celsius = HH_CELSIUS
        h.dt = dt_s * 1e3
        h.steps_per_ms = 1.0 / h.dt
        self.stim.delay, self.stim.dur, self.stim.amp = delay_s * 1e3, dur_s * 1e3, amp_a * 1e9
        seg = self.soma(0.5)
        v = h.Vector().record(seg._ref_v)
        det_v = h.NetCon(seg._ref_v, None, sec=self.soma)
        det_v.threshold = v_threshold_mv
        det_d = h.NetCon(seg._ref_i_cap, None, sec=self.soma)
        det_d.threshold = dvdt_threshold_v_per_s * self.soma.cm * 1e-3  # mA/cm2 = cm * dV/dt
        t_v, t_d = h.Vector(), h.Vector()
        det_v.record(t_v)
        det_d.record(t_d)
        h.finitialize(V_INIT_MV)
        h.continuerun(tstop_s * 1e3)
        rate = 1.0 / dt_s
        volts = np.array(v) * 1e-3
        on, off = int(round(delay_s * rate)), int(round((delay_s + dur_s) * rate))
        current = np.zeros_like(volts)
        current[on:off] = amp_a
        sweep = Sweep(voltage=volts, current=current, rate=rate, number=number)
        epoch = StepEpoch(
            sweep=number,
            usable=True,
            kind="step",
            reason="",
            holding=0.0,
            amplitude=amp_a,
            onset=on / rate,
            offset=off / rate,
            onset_index=on,
            offset_index=off,
        )
        return HHRun(sweep, epoch, np.array(t_v) * 1e-3, np.array(t_d) * 1e-3)

    def spikes_in_step(self, amp_a: float, **kwargs: float) -> int:
        """NetCon-on-v spike count during the step."""
        r = self.run(amp_a, **kwargs)
        t = r.v_spike_times_s
        return int(np.count_nonzero((t >= r.epoch.onset) & (t < r.epoch.offset)))

    def bisect_rheobase(self, lo_a: float, hi_a: float, tol_a: float, **kwargs: float) -> float:
        """Smallest step (A) with at least one NetCon spike during the step, to ``tol_a``."""
        if self.spikes_in_step(lo_a, **kwargs) or not self.spikes_in_step(hi_a, **kwargs):
            raise ValueError("rheobase is not bracketed by lo_a and hi_a")
        while hi_a - lo_a > tol_a:
            mid = (lo_a + hi_a) / 2
            lo_a, hi_a = (lo_a, mid) if self.spikes_in_step(mid, **kwargs) else (mid, hi_a)
        return hi_a
