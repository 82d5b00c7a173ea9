"""Accuracy of the passive fitters on simulated NEURON cells, against a naive method.

Run with ``python benchmarks/accuracy.py [--cells N] [--seed S]``. Not a test: it prints, per
property and kind of cell, the median and 95th-percentile error of ``fit_cell`` and of the naive
method against the truth, the fitting time per cell, and PASS/MISS per target; it exits 0 either
way.

Cells (fixed seed): single compartments, ball-and-sticks, and both with hsag (tests/mod/ih.mod),
Rin 50-800 Mohm, tau 8-60 ms, electrotonic length 0.3-1.5, with rig nuisances (noise, hum,
bridge error through an electrode filter, drift, current noise; tests/neuron_models.py).
Protocol: 15 sweeps x 1.5 s at 20 kHz, steps of ~2 mV from -10 to +4 increments.

Truth: analytic for passive cells (Rm / area; Rall's cable formula plus the soma for a
ball-and-stick; tau = Rm Cm, Rall 1969; Cm = tau / Rin, which for a ball-and-stick is below the
total membrane capacitance, Golowasch et al. 2009). Cells with hsag: Rin at rest from
noiseless +/-2 pA NEURON runs; tau = Cm / (g_pas + g_h(V_rest)), the membrane with the h gate
frozen at rest (approximate: the gate, ~80 ms, is not always much slower than the membrane);
Cm = that tau over the frozen-gate input resistance (see ``neuron_models.noiseless_truth``).

Naive method: on the largest hyperpolarizing step of the raw trace, Rin = dV / I with dV the
mean of the last 100 ms of the step minus the mean before the step, tau from one exponential
fitted with scipy's curve_fit from step onset to step end, Cm = tau / Rin, Vrest = the mean
before the step.
"""

from __future__ import annotations

import argparse
import math
import os
import sys
import tempfile
import time
from dataclasses import dataclass, replace
from pathlib import Path

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")  # one core: BLAS threads would inflate CPU time

import numpy as np  # noqa: E402
from scipy.optimize import curve_fit  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
import neuron_models as nm  # noqa: E402

PROPS = ("rin", "tau", "cm", "vrest")
# (median, 95th percentile) targets: relative errors, Vrest in mV (absolute)
TARGETS = {"rin": (0.01, 0.03), "tau": (0.02, 0.05), "cm": (0.03, 0.06), "vrest": (0.3, 0.3)}
TIME_TARGET_S = 0.050
KINDS = ("single", "ball-stick", "single+ih", "ball-stick+ih")


@dataclass
class Outcome:
    """Errors of one cell: fitter and naive method, per property."""

    cell_id: str
    kind: str
    fit: dict[str, float]
    naive: dict[str, float]
    seconds: float  # CPU time of fit_cell, s
    wall_s: float  # wall-clock time of fit_cell, s
    sag: tuple[float, float]  # (fitted, true) sag ratio, NaN when not measured
    note: str = ""
    about: str = ""  # the cell's truth and geometry, for --verbose


# --------------------------------------------------------------------------- random cells


def random_spec(rng: np.random.Generator, kind: str) -> nm.CellSpec:
    """A cell of ``kind`` with Rin 50-800 Mohm (log-uniform, passive part) and tau 8-60 ms."""
    rin = math.exp(rng.uniform(math.log(50e6), math.log(800e6)))
    tau = rng.uniform(8e-3, 60e-3)
    cm = rng.uniform(0.008, 0.012)  # 0.8-1.2 uF/cm2 (Gentet et al. 2000; common practice)
    rm = tau / cm
    gh = rng.uniform(0.2, 0.8) / rm if kind.endswith("+ih") else 0.0  # g_h,max / g_pas 0.2-0.8
    vrest = rng.uniform(-0.075, -0.060)
    if kind.startswith("single"):
        side = math.sqrt(rm / rin / math.pi)  # soma cylinder with L = diam and area Rm / Rin
        return nm.CellSpec(rm, cm, side, side, gh_s_m2=gh, vrest_v=vrest)
    ri = rng.uniform(1.0, 2.5)  # 100-250 ohm cm
    el = rng.uniform(0.3, 1.5)
    soma_share = rng.uniform(0.25, 0.7)  # fraction of the input conductance in the soma
    g_cable = (1.0 - soma_share) / rin
    # Rall 1959: G_cable = (pi/2) d^1.5 tanh(L) / sqrt(Rm Ri)  ->  solve for d
    diam = (g_cable * math.sqrt(rm * ri) / (math.pi / 2 * math.tanh(el))) ** (2.0 / 3.0)
    length = el * math.sqrt(rm * diam / (4 * ri))
    side = math.sqrt(soma_share / rin * rm / math.pi)
    nseg = int(2 * math.ceil(40 * el) + 1)  # ~80 segments per length constant, odd
    return nm.CellSpec(rm, cm, side, side, diam, length, ri, nseg, gh, vrest)


def truth_of(sim: nm.SimulatedCell) -> dict[str, float]:
    """Rin (ohm), tau (s), Cm (F), Vrest (V) the fitter is held to."""
    t = sim.truth
    return {"rin": t["rin_ohm"], "tau": t["tau_s"], "cm": t["cm_f"], "vrest": t["vrest_v"]}


# --------------------------------------------------------------------------- naive method


def naive_fit(sim: nm.SimulatedCell) -> dict[str, float]:
    """The naive estimates (see the module docstring), SI units; NaN where curve_fit fails."""
    proto = sim.protocol
    k = int(np.argmin(proto.amplitudes_a))
    sweep = sim.recording.sweeps[k]
    v, amp = sweep.voltage, proto.amplitudes_a[k]
    on, off = proto.onset_index, proto.offset_index
    base = float(np.mean(v[:on]))
    n_ss = int(round(0.1 * proto.rate_hz))
    dv = float(np.mean(v[off - n_ss : off])) - base
    rin = dv / amp
    t = np.arange(off - on) / proto.rate_hz
    y = v[on:off]

    def charging(tt: np.ndarray, v_inf: float, a: float, tau: float) -> np.ndarray:
        return v_inf + a * np.exp(-tt / tau)

    try:
        with np.errstate(over="ignore"):  # trial taus near 0 overflow exp; curve_fit moves on
            p, _ = curve_fit(charging, t, y, p0=(base + dv, -dv, 0.02), maxfev=5000)
        tau = float(p[2]) if p[2] > 0 else math.nan
    except (RuntimeError, ValueError):
        tau = math.nan
    return {"rin": rin, "tau": tau, "cm": tau / rin, "vrest": base}


# --------------------------------------------------------------------------- errors


def errors(est: dict[str, float], truth: dict[str, float]) -> dict[str, float]:
    """Signed errors: relative for rin, tau, cm; mV for vrest; NaN estimates count as inf."""
    out = {}
    for p in PROPS:
        e = est[p]
        if not math.isfinite(e):
            out[p] = math.inf
        elif p == "vrest":
            out[p] = (e - truth[p]) * 1e3
        else:
            out[p] = (e - truth[p]) / abs(truth[p])
    return out


def run_cell(cell_id: str, kind: str, rng: np.random.Generator, seed: int) -> Outcome:
    """Simulate one cell, fit it with fit_cell and the naive method, return the errors."""
    from pipeline.fitters.passive import fit_cell

    spec = random_spec(rng, kind)
    rin_guess = nm.passive_truth(replace(spec, gh_s_m2=0.0))["rin_ohm"]
    proto = nm.steps_protocol(rin_guess, n_sweeps=15, n_hyper=10)
    sim = nm.simulate_cell(cell_id, spec, proto, nm.random_nuisances(rng), seed=seed)
    truth = truth_of(sim)
    t0, w0 = time.process_time(), time.perf_counter()
    cf = fit_cell(sim.recording)
    seconds, wall = time.process_time() - t0, time.perf_counter() - w0
    est = {"rin": cf.rin_ohm, "tau": cf.tau_s, "cm": cf.cm_f, "vrest": cf.vrest_v}
    sag = (math.nan, math.nan)
    if spec.gh_s_m2 > 0 and math.isfinite(cf.sag_step_a):
        k = int(np.argmin(np.abs(np.asarray(proto.amplitudes_a) - cf.sag_step_a)))
        sag = (cf.sag_ratio, nm.step_measures(sim.clean[k], proto)["sag"])
    note = "" if cf.status == "ok" else cf.status
    el = (
        nm.electrotonic_length(spec.dend_diam_m, spec.dend_length_m, spec.rm_ohm_m2, spec.ri_ohm_m)
        if spec.has_dendrite
        else 0.0
    )
    about = (
        f"Rin {truth['rin'] / 1e6:6.1f} Mohm  tau {truth['tau'] * 1e3:5.1f} ms  L {el:4.2f}  "
        f"bridge {sim.nuisances.bridge_ohm / 1e6:4.1f} Mohm (fit {cf.bridge_error_ohm / 1e6:5.1f})"
    )
    return Outcome(
        cell_id,
        kind,
        errors(est, truth),
        errors(naive_fit(sim), truth),
        seconds,
        wall,
        sag,
        note,
        about,
    )


# --------------------------------------------------------------------------- report


def pct(values: list[float], q: float) -> float:
    """Percentile of the absolute values; inf (failed estimates) sorts last."""
    return float(np.percentile(np.abs(np.asarray(values, dtype=float)), q)) if values else math.nan


def fmt(p: str, x: float, signed: bool = False) -> str:
    """Errors as percent (rin, tau, cm) or mV (vrest)."""
    if not math.isfinite(x):
        return "    fail"
    sign = "+" if signed else ""
    return f"{x:{sign}7.2f}mV" if p == "vrest" else f"{100 * x:{sign}7.2f}%"


def report(outcomes: list[Outcome], verbose: bool = False) -> None:
    """Print the tables and the PASS/MISS lines (and one line per cell when ``verbose``)."""
    if verbose:
        for o in outcomes:
            errs = "  ".join(f"{p} {fmt(p, o.fit[p], True).strip():>7}" for p in PROPS)
            print(f"{o.cell_id} {o.kind:<14}{o.about}  {errs}")
    print(
        f"\n{'kind':<14}{'prop':<7}{'n':>3}  {'fit med':>9}{'fit p95':>9}  "
        f"{'naive med':>9}{'naive p95':>10}"
    )
    groups = [(k, [o for o in outcomes if o.kind == k]) for k in KINDS] + [("all", outcomes)]
    for kind, group in groups:
        if not group:
            continue
        for p in PROPS:
            f = [o.fit[p] for o in group]
            n = [o.naive[p] for o in group]
            print(
                f"{kind:<14}{p:<7}{len(group):>3}  {fmt(p, pct(f, 50)):>9}{fmt(p, pct(f, 95)):>9}"
                f"  {fmt(p, pct(n, 50)):>9}{fmt(p, pct(n, 95)):>10}"
            )
    sags = [o.sag for o in outcomes if math.isfinite(o.sag[0])]
    if sags:
        d = [abs(a - b) for a, b in sags]
        print(
            f"\nsag ratio (cells with hsag, n={len(sags)}): |fit - true| median {pct(d, 50):.3f}, "
            f"max {max(d):.3f}; true range {min(b for _, b in sags):.3f}-"
            f"{max(b for _, b in sags):.3f}"
        )
    secs = [o.seconds for o in outcomes]
    walls = [o.wall_s for o in outcomes]
    print(
        f"fit_cell time per cell (one core): CPU median {1e3 * pct(secs, 50):.1f} ms, "
        f"max {1e3 * max(secs):.1f} ms; wall median {1e3 * pct(walls, 50):.1f} ms "
        f"(load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores)"
    )
    for o in outcomes:
        if o.note:
            print(f"  {o.cell_id} ({o.kind}): {o.note}")
    passive = [o for o in outcomes if not o.kind.endswith("+ih")]
    for title, group in (("all cells", outcomes), ("cells without hsag (exact truth)", passive)):
        print(f"\ntargets over {title}:")
        for p in PROPS:
            f = [o.fit[p] for o in group]
            for label, q, target in (
                ("median", 50, TARGETS[p][0]),
                ("95th pct", 95, TARGETS[p][1]),
            ):
                got = pct(f, q)
                verdict = "PASS" if got <= target else "MISS"
                print(f"  {p:<6}{label:<9} {fmt(p, got):>9}  target {fmt(p, target):>9}  {verdict}")
    got = pct(secs, 50)
    verdict = "PASS" if got < TIME_TARGET_S else "MISS"
    print("\nfit_cell CPU time per cell:")
    print(f"  time  median    {1e3 * got:7.1f}ms  target {1e3 * TIME_TARGET_S:7.1f}ms  {verdict}")


def main(argv: list[str] | None = None) -> int:
    """Simulate, fit, print; always returns 0."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cells", type=int, default=36, help="number of cells (>= 4)")
    ap.add_argument("--seed", type=int, default=20260)
    ap.add_argument("--verbose", action="store_true", help="one line per cell")
    args = ap.parse_args(argv)
    try:
        from pipeline.fitters.passive import fit_cell  # noqa: F401
    except ImportError as err:
        print(f"pipeline.fitters.passive.fit_cell is not importable ({err}); nothing to measure")
        return 0
    rng = np.random.default_rng(args.seed)
    started = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="nrnmech-") as build:
        nm.load_mechanisms(Path(build))
        outcomes = []
        for i in range(args.cells):
            kind = KINDS[i % len(KINDS)]
            outcomes.append(run_cell(f"cell{i:02d}", kind, rng, seed=args.seed + i))
    report(outcomes, args.verbose)
    print(f"\n{len(outcomes)} cells in {time.perf_counter() - started:.0f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
