"""Compile-once scans: one C++ standalone binary runs every point of a calcium scan, equal to the runtime target."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

import protolang
from protolang.engine.run import run_plan
from protolang.engine.standalone import run_points_standalone, structure_key

pytestmark = [pytest.mark.brian2, pytest.mark.slow]

DEMO = Path(__file__).resolve().parents[1] / "demo"

# A short deterministic paired recording of deep pyramids in the (invented) demo circuit, scanned
# over extracellular calcium: two pulses per sweep, no recording noise.
PROTOCOL = f"""\
protocol "compile once: deep pyramid pairs across calcium"
circuit "{DEMO / 'slab.circuit.yaml'}" seed 7
scan @ca: 1.0 mM, 1.5 mM, 2.0 mM
bath:
    calcium @ca
    magnesium 1.0 mM
cells:
    pre is pyramidal_deep
    post is pyramidal_deep within 150 um of pre, receiving from pre
    repeat {{repeat}}
sweeps 2 every 10 s, lasting 150 ms
simulate deterministic
record pre: current clamp
record post: current clamp, holding -70 mV
stimulate pre:
    train 2 pulses of 1.5 nA for 2 ms at 20 Hz from 20 ms
measure post:
    responses to pre
"""


def plans_of(repeat: int) -> list:
    exp = protolang.loads(PROTOCOL.format(repeat=repeat), str(DEMO / "compile_once.protocol"))
    return [exp.plan(k) for k in range(len(exp.points()))]


@pytest.fixture(scope="module")
def scan(tmp_path_factory):
    """The scan's plans, their standalone recordings (a cold project folder) and numpy's."""
    plans = plans_of(4)
    build_dir = tmp_path_factory.mktemp("standalone")
    standalone = run_points_standalone(plans, build_dir)
    runtime = [run_plan(plan, target="numpy") for plan in plans]
    return plans, standalone, runtime, build_dir


def first_epsp(recordings, plan) -> np.ndarray:
    """(repeat, sweep) amplitude of the postsynaptic response to the first presynaptic spike:
    peak within 40 ms after the spike minus the mean over the 2 ms before it."""
    post, time = recordings.traces["post"], recordings.time
    out = np.zeros(post.shape[:2])
    for r in range(plan.n_repeat):
        for s in range(plan.n_sweeps):
            spike = recordings.spikes["pre"][r][s][0]
            before = (time >= spike - 2e-3) & (time < spike)
            after = (time >= spike) & (time < spike + 40e-3)
            out[r, s] = post[r, s, after].max() - post[r, s, before].mean()
    return out


def test_each_point_equals_the_runtime_target(scan):
    plans, standalone, runtime, _ = scan
    assert len(standalone) == len(plans) == 3
    for plan, a, b in zip(plans, standalone, runtime):
        assert a.meta["target"] == "cpp_standalone" and b.meta["target"] == "numpy"
        assert set(a.traces) == set(b.traces) == {"pre", "post"}
        for role in a.traces:
            assert a.traces[role].shape == b.traces[role].shape == (4, 2, len(a.time))
            scale = np.abs(b.traces[role]).max()
            # same equations and numbers; only floating-point rounding may differ
            np.testing.assert_allclose(a.traces[role], b.traces[role], rtol=0, atol=1e-9 * scale)
        for role in a.spikes:
            for sa, sb in zip(a.spikes[role], b.spikes[role]):
                for ta, tb in zip(sa, sb):
                    np.testing.assert_allclose(ta, tb, rtol=0, atol=1e-12)
        assert sum(len(t) for rep in a.spikes["pre"] for t in rep) == 4 * 2 * 2
    # one binary served all three points
    projects = {rec.meta["standalone"]["project"] for rec in standalone}
    assert len(projects) == 1 and Path(projects.pop()).is_dir()
    assert [rec.meta["standalone"]["point"] for rec in standalone] == [0, 1, 2]


def test_response_follows_the_calcium_law(scan):
    plans, standalone, _, _ = scan
    law = plans[0].conditions["release_law"]
    n, half, ca_ref = law["hill"], law["half_activation"], law["calcium_reference"]

    def hill(ca):
        # Hill equation (Hill 1910, J Physiol 40:iv); the fourth-power calcium cooperativity of
        # transmitter release: Dodge and Rahamimoff 1967, J Physiol 193:419
        return ca ** n / (ca ** n + half ** n)

    calcium = [plan.conditions["calcium"] for plan in plans]
    assert calcium == pytest.approx([1.0, 1.5, 2.0])
    syn = plans[0].synapses[0]
    assert (syn.pre, syn.post) == ("pre", "post") and syn.connected.all()
    for plan, ca in zip(plans, calcium):
        expected = np.clip(syn.U_reference * hill(ca) / hill(ca_ref), 0, 1)
        np.testing.assert_allclose(plan.synapses[0].U, expected, rtol=1e-12)
    amp = [first_epsp(rec, plan) for rec, plan in zip(standalone, plans)]
    assert (amp[0] > 0.05e-3).all()
    # deterministic release: the first response releases sites*U of a full pool, so its
    # conductance scales with U exactly; the membrane adds a few per cent of nonlinearity
    # (driving force, magnesium block): under 1 % at these 0.2-1.5 mV amplitudes
    for k in (1, 2):
        u_ratio = plans[k].synapses[0].U / plans[0].synapses[0].U
        assert (u_ratio > 1.2).all()
        np.testing.assert_allclose(amp[k] / amp[0], u_ratio[:, None] * np.ones((1, 2)), rtol=0.02)
    # the two sweeps of a deterministic plan are identical
    np.testing.assert_allclose(amp[2][:, 0], amp[2][:, 1], rtol=1e-12)


def test_structure_key_groups_points_and_separates_other_structures():
    plans = plans_of(4)
    keys = [structure_key(plan) for plan in plans]
    assert len(set(keys)) == 1 and len(keys[0]) == 64
    assert structure_key(plans_of(5)[0]) != keys[0]


def test_plans_of_different_structure_are_refused(tmp_path):
    with pytest.raises(ValueError) as info:
        run_points_standalone([plans_of(4)[0], plans_of(5)[0]], tmp_path)
    assert "plan 2 of 2" in str(info.value) and "n_repeat: 4 against 5" in str(info.value)
    assert not any(tmp_path.iterdir())     # refused before generating or compiling anything


def test_compiled_project_serves_other_first_plan(scan):
    # the project folder now holds the build of the first point; compiling for the last point
    # reuses it, and every number still comes from the plan being run
    plans, standalone, _, build_dir = scan
    again = run_points_standalone([plans[2], plans[0]], build_dir)
    project = Path(again[0].meta["standalone"]["project"])
    assert project == Path(standalone[0].meta["standalone"]["project"])
    assert standalone[0].meta["standalone"]["compiled_now"] is True
    assert again[0].meta["standalone"]["compiled_now"] is False     # same code: make had nothing to do
    # each call removes its results and command-line arrays
    assert not list(project.glob("results_*")) and not list(project.glob("static_arrays/protolang_*"))
    for rec, earlier in zip(again, (standalone[2], standalone[0])):
        for role in rec.traces:
            np.testing.assert_array_equal(rec.traces[role], earlier.traces[role])


STOCHASTIC = f"""\
protocol "compile once: stochastic release across calcium"
circuit "{DEMO / 'slab.circuit.yaml'}" seed 11
scan @ca: 1.0 mM, 2.0 mM
bath:
    calcium @ca
    magnesium 1.0 mM
cells:
    pre is pyramidal_deep
    post is pyramidal_deep within 150 um of pre, receiving from pre
    repeat 40
sweeps 10 every 10 s, lasting 60 ms
record pre: current clamp
record post: current clamp, holding -70 mV
stimulate pre:
    pulse 1.5 nA for 2 ms at 20 ms
measure post:
    responses to pre
"""


def test_stochastic_release_follows_the_binomial_law(tmp_path):
    # quantal release as independent sites, each releasing with probability U (binomial):
    # del Castillo and Katz 1954, J Physiol 124:560; every sweep is an independent replica
    exp = protolang.loads(STOCHASTIC, str(DEMO / "compile_once_stochastic.protocol"))
    plans = [exp.plan(k) for k in range(2)]
    recordings = run_points_standalone(plans, tmp_path, record_release=True)
    failures = []
    for plan, rec in zip(plans, recordings):
        syn = plan.synapses[0]
        assert syn.stochastic and (syn.pre, syn.post) == ("pre", "post")
        released = rec.release[syn.name][:, :, 0]             # sites released at the first spike
        assert released.shape == (40, 10) and np.array_equal(released, np.round(released))
        n, u = syn.n_sites.astype(float)[:, None], syn.U[:, None]
        p_fail = (1 - u) ** n
        trials = released.size
        fail_se = np.sqrt(np.sum(p_fail * (1 - p_fail)) * released.shape[1]) / trials
        assert abs((released == 0).mean() - p_fail.mean()) < 4 * fail_se
        mean_se = np.sqrt(np.sum(n * u * (1 - u)) * released.shape[1]) / trials
        assert abs(released.mean() - (n * u).mean()) < 4 * mean_se
        failures.append((released == 0).mean())
    # fewer failures at the higher calcium, as the release law says
    assert failures[1] < failures[0]
