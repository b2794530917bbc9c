"""Engine stimuli checks: waveform families, voltage clamp, Ornstein-Uhlenbeck noise, Poisson input and
extracellular activation, run through run_plan and compared with closed forms and sampling statistics."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

import protolang
from protolang.engine import models
from protolang.engine.run import run_plan
from protolang.plan.model import (NoiseSpec, Plan, PoissonSpec, ReceptorPlan, RolePlan, SynapsePlan,
                                  WaveSegment)

pytestmark = pytest.mark.brian2

ROOT = Path(__file__).resolve().parent.parent

# The AdEx equations (Brette and Gerstner 2005, J Neurophysiol 94:3637) with the exponential and
# adaptation terms switched off: a passive RC membrane (tau 20 ms, R 100 MOhm), SI units.
PASSIVE = dict(C=200e-12, gL=10e-9, EL=-70e-3, VT=0.5, DeltaT=1e-5, a=0.0, tau_w=0.144, b=0.0,
               Vr=-70e-3, Vcut=1.0, t_ref=2e-3)

# A cell that integrates its input current: huge capacitance, negligible leak.
INTEGRATOR = dict(PASSIVE, C=1e-5, gL=1e-15)

AMPA = ReceptorPlan("AMPA", rise=0.2e-3, decay=2e-3, reversal=0.0)


def cell(name: str, n: int, *, recorded: bool = True, spike_times=None, mode: str = "current clamp",
         holding_potential=None, series=None, segments=(), noise=(), poisson=(), scale=None,
         **params) -> RolePlan:
    """An AdEx role of n repeats; params override PASSIVE (scalars or (n,) arrays)."""
    values = dict(PASSIVE, **params)
    return RolePlan(
        name=name, cell_class=f"{name}_class", model="adex", cell_ids=np.arange(n),
        positions=np.zeros((n, 3)),
        params={k: np.broadcast_to(np.asarray(v, dtype=float), (n,)).copy() for k, v in values.items()},
        recorded=recorded, mode=mode, holding_current=np.zeros(n), holding_potential=holding_potential,
        segments=list(segments), noise=list(noise), poisson=list(poisson), series_resistance=series,
        amplitude_scale=None if scale is None else np.asarray(scale, dtype=float),
        spike_times=None if spike_times is None else np.asarray(spike_times, dtype=float))


def make_plan(roles, synapses=(), receptors=None, *, n_repeat, n_sweeps=1, layout="replicas", dt=1e-4,
              sample_dt=None, sweep_length=0.1, interval=None, seed=1, activations=()) -> Plan:
    return Plan(
        title="stimuli test", protocol_file="test.protocol", protocol_hash="0",
        circuit_file="test.circuit.yaml", circuit_hash="0", seed=seed, dt=dt,
        sample_dt=dt if sample_dt is None else sample_dt, sweep_length=sweep_length,
        n_sweeps=n_sweeps, interval=sweep_length if interval is None else interval,
        n_repeat=n_repeat, layout=layout, layout_reason="test", mode="isolated",
        conditions={"calcium": 2.0, "magnesium": 1.0}, roles=list(roles),
        receptors=dict(receptors or {"AMPA": AMPA}), synapses=list(synapses), measures=[],
        activations=list(activations))


@pytest.fixture(autouse=True)
def brian2_state():
    """Snapshot Brian2's target and clock and numpy's global generator; restore them after each test."""
    brian2 = pytest.importorskip("brian2")
    target, dt, rng_state = brian2.prefs["codegen.target"], brian2.defaultclock.dt, np.random.get_state()
    yield brian2
    brian2.prefs["codegen.target"] = target
    brian2.defaultclock.dt = dt
    np.random.set_state(rng_state)


# --------------------------------------------------------------------------- waveforms


def test_step_family_reaches_each_sweeps_own_steady_state():
    # Passive membrane: a step I gives deltaV_ss = I*R with R = 1/gL (Johnston and Wu 1995,
    # Foundations of Cellular Neurophysiology; textbook). Sweep k of repeat r gets
    # per_sweep[k] * amplitude_scale[r, k].
    steps = np.array([-50e-12, 0.0, 50e-12, 100e-12])
    scale = np.array([[1.0, 1.0, 1.0, 1.0], [0.5, 3.0, -2.0, 1.5]])
    gL = np.array([10e-9, 20e-9])
    t_on, width = 0.02, 0.2
    post = cell("post", 2, gL=gL, scale=scale,
                segments=[WaveSegment("square", t_on, t_on + width, per_sweep=steps)])
    rec = run_plan(make_plan([post], n_repeat=2, n_sweeps=4, sweep_length=0.25))
    v = rec.traces["post"]
    assert v.shape == (2, 4, 2500) and rec.meta["trace_units"] == {"post": "V"}
    np.testing.assert_allclose(v[:, :, 0], PASSIVE["EL"], rtol=0, atol=1e-12)
    k_end = int(round((t_on + width) / 1e-4)) - 1            # last sample inside the step (10 tau)
    expected = steps[None, :] * scale / gL[:, None]
    np.testing.assert_allclose(v[:, :, k_end] - PASSIVE["EL"], expected, rtol=1e-3, atol=1e-8)
    assert not np.allclose(v[1], v[0])                       # the factor really applies per cell


# --------------------------------------------------------------------------- voltage clamp


def _fit_tau(t: np.ndarray, y: np.ndarray) -> float:
    slope = np.polyfit(t, np.log(np.abs(y)), 1)[0]
    return -1.0 / slope


def test_voltage_clamp_of_a_passive_cell():
    # Series-resistance clamp of an RC cell (textbook circuit; BRIAN2_NOTES section 5): a command
    # step dV draws dV/Rs at once, the capacitive transient decays with tau = Rs*C/(1 + Rs*gL),
    # and at steady state the voltage divider leaves v - V_cmd = Rs*gL*(EL - V_cmd)/(1 + Rs*gL).
    C = np.array([100e-12, 200e-12, 300e-12])
    gL, EL, Rs, V_hold = 10e-9, -70e-3, 10e6, -60e-3
    dt, t_on, width = 1e-5, 0.005, 0.04
    command = np.array([10e-3, -20e-3])
    family = [WaveSegment("square", t_on, t_on + width, per_sweep=command)]
    clamped = cell("clamped", 3, C=C, gL=gL, mode="voltage clamp", holding_potential=V_hold, series=Rs,
                   segments=family)
    # a tight clamp (tau about one time step) is integrated by exponential Euler
    Rs_tight = 0.1e6
    tight = cell("tight", 3, C=100e-12, gL=gL, mode="voltage clamp", holding_potential=V_hold, series=Rs_tight,
                 segments=family)
    rec = run_plan(make_plan([clamped, tight], n_repeat=3, n_sweeps=2, dt=dt, sweep_length=0.05))
    assert rec.meta["trace_units"] == {"clamped": "A", "tight": "A"}
    assert any("exponential Euler" in note and "'tight'" in note for note in rec.meta["notes"])
    t = rec.time
    k_on = int(round(t_on / dt))
    k_end = int(round((t_on + width) / dt)) - 1
    for role, rs, caps in (("clamped", Rs, C), ("tight", Rs_tight, np.full(3, 100e-12))):
        current = rec.traces[role]
        for r in range(3):
            tau = rs * caps[r] / (1 + rs * gL)
            for s, dv in enumerate(command):
                i = current[r, s]
                v_cmd = V_hold + dv
                base = gL * (V_hold - EL) / (1 + rs * gL)          # divider current before the step
                np.testing.assert_allclose(i[:k_on], base, rtol=1e-9)
                peak = i[k_on] - base
                assert abs(peak - dv / rs) < 1e-9 * abs(dv / rs)
                assert np.argmax(np.abs(i - base)) == k_on
                i_ss = gL * (v_cmd - EL) / (1 + rs * gL)
                # series-resistance error from the recorded current: v - V_cmd = -Rs * I
                error = -rs * i[k_end]
                assert abs(error - rs * gL * (EL - v_cmd) / (1 + rs * gL)) < 1e-4 * abs(dv)
                fit = (t > t_on + 0.3 * tau) & (t < t_on + min(4 * tau, width)) & (np.abs(i - i_ss) > 1e-6 * abs(peak))
                assert fit.sum() >= 3
                assert abs(_fit_tau(t[fit], i[fit] - i_ss) / tau - 1) < 0.01, (role, r, s)


def test_clamped_epsc_trains_reach_the_tsodyks_markram_steady_state():
    # Tsodyks and Markram 1997 (PNAS 94:719), REFERENCES A4: for F = 0 a regular train of period T
    # settles at EPSC_st/A = U(1 - e^{-T/D})/(1 - (1 - U)e^{-T/D}); the first response is A*U. A tight
    # clamp (Rs = 0.5 MOhm: exponential Euler) keeps the driving force fixed, so the AMPA current is
    # proportional to the resources released.
    U, D, delay, n_pulses = 0.5, 0.8, 1e-3, 20
    dt, t0 = 5e-5, 0.01
    rates = (20.0, 40.0, 80.0)               # 20 pulses: the transient has died out to < 1e-4
    roles, syns = [], []
    for f in rates:
        roles.append(cell(f"pre{f:g}", 1, spike_times=t0 + np.arange(n_pulses) / f, recorded=False))
        roles.append(cell(f"post{f:g}", 1, C=100e-12, mode="voltage clamp", holding_potential=-70e-3,
                          series=0.5e6))
        syns.append(SynapsePlan(
            name=f"syn{f:g}", pre=f"pre{f:g}", post=f"post{f:g}", pathway="test", connected=np.ones(1, bool),
            n_sites=np.full(1, 4), site_conductance=np.full(1, 0.5e-9), U=np.full(1, U), U_reference=np.full(1, U),
            D=np.full(1, D), F=np.zeros(1), delay=np.full(1, delay), receptors={"AMPA": 1.0}, stochastic=False))
    length = t0 + (n_pulses - 1) / min(rates) + 0.02
    rec = run_plan(make_plan(roles, syns, n_repeat=1, dt=dt, sweep_length=length))
    t = rec.time
    for f in rates:
        i = rec.traces[f"post{f:g}"][0, 0]
        amps = []
        for k in range(n_pulses):
            onset = t0 + k / f + delay
            before = (t >= onset - 0.5e-3) & (t < onset)
            after = (t >= onset) & (t < onset + 3e-3)
            amps.append(i[before].mean() - i[after].min())     # inward: the current goes negative
        amps = np.array(amps)
        assert i.min() < 0 and np.all(amps > 0)
        e = math.exp(-1 / (f * D))
        ratio_st = (1 - e) / (1 - (1 - U) * e)                 # EPSC_st / EPSC_1
        late = amps[-3:].mean() / amps[0]
        assert abs(late / ratio_st - 1) < 0.02, (f, late, ratio_st)


# --------------------------------------------------------------------------- noise, Poisson input


def _acf(x: np.ndarray, lags: np.ndarray, mean: float, var: float) -> np.ndarray:
    """Autocorrelation at ``lags`` (samples) averaged over rows, with a given mean and variance."""
    d = x - mean
    return np.array([np.mean(d[:, : d.shape[1] - k] * d[:, k:]) / var for k in lags])


def test_ornstein_uhlenbeck_inputs_have_the_stationary_statistics():
    # An Ornstein-Uhlenbeck process dI = (mean - I)/tau dt + sd sqrt(2/tau) dW is stationary with that
    # mean and SD and autocorrelation exp(-lag/tau) (Uhlenbeck and Ornstein 1930, Phys Rev 36:823;
    # textbook). An integrating cell (C = 10 uF, forward Euler) records the injected current exactly:
    # I_k = C (v_{k+1} - v_k)/dt. Outside its window the input contributes nothing.
    n, dt, start, stop, length = 200, 1e-4, 0.01, 0.41, 0.42
    mean, sd, tau = 50e-12, 20e-12, 5e-3
    g_mean, g_sd, g_tau, E = 2e-9, 0.4e-9, 3e-3, 0.0
    roles = [cell("current", n, **INTEGRATOR, noise=[NoiseSpec(mean, sd, tau, start, stop)]),
             cell("conductance", n, **INTEGRATOR, noise=[NoiseSpec(g_mean, g_sd, g_tau, start, stop, reversal=E)])]
    rec = run_plan(make_plan(roles, n_repeat=n, dt=dt, sweep_length=length, seed=5))
    t = rec.time[:-1]
    inside = (t >= start - dt / 4) & (t < stop - dt / 4)
    C = INTEGRATOR["C"]
    v = rec.traces["current"][:, 0]
    current = C * np.diff(v, axis=1) / dt
    g = C * np.diff(rec.traces["conductance"][:, 0], axis=1) / dt / (E - rec.traces["conductance"][:, 0, :-1])
    assert np.max(np.abs(current[:, ~inside])) < 1e-16 and np.max(np.abs(g[:, ~inside])) < 1e-16
    for x, m, s, tc in ((current[:, inside], mean, sd, tau), (g[:, inside], g_mean, g_sd, g_tau)):
        # replicas are independent: their spread gives the sampling error of each statistic
        per_mean, per_var = x.mean(axis=1), x.var(axis=1)
        assert abs(per_mean.mean() - m) < 4 * per_mean.std(ddof=1) / math.sqrt(n)
        # the per-replica variance is biased low by the variance of the replica mean
        var_expected = s ** 2 - per_mean.var(ddof=1)
        assert abs(per_var.mean() - var_expected) < 4 * per_var.std(ddof=1) / math.sqrt(n)
        lags = np.arange(0, int(round(2 * tc / dt)) + 1)
        acf = _acf(x, lags, m, s ** 2)
        np.testing.assert_allclose(acf, np.exp(-lags * dt / tc), atol=0.03)
        tau_fit = -1.0 / np.polyfit(lags[1:] * dt, np.log(acf[1:]), 1)[0]
        assert abs(tau_fit / tc - 1) < 0.05


def test_poisson_input_event_counts_and_conductance():
    # Poisson statistics (textbook): the number of events in a window T has mean rate*T and a
    # variance equal to its mean (here drawn once per time step: variance mean*(1 - rate*dt)).
    # Each event adds conductance*peak_factor to the receptor drive; a half block scales the current.
    # An integrating cell (C = 1 mF: v moves by microvolts) sums the charge: delta_v = count * scale *
    # g_peak*peak_factor*rise*decay*(E - v)/C (integral of the difference of exponentials, REFERENCES A2;
    # the sum over time steps differs from the integral by dt^2/(12 rise decay) = 0.05 %).
    n, dt, rate, g_peak, start, stop = 200, 5e-5, 200.0, 0.5e-9, 0.01, 0.51
    half = ReceptorPlan("AMPA", rise=0.2e-3, decay=2e-3, reversal=0.0, scale=0.5)
    post = cell("post", n, **dict(INTEGRATOR, C=1e-3), poisson=[PoissonSpec(rate, g_peak, "AMPA", start, stop)])
    rec = run_plan(make_plan([post], receptors={"AMPA": half}, n_repeat=n, dt=dt, sample_dt=1e-3,
                             sweep_length=0.55, seed=3))
    events = rec.inputs["post_poisson_0"]
    counts = np.array([len(events[r][0]) for r in range(n)])
    every = np.concatenate([events[r][0] for r in range(n)])
    assert every.min() >= start - 1e-9 and every.max() < stop
    expected = rate * (stop - start)
    assert abs(counts.mean() - expected) < 4 * counts.std(ddof=1) / math.sqrt(n)
    fano = counts.var(ddof=1) / counts.mean()
    assert abs(fano - (1 - rate * dt)) < 4 * math.sqrt(2 / (n - 1))
    assert len(np.unique(counts)) > 10                    # replicas draw independently
    v = rec.traces["post"][:, 0]
    charge = half.scale * g_peak * models.peak_factor(half.rise, half.decay) * half.rise * half.decay
    inferred = (v[:, -1] - v[:, 0]) * 1e-3 / (charge * (half.reversal - PASSIVE["EL"]))
    np.testing.assert_allclose(inferred, counts, rtol=1e-3)


# --------------------------------------------------------------------------- extracellular activation

ACTIVATION = """\
protocol "activation test"
circuit "{circuit}" seed 4

cells:
    post is pyramidal_deep
    repeat 4

sweeps 2 every 10 s, lasting 200 ms

simulate deterministic

record post: voltage clamp, holding -70 mV

stimulate post:
    activate 10 % of pyramidal_deep at 50 ms, 120 ms
"""


def test_extracellular_activation_recruits_its_fraction_and_evokes_responses():
    # The plan activates round(fraction x candidates) of the class's cells that project to each target
    # (the protocol's definition, docs/language.md); each activation time then evokes an inward
    # current in every repeat that has a source (deterministic Tsodyks-Markram release onto a
    # clamped cell: common practice, no single source).
    from dataclasses import replace

    from protolang.circuit import instantiate

    exp = protolang.loads(ACTIVATION.format(circuit=ROOT / "demo" / "slab.circuit.yaml"), "act.protocol")
    plan = exp.plan()
    act = plan.activations[0]
    inst = instantiate(exp.circuit, 4)
    pool = inst.ids_of("pyramidal_deep")
    candidates = np.array([int(inst.connected(pool, np.full(pool.shape, tid)).sum())
                           for tid in plan.role("post").cell_ids])
    sources = np.bincount(act.source_repeat, minlength=4)
    np.testing.assert_array_equal(sources, np.round(0.1 * candidates).astype(int))
    assert sources.min() > 0 and plan.layout == "replicas"

    rec = run_plan(plan)
    assert rec.meta["trace_units"] == {"post": "A"}
    current = rec.traces["post"]
    t = rec.time
    for r in range(4):
        for s in range(2):
            events = rec.inputs[act.name][r][s]
            np.testing.assert_allclose(events, np.repeat(act.times, sources[r]), atol=1e-9)
            trace = current[r, s]
            assert np.allclose(trace[:int(0.04 / plan.sample_dt)], trace[0], rtol=0, atol=1e-15)  # starts at rest
            for when in act.times:
                base = trace[(t >= when - 2e-3) & (t < when)].mean()
                assert trace[(t >= when) & (t < when + 20e-3)].min() < base - 5e-12

    # the same plan in continuous time: the first sweep is the same, the second sees the activation again
    seq = run_plan(replace(plan, layout="sequential", interval=0.5))
    np.testing.assert_allclose(seq.traces["post"][:, 0], current[:, 0], rtol=0, atol=1e-15)
    for r in range(4):
        np.testing.assert_allclose(seq.inputs[act.name][r][1], np.repeat(act.times, sources[r]), atol=1e-9)
        trace = seq.traces["post"][r, 1]
        for when in act.times:
            base = trace[(t >= when - 2e-3) & (t < when)].mean()
            assert trace[(t >= when) & (t < when + 20e-3)].min() < base - 5e-12


# --------------------------------------------------------------------------- layouts


def _family_plan(layout: str) -> Plan:
    n_repeat, n_sweeps = 2, 3
    family = WaveSegment("square", 0.01, 0.04, per_sweep=np.array([-40e-12, 20e-12, 80e-12]))
    sine = WaveSegment("sine", 0.005, 0.045, amplitude=30e-12, frequency=50.0, offset=10e-12)
    command = WaveSegment("square", 0.01, 0.03, per_sweep=np.array([-10e-3, 5e-3, 20e-3]))
    roles = [cell("stepped", n_repeat, C=100e-12, gL=np.array([10e-9, 15e-9]), segments=[family],
                  scale=[[1.0, 0.5, 2.0], [-1.0, 1.0, 0.25]]),
             cell("sine", n_repeat, C=100e-12, segments=[sine]),
             cell("clamped", n_repeat, mode="voltage clamp", holding_potential=-65e-3, series=8e6,
                  segments=[command], noise=[NoiseSpec(0.0, 0.0, 5e-3, 0.0, 0.05)])]
    return make_plan(roles, n_repeat=n_repeat, n_sweeps=n_sweeps, layout=layout, dt=5e-5, sample_dt=1e-4,
                     sweep_length=0.05, interval=0.25)


def test_sequential_layout_gives_the_replicas_traces():
    # With full recovery between sweeps (200 ms gaps, 20 membrane time constants) a deterministic cell
    # must not care whether sweeps run as replicas or one after another (the layout's definition,
    # plan/model.py): every sweep finds its own step, factor and command in continuous time.
    rep = run_plan(_family_plan("replicas"))
    seq = run_plan(_family_plan("sequential"))
    for role in ("stepped", "sine"):
        assert rep.traces[role].shape == seq.traces[role].shape == (2, 3, 500)
        np.testing.assert_allclose(seq.traces[role], rep.traces[role], rtol=0, atol=1e-9)
    np.testing.assert_allclose(seq.traces["clamped"], rep.traces["clamped"], rtol=0, atol=1e-15)
    v = rep.traces["stepped"]
    deflection = v[:, :, 399] - v[:, :, 0]             # end of the 30 ms step
    assert np.all(np.sign(deflection) == np.sign(np.array([[-1, 1, 1], [1, 1, 1]])))
    # each sweep holds its own command: steady current gL(V_cmd - EL)/(1 + Rs gL), 13 clamp time constants in
    steady = PASSIVE["gL"] * (-65e-3 + np.array([-10e-3, 5e-3, 20e-3]) - PASSIVE["EL"]) / (1 + 8e6 * PASSIVE["gL"])
    np.testing.assert_allclose(rep.traces["clamped"][:, :, 290], np.tile(steady, (2, 1)), rtol=1e-4)
    assert seq.meta["layout"] == "sequential" and seq.meta["trace_units"]["clamped"] == "A"


# --------------------------------------------------------------------------- Hodgkin-Huxley under clamp

# Hodgkin and Huxley 1952 (J Physiol 117:500), modern convention, per area in SI (REFERENCES A8).
HH1952 = dict(c_m=1e-2, g_leak=3.0, EL=-54.387e-3, gNa=1200.0, gK=360.0, ENa=50e-3, EK=-77e-3)
HH_AREA = 1e-8                                   # m^2 (100 pF)


def _hh_rates(v):
    """HH 1952 rate constants (1/ms) at 6.3 degC, v in mV."""
    am = 0.1 * (v + 40) / (1 - np.exp(-(v + 40) / 10))
    bm = 4 * np.exp(-(v + 65) / 18)
    ah = 0.07 * np.exp(-(v + 65) / 20)
    bh = 1 / (1 + np.exp(-(v + 35) / 10))
    an = 0.01 * (v + 55) / (1 - np.exp(-(v + 55) / 10))
    bn = 0.125 * np.exp(-(v + 65) / 80)
    return (am, bm), (ah, bh), (an, bn)


def test_hodgkin_huxley_clamp_currents_follow_the_1952_solution():
    # Under an ideal voltage step from V0 to V1 every HH gate relaxes exponentially,
    # x(t) = x_inf(V1) + (x_inf(V0) - x_inf(V1)) e^{-t/tau_x(V1)}, and the membrane current is
    # gNa m^3 h (V1 - ENa) + gK n^4 (V1 - EK) + gL (V1 - EL) (Hodgkin and Huxley 1952, J Physiol
    # 117:500; textbook). A 1 kOhm series resistance leaves under 0.2 mV of error, so the recorded
    # clamp current follows this solution: first inward (negative, Na+), then outward (K+).
    side = math.sqrt(HH_AREA / math.pi)
    values = dict(HH1952, diam=side, length=side, phi=1.0)
    v0, v1, t_on, width, dt = -65e-3, 0.0, 0.002, 0.01, 5e-6
    role = RolePlan(name="axon", cell_class="squid", model="hh_squid", cell_ids=np.arange(1),
                    positions=np.zeros((1, 3)), params={k: np.full(1, float(x)) for k, x in values.items()},
                    recorded=True, mode="voltage clamp", holding_current=np.zeros(1), holding_potential=v0,
                    series_resistance=1e3, segments=[WaveSegment("square", t_on, t_on + width, amplitude=v1 - v0)])
    rec = run_plan(make_plan([role], receptors={}, n_repeat=1, dt=dt, sweep_length=0.014))
    current = rec.traces["axon"][0, 0]
    t = rec.time
    after = (t >= t_on + 0.1e-3) & (t < t_on + width)
    tm = (t[after] - t_on) * 1e3                                    # ms
    gates = []
    for (a0, b0), (a1, b1) in zip(_hh_rates(v0 * 1e3), _hh_rates(v1 * 1e3)):
        x0, x1, tau = a0 / (a0 + b0), a1 / (a1 + b1), 1 / (a1 + b1)
        gates.append(x1 + (x0 - x1) * np.exp(-tm / tau))
    m, h, n = gates
    p = HH1952
    density = (p["gNa"] * m ** 3 * h * (v1 - p["ENa"]) + p["gK"] * n ** 4 * (v1 - p["EK"])
               + p["g_leak"] * (v1 - p["EL"]))
    expected = density * HH_AREA
    assert expected.min() < -50e-9 and expected[-1] > 100e-9            # the 1952 shape: inward, then outward
    # exponential Euler is first order: the gates see the new command one step late and the current
    # reports the gates of the step before, a lag of about two steps on the fast Na+ rise
    assert np.max(np.abs(current[after] - expected)) < 0.03 * np.max(np.abs(expected))
    assert current[after].min() < 0 and current[after][-1] > 0
    assert np.argmin(current[after]) < np.argmax(current[after])


def test_stimuli_the_engine_cannot_use_are_protocol_errors():
    # a current pulse on a voltage-clamped cell and a Poisson input through an unknown receptor
    from protolang.language.errors import ProtocolError
    from protolang.plan.model import CurrentPulse

    post = cell("post", 1, mode="voltage clamp", holding_potential=-70e-3, series=10e6,
                poisson=[PoissonSpec(100.0, 1e-9, "AMAP", 0.0, 0.01)])
    post.pulses = [CurrentPulse(0.002, 0.001, 1e-9)]
    plan = make_plan([post], n_repeat=1, sweep_length=0.01)
    plan.spans = {"cell_post": "test.protocol:6:1"}
    with pytest.raises(ProtocolError) as info:
        run_plan(plan)
    text = str(info.value)
    assert text.startswith("test.protocol:6:1: error:") and "pulses and trains inject current" in text
    assert "receptor 'AMAP'" in text and "did you mean 'AMPA'?" in text
