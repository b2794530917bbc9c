"""Tests of `reference` blocks: parsing and formatting, bad input, condition warnings, agreement and the comparison table.

Every published value in these protocols is an invented test fixture (authors "Invented Fixture"),
not a number from any paper: the tests exercise the language and the arithmetic, not the model's
agreement with the literature.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from protolang.api import load, loads
from protolang.language import ProtocolError, ast, format_protocol, parse
from protolang.language.units import Quantity
from protolang.measure.compare import COMPARISON_COLUMNS, compare, judge
from protolang.plan.references import reference_plans

ROOT = Path(__file__).resolve().parents[1]
CIRCUIT = ROOT / "demo" / "slab.circuit.yaml"

SOURCE = 'source "Invented Fixture" 2001 "Test J 1:1-2"'

# A small pair protocol on the demo circuit; the reference blocks are appended after it.
# Line numbers of the diagnostics below count from here (the first reference starts at line 22).
BASE = f"""\
protocol "reference test pair"
circuit "{CIRCUIT}" seed 3

cells:
    pre is pyramidal_deep
    post is pyramidal_deep within 150 um of pre, receiving from pre
    repeat 2

sweeps 2 every 10 s

simulate deterministic

record pre: current clamp
record post: current clamp, holding -70 mV

stimulate pre:
    pulse 1.5 nA for 2 ms at 50 ms

measure post:
    responses to pre

"""
REF_LINE = BASE.count("\n") + 1
assert REF_LINE == 22

FULL = f"""\
reference amplitude of post from pre:
    value 1.3 mV, sd 1.1 mV, n 138
    range 0.15 mV to 5.5 mV
    {SOURCE}
    species rat
    age "P14-16"
    temperature 32 degC to 34 degC
    calcium 1.3 mM
    agree within 1 sd
    accept different calcium
    from memory
    note "invented fixture for the parser test"
"""


def ref(measure: str = "amplitude", cell: str = "post", source: str | None = "pre", *lines: str) -> str:
    """A reference block with the given lines (each indented by four spaces)."""
    head = f"reference {measure} of {cell}" + (f" from {source}" if source else "") + ":\n"
    return head + "".join(f"    {line}\n" for line in lines)


def write(tmp_path: Path, text: str, name: str = "r.protocol") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


# --- 1. parsing and formatting ---------------------------------------------------------------
def test_full_reference_block_lowers_to_the_expected_ast(tmp_path):
    path = write(tmp_path, BASE + FULL)
    p = load(path).protocol
    (r,) = p.references
    assert r == ast.Reference(
        measure="amplitude", cell="post", source_cell="pre",
        value=Quantity(1.3, "mV"), sd=Quantity(1.1, "mV"), low=Quantity(0.15, "mV"), high=Quantity(5.5, "mV"),
        n=138, authors="Invented Fixture", year=2001, journal="Test J 1:1-2",
        rule="sd", tolerance=Quantity(1.0, ""),
        conditions=(
            ast.ReferenceCondition(name="species", low="rat"),
            ast.ReferenceCondition(name="age", low="P14-16"),
            ast.ReferenceCondition(name="temperature", low=Quantity(32, "degC"), high=Quantity(34, "degC")),
            ast.ReferenceCondition(name="calcium", low=Quantity(1.3, "mM")),
        ),
        accepted=("calcium",), from_memory=True, note="invented fixture for the parser test")
    # spans: the block, its measure, cell and presynaptic cell names
    assert (r.span.file, r.span.line, r.span.column) == (str(path), REF_LINE, 1)
    assert (r.measure_span.line, r.measure_span.column) == (REF_LINE, 11)
    assert (r.cell_span.line, r.cell_span.column) == (REF_LINE, 24)
    assert (r.source_span.line, r.source_span.column) == (REF_LINE, 34)
    assert (r.value.span.line, r.value.span.column) == (REF_LINE + 1, 11)
    calcium = r.conditions[3]
    assert (calcium.span.line, calcium.span.column) == (REF_LINE + 7, 5)
    # the full block round-trips through the formatter
    assert parse(format_protocol(p), str(path)) == p


ROUND_TRIPS = {
    "sd": ref("amplitude", "post", "pre", "value 1.3 mV, sd 1.1 mV, n 12", SOURCE, "agree within 1.5 sd"),
    "sd written SD": ref("amplitude", "post", "pre", "value 1.3 mV, sd 1.1 mV", SOURCE, "agree within 2 SD"),
    "relative": ref("latency", "post", "pre", "value 1.2 ms", SOURCE, "agree within 25 %"),
    "absolute mV": ref("amplitude", "post", "pre", "value 1.3 mV", SOURCE, "agree within 0.5 mV"),
    "inside range": ref("amplitude", "post", "pre", "range 0.15 mV to 5.5 mV, sd 0.9 mV, n 40", SOURCE,
                        "agree inside range"),
    "fraction in %": ref("failures", "post", "pre", "value 14 %, sd 5 %, n 20", SOURCE, "agree within 0.05"),
    "fraction plain": ref("failures", "post", "pre", "value 0.14, sd 0.05", "range 0 to 0.4", SOURCE,
                          "agree within 10 %"),
    "fraction range in %": ref("failures", "post", "pre", "range 5 % to 30 %", SOURCE, "agree inside range"),
}


@pytest.mark.parametrize("block", ROUND_TRIPS.values(), ids=ROUND_TRIPS.keys())
def test_format_round_trips_every_rule_kind(block):
    p = parse(BASE + block, "rt.protocol")
    text = format_protocol(p)
    assert parse(text, "rt.protocol") == p
    # the formatted text is itself a fixed point of the formatter
    assert format_protocol(parse(text, "rt.protocol")) == text


def test_rule_kinds_and_fraction_values():
    rules = {k: parse(BASE + b).references[0] for k, b in ROUND_TRIPS.items()}
    assert [(k, r.rule) for k, r in rules.items()] == [
        ("sd", "sd"), ("sd written SD", "sd"), ("relative", "relative"), ("absolute mV", "absolute"),
        ("inside range", "range"), ("fraction in %", "absolute"), ("fraction plain", "relative"),
        ("fraction range in %", "range")]
    assert rules["sd written SD"].tolerance == Quantity(2, "")
    assert rules["relative"].tolerance == Quantity(25, "%")
    assert rules["absolute mV"].tolerance == Quantity(0.5, "mV")
    # 14 % and 0.14 are the same fraction in SI, written two ways
    assert rules["fraction in %"].value == Quantity(14, "%")
    assert rules["fraction plain"].value == Quantity(0.14, "")
    assert rules["fraction in %"].value.si == pytest.approx(rules["fraction plain"].value.si)
    assert "value 14 %, sd 5 %, n 20" in format_protocol(parse(BASE + ROUND_TRIPS["fraction in %"]))
    assert "agree within 0.5 mV" in format_protocol(parse(BASE + ROUND_TRIPS["absolute mV"]))
    assert "agree inside range" in format_protocol(parse(BASE + ROUND_TRIPS["inside range"]))


def test_reference_plans_convert_to_table_units():
    vclamp = BASE.replace("record post: current clamp, holding -70 mV",
                          "record post: voltage clamp, holding -70 mV")
    text = (vclamp
            + ref("amplitude", "post", "pre", "value 40 pA, sd 0.02 nA, n 9", SOURCE, "agree within 10 %") + "\n"
            + ref("failures", "post", "pre", "value 14 %, sd 0.05", SOURCE, "agree within 0.05") + "\n"
            + ref("latency", "post", "pre", "value 1.5 ms", SOURCE, "calcium 1.3 mM", "accept different calcium",
                  "agree within 0.0005 s"))
    exp = loads(text, file="plans.protocol")
    amp, fail, lat = reference_plans(exp.protocol, exp.circuit, {"post": "voltage clamp"})
    # an amplitude of a voltage-clamped cell is a current, in pA; 0.02 nA = 20 pA
    assert (amp["unit"], amp["dimension"]) == ("pA", "current")
    assert amp["value"] == pytest.approx(40) and amp["sd"] == pytest.approx(20) and amp["n"] == 9
    assert (amp["rule"], amp["tolerance"], amp["rule_text"]) == ("relative", pytest.approx(0.1), "within 10 %")
    # fractions: 14 % -> 0.14, an absolute band of 0.05
    assert (fail["unit"], fail["value"], fail["sd"]) == ("", pytest.approx(0.14), pytest.approx(0.05))
    assert (fail["rule"], fail["tolerance"]) == ("absolute", pytest.approx(0.05))
    # 0.0005 s = 0.5 ms, in the latency column's unit; the accepted difference is listed as such
    assert (lat["unit"], lat["tolerance"]) == ("ms", pytest.approx(0.5))
    assert lat["differences"] == "calcium 1.3 mM (model 2 mM) accepted"
    assert lat["unaccepted_differences"] == []
    assert lat["span"] == f"plans.protocol:{REF_LINE + 10}:1"   # after two 4-line blocks and their blank lines


# --- 2. bad input ----------------------------------------------------------------------------
NO_MEASURE = BASE.replace("measure post:\n    responses to pre\n\n", "")
NO_MEASURE_REF = NO_MEASURE.count("\n") + 1
DISTANCE_ONLY = BASE.replace(", receiving from pre", "")
R = REF_LINE

# (id, protocol text, line, column, words of the message, words of the expected text, words of the hint or None)
BAD = [
    ("no source", BASE + ref("amplitude", "post", "pre", "value 1 mV", "agree within 20 %"),
     R, 1, "has no source", "a 'source' line", "add 'from memory'"),
    ("no value or range", BASE + ref("amplitude", "post", "pre", SOURCE, "agree within 20 %"),
     R, 1, "gives no published value", "'range Q to Q'", "value 1.3 mV"),
    ("no agree line", BASE + ref("amplitude", "post", "pre", "value 1 mV", SOURCE),
     R, 1, "has no agreement rule", "agree inside range", "agree within 2 sd"),
    ("sd rule without sd", BASE + ref("amplitude", "post", "pre", "value 1 mV", SOURCE, "agree within 2 sd"),
     R + 3, 18, "needs the published SD", "'sd Q' field", "agree within 30 %"),
    ("range rule without range", BASE + ref("amplitude", "post", "pre", "value 1 mV", SOURCE, "agree inside range"),
     R + 3, 5, "needs the published range", "'range Q to Q'", "range 0.15 mV to 5.5 mV"),
    ("tolerance in ms for an amplitude", BASE + ref("amplitude", "post", "pre", "value 1 mV", SOURCE,
                                                    "agree within 2 ms"),
     R + 3, 18, "wrong unit for amplitude", "a percentage", "agree within 25 %"),
    ("pA for a current-clamped cell", BASE + ref("amplitude", "post", "pre", "value 20 pA", SOURCE, "agree within 20 %"),
     R + 1, 11, "recorded in current clamp, so its amplitude is a voltage", "a voltage",
     "record 'post' in the mode the paper used"),
    ("measure not collected", NO_MEASURE + ref("amplitude", "post", "pre", "value 1 mV", SOURCE, "agree within 20 %"),
     NO_MEASURE_REF, 11, "does not collect", "'responses to pre' in a 'measure post:' block",
     "add a block 'measure post:'"),
    ("unknown measure", BASE + ref("amplitud", "post", "pre", "value 1 mV", SOURCE, "agree within 20 %"),
     R, 11, "unknown measure 'amplitud'", "one of amplitude, cv", "did you mean 'amplitude'?"),
    ("probability of a receiving-from cell", BASE + ref("probability", "post", "pre", "value 10 %", SOURCE,
                                                        "agree within 0.05"),
     6, 50, "every tested pair is connected", "pairs selected by distance only", "drop 'receiving from pre'"),
    ("amplitude without from", BASE + ref("amplitude", "post", None, "value 1 mV", SOURCE, "agree within 20 %"),
     R, 24, "needs the presynaptic cell", "from PRE", "e.g. 'from pre'"),
    ("from on a cell measure", BASE + ref("rheobase", "post", "pre", "value 100 pA", SOURCE, "agree within 20 %"),
     R, 33, "'rheobase' takes no 'from' cell", "'reference rheobase of post'", "drop 'from pre'"),
    ("accept a condition not stated", BASE + ref("amplitude", "post", "pre", "value 1 mV", SOURCE, "agree within 20 %",
                                                 "accept different calcium"),
     R + 4, 22, "the reference states no calcium", "a 'calcium ...' line", "state the calcium"),
    ("duplicate reference", BASE + ref("amplitude", "post", "pre", "value 1 mV", SOURCE, "agree within 20 %")
     + ref("amplitude", "post", "pre", "value 2 mV", SOURCE, "agree within 20 %"),
     R + 4, 1, "duplicate 'reference amplitude of post from pre'", "one 'reference amplitude", "first one is at line 22"),
    ("failure fraction above 100 %", BASE + ref("failures", "post", "pre", "value 120 %", SOURCE, "agree within 0.05"),
     R + 1, 11, "must lie between 0 and 1", "a percentage (e.g. 14 %)", None),
    ("scanned published value", BASE.replace("simulate deterministic", "scan @x: 1 mV, 2 mV\nsimulate deterministic")
     + ref("amplitude", "post", "pre", "value @x", SOURCE, "agree within 20 %"),
     R + 2, 11, "cannot be scanned (@x)", "a published number", "write the number out"),
]




def _bad_params():
    for name, *values in BAD:
        yield pytest.param(*values, id=name)


@pytest.mark.parametrize("text, line, column, message, expected, hint", list(_bad_params()))
def test_bad_reference_is_a_positioned_error(tmp_path, text, line, column, message, expected, hint):
    path = write(tmp_path, text)
    with pytest.raises(ProtocolError) as info:
        load(path).check()
    diags = info.value.diagnostics
    assert all(d.severity == "error" for d in diags)
    found = [d for d in diags if message in d.message]
    assert found, str(info.value)
    (d,) = found
    assert d.span is not None, f"no position: {d}"
    assert (d.span.file, d.span.line, d.span.column) == (str(path), line, column), str(info.value)
    assert d.expected and expected in d.expected, d.expected
    if hint is not None:
        assert d.hint and hint in d.hint, d.hint
    # the rendered text names the file, line and column, and quotes the line with a caret
    rendered = str(info.value)
    assert f"{path}:{line}:{column}: error:" in rendered


def test_bad_inputs_are_distinct():
    texts = [b[1] for b in BAD]
    assert len(set(texts)) == len(texts) == 16


def test_controls_of_the_bad_inputs_parse():
    # The same references parse where the protocol fits them, so each error above is about the
    # one thing it names.
    vclamp = BASE.replace("record post: current clamp, holding -70 mV", "record post: voltage clamp, holding -70 mV")
    loads(vclamp + ref("amplitude", "post", "pre", "value 20 pA", SOURCE, "agree within 20 %")).check()
    loads(DISTANCE_ONLY + ref("probability", "post", "pre", "value 10 %", SOURCE, "agree within 0.05")).check()
    loads(BASE + ref("failures", "post", "pre", "value 100 %", SOURCE, "agree within 0.05")).check()
    loads(BASE + ref("amplitude", "post", "pre", "value 1 mV", "range 0.1 mV to 2 mV", SOURCE,
                     "agree inside range")).check()
    loads(BASE + ref("amplitude", "post", "pre", "value 1 mV", SOURCE, "agree within 20 %", "calcium 1.3 mM",
                     "accept different calcium")).check()


def test_wrong_unit_tolerance_gives_one_error():
    with pytest.raises(ProtocolError) as info:
        parse(BASE + ref("amplitude", "post", "pre", "value 1 mV", SOURCE, "agree within 2 ms"), "x.protocol")
    assert [d.message for d in info.value.diagnostics] == [
        "a tolerance in the wrong unit for amplitude: got 'ms' (time)"]


def test_unknown_measure_gives_one_error():
    with pytest.raises(ProtocolError) as info:
        parse(BASE + ref("amplitud", "post", "pre", "value 1 mV", SOURCE, "agree within 20 %"), "x.protocol")
    assert len(info.value.diagnostics) == 1, str(info.value)


# An amplitude's published numbers need a voltage or a current: a percentage or a bare number is an error.
AMPLITUDE_SLIPS = {
    "sd in %": ("value 1.3 mV, sd 30 %", "agree within 1 sd"),
    "sd without unit": ("value 1.3 mV, sd 1.1", "agree within 1 sd"),
    "value in %": ("value 1.3 %", "agree within 1 mV"),
    "range end without unit": ("range 0.0001 to 5.5 mV", "agree inside range"),
}


@pytest.mark.parametrize("value_line, rule", AMPLITUDE_SLIPS.values(), ids=AMPLITUDE_SLIPS.keys())
def test_amplitude_in_percent_or_without_unit_is_an_error(value_line, rule):
    with pytest.raises(ProtocolError) as info:
        parse(BASE + ref("amplitude", "post", "pre", value_line, SOURCE, rule), "x.protocol")
    (d,) = info.value.diagnostics
    assert d.span.line == REF_LINE + 1 and d.expected


# --- 3. condition warnings -------------------------------------------------------------------
def _warnings(tmp_path, text: str) -> list:
    return load(write(tmp_path, text)).check()


def test_calcium_difference_warns_at_the_calcium_line(tmp_path):
    block = ref("amplitude", "post", "pre", "value 1 mV", SOURCE, "calcium 1.3 mM", "agree within 20 %")
    (w,) = _warnings(tmp_path, BASE + block)
    assert w.severity == "warning"
    assert (w.span.line, w.span.column) == (REF_LINE + 3, 5)
    assert "measured at calcium 1.3 mM" in w.message and "2 mM (the circuit's default bath)" in w.message
    assert "accept different calcium" in w.hint and "calcium 1.3" in w.hint


def test_accept_different_calcium_silences_the_warning(tmp_path):
    block = ref("amplitude", "post", "pre", "value 1 mV", SOURCE, "calcium 1.3 mM", "agree within 20 %",
                "accept different calcium")
    assert _warnings(tmp_path, BASE + block) == []


def test_bath_calcium_matching_the_reference_silences_the_warning(tmp_path):
    block = ref("amplitude", "post", "pre", "value 1 mV", SOURCE, "calcium 1.3 mM", "agree within 20 %")
    bathed = BASE.replace("cells:\n", "bath:\n    calcium 1.3 mM\n\ncells:\n", 1)
    assert _warnings(tmp_path, bathed + block) == []
    # 0.05 mM apart is still the same; 0.1 mM apart is not, and the warning names the bath line
    assert _warnings(tmp_path, bathed.replace("calcium 1.3 mM", "calcium 1.34 mM") + block) == []
    (w,) = _warnings(tmp_path, bathed.replace("calcium 1.3 mM", "calcium 1.4 mM") + block)
    assert "the bath (line 5)" in w.message


def test_temperature_range_including_the_default_gives_no_warning(tmp_path):
    # the circuit states no bath temperature, so the default 34 degC applies (circuit/schema.py)
    inside = ref("amplitude", "post", "pre", "value 1 mV", SOURCE, "temperature 32 degC to 34 degC",
                 "agree within 20 %")
    assert _warnings(tmp_path, BASE + inside) == []
    # control: room temperature is more than 1 degC away from 34 degC
    room = inside.replace("temperature 32 degC to 34 degC", "temperature 22 degC")
    (w,) = _warnings(tmp_path, BASE + room)
    assert "temperature 22 degC" in w.message and "34 degC" in w.message
    assert (w.span.line, w.span.column) == (REF_LINE + 3, 5)


def test_species_is_compared_only_when_the_circuit_states_one(tmp_path):
    block = ref("amplitude", "post", "pre", "value 1 mV", SOURCE, "species rat", "age \"P14-16\"",
                "agree within 20 %")
    assert _warnings(tmp_path, BASE + block) == []   # the demo circuit states no species or age
    circuit = tmp_path / "mouse.circuit.yaml"
    circuit.write_text(CIRCUIT.read_text(encoding="utf-8").replace(
        "name: invented_sensory_slab\n", "name: invented_sensory_slab\nspecies: mouse\n", 1), encoding="utf-8")
    mouse = BASE.replace(str(CIRCUIT), str(circuit))
    (w,) = _warnings(tmp_path, mouse + block)
    assert "species rat" in w.message and "mouse (the circuit)" in w.message
    assert (w.span.line, w.span.column) == (REF_LINE + 3, 5)
    assert _warnings(tmp_path, mouse + block + "    accept different species\n") == []
    # case does not make a difference
    assert _warnings(tmp_path, mouse + block.replace("species rat", "species Mouse")) == []


# --- 4. agreement logic -------------------------------------------------------------------------
def test_judge_within_one_sd_edges():
    # hand-computed: published mean 1.3, SD 1.1, K = 1: the band is 1.3 +- 1.1 = [0.2, 2.4].
    # 0.2 is exactly 1.1 away (the edge agrees); 0.19 is 1.11 away.
    assert judge("sd", 0.2, value=1.3, sd=1.1, tolerance=1.0)[0] == "yes"
    assert judge("sd", 2.4, value=1.3, sd=1.1, tolerance=1.0)[0] == "yes"
    verdict, reason = judge("sd", 0.19, value=1.3, sd=1.1, tolerance=1.0)
    assert verdict == "no" and "1.11 > 1.1" in reason
    assert judge("sd", 2.41, value=1.3, sd=1.1, tolerance=1.0)[0] == "no"


def test_judge_within_two_sd():
    # hand-computed: mean 1.3, SD 1.1, K = 2: limit 2.2, band [-0.9, 3.5].
    assert judge("sd", 3.5, value=1.3, sd=1.1, tolerance=2.0)[0] == "yes"
    assert judge("sd", 3.0, value=1.3, sd=1.1, tolerance=2.0)[0] == "yes"   # 1.7 <= 2.2
    assert judge("sd", 3.51, value=1.3, sd=1.1, tolerance=2.0)[0] == "no"   # 2.21 > 2.2
    assert judge("sd", 0.19, value=1.3, sd=1.1, tolerance=2.0)[0] == "yes"  # 1.11 <= 2.2 (fails at 1 sd)


def test_judge_within_ten_percent():
    # hand-computed: value 0.7, 10 % of 0.7 = 0.07; 0.77 is 0.07 away (edge, agrees), 0.771 is 0.071 away.
    # In floating point 0.77 - 0.7 = 0.07000000000000006 > 0.1 * 0.7 = 0.06999999999999999, so the edge
    # only agrees because judge allows for rounding on the boundary.
    assert judge("relative", 0.77, value=0.7, tolerance=0.1)[0] == "yes"
    assert judge("relative", 0.63, value=0.7, tolerance=0.1)[0] == "yes"
    assert judge("relative", 0.771, value=0.7, tolerance=0.1)[0] == "no"
    # relative to |mean|: a negative mean (a resting potential, -65 mV; 10 % = 6.5 mV)
    assert judge("relative", -71.5, value=-65.0, tolerance=0.1)[0] == "yes"
    assert judge("relative", -71.6, value=-65.0, tolerance=0.1)[0] == "no"


def test_judge_absolute():
    # hand-computed: value 1.3 mV, within 0.5 mV: band [0.8, 1.8].
    assert judge("absolute", 1.8, value=1.3, tolerance=0.5)[0] == "yes"
    assert judge("absolute", 0.8, value=1.3, tolerance=0.5)[0] == "yes"
    assert judge("absolute", 1.81, value=1.3, tolerance=0.5)[0] == "no"
    assert judge("absolute", 0.79, value=1.3, tolerance=0.5)[0] == "no"


def test_judge_inside_range_includes_edges():
    # hand-computed: range 0.15 to 5.5; both ends agree, anything outside does not.
    for mean, verdict in ((0.15, "yes"), (5.5, "yes"), (2.0, "yes"), (0.149, "no"), (5.51, "no")):
        assert judge("range", mean, low=0.15, high=5.5)[0] == verdict, mean
    # a range of negative values (a resting potential)
    assert judge("range", -70.0, low=-75.0, high=-60.0)[0] == "yes"
    assert judge("range", -59.9, low=-75.0, high=-60.0)[0] == "no"


def test_judge_without_model_values_is_no_data():
    for rule in ("sd", "relative", "absolute", "range"):
        verdict, reason = judge(rule, math.nan, value=1.0, sd=1.0, low=0.0, high=2.0, tolerance=1.0)
        assert verdict == "no data" and "no value" in reason
    with pytest.raises(ValueError):
        judge("nearby", 1.0, value=1.0, tolerance=1.0)


def _plan(measure: str, cell: str, source_cell: str | None, *, unit: str = "", value=None, sd=None, low=None,
          high=None, n=None, rule: str = "absolute", tolerance=None, rule_text: str = "") -> dict:
    """A record shaped like one of protolang.plan.references.reference_plans."""
    return {"measure": measure, "cell": cell, "source_cell": source_cell, "on_patch": False,
            "dimension": "", "unit": unit, "value": value, "sd": sd, "low": low, "high": high, "n": n,
            "rule": rule, "tolerance": tolerance, "rule_text": rule_text,
            "source": "Invented Fixture 2001, Test J 1:1-2", "from_memory": False, "note": None,
            "conditions": "", "differences": "", "unaccepted_differences": [], "span": "t.protocol:1:1"}


def _tables() -> dict[str, pd.DataFrame]:
    connections = pd.DataFrame({
        "post": ["post", "post", "post", "post", "post", "other"],
        "pre": ["pre", "pre", "pre", "pre", "pre", "pre"],
        "connected": [True, True, True, False, False, True],
        # the unconnected rows carry a (noise) amplitude that must not count; "other" is another cell
        "amplitude_mean_mV": [1.0, 2.0, 4.0, 0.05, 0.02, 100.0],
        "failure_rate": [0.1, 0.2, 0.6, 1.0, 1.0, 0.0],
    })
    plasticity = pd.DataFrame({
        "post": ["post"] * 4, "pre": ["pre"] * 4,
        "scope": ["connection", "connection", "connection", "pathway"],
        "tm_converged": [True, True, False, True],
        "tm_U": [0.4, 0.6, 0.9, 0.1],
    })
    cells = pd.DataFrame({
        "role": ["post", "post", "pre"],
        "rest_mV": [-70.0, -66.0, -50.0],
        "rheobase_pA": [np.nan, np.nan, 90.0],
        "family_rheobase_pA": [200.0, 300.0, 100.0],
    })
    return {"connections": connections, "plasticity": plasticity, "cells": cells}


def test_compare_on_hand_built_tables():
    refs = [
        _plan("amplitude", "post", "pre", unit="mV", value=2.0, sd=0.5, n=30, rule="sd", tolerance=1.0,
              rule_text="within 1 sd"),
        _plan("probability", "post", "pre", value=0.5, rule="absolute", tolerance=0.05, rule_text="within 0.05"),
        _plan("failures", "post", "pre", low=0.0, high=0.2, rule="range", rule_text="inside range"),
        _plan("U", "post", "pre", value=0.5, rule="relative", tolerance=0.1, rule_text="within 10 %"),
        _plan("rest", "post", None, unit="mV", value=-65.0, rule="absolute", tolerance=2.0, rule_text="within 2 mV"),
        _plan("rheobase", "post", None, unit="pA", value=250.0, sd=50.0, rule="sd", tolerance=2.0,
              rule_text="within 2 sd"),
        _plan("sag", "post", None, value=0.1, rule="absolute", tolerance=0.05, rule_text="within 0.05"),
    ]
    table = compare(refs, _tables())
    assert list(table.columns) == COMPARISON_COLUMNS and len(table) == len(refs)
    amp, prob, fail, u, rest, rheo, sag = (row for _, row in table.iterrows())

    # amplitude, hand-computed: the connected rows of post<-pre are 1, 2, 4 mV (unconnected and other rows out).
    # mean 7/3 = 2.3333; deviations -4/3, -1/3, 5/3; squares 16/9 + 1/9 + 25/9 = 42/9; / (n-1) = 7/3;
    # SD = sqrt(7/3) = 1.5275. difference 7/3 - 2 = 1/3; in SDs (1/3) / 0.5 = 2/3; relative (1/3) / 2 = 1/6.
    # |1/3| <= 1 x 0.5: agrees.
    assert amp["model_n"] == 3
    assert amp["model_mean"] == pytest.approx(7 / 3)
    assert amp["model_sd"] == pytest.approx(math.sqrt(7 / 3))
    assert amp["difference"] == pytest.approx(1 / 3)
    assert amp["difference_in_sd"] == pytest.approx(2 / 3)
    assert amp["relative_difference"] == pytest.approx(1 / 6)
    assert (amp["agreement"], amp["unit"], amp["from_cell"], amp["reference_n"]) == ("yes", "mV", "pre", 30)
    assert (amp["reference_mean"], amp["reference_sd"], amp["rule"]) == (2.0, 0.5, "within 1 sd")
    assert math.isnan(amp["reference_low"]) and math.isnan(amp["reference_high"])

    # probability, hand-computed: every tested pair post<-pre counts, connected = 1, 1, 1, 0, 0.
    # mean 3/5 = 0.6; squares 3 x 0.16 + 2 x 0.36 = 1.2; / 4 = 0.3; SD = sqrt(0.3) = 0.5477.
    # difference 0.1 > 0.05: does not agree; no published SD, so no difference in SDs.
    assert prob["model_n"] == 5
    assert prob["model_mean"] == pytest.approx(0.6)
    assert prob["model_sd"] == pytest.approx(math.sqrt(0.3))
    assert prob["difference"] == pytest.approx(0.1)
    assert math.isnan(prob["difference_in_sd"])
    assert prob["relative_difference"] == pytest.approx(0.2)   # 0.1 / 0.5
    assert prob["agreement"] == "no"

    # failures, hand-computed: connected rows only, 0.1, 0.2, 0.6: mean 0.3, outside 0 to 0.2.
    # SD: deviations -0.2, -0.1, 0.3; squares 0.04 + 0.01 + 0.09 = 0.14; / 2 = 0.07; SD = sqrt(0.07).
    # A range reference has no published mean: no difference.
    assert (fail["model_n"], fail["agreement"]) == (3, "no")
    assert fail["model_mean"] == pytest.approx(0.3) and fail["model_sd"] == pytest.approx(math.sqrt(0.07))
    assert math.isnan(fail["difference"]) and math.isnan(fail["relative_difference"])
    assert (fail["reference_low"], fail["reference_high"]) == (0.0, 0.2)

    # U, hand-computed: converged connection fits only, 0.4 and 0.6 (not the unconverged 0.9, not the
    # pooled pathway row 0.1): mean 0.5, SD sqrt((0.01 + 0.01) / 1) = 0.1414; difference 0: agrees.
    assert (u["model_n"], u["agreement"]) == (2, "yes")
    assert u["model_mean"] == pytest.approx(0.5) and u["model_sd"] == pytest.approx(math.sqrt(0.02))
    assert u["difference"] == pytest.approx(0.0, abs=1e-12)

    # rest, hand-computed: rows of role post, -70 and -66 mV: mean -68; SD sqrt((4 + 4) / 1) = 2.828;
    # difference -68 - (-65) = -3, |-3| > 2: does not agree; relative -3 / |-65| = -0.04615.
    assert (rest["model_n"], rest["agreement"]) == (2, "no")
    assert rest["model_mean"] == pytest.approx(-68.0) and rest["model_sd"] == pytest.approx(math.sqrt(8.0))
    assert rest["difference"] == pytest.approx(-3.0)
    assert rest["relative_difference"] == pytest.approx(-3 / 65)
    assert rest["from_cell"] == ""

    # rheobase, hand-computed: the search column is empty for post, so the F-I family's 200 and 300 pA count:
    # mean 250, SD sqrt((2500 + 2500) / 1) = 70.71; difference 0.
    assert (rheo["model_n"], rheo["agreement"]) == (2, "yes")
    assert rheo["model_mean"] == pytest.approx(250.0) and rheo["model_sd"] == pytest.approx(math.sqrt(5000.0))

    # sag: the cells table has no such column: no data, which is not agreement
    assert (sag["model_n"], sag["agreement"]) == (0, "no data")
    assert math.isnan(sag["model_mean"]) and math.isnan(sag["model_sd"]) and math.isnan(sag["difference"])


def test_compare_single_value_and_missing_table():
    # one connection: mean is that value, SD undefined (ddof=1 needs two)
    tables = {"connections": pd.DataFrame({"post": ["post"], "pre": ["pre"], "connected": [True],
                                           "amplitude_mean_mV": [0.9]})}
    (row,) = (r for _, r in compare([_plan("amplitude", "post", "pre", unit="mV", value=1.0, rule="absolute",
                                             tolerance=0.2)], tables).iterrows())
    assert row["model_n"] == 1 and row["model_mean"] == pytest.approx(0.9) and math.isnan(row["model_sd"])
    assert row["difference"] == pytest.approx(-0.1) and row["agreement"] == "yes"   # 0.1 <= 0.2
    # no plasticity table at all
    (row,) = (r for _, r in compare([_plan("U", "post", "pre", value=0.5, rule="relative", tolerance=0.1)],
                                    tables).iterrows())
    assert (row["model_n"], row["agreement"]) == (0, "no data")


# --- 5. end to end -------------------------------------------------------------------------------
# The pair protocol runs with deterministic release (the Tsodyks-Markram expected values), so the
# model has no failures at all (failure_rate 0 for every connection) and its unitary EPSPs between
# demo deep pyramids held at -70 mV are about 1 mV (0.76 and 1.07 mV for the two pairs of seed 3).
# So: an amplitude range 0.1 mV to 10 mV agrees, with an order of magnitude to spare either way;
# published failures of 50 % +- 0.05 cannot agree with a failure-free model; failures of 0 % +- 0.05
# must. The test re-derives the model's numbers from connections.csv before relying on them.
E2E_AMPLITUDE = ref("amplitude", "post", "pre", "range 0.1 mV to 10 mV", SOURCE, "agree inside range")
E2E_FAILING = ref("failures", "post", "pre", "value 50 %", SOURCE, "agree within 0.05")
E2E_AGREEING = ref("failures", "post", "pre", "value 0 %", SOURCE, "agree within 0.05")


def _run(tmp_path, text: str, name: str, *flags: str) -> tuple[int, Path]:
    from protolang.cli import main

    path = write(tmp_path, text, f"{name}.protocol")
    out = tmp_path / f"{name}_run"
    status = main(["run", str(path), "--out", str(out), "--quiet", "--target", "numpy", *flags])
    return status, out


@pytest.mark.brian2
def test_run_require_agreement_exit_status(tmp_path, capsys):
    mixed = BASE + E2E_AMPLITUDE + "\n" + E2E_FAILING
    status, out = _run(tmp_path, mixed, "mixed", "--require-agreement")
    assert status == 2
    printed = capsys.readouterr().out
    assert "1 of 2 comparisons do not agree" in printed

    connections = pd.read_csv(out / "tables" / "connections.csv")
    mine = connections[(connections["post"] == "post") & (connections["pre"] == "pre") & connections["connected"]]
    assert len(mine) == 2
    amplitude = mine["amplitude_mean_mV"].to_numpy()
    assert np.all((amplitude > 0.1) & (amplitude < 10.0)), amplitude   # the premise of the amplitude reference
    assert np.all(mine["failure_rate"].to_numpy() == 0.0)               # the premise of the failure references

    comparison = pd.read_csv(out / "tables" / "comparison.csv")
    assert list(comparison.columns) == COMPARISON_COLUMNS
    amp, fail = (row for _, row in comparison.iterrows())
    assert (amp["measure"], amp["agreement"], amp["model_n"]) == ("amplitude", "yes", 2)
    assert amp["model_mean"] == pytest.approx(amplitude.mean())
    assert amp["model_sd"] == pytest.approx(np.std(amplitude, ddof=1))
    assert (fail["measure"], fail["agreement"], fail["model_n"]) == ("failures", "no", 2)
    assert fail["model_mean"] == 0.0 and fail["difference"] == pytest.approx(-0.5)
    for name in ("comparison_amplitude_post_from_pre.png", "comparison_failures_post_from_pre.png"):
        figure = out / "figures" / name
        assert figure.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n", name

    # the same protocol without the flag: the disagreement is reported, the exit status is 0
    status, out = _run(tmp_path, mixed, "mixed_no_flag")
    assert status == 0
    assert "1 of 2 comparisons do not agree" in capsys.readouterr().out
    assert (out / "tables" / "comparison.csv").exists()

    # every reference agrees: 0 with the flag
    status, out = _run(tmp_path, BASE + E2E_AMPLITUDE + "\n" + E2E_AGREEING, "agreeing", "--require-agreement")
    assert status == 0
    assert "do not agree" not in capsys.readouterr().out
    assert set(pd.read_csv(out / "tables" / "comparison.csv")["agreement"]) == {"yes"}


def test_F_counts_only_fits_that_resolved_F():
    # A depression-only refit reports F = 0 because the train could not resolve F: that is not a
    # measured F of 0 ms, so only the 'depression and facilitation' fits count (hand-computed mean
    # of the two resolved values: (100 + 300) / 2 = 200 ms).
    plasticity = pd.DataFrame({
        "post": ["post"] * 4, "pre": ["pre"] * 4, "scope": ["connection"] * 4,
        "tm_converged": [True, True, True, False],
        "tm_model": ["depression and facilitation", "depression only", "depression and facilitation",
                     "depression and facilitation"],
        "tm_F_ms": [100.0, 0.0, 300.0, 50.0],
    })
    (row,) = (r for _, r in compare([_plan("F", "post", "pre", unit="ms", value=200.0, rule="absolute",
                                           tolerance=1.0)], {"plasticity": plasticity}).iterrows())
    assert row["model_n"] == 2 and row["model_mean"] == 200.0 and row["agreement"] == "yes"
