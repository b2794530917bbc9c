"""Published references of a protocol: their conditions against the protocol's, and their plan form.

A ``reference`` block states the conditions the published data were taken under (calcium,
magnesium, temperature, species, age). :func:`condition_differences` compares them with what
the protocol simulates (its bath, else the circuit's default bath; species and age as the
circuit file states them, if it does); :func:`check_references` warns about every difference
the reference does not accept with ``accept different NAME``; :func:`reference_plans` turns each
reference into the plain record the comparison table is computed from (values in the units of
the model's table columns). Nothing here imports Brian2, numpy or pandas.
"""

from __future__ import annotations

from ..language import ast
from ..language.errors import Collector
from ..language.units import Quantity
from ..measure.registry import REFERENCE_MEASURES

# Bath conditions closer than this count as the same (SI: mM, kelvin).
SAME_CONCENTRATION = 0.05
SAME_TEMPERATURE = 1.0
# Scale of the model's table columns per dimension: column value = SI value / scale.
COLUMN_SCALE = {"voltage": 1e-3, "current": 1e-12, "time": 1e-3, "resistance": 1e6, "frequency": 1.0,
                "gain": 1e9, "fraction": 1.0, "number": 1.0}
COLUMN_UNIT = {"voltage": "mV", "current": "pA", "time": "ms", "resistance": "MOhm", "frequency": "Hz",
               "gain": "Hz/nA", "fraction": "", "number": ""}


def protocol_conditions(protocol: ast.Protocol, circuit) -> dict[str, float | str | None]:
    """What the protocol simulates: calcium and magnesium (mM), temperature (K), species, age."""
    out: dict[str, float | str | None] = {"calcium": circuit.bath.calcium, "magnesium": circuit.bath.magnesium,
                                          "temperature": circuit.bath.temperature,
                                          "species": getattr(circuit, "species", None),
                                          "age": getattr(circuit, "age", None)}
    for item in protocol.bath:
        if isinstance(item, ast.BathSetting) and isinstance(item.value, Quantity):
            out[item.name] = item.value.si
    return out


def condition_text(name: str, value) -> str:
    if value is None:
        return "not stated"
    if isinstance(value, str):
        return value
    if name == "temperature":
        return f"{value - 273.15:g} degC"
    return f"{value:g} mM"


def reference_condition_text(c: ast.ReferenceCondition) -> str:
    if isinstance(c.low, str):
        return c.low
    return str(c.low) + (f" to {c.high}" if c.high is not None else "")


def condition_differences(ref: ast.Reference, conditions: dict) -> list[tuple[str, str, str]]:
    """``(name, published, simulated)`` for every stated condition the protocol does not match.

    Numbers match within 0.05 mM (calcium, magnesium) or 1 degC (temperature) of the published
    value or range. Species and age are compared (case-insensitively) only when the circuit states
    them; a circuit that does not cannot be said to differ.
    """
    out = []
    for c in ref.conditions:
        ours = conditions.get(c.name)
        if ours is None:
            continue
        if isinstance(c.low, str):
            if str(ours).strip().lower() != c.low.strip().lower():
                out.append((c.name, c.low, str(ours)))
            continue
        low = c.low.si
        high = c.high.si if c.high is not None else low
        slack = SAME_TEMPERATURE if c.name == "temperature" else SAME_CONCENTRATION
        if not low - slack <= ours <= high + slack:
            out.append((c.name, reference_condition_text(c), condition_text(c.name, ours)))
    return out


def check_references(p: ast.Protocol, circuit, out: Collector) -> None:
    """Warn where a reference's conditions differ from the protocol's and it does not say so."""
    if not p.references:
        return
    conditions = protocol_conditions(p, circuit)
    bath_lines = {item.name: item for item in p.bath if isinstance(item, ast.BathSetting)}
    for ref in p.references:
        spans = {c.name: c.span for c in ref.conditions}
        for name, published, simulated in condition_differences(ref, conditions):
            if name in ref.accepted:
                continue
            where = (f"the bath (line {bath_lines[name].span.line})" if name in bath_lines and
                     bath_lines[name].span else "the circuit" if name in ("species", "age") else
                     "the circuit's default bath")
            if name in ("calcium", "magnesium", "temperature"):
                fix = f"set '{name} {published.split(' to ')[0]}' under 'bath:', or add "
            else:
                fix = "add "
            out.warn(f"the published {ref.measure} of {ref.cell} was measured at {name} {published}; this "
                     f"protocol simulates {simulated} ({where})", spans[name],
                     hint=fix + f"'accept different {name}' to this reference if the difference is intended")


def reference_plans(protocol: ast.Protocol, circuit, trace_modes: dict[str, str]) -> list[dict]:
    """Plain records of the protocol's references, in the units of the model's table columns.

    Args:
        protocol: the protocol (patches expanded or not: a patch reference names the patch).
        circuit: the circuit (its bath and stated species/age for the condition differences).
        trace_modes: recorded cell -> "voltage clamp" | "current clamp" (an amplitude is a current
            in voltage clamp).

    Returns:
        One dict per reference: measure, cell, source, dimension, unit, value, sd, low, high, n,
        rule, tolerance (in published SDs for "sd", a fraction for "relative", the column's unit for
        "absolute", None for "range"), source text, from_memory, note, conditions and differences.
    """
    conditions = protocol_conditions(protocol, circuit)
    patches = {p.name for p in protocol.cells.picks if isinstance(p, ast.PatchPick)}
    patches |= {p.name for p in getattr(protocol.cells, "patches", ())}
    out = []
    for ref in protocol.references:
        entry = REFERENCE_MEASURES[ref.measure]
        dimension = entry["dimension"]
        if dimension == "trace":
            dimension = "current" if trace_modes.get(ref.cell) == "voltage clamp" else "voltage"
        scale = COLUMN_SCALE[dimension]

        def column_value(q):
            return None if q is None else q.si / scale

        if ref.rule == "sd":
            tolerance = ref.tolerance.value
        elif ref.rule == "relative":
            tolerance = ref.tolerance.si
        elif ref.rule == "absolute":
            tolerance = column_value(ref.tolerance)
        else:
            tolerance = None
        differences = condition_differences(ref, conditions)
        out.append({
            "measure": ref.measure, "cell": ref.cell, "source_cell": ref.source_cell,
            "on_patch": ref.cell in patches, "dimension": dimension, "unit": COLUMN_UNIT[dimension],
            "value": column_value(ref.value), "sd": column_value(ref.sd), "low": column_value(ref.low),
            "high": column_value(ref.high), "n": ref.n, "rule": ref.rule, "tolerance": tolerance,
            "rule_text": _rule_text(ref), "source": f"{ref.authors} {ref.year}, {ref.journal}",
            "from_memory": ref.from_memory, "note": ref.note,
            "conditions": "; ".join(f"{c.name} {reference_condition_text(c)}" for c in ref.conditions),
            "differences": "; ".join(f"{n} {pub} (model {sim})" + (" accepted" if n in ref.accepted else "")
                                     for n, pub, sim in differences),
            "unaccepted_differences": [n for n, _, _ in differences if n not in ref.accepted],
            "span": f"{ref.span.file}:{ref.span.line}:{ref.span.column}" if ref.span else "",
        })
    return out


def _rule_text(ref: ast.Reference) -> str:
    from ..language.format import reference_rule_text

    return reference_rule_text(ref).removeprefix("agree ")
