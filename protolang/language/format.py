"""Protocol AST -> canonical protolang text that parses back to an equal AST."""

from __future__ import annotations

from . import ast
from .units import Quantity

__all__ = ["format_protocol"]

INDENT = "    "


def format_protocol(p: ast.Protocol) -> str:
    """Write a protocol as canonical protolang text.

    The output follows docs/language.md: head lines, then ``bath:``, ``cells:``,
    ``sweeps``, ``simulate``, ``record``, ``stimulate`` and ``measure``, separated by
    blank lines, with 4-space indentation. ``parse(format_protocol(p)) == p`` holds
    for every protocol the parser produces.

    Args:
        p: The protocol AST.

    Returns:
        The text, ending with a newline.

    Raises:
        ValueError: If a node holds something the language cannot spell (a title with a
            line break, a number that is not finite, an unknown stimulus or bath item).
    """
    sections = [
        [f"protocol {_string(p.title)}", f"circuit {_string(p.circuit)} seed {p.seed}"],
    ]
    if p.scans:
        sections.append([_scan(x) for x in p.scans])
    if p.bath:
        sections.append(["bath:"] + [INDENT + _bath_item(item) for item in p.bath])
    sections.append(_cells(p.cells))
    if p.lesions:
        sections.append(["lesions:"] + [INDENT + lesion_text(item) for item in p.lesions])
    if p.network is not None:
        sections.append(_network(p.network))
    sections.append([_sweeps(p.sweeps)])
    if p.settings:
        sections.append(["simulate " + ", ".join(_setting(s) for s in p.settings)])
    if p.recordings:
        sections.append([_recording(r) for r in p.recordings])
    for stim in p.stimuli:
        turn = f" in turn every {_quantity(stim.turn)}" if stim.turn is not None else ""
        sections.append([f"stimulate {stim.cell}{turn}:"] + [INDENT + _stimulus(i) for i in stim.items])
    for measure in p.measures:
        sections.append([f"measure {measure.cell}:"]
                        + [INDENT + _measure_item(i) for i in measure.items])
    for ref in p.references:
        sections.append(_reference(ref))
    return "\n\n".join("\n".join(lines) for lines in sections) + "\n"


def _string(text: str) -> str:
    if "\n" in text or "\r" in text:
        raise ValueError(f"a protolang string cannot hold a line break: {text!r}")
    return '"' + text.replace("\\", "\\\\").replace('"', '\\"') + '"'


def _number(value: float) -> str:
    # repr() is the shortest text that reads back to the same float; whole numbers drop ".0".
    value = float(value)
    if value != value or value in (float("inf"), float("-inf")):
        raise ValueError(f"cannot write the number {value!r}")
    if value.is_integer() and abs(value) < 1e16:
        return str(int(value))
    return repr(value)


def _quantity(q) -> str:
    if isinstance(q, ast.ScanRef):
        return f"@{q.name}"
    return f"{_number(q.value)} {q.unit}" if q.unit else _number(q.value)


def _scan(x: ast.Scan) -> str:
    if x.form == "range":
        body = f"{_quantity(x.start)} to {_quantity(x.stop)} in {x.steps} steps"
    elif x.form == "step":
        body = f"{_quantity(x.start)} to {_quantity(x.stop)} by {_quantity(x.step)}"
    else:
        body = ", ".join(_quantity(q) for q in x.values)
    return f"scan @{x.name}: {body}"


def _bath_item(item) -> str:
    if isinstance(item, ast.BathSetting):
        return f"{item.name} {_quantity(item.value)}"
    if isinstance(item, ast.ReceptorBlock):
        if item.fraction is None:
            return f"block {item.receptor}"
        return f"block {item.receptor} {_quantity(item.fraction)}"
    raise ValueError(f"unknown bath item {item!r}")


def _cells(cells: ast.Cells) -> list[str]:
    lines = ["cells:"]
    for pick in cells.picks:
        if isinstance(pick, ast.PatchPick):
            lines.append(f"{INDENT}{pick.name} is {pick.count} of {pick.cell_class} within {_quantity(pick.radius)}")
            continue
        line = f"{pick.name} is {pick.cell_class}"
        if pick.constraints:
            line += " " + ", ".join(_constraint(c) for c in pick.constraints)
        lines.append(INDENT + line)
    if cells.repeat != 1:
        lines.append(f"{INDENT}repeat {cells.repeat}")
    return lines


def _constraint(c) -> str:
    if isinstance(c, ast.Within):
        return f"within {_quantity(c.distance)} of {c.of}"
    if isinstance(c, ast.ReceivingFrom):
        return f"receiving from {c.source}"
    raise ValueError(f"unknown cell constraint {c!r}")


def place_text(place) -> str:
    """One place of a `remove` or `region` line as canonical text."""
    if isinstance(place, ast.InLayer):
        return f"in layer {place.layer}"
    return _constraint(place)


def lesion_text(item) -> str:
    """One `lesions:` line as canonical text (plan records quote it)."""
    if isinstance(item, ast.Remove):
        line = "remove "
        if item.fraction is not None:
            line += f"{_quantity(item.fraction)} of "
        line += item.cell_class
        return " ".join([line] + [place_text(p) for p in item.places])
    if isinstance(item, ast.Cut):
        return f"cut {item.pre} -> {item.post}"
    if isinstance(item, ast.Silence):
        return f"silence {item.cell_class}"
    if isinstance(item, ast.ScalePathway):
        return f"scale {item.pre} -> {item.post} by {_quantity(item.factor)}"
    raise ValueError(f"unknown lesion {item!r}")


def _network(net: ast.Network) -> list[str]:
    lines = ["network:"]
    for region in net.regions:
        body = "all" if region.everything else " ".join(place_text(p) for p in region.places)
        lines.append(f"{INDENT}region {body}")
    for bg in net.background:
        if bg.kind == "poisson":
            drive = f"poisson {_quantity(bg.rate)} of {_quantity(bg.conductance)} {bg.receptor}"
        else:
            drive = f"noise mean {_quantity(bg.mean)} sd {_quantity(bg.sd)} tau {_quantity(bg.tau)}"
            if bg.reversal is not None:
                drive += f" reversal {_quantity(bg.reversal)}"
        lines.append(f"{INDENT}background {drive} onto " + ", ".join(bg.classes))
    return lines


def _sweeps(s: ast.Sweeps) -> str:
    line = f"sweeps {s.count} every {_quantity(s.interval)}"
    if s.length is not None:
        line += f", lasting {_quantity(s.length)}"
    return line


def _setting(s: ast.Setting) -> str:
    if s.value is None:
        return s.name
    if isinstance(s.value, Quantity):
        return f"{s.name} {_quantity(s.value)}"
    raise ValueError(f"simulate option {s.name!r} has a value the language cannot write: "
                     f"{s.value!r}")


def _recording(r: ast.Recording) -> str:
    parts = [r.mode]
    if r.holding is not None:
        parts.append(f"holding {_quantity(r.holding)}")
    if r.noise is not None:
        parts.append(f"noise {_quantity(r.noise)}")
    if r.series is not None:
        parts.append(f"series {_quantity(r.series)}")
    return f"record {r.cell}: " + ", ".join(parts)


def _stimulus(item) -> str:
    if isinstance(item, ast.Pulse):
        return (f"pulse {_quantity(item.amplitude)} for {_quantity(item.duration)} "
                f"at {_quantity(item.at)}")
    if isinstance(item, ast.Train):
        return (f"train {item.count} pulses of {_quantity(item.amplitude)} "
                f"for {_quantity(item.duration)} at {_quantity(item.rate)} "
                f"from {_quantity(item.start)}")
    if isinstance(item, ast.SpikeTimes):
        return "spikes at " + ", ".join(_quantity(t) for t in item.times)
    if isinstance(item, ast.Step):
        return (f"step {_quantity(item.amplitude)} for {_quantity(item.duration)} "
                f"at {_quantity(item.at)}")
    if isinstance(item, ast.StepFamily):
        if (item.step is None) == (item.count is None):
            raise ValueError(f"a step family needs either a step or a count, not "
                             f"{'both' if item.step is not None else 'neither'}: {item!r}")
        spacing = (f"by {_quantity(item.step)}" if item.step is not None
                   else f"in {item.count} steps")
        return (f"steps of {_quantity(item.start)} to {_quantity(item.stop)} {spacing} "
                f"for {_quantity(item.duration)} at {_quantity(item.at)}")
    if isinstance(item, ast.Ramp):
        return (f"ramp {_quantity(item.start_amplitude)} to {_quantity(item.stop_amplitude)}"
                f"{_window(item)}")
    if isinstance(item, ast.Sine):
        line = f"sine {_quantity(item.amplitude)} at {_quantity(item.frequency)}{_window(item)}"
        if item.offset is not None:
            line += f", offset {_quantity(item.offset)}"
        return line
    if isinstance(item, ast.Chirp):
        return (f"chirp {_quantity(item.amplitude)} sweeping {_quantity(item.f_start)} "
                f"to {_quantity(item.f_stop)}{_window(item)}")
    if isinstance(item, ast.Noise):
        line = (f"noise mean {_quantity(item.mean)} sd {_quantity(item.sd)} "
                f"tau {_quantity(item.tau)}{_window(item)}")
        if item.reversal is not None:
            line += f", reversal {_quantity(item.reversal)}"
        return line
    if isinstance(item, ast.PoissonInput):
        return (f"poisson {_quantity(item.rate)} of {_quantity(item.conductance)} "
                f"{item.receptor}{_window(item)}")
    if isinstance(item, ast.Activate):
        return (f"activate {_quantity(item.fraction)} of {item.cell_class} at "
                + ", ".join(_quantity(t) for t in item.times))
    raise ValueError(f"unknown stimulus {item!r}")


def _window(item) -> str:
    return f" from {_quantity(item.start)} to {_quantity(item.stop)}"


def _reference(ref: ast.Reference) -> list[str]:
    head = f"reference {ref.measure} of {ref.cell}" + (f" from {ref.source_cell}" if ref.source_cell else "") + ":"
    lines = [head]
    fields = ([f"sd {_quantity(ref.sd)}"] if ref.sd is not None else []) + ([f"n {ref.n}"] if ref.n is not None else [])
    if ref.value is not None:
        lines.append(", ".join([f"value {_quantity(ref.value)}", *fields]))
        fields = []
    if ref.low is not None:
        lines.append(", ".join([f"range {_quantity(ref.low)} to {_quantity(ref.high)}", *fields]))
    lines.append(f"source {_string(ref.authors)} {ref.year} {_string(ref.journal)}")
    for c in ref.conditions:
        if isinstance(c.low, str):
            lines.append(f"{c.name} {_word(c.low)}")
        else:
            lines.append(f"{c.name} {_quantity(c.low)}" + (f" to {_quantity(c.high)}" if c.high is not None else ""))
    lines.append(reference_rule_text(ref))
    if ref.accepted:
        lines.append("accept different " + ", ".join(ref.accepted))
    if ref.from_memory:
        lines.append("from memory")
    if ref.note is not None:
        lines.append(f"note {_string(ref.note)}")
    return [lines[0]] + [INDENT + line for line in lines[1:]]


def reference_rule_text(ref: ast.Reference) -> str:
    """The agreement rule as written: ``agree within 2 sd``, ``agree inside range`` ..."""
    if ref.rule == "range":
        return "agree inside range"
    if ref.rule == "sd":
        return f"agree within {_number(ref.tolerance.value)} sd"
    return f"agree within {_quantity(ref.tolerance)}"


def _word(text: str) -> str:
    """A condition text: bare when it reads back as one word, else quoted."""
    import re

    from .parser import _keywords

    bare = re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*", text) and text not in _keywords().values()
    return text if bare else _string(text)


def _measure_item(item: ast.MeasureItem) -> str:
    line = item.collector
    if item.source is not None:
        line += f" to {item.source}"
    for opt in item.options:
        line += f", {opt.name} {_quantity(opt.value)}"
    return line
