"""The prediction table: the standard paired protocol per pathway, its rows, and the rows replays back."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml

from protolang.api import loads
from protolang.circuit import load_circuit
from protolang.predict import (PREDICTION_COLUMNS, Standard, _backing_from_run, _is_inhibitory, predict,
                               prediction_row, standard_protocol)

DEMO = Path(__file__).resolve().parents[1] / "demo" / "slab.circuit.yaml"


def test_standard_protocol_checks_for_every_pathway_of_the_demo():
    circuit = load_circuit(DEMO)
    assert len(circuit.pathways) >= 8
    for pathway in circuit.pathways.values():
        inhibitory = _is_inhibitory(circuit, pathway)
        text = standard_protocol(DEMO, pathway, Standard(), inhibitory=inhibitory)
        exp = loads(text, file=f"/tmp/{pathway.name.replace('->', '_to_')}.protocol")
        exp.check()
        holding = "holding -60 mV" if inhibitory else "holding -70 mV"
        assert holding in text
        # GABA_A reverses at -75 mV in the demo: the inhibitory pathways are exactly the GABAergic ones
        assert inhibitory == (set(pathway.receptors) == {"GABA_A"})
        head, *probes = text.split("probe_")
        assert "receiving from pre" in head and len(probes) > 4 and not any("receiving" in x for x in probes)


class _Syn:
    def __init__(self, pre, post, rule):
        self.pre, self.post, self.rule_probability = pre, post, np.asarray(rule)


class _Plan:
    synapses = [_Syn("pre", "post", [0.2] * 4), _Syn("pre", "probe_1", [0.1, 0.2]), _Syn("pre", "probe_2", [0.3, 0.4])]


class _Pathway:
    name, pre, post = "a->b", "a", "b"


def test_prediction_row_from_hand_built_tables():
    conn = pd.DataFrame({
        "post": ["post"] * 4 + ["probe_1", "probe_2"] * 2,
        "connected": [True, True, True, False, True, False, False, False],
        "amplitude_mean_mV": [1.0, 2.0, 4.0, 0.0, 9.0, 0.0, 0.0, 0.0],
        "cv": [0.2, 0.4, np.nan, np.nan, 1.0, 0, 0, 0],
        "failure_rate": [0.0, 0.1, 0.2, 1.0, 0, 0, 0, 0],
        "latency_ms": [1.0] * 8, "rise_20_80_ms": [0.5] * 8, "decay_tau_ms": [20.0] * 8,
        "ppr": [0.5, 0.7, 0.9, np.nan, 1, 1, 1, 1], "recovery_ratio": [1.0] * 8,
    })
    fits = pd.DataFrame({"scope": ["connection", "connection", "pathway"], "tm_U": [0.4, np.nan, 0.5],
                         "tm_D_ms": [500.0, np.nan, 600.0], "tm_F_ms": [10.0, np.nan, 20.0],
                         "tm_class": ["", "", "depressing"], "tm_converged": [True, False, True],
                         "tm_model": ["depression and facilitation"] * 3})
    row = prediction_row(_Pathway(), {"connections": conn, "plasticity": fits}, _Plan(), -70.0)
    # hand-computed: probe pairs 1 of 4 connected; post's connected pairs are the first three
    assert row["n_pairs_tested"] == 4 and row["n_pairs_connected"] == 1 and row["probability"] == 0.25
    # Wilson 1927 (J Am Stat Assoc 22:209-212) interval for 1 of 4 at z = 1.959964, by its closed form
    z, n, p = 1.959963984540054, 4, 0.25
    centre = (p + z * z / (2 * n)) / (1 + z * z / n)
    half = z / (1 + z * z / n) * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n))
    assert row["probability_low"] == pytest.approx(centre - half, abs=1e-9)
    assert row["probability_high"] == pytest.approx(centre + half, abs=1e-9)
    assert row["rule_probability"] == pytest.approx(0.25)        # mean of 0.1..0.4
    assert row["n_connections"] == 3
    assert row["amplitude_mV"] == pytest.approx(7.0 / 3.0)       # (1 + 2 + 4) / 3
    assert row["amplitude_sd_mV"] == pytest.approx(np.std([1.0, 2.0, 4.0], ddof=1))
    assert row["cv"] == pytest.approx(0.3)                       # NaN left out: (0.2 + 0.4) / 2
    assert row["failure_rate"] == pytest.approx(0.1)
    assert row["ppr"] == pytest.approx(0.7)
    assert (row["tm_U"], row["tm_D_ms"], row["tm_F_ms"], row["tm_class"]) == (0.5, 600.0, 20.0, "depressing")
    assert row["tm_converged_fraction"] == 0.5
    # a depression-only pooled fit leaves F empty: its F = 0 is no measurement
    fits.loc[2, "tm_model"] = "depression only"
    fits.loc[2, "tm_F_ms"] = 0.0
    row = prediction_row(_Pathway(), {"connections": conn, "plasticity": fits}, _Plan(), -70.0)
    assert math.isnan(row["tm_F_ms"]) and row["tm_model"] == "depression only" and row["tm_D_ms"] == 600.0


def test_backing_maps_comparison_rows_to_pathways():
    plan = {"title": "replay", "roles": [{"name": "pre", "cell_class": "a"}, {"name": "post", "cell_class": "b"},
                                         {"name": "cell", "cell_class": "b"}],
            "patches": [{"name": "patch", "cell_class": "a"}]}
    comparison = pd.DataFrame({
        "measure": ["amplitude", "rheobase", "probability"], "cell": ["post", "cell", "patch"],
        "from_cell": ["pre", "", ""], "agreement": ["yes", "no", "no data"],
        "source": ["X 2001, J", "Y 2002, K", "Z 2003, L"], "from_memory": [False, False, True]})
    backing = _backing_from_run(plan, comparison)
    assert [(b["pathway"], b["measure"], b["agreement"]) for b in backing] == [
        ("a->b", "amplitude", "yes"), ("a->a", "probability", "no data")]
    assert "from memory" in backing[1]["text"] and "from memory" not in backing[0]["text"]


def _small_circuit(tmp_path: Path) -> Path:
    """The demo circuit with two of its pathways: one excitatory, one inhibitory."""
    data = yaml.safe_load(DEMO.read_text())
    data["pathways"] = [p for p in data["pathways"]
                        if (p["pre"], p["post"]) in {("pyramidal_deep", "pyramidal_deep"),
                                                     ("basket_fast", "pyramidal_deep")}]
    path = tmp_path / "two.circuit.yaml"
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    return path


REPLAY = """protocol "replay: deep pyramid pairs"
circuit "{circuit}" seed 3

cells:
    pre is pyramidal_deep
    post is pyramidal_deep within 150 um of pre, receiving from pre
    repeat 3

sweeps 3 every 10 s

record post: current clamp, holding -70 mV, noise 0.03 mV

stimulate pre:
    pulse 1.5 nA for 2 ms at 100 ms

measure post:
    responses to pre

reference amplitude of post from pre:
    value 1.3 mV, sd 1.1 mV, n 138
    source "Markram, Lubke, Frotscher, Roth and Sakmann" 1997 "J Physiol 500:409-440"
    agree within 100 sd
"""


@pytest.mark.brian2
@pytest.mark.slow
def test_predict_end_to_end_on_a_two_pathway_circuit(tmp_path):
    circuit = _small_circuit(tmp_path)
    replay = tmp_path / "replay.protocol"
    # a tolerance of 100 SD agrees with any plausible amplitude: this replay tests the backing columns
    replay.write_text(REPLAY.format(circuit=circuit))
    out = tmp_path / "pred"
    table = predict(str(circuit), str(out), standard=Standard(pairs=3, sweeps=3, seed=2, probes=2), replays=[str(replay)],
                    target="numpy")
    assert list(table.columns) == PREDICTION_COLUMNS
    assert list(table["pathway"]) == ["pyramidal_deep->pyramidal_deep", "basket_fast->pyramidal_deep"]
    assert (table["status"] == "ok").all()
    assert list(table["holding_mV"]) == [-70.0, -60.0]
    assert list(table["reference_backed"]) == [True, False]
    assert table["references_agreeing"].iloc[0] == "1 of 1"
    assert "Markram" in table["references"].iloc[0]
    assert (table["n_pairs_tested"] == 6).all() and (table["n_connections"] == 3).all()
    written = pd.read_csv(out / "predictions.csv")
    assert len(written) == 2
    # each row is the summary of its own run folder's connections table (a consistency check)
    conn = pd.read_csv(out / "runs" / "pyramidal_deep_to_pyramidal_deep" / "tables" / "connections.csv")
    post = conn[(conn["post"] == "post") & conn["connected"]]
    assert table["amplitude_mV"].iloc[0] == pytest.approx(post["amplitude_mean_mV"].mean())
    assert (out / "protocols" / "basket_fast_to_pyramidal_deep.protocol").exists()
    assert (out / "replays" / "replay" / "tables" / "comparison.csv").exists()
    # inhibitory responses are measured along their own sign: positive amplitudes
    assert table["amplitude_mV"].iloc[1] > 0
