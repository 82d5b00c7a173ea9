COMMENT
hsag: a small hyperpolarization-activated cation current, written for patchbatch's reference
checks (not taken from any published model). One gate m, no inactivation:

    i = gbar * m * (v - ehcn)
    m_inf(v) = 1 / (1 + exp((v - vhalf) / k))        (opens on hyperpolarization)
    tau_m(v) = tau_min + tau_amp / (exp((v - vtau) / s1) + exp(-(v - vtau) / s2))

Parameter values are round numbers chosen to give a visible sag over ~100 ms, in the range
usually quoted for HCN currents (common practice, from memory).
ENDCOMMENT

NEURON {
    SUFFIX hsag
    NONSPECIFIC_CURRENT i
    RANGE gbar, ehcn, vhalf, k, tau_min, tau_amp, vtau, s1, s2, g
}

UNITS {
    (mV) = (millivolt)
    (mA) = (milliamp)
    (S) = (siemens)
}

PARAMETER {
    gbar = 1e-4 (S/cm2)
    ehcn = -30 (mV)
    vhalf = -82 (mV)
    k = 7 (mV)
    tau_min = 20 (ms)
    tau_amp = 150 (ms)
    vtau = -80 (mV)
    s1 = 15 (mV)
    s2 = 15 (mV)
}

ASSIGNED {
    v (mV)
    i (mA/cm2)
    g (S/cm2)
    minf
    mtau (ms)
}

STATE { m }

INITIAL {
    rates(v)
    m = minf
}

BREAKPOINT {
    SOLVE states METHOD cnexp
    g = gbar * m
    i = g * (v - ehcn)
}

DERIVATIVE states {
    rates(v)
    m' = (minf - m) / mtau
}

PROCEDURE rates(v (mV)) {
    minf = 1 / (1 + exp((v - vhalf) / k))
    mtau = tau_min + tau_amp / (exp((v - vtau) / s1) + exp(-(v - vtau) / s2))
}
