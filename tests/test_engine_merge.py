"""Shared Brian2 objects: roles of one kind simulated in one NeuronGroup (and their synapses in one
Synapses object) give the recordings of one object per role, and errors still name the right role."""

from __future__ import annotations

from collections import Counter
from pathlib import Path

import numpy as np
import pytest

import protolang
import protolang.engine.run as engine_run
from protolang.engine import models
from protolang.language.errors import ProtocolError
from protolang.plan.model import ActivationPlan, CurrentPulse, NoiseSpec, PoissonSpec, WaveSegment

from test_engine import PASSIVE, cell, make_plan, synapse

pytestmark = pytest.mark.brian2

DEMO = Path(__file__).resolve().parents[1] / "demo"

# Six deep pyramids near each other, each pulsed once at its own time, every pair the demo
# circuit connects simulated; {release} is "simulate deterministic" or nothing.
SIX_PYRAMIDS = f"""\
protocol "six deep pyramids, each pulsed in turn"
circuit "{DEMO / 'slab.circuit.yaml'}" seed 5

cells:
    c1 is pyramidal_deep
    c2 is pyramidal_deep within 120 um of c1
    c3 is pyramidal_deep within 120 um of c1
    c4 is pyramidal_deep within 120 um of c1
    c5 is pyramidal_deep within 120 um of c1
    c6 is pyramidal_deep within 120 um of c1
    repeat 3

sweeps 2 every 10 s, lasting 180 ms
{{release}}
""" + "".join(f"record c{k}: current clamp\n" for k in range(1, 7)) + "".join(
    f"\nstimulate c{k}:\n    pulse 1.5 nA for 2 ms at {20 + 25 * (k - 1)} ms\n" for k in range(1, 7))

PULSE_ONSETS = {f"c{k}": 0.020 + 0.025 * (k - 1) for k in range(1, 7)}


@pytest.fixture(autouse=True)
def brian2_state():
    """Snapshot Brian2's target and clock and numpy's global generator; restore them after each test."""
    brian2 = pytest.importorskip("brian2")
    target, dt, rng_state = brian2.prefs["codegen.target"], brian2.defaultclock.dt, np.random.get_state()
    yield brian2
    brian2.prefs["codegen.target"] = target
    brian2.defaultclock.dt = dt
    np.random.set_state(rng_state)


def run_both(plan, monkeypatch, **options):
    """The plan run with and without shared objects: {merge: (recordings, built network)}."""
    seen = {}
    build = engine_run.build_network

    def keep(*args, **kwargs):
        seen["built"] = build(*args, **kwargs)
        return seen["built"]

    monkeypatch.setattr(engine_run, "build_network", keep)
    out = {}
    for merge in (True, False):
        rec = engine_run.run_plan(plan, target="numpy", merge=merge, **options)
        out[merge] = (rec, seen.pop("built"))
    return out


def object_counts(built) -> Counter:
    return Counter(type(obj).__name__ for obj in built.network.objects)


def assert_same_spikes(a, b, roles, rtol=1e-9):
    for role in roles:
        for rep_a, rep_b in zip(a.spikes[role], b.spikes[role], strict=True):
            for x, y in zip(rep_a, rep_b, strict=True):
                assert len(x) == len(y), role
                np.testing.assert_allclose(x, y, rtol=rtol, atol=0)


def test_six_pyramids_share_one_group_and_match_one_group_per_role(monkeypatch):
    # Reference: the build with one Brian2 object per role and per synapse plan (the engine whose
    # physics test_engine.py checks against closed forms). Sharing objects only concatenates
    # per-cell and per-synapse values, so deterministic runs agree to rounding.
    plan = protolang.loads(SIX_PYRAMIDS.format(release="simulate deterministic")).plan()
    assert plan.layout == "replicas" and not any(s.stochastic for s in plan.synapses)
    runs = run_both(plan, monkeypatch)
    (merged, built_m), (single, built_s) = runs[True], runs[False]
    roles = [r.name for r in plan.roles]

    for role in roles:
        assert merged.traces[role].shape == single.traces[role].shape == (3, 2, 1800)
        np.testing.assert_allclose(merged.traces[role], single.traces[role], rtol=1e-9, atol=0)
    assert_same_spikes(merged, single, roles)
    assert merged.meta["n_synapses"] == single.meta["n_synapses"]
    assert merged.meta["notes"] == single.meta["notes"]

    # not a vacuous comparison: every cell fires at its pulse, and some pairs are connected
    for role in roles:
        for rep in merged.spikes[role]:
            for sweep in rep:
                assert np.any(np.abs(sweep - PULSE_ONSETS[role] - 1e-3) < 1.5e-3), role
    connected = [s for s in plan.synapses if merged.meta["n_synapses"][s.name] > 0]
    assert len(connected) >= 2

    # one group for the six roles, fewer Synapses objects, one monitor of each kind
    counts_m, counts_s = object_counts(built_m), object_counts(built_s)
    assert counts_m["NeuronGroup"] == 1 and counts_s["NeuronGroup"] == 6
    assert counts_m["Synapses"] < counts_s["Synapses"] == len(connected)
    assert counts_m["StateMonitor"] == counts_m["SpikeMonitor"] == 1
    assert list(built_m.groups.values()) == [roles]
    assert [built_m.blocks[r].start for r in roles] == [k * 6 for k in range(6)]
    assert list(built_s.groups) == [f"cell_{r}" for r in roles]
    assert merged.meta["merged_objects"]["cells_c1_c2_c3_c4_c5_c6"] == roles


def test_stochastic_release_merged_and_unmerged_agree_where_they_must(monkeypatch):
    # With stochastic release the shared Synapses object draws its random numbers for all its
    # synapses in one call, in another order than one object per synapse plan does, so the two
    # runs see other release outcomes: equal statistics, not equal samples. What cannot depend
    # on release must agree exactly: every trace until the first release can reach a cell, and
    # the spikes of c1, pulsed first, before any release has happened.
    plan = protolang.loads(SIX_PYRAMIDS.format(release="")).plan()
    assert all(s.stochastic for s in plan.synapses)
    runs = run_both(plan, monkeypatch)
    (merged, built_m), (single, built_s) = runs[True], runs[False]
    assert merged.meta["n_synapses"] == single.meta["n_synapses"]
    assert object_counts(built_m)["Synapses"] < object_counts(built_s)["Synapses"]

    assert_same_spikes(merged, single, ["c1"], rtol=0)
    first_spike = min(float(s[0]) for rep in merged.spikes["c1"] for s in rep)
    earliest_delay = min(float(s.delay[s.connected].min()) for s in plan.synapses if s.connected.any())
    quiet = merged.time < first_spike + earliest_delay
    for role in merged.traces:
        np.testing.assert_array_equal(merged.traces[role][..., quiet], single.traces[role][..., quiet])
    # both runs: each cell fires once per sweep, at its pulse
    for rec in (merged, single):
        for role, onset in PULSE_ONSETS.items():
            for rep in rec.spikes[role]:
                for sweep in rep:
                    assert len(sweep) == 1 and 0 < sweep[0] - onset < 2.5e-3, (role, sweep)


def _mixed_roles(layout: str):
    """Roles that may or may not share a group: waveforms, step families, noise, a clamp."""
    n = 2
    family = WaveSegment("square", 0.004, 0.012, per_sweep=np.array([-20e-12, 40e-12]))
    other_family = WaveSegment("square", 0.006, 0.014, per_sweep=np.array([30e-12, 60e-12]))
    noise = NoiseSpec(5e-12, 0.0, 2e-3, 0.002, 0.015)        # sd 0: deterministic, still a noise input
    roles = [cell("a", n, recorded=True, pulses=[CurrentPulse(0.003, 0.004, 50e-12)], **PASSIVE),
             cell("b", n, recorded=True, pulses=[CurrentPulse(0.008, 0.004, 80e-12)],
                  **dict(PASSIVE, C=150e-12)),
             cell("c", n, recorded=True, **PASSIVE),
             cell("d", n, recorded=False, **PASSIVE),
             cell("e", n, recorded=True, **PASSIVE), cell("f", n, recorded=True, **PASSIVE),
             cell("g", n, recorded=True, **PASSIVE), cell("h", n, recorded=True, **PASSIVE)]
    roles[4].noise = [noise]
    roles[5].noise = [NoiseSpec(**dict(vars(noise)))]
    roles[6].segments = [family]
    roles[7].segments = [other_family]
    clamped = cell("v", n, recorded=True, **PASSIVE)
    clamped.mode, clamped.holding_potential, clamped.series_resistance = "voltage clamp", -0.07, 10e6
    roles.append(clamped)
    return make_plan(roles, n_repeat=n, n_sweeps=2, layout=layout, dt=5e-5, sweep_length=0.02, interval=0.3)


@pytest.mark.parametrize("layout, groups", [
    # replicas: every waveform is read through a per-cell column index, families included
    ("replicas", [["a", "b", "g", "h"], ["c", "d"], ["e", "f"], ["v"]]),
    # sequential: a waveform that changes from sweep to sweep has its own column slot
    ("sequential", [["a", "b"], ["c", "d"], ["e", "f"], ["g"], ["h"], ["v"]]),
])
def test_which_roles_share_a_group(monkeypatch, layout, groups):
    # Roles merge only when their equations and namespaces come out identical; a cell without a
    # waveform is not given an empty one. Traces agree with one group per role in both layouts.
    plan = _mixed_roles(layout)
    runs = run_both(plan, monkeypatch)
    (merged, built), (single, _) = runs[True], runs[False]
    assert sorted(built.groups.values()) == sorted(groups)
    for role in merged.traces:
        np.testing.assert_allclose(merged.traces[role], single.traces[role], rtol=1e-9, atol=0)
    assert set(merged.traces) == {r.name for r in plan.roles if r.recorded}
    assert_same_spikes(merged, single, [r.name for r in plan.roles])
    assert merged.meta["trace_units"] == single.meta["trace_units"]
    # the stimulus did reach its own cells: a and b move, c stays at rest
    assert np.ptp(merged.traces["a"]) > 1e-4 and np.ptp(merged.traces["b"]) > 1e-4
    assert np.ptp(merged.traces["c"]) < 1e-9


def test_inputs_reach_their_own_role_inside_a_shared_group(monkeypatch):
    # Three roles in one group: Poisson input on 'b', extracellular activation of 'c', nothing
    # reaching 'a' ('a' and 'c' carry a Poisson input of rate 0, which is left out but gives them
    # the same receptor set). The Poisson draws come from the same named Poisson groups either
    # way, so merged and unmerged runs agree exactly.
    n = 3
    roles = [cell(name, n, recorded=True, **PASSIVE) for name in ("a", "b", "c")]
    silent = PoissonSpec(0.0, 0.5e-9, "AMPA", 0.005, 0.045)
    roles[0].poisson = [silent]
    roles[1].poisson = [PoissonSpec(300.0, 0.5e-9, "AMPA", 0.005, 0.045)]
    roles[2].poisson = [silent]
    m = 4
    act = ActivationPlan(
        name="act_c", target="c", cell_class="x", pathway="x->c", fraction=0.5, times=np.array([0.02]),
        source_repeat=np.array([0, 1, 1, 2]), source_ids=np.arange(m), n_sites=np.full(m, 3),
        site_conductance=np.full(m, 2e-9), U=np.full(m, 0.5), U_reference=np.full(m, 0.5),
        D=np.full(m, 0.2), F=np.zeros(m), delay=np.full(m, 1e-3), receptors={"AMPA": 1.0}, stochastic=False)
    plan = make_plan(roles, n_repeat=n, n_sweeps=2, sweep_length=0.05, seed=9)
    plan.activations = [act]
    runs = run_both(plan, monkeypatch)
    (merged, built), (single, _) = runs[True], runs[False]
    assert list(built.groups.values()) == [["a", "b", "c"]]
    for role in ("a", "b", "c"):
        np.testing.assert_array_equal(merged.traces[role], single.traces[role])
    for key in single.inputs:
        for rep_m, rep_s in zip(merged.inputs[key], single.inputs[key], strict=True):
            for x, y in zip(rep_m, rep_s, strict=True):
                np.testing.assert_array_equal(x, y)
    t = merged.time
    assert sum(len(s) for rep in merged.inputs["b_poisson_0"] for s in rep) > 10
    assert np.ptp(merged.traces["a"]) < 1e-12                        # nothing reaches 'a'
    assert np.all(np.ptp(merged.traces["b"][..., t < 0.02], axis=-1) > 1e-5)
    before = merged.traces["c"][..., t < 0.02]
    assert np.ptp(before) < 1e-12                                    # no Poisson events on 'c'
    jump = merged.traces["c"][..., (t > 0.0215) & (t < 0.03)].max(axis=-1) - before.mean(axis=-1)
    assert np.all(jump > 0.1e-3)                                     # every repeat has a source


def test_release_recording_keeps_posts_apart_and_matches(monkeypatch):
    # record_release gives each postsynaptic role its own accumulators, so those roles stay
    # alone, while the presynaptic cells q1 and q2 (no synapse onto them) still share a group:
    # the release of q2 -> p1 must be read against q2's own spikes. Without record_release the
    # two posts share a group too.
    n = 2
    roles = [cell("pre", n, spike_times=[0.005, 0.015]),
             cell("q1", n, recorded=True, pulses=[CurrentPulse(0.004, 0.002, 5e-9)]),
             cell("q2", n, recorded=True, pulses=[CurrentPulse(0.010, 0.002, 5e-9)]),
             cell("p1", n, recorded=True, **PASSIVE), cell("p2", n, recorded=True, **dict(PASSIVE, C=300e-12))]
    syns = [synapse("pre_to_p1", "pre", "p1", n, U=0.4, D=0.2, n_sites=4, stochastic=False),
            synapse("pre_to_p2", "pre", "p2", n, U=0.6, D=0.1, n_sites=2, g=2e-9, stochastic=False,
                    connected=[True, False]),
            synapse("q2_to_p1", "q2", "p1", n, U=0.3, D=0.2, n_sites=5, stochastic=False)]
    plan = make_plan(roles, syns, n_repeat=n, sweep_length=0.03)
    recorded = run_both(plan, monkeypatch, record_release=True)
    plain = run_both(plan, monkeypatch)
    assert sorted(recorded[True][1].groups.values()) == [["p1"], ["p2"], ["pre"], ["q1", "q2"]]
    assert sorted(plain[True][1].groups.values()) == [["p1", "p2"], ["pre"], ["q1", "q2"]]
    # pre -> p1 and pre -> p2 join one Synapses object, q2 -> p1 (from another group) keeps its own
    assert object_counts(plain[True][1])["Synapses"] == 2
    assert plain[True][1].merged["syns_pre_to_p1_pre_to_p2"] == ("synapse", ("pre_to_p1", "pre_to_p2"))
    assert plain[True][0].meta["n_synapses"] == {"pre_to_p1": 2, "pre_to_p2": 1, "q2_to_p1": 2}
    for role in ("q1", "q2"):
        assert all(len(s) == 1 for rep in plain[True][0].spikes[role] for s in rep)
    for role in ("p1", "p2"):
        np.testing.assert_allclose(plain[True][0].traces[role], recorded[True][0].traces[role], rtol=1e-9, atol=0)
        np.testing.assert_allclose(plain[True][0].traces[role], plain[False][0].traces[role], rtol=1e-9, atol=0)
    got, reference = recorded[True][0].release, recorded[False][0].release
    for name in got:
        np.testing.assert_allclose(got[name], reference[name], rtol=1e-12, atol=0)
    # deterministic Tsodyks-Markram release n u R (Tsodyks and Markram 1997, PNAS 94:719): a lone
    # spike releases n U; the second spike 10 ms later finds R = 1 - U e^(-T/D)
    np.testing.assert_allclose(got["pre_to_p1"][0, 0], 4 * 0.4 * np.array([1, 1 - 0.4 * np.exp(-0.01 / 0.2)]),
                               rtol=1e-6)
    np.testing.assert_allclose(got["q2_to_p1"][:, 0, 0], [5 * 0.3, 5 * 0.3], rtol=1e-9)
    assert got["q2_to_p1"].shape == (n, 1, 1)
    assert np.isnan(got["pre_to_p2"][1]).all()


def test_errors_in_a_shared_group_name_the_right_roles(monkeypatch):
    # a runaway in repeat 1 of 'b' is reported for 'b' at its line, though 'a' shares its group
    pre = cell("pre", 2, spike_times=[0.002])
    small = dict(PASSIVE, C=10e-12, gL=1e-9, t_ref=0.0)
    a, b = cell("a", 2, recorded=True, **small), cell("b", 2, recorded=True, **small)
    syns = [synapse("pre_to_a", "pre", "a", 2, U=1.0, D=0.1, g=1e-9, stochastic=False),
            synapse("pre_to_b", "pre", "b", 2, U=1.0, D=0.1, g=np.array([1e-9, 1e-3]), stochastic=False)]
    spans = {"cell_a": "test.protocol:4:1", "cell_b": "test.protocol:5:1"}
    plan = make_plan([pre, a, b], syns, n_repeat=2, sweep_length=0.01, spans=spans)
    with pytest.raises(ProtocolError) as info:
        engine_run.run_plan(plan)
    text = str(info.value)
    assert text.startswith("test.protocol:5:1:") and "cell role 'b' (repeat 1, sweep 0)" in text

    # a Brian2 failure inside the shared group names every role in it, at the first one's line
    monkeypatch.setattr(models, "conductance_update", lambda terms: "g_AMPA = not_defined*siemens")
    with pytest.raises(ProtocolError) as info:
        engine_run.run_plan(plan)
    text = str(info.value)
    assert text.startswith("test.protocol:4:1: error:") and "cell roles 'a', 'b'" in text
    assert "not_defined" in text
