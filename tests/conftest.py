"""Shared fixtures: one small paired protocol (invented scenario) and one run of it per test session."""

from __future__ import annotations

from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "protolang" / "demo"

# Invented test scenario modelled on protolang/demo/pyramid_pair_train.protocol, made small so a
# run takes seconds: deep pyramid pairs, a 4-pulse 20 Hz train and a recovery probe.
SMALL_PAIR = f"""\
# Invented test scenario: deep pyramid pairs, a 4-pulse 20 Hz train and a recovery probe.
protocol "small test: deep pyramid pairs"
circuit "{DEMO / 'slab.circuit.yaml'}" seed 7

bath:
    calcium 2.0 mM
    magnesium 1.0 mM

cells:
    pre is pyramidal_deep
    post is pyramidal_deep within 150 um of pre, receiving from pre
    repeat 4

sweeps 3 every 1 s

record pre: current clamp
record post: current clamp, holding -70 mV, noise 0.03 mV

stimulate pre:
    train 4 pulses of 1.5 nA for 2 ms at 20 Hz from 100 ms
    pulse 1.5 nA for 2 ms at 500 ms

measure post:
    responses to pre
"""
SMALL_PAIR_EVENTS = 5     # 4 train pulses and the probe


@pytest.fixture(scope="session")
def small_pair_protocol(tmp_path_factory) -> Path:
    """The small paired protocol as a file (front end only, no Brian2)."""
    path = tmp_path_factory.mktemp("small_pair") / "pair.protocol"
    path.write_text(SMALL_PAIR, encoding="utf-8")
    return path


@pytest.fixture(scope="session")
def small_pair_run(small_pair_protocol) -> Path:
    """One run folder of the small paired protocol (Brian2), shared by every test that only reads it."""
    import protolang

    return protolang.load(small_pair_protocol).run(small_pair_protocol.parent / "run").out_dir
