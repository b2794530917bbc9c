"""Hand-written Brian2 baselines for the characterisation benchmark: a per-cell, per-step loop and an expert script.

Both take their numbers (AdEx parameters per cell, holding currents, the step family) from
a protolang Plan, so all three simulate the same experiment, but they build the Brian2
network by hand, as a modeller would without protolang:

* ``loop``: what one writes first, a fresh one-cell network for every cell and every step;
* ``expert``: every cell-sweep of a class as one neuron of a single NeuronGroup with its
  own step amplitude, all classes in one network and one run, the membrane potential
  recorded at the plan's sampling rate (a characterisation needs the traces for passive
  properties and spike shapes) and spikes counted during the step.

Each returns the firing rate during the step for every (role, repeat, sweep) it simulated.
"""

from __future__ import annotations

import time

import numpy as np

ADEX_STEP = """
dv/dt = (gL*(EL - v) + gL*DeltaT*exp((v - VT)/DeltaT) - w + I_hold + I_step)/C : volt (unless refractory)
dw/dt = (a*(v - EL) - w)/tau_w : amp
I_step = I_amp*int(t >= t_on and t < t_off) : amp
I_amp : amp (constant)
I_hold : amp (constant)
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
"""

UNITS = {"C": "farad", "gL": "siemens", "EL": "volt", "VT": "volt", "DeltaT": "volt", "a": "siemens",
         "tau_w": "second", "b": "amp", "Vr": "volt", "Vcut": "volt", "t_ref": "second"}


def step_of(role):
    """(onset s, stop s, (n_sweeps,) amplitudes A) of the role's step family."""
    (seg,) = [s for s in role.segments if s.kind == "square"]
    amps = np.asarray(seg.per_sweep if seg.per_sweep is not None else [seg.amplitude], dtype=float)
    return seg.start, seg.stop, amps


def _group(b2, role, repeats, amps, onset, stop, name):
    """One NeuronGroup: neuron k is cell ``repeats[k]`` with step ``amps[k]``."""
    g = b2.NeuronGroup(len(repeats), ADEX_STEP, threshold="v > Vcut", reset="v = Vr\nw += b",
                       refractory="t_ref", method="euler", name=name,
                       namespace={"t_on": onset * b2.second, "t_off": stop * b2.second})
    for key, unit in UNITS.items():
        setattr(g, key, role.params[key][repeats] * getattr(b2, unit))
    hold = np.zeros(len(role.params["C"])) if role.holding_current is None else role.holding_current
    g.I_hold = hold[repeats] * b2.amp
    g.I_amp = amps * b2.amp
    g.v = role.params["EL"][repeats] * b2.volt
    return g


def _rates(spike_i, spike_t, n, onset, stop):
    inside = (spike_t >= onset) & (spike_t < stop)
    return np.bincount(spike_i[inside], minlength=n) / (stop - onset)


def expert(plan, target: str, record: bool = True) -> tuple[float, dict[str, np.ndarray]]:
    """All cell-sweeps of every role in one network, one run.

    Returns:
        ``(seconds, {role: (n_repeat, n_sweeps) rates in Hz})``; the time covers building,
        running and counting.
    """
    import brian2 as b2

    b2.start_scope()
    b2.prefs.codegen.target = target
    b2.defaultclock.dt = plan.dt * b2.second
    b2.seed(plan.seed)
    t0 = time.perf_counter()
    objects, probes = [], {}
    for role in plan.roles:
        onset, stop, amps = step_of(role)
        n_sweeps = amps.size
        repeats = np.repeat(np.arange(plan.n_repeat), n_sweeps)
        g = _group(b2, role, repeats, np.tile(amps, plan.n_repeat), onset, stop, f"expert_{role.name}")
        sp = b2.SpikeMonitor(g, name=f"expert_spikes_{role.name}")
        objects += [g, sp]
        if record:
            objects.append(b2.StateMonitor(g, "v", record=True, dt=plan.sample_dt * b2.second,
                                           name=f"expert_v_{role.name}"))
        probes[role.name] = (sp, onset, stop, n_sweeps)
    net = b2.Network(*objects)
    net.run(plan.sweep_length * b2.second)
    rates = {}
    for name, (sp, onset, stop, n_sweeps) in probes.items():
        r = _rates(np.asarray(sp.i[:]), np.asarray(sp.t_[:]), plan.n_repeat * n_sweeps, onset, stop)
        rates[name] = r.reshape(plan.n_repeat, n_sweeps)
    return time.perf_counter() - t0, rates


def loop(plan, target: str, n_runs: int, record: bool = True) -> tuple[float, list[tuple[str, int, int, float]]]:
    """A fresh one-cell network per cell and step; times the first ``n_runs`` (role, repeat, sweep).

    Returns:
        ``(seconds per cell-step, [(role, repeat, sweep, rate Hz)])``.
    """
    import brian2 as b2

    b2.prefs.codegen.target = target
    b2.defaultclock.dt = plan.dt * b2.second
    b2.seed(plan.seed)
    order = [(role, r, s) for r in range(plan.n_repeat) for role in plan.roles
             for s in range(step_of(role)[2].size)]
    out = []
    t0 = time.perf_counter()
    for role, r, s in order[:n_runs]:
        b2.start_scope()
        onset, stop, amps = step_of(role)
        g = _group(b2, role, np.array([r]), amps[s:s + 1], onset, stop, "loop_cell")
        sp = b2.SpikeMonitor(g, name="loop_spikes")
        objects = [g, sp]
        if record:
            objects.append(b2.StateMonitor(g, "v", record=True, dt=plan.sample_dt * b2.second, name="loop_v"))
        net = b2.Network(*objects)
        net.run(plan.sweep_length * b2.second)
        rate = _rates(np.asarray(sp.i[:]), np.asarray(sp.t_[:]), 1, onset, stop)[0]
        out.append((role.name, r, s, float(rate)))
    return (time.perf_counter() - t0) / max(n_runs, 1), out
