"""Multi-cell patches: syntax, expansion into cells, selection within the radius, sampling statistics
against the circuit's rule, and (Brian2) connections found by the lab's criterion."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

import protolang
from protolang.circuit import instantiate, load_circuit
from protolang.language import parse
from protolang.language.errors import ProtocolError
from protolang.language.format import format_protocol
from protolang.language.patch import expand_patches
from protolang.measure.anatomy import wilson_interval
from protolang.measure.registry import patch_collectors
from protolang.plan.select import select_cells

CIRCUIT = str(Path(__file__).resolve().parents[1] / "demo" / "slab.circuit.yaml")

TEXT = f"""\
protocol "patch test"
circuit "{CIRCUIT}" seed {{seed}}

cells:
    patch is {{n}} of pyramidal_deep within 100 um
    repeat {{repeat}}

sweeps {{sweeps}} every 8 s, lasting {{length}}

record patch: current clamp, holding -70 mV, noise 0.05 mV

stimulate patch in turn every 150 ms:
    pulse 1.5 nA for 2 ms at 40 ms

measure patch:
    connectivity
"""


def protocol_text(seed=21, n=6, repeat=4, sweeps=12, length="1 s"):
    return TEXT.format(seed=seed, n=n, repeat=repeat, sweeps=sweeps, length=length)


def test_patch_round_trips_and_expands():
    p = parse(protocol_text())
    assert parse(format_protocol(p)) == p
    e = expand_patches(p, patch_collectors())
    names = [pick.name for pick in e.cells.picks]
    assert names == [f"patch_{k}" for k in range(1, 7)]
    # every later cell within the radius of the first
    assert all(pick.constraints[0].of == "patch_1" and pick.constraints[0].distance.si == pytest.approx(100e-6)
               for pick in e.cells.picks[1:])
    # cell k (from 0) fires k turns later
    at = {s.cell: s.items[0].at.si for s in e.stimuli}
    assert at == pytest.approx({f"patch_{k + 1}": 0.040 + 0.150 * k for k in range(6)})
    assert [r.cell for r in e.recordings] == names
    assert [m.cell for m in e.measures] == ["patch"]


@pytest.mark.parametrize("text, needle", [
    ("patch is 13 of pyramidal_deep within 100 um", "at most 12 cells"),
    ("patch is 1 of pyramidal_deep within 100 um", "must be at least 2"),
    ("patch is 4 of pyramidal_deep within 0 um", "patch radius must be greater than 0"),
])
def test_patch_line_errors(text, needle):
    with pytest.raises(ProtocolError, match=needle):
        parse(protocol_text().replace("patch is 6 of pyramidal_deep within 100 um", text))


def test_patch_needs_turns():
    with pytest.raises(ProtocolError, match="cannot tell which one evoked a response"):
        parse(protocol_text().replace("stimulate patch in turn every 150 ms:", "stimulate patch:"))


def test_patch_selection_is_within_the_radius(tmp_path):
    path = tmp_path / "p.protocol"
    path.write_text(protocol_text())
    plan = protolang.load(path).plan()
    first = plan.role("patch_1")
    for k in range(2, 7):
        d = np.linalg.norm(plan.role(f"patch_{k}").positions - first.positions, axis=1)
        assert (d <= 100e-6 + 1e-12).all()
    ids = np.stack([plan.role(f"patch_{k}").cell_ids for k in range(1, 7)], axis=1)
    assert all(len(set(row)) == 6 for row in ids)          # six different cells per patch
    assert plan.patches[0].members == [f"patch_{k}" for k in range(1, 7)]
    syn = next(s for s in plan.synapses if s.name == "patch_2_to_patch_5")
    assert syn.rule_probability is not None and syn.rule_probability.shape == (4,)


def test_sampled_probability_agrees_with_the_rule():
    # Common practice, no single source: a lab's sampled connection probability is a binomial
    # estimate, and the 95 % Wilson interval (Wilson 1927, J Am Stat Assoc) of the connected
    # fraction of the sampled pairs should cover the circuit rule's mean probability of those
    # pairs in at least 95 % of repetitions. Each repetition patches 10 groups of 8 deep
    # pyramids (560 ordered pairs) with its own selection seed, through the same selection code
    # a protocol uses; the truth is the circuit's connectivity. A 95 % interval covers 95 % of
    # the time on average, so the observed share of 1000 repetitions may fall short of 0.95 by
    # sampling error alone: the check allows two standard errors, sqrt(0.95 x 0.05 / 1000) each
    # (measured here: 0.951; 0.945 and 0.957 for circuit seeds 22 and 23).
    circuit = load_circuit(CIRCUIT)
    inst = instantiate(circuit, 21)
    p = expand_patches(parse(protocol_text(n=8, repeat=10)), patch_collectors())
    rule = circuit.pathways["pyramidal_deep->pyramidal_deep"]
    covered, n_rep = 0, 1000
    for seed in range(n_rep):
        sel = select_cells(p.cells, inst, np.random.default_rng(seed))
        ids = np.stack([sel.ids[name] for name in sel.names], axis=1)       # (10, 8)
        pre = np.repeat(ids, 8, axis=1).ravel()
        post = np.tile(ids, (1, 8)).ravel()
        keep = pre != post
        pre, post = pre[keep], post[keep]
        k = int(inst.connected(pre, post).sum())
        expected = float(np.mean(rule.probability(inst.distance(pre, post))))
        lo, hi = wilson_interval(k, pre.size)
        covered += lo <= expected <= hi
    assert covered / n_rep >= 0.95 - 2 * np.sqrt(0.95 * 0.05 / n_rep)


@pytest.mark.brian2
def test_detected_connections_match_the_circuit(tmp_path):
    # The lab's criterion applied to simulated recordings finds the circuit's connections:
    # every connected pair of these patches (EPSPs 0.3-2 mV against 0.05 mV recording noise
    # averaged over 12 sweeps) and few unconnected ones (the criterion's false-positive rate is
    # about 1 % per pair, derived in tests/test_anatomy.py).
    path = tmp_path / "p.protocol"
    path.write_text(protocol_text())
    result = protolang.load(path).run(target="numpy")
    pairs = result.tables["patch_pairs"]
    tested = pairs[pairs["tested"]]
    assert len(tested) == 4 * 6 * 5
    true = tested["connected_in_circuit"]
    assert true.sum() >= 3
    assert tested.loc[true, "detected"].all()
    assert tested.loc[~true, "detected"].mean() <= 0.05
    table = result.tables["patch_connectivity"]
    total = table[table["scope"] == "all"].iloc[0]
    assert total["pairs_tested"] == 120
    assert {"circuit_probability", "rule_probability", "ci_low", "ci_high"} <= set(table.columns)
    assert {"patch_reciprocity", "patch_degrees"} <= set(result.tables)
