"""Stimulus files for the rig against closed forms, scipy's integrators and Fresnel integrals (no Brian2)."""

from __future__ import annotations

import argparse
import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy.integrate import quad
from scipy.special import fresnel

import protolang
from protolang.language.errors import ProtocolError
from protolang.plan.model import RolePlan, WaveSegment
from protolang.report.stimulus import (add_stimulus_parser, export_stimuli, injected_charge, parse_rate,
                                       segment_charge, stimulus_waveforms)

ROOT = Path(__file__).resolve().parents[1]
CIRCUIT = ROOT / "protolang" / "demo" / "slab.circuit.yaml"

TRAIN = f"""\
# Invented test scenario: a deep pyramid pair, an 8-pulse 20 Hz train and a recovery probe.
protocol "stimulus export: train"
circuit "{CIRCUIT}" seed 7

cells:
    pre is pyramidal_deep
    post is pyramidal_deep within 150 um of pre, receiving from pre
    repeat 2

sweeps 3 every 10 s

record pre: current clamp
record post: current clamp, holding -70 mV

stimulate pre:
    train 8 pulses of 1.5 nA for 2 ms at 20 Hz from 100 ms
    pulse 1.5 nA for 2 ms at 1000 ms

measure post:
    responses to pre
"""

WAVES = f"""\
# Invented test scenario: one cell with a step and a ramp, one with a sine on an offset,
# one voltage-clamped cell with a command step.
protocol "stimulus export: waveforms"
circuit "{CIRCUIT}" seed 3

cells:
    a is pyramidal_deep
    b is pyramidal_upper
    c is basket_fast
    repeat 2

sweeps 2 every 5 s, lasting 1.2 s

record a: current clamp
record b: current clamp, holding 20 pA
record c: voltage clamp, holding -70 mV, series 10 MOhm

stimulate a:
    step 200 pA for 300 ms at 100 ms
    ramp 0 pA to 400 pA from 500 ms to 1000 ms
stimulate b:
    sine 50 pA at 7 Hz from 100 ms to 400 ms, offset 20 pA
    chirp 30 pA sweeping 2 Hz to 40 Hz from 500 ms to 1100 ms
stimulate c:
    step -10 mV for 200 ms at 100 ms
"""


def _plan(tmp_path, text, name="p.protocol", point=0):
    path = tmp_path / name
    path.write_text(text)
    return protolang.load(path).plan(point), path


def read_csv(path: Path):
    """Header comment lines (without '# '), the column names and the samples of a stimulus file."""
    lines = path.read_text().splitlines()
    header = [line[2:] for line in lines if line.startswith("#")]
    columns = lines[len(header)].split(",")
    data = np.loadtxt(path, delimiter=",", comments="#", skiprows=len(header) + 1)
    return header, columns, data


def header_value(header: list[str], key: str) -> str:
    return next(line.split(": ", 1)[1] for line in header if line.startswith(key + ":"))


def stated_charge_pC(header: list[str]) -> float:
    return float(header_value(header, "injected charge").split()[0])


def test_train_file_integrates_to_the_stated_charge(tmp_path):
    plan, _ = _plan(tmp_path, TRAIN)
    paths = export_stimuli(plan, tmp_path / "stim", rate=20e3)
    assert [p.name for p in paths] == ["pre_sweeptype1.csv"]        # post is not stimulated
    header, columns, data = read_csv(paths[0])
    t, current_pA = data[:, 0], data[:, 1]
    dt = 1 / 20e3
    # The amplifier holds each sample for one interval, so the rectangle sum is the charge delivered.
    q_file = current_pA.sum() * 1e-12 * dt
    # Q = I x t per pulse, 9 pulses of 1.5 nA for 2 ms (common practice, no single source)
    q_closed = 9 * 1.5e-9 * 2e-3
    assert q_closed == pytest.approx(27e-12)
    assert injected_charge(plan.role("pre"), 0) == pytest.approx(q_closed, rel=1e-12)
    assert stated_charge_pC(header) * 1e-12 == pytest.approx(q_closed, rel=1e-6)
    # every edge lies on the 50 us grid, so the samples hold exactly that charge
    assert q_file == pytest.approx(q_closed, rel=1e-9)
    # numpy's trapezoid rule over the same samples differs only by half a sample per edge
    q_trap = np.trapezoid(current_pA * 1e-12, t)
    assert abs(q_trap - q_closed) <= 18 * 0.5 * 1.5e-9 * dt + 1e-20
    assert set(np.unique(current_pA)) == {0.0, 1500.0}


def test_step_ramp_sine_and_chirp_charges(tmp_path):
    plan, _ = _plan(tmp_path, WAVES)
    rate = 20e3
    dt = 1 / rate
    paths = {p.name: p for p in export_stimuli(plan, tmp_path / "stim", rate=rate)}
    assert sorted(paths) == ["a_sweeptype1.csv", "b_sweeptype1.csv", "c_sweeptype1.csv"]

    # step and ramp: closed form I x T plus the ramp's mean x T, against scipy.integrate.quad of the
    # piecewise function (an independent integrator)
    def a_current(t):
        if 0.1 <= t < 0.4:
            return 200e-12
        if 0.5 <= t < 1.0:
            return 400e-12 * (t - 0.5) / 0.5
        return 0.0
    q_quad = quad(a_current, 0.0, 1.2, points=[0.1, 0.4, 0.5, 1.0], limit=200)[0]
    q_closed = 200e-12 * 0.3 + 0.5 * (0 + 400e-12) * 0.5
    assert q_quad == pytest.approx(q_closed, rel=1e-9)
    header, columns, data = read_csv(paths["a_sweeptype1.csv"])
    assert stated_charge_pC(header) == pytest.approx(q_closed * 1e12, rel=1e-6)
    q_file = data[:, 1].sum() * 1e-12 * dt
    # a left rectangle sum of a linear ramp from a to b falls short by exactly (b - a) dt / 2
    assert q_file == pytest.approx(q_closed - 400e-12 * dt / 2, rel=1e-9)

    # sine with offset: offset x T + A (1 - cos 2 pi f T) / (2 pi f) against quad (2.1 periods, so the
    # cosine term counts)
    def sine(t):
        return 20e-12 + 50e-12 * math.sin(2 * math.pi * 7.0 * (t - 0.1))
    q_sine = quad(sine, 0.1, 0.4, limit=200)[0]
    seg = plan.role("b").segments[0]
    assert seg.kind == "sine"
    assert segment_charge(seg, seg.amplitude) == pytest.approx(q_sine, rel=1e-9)
    # chirp: scipy.integrate.quad inside protolang against a closed form with Fresnel integrals
    # (S, C as defined by Abramowitz and Stegun 1964, Handbook of Mathematical Functions, ch. 7)
    chirp = plan.role("b").segments[1]
    T, f1, f2, A = chirp.stop - chirp.start, chirp.frequency, chirp.frequency_end, chirp.amplitude
    k = (f2 - f1) / T
    shift = math.pi * f1 ** 2 / k
    s0, c0 = fresnel(math.sqrt(2 * k) * (f1 / k))
    s1, c1 = fresnel(math.sqrt(2 * k) * (T + f1 / k))
    q_fresnel = A * (math.cos(shift) * (s1 - s0) - math.sin(shift) * (c1 - c0)) / math.sqrt(2 * k)
    assert segment_charge(chirp, A) == pytest.approx(q_fresnel, rel=1e-8, abs=1e-22)
    header, columns, data = read_csv(paths["b_sweeptype1.csv"])
    assert stated_charge_pC(header) == pytest.approx((q_sine + q_fresnel) * 1e12, rel=1e-6)
    # a sampled waveform is off by at most one sample's charge at each of its four edges
    q_file = data[:, 1].sum() * 1e-12 * dt
    assert abs(q_file - (q_sine + q_fresnel)) <= 4 * dt * 70e-12
    # the holding current is stated in the header, not added to the samples
    assert "20 pA injected throughout" in header_value(header, "holding")
    assert data[0, 1] == 0.0


def test_header_units_rate_and_voltage_clamp_command(tmp_path):
    plan, _ = _plan(tmp_path, WAVES)
    rate = parse_rate("10 kHz")
    assert rate == 10e3
    paths = {p.name: p for p in export_stimuli(plan, tmp_path / "stim", rate=rate)}
    header, columns, data = read_csv(paths["a_sweeptype1.csv"])
    assert columns == ["time_s", "current_pA"]
    assert header_value(header, "sample rate").startswith("10000 Hz")
    assert header_value(header, "clamp mode") == "current clamp"
    assert header_value(header, "cell class") == "pyramidal_deep"
    assert header_value(header, "sweeps using this waveform").startswith("1-2")
    assert header_value(header, "sweep interval").startswith("5 s")
    assert header_value(header, "sweep length").startswith("1200 ms (12000 samples)")
    assert any("model protocol" in line and "approvals" in line for line in header)
    np.testing.assert_allclose(np.diff(data[:, 0]), 1 / rate, rtol=0, atol=1e-12)
    assert len(data) == 12000

    header, columns, data = read_csv(paths["c_sweeptype1.csv"])
    assert columns == ["time_s", "command_mV"]
    assert header_value(header, "clamp mode") == "voltage clamp"
    assert header_value(header, "injected charge").startswith("not applicable")
    t, v = data[:, 0], data[:, 1]
    step = (t >= 0.1 - 1e-9) & (t < 0.3 - 1e-9)
    # the command is the holding potential outside the step and holding + step inside it
    np.testing.assert_allclose(v[~step], -70.0, atol=1e-9)
    np.testing.assert_allclose(v[step], -80.0, atol=1e-9)
    assert step.sum() == 2000
    with pytest.raises(ValueError, match="voltage-clamped"):
        injected_charge(plan.role("c"), 0)


def test_step_family_gives_one_file_per_sweep_type(tmp_path):
    text = TRAIN.replace("sweeps 3 every 10 s", "sweeps 4 every 5 s").replace(
        "    train 8 pulses of 1.5 nA for 2 ms at 20 Hz from 100 ms\n    pulse 1.5 nA for 2 ms at 1000 ms\n",
        "    steps of -50 pA to 100 pA by 50 pA for 500 ms at 100 ms\n").replace(
        "measure post:\n    responses to pre\n", "measure pre:\n    fi\n")
    plan, _ = _plan(tmp_path, text)
    waves = stimulus_waveforms(plan, 20e3)
    assert [(w.sweep_type, w.sweeps) for w in waves] == [(1, [1]), (2, [2]), (3, [3]), (4, [4])]
    for w, amp in zip(waves, (-50e-12, 0.0, 50e-12, 100e-12)):
        # Q = I x t of each step (common practice, no single source)
        assert w.charge == pytest.approx(amp * 0.5, abs=1e-24)
        assert w.values.sum() * 1e-12 / 20e3 == pytest.approx(amp * 0.5, abs=1e-24)


def test_scan_point_picks_its_amplitude(tmp_path):
    text = TRAIN.replace('protocol "stimulus export: train"', 'protocol "stimulus export: scan"\n'
                                                                   'scan @amp: 1 nA, 2 nA').replace(
        "train 8 pulses of 1.5 nA", "train 8 pulses of @amp").replace("pulse 1.5 nA", "pulse @amp")
    path = tmp_path / "scan.protocol"
    path.write_text(text)
    exp = protolang.load(path)
    q = [stimulus_waveforms(exp.plan(k), 20e3)[0].charge for k in range(2)]
    assert q == pytest.approx([9 * 1e-9 * 2e-3, 9 * 2e-9 * 2e-3], rel=1e-12)
    # the files of a point say which point they are
    assert _cli(["stimulus", str(path), "--out", str(tmp_path / "p2"), "--point", "2"]) == 0
    header = (tmp_path / "p2" / "pre_sweeptype1.csv").read_text().splitlines()[:6]
    assert "# scan point: 2 of 2: @amp = 2 nA" in header


def _cli(argv):
    parser = argparse.ArgumentParser(prog="protolang")
    add_stimulus_parser(parser.add_subparsers(dest="command", required=True))
    args = parser.parse_args(argv)
    return args.func(args)


def test_cli_writes_files_and_refuses_bad_input(tmp_path, capsys):
    _, path = _plan(tmp_path, TRAIN)
    out = tmp_path / "stim"
    assert _cli(["stimulus", str(path), "--out", str(out), "--rate", "20kHz"]) == 0
    assert "27 pC per sweep" in capsys.readouterr().out
    assert [p.name for p in out.iterdir()] == ["pre_sweeptype1.csv"]
    before = (out / "pre_sweeptype1.csv").read_text()
    for bad, needle in (("fast", "--rate needs a sample rate"), ("20 mV", "--rate needs a sample rate"),
                        ("0 Hz", "positive sample rate"), ("100 Hz", "cannot resolve the 2 ms pulse")):
        with pytest.raises(ProtocolError) as exc:
            _cli(["stimulus", str(path), "--out", str(tmp_path / "other"), "--rate", bad])
        assert needle in str(exc.value)
        assert "expected:" in str(exc.value)
        assert not (tmp_path / "other").exists()
    with pytest.raises(ProtocolError, match="already exists") as exc:
        _cli(["stimulus", str(path), "--out", str(out)])
    assert "--force" in str(exc.value)
    assert _cli(["stimulus", str(path), "--out", str(out), "--force", "--rate", "10 kHz"]) == 0
    assert (out / "pre_sweeptype1.csv").read_text() != before
    (out / "my_notes.txt").write_text("mine")
    with pytest.raises(ProtocolError, match="did not write"):
        _cli(["stimulus", str(path), "--out", str(out), "--force"])
    assert (out / "my_notes.txt").exists()
    with pytest.raises(ProtocolError, match="outside the protocol's scan points"):
        _cli(["stimulus", str(path), "--out", str(tmp_path / "p2"), "--point", "2"])
    with pytest.raises(ProtocolError, match="not found"):
        _cli(["stimulus", str(tmp_path / "missing.protocol"), "--out", str(tmp_path / "p3")])
    assert not [p for p in tmp_path.iterdir() if ".partial-" in p.name]


def test_stimulus_export_needs_neither_brian2_nor_matplotlib(tmp_path):
    _, path = _plan(tmp_path, TRAIN)
    code = ("import sys, protolang; from protolang.report.stimulus import export_stimuli; "
            "export_stimuli(protolang.load(sys.argv[1]).plan(), sys.argv[2]); "
            "print(sorted(m for m in ('brian2', 'matplotlib') if m in sys.modules))")
    r = subprocess.run([sys.executable, "-c", code, str(path), str(tmp_path / "out")], capture_output=True,
                       text=True, env=dict(os.environ, PYTHONPATH=str(ROOT)))
    assert r.returncode == 0, r.stderr
    assert r.stdout.strip() == "[]"
    assert (tmp_path / "out" / "pre_sweeptype1.csv").exists()


def test_injected_charge_of_hand_built_segments():
    # Q = I x t and the mean of a ramp's ends x T (common practice, no single source)
    role = RolePlan(name="x", cell_class="c", model="adex", cell_ids=np.zeros(1, int), positions=np.zeros((1, 3)),
                    params={}, segments=[WaveSegment("square", 0.1, 0.2, per_sweep=np.array([1e-10, -3e-10])),
                                         WaveSegment("ramp", 0.3, 0.5, amplitude=-1e-10, amplitude_end=3e-10)])
    assert injected_charge(role, 0) == pytest.approx(1e-10 * 0.1 + 1e-10 * 0.2, rel=1e-12)
    assert injected_charge(role, 1) == pytest.approx(-3e-10 * 0.1 + 1e-10 * 0.2, rel=1e-12)
