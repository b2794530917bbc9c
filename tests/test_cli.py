"""Command line and API end to end: check, parse, plan, run; errors without tracebacks."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import protolang

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "demo"

SMALL = f"""\
# a small version of the demo train protocol, for tests
protocol "small pair train"
circuit "{DEMO / 'slab.circuit.yaml'}" seed 5

cells:
    pre is pyramidal_deep
    post is pyramidal_deep within 150 um of pre, receiving from pre
    repeat 4

sweeps 5 every 10 s

record pre: current clamp
record post: current clamp, holding -70 mV, noise 0.03 mV

stimulate pre:
    train 4 pulses of 1.5 nA for 2 ms at 20 Hz from 60 ms
    pulse 1.5 nA for 2 ms at 500 ms

measure post:
    responses to pre
    spikes
"""


def cli(*args, cwd=ROOT):
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    return subprocess.run([sys.executable, "-m", "protolang.cli", *args], capture_output=True, text=True,
                          cwd=cwd, env=env, timeout=600)


def test_check_demo_protocols_ok():
    files = sorted(str(p) for p in DEMO.glob("*.protocol"))
    assert len(files) >= 4
    r = cli("check", *files)
    assert r.returncode == 0, r.stderr
    assert r.stdout.count(": ok") == len(files)


def test_check_does_not_import_brian2_or_pandas():
    code = ("import sys, protolang; exp = protolang.load(sys.argv[1]); exp.check(); "
            "bad = [m for m in ('brian2', 'pandas', 'matplotlib') if m in sys.modules]; print(bad)")
    r = subprocess.run([sys.executable, "-c", code, str(DEMO / "pyramid_pair_train.protocol")],
                       capture_output=True, text=True, env=dict(os.environ, PYTHONPATH=str(ROOT)))
    assert r.returncode == 0, r.stderr
    assert r.stdout.strip() == "[]"


@pytest.mark.parametrize("edit,where,needle", [
    (("pyramidal_deep\n    post", "pyramidl_deep\n    post"), ":6:12: error: unknown cell class 'pyramidl_deep'",
     "did you mean 'pyramidal_deep'"),
    (("every 10 s", "every 10 mV"), ":10:16: error:", "needs a time"),
    (("repeat 4", "repeat 0"), ":8:12: error:", "repeat"),
    (("responses to pre", "responses to pro"), ":20:18: error:", "did you mean 'pre'"),
    (("at 20 Hz", "at 600 Hz"), ":16:42:", "frequency too high"),
])
def test_check_errors_exit_1_without_traceback(tmp_path, edit, where, needle):
    path = tmp_path / "bad.protocol"
    path.write_text(SMALL.replace(*edit))
    r = cli("check", str(path))
    assert r.returncode == 1
    assert "Traceback" not in r.stderr
    assert f"bad.protocol{where}" in r.stderr, r.stderr
    assert needle in r.stderr
    assert "^" in r.stderr


def test_missing_protocol_file():
    r = cli("check", "no/such.protocol")
    assert r.returncode == 1 and "not found" in r.stderr and "Traceback" not in r.stderr


def test_malformed_circuit_reported_at_its_line(tmp_path):
    bad = tmp_path / "c.yaml"
    bad.write_text("name: x\nclasses: [unclosed\n")
    path = tmp_path / "p.protocol"
    path.write_text(SMALL.replace(str(DEMO / "slab.circuit.yaml"), str(bad)))
    r = cli("check", str(path))
    assert r.returncode == 1 and "Traceback" not in r.stderr
    assert "c.yaml:" in r.stderr


def test_parse_dump_and_plan_dump(tmp_path):
    path = tmp_path / "p.protocol"
    path.write_text(SMALL)
    r = cli("parse", "--dump", str(path))
    assert r.returncode == 0 and "CellPick" in r.stdout
    r = cli("plan", "--dump", str(path))
    assert r.returncode == 0, r.stderr
    plan = json.loads(r.stdout)
    assert plan["layout"] == "replicas" and plan["n_repeat"] == 4


@pytest.mark.brian2
@pytest.mark.slow
def test_run_writes_a_complete_folder(tmp_path):
    path = tmp_path / "p.protocol"
    path.write_text(SMALL)
    out = tmp_path / "run"
    r = cli("run", str(path), "--out", str(out), "--target", "numpy")
    assert r.returncode == 0, r.stderr
    for rel in ("tables/responses.csv", "tables/connections.csv", "tables/pathways.csv", "tables/spikes.csv",
                "tables/connections.parquet", "plan.json", "provenance.json", "recordings.npz"):
        assert (out / rel).is_file(), rel
    assert list((out / "figures").glob("*.png"))
    prov = json.loads((out / "provenance.json").read_text())
    assert prov["seed"] == 5 and prov["versions"]["brian2"] == "2.9.0"
    assert len(prov["protocol_sha256"]) == 64 and len(prov["circuit_sha256"]) == 64
    assert not list(tmp_path.glob(".run.partial-*"))
    # an existing folder is refused, not overwritten
    r = cli("run", str(path), "--out", str(out), "--target", "numpy")
    assert r.returncode == 1 and "already exists" in r.stderr


@pytest.mark.brian2
@pytest.mark.slow
def test_api_run_is_reproducible(tmp_path):
    path = tmp_path / "p.protocol"
    path.write_text(SMALL)
    a = protolang.load(path).run(target="numpy")
    b = protolang.load(path).run(target="numpy")
    np.testing.assert_array_equal(a.recordings.traces["post"], b.recordings.traces["post"])
    ca, cb = a.tables["connections"], b.tables["connections"]
    assert ca["amplitude_mean_mV"].equals(cb["amplitude_mean_mV"])
    assert set(a.tables) >= {"responses", "connections", "pathways", "spikes"}
    resp = a.tables["responses"]
    assert len(resp) == 4 * 5 * 5          # repeats x sweeps x events
    assert (resp["presynaptic_spike"]).all()  # each 1.5 nA, 2 ms pulse makes the pre cell fire
    conn = a.tables["connections"]
    assert (conn["ppr"] < 1).all()           # the deep pyramid pathway of the demo depresses
