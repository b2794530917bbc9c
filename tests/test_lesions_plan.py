"""Lesions and embedded networks in the front end and the plan: syntax, checks, counts, regions."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

import protolang
from protolang.circuit import instantiate, load_circuit
from protolang.language import parse
from protolang.language.errors import ProtocolError
from protolang.language.format import format_protocol

DEMO = Path(__file__).resolve().parents[1] / "demo"
CIRCUIT = str(DEMO / "slab.circuit.yaml")

HEAD = f"""\
protocol "lesion test"
circuit "{CIRCUIT}" seed 3

cells:
    pre is pyramidal_deep
    post is pyramidal_deep within 150 um of pre, receiving from pre
    repeat 3

sweeps 2 every 1 s
record post: current clamp
stimulate pre:
    pulse 1.5 nA for 2 ms at 100 ms
measure post:
    responses to pre
"""


def load(tmp_path, extra: str, name="p.protocol"):
    path = tmp_path / name
    path.write_text(HEAD + extra)
    return protolang.load(path)


def errors_of(tmp_path, extra: str) -> str:
    with pytest.raises(ProtocolError) as info:
        load(tmp_path, extra).plan()
    return info.value.render() if hasattr(info.value, "render") else str(info.value)


def test_lesion_and_network_lines_round_trip():
    text = HEAD + """
lesions:
    remove basket_fast
    remove 50 % of all in layer deep within 200 um of post
    cut pyramidal_deep -> dendrite_targeting
    silence dendrite_targeting
    scale pyramidal_deep -> pyramidal_deep by 50 %

network:
    region within 300 um of post
    region in layer deep
    background poisson 2 kHz of 0.3 nS AMPA onto pyramidal_deep, basket_fast
    background noise mean 1 nS sd 0.5 nS tau 5 ms reversal 0 mV onto dendrite_targeting
"""
    p = parse(text)
    assert len(p.lesions) == 5 and p.network is not None
    assert parse(format_protocol(p)) == p


def test_removed_class_counts_and_selection_avoids_removed_cells(tmp_path):
    plan = load(tmp_path, "lesions:\n    remove 50 % of pyramidal_deep\n").plan()
    record = plan.lesions[0]
    assert record.kind == "remove" and record.cells == {"pyramidal_deep": 425}     # round(0.5 * 850)
    removed = set(record.removed_ids)
    assert len(removed) == 425
    for role in plan.roles:
        assert not removed & set(role.cell_ids.tolist())
    # the connection count is every circuit connection touching a removed cell
    inst = instantiate(load_circuit(CIRCUIT), 3)
    mask = np.zeros(inst.n_cells, bool)
    mask[list(removed)] = True
    assert sum(record.connections.values()) == int(np.sum(mask[inst.pre] | mask[inst.post]))


def test_lesions_are_reproducible(tmp_path):
    a = load(tmp_path, "lesions:\n    remove 30 % of all in layer deep\n").plan()
    b = load(tmp_path, "lesions:\n    remove 30 % of all in layer deep\n").plan()
    assert a.lesions[0].removed_ids == b.lesions[0].removed_ids
    inst = instantiate(load_circuit(CIRCUIT), 3)
    assert {inst.class_names[k] for k in inst.class_index[a.lesions[0].removed_ids]} <= {
        "pyramidal_deep", "basket_fast", "dendrite_targeting"}          # the deep layer's classes


def test_cut_and_scale_act_on_the_recorded_pathway(tmp_path):
    cut = load(tmp_path, "lesions:\n    cut pyramidal_deep -> pyramidal_deep\n").plan()
    syn = next(s for s in cut.synapses if s.name == "pre_to_post")
    assert not syn.connected.any()
    assert any("cut by a lesion" in n for n in cut.notes)
    base = load(tmp_path, "").plan()
    half = load(tmp_path, "lesions:\n    scale pyramidal_deep -> pyramidal_deep by 50 %\n").plan()
    s0 = next(s for s in base.synapses if s.name == "pre_to_post")
    s1 = next(s for s in half.synapses if s.name == "pre_to_post")
    np.testing.assert_allclose(s1.site_conductance, 0.5 * s0.site_conductance)


def test_silenced_role(tmp_path):
    plan = load(tmp_path, "lesions:\n    silence pyramidal_deep\n").plan()
    assert plan.role("pre").silenced and plan.role("post").silenced


def test_distance_bound_removal_is_per_repeat_and_spares_selected_cells(tmp_path):
    plan = load(tmp_path, "lesions:\n    remove all within 100 um of post\n").plan()
    record = plan.lesions[0]
    assert record.per_repeat and len(record.removed_ids) == 3
    inst = instantiate(load_circuit(CIRCUIT), 3)
    for r, ids in enumerate(record.removed_ids):
        post, pre = plan.role("post").cell_ids[r], plan.role("pre").cell_ids[r]
        assert post not in ids and pre not in ids
        d = inst.distance(np.full(len(ids), post), np.array(ids, dtype=int))
        assert (d <= 100e-6).all()
        # every cell that close is gone, except the two selected ones
        near = np.flatnonzero(inst.distance(np.full(inst.n_cells, post), np.arange(inst.n_cells)) <= 100e-6)
        assert set(near) - {pre, post} == set(ids)


@pytest.mark.parametrize("extra, needle, where", [
    ("lesions:\n    remove basket_fats\n", "did you mean 'basket_fast'", ":16:12:"),
    ("lesions:\n    remove 150 % of basket_fast\n", "cannot exceed 100 %", ":16:12:"),
    ("lesions:\n    cut pyramidal_upper -> pyramidal_updeep\n", "unknown cell class", ":16:5:"),
    ("lesions:\n    cut basket_fast -> dendrite_targeting\n", "no pathway basket_fast -> dendrite_targeting",
     ":16:5:"),
    ("lesions:\n    remove basket_fast in layer dep\n", "unknown layer 'dep'", ":16:24:"),
    # the whole class gone: the error points at the selection that can no longer be made
    ("lesions:\n    remove pyramidal_deep\n", "every pyramidal_deep cell is removed", ":5:12:"),
    ("lesions:\n    scale pyramidal_deep -> basket_fast by 2 mV\n", "percentage or a plain number", ":16:44:"),
    ("lesions:\n    remove 10 % of basket_fast within 50 um of nobody\n", "unknown cell 'nobody'", ":16:48:"),
])
def test_lesion_errors_name_the_line(tmp_path, extra, needle, where):
    text = errors_of(tmp_path, extra)
    assert needle in text
    assert "p.protocol" + where in text, text


def test_cutting_a_missing_pathway_lists_those_the_circuit_has(tmp_path):
    text = errors_of(tmp_path, "lesions:\n    cut basket_fast -> dendrite_targeting\n")
    assert "pyramidal_deep->basket_fast" in text and "p.protocol:16:5" in text


NET = """
network:
    region within {radius} um of post
    background poisson 1 kHz of 0.2 nS AMPA onto pyramidal_deep
simulate embedded{memory}
"""


def test_embedded_plan_builds_the_region_only(tmp_path):
    plan = load(tmp_path, NET.format(radius=150, memory="")).plan()
    assert plan.mode == "embedded" and plan.layout == "sequential"
    net = plan.network
    pop = net.population
    inst = instantiate(load_circuit(CIRCUIT), 3)
    for r in range(3):
        post = plan.role("post").cell_ids[r]
        mine = pop.cell_ids[pop.repeat == r]
        near = np.flatnonzero(inst.distance(np.full(inst.n_cells, post), np.arange(inst.n_cells)) <= 150e-6)
        assert set(mine) == set(near) - {post, plan.role("pre").cell_ids[r]}
    # every population-to-population connection is a circuit connection inside one repeat's region
    e = next(e for e in net.edges if e.pre == "network" and e.post == "network" and "AMPA" in e.weights)
    a, b = pop.cell_ids[e.pre_index], pop.cell_ids[e.post_index]
    assert inst.connected(a, b).all() and (pop.repeat[e.pre_index] == pop.repeat[e.post_index]).all()
    # the selected cells get the background drive as their own Poisson input
    assert plan.role("post").poisson and plan.role("post").poisson[0].rate == 1000.0


def test_embedded_removed_class_has_no_cells_or_connections(tmp_path):
    plan = load(tmp_path, "lesions:\n    remove basket_fast\n" + NET.format(radius=250, memory="")).plan()
    pop = plan.network.population
    k = pop.class_names.index("basket_fast")
    assert not np.any(pop.class_index == k)
    for e in plan.network.edges:
        names = [plan.network.pathways[i] for i in np.unique(e.pathway)]
        assert not any("basket_fast" in n for n in names)


def test_embedded_network_too_large_is_refused(tmp_path):
    text = errors_of(tmp_path, NET.format(radius=400, memory=", memory 100 MB"))
    assert "more than the limit of 0.10 GB" in text and "GB" in text


def test_empty_region_is_an_error(tmp_path):
    text = errors_of(tmp_path, NET.format(radius=1, memory=""))
    assert "holds no cell besides the selected ones" in text


def test_network_measure_needs_a_network(tmp_path):
    text = errors_of(tmp_path, "measure network:\n    activity\n")
    assert "needs an embedded network" in text


def test_simulate_embedded_needs_a_network_block(tmp_path):
    with pytest.raises(ProtocolError, match="without a 'network:' block"):
        load(tmp_path, "simulate embedded\n")


def test_discarding_the_whole_sweep_is_an_error(tmp_path):
    text = errors_of(tmp_path, NET.format(radius=150, memory="") + "measure network:\n    activity, discard 2 s\n")
    assert "leaves nothing of a 402 ms sweep" in text and ":21:15:" in text


def test_background_errors_point_at_the_word(tmp_path):
    text = errors_of(tmp_path, NET.format(radius=150, memory="").replace(
        "0.2 nS AMPA onto pyramidal_deep", "0.2 nS AMPX onto pyramidal_deep, basket_fats"))
    assert "unknown receptor 'AMPX'" in text and "unknown cell class 'basket_fats'" in text
    assert "p.protocol:18:40:" in text and "p.protocol:18:66:" in text
