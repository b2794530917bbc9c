"""Embedded networks and lesions through the Brian2 engine: what a removed or silenced class does."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

import protolang

pytestmark = pytest.mark.brian2

CIRCUIT = str(Path(__file__).resolve().parents[1] / "demo" / "slab.circuit.yaml")

TEXT = f"""\
protocol "embedded engine test"
circuit "{CIRCUIT}" seed 3

cells:
    pre is pyramidal_deep
    post is pyramidal_deep within 150 um of pre, receiving from pre

{{lesions}}
network:
    region within 130 um of post
    background poisson 1 kHz of 0.5 nS AMPA onto pyramidal_deep, basket_fast, dendrite_targeting

sweeps 1 every 0.3 s, lasting 0.3 s
record post: current clamp
stimulate pre:
    pulse 1.5 nA for 2 ms at 150 ms
measure post:
    responses to pre
measure network:
    activity, discard 50 ms
"""


def run(tmp_path, lesions=""):
    path = tmp_path / "e.protocol"
    path.write_text(TEXT.format(lesions=lesions))
    exp = protolang.load(path)
    plan = exp.plan()
    return plan, exp.run(target="numpy")


@pytest.fixture(scope="module")
def intact(tmp_path_factory):
    return run(tmp_path_factory.mktemp("intact"))


def _spikes_of_class(result, name):
    pop = result.recordings.population
    k = pop["class_names"].index(name)
    members = np.flatnonzero(np.asarray(pop["class_index"]) == k)
    return int(np.isin(pop["cells"], members).sum()), members.size


def test_embedded_run_gives_activity_tables(intact):
    plan, result = intact
    assert plan.network.population.size > 50
    table = result.tables["populations"]
    row = table[table["cell_class"] == "all cells"].iloc[0]
    assert row["n_cells"] == plan.network.population.size
    assert row["rate_mean_Hz"] > 0.5                 # the background drives the network
    assert row["state"] in ("asynchronous", "synchronous")
    # every simulated connection is a release site of a circuit connection (stochastic release)
    sites = sum(int(e.n_sites.sum()) for e in plan.network.edges)
    built = sum(n for k, n in result.recordings.meta["n_synapses"].items() if k.startswith("network:"))
    assert built == sites
    assert "responses" in result.tables and len(result.tables["responses"]) == 1


def test_removed_class_has_no_cells_no_synapses_no_spikes(tmp_path, intact):
    _, full = intact
    assert _spikes_of_class(full, "basket_fast")[0] > 0
    plan, result = run(tmp_path, "lesions:\n    remove basket_fast\n")
    spikes, cells = _spikes_of_class(result, "basket_fast")
    assert cells == 0 and spikes == 0
    for edge in plan.network.edges:
        assert not any("basket_fast" in plan.network.pathways[k] for k in np.unique(edge.pathway))
    assert plan.lesions[0].cells == {"basket_fast": 220}
    # the run's provenance lists it too
    lesion = result.provenance["lesions"][0]
    assert lesion["line"] == "remove basket_fast" and lesion["cells_per_class"] == {"basket_fast": 220}
    assert result.provenance["network"]["cells"] == plan.network.population.size


def test_silenced_class_stays_but_never_fires(tmp_path):
    plan, result = run(tmp_path, "lesions:\n    silence basket_fast\n")
    spikes, cells = _spikes_of_class(result, "basket_fast")
    assert cells > 0 and spikes == 0
    assert plan.network.population.silenced.sum() == cells


def test_silenced_role_does_not_fire(tmp_path):
    plan, result = run(tmp_path, "lesions:\n    silence pyramidal_deep\n")
    assert plan.role("pre").silenced
    assert all(len(s) == 0 for rep in result.recordings.spikes["pre"] for s in rep)
    assert _spikes_of_class(result, "pyramidal_deep")[0] == 0


@pytest.mark.slow
def test_upper_layer_turns_synchronous_with_calcium(tmp_path):
    # The demo claim of README/network_calcium_scan: with nothing but calcium changed, the invented
    # upper layer is asynchronous at 1.0 mM and synchronous at 2.0 mM (Golomb's chi against the
    # 0.3 convention; the chi of independent cells here is about 1/sqrt(799) = 0.035).
    text = (Path(__file__).resolve().parents[1] / "demo" / "network_calcium_scan.protocol").read_text()
    text = text.replace("1.0 mM to 2.0 mM in 5 steps", "1.0 mM, 2.0 mM").replace(
        '"slab.circuit.yaml"', f'"{CIRCUIT}"')
    path = tmp_path / "ca.protocol"
    path.write_text(text)
    result = protolang.load(path).run(target="numpy")
    table = result.tables["populations"]
    rows = table[table["cell_class"] == "all cells"].set_index("scan_calcium_mM")
    assert rows.loc[1.0, "state"] == "asynchronous" and rows.loc[1.0, "synchrony_chi"] < 0.15
    assert rows.loc[2.0, "state"] == "synchronous" and rows.loc[2.0, "synchrony_chi"] > 0.3
    assert rows.loc[2.0, "n_bursts"] >= 1 and rows.loc[1.0, "n_bursts"] == 0
