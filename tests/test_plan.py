"""Plan stage: names checked against the circuit, selection, calcium law, holding, layout."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

import protolang
from protolang.language.errors import ProtocolError
from protolang.engine.models import peak_factor
from protolang.plan.resolve import adex_bias, hill, release_factor

DEMO = Path(__file__).resolve().parents[1] / "demo"

BASE = """\
protocol "plan test"
circuit "{circuit}" seed 3

bath:
    calcium {ca} mM

cells:
    pre is {pre_class}
    post is pyramidal_deep within {dist} um of pre, receiving from pre
    repeat {repeat}

sweeps 4 every {interval} s

record pre: current clamp
record post: current clamp, holding -70 mV

stimulate pre:
    train 3 pulses of 1.5 nA for 2 ms at 20 Hz from 50 ms

measure post:
    responses to pre
"""


def make(tmp_path, name="p.protocol", **kw):
    fields = dict(circuit=str(DEMO / "slab.circuit.yaml"), ca="2.0", pre_class="pyramidal_deep",
                  dist=150, repeat=5, interval=10)
    fields.update(kw)
    path = tmp_path / name
    path.write_text(BASE.format(**fields))
    return protolang.load(path)


def test_plan_resolves_demo_selection(tmp_path):
    plan = make(tmp_path).plan()
    pre, post = plan.role("pre"), plan.role("post")
    assert pre.cell_ids.shape == (5,) and post.cell_ids.shape == (5,)
    syn = next(s for s in plan.synapses if s.name == "pre_to_post")
    assert syn.connected.all()                       # `receiving from` holds for every repeat
    d = np.linalg.norm(pre.positions - post.positions, axis=1)
    assert (d <= 150e-6 + 1e-12).all()
    assert len(set(pre.cell_ids)) == 5               # a fresh presynaptic cell per repeat
    assert [e.index for e in pre.events] == [1, 2, 3]
    assert np.allclose([e.time for e in pre.events], [0.05, 0.1, 0.15])


def test_selection_is_reproducible(tmp_path):
    a = make(tmp_path, "a.protocol").plan()
    b = make(tmp_path, "b.protocol").plan()
    assert (a.role("post").cell_ids == b.role("post").cell_ids).all()
    assert np.array_equal(a.synapses[0].U, b.synapses[0].U)


def test_hill_law_scales_release_probability(tmp_path):
    # Hill law with cooperativity 4 (Dodge and Rahamimoff 1967, J Physiol 193:419)
    lo = make(tmp_path, "lo.protocol", ca="1.0").plan()
    hi = make(tmp_path, "hi.protocol", ca="2.0").plan()
    law = lo.conditions["release_law"]
    expected = hill(1.0, law["half_activation"], law["hill"]) / hill(2.0, law["half_activation"], law["hill"])
    s_lo = next(s for s in lo.synapses if s.name == "pre_to_post")
    s_hi = next(s for s in hi.synapses if s.name == "pre_to_post")
    ok = s_hi.U < 1.0
    assert np.allclose(s_lo.U[ok] / s_hi.U[ok], expected, rtol=1e-12)
    # the fourth-power corollary: far below the half-activation, halving calcium divides release by 16
    class Law:
        calcium_reference, half_activation, hill = 2.0, 1000.0, 4.0
    assert release_factor(1.0, Law) == pytest.approx(1 / 16, rel=1e-6)


def test_holding_bias_is_adex_rest(tmp_path):
    # steady state of the adaptive exponential model (Brette and Gerstner 2005, J Neurophysiol):
    # 0 = gL(EL - v) + gL dT exp((v - VT)/dT) - a(v - EL) + I
    plan = make(tmp_path).plan()
    post = plan.role("post")
    p = post.params
    v = -0.070
    dv = p["gL"] * (p["EL"] - v) + p["gL"] * p["DeltaT"] * np.exp((v - p["VT"]) / p["DeltaT"]) \
        - p["a"] * (v - p["EL"]) + post.holding_current
    assert np.allclose(dv, 0.0, atol=1e-18)
    assert np.allclose(adex_bias(p, v), post.holding_current)


def test_peak_factor_gives_unit_peak():
    # difference of exponentials peaks at t = t1 t2/(t2 - t1) ln(t2/t1) (closed form, REFERENCES A2)
    rise, decay = 0.3e-3, 3e-3
    t = np.linspace(0, 0.03, 300001)
    g = peak_factor(rise, decay) * rise * decay / (decay - rise) * (np.exp(-t / decay) - np.exp(-t / rise))
    assert g.max() == pytest.approx(1.0, rel=1e-6)
    assert t[g.argmax()] == pytest.approx(rise * decay / (decay - rise) * math.log(decay / rise), abs=1e-7)


def test_layout_replicas_when_sweeps_independent(tmp_path):
    plan = make(tmp_path).plan()
    assert plan.layout == "replicas" and "independent" in plan.layout_reason


def test_layout_sequential_when_sweeps_interact(tmp_path):
    plan = make(tmp_path, interval=1).plan()
    assert plan.layout == "sequential" and "continuous time" in plan.layout_reason


@pytest.mark.parametrize("kw,line,col,needle", [
    (dict(pre_class="pyramidal_dep"), 8, 12, "did you mean 'pyramidal_deep'"),
    (dict(dist=1), 10, 5, "only 0 of 5 requested groups"),
    (dict(interval=0.1), 12, 16, "shorter than one sweep"),
])
def test_plan_errors_point_at_the_line(tmp_path, kw, line, col, needle):
    exp = make(tmp_path, **kw)
    with pytest.raises(ProtocolError) as info:
        exp.plan()
    text = str(info.value)
    assert f"p.protocol:{line}:{col}: error:" in text, text
    assert needle in text
    assert "^" in text


def test_selection_error_counts_candidates(tmp_path):
    with pytest.raises(ProtocolError) as info:
        make(tmp_path, dist=1).plan()
    text = str(info.value)
    assert "within 1 um of pre: 0 of" in text


def test_unknown_receptor_block(tmp_path):
    src = BASE.format(circuit=str(DEMO / "slab.circuit.yaml"), ca="2.0", pre_class="pyramidal_deep",
                      dist=150, repeat=2, interval=10).replace("calcium 2.0 mM", "calcium 2.0 mM\n    block NMAD")
    (tmp_path / "r.protocol").write_text(src)
    with pytest.raises(ProtocolError) as info:
        protolang.load(tmp_path / "r.protocol").check()
    assert "r.protocol:6:5: error: unknown receptor 'NMAD'" in str(info.value)
    assert "did you mean 'NMDA'" in str(info.value)


def test_missing_circuit_file(tmp_path):
    src = BASE.format(circuit="nowhere.yaml", ca="2.0", pre_class="pyramidal_deep", dist=150, repeat=2, interval=10)
    (tmp_path / "m.protocol").write_text(src)
    with pytest.raises(ProtocolError) as info:
        protolang.load(tmp_path / "m.protocol").check()
    assert "m.protocol:2:9: error: circuit file 'nowhere.yaml' not found" in str(info.value)


def test_cannot_hold_above_firing(tmp_path):
    src = BASE.format(circuit=str(DEMO / "slab.circuit.yaml"), ca="2.0", pre_class="pyramidal_deep",
                      dist=150, repeat=2, interval=10).replace("holding -70 mV", "holding -20 mV")
    (tmp_path / "h.protocol").write_text(src)
    with pytest.raises(ProtocolError) as info:
        protolang.load(tmp_path / "h.protocol").plan()
    assert "cannot be held at -20 mV" in str(info.value)


def test_fast_voltage_clamp_is_flagged_in_the_plan(tmp_path):
    # forward Euler diverges when Rs*C/(1 + Rs*gL) is shorter than ~2 steps (numerical analysis,
    # common practice); the plan says which integrator the clamped cell gets and why
    src = BASE.format(circuit=str(DEMO / "slab.circuit.yaml"), ca="2.0", pre_class="pyramidal_deep",
                      dist=150, repeat=2, interval=10).replace(
        "record post: current clamp, holding -70 mV", "record post: voltage clamp, holding -70 mV, series 0.2 MOhm")
    (tmp_path / "vc.protocol").write_text(src)
    plan = protolang.load(tmp_path / "vc.protocol").plan()
    post = plan.role("post")
    tau = 0.2e6 * post.params["C"] / (1 + 0.2e6 * post.params["gL"])
    assert tau.min() < 4 * plan.dt
    assert any("exponential Euler" in n for n in plan.notes)
    assert post.series_resistance == pytest.approx(0.2e6)
