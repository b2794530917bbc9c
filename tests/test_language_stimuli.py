"""Stimulus items beyond pulses (steps, step families, ramps, sines, chirps, noise, Poisson
input, extracellular activation), voltage-clamp recording and the collector option names:
parsing, spans, round trips through the formatter, and diagnostics."""

from __future__ import annotations

import pickle
import traceback
from dataclasses import replace

import numpy as np
import pytest
from lark.exceptions import LarkError

from protolang.language import ProtocolError, Span, ast, dump, format_protocol, parse
from protolang.language.units import Quantity

GOOD = """\
protocol "stimulus items"
circuit "slab.circuit.yaml" seed 4
cells:
    pre is pyramidal_deep
    post is pyramidal_deep within 150 um of pre, receiving from pre
    other is basket_fast
sweeps 9 every 10 s
record pre: current clamp, holding -70 mV
record post: voltage clamp, holding -70 mV, series 12 MOhm, noise 2 pA
stimulate pre:
    steps of -100 pA to 300 pA by 50 pA for 500 ms at 100 ms
    step 50 pA for 1 s at 2 s
    ramp 0 pA to 0.3 nA from 100 ms to 1100 ms
    sine 50 pA at 5 Hz from 0 s to 2 s, offset 20 pA
    chirp 50 pA sweeping 0.5 Hz to 20 Hz from 0 s to 10 s
    noise mean 0 pA sd 50 pA tau 5 ms from 0 s to 2 s
stimulate post:
    steps of -90 mV to 30 mV in 9 steps for 200 ms at 100 ms
    step -10 mV for 20 ms at 10 ms
    poisson 500 Hz of 0.5 nS AMPA from 0 s to 2 s
    activate 30 % of basket_fast at 100 ms, 150 ms
    noise mean 1 nS sd 0.5 nS tau 3 ms from 0 s to 2 s, reversal 0 mV
stimulate other:
    spikes at 10 ms, 20 ms
measure pre:
    firing, low 0 pA, high 400 pA, step 25 pA, tolerance 5 pA, rounds 8, width 500 ms, bin 10 ms
"""


def _items(p: ast.Protocol, cell: str) -> tuple:
    return next(s.items for s in p.stimuli if s.cell == cell)


# --- parsing: nodes and SI values ---------------------------------------------------------
def test_current_clamp_items_parse_to_nodes():
    p = parse(GOOD, "g.protocol")
    family, step, ramp, sine, chirp, noise = _items(p, "pre")
    assert step == ast.Step(amplitude=Quantity(50, "pA"), duration=Quantity(1, "s"),
                            at=Quantity(2, "s"))
    assert ramp == ast.Ramp(start_amplitude=Quantity(0, "pA"), stop_amplitude=Quantity(0.3, "nA"),
                            start=Quantity(100, "ms"), stop=Quantity(1100, "ms"))
    assert ramp.stop_amplitude.si == pytest.approx(300e-12) and ramp.stop.si == pytest.approx(1.1)
    assert sine == ast.Sine(amplitude=Quantity(50, "pA"), frequency=Quantity(5, "Hz"),
                            start=Quantity(0, "s"), stop=Quantity(2, "s"),
                            offset=Quantity(20, "pA"))
    assert sine.offset.si == pytest.approx(20e-12)
    assert chirp == ast.Chirp(amplitude=Quantity(50, "pA"), f_start=Quantity(0.5, "Hz"),
                              f_stop=Quantity(20, "Hz"), start=Quantity(0, "s"),
                              stop=Quantity(10, "s"))
    assert noise == ast.Noise(mean=Quantity(0, "pA"), sd=Quantity(50, "pA"), tau=Quantity(5, "ms"),
                              start=Quantity(0, "s"), stop=Quantity(2, "s"))
    assert noise.reversal is None and noise.tau.si == pytest.approx(5e-3)
    assert (family.start, family.stop, family.step, family.count) == (
        Quantity(-100, "pA"), Quantity(300, "pA"), Quantity(50, "pA"), None)
    assert (family.duration.si, family.at.si) == (pytest.approx(0.5), pytest.approx(0.1))


def test_step_families_list_one_amplitude_per_sweep():
    p = parse(GOOD, "g.protocol")
    by = _items(p, "pre")[0]
    within = _items(p, "post")[0]
    # Independent reference: numpy's arange / linspace (common practice, no single source).
    assert [q.si for q in by.values] == pytest.approx(np.arange(-100e-12, 301e-12, 50e-12))
    assert [q.unit for q in by.values] == ["pA"] * 9
    assert [q.value for q in by.values] == [-100, -50, 0, 50, 100, 150, 200, 250, 300]
    assert within.count == 9 and within.step is None
    assert [q.si for q in within.values] == pytest.approx(np.linspace(-90e-3, 30e-3, 9))
    assert [q.value for q in within.values] == [-90, -75, -60, -45, -30, -15, 0, 15, 30]
    assert len(by.values) == len(within.values) == p.sweeps.count


def test_voltage_clamp_and_synaptic_items_parse_to_nodes():
    p = parse(GOOD, "g.protocol")
    pre, post = p.recordings
    assert pre == ast.Recording(cell="pre", mode="current clamp", holding=Quantity(-70, "mV"))
    assert pre.series is None
    assert post == ast.Recording(cell="post", mode="voltage clamp", holding=Quantity(-70, "mV"),
                                 noise=Quantity(2, "pA"), series=Quantity(12, "MOhm"))
    assert post.series.si == pytest.approx(12e6) and post.noise.si == pytest.approx(2e-12)
    _, step, poisson, activate, noise = _items(p, "post")
    assert step == ast.Step(amplitude=Quantity(-10, "mV"), duration=Quantity(20, "ms"),
                            at=Quantity(10, "ms"))
    assert poisson == ast.PoissonInput(rate=Quantity(500, "Hz"), conductance=Quantity(0.5, "nS"),
                                       receptor="AMPA", start=Quantity(0, "s"),
                                       stop=Quantity(2, "s"))
    assert poisson.conductance.si == pytest.approx(0.5e-9)
    assert activate == ast.Activate(fraction=Quantity(30, "%"), cell_class="basket_fast",
                                     times=(Quantity(100, "ms"), Quantity(150, "ms")))
    assert activate.fraction.si == pytest.approx(0.3)
    assert noise.reversal == Quantity(0, "mV") and noise.mean.si == pytest.approx(1e-9)
    assert _items(p, "other") == (ast.SpikeTimes(times=(Quantity(10, "ms"), Quantity(20, "ms"))),)


def test_collector_options_keep_their_values():
    p = parse(GOOD, "g.protocol")
    (item,) = p.measures[0].items
    assert item.collector == "firing"
    assert {o.name: o.value for o in item.options} == {
        "low": Quantity(0, "pA"), "high": Quantity(400, "pA"), "step": Quantity(25, "pA"),
        "tolerance": Quantity(5, "pA"), "rounds": Quantity(8, ""), "width": Quantity(500, "ms"),
        "bin": Quantity(10, "ms")}


def test_spans_of_the_new_items():
    p = parse(GOOD, "g.protocol")
    family, step, ramp, sine, chirp, noise = _items(p, "pre")
    # line 11 is "    steps of -100 pA to 300 pA by 50 pA for 500 ms at 100 ms"
    assert family.span == Span("g.protocol", 11, 5, 11, 61)
    assert family.start.span == Span("g.protocol", 11, 14, 11, 21)
    assert family.step.span == Span("g.protocol", 11, 35, 11, 40)
    assert step.span == Span("g.protocol", 12, 5, 12, 30)
    assert ramp.stop.span == Span("g.protocol", 13, 40, 13, 47)
    assert sine.offset.span == Span("g.protocol", 14, 48, 14, 53)
    assert chirp.f_stop.span == Span("g.protocol", 15, 36, 15, 41)
    assert noise.tau.span == Span("g.protocol", 16, 34, 16, 38)
    _, _, poisson, activate, cond = _items(p, "post")
    assert poisson.span == Span("g.protocol", 20, 5, 20, 50)
    assert poisson.receptor_span == Span("g.protocol", 20, 30, 20, 34)
    assert activate.class_span == Span("g.protocol", 21, 22, 21, 33)
    assert activate.times[1].span == Span("g.protocol", 21, 45, 21, 51)
    assert cond.reversal.span == Span("g.protocol", 22, 66, 22, 70)
    assert p.recordings[1].series.span == Span("g.protocol", 9, 52, 9, 59)
    assert str(poisson.receptor_span) == "g.protocol:20:30"


def test_dump_names_the_new_nodes():
    text = dump(parse(GOOD))
    for name in ("StepFamily", "Ramp", "Sine", "Chirp", "Noise", "PoissonInput", "Activate",
                 "series: 12 MOhm"):
        assert name in text


# --- round trips ---------------------------------------------------------------------------
SCANNED = """\
protocol "scanned stimulus slots"
circuit "slab.circuit.yaml" seed 4
scan @amp: 100 pA
scan @lo: -100 pA, 0 pA
scan @end: 3 s
scan @fhi: 40 Hz
scan @hold: -60 mV
scan @rs: 8 MOhm, 15 MOhm
scan @rate: 0 Hz, 500 Hz
scan @g: 1 nS
scan @pct: 100 %
scan @sd: 20 pA
scan @cmd: -20 mV
cells:
    pre is pyramidal_deep
    post is pyramidal_deep
sweeps 5 every 10 s
record post: voltage clamp, holding @hold, series @rs
stimulate pre:
    steps of @lo to 300 pA in 5 steps for 500 ms at 100 ms
    step @amp for 1 s at 2 s
    ramp 0 pA to @amp from 100 ms to @end
    sine @amp at 5 Hz from 0 s to @end, offset @amp
    chirp @amp sweeping 1 Hz to @fhi from 0 s to @end
    noise mean @amp sd @sd tau 5 ms from 0 s to @end
stimulate post:
    step @cmd for 20 ms at 10 ms
    poisson @rate of @g AMPA from 0 s to @end
    activate @pct of basket_fast at 100 ms, 150 ms
"""


@pytest.mark.parametrize("text", [GOOD, SCANNED], ids=["good", "scanned"])
def test_round_trip(text):
    p = parse(text)
    formatted = format_protocol(p)
    again = parse(formatted)
    assert again == p
    assert format_protocol(again) == formatted  # canonical: formatting is a fixed point
    assert len(again.points) == len(p.points)


def test_scan_references_stay_in_the_template_and_fill_each_point():
    p = parse(SCANNED, "s.protocol")
    family, step, *_ = _items(p, "pre")
    assert family.start == ast.ScanRef(name="lo") and family.values == () and family.count == 5
    assert step.amplitude == ast.ScanRef(name="amp")
    assert p.recordings[0].series == ast.ScanRef(name="rs")
    assert "steps of @lo to 300 pA in 5 steps" in format_protocol(p)
    assert len(p.points) == 2 ** 3
    last = p.points[-1].protocol
    family = _items(last, "pre")[0]
    assert [q.value for q in family.values] == [0, 75, 150, 225, 300]
    assert last.recordings[0].series.si == pytest.approx(15e6)
    poisson = _items(last, "post")[1]
    assert poisson.rate.si == 500 and poisson.conductance.si == pytest.approx(1e-9)


def _random_items(rng: np.random.Generator, clamped: bool, n_family: int) -> list:
    """Random stimulus items that satisfy every lowering rule for a cell in the given mode."""

    def num(lo: float, hi: float) -> float:
        value = float(rng.uniform(lo, hi))
        return round(value, int(rng.integers(0, 4))) if rng.random() < 0.5 else value

    amp_unit = "mV" if clamped else str(rng.choice(["pA", "nA"]))
    span_of = {"mV": 40.0, "pA": 500.0, "nA": 0.5}[amp_unit]

    def amp(lo: float = -1.0) -> Quantity:
        return Quantity(num(lo * span_of, span_of), amp_unit)

    def window() -> dict[str, Quantity]:
        start = num(0, 1000)
        return {"start": Quantity(start, "ms"),
                "stop": Quantity(start + float(rng.uniform(1, 2000)), "ms")}

    items = []
    for _ in range(int(rng.integers(1, 6))):
        kind = int(rng.integers(9))
        if kind == 0:
            items.append(ast.Step(amplitude=amp(), duration=Quantity(float(rng.uniform(1, 900)), "ms"),
                                  at=Quantity(num(0, 3000), "ms")))
        elif kind == 1:
            start = num(-span_of, 0)
            if rng.random() < 0.5:
                step = float(rng.uniform(0.01, 1)) * span_of / n_family * float(rng.choice([-1, 1]))
                stop = start + step * (n_family - 1) + 0.3 * step
                items.append(ast.StepFamily(start=Quantity(start, amp_unit),
                                            stop=Quantity(stop, amp_unit),
                                            step=Quantity(step, amp_unit),
                                            duration=Quantity(500, "ms"), at=Quantity(100, "ms")))
            else:
                stop = start + float(rng.uniform(0.1, 1)) * span_of
                items.append(ast.StepFamily(start=Quantity(start, amp_unit),
                                            stop=Quantity(stop, amp_unit), count=n_family,
                                            duration=Quantity(num(1, 900) + 0.5, "ms"),
                                            at=Quantity(num(0, 300), "ms")))
        elif kind == 2:
            items.append(ast.Ramp(start_amplitude=amp(), stop_amplitude=amp(), **window()))
        elif kind == 3:
            items.append(ast.Sine(amplitude=amp(0.0), frequency=Quantity(float(rng.uniform(0.1, 50)), "Hz"),
                                  offset=amp() if rng.random() < 0.5 else None,
                                  **window()))
        elif kind == 4:
            f1 = num(0, 10)
            items.append(ast.Chirp(amplitude=amp(0.0), f_start=Quantity(f1, "Hz"),
                                   f_stop=Quantity(f1 + float(rng.uniform(0.5, 40)), "Hz"),
                                   **window()))
        elif kind == 5:
            if clamped or rng.random() < 0.5:
                mean, sd = Quantity(num(0, 5), "nS"), Quantity(num(0, 2), "nS")
                reversal = Quantity(num(-90, 10), "mV")
            else:
                mean, sd, reversal = amp(), Quantity(num(0, span_of), amp_unit), None
            items.append(ast.Noise(mean=mean, sd=sd, tau=Quantity(float(rng.uniform(0.5, 50)), "ms"),
                                   reversal=reversal, **window()))
        elif kind == 6:
            items.append(ast.PoissonInput(rate=Quantity(num(0, 2000), "Hz"),
                                          conductance=Quantity(num(0, 3), "nS"),
                                          receptor=str(rng.choice(["AMPA", "NMDA", "GABA_A"])),
                                          **window()))
        elif kind == 7:
            times = np.cumsum(rng.uniform(0.1, 100, int(rng.integers(1, 5))))
            items.append(ast.Activate(fraction=Quantity(float(rng.uniform(0.1, 100)), "%"),
                                      cell_class="basket_fast",
                                      times=tuple(Quantity(float(t), "ms") for t in times)))
        elif not clamped:
            items.append(ast.Pulse(amplitude=amp(), duration=Quantity(2, "ms"),
                                   at=Quantity(num(0, 3000), "ms")))
    return items


def test_round_trip_of_random_stimuli():
    rng = np.random.default_rng(20240704)
    for _ in range(120):
        n_family = int(rng.integers(2, 30))
        cc, vc = _random_items(rng, False, n_family), _random_items(rng, True, n_family)
        p = ast.Protocol(
            title="random stimuli", circuit="slab.circuit.yaml", seed=1,
            sweeps=ast.Sweeps(count=n_family, interval=Quantity(10, "s")),
            cells=ast.Cells(picks=(ast.CellPick(name="a", cell_class="pyramidal_deep"),
                                   ast.CellPick(name="b", cell_class="pyramidal_deep"))),
            recordings=(ast.Recording(cell="b", mode="voltage clamp",
                                      holding=Quantity(float(rng.uniform(-90, -40)), "mV"),
                                      series=Quantity(float(rng.uniform(1, 30)), "MOhm")
                                      if rng.random() < 0.5 else None),),
            stimuli=(ast.Stimulate(cell="a", items=tuple(cc)), ast.Stimulate(cell="b", items=tuple(vc))))
        text = format_protocol(p)
        q = parse(text)
        # The parser fills in the family amplitudes; everything else must come back as written.
        bare = replace(q, stimuli=tuple(
            replace(s, items=tuple(replace(i, values=()) if isinstance(i, ast.StepFamily) else i
                                   for i in s.items)) for s in q.stimuli))
        assert bare == p, text
        assert format_protocol(q) == text
        for item in (i for s in q.stimuli for i in s.items if isinstance(i, ast.StepFamily)):
            got = [v.si for v in item.values]
            # Independent reference: numpy's linspace / arange (common practice, no single source).
            if item.count is not None:
                want = np.linspace(item.start.si, item.stop.si, item.count)
            else:
                want = item.start.si + item.step.si * np.arange(n_family)
            assert got == pytest.approx(want, rel=1e-9, abs=1e-9 * abs(item.start.si - item.stop.si)), text


# --- diagnostics -----------------------------------------------------------------------------
BASE = """\
protocol "stimuli"
circuit "slab.circuit.yaml" seed 3
cells:
    pre is pyramidal_deep
    post is pyramidal_deep within 150 um of pre, receiving from pre
sweeps 9 every 10 s
record post: voltage clamp, holding -70 mV
"""


def _edit(old: str, new: str) -> str:
    assert old in BASE
    return BASE.replace(old, new, 1)


def _add(extra: str) -> str:
    return BASE + extra


def _pre(*lines: str) -> str:
    return _add("stimulate pre:\n" + "".join(f"    {line}\n" for line in lines))


def _post(*lines: str) -> str:
    return _add("stimulate post:\n" + "".join(f"    {line}\n" for line in lines))


# (id, source, line, column, substrings of the rendered message)
BAD = [
    ("ramp ends before it starts", _pre("ramp 0 pA to 100 pA from 100 ms to 50 ms"), 9, 40,
     ("ramp ends before it starts", "did you mean 'from 50 ms to 100 ms'?")),
    ("chirp frequencies reversed", _pre("chirp 10 pA sweeping 20 Hz to 5 Hz from 0 s to 1 s"), 9, 35,
     ("chirp frequencies reversed", "swap them: 'sweeping 5 Hz to 20 Hz'")),
    ("chirp without a sweep", _pre("chirp 10 pA sweeping 20 Hz to 20 Hz from 0 s to 1 s"), 9, 35,
     ("chirp frequencies reversed", "write 'sine A at F from T1 to T2'")),
    ("Poisson rate negative", _pre("poisson -5 Hz of 1 nS AMPA from 0 s to 1 s"), 9, 13,
     ("Poisson rate cannot be negative, got -5 Hz",)),
    ("Poisson conductance without unit", _pre("poisson 5 Hz of 1 AMPA from 0 s to 1 s"), 9, 21,
     ("needs a conductance with its unit, then a receptor", "did you mean '1 nS AMPA'?")),
    ("Poisson without receptor", _pre("poisson 5 Hz of 1 nS from 0 s to 1 s"), 9, 21,
     ("needs a receptor after its conductance", "e.g. AMPA, NMDA, GABA_A")),
    ("family count is not the sweep count",
     _pre("steps of 0 pA to 300 pA by 50 pA for 500 ms at 100 ms"), 9, 5,
     ("the step family has 7 amplitudes but the protocol runs 9 sweeps",
      "9 amplitudes, one per sweep", "set 'sweeps 7 every 10 s'")),
    ("family count in steps", _pre("steps of 0 pA to 300 pA in 4 steps for 500 ms at 100 ms"), 9, 5,
     ("4 amplitudes but the protocol runs 9 sweeps", "'sweeps 4 every 10 s'")),
    ("zero step in a family", _pre("steps of 0 pA to 300 pA by 0 pA for 500 ms at 100 ms"), 9, 32,
     ("a step family with a zero step never reaches its end", "in N steps")),
    ("family step away from the end", _pre("steps of 0 pA to 300 pA by -50 pA for 500 ms at 100 ms"),
     9, 32, ("a step of -50 pA goes away from 300 pA", "flip the sign: 'by 50 pA'")),
    ("family with one amplitude", _pre("steps of 0 pA to 300 pA in 1 steps for 500 ms at 100 ms"),
     9, 32, ("a step family needs at least 2 amplitudes, got 1",)),
    ("family step larger than its range", _pre("steps of 0 pA to 30 pA by 50 pA for 500 ms at 100 ms"),
     9, 31, ("at least 2 amplitudes, got 1", "use a smaller step")),
    ("family with equal ends", _pre("steps of 10 pA to 10 pA in 9 steps for 500 ms at 100 ms"),
     9, 23, ("a step family from 10 pA to 10 pA has a zero step",)),
    ("family mixing dimensions", _pre("steps of 0 pA to 30 mV by 5 mV for 500 ms at 100 ms"), 9, 22,
     ("the step family mixes a current and a voltage: 0 pA and 30 mV",)),
    ("voltage clamp with a current step", _post("step 100 pA for 10 ms at 5 ms"), 9, 10,
     ("voltage clamp on a cell that is also current-injected", "clamped at line 7",
      "give the amplitude in mV")),
    ("voltage clamp with a current train", _post("train 5 pulses of 1 nA for 2 ms at 20 Hz from 10 ms"),
     9, 23, ("voltage clamp on a cell that is also current-injected", "'train' injects current")),
    ("voltage clamp with current noise", _post("noise mean 0 pA sd 5 pA tau 3 ms from 0 s to 1 s"),
     9, 16, ("also current-injected", "gets noise of 0 pA")),
    ("voltage step in current clamp", _add("record pre: current clamp\nstimulate pre:\n"
                                           "    step -10 mV for 10 ms at 5 ms\n"), 10, 10,
     ("a voltage step needs 'record pre: voltage clamp'", "recorded 'current clamp' (line 8)")),
    ("voltage ramp on an unrecorded cell", _pre("ramp -10 mV to 0 mV from 0 s to 1 s"), 9, 10,
     ("a voltage ramp needs 'record pre: voltage clamp'", "no record line",
      "add 'record pre: voltage clamp, holding -70 mV'")),
    ("voltage clamp without holding", _edit(", holding -70 mV", ""), 7, 14,
     ("voltage clamp needs a holding potential", "'record post: voltage clamp, holding -70 mV'")),
    ("holding current in voltage clamp", _edit("holding -70 mV", "holding 100 pA"), 7, 37,
     ("holding is the command potential and needs a voltage, got 'pA' (current)",)),
    ("series with a wrong unit", _edit("-70 mV", "-70 mV, series 10 mV"), 7, 52,
     ("the series resistance needs a resistance", "got 'mV' (voltage)")),
    ("series with an unknown unit", _edit("-70 mV", "-70 mV, series 10 Mohm"), 7, 52,
     ("unknown unit 'Mohm'", "did you mean 'MOhm'?")),
    ("series of zero", _edit("-70 mV", "-70 mV, series 0 MOhm"), 7, 52,
     ("the series resistance must be greater than 0",)),
    ("series in current clamp", _add("record pre: current clamp, series 10 MOhm\n"), 8, 28,
     ("a series resistance applies only in voltage clamp",)),
    ("voltage noise in voltage clamp", _edit("-70 mV", "-70 mV, noise 0.1 mV"), 7, 51,
     ("the current noise of a voltage clamp needs a current",)),
    ("unknown record mode", _edit("voltage clamp", "voltage clmap"), 7, 14,
     ("unknown recording mode 'voltage clmap'", "did you mean 'voltage clamp'?",
      "'current clamp', 'voltage clamp' or 'off'")),
    ("activate above 100 %", _pre("activate 150 % of basket_fast at 10 ms"), 9, 14,
     ("the activated fraction cannot exceed 100 %, got 150 %",)),
    ("activate nothing", _pre("activate 0 % of basket_fast at 10 ms"), 9, 14,
     ("the activated fraction must be greater than 0",)),
    ("activation times out of order", _pre("activate 20 % of basket_fast at 10 ms, 5 ms"), 9, 44,
     ("activation times must increase: 5 ms comes after 10 ms",)),
    ("conductance noise without reversal", _pre("noise mean 1 nS sd 0.2 nS tau 5 ms from 0 s to 1 s"),
     9, 5, ("conductance noise needs a reversal potential", "', reversal 0 mV'")),
    ("reversal on current noise", _pre("noise mean 1 pA sd 1 pA tau 5 ms from 0 s to 1 s, reversal 0 mV"),
     9, 64, ("a reversal potential applies only to conductance noise",)),
    ("noise mixing dimensions", _pre("noise mean 1 pA sd 0.2 nS tau 1 ms from 0 s to 1 s"), 9, 24,
     ("the noise mixes a current and a conductance",)),
    ("negative noise SD", _pre("noise mean 1 pA sd -2 pA tau 1 ms from 0 s to 1 s"), 9, 24,
     ("the noise SD must be at least 0, got -2 pA",)),
    ("spike times mixed with a ramp", _pre("spikes at 10 ms, 20 ms", "ramp 0 pA to 100 pA from 1 s to 2 s"),
     10, 5, ("cell 'pre' gets both spike times and a ramp",)),
    ("spike times on a clamped cell", _post("spikes at 10 ms"), 9, 5,
     ("'post' is voltage-clamped (line 7)", "spike source with no membrane")),
    ("sine with zero frequency", _pre("sine 10 pA at 0 Hz from 0 s to 1 s"), 9, 19,
     ("the sine frequency must be greater than 0, got 0 Hz",)),
    ("sine with a negative amplitude", _pre("sine -10 pA at 3 Hz from 0 s to 1 s"), 9, 10,
     ("the sine amplitude must be at least 0",)),
    ("sine window before 0", _pre("sine 10 pA at 3 Hz from -1 s to 1 s"), 9, 29,
     ("the sine start must be at least 0, got -1 s",)),
    ("step amplitude without unit", _pre("step 10 for 10 ms at 5 ms"), 9, 10,
     ("the step amplitude needs a current or a voltage, got a plain number",
      "add a unit, e.g. 10 pA or 10 mV")),
    ("step amplitude in time", _pre("step 10 ms for 10 ms at 5 ms"), 9, 10,
     ("needs a current or a voltage, got 'ms' (time)",)),
    ("keyword run into a word", _pre("stepp 10 pA for 10 ms at 5 ms"), 9, 5,
     ("unexpected word 'stepp'", "did you mean 'step'?")),
    ("stimulus typo lists the groups", _pre("rmp 1 nA to 2 nA from 0 s to 1 s"), 9, 5,
     ("did you mean 'ramp'?", "a waveform ('chirp', 'noise', 'ramp', 'sine', 'step' or 'steps')",
      "a synaptic input ('activate' or 'poisson')")),
    ("collector option of the wrong kind", _add("measure post:\n    firing, bin 1 pA\n"), 9, 17,
     ("the bin option needs a time", "got 'pA' (current)")),
    ("collector tolerance of zero", _add("measure post:\n    firing, tolerance 0 pA\n"), 9, 23,
     ("the tolerance option must be greater than 0",)),
]


@pytest.mark.parametrize("text, line, column, needles", [b[1:] for b in BAD], ids=[b[0] for b in BAD])
def test_diagnostics(text, line, column, needles):
    with pytest.raises(ProtocolError) as info:
        parse(text, "x.protocol")
    exc = info.value
    assert type(exc) is ProtocolError and not isinstance(exc, LarkError)
    rendered = str(exc)
    lines = rendered.split("\n")
    header = f"x.protocol:{line}:{column}: error:"
    assert any(row.startswith(header) for row in lines), rendered
    for needle in needles:
        assert needle in rendered, rendered
    at = next(i for i, row in enumerate(lines) if row.startswith(header))
    caret_row = lines[at + 2]
    assert caret_row.index("^") == 4 + column - 1, rendered
    assert "lark" not in "".join(traceback.format_exception(exc))
    assert pickle.loads(pickle.dumps(exc)).diagnostics == exc.diagnostics


def test_bad_inputs_are_distinct_and_enough():
    assert len({b[1] for b in BAD}) == len(BAD) >= 15


def test_each_mistake_is_reported_once():
    # A misspelt mode must not also make the clamped cell's voltage step an error, and a
    # bad amplitude must not also trip the mode check.
    text = _edit("voltage clamp", "voltage clmap") + "stimulate post:\n    step -10 mV for 5 ms at 1 ms\n"
    with pytest.raises(ProtocolError) as info:
        parse(text, "x.protocol")
    assert [d.message for d in info.value.diagnostics] == ["unknown recording mode 'voltage clmap'"]
    with pytest.raises(ProtocolError) as info:
        parse(_post("ramp 10 pA to 3 mV from 0 s to 1 s"), "x.protocol")
    assert len(info.value.diagnostics) == 1


def test_errors_across_items_are_collected_and_sorted():
    text = _pre("ramp 0 pA to 1 nA from 2 s to 1 s", "sine 1 pA at 0 Hz from 0 s to 1 s",
                "poisson -1 Hz of 1 nS AMPA from 0 s to 1 s")
    with pytest.raises(ProtocolError) as info:
        parse(text, "x.protocol")
    where = [(d.span.line, d.span.column) for d in info.value.diagnostics]
    assert where == [(9, 35), (10, 18), (11, 13)]


def test_a_scanned_family_is_counted_at_every_point():
    text = _add("scan @lo: -100 pA, 0 pA\nstimulate pre:\n"
                "    steps of @lo to 300 pA by 50 pA for 500 ms at 100 ms\n")
    with pytest.raises(ProtocolError) as info:
        parse(text, "x.protocol")
    (diag,) = info.value.diagnostics
    assert diag.message == ("the step family has 7 amplitudes but the protocol runs 9 sweeps "
                            "(at scan point @lo = 0 pA)")
    assert (diag.span.line, diag.span.column) == (10, 5)
