"""Hodgkin-Huxley-type cells and temperature scaling, checked against published values, closed forms and scipy."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

import protolang
from protolang.circuit import instantiate, load_circuit
from protolang.language.errors import ProtocolError
from protolang.plan.model import CurrentPulse, Plan, RolePlan

ROOT = Path(__file__).resolve().parent.parent
HH_DEMO = ROOT / "demo" / "hh_cells.circuit.yaml"

DT = 0.025e-3

# --------------------------------------------------------------------------- squid axon
# Hodgkin and Huxley 1952 (J Physiol 117:500), modern convention (REFERENCES A8): per area in SI
# (1 mS/cm2 = 10 S/m2, 1 uF/cm2 = 0.01 F/m2). E_L = -54.387 mV puts the rest at -64.996 mV.
HH1952 = dict(c_m=1e-2, g_leak=3.0, EL=-54.387e-3, gNa=1200.0, gK=360.0, ENa=50e-3, EK=-77e-3)
AREA = 1e-8                                    # m^2 = 1e-4 cm^2, so 1 uA/cm2 is 100 pA
SIDE = math.sqrt(AREA / math.pi)               # d = L gives pi*d*L = AREA
UA_PER_CM2 = 1e-6 / 1e-4 * AREA                # A per uA/cm2


def squid_rates(v):
    """HH 1952 rate constants (1/ms) at 6.3 degC, v in mV, written in the paper's form."""
    am = 0.1 * (v + 40) / (1 - np.exp(-(v + 40) / 10))
    bm = 4 * np.exp(-(v + 65) / 18)
    ah = 0.07 * np.exp(-(v + 65) / 20)
    bh = 1 / (1 + np.exp(-(v + 35) / 10))
    an = 0.01 * (v + 55) / (1 - np.exp(-(v + 55) / 10))
    bn = 0.125 * np.exp(-(v + 65) / 80)
    return am, bm, ah, bh, an, bn


def squid_ionic(v, m, h, n):
    """Ionic current density (uA/cm2) of HH 1952 with v in mV."""
    return 120 * m ** 3 * h * (v - 50) + 36 * n ** 4 * (v + 77) + 0.3 * (v + 54.387)


def squid_steady(v):
    am, bm, ah, bh, an, bn = squid_rates(v)
    return am / (am + bm), ah / (ah + bh), an / (an + bn)


def squid_rhs(current_uA_cm2, phi):
    """Right-hand side in mV and ms; all rates times phi (the Q10 factor)."""
    def f(_t, y):
        v, m, h, n = y
        am, bm, ah, bh, an, bn = squid_rates(v)
        return [current_uA_cm2 - squid_ionic(v, m, h, n),          # C_m = 1 uF/cm2
                phi * (am * (1 - m) - bm * m), phi * (ah * (1 - h) - bh * h),
                phi * (an * (1 - n) - bn * n)]
    return f


def squid_role(name: str, phi: float, pulses=()) -> RolePlan:
    values = dict(HH1952, diam=SIDE, length=SIDE, phi=phi)
    return RolePlan(name=name, cell_class="squid", model="hh_squid", cell_ids=np.arange(1),
                    positions=np.zeros((1, 3)), params={k: np.full(1, float(v)) for k, v in values.items()},
                    recorded=True, holding_current=np.zeros(1), pulses=list(pulses))


# --------------------------------------------------------------------------- cortical cells
# Pospischil et al. 2008 (Biol Cybern 99:427), defaults of the authors' public code (REFERENCES
# A10): RS d = L = 96 um, g_leak 1e-4 S/cm2, E_leak -70 mV, g_Na 0.05, g_Kd 0.005, g_M 7e-5
# S/cm2, tau_max 1 s; FS d = L = 67 um, g_leak 1.5e-4, g_Kd 0.01, no I_M; V_T -55 mV,
# E_Na 50 mV, E_K -100 mV, c_m 1 uF/cm2, 36 degC.
def cortical(d, g_leak, g_kd, g_m):
    return dict(diam=d, length=d, c_m=1e-2, g_leak=g_leak * 1e4, EL=-70e-3, gNa=0.05e4, gKd=g_kd * 1e4,
                gM=g_m * 1e4, tau_max=1.0, gCaL=0.0, gCaT=0.0, VT=-55e-3, ENa=50e-3, EK=-100e-3,
                ECa=120e-3, phi_Na_Kd=1.0, phi_M=1.0, phi_CaT=1.0, phi_CaL=1.0)


RS = cortical(96e-6, 1e-4, 0.005, 7e-5)
FS = cortical(67e-6, 1.5e-4, 0.01, 0.0)


def cortical_role(name: str, values: dict, pulses=(), holding=0.0) -> RolePlan:
    return RolePlan(name=name, cell_class=name, model="hh_cortical", cell_ids=np.arange(1),
                    positions=np.zeros((1, 3)), params={k: np.full(1, float(v)) for k, v in values.items()},
                    recorded=True, holding_current=np.full(1, holding), pulses=list(pulses))


def make_plan(roles, *, length: float, temperature: float | None = None) -> Plan:
    conditions = {"calcium": 2.0, "magnesium": 1.0}
    if temperature is not None:
        conditions["temperature"] = temperature
    return Plan(title="hh test", protocol_file="test.protocol", protocol_hash="0",
                circuit_file="test.circuit.yaml", circuit_hash="0", seed=1, dt=DT, sample_dt=DT,
                sweep_length=length, n_sweeps=1, interval=length, n_repeat=1, layout="replicas",
                layout_reason="test", mode="isolated", conditions=conditions, roles=list(roles),
                receptors={}, synapses=[], measures=[])


@pytest.fixture(scope="module")
def brian2_restored():
    """Restore Brian2's target and clock and numpy's global generator after this module."""
    brian2 = pytest.importorskip("brian2")
    target, dt, state = brian2.prefs["codegen.target"], brian2.defaultclock.dt, np.random.get_state()
    yield brian2
    brian2.prefs["codegen.target"] = target
    brian2.defaultclock.dt = dt
    np.random.set_state(state)


@pytest.fixture(scope="module")
def squid_runs(brian2_restored):
    """HH 1952 cells at 6.3 and 16.3 degC: a 10 uA/cm2 step and a subthreshold 1.5 uA/cm2 step."""
    from protolang.engine.run import run_plan

    big = [CurrentPulse(0.020, 0.030, 10 * UA_PER_CM2)]
    small = [CurrentPulse(0.020, 0.020, 1.5 * UA_PER_CM2)]
    roles = [squid_role("cold", 1.0, big), squid_role("warm", 3.0, big),
             squid_role("cold_sub", 1.0, small), squid_role("warm_sub", 3.0, small)]
    return run_plan(make_plan(roles, length=0.060))


@pytest.fixture(scope="module")
def squid_onset(brian2_restored):
    """HH 1952 at 6.3 degC under 250 ms steps just below and just above the onset of firing."""
    from protolang.engine.run import run_plan

    roles = [squid_role("below", 1.0, [CurrentPulse(0.010, 0.250, 6.0 * UA_PER_CM2)]),
             squid_role("above", 1.0, [CurrentPulse(0.010, 0.250, 6.5 * UA_PER_CM2)])]
    return run_plan(make_plan(roles, length=0.260))


# --------------------------------------------------------------------------- squid tests


@pytest.mark.brian2
def test_squid_rest_and_spike_peak(squid_runs):
    # Hodgkin and Huxley 1952 (J Physiol 117:500): rest -64.996 mV and spike peak +40.3 mV for a
    # 10 uA/cm2 step at 6.3 degC (REFERENCES A8, derived with RK4 at dt = 0.01 ms).
    v = squid_runs.traces["cold"][0, 0] * 1e3
    t = squid_runs.time
    before = v[t < 0.020]
    assert abs(before.mean() - (-65.0)) < 0.1
    assert before.max() - before.min() < 1e-4          # a true steady state, no drift
    assert abs(v.max() - 40.3) < 1.5
    assert len(squid_runs.spikes["cold"][0][0]) >= 1


@pytest.mark.brian2
def test_squid_onset_of_repetitive_firing(squid_onset):
    # Class 2 excitability of HH 1952: sustained firing starts near 6.26 uA/cm2 at about 50 Hz,
    # never at low rates (Rinzel and Miller 1980, Math Biosci 49:27, from memory; REFERENCES A8
    # computes onset 6.2594-6.2602 uA/cm2 and 52.4 Hz at 6.3 uA/cm2).
    late = (0.110, 0.260)
    below = squid_onset.spikes["below"][0][0]
    above = squid_onset.spikes["above"][0][0]
    assert len(below) <= 3                                          # a few spikes, then silence
    assert not np.any((below >= late[0]) & (below < late[1]))
    sustained = above[(above >= late[0]) & (above < late[1])]
    assert len(sustained) >= 5
    rate = 1.0 / np.mean(np.diff(sustained))
    assert 45.0 <= rate <= 75.0


@pytest.mark.brian2
def test_squid_subthreshold_trajectory_matches_solve_ivp(squid_runs):
    # The same HH 1952 equations integrated by scipy's solve_ivp (independent library), at
    # 6.3 degC and at 16.3 degC with every rate times Q10 = 3 (REFERENCES A8: phi = 3^((T - 6.3)/10)).
    from scipy.integrate import solve_ivp

    t_ms = squid_runs.time * 1e3
    v_rest = -64.99637933
    for role, phi in (("cold_sub", 1.0), ("warm_sub", 3.0)):
        v_sim = squid_runs.traces[role][0, 0] * 1e3
        assert len(squid_runs.spikes[role][0][0]) == 0
        y = [v_rest, *squid_steady(v_rest)]
        ref = np.empty_like(t_ms)
        for start, stop, current in ((0.0, 20.0, 0.0), (20.0, 40.0, 1.5), (40.0, 60.0, 0.0)):
            sel = (t_ms >= start - 1e-9) & (t_ms < stop - 1e-9)
            sol = solve_ivp(squid_rhs(current, phi), (start, stop), y, method="LSODA", rtol=1e-9,
                            atol=1e-10, dense_output=True)
            ref[sel] = sol.sol(t_ms[sel])[0]
            y = sol.y[:, -1]
        assert np.max(np.abs(v_sim - ref)) < 0.5, role
        assert v_sim.max() - v_rest > 1.0, role                 # the step did depolarise the cell
    # the warm trace is not the cold one: the factor of 3 is really applied (once)
    cold, warm = (squid_runs.traces[r][0, 0] * 1e3 for r in ("cold_sub", "warm_sub"))
    assert np.max(np.abs(cold - warm)) > 1.0


@pytest.mark.brian2
def test_warmer_squid_spikes_are_faster_and_narrower(squid_runs):
    # Raising temperature by 10 degC multiplies every HH rate by Q10 = 3 (Hodgkin and Huxley 1952;
    # REFERENCES A8), so the spike is briefer and reaches its peak sooner.
    def width_and_time(role):
        v = squid_runs.traces[role][0, 0] * 1e3
        t = squid_runs.time * 1e3
        first = squid_runs.spikes[role][0][0][0] * 1e3
        window = (t > first - 2.0) & (t < first + 6.0)
        vw, tw = v[window], t[window]
        peak = int(np.argmax(vw))
        half = v[0] + 0.5 * (vw[peak] - v[0])
        above = tw[vw > half]
        return above[-1] - above[0], tw[peak]

    cold_width, cold_peak = width_and_time("cold")
    warm_width, warm_peak = width_and_time("warm")
    assert warm_width < 0.7 * cold_width
    assert warm_peak < cold_peak


@pytest.mark.brian2
def test_engine_applies_no_temperature_of_its_own(brian2_restored):
    # The plan carries the temperature factors; the engine must not scale again. The same plan with
    # a different recorded bath temperature simulates identically (common practice, no single source).
    from protolang.engine.run import run_plan

    pulse = [CurrentPulse(0.002, 0.002, 10 * UA_PER_CM2)]
    a = run_plan(make_plan([squid_role("cell", 1.0, pulse)], length=0.010, temperature=279.45))
    b = run_plan(make_plan([squid_role("cell", 1.0, pulse)], length=0.010, temperature=309.15))
    assert np.array_equal(a.traces["cell"], b.traces["cell"])


# --------------------------------------------------------------------------- cortical tests


@pytest.mark.brian2
def test_cortical_passive_input_resistance_and_time_constant(brian2_restored):
    # Single compartment: R_in = 1/(g_leak*pi*d*L), tau = c_m/g_leak (REFERENCES A1, derived):
    # RS 34.54 MOhm and 10 ms, FS 47.27 MOhm and 6.667 ms. Na and Kd are shut near -70 mV; the RS
    # cell's I_M is blocked (g_M = 0) as a pharmacological block would, since it is open at rest.
    from protolang.engine.run import run_plan

    step = -10e-12
    t_on, t_off = 0.020, 0.140
    roles = [cortical_role("fs", FS, [CurrentPulse(t_on, t_off - t_on, step)]),
             cortical_role("rs_m_blocked", dict(RS, gM=0.0), [CurrentPulse(t_on, t_off - t_on, step)])]
    rec = run_plan(make_plan(roles, length=0.150))
    t = rec.time
    for role, r_in, tau in (("fs", 47.27e6, 6.667e-3), ("rs_m_blocked", 34.54e6, 10e-3)):
        v = rec.traces[role][0, 0]
        v0 = v[t < t_on].mean()
        v_end = v[(t > t_off - 0.005) & (t < t_off)].mean()
        measured = (v_end - v0) / step
        assert abs(measured / r_in - 1) < 0.02, (role, measured)
        # time to 1 - 1/e of the final deflection
        sel = (t >= t_on) & (t < t_off)
        frac = (v[sel] - v0) / (v_end - v0)
        k = int(np.argmax(frac >= 1 - math.exp(-1)))
        t63 = np.interp(1 - math.exp(-1), frac[k - 1:k + 1], t[sel][k - 1:k + 1]) - t_on
        assert abs(t63 / tau - 1) < 0.02, (role, t63)


def test_demo_cortical_cells_have_the_published_passive_values():
    # The demo's RS and FS classes reach the plan with the authors' geometry and leak: R_in and tau
    # computed from the plan parameters (REFERENCES A1: 34.54 MOhm, 10 ms; 47.27 MOhm, 6.667 ms).
    circuit = load_circuit(HH_DEMO)
    inst = instantiate(circuit, 1)
    for cls, r_in, tau in (("regular_spiking", 34.54e6, 10e-3), ("fast_spiking", 47.27e6, 6.667e-3)):
        p = inst.params_of(inst.ids_of(cls)[:3])
        area = math.pi * p["diam"] * p["length"]
        assert np.allclose(1 / (p["g_leak"] * area), r_in, rtol=2e-3)
        assert np.allclose(p["c_m"] / p["g_leak"], tau, rtol=2e-3)


@pytest.mark.brian2
def test_fast_spiking_does_not_adapt_regular_spiking_does(brian2_restored):
    # Pospischil et al. 2008 (Biol Cybern 99:427): RS cells adapt through I_M, FS cells fire
    # regularly; the same contrast in slices: McCormick, Connors, Lighthall and Prince 1985
    # (J Neurophysiol 54:782). Steps from the authors' demos: RS 0.75 nA, FS 0.5 nA, 400 ms.
    from protolang.engine.run import run_plan

    roles = [cortical_role("rs", RS, [CurrentPulse(0.010, 0.400, 0.75e-9)]),
             cortical_role("fs", FS, [CurrentPulse(0.010, 0.400, 0.5e-9)])]
    rec = run_plan(make_plan(roles, length=0.420))
    rs, fs = (np.diff(rec.spikes[r][0][0]) for r in ("rs", "fs"))
    assert len(rs) >= 3 and len(fs) >= 10
    assert rs[-1] / rs[0] > 2.0                 # strong spike-frequency adaptation
    assert abs(fs[-1] / fs[0] - 1) < 0.05       # none
    assert len(fs) > 2 * len(rs)


# --------------------------------------------------------------------------- plan: holding, temperature

PROTOCOL = """\
protocol "hh plan test"
circuit "{circuit}" seed 2

bath:
    temperature {temperature} degC

cells:
    {cells}
    repeat 2

sweeps 1 every 2 s

{records}
"""


def load(tmp_path, *, temperature="36", cells="rs is regular_spiking",
         records="record rs: current clamp, holding -70 mV", name="h.protocol"):
    text = PROTOCOL.format(circuit=HH_DEMO, temperature=temperature, cells=cells, records=records)
    path = tmp_path / name
    path.write_text(text)
    return protolang.load(path)


@pytest.mark.brian2
def test_holding_current_brings_an_hh_cell_to_minus_70(tmp_path, brian2_restored):
    # The plan's holding current for a regular-spiking cell (Pospischil et al. 2008 equations) at
    # -70 mV: scipy's solve_ivp of the published equations, started 10 mV away, settles at -70 mV,
    # and the Brian2 cell stays there (REFERENCES A10 parameters).
    from scipy.integrate import solve_ivp

    from protolang.engine.run import run_plan

    plan = load(tmp_path).plan()
    role = plan.role("rs")
    hold = float(role.holding_current[0])
    p = role.params
    area_cm2 = math.pi * p["diam"][0] * p["length"][0] * 1e4
    i_uA_cm2 = hold * 1e6 / area_cm2
    g = {k: float(p[k][0]) * 1e-1 for k in ("g_leak", "gNa", "gKd", "gM")}   # S/m2 -> mS/cm2

    def rates(v):
        w = v + 55.0                                                    # V_T = -55 mV
        am = 0.32 * (13 - w) / (np.exp((13 - w) / 4) - 1)
        bm = 0.28 * (w - 40) / (np.exp((w - 40) / 5) - 1)
        ah = 0.128 * np.exp((17 - w) / 18)
        bh = 4 / (1 + np.exp((40 - w) / 5))
        an = 0.032 * (15 - w) / (np.exp((15 - w) / 5) - 1)
        bn = 0.5 * np.exp((10 - w) / 40)
        p_inf = 1 / (1 + np.exp(-(v + 35) / 10))
        tau_p = 1000 / (3.3 * np.exp((v + 35) / 20) + np.exp(-(v + 35) / 20))
        return am, bm, ah, bh, an, bn, p_inf, tau_p

    def rhs(_t, y):
        v, m, h, n, q = y
        am, bm, ah, bh, an, bn, p_inf, tau_p = rates(v)
        ionic = (g["gNa"] * m ** 3 * h * (v - 50) + g["gKd"] * n ** 4 * (v + 100)
                 + g["gM"] * q * (v + 100) + g["g_leak"] * (v + 70))
        return [i_uA_cm2 - ionic, am * (1 - m) - bm * m, ah * (1 - h) - bh * h,
                an * (1 - n) - bn * n, (p_inf - q) / tau_p]

    am, bm, ah, bh, an, bn, p_inf, _ = rates(-80.0)
    y0 = [-80.0, am / (am + bm), ah / (ah + bh), an / (an + bn), p_inf]
    sol = solve_ivp(rhs, (0, 3000.0), y0, method="LSODA", rtol=1e-8, atol=1e-10)
    assert abs(sol.y[0, -1] - (-70.0)) < 0.1

    rec = run_plan(plan)
    v = rec.traces["rs"] * 1e3
    assert np.max(np.abs(v - (-70.0))) < 0.1
    assert hold > 0            # the RS cell rests below -70 mV (its I_M is open at rest)


def test_unstable_holding_potential_is_refused(tmp_path):
    # HH 1952 at 6.3 degC loses its stable rest through a Hopf bifurcation at I = 9.7754 uA/cm2
    # (REFERENCES A8, computer-assisted proof), i.e. at the potential where the steady-state
    # current equals it; the plan refuses to hold above that potential although dI/dV > 0 there.
    from scipy.optimize import brentq

    exp = load(tmp_path, temperature="6.3", cells="axon is squid_reference",
               records="record axon: current clamp, holding -55 mV")
    with pytest.raises(ProtocolError) as info:
        exp.plan()
    text = str(info.value)
    source = (tmp_path / "h.protocol").read_text().splitlines()
    line = next(i for i, t in enumerate(source, 1) if "holding -55 mV" in t)
    col = source[line - 1].index("-55 mV") + 1
    assert f"h.protocol:{line}:{col}: error: squid_reference cells cannot be held at -55 mV" in text
    limit = float(text.split("a potential below ")[1].split(" mV")[0])
    v_hopf = brentq(lambda v: squid_ionic(v, *squid_steady(v)) - 9.7754, -64.0, -50.0)
    assert abs(limit - v_hopf) <= 0.5
    # just below the bifurcation the same cell can be held
    ok = load(tmp_path, temperature="6.3", cells="axon is squid_reference", name="ok.protocol",
              records="record axon: current clamp, holding -61 mV").plan()
    demo_area = math.pi * 56.419e-6 ** 2                        # m^2; 1 uA/cm2 = 1e-2 A/m^2
    expected = squid_ionic(-61.0, *squid_steady(-61.0)) * 1e-2 * demo_area
    assert ok.role("axon").holding_current[0] == pytest.approx(expected, rel=1e-6)


def test_plan_records_the_temperature_factors(tmp_path):
    # Q10 scaling: rates times Q10^((T - T_ref)/10) (Hodgkin and Huxley 1952; the cortical
    # models' code: Q10 3 for Na/K, 2.3 for I_M at 36 degC, REFERENCES A10); receptor rise and
    # decay divided by their factor (Q10 2.5: common practice, no single source).
    plan = load(tmp_path, temperature="26", cells="rs is regular_spiking\n    axon is squid_reference",
                records="record rs: current clamp").plan()
    assert plan.conditions["temperature"] == pytest.approx(299.15)
    q10 = plan.conditions["q10_factors"]
    rs = q10["cells"]["regular_spiking"]["factors"]
    assert rs["phi_Na_Kd"] == pytest.approx(1 / 3) and rs["phi_M"] == pytest.approx(1 / 2.3)
    assert q10["cells"]["squid_reference"]["factors"]["phi"] == pytest.approx(3 ** 1.97)
    assert np.allclose(plan.role("rs").params["phi_M"], 1 / 2.3)
    assert np.allclose(plan.role("axon").params["phi"], 3 ** 1.97)
    for name in ("AMPA", "NMDA", "GABA_A"):       # all hold at 36 degC in the demo
        assert q10["receptors"][name]["factor"] == pytest.approx(1 / 2.5)
    assert plan.receptors["AMPA"].decay == pytest.approx(3e-3 * 2.5)
    assert plan.receptors["AMPA"].rise == pytest.approx(0.3e-3 * 2.5)
    # ten degrees warmer multiplies every factor by its Q10
    warm = load(tmp_path, temperature="36", name="w.protocol",
                cells="rs is regular_spiking\n    axon is squid_reference",
                records="record rs: current clamp").plan()
    ratio = warm.role("axon").params["phi"] / plan.role("axon").params["phi"]
    assert np.allclose(ratio, 3.0)
    assert warm.conditions["q10_factors"]["receptors"]["AMPA"]["factor"] == pytest.approx(1.0)


# --------------------------------------------------------------------------- schema


def _variant(tmp_path, old: str, new: str):
    text = HH_DEMO.read_text()
    assert text.count(old) == 1, old
    bad = text.replace(old, new)
    path = tmp_path / "variant.circuit.yaml"
    path.write_text(bad)
    return path, bad


def test_demo_circuit_is_marked_invented_and_loads():
    text = HH_DEMO.read_text()
    assert "INVENTED" in text.splitlines()[0]
    c = load_circuit(HH_DEMO)
    assert "invented" in c.note.lower()
    assert {cls.model for cls in c.classes.values()} == {"hh_cortical", "hh_squid"}
    assert c.bath.temperature == pytest.approx(309.15)
    ib = c.classes["intrinsic_bursting"].parameters
    assert ib["gCaL"].center == pytest.approx(1.7)             # 1.7e-4 S/cm2 (REFERENCES A10)
    assert c.classes["low_threshold"].parameters["gCaT"].center == pytest.approx(4.0)
    assert c.classes["squid_reference"].temperature.reference == pytest.approx(279.45)


def test_q10_without_reference_is_a_schema_error(tmp_path):
    # a Q10 means nothing without the temperature it is counted from (schema rule)
    path, bad = _variant(tmp_path, "temperature: {reference: 6.3 degC, q10: 3}", "temperature: {q10: 3}")
    with pytest.raises(ProtocolError) as info:
        load_circuit(path)
    line = bad[: bad.index("temperature: {q10: 3}")].count("\n") + 1
    col = bad.splitlines()[line - 1].index("q10") + 1
    msg = str(info.value)
    assert msg.startswith(f"{path}:{line}:{col}: error: classes.squid_reference.temperature.q10: "
                          f"q10 is given without the reference temperature")
    assert "Traceback" not in msg and len(info.value.diagnostics) == 1


def test_receptor_q10_without_reference_and_misspelt_keys(tmp_path):
    old = "AMPA: {rise: 0.3 ms, decay: 3 ms, reversal: 0 mV, temperature: {reference: 36 degC, q10: 2.5}}"
    path, bad = _variant(tmp_path, old, old.replace("reference: 36 degC, ", ""))
    with pytest.raises(ProtocolError, match=r"receptors\.AMPA\.temperature\.q10: q10 is given without"):
        load_circuit(path)
    path, _ = _variant(tmp_path, "q10_Na_Kd: 3", "q10_Na_kd: 3")
    with pytest.raises(ProtocolError) as info:
        load_circuit(path)
    assert "unknown key 'q10_Na_kd'" in str(info.value) and "did you mean 'q10_Na_Kd'?" in str(info.value)
    path, _ = _variant(tmp_path, "      g_Kd: 10 mS/cm2\n", "      g_Kd: 10 mS/cm\n")
    with pytest.raises(ProtocolError, match="unknown unit 'mS/cm'"):
        load_circuit(path)


def test_hh_parameters_may_vary_per_cell(tmp_path):
    path, _ = _variant(tmp_path, "      g_leak: 0.15 mS/cm2\n",
                       "      g_leak: {mean: 0.15 mS/cm2, sd: 0.01 mS/cm2}\n")
    inst = instantiate(load_circuit(path), 4)
    g = inst.params_of(inst.ids_of("fast_spiking"))["g_leak"]
    assert g.std() > 0 and abs(g.mean() - 1.5) < 5 * 0.1 / math.sqrt(g.size)
    again = instantiate(load_circuit(path), 4)
    assert np.array_equal(again.params_of(again.ids_of("fast_spiking"))["g_leak"], g)
