"""Circuit layer: the demo file, schema errors with file:line:col, instantiation, demo cell behaviour."""

from __future__ import annotations

import dataclasses
import math
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.stats import binomtest

from protolang.circuit.build import ENGINE_PARAMETERS, instantiate
from protolang.circuit.schema import load_circuit
from protolang.language.errors import ProtocolError

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "demo" / "slab.circuit.yaml"
CLASSES = ("pyramidal_upper", "pyramidal_deep", "basket_fast", "dendrite_targeting")
DT = 0.025e-3          # the project's default time step
PULSE = (1.5e-9, 2e-3)  # the demo's presynaptic pulse: 1.5 nA for 2 ms


@pytest.fixture(scope="module")
def circuit():
    return load_circuit(DEMO)


@pytest.fixture(scope="module")
def inst(circuit):
    return instantiate(circuit, 7)


# --- the demo file ------------------------------------------------------------------
def test_demo_loads_and_says_it_is_invented(circuit):
    text = DEMO.read_text()
    assert "INVENTED" in text.splitlines()[0]
    assert "invented" in circuit.note.lower() and "fitted to no data set" in circuit.note
    assert tuple(circuit.classes) == CLASSES
    assert 1500 <= circuit.n_cells <= 2500
    assert len(circuit.pathways) >= 8
    assert circuit.extent == pytest.approx((400e-6, 400e-6))
    assert circuit.bath.calcium == pytest.approx(2.0) and circuit.bath.magnesium == pytest.approx(1.0)
    rel = circuit.release
    assert (rel.calcium_reference, rel.half_activation, rel.hill) == pytest.approx((2.0, 1.2, 4.0))
    assert circuit.receptors["NMDA"].mg_block and not circuit.receptors["AMPA"].mg_block
    assert circuit.receptors["GABA_A"].reversal == pytest.approx(-75e-3)
    assert len(circuit.sha256) == 64
    for name in ("pyramidal_deep->pyramidal_deep", "pyramidal_upper->pyramidal_upper",
                 "pyramidal_deep->dendrite_targeting", "pyramidal_upper->dendrite_targeting",
                 "pyramidal_upper->basket_fast", "pyramidal_deep->basket_fast",
                 "basket_fast->pyramidal_deep", "dendrite_targeting->pyramidal_deep",
                 "basket_fast->basket_fast", "pyramidal_upper->pyramidal_deep"):
        assert name in circuit.pathways


def test_demo_short_term_dynamics_differ(circuit):
    dd = circuit.pathways["pyramidal_deep->pyramidal_deep"]
    assert 0.4 <= dd.U.center <= 0.6 and 0.6 <= dd.D.center <= 0.8 and dd.F.center <= 0.02
    assert 4 <= dd.sites.center <= 7 and set(dd.receptors) == {"AMPA", "NMDA"}
    fac = circuit.pathways["pyramidal_deep->dendrite_targeting"]
    assert 0.05 <= fac.U.center <= 0.1 and 0.1 <= fac.D.center <= 0.2 and 0.5 <= fac.F.center <= 0.8
    assert set(circuit.pathways["basket_fast->pyramidal_deep"].receptors) == {"GABA_A"}


def test_spans_point_at_the_file_lines(circuit):
    lines = DEMO.read_text().splitlines()
    span = circuit.spans["pathways[0].release.U"]
    assert lines[span.line - 1].strip().startswith("U:")
    assert lines[span.line - 1][span.column - 1] == "U"     # a mapping value: cite its key
    span = circuit.spans["pathways[0].conduction.latency"]   # a plain value: cite the value
    assert lines[span.line - 1][span.column - 1:].startswith("0.8 ms")
    span = circuit.spans["classes.basket_fast"]
    assert lines[span.line - 1].strip() == "basket_fast:"
    assert circuit.pathways["basket_fast->basket_fast"].span.line > span.line


def test_release_law_is_a_hill_law(circuit):
    rel = circuit.release
    assert rel.relative_release(2.0) == pytest.approx(1.0)
    # closed form of the Hill function at 1 mM against the 2 mM reference
    expected = (1 / (1 + 1.2 ** 4)) / (2 ** 4 / (2 ** 4 + 1.2 ** 4))
    assert rel.relative_release(1.0) == pytest.approx(expected, rel=1e-12)
    # fourth-power law well below half activation: halving calcium divides release by 2^4
    # (Dodge and Rahamimoff 1967, J Physiol)
    assert rel.relative_release(0.01) / rel.relative_release(0.02) == pytest.approx(1 / 16, rel=1e-3)


# --- instantiation ------------------------------------------------------------------
def _arrays(i):
    out = {"positions": i.positions, "class_index": i.class_index, "pre": i.pre, "post": i.post}
    out.update({f"param_{k}": v for k, v in i.params_of(np.arange(i.n_cells)).items()})
    out.update({f"conn_{k}": v for k, v in i.connection_params(i.pre, i.post).items()})
    return out


def test_instantiate_is_deterministic(circuit, inst):
    again = _arrays(instantiate(circuit, 7))
    for key, value in _arrays(inst).items():
        assert np.array_equal(value, again[key]), key
    other = _arrays(instantiate(circuit, 8))
    assert not np.array_equal(other["positions"], again["positions"])
    assert not np.array_equal(other["param_C"], again["param_C"])
    assert other["pre"].shape != again["pre"].shape or not np.array_equal(other["pre"], again["pre"])


def test_dropping_a_pathway_reshuffles_nothing_else(circuit, inst):
    dropped = "pyramidal_upper->pyramidal_upper"
    fewer = dataclasses.replace(circuit, pathways={k: v for k, v in circuit.pathways.items()
                                                   if k != dropped})
    small = instantiate(fewer, 7)
    assert np.array_equal(small.positions, inst.positions)
    for k in ENGINE_PARAMETERS:
        assert np.array_equal(small.params_of(np.arange(small.n_cells))[k],
                              inst.params_of(np.arange(inst.n_cells))[k])
    kept = np.isin(inst.pathway_index, [p.index for n, p in circuit.pathways.items() if n != dropped])
    assert np.array_equal(small.pre, inst.pre[kept]) and np.array_equal(small.post, inst.post[kept])
    a, b = small.connection_params(small.pre, small.post), inst.connection_params(inst.pre[kept],
                                                                                  inst.post[kept])
    for k in a:
        assert np.array_equal(a[k], b[k]), k


def test_instantiate_is_fast(circuit):
    start = time.perf_counter()
    instantiate(circuit, 3)
    assert time.perf_counter() - start < 1.5   # about 0.2 s on the development machine


def test_cells_sit_in_their_layer(circuit, inst):
    assert inst.n_cells == circuit.n_cells == inst.positions.shape[0]
    for k, name in enumerate(inst.class_names):
        ids = inst.ids_of(name)
        assert len(ids) == circuit.classes[name].count and np.all(inst.class_index[ids] == k)
        layer = circuit.layers[circuit.classes[name].layer]
        pos = inst.positions[ids]
        assert np.all((pos[:, :2] >= 0) & (pos[:, :2] <= 400e-6))
        assert np.all((pos[:, 2] >= layer.top) & (pos[:, 2] <= layer.bottom))
    with pytest.raises(KeyError, match="did you mean 'basket_fast'"):
        inst.ids_of("basket_fats")


def test_drawn_parameters_follow_the_file(circuit, inst):
    # sample mean and median within 5 standard errors of the file's values
    ids = inst.ids_of("pyramidal_deep")
    p = inst.params_of(ids)
    c = circuit.classes["pyramidal_deep"].parameters
    n = len(ids)
    assert abs(p["C"].mean() - c["C"].center) < 5 * c["C"].spread / math.sqrt(n)
    # the standard error of a sample median is about 1.25 times that of the mean
    log_median_error = 1.25 * c["gL"].spread / math.sqrt(n)
    assert abs(np.log(np.median(p["gL"])) - math.log(c["gL"].center)) < 5 * log_median_error
    assert np.all(p["DeltaT"] == 2e-3) and np.all(p["Vcut"] == -30e-3)
    assert np.all(p["b"] > 0) and np.all(p["C"] > 0)
    assert np.all(inst.params_of(inst.ids_of("basket_fast"))["a"] == 0.0)


def test_connection_parameters(circuit, inst):
    assert inst.n_connections > 0
    assert not np.any(inst.pre == inst.post)                      # no self-connections
    cp = inst.connection_params(inst.pre, inst.post)
    assert np.all(cp["n_sites"] >= 1) and np.all(np.isfinite(cp["U"]))
    assert np.all((cp["U"] >= 0) & (cp["U"] <= 1)) and np.all(cp["D"] > 0) and np.all(cp["F"] >= 0)
    assert np.all(cp["site_conductance"] > 0)
    for name, p in circuit.pathways.items():
        m = inst.pathway_index == p.index
        d = inst.distance(inst.pre[m], inst.post[m])
        assert np.all(d <= p.max_distance)
        assert np.allclose(cp["delay"][m], p.latency + d / p.velocity, rtol=1e-12)
        if p.sites.maximum is not None:
            assert cp["n_sites"][m].max() <= p.sites.maximum
        assert np.all(inst.class_of(inst.pre[m]) == p.pre) and np.all(inst.class_of(inst.post[m]) == p.post)
    # pairs without a connection: n_sites 0 and NaN elsewhere
    basket = inst.ids_of("basket_fast")[:5]
    upper = inst.ids_of("pyramidal_upper")[:5]
    none = inst.connection_params(basket, upper)                  # no such pathway in the file
    assert np.all(none["n_sites"] == 0) and np.all(np.isnan(none["U"]))
    assert not inst.connected(basket, upper).any()
    assert inst.pathway_of("basket_fast", "pyramidal_upper") is None
    # elementwise broadcasting and the neighbour lists agree with connected()
    pre = inst.pre[100]
    targets = inst.targets_of(pre)
    assert inst.connected(pre, targets).all() and inst.post[100] in targets
    everyone = np.arange(inst.n_cells)
    assert np.array_equal(np.flatnonzero(inst.connected(pre, everyone)), targets)
    post = inst.post[100]
    assert np.array_equal(np.flatnonzero(inst.connected(everyone, post)), inst.sources_of(post))


def _probability_bins(inst, p, width=50e-6):
    pre, post = inst.ids_of(p.pre), inst.ids_of(p.post)
    d = inst.distance(pre[:, None], post[None, :])
    hit = inst.connected(pre[:, None], post[None, :])
    valid = pre[:, None] != post[None, :]
    edges = np.arange(0.0, p.max_distance + width, width)
    rows = []
    for lo, hi in zip(edges[:-1], edges[1:]):
        m = valid & (d >= lo) & (d < hi)
        if m.sum() >= 50:
            rows.append((int(hit[m].sum()), int(m.sum()), d[m]))
    beyond = valid & (d > p.max_distance)
    return rows, int(hit[beyond].sum())


@pytest.mark.parametrize("name", ["pyramidal_deep->pyramidal_deep", "pyramidal_upper->basket_fast",
                                  "basket_fast->pyramidal_deep"])
def test_sampled_connection_probability_matches_the_rule(inst, name):
    # Binomial test per distance bin against the mean analytic p(d) of the bin's pairs;
    # Bonferroni over bins (common practice, no single source). Pairs within a bin have
    # slightly different p, which makes the binomial test conservative.
    p = inst.circuit.pathways[name]
    rows, beyond = _probability_bins(inst, p)
    assert beyond == 0 and len(rows) >= 5
    alpha = 1e-3 / len(rows)
    for k, n, d in rows:
        expected = float(np.mean(inst.true_probability(p, d)))
        assert binomtest(k, n, expected).pvalue > alpha, (name, k, n, expected)
    # the same data must reject a rule with a 1.5x longer length constant
    wrong = dataclasses.replace(p, length_constant=1.5 * p.length_constant)
    worst = min(binomtest(k, n, float(np.mean(wrong.probability(d)))).pvalue for k, n, d in rows)
    assert worst < 1e-6


def test_true_probability_is_the_file_rule(inst):
    p = inst.circuit.pathways["pyramidal_deep->pyramidal_deep"]
    d = np.array([0.0, 150e-6, 300e-6, 499e-6, 501e-6])
    expected = 0.2 * np.exp(-d / 150e-6) * (d <= 500e-6)
    assert np.allclose(inst.true_probability("pyramidal_deep->pyramidal_deep", d), expected)
    with pytest.raises(KeyError):
        inst.true_probability("pyramidal_dep->pyramidal_deep", d)


def test_density_gives_a_count(tmp_path):
    text = DEMO.read_text().replace("    count: 130\n", "    density_per_mm3: 1000\n")
    path = tmp_path / "density.circuit.yaml"
    path.write_text(text)
    c = load_circuit(path)
    # 1000 per mm^3 in a 0.4 x 0.4 x 0.6 mm band
    assert c.classes["dendrite_targeting"].count == 96
    assert c.classes["dendrite_targeting"].density_per_mm3 == 1000


def test_a_spread_that_breaks_cells_is_reported_at_the_class(tmp_path):
    text = DEMO.read_text()
    old = "      V_reset: {mean: -62 mV, sd: 1 mV}"
    new = "      V_reset: {mean: -33 mV, sd: 3 mV}"
    assert text.count(old) == 1
    path = tmp_path / "spread.circuit.yaml"
    path.write_text(text.replace(old, new))
    c = load_circuit(path)   # the central values are fine ...
    with pytest.raises(ProtocolError) as info:
        instantiate(c, 1)    # ... but some drawn cells reset above V_cut
    line = text.replace(old, new)[: text.index(old)].count("\n") + 1
    msg = str(info.value)
    assert msg.startswith(f"{path}:{line}:16: error: classes.basket_fast.parameters.V_reset:")
    assert "Traceback" not in msg


# --- schema errors ------------------------------------------------------------------
def _where(text: str, needle: str | tuple[str, str]) -> tuple[int, int]:
    """Line and column of ``needle`` (or of ``inner`` inside a unique ``(needle, inner)``)."""
    needle, inner = needle if isinstance(needle, tuple) else (needle, needle)
    assert text.count(needle) == 1, needle
    i = text.index(needle) + needle.index(inner)
    return text[:i].count("\n") + 1, i - (text.rfind("\n", 0, i) + 1) + 1


def _pathway_index(text: str, needle: str | tuple[str, str]) -> int:
    needle = needle[0] if isinstance(needle, tuple) else needle
    return text[: text.index(needle)].count("\n  - pre:") - 1


# (name, old text, new text, where the caret must point (a unique part of the new text),
#  key path, further text the message must contain)
ERROR_CASES = [
    ("unknown key with did-you-mean",
     "connection: {peak_probability: 0.2, length_constant: 150 um",
     "connection: {peak_probability: 0.2, lenght_constant: 150 um",
     "lenght_constant", "pathways[0].connection.lenght_constant",
     "hint: did you mean 'length_constant'?"),
    ("missing required key",
     "U: {mean: 0.5, sd: 0.08}\n      D: {mean: 700 ms, sd: 120 ms}\n",
     "U: {mean: 0.5, sd: 0.08}\n",
     "U: {mean: 0.5, sd: 0.08}", "pathways[0].release", "missing required key 'D'"),
    ("wrong unit dimension",
     "C: {mean: 95 pF, sd: 3.8 pF}", "C: {mean: 95 mV, sd: 3.8 pF}",
     "95 mV", "classes.pyramidal_deep.parameters.C.mean", "needs a capacitance"),
    ("unit missing",
     "      tau_w: 50 ms\n", "      tau_w: 50\n",
     ("tau_w: 50\n", "50"), "classes.basket_fast.parameters.tau_w", "hint: add a unit, e.g. '50 ms'"),
    ("unknown unit",
     "reversal: -75 mV}", "reversal: -75 mv}",
     "-75 mv", "receptors.GABA_A.reversal", "hint: did you mean 'mV'?"),
    ("U above 1",
     "      U: {mean: 0.6, sd: 0.08}\n      D: {mean: 500 ms",
     "      U: 1.3\n      D: {mean: 500 ms",
     "1.3", "pathways[{i}].release.U", "must be between 0 and 1, got 1.3"),
    ("unknown class in a pathway",
     "  - pre: basket_fast               # depressing, perisomatic",
     "  - pre: basket_fats               # depressing, perisomatic",
     "basket_fats", "pathways[{i}].pre", "hint: did you mean 'basket_fast'?"),
    ("unknown receptor",
     "receptors: {GABA_A: 1.0}\n    release:\n      U: {mean: 0.35",
     "receptors: {GABAA: 1.0}\n    release:\n      U: {mean: 0.35",
     "GABAA", "pathways[{i}].receptors.GABAA", "hint: did you mean 'GABA_A'?"),
    ("negative count",
     "count: 130", "count: -130",
     "-130", "classes.dendrite_targeting.count", "must be at least 1, got -130"),
    ("unknown layer",
     "    layer: upper\n", "    layer: uper\n",
     ("layer: uper\n", "uper"), "classes.pyramidal_upper.layer", "hint: did you mean 'upper'?"),
    ("probability above 1",
     "peak_probability: 0.35,", "peak_probability: 1.35,",
     "1.35", "pathways[{i}].connection.peak_probability", "between 0 and 1"),
    ("reset above the spike cut",
     "      V_reset: {mean: -62 mV, sd: 1 mV}\n", "      V_reset: {mean: -20 mV, sd: 1 mV}\n",
     "{mean: -20 mV", "classes.basket_fast.parameters.V_reset", "must lie below V_cut"),
    ("decay shorter than rise",
     "GABA_A: {rise: 0.5 ms, decay: 8 ms", "GABA_A: {rise: 0.5 ms, decay: 0.2 ms",
     "0.2 ms", "receptors.GABA_A.decay", "must be longer than rise"),
    ("duplicate key",
     "  calcium: 2.0 mM\n", "  calcium: 2.0 mM\n  calcium: 1.0 mM\n",
     "calcium: 1.0 mM", "bath.calcium", "duplicate key 'calcium'"),
    ("lognormal without its name",
     "g_leak: {mean: 4 nS, sd: 0.3 nS}", "g_leak: {median: 4 nS, sigma: 0.3}",
     "{median: 4 nS", "classes.dendrite_targeting.parameters.g_leak",
     "hint: add 'distribution: lognormal'"),
    ("a count with a fraction",
     "sites: {mean: 8, sd: 2.0, max: 14}", "sites: {mean: 8, sd: 2.0, max: 14.5}",
     "14.5", "pathways[{i}].sites.max", "expected a whole number"),
    ("overlapping layers",
     "deep: {top: 500 um", "deep: {top: 450 um",
     "deep: {top: 450", "space.layers.deep", "overlaps layer 'upper'"),
    ("a tag that would run code is refused",
     "name: invented_sensory_slab", "name: !!python/object/apply:os.system ['exit 3']",
     "!!python", "", "YAML tag 'tag:yaml.org,2002:python/object/apply:os.system' is not accepted"),
]


@pytest.mark.parametrize("case", ERROR_CASES, ids=[c[0] for c in ERROR_CASES])
def test_schema_error(tmp_path, case):
    _, old, new, caret, key_path, extra = case
    text = DEMO.read_text()
    assert text.count(old) == 1, old
    bad = text.replace(old, new)
    line, col = _where(bad, caret)
    key_path = key_path.replace("{i}", str(_pathway_index(bad, caret)))
    path = tmp_path / "bad.circuit.yaml"
    path.write_text(bad)
    with pytest.raises(ProtocolError) as info:
        load_circuit(path)
    msg = str(info.value)
    first = msg.splitlines()[0]
    prefix = f"{path}:{line}:{col}: error: " + (f"{key_path}: " if key_path else "")
    assert first.startswith(prefix), (first, prefix)
    assert extra in msg
    assert "Traceback" not in msg
    assert len(info.value.diagnostics) == 1, msg      # one mistake, one message


def test_missing_file(tmp_path):
    path = tmp_path / "absent.circuit.yaml"
    with pytest.raises(ProtocolError) as info:
        load_circuit(path)
    msg = str(info.value)
    assert msg.startswith(f"{path}:1:1: error: cannot read circuit file")
    assert "Traceback" not in msg


@pytest.mark.parametrize("content, line, col, words", [
    ("name: x\nbath:\n\tcalcium: 2 mM\n", 3, 1, "found character '\\t'"),
    ("name: [a, b\nnote: c\n", 2, 5, "expected ',' or ']'"),
    ("name: x\n---\nname: y\n", 2, 1, "expected a single document"),
    ("", 1, 1, "circuit file is empty"),
    ("name: x\x07\n", 1, 8, "special characters"),
])
def test_malformed_yaml(tmp_path, content, line, col, words):
    path = tmp_path / "broken.circuit.yaml"
    path.write_text(content)
    with pytest.raises(ProtocolError) as info:
        load_circuit(path)
    msg = str(info.value)
    assert msg.startswith(f"{path}:{line}:{col}: error: ")
    assert words in msg and "Traceback" not in msg


def test_errors_are_collected(tmp_path):
    text = DEMO.read_text().replace("count: 130", "count: -130").replace(
        "reversal: -75 mV}", "reversal: -75 mv}")
    path = tmp_path / "two.circuit.yaml"
    path.write_text(text)
    with pytest.raises(ProtocolError) as info:
        load_circuit(path)
    lines = [d.span.line for d in info.value.diagnostics]
    assert len(lines) == 2 and lines == sorted(lines)


def test_wrong_shapes_are_errors(tmp_path):
    path = tmp_path / "shape.circuit.yaml"
    path.write_text("- just\n- a list\n")
    with pytest.raises(ProtocolError, match=r"shape.circuit.yaml:1:1: error: circuit: expected a "
                                            r"circuit mapping, got a list"):
        load_circuit(path)
    text = DEMO.read_text()
    path.write_text(text[: text.index("pathways:\n")] + "pathways: 3\n")
    with pytest.raises(ProtocolError, match="pathways: expected a list of pathways"):
        load_circuit(path)


# --- the demo cells (adaptive exponential integrate-and-fire) -----------------------
# C dV/dt = -gL (V - EL) + gL DeltaT exp((V - VT)/DeltaT) - w + I
# tau_w dw/dt = a (V - EL) - w;  V > Vcut: V -> Vr (held for t_ref), w -> w + b
# (Brette and Gerstner 2005, J Neurophysiol). Forward Euler, our own integration.
def _adex_rhs(p, V, w, I):
    expo = p["gL"] * p["DeltaT"] * np.exp(np.minimum((V - p["VT"]) / p["DeltaT"], 30.0))
    dV = (-p["gL"] * (V - p["EL"]) + expo - w + I) / p["C"]
    dw = (p["a"] * (V - p["EL"]) - w) / p["tau_w"]
    return dV, dw


def _adex_spikes(p, onsets, amplitude, width, t_end, dt=DT):
    """Spike times of every cell of ``p`` for square pulses at ``onsets`` (all cells at once)."""
    n_steps = int(round(t_end / dt))
    on = np.zeros(n_steps, dtype=bool)
    for t0 in onsets:
        on[int(round(t0 / dt)):int(round((t0 + width) / dt))] = True
    V = p["EL"].copy()
    w = np.zeros_like(V)
    free_at = np.full_like(V, -1.0)
    cells, times = [], []
    for s in range(n_steps):
        t = s * dt
        dV, dw = _adex_rhs(p, V, w, amplitude if on[s] else 0.0)
        V = np.where(t < free_at, p["Vr"], V + dt * dV)
        w = w + dt * dw
        fired = V > p["Vcut"]
        if fired.any():
            idx = np.flatnonzero(fired)
            cells.append(idx)
            times.append(np.full(idx.shape, t))
            V[idx] = p["Vr"][idx]
            w[idx] += p["b"][idx]
            free_at[idx] = t + p["t_ref"][idx]
    if not cells:
        return np.empty(0, int), np.empty(0)
    return np.concatenate(cells), np.concatenate(times)


def test_euler_integration_agrees_with_solve_ivp(circuit):
    # subthreshold response to a 0.3 nA, 2 ms pulse: Euler at 0.025 ms against scipy's
    # adaptive Runge-Kutta (an independent integrator)
    p = {k: np.array([v.center]) for k, v in circuit.classes["pyramidal_deep"].parameters.items()}
    dt, amp = DT, 0.3e-9
    k_on, k_off, n = 400, 480, 2400          # pulse from 10 ms to 12 ms, run to 60 ms
    V, w = p["EL"].copy(), np.zeros(1)
    euler = np.empty(n + 1)
    euler[0] = V[0]
    for s in range(n):
        I = amp if k_on <= s < k_off else 0.0
        dV, dw = _adex_rhs(p, V, w, I)
        V, w = V + dt * dV, w + dt * dw
        euler[s + 1] = V[0]

    def rhs(amp_now):
        def f(_, y):
            dV, dw = _adex_rhs(p, np.array([y[0]]), np.array([y[1]]), amp_now)
            return [dV[0], dw[0]]
        return f

    y0 = [p["EL"][0], 0.0]
    ref = np.empty(n + 1)
    for k0, k1, amp_now in ((0, k_on, 0.0), (k_on, k_off, amp), (k_off, n, 0.0)):
        span = (k0 * dt, k1 * dt)
        t_eval = np.clip(np.arange(k0, k1 + 1) * dt, *span)
        sol = solve_ivp(rhs(amp_now), span, y0, t_eval=t_eval, rtol=1e-9, atol=[1e-12, 1e-18],
                        max_step=0.05e-3)
        ref[k0:k1 + 1] = sol.y[0]
        y0 = sol.y[:, -1]
    assert np.max(euler) - p["EL"][0] > 2e-3            # a real response, not just rest
    assert np.max(np.abs(euler - ref)) < 0.05e-3         # within 0.05 mV


@pytest.mark.parametrize("seed", [1, 7])
def test_every_cell_fires_once_per_pulse_and_never_at_rest(circuit, seed):
    inst = instantiate(circuit, seed)
    p = inst.params_of(np.arange(inst.n_cells))
    t_pulse = 0.5
    cells, times = _adex_spikes(p, [t_pulse], PULSE[0], PULSE[1], t_end=0.8)
    assert not np.any(times < t_pulse), "a cell fired at rest without input"
    counts = np.bincount(cells, minlength=inst.n_cells)
    for name in CLASSES:
        ids = inst.ids_of(name)
        assert np.all(counts[ids] == 1), (name, np.bincount(counts[ids]))


@pytest.mark.parametrize("rate", [20.0, 50.0])
def test_every_cell_follows_a_train_of_pulses(circuit, inst, rate):
    # the demo protocols drive presynaptic cells with trains of the same pulse
    p = inst.params_of(np.arange(inst.n_cells))
    onsets = 0.2 + np.arange(8) / rate
    cells, times = _adex_spikes(p, onsets, PULSE[0], PULSE[1], t_end=onsets[-1] + 0.3)
    window = np.searchsorted(onsets, times, side="right")        # 0 = before the first pulse
    per_cell = np.zeros((inst.n_cells, 9), dtype=int)
    np.add.at(per_cell, (cells, window), 1)
    assert np.all(per_cell[:, 0] == 0) and np.all(per_cell[:, 1:] == 1), np.unique(per_cell, axis=0)


def test_deep_pyramid_pair_epsp_size(circuit, inst):
    # Mean unitary EPSP of pyramidal_deep -> pyramidal_deep at -70 mV, 1 mM magnesium:
    # expected conductance per spike = mean over connections of n_sites * U * site
    # conductance; AMPA and NMDA as unit-peak differences of exponentials (common
    # practice); NMDA magnesium block 1 / (1 + exp(-0.062 V/mV) [Mg]/3.57 mM)
    # (Jahr and Stevens 1990, J Neurosci).
    pw = circuit.pathways["pyramidal_deep->pyramidal_deep"]
    m = inst.pathway_index == pw.index
    cp = inst.connection_params(inst.pre[m], inst.post[m])
    g_total = float(np.mean(cp["n_sites"] * cp["U"] * cp["site_conductance"]))
    p = {k: v.center for k, v in circuit.classes["pyramidal_deep"].parameters.items()}
    hold, mg = -70e-3, circuit.bath.magnesium
    bias = p["gL"] * (hold - p["EL"]) - p["gL"] * p["DeltaT"] * math.exp((hold - p["VT"]) / p["DeltaT"]) \
        + p["a"] * (hold - p["EL"])
    V, w = hold, p["a"] * (hold - p["EL"])
    kinetics = []
    for rname, weight in pw.receptors.items():
        r = circuit.receptors[rname]
        t_peak = r.rise * r.decay / (r.decay - r.rise) * math.log(r.decay / r.rise)
        norm = math.exp(-t_peak / r.decay) - math.exp(-t_peak / r.rise)
        kinetics.append((weight, r, norm))
    peak = hold
    for s in range(int(0.2 / DT)):
        t = s * DT
        I = bias
        for weight, r, norm in kinetics:
            g = g_total * weight * (math.exp(-t / r.decay) - math.exp(-t / r.rise)) / norm
            block = 1 / (1 + math.exp(-0.062 * V * 1e3) * mg / 3.57) if r.mg_block else 1.0
            I -= g * block * (V - r.reversal)
        dV = (-p["gL"] * (V - p["EL"]) + p["gL"] * p["DeltaT"] * math.exp((V - p["VT"]) / p["DeltaT"])
              - w + I) / p["C"]
        w += DT * (p["a"] * (V - p["EL"]) - w) / p["tau_w"]
        V += DT * dV
        peak = max(peak, V)
    assert 0.5e-3 <= peak - hold <= 1.5e-3, (peak - hold) * 1e3


# --- import hygiene -----------------------------------------------------------------
def test_circuit_layer_imports_no_heavy_libraries():
    code = ("import sys, protolang.circuit, protolang.circuit.schema, protolang.circuit.build\n"
            "print(','.join(m for m in ('brian2', 'matplotlib', 'pandas') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT,
                         env={"PYTHONPATH": str(ROOT), "PATH": "/usr/bin:/bin"}, check=True)
    assert out.stdout.strip() == ""
