"""Brian2 engine checks: hand-built Plans run through run_plan and compared with closed forms, published values and scipy."""

from __future__ import annotations

import math

import numpy as np
import pytest

from protolang.engine import models
from protolang.engine.run import run_plan
from protolang.language.errors import ProtocolError
from protolang.plan.model import CurrentPulse, Plan, ReceptorPlan, RolePlan, SynapsePlan

pytestmark = pytest.mark.brian2


# --------------------------------------------------------------------------- plan helpers

# Brette and Gerstner 2005 (J Neurophysiol 94:3637) standard AdEx set, SI units.
BRETTE_GERSTNER = dict(C=281e-12, gL=30e-9, EL=-70.6e-3, VT=-50.4e-3, DeltaT=2e-3, a=4e-9,
                       tau_w=0.144, b=80.5e-12, Vr=-70.6e-3, Vcut=-40.4e-3, t_ref=2e-3)

# A cell whose exponential and adaptation terms vanish: a passive RC membrane.
PASSIVE = dict(BRETTE_GERSTNER, VT=0.5, DeltaT=1e-5, a=0.0, b=0.0, Vcut=1.0)

# An (almost) voltage-clamped cell: huge capacitance, negligible leak, passive otherwise.
CLAMPED = dict(PASSIVE, C=1e-5, gL=1e-15)


def cell(name: str, n: int, *, recorded: bool = False, spike_times=None, holding=None,
         pulses=(), noise_sd: float = 0.0, **params) -> RolePlan:
    """A role of n repeats; params override the Brette-Gerstner set (scalars or (n,) arrays)."""
    values = dict(BRETTE_GERSTNER, **params)
    return RolePlan(
        name=name, cell_class=f"{name}_class", model="adex", cell_ids=np.arange(n),
        positions=np.zeros((n, 3)),
        params={k: np.broadcast_to(np.asarray(v, dtype=float), (n,)).copy() for k, v in values.items()},
        recorded=recorded,
        holding_current=None if holding is None else np.broadcast_to(np.asarray(holding, float), (n,)).copy(),
        noise_sd=noise_sd, pulses=list(pulses),
        spike_times=None if spike_times is None else np.asarray(spike_times, dtype=float))


def synapse(name: str, pre: str, post: str, n: int, *, U, D, F=0.0, n_sites=1, g=1e-9,
            delay=1e-3, receptors=None, stochastic=True, connected=None) -> SynapsePlan:
    def arr(x, dtype=float):
        return np.broadcast_to(np.asarray(x, dtype=dtype), (n,)).copy()

    return SynapsePlan(
        name=name, pre=pre, post=post, pathway=f"{pre}->{post}",
        connected=arr(True if connected is None else connected, bool), n_sites=arr(n_sites, int),
        site_conductance=arr(g), U=arr(U), U_reference=arr(U), D=arr(D), F=arr(F), delay=arr(delay),
        receptors=dict(receptors or {"AMPA": 1.0}), stochastic=stochastic)


AMPA = ReceptorPlan("AMPA", rise=0.2e-3, decay=2e-3, reversal=0.0)
NMDA = ReceptorPlan("NMDA", rise=2e-3, decay=100e-3, reversal=0.0, mg_block=True)


def make_plan(roles, synapses=(), receptors=None, *, n_repeat, n_sweeps=1, layout="replicas",
              dt=1e-4, sample_dt=None, sweep_length=0.1, interval=None, seed=1,
              magnesium=1.0, spans=None) -> Plan:
    return Plan(
        title="engine test", protocol_file="test.protocol", protocol_hash="0",
        circuit_file="test.circuit.yaml", circuit_hash="0", seed=seed, dt=dt,
        sample_dt=dt if sample_dt is None else sample_dt, sweep_length=sweep_length,
        n_sweeps=n_sweeps, interval=sweep_length if interval is None else interval,
        n_repeat=n_repeat, layout=layout, layout_reason="test", mode="isolated",
        conditions={"calcium": 2.0, "magnesium": magnesium}, roles=list(roles),
        receptors=dict(receptors or {"AMPA": AMPA}), synapses=list(synapses), measures=[],
        spans=dict(spans or {}))


def dual_exp(t, rise, decay):
    """Unit-peak difference of exponentials (closed form; REFERENCES A2)."""
    t = np.asarray(t, dtype=float)
    if rise == decay:
        shape = t / decay * np.exp(1 - t / decay)
        return np.where(t >= 0, shape, 0.0)
    tp = rise * decay / (decay - rise) * math.log(decay / rise)
    norm = math.exp(-tp / decay) - math.exp(-tp / rise)
    return np.where(t >= 0, (np.exp(-t / decay) - np.exp(-t / rise)) / norm, 0.0)


@pytest.fixture(autouse=True)
def brian2_state():
    """Snapshot Brian2's global state and numpy's global generator; restore them after each test."""
    brian2 = pytest.importorskip("brian2")
    target = brian2.prefs["codegen.target"]
    dt = brian2.defaultclock.dt
    rng_state = np.random.get_state()
    yield brian2
    brian2.prefs["codegen.target"] = target
    brian2.defaultclock.dt = dt
    np.random.set_state(rng_state)


# --------------------------------------------------------------------------- tests


def test_passive_membrane_steady_state_and_time_constant(brian2_state):
    # Single RC compartment: V_inf = EL + I/gL, tau = C/gL (Johnston and Wu 1995,
    # Foundations of Cellular Neurophysiology; textbook).
    C = np.array([200e-12, 500e-12])
    gL = np.array([10e-9, 12.5e-9])                      # tau 20 ms and 40 ms
    hold = np.array([0.0, 40e-12])
    step = 100e-12
    t_on = 0.02
    post = cell("post", 2, recorded=True, holding=hold,
                pulses=[CurrentPulse(t_on, 1.0, step)], **dict(PASSIVE, C=C, gL=gL))
    plan = make_plan([post], n_repeat=2, dt=2.5e-5, sweep_length=0.47)
    rec = run_plan(plan)
    v = rec.traces["post"][:, 0, :]
    t = rec.time
    EL = PASSIVE["EL"]
    np.testing.assert_allclose(v[:, 0], EL + hold / gL, rtol=0, atol=1e-9)
    v_inf = EL + (hold + step) / gL
    deflection = step / gL
    assert np.all(np.abs(v[:, -1] - v_inf) < 1e-3 * deflection)
    for k in range(2):
        tau = C[k] / gL[k]
        window = (t >= t_on + 0.5 * tau) & (t <= t_on + 4 * tau)
        slope = np.polyfit(t[window], np.log(v_inf[k] - v[k, window]), 1)[0]
        assert abs(-1 / slope - tau) < 1e-3 * tau
    assert rec.meta["target"] == "numpy" and rec.meta["n_replicas"] == 2


def tm_recursion(times, U, D, F):
    """EPSP_n / A = u_n R_n (Markram, Wang and Tsodyks 1998 PNAS 95:5323; Tsodyks and Markram
    1997 PNAS 94:719): u_{n+1} = U + u_n (1-U) e^{-T/F}, R_{n+1} = R_n (1-u_n) e^{-T/D} + 1 - e^{-T/D}."""
    u, R, out = U, 1.0, []
    for n, _ in enumerate(times):
        out.append(u * R)
        if n + 1 < len(times):
            T = times[n + 1] - times[n]
            ef = math.exp(-T / F) if F > 0 else 0.0
            ed = math.exp(-T / D)
            u, R = U + u * (1 - U) * ef, R * (1 - u) * ed + 1 - ed
    return np.array(out)


def test_deterministic_tsodyks_markram_matches_recursion(brian2_state):
    # repeat 0: depressing (U 0.5, D 800 ms, F 0); repeat 1: facilitating (U 0.03, D 130 ms, F 530 ms)
    U, D, F = np.array([0.5, 0.03]), np.array([0.8, 0.13]), np.array([0.0, 0.53])
    n_sites = 5
    t20 = 0.01 + 0.05 * np.arange(5)
    t70 = 0.01 + np.arange(5) / 70.0
    roles = [cell("pre20", 2, spike_times=t20), cell("pre70", 2, spike_times=t70),
             cell("post", 2, **PASSIVE)]
    syns = [synapse(f"{p}_to_post", p, "post", 2, U=U, D=D, F=F, n_sites=n_sites, g=1e-12,
                    stochastic=False) for p in ("pre20", "pre70")]
    plan = make_plan(roles, syns, n_repeat=2, sweep_length=0.25)
    rec = run_plan(plan, record_release=True)
    for pre in ("pre20", "pre70"):
        released = rec.release[f"{pre}_to_post"][:, 0, :] / n_sites
        assert released.shape == (2, 5)
        for k in range(2):
            times = rec.spikes[pre][k][0]          # times as simulated (on the time grid)
            assert len(times) == 5
            expected = tm_recursion(times, U[k], D[k], F[k])
            np.testing.assert_allclose(released[k], expected, rtol=1e-6)
    # REFERENCES.md A5 table (derived from the recursion above), 20 Hz, 5 decimals
    np.testing.assert_allclose(rec.release["pre20_to_post"][0, 0] / n_sites,
                               [0.5, 0.26515, 0.15483, 0.10302, 0.07868], atol=6e-6)
    np.testing.assert_allclose(rec.release["pre20_to_post"][1, 0] / n_sites,
                               [0.03, 0.05533, 0.07574, 0.09178, 0.10428], atol=6e-6)


# Jahr and Stevens 1990 (J Neurosci 10:3178) unblocked fraction, REFERENCES.md A6 table.
JAHR_STEVENS_TABLE = {
    1.0: [0.0244, 0.0796, 0.2302, 0.5081, 0.7812, 0.9250, 0.9771],
    2.0: [0.0124, 0.0415, 0.1300, 0.3406, 0.6409, 0.8605, 0.9552],
    0.0: [1.0] * 7,
}
CLAMP_MV = np.array([-80.0, -60.0, -40.0, -20.0, 0.0, 20.0, 40.0])


@pytest.mark.parametrize("magnesium", [1.0, 2.0, 0.0])
def test_nmda_magnesium_block_under_clamp(brian2_state, magnesium):
    # A clamped cell (C = 10 uF, v moves by < 5 uV) integrates its NMDA current:
    # delta_v = B(V) (E - V) / C * integral of g, and the integral of a dual exponential with
    # jump q is q * rise * decay (closed form, REFERENCES A2).
    n = CLAMP_MV.size
    E = 0.08                                         # away from every clamp potential
    nmda = ReceptorPlan("NMDA", rise=2e-3, decay=0.1, reversal=E, mg_block=True)
    g_peak = 1e-9
    pre = cell("pre", n, spike_times=[0.005])
    post = cell("post", n, recorded=True, **dict(CLAMPED, EL=CLAMP_MV * 1e-3))
    syn = synapse("pre_to_post", "pre", "post", n, U=1.0, D=0.1, g=g_peak, delay=0.0,
                  receptors={"NMDA": 1.0}, stochastic=False)
    plan = make_plan([pre, post], [syn], {"NMDA": nmda}, n_repeat=n, sweep_length=1.2,
                     sample_dt=1e-3, magnesium=magnesium)
    rec = run_plan(plan)
    v = rec.traces["post"][:, 0, :]
    V = CLAMP_MV * 1e-3
    integral = g_peak * models.peak_factor(nmda.rise, nmda.decay) * nmda.rise * nmda.decay
    blocked = (v[:, -1] - v[:, 0]) * CLAMPED["C"] / ((E - V) * integral)
    np.testing.assert_allclose(blocked, JAHR_STEVENS_TABLE[magnesium], rtol=1e-3, atol=6e-5)
    formula = 1 / (1 + np.exp(-0.062 * CLAMP_MV) * magnesium / 3.57)
    np.testing.assert_allclose(blocked, formula, rtol=1e-3)


def test_adex_subthreshold_trajectory_matches_solve_ivp(brian2_state):
    # Same AdEx equations (Brette and Gerstner 2005) integrated by scipy's solve_ivp
    # (independent reference library) under a subthreshold 400 pA step.
    from scipy.integrate import solve_ivp
    from scipy.optimize import brentq

    p = BRETTE_GERSTNER
    t_on, t_off, amp, length = 0.02, 0.17, 400e-12, 0.3
    post = cell("post", 1, recorded=True, pulses=[CurrentPulse(t_on, t_off - t_on, amp)])
    rec = run_plan(make_plan([post], n_repeat=1, dt=2.5e-5, sample_dt=1e-4, sweep_length=length))
    v_sim = rec.traces["post"][0, 0]
    assert all(len(s) == 0 for s in rec.spikes["post"][0])

    def rest_eq(v):
        return (p["gL"] + p["a"]) * (p["EL"] - v) + p["gL"] * p["DeltaT"] * math.exp((v - p["VT"]) / p["DeltaT"])

    v0 = brentq(rest_eq, p["EL"] - 0.01, p["VT"])
    assert abs(v_sim[0] - v0) < 1e-9

    def rhs(current):
        def f(_t, y):
            v, w = y
            dv = (p["gL"] * (p["EL"] - v) + p["gL"] * p["DeltaT"] * math.exp((v - p["VT"]) / p["DeltaT"])
                  - w + current) / p["C"]
            return [dv, (p["a"] * (v - p["EL"]) - w) / p["tau_w"]]
        return f

    y = [v0, p["a"] * (v0 - p["EL"])]
    ref = np.empty_like(rec.time)
    for start, stop, current in ((0.0, t_on, 0.0), (t_on, t_off, amp), (t_off, length, 0.0)):
        sel = (rec.time >= start - 1e-12) & (rec.time < stop - 1e-12)
        sol = solve_ivp(rhs(current), (start, stop), y, rtol=1e-8, atol=[1e-12, 1e-18],
                        dense_output=True)
        ref[sel] = sol.sol(rec.time[sel])[0]
        y = sol.y[:, -1]
    assert np.max(np.abs(v_sim - ref)) < 0.1e-3
    assert v_sim.max() - v0 > 5e-3                   # the step did depolarise the cell


def test_stochastic_release_is_binomial(brian2_state):
    # First spike: released sites ~ Binomial(n, U): mean nU, CV sqrt((1-U)/(nU)), failures (1-U)^n
    # (del Castillo and Katz 1954, J Physiol 124:560). Second spike (T later, F = 0): mean
    # nU(1 - U e^{-T/D}), the Tsodyks-Markram mean (derived: a site is empty with prob U e^{-T/D}).
    n_sites, U, D, T = 5, 0.3, 0.5, 0.02
    n_repeat, n_sweeps = 100, 20
    pre = cell("pre", n_repeat, spike_times=[0.005, 0.005 + T])
    post = cell("post", n_repeat, **PASSIVE)
    syn = synapse("pre_to_post", "pre", "post", n_repeat, U=U, D=D, n_sites=n_sites)
    plan = make_plan([pre, post], [syn], n_repeat=n_repeat, n_sweeps=n_sweeps, sweep_length=0.04, seed=7)
    rec = run_plan(plan, record_release=True)
    rel = rec.release["pre_to_post"]
    assert rel.shape == (n_repeat, n_sweeps, 2)
    first, second = rel[..., 0].ravel(), rel[..., 1].ravel()
    N = first.size
    assert np.all(first == np.round(first)) and first.min() >= 0 and first.max() <= n_sites
    mean, var = n_sites * U, n_sites * U * (1 - U)
    assert abs(first.mean() - mean) < 4 * math.sqrt(var / N)
    m4 = np.mean((first - first.mean()) ** 4)
    assert abs(first.var(ddof=1) - var) < 4 * math.sqrt((m4 - first.var() ** 2) / N)
    cv, cv_theory = first.std(ddof=1) / first.mean(), math.sqrt((1 - U) / (n_sites * U))
    assert abs(cv - cv_theory) < 0.1 * cv_theory
    p_fail = (1 - U) ** n_sites
    assert abs(np.mean(first == 0) - p_fail) < 4 * math.sqrt(p_fail * (1 - p_fail) / N)
    mean2 = n_sites * U * (1 - U * math.exp(-T / D))
    assert abs(second.mean() - mean2) < 4 * second.std(ddof=1) / math.sqrt(N)


def test_dual_exponential_peak_equals_site_conductance(brian2_state):
    # One release of one site: conductance peak = site_conductance * weight, waveform =
    # difference of exponentials (closed form, REFERENCES A2; alpha function when rise == decay).
    # g is read back from a clamped cell: C dv/dt = g (E - v) + gL (EL - v) under forward Euler.
    slow = ReceptorPlan("SLOW", rise=3e-3, decay=3e-3, reversal=0.0)
    dt, t_spike, g_site = 2.5e-5, 0.005, 2e-9
    roles = [cell("pre", 1, spike_times=[t_spike]),
             cell("post_a", 1, recorded=True, **CLAMPED), cell("post_b", 1, recorded=True, **CLAMPED)]
    syns = [synapse("to_a", "pre", "post_a", 1, U=1.0, D=0.1, g=g_site, delay=0.0, stochastic=False),
            synapse("to_b", "pre", "post_b", 1, U=1.0, D=0.1, g=g_site, delay=0.0,
                    receptors={"SLOW": 0.5}, stochastic=False)]
    plan = make_plan(roles, syns, {"AMPA": AMPA, "SLOW": slow}, n_repeat=1, dt=dt, sweep_length=0.03)
    rec = run_plan(plan)
    for role, rec_plan, peak in (("post_a", AMPA, g_site), ("post_b", slow, 0.5 * g_site)):
        v = rec.traces[role][0, 0]
        g = (CLAMPED["C"] * np.diff(v) / dt - CLAMPED["gL"] * (CLAMPED["EL"] - v[:-1])) / (rec_plan.reversal - v[:-1])
        assert abs(g.max() - peak) < 1e-3 * peak
        expected = peak * dual_exp(rec.time[:-1] - t_spike, rec_plan.rise, rec_plan.decay)
        assert np.max(np.abs(g - expected)) < 1e-6 * peak


def test_same_plan_gives_identical_recordings(brian2_state):
    # reproducibility: seeded runs repeat exactly; another seed draws other releases
    n = 20
    pre = cell("pre", n, spike_times=[0.005, 0.025])
    post = cell("post", n, recorded=True, noise_sd=0.1e-3, **PASSIVE)
    syn = synapse("pre_to_post", "pre", "post", n, U=0.4, D=0.3, n_sites=4)
    plan = make_plan([pre, post], [syn], n_repeat=n, n_sweeps=3, sweep_length=0.05, seed=3)
    a = run_plan(plan, record_release=True)
    b = run_plan(plan, record_release=True)
    assert np.array_equal(a.traces["post"], b.traces["post"])
    assert np.array_equal(a.release["pre_to_post"], b.release["pre_to_post"])
    plan.seed = 4
    c = run_plan(plan, record_release=True)
    assert not np.array_equal(a.release["pre_to_post"], c.release["pre_to_post"])


def _layout_plan(stochastic: bool, n_repeat: int, n_sweeps: int, layout: str, seed: int = 11) -> Plan:
    pre = cell("pre", n_repeat, spike_times=[0.005, 0.015, 0.025])
    # a current pulse late in the sweep exercises the stimulus library in both layouts
    post = cell("post", n_repeat, recorded=True, pulses=[CurrentPulse(0.03, 0.005, 20e-12)],
                **dict(PASSIVE, C=200e-12, gL=20e-9))
    connected = np.arange(n_repeat) % 4 != 3          # one repeat in four unconnected
    syn = synapse("pre_to_post", "pre", "post", n_repeat, U=0.5, D=0.01, n_sites=3, g=0.5e-9,
                  connected=connected, stochastic=stochastic)
    return make_plan([pre, post], [syn], n_repeat=n_repeat, n_sweeps=n_sweeps, sweep_length=0.04,
                     interval=0.3, seed=seed, layout=layout)


def _layout_pair(stochastic: bool, n_repeat: int, n_sweeps: int):
    rep = run_plan(_layout_plan(stochastic, n_repeat, n_sweeps, "replicas"), record_release=True)
    seq = run_plan(_layout_plan(stochastic, n_repeat, n_sweeps, "sequential"), record_release=True)
    return np.arange(n_repeat) % 4 != 3, rep, seq


def test_replicas_and_sequential_layouts_agree_deterministic(brian2_state):
    # with full recovery between sweeps (D = 10 ms, 260 ms gaps) both layouts simulate the same sweeps
    connected, rep, seq = _layout_pair(False, 4, 3)
    assert rep.traces["post"].shape == seq.traces["post"].shape == (4, 3, 400)
    np.testing.assert_allclose(seq.traces["post"], rep.traces["post"], rtol=0, atol=1e-9)
    np.testing.assert_allclose(seq.release["pre_to_post"], rep.release["pre_to_post"], rtol=1e-9)
    assert np.isnan(rep.release["pre_to_post"][~connected]).all()
    assert not np.isnan(rep.release["pre_to_post"][connected]).any()
    assert all(np.allclose(s, [0.005, 0.015, 0.025]) for r in seq.spikes["pre"] for s in r)
    # the pulse: 20 pA into 20 nS moves v by 1 mV * (1 - exp(-5 ms / 10 ms)) at its end
    v = seq.traces["post"][3]                         # unconnected repeat: the pulse alone
    t_end = int(round(0.035 / 1e-4))
    np.testing.assert_allclose(v[:, t_end] - v[:, 0], 1e-3 * (1 - math.exp(-0.5)), rtol=2e-2)
    assert seq.meta["layout"] == "sequential" and seq.meta["n_replicas"] == 4


def test_replicas_and_sequential_layouts_agree_stochastic(brian2_state):
    # same first-release distribution in both layouts (two-sample z-test, 4 SE)
    connected, rep, seq = _layout_pair(True, 40, 10)
    a = rep.release["pre_to_post"][connected][..., 0].ravel()
    b = seq.release["pre_to_post"][connected][..., 0].ravel()
    se = math.sqrt(a.var(ddof=1) / a.size + b.var(ddof=1) / b.size)
    assert abs(a.mean() - b.mean()) < 4 * se
    assert abs(b.mean() - 1.5) < 4 * math.sqrt(3 * 0.25 / b.size)   # n U, binomial variance


def test_bad_parameter_cites_the_protocol(brian2_state):
    post = cell("post", 2, recorded=True, C=np.array([200e-12, 0.0]))
    plan = make_plan([post], n_repeat=2, spans={"cell_post": "test.protocol:7:3"})
    with pytest.raises(ProtocolError) as info:
        run_plan(plan)
    text = str(info.value)
    assert "test.protocol:7:3" in text and "C of role 'post'" in text and "positive" in text


def test_numerical_blow_up_is_reported_with_a_hint(brian2_state):
    # a 1 mS synapse on a 10 pF cell has a time constant of 10 ns, far below the 0.1 ms step
    pre = cell("pre", 1, spike_times=[0.002])
    post = cell("post", 1, recorded=True, **dict(PASSIVE, C=10e-12, gL=1e-9, t_ref=0.0))
    syn = synapse("pre_to_post", "pre", "post", 1, U=1.0, D=0.1, g=1e-3, stochastic=False)
    plan = make_plan([pre, post], [syn], n_repeat=1, sweep_length=0.01,
                     spans={"cell_post": "test.protocol:4:1"})
    with pytest.raises(ProtocolError) as info:
        run_plan(plan)
    text = str(info.value)
    assert "test.protocol:4:1" in text and "blow-up" in text and "smaller time step" in text


def test_simulator_failure_cites_the_protocol(brian2_state, monkeypatch):
    # a Brian2 failure inside an object of role 'post' is reported at that role's protocol line
    monkeypatch.setattr(models, "conductance_update", lambda terms: "g_AMPA = not_defined*siemens")
    pre = cell("pre", 1, spike_times=[0.002])
    post = cell("post", 1, recorded=True, **PASSIVE)
    syn = synapse("pre_to_post", "pre", "post", 1, U=0.5, D=0.1)
    plan = make_plan([pre, post], [syn], n_repeat=1, sweep_length=0.005,
                     spans={"cell_post": "test.protocol:9:2"})
    with pytest.raises(ProtocolError) as info:
        run_plan(plan)
    text = str(info.value)
    assert text.startswith("test.protocol:9:2: error:") and "cell role 'post'" in text
    assert "not_defined" in text


def test_unknown_target_is_a_user_error(brian2_state):
    plan = make_plan([cell("post", 1, recorded=True)], n_repeat=1)
    with pytest.raises(ProtocolError, match="did you mean 'cython'"):
        run_plan(plan, target="cyton")


def test_run_leaves_global_state_alone(brian2_state):
    brian2 = brian2_state
    target = brian2.prefs["codegen.target"]
    brian2.defaultclock.dt = 0.05 * brian2.ms
    np.random.seed(123)
    expected = np.random.random_sample()
    np.random.seed(123)
    run_plan(make_plan([cell("post", 1, recorded=True)], n_repeat=1, dt=2.5e-5, sweep_length=0.005))
    assert brian2.defaultclock.dt == 0.05 * brian2.ms
    assert brian2.prefs["codegen.target"] == target
    assert np.random.random_sample() == expected


@pytest.mark.slow
def test_cython_target_matches_numpy(brian2_state):
    # numpy and cython evaluate the same equations: deterministic runs agree to rounding.
    # "auto" picks cython when a C++ compiler works (about 50 s to compile with a cold cache).
    plan = _layout_plan(False, 4, 2, "replicas")
    fast = run_plan(plan, target="auto", record_release=True)
    if fast.meta["target"] != "cython":
        pytest.skip("no working C++ compiler for the cython target")
    slow = run_plan(plan, record_release=True)
    assert slow.meta["target"] == "numpy"
    np.testing.assert_allclose(fast.traces["post"], slow.traces["post"], rtol=0, atol=1e-12)
    np.testing.assert_allclose(fast.release["pre_to_post"], slow.release["pre_to_post"], rtol=1e-12)
