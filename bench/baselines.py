"""Hand-written Brian2 baselines for the paired-train benchmark: a per-sweep loop and an expert script.

Both take their numbers (cell parameters, holding currents, synapse parameters, stimulus) from a
protolang Plan, so all three simulate the same experiment, but they build the Brian2 network
by hand, as a modeller would without protolang. Each returns the first-response amplitudes
(mV) measured the simple way: peak of the post trace within 40 ms after the first pulse minus
the mean of the 2 ms before it.
"""

from __future__ import annotations

import time

import numpy as np

ADEX = """
dv/dt = (gL*(EL - v) + gL*DeltaT*exp((v - VT)/DeltaT) - w + I_hold + I_stim + I_syn)/C : volt (unless refractory)
dw/dt = (a*(v - EL) - w)/tau_w : amp
I_stim = stim(t, widx) : amp
I_syn = g_ampa*(E_ampa - v) + g_nmda*(E_nmda - v)/(1 + exp(-0.062*v/mV)*Mg/(3.57*mmolar)) : amp
dg_ampa/dt = -g_ampa/td_ampa + x_ampa : siemens
dx_ampa/dt = -x_ampa/tr_ampa : siemens/second
dg_nmda/dt = -g_nmda/td_nmda + x_nmda : siemens
dx_nmda/dt = -x_nmda/tr_nmda : siemens/second
C : farad (constant)
gL : siemens (constant)
EL : volt (constant)
VT : volt (constant)
DeltaT : volt (constant)
a : siemens (constant)
tau_w : second (constant)
b : amp (constant)
Vr : volt (constant)
Vcut : volt (constant)
t_ref : second (constant)
I_hold : amp (constant)
widx : integer (constant)
"""

SITE = """
avail : 1
uf : 1
tlast : second
U : 1 (constant)
D : second (constant)
invF : hertz (constant)
q : siemens (constant)
"""

ON_PRE = """
uf = uf*exp(-(t - tlast)*invF)
u_now = uf + U*(1 - uf)
avail += (1 - avail)*int(rand() < 1 - exp(-(t - tlast)/D))
rel = avail*int(rand() < u_now)
avail -= rel
uf = u_now
tlast = t
x_ampa_post += rel*q*w_ampa*k_ampa
x_nmda_post += rel*q*w_nmda*k_nmda
"""


def _waveform(plan, role, n_steps):
    wave = np.zeros(n_steps)
    for p in role.pulses:
        i0 = int(round(p.start / plan.dt))
        i1 = int(round((p.start + p.duration) / plan.dt))
        wave[i0:i1] += p.amplitude
    return wave


def _namespace(plan, b2):
    rec = plan.receptors
    syn = next(s for s in plan.synapses if s.name == "pre_to_post")
    return {
        "E_ampa": rec["AMPA"].reversal * b2.volt, "E_nmda": rec["NMDA"].reversal * b2.volt,
        "td_ampa": rec["AMPA"].decay * b2.second, "tr_ampa": rec["AMPA"].rise * b2.second,
        "td_nmda": rec["NMDA"].decay * b2.second, "tr_nmda": rec["NMDA"].rise * b2.second,
        "Mg": plan.conditions["magnesium"] * b2.mmolar,
        "w_ampa": syn.receptors.get("AMPA", 0.0) * rec["AMPA"].scale,
        "w_nmda": syn.receptors.get("NMDA", 0.0) * rec["NMDA"].scale,
        "k_ampa": rec["AMPA"].peak_factor * b2.hertz, "k_nmda": rec["NMDA"].peak_factor * b2.hertz,
    }


def _group(b2, n, role, idx, stim, ns, name):
    g = b2.NeuronGroup(n, ADEX, threshold="v > Vcut", reset="v = Vr; w += b", refractory="t_ref",
                       method="euler", namespace=dict(ns, stim=stim), name=name)
    units = {"C": b2.farad, "gL": b2.siemens, "EL": b2.volt, "VT": b2.volt, "DeltaT": b2.volt,
             "a": b2.siemens, "tau_w": b2.second, "b": b2.amp, "Vr": b2.volt, "Vcut": b2.volt,
             "t_ref": b2.second}
    for k, u in units.items():
        setattr(g, k, role.params[k][idx] * u)
    g.I_hold = role.holding_current[idx] * b2.amp
    g.v = role.params["EL"][idx] * b2.volt
    return g


def _first_amplitudes(v_mV, t_ms, t_event_ms):
    base = (t_ms >= t_event_ms - 2) & (t_ms < t_event_ms)
    win = (t_ms >= t_event_ms) & (t_ms < t_event_ms + 40)
    return v_mV[:, win].max(axis=1) - v_mV[:, base].mean(axis=1)


def _build_pair_network(b2, plan, idx, settle=True):
    """Pre and post groups for replica indices ``idx`` (repeat indices), connected per site."""
    pre, post = plan.role("pre"), plan.role("post")
    syn = next(s for s in plan.synapses if s.name == "pre_to_post")
    n = len(idx)
    n_steps = int(round(plan.sweep_length / plan.dt)) + 1
    stim = b2.TimedArray(np.stack([_waveform(plan, pre, n_steps), np.zeros(n_steps)], axis=1) * b2.amp,
                         dt=plan.dt * b2.second)
    ns = _namespace(plan, b2)
    G_pre = _group(b2, n, pre, idx, stim, ns, "bench_pre")
    G_pre.widx = 0
    G_post = _group(b2, n, post, idx, stim, ns, "bench_post")
    G_post.widx = 1
    # start the held cell at its holding potential
    if post.holding_potential is not None:
        G_post.v = post.holding_potential * b2.volt
        G_post.w = post.params["a"][idx] * (post.holding_potential - post.params["EL"][idx]) * b2.amp
    S = b2.Synapses(G_pre, G_post, SITE, on_pre=ON_PRE, namespace=ns, method="euler", name="bench_syn")
    k = np.arange(n)
    sites = syn.n_sites[idx]
    S.connect(i=np.repeat(k, sites), j=np.repeat(k, sites))
    rep = np.repeat(idx, sites)
    S.avail = 1
    S.uf = 0
    S.tlast = -1e9 * b2.second
    S.U = syn.U[rep]
    S.D = syn.D[rep] * b2.second
    S.invF = np.where(syn.F[rep] > 0, 1.0 / np.maximum(syn.F[rep], 1e-12), 1e12) * b2.hertz
    S.q = syn.site_conductance[rep] * b2.siemens
    S.delay = syn.delay[rep] * b2.second
    M = b2.StateMonitor(G_post, "v", record=True, dt=plan.sample_dt * b2.second, name="bench_mon")
    objects = [G_pre, G_post, S, M]
    if pre.recorded:
        # the protocol records the presynaptic cell too: the same work means the same recordings
        objects.append(b2.StateMonitor(G_pre, "v", record=True, dt=plan.sample_dt * b2.second, name="bench_mon_pre"))
    return b2.Network(*objects), M


def expert(plan, target: str) -> tuple[float, np.ndarray]:
    """One network holding every repeat x sweep as a replica, one run. Returns (seconds, amplitudes)."""
    import brian2 as b2

    b2.prefs.codegen.target = target
    b2.defaultclock.dt = plan.dt * b2.second
    b2.seed(plan.seed)
    t0 = time.perf_counter()
    idx = np.repeat(np.arange(plan.n_repeat), plan.n_sweeps)
    net, M = _build_pair_network(b2, plan, idx)
    net.run(plan.sweep_length * b2.second)
    amps = _first_amplitudes(M.v / b2.mV, M.t / b2.ms, plan.role("pre").events[0].time * 1e3)
    return time.perf_counter() - t0, amps


def loop(plan, target: str, n_sweeps: int) -> tuple[float, np.ndarray]:
    """What a user writes first: a fresh one-pair network per sweep. Times ``n_sweeps`` sweeps."""
    import brian2 as b2

    b2.prefs.codegen.target = target
    b2.defaultclock.dt = plan.dt * b2.second
    b2.seed(plan.seed)
    amps = []
    t0 = time.perf_counter()
    for k in range(n_sweeps):
        rep = k % plan.n_repeat
        net, M = _build_pair_network(b2, plan, np.array([rep]))
        net.run(plan.sweep_length * b2.second)
        amps.append(_first_amplitudes(M.v / b2.mV, M.t / b2.ms, plan.role("pre").events[0].time * 1e3))
    return (time.perf_counter() - t0) / n_sweeps, np.concatenate(amps)
