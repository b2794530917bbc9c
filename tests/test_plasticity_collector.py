"""The `plasticity` collector end to end: simulated EPSC trains fitted back to the circuit's own U and D."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

import protolang
from protolang.language.errors import ProtocolError

CIRCUIT = str(Path(__file__).resolve().parents[1] / "demo" / "slab.circuit.yaml")

TEXT = f"""\
protocol "plasticity fit test"
circuit "{CIRCUIT}" seed 7

cells:
    pre is pyramidal_deep
    post is pyramidal_deep within 150 um of pre, receiving from pre
    repeat 3

sweeps 3 every 10 s
simulate deterministic

record post: voltage clamp, holding -70 mV
stimulate pre:
    {{stimulus}}

measure post:
    plasticity to pre, bootstrap 0
"""


def test_fit_needs_a_train(tmp_path):
    path = tmp_path / "p.protocol"
    path.write_text(TEXT.format(stimulus="pulse 1.5 nA for 2 ms at 100 ms"))
    with pytest.raises(ProtocolError, match="at least 3 presynaptic spikes"):
        protolang.load(path).check()


@pytest.mark.brian2
def test_fit_recovers_the_circuit_release_parameters(tmp_path):
    # Tsodyks-Markram fit of deterministic EPSCs (voltage clamp keeps the currents linear in the
    # released amount; Markram, Wang and Tsodyks 1998 recursion) must give back the U and D the
    # plan drew for each connection; the NMDA tail under the clamp adds a little to late EPSCs,
    # hence 10 % on U and 25 % on D (common practice, no single source).
    path = tmp_path / "p.protocol"
    path.write_text(TEXT.format(stimulus="train 8 pulses of 1.5 nA for 2 ms at 20 Hz from 100 ms\n"
                                         "    pulse 1.5 nA for 2 ms at 1000 ms"))
    exp = protolang.load(path)
    plan = exp.plan()
    result = exp.run(target="numpy")
    table = result.tables["plasticity"]
    syn = next(s for s in plan.synapses if s.name == "pre_to_post")
    rows = table[table["scope"] == "connection"].sort_values("repeat")
    assert len(rows) == 3 and rows["tm_converged"].all()
    np.testing.assert_allclose(rows["tm_U"], syn.U[rows["repeat"]], rtol=0.10)
    np.testing.assert_allclose(rows["tm_D_ms"], syn.D[rows["repeat"]] * 1e3, rtol=0.25)
    assert (rows["tm_class"] == "depressing").all()
    assert (table["scope"] == "pathway").sum() == 1
