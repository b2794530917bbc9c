"""Semantic checks of a protocol against its circuit: an ordered tuple of functions -> diagnostics.

Each check takes ``(protocol, circuit, out)`` and appends to ``out`` (an errors.Collector);
:func:`run_checks` runs them all and raises once. Nothing here imports Brian2.
"""

from __future__ import annotations

from ..language import ast
from ..language.errors import Collector, suggest
from ..language.units import DIMENSIONS, expect
from ..language.errors import ProtocolError
from ..measure.registry import COLLECTORS
from .references import check_references

NETWORK_TARGET = "network"   # the name `measure` uses for the whole embedded network (as the parser)


def find_pathway(circuit, pre_class: str, post_class: str):
    """The circuit's pathway from ``pre_class`` to ``post_class``, or None."""
    for pw in circuit.pathways.values():
        if pw.pre == pre_class and pw.post == post_class:
            return pw
    return None


def _class_list(circuit) -> str:
    return ", ".join(sorted(circuit.classes))


def check_classes(p: ast.Protocol, circuit, out: Collector) -> None:
    for pick in p.cells.picks:
        if pick.cell_class not in circuit.classes:
            out.fail(f"unknown cell class {pick.cell_class!r}", pick.class_span or pick.span,
                     expected=f"a cell class of the circuit: {_class_list(circuit)}",
                     hint=suggest(pick.cell_class, circuit.classes))


def check_connectivity_constraints(p: ast.Protocol, circuit, out: Collector) -> None:
    classes = {pick.name: pick.cell_class for pick in p.cells.picks}
    for pick in p.cells.picks:
        for c in pick.constraints:
            if isinstance(c, ast.ReceivingFrom):
                pre, post = classes.get(c.source), pick.cell_class
                if pre in circuit.classes and post in circuit.classes and find_pathway(circuit, pre, post) is None:
                    have = ", ".join(sorted(circuit.pathways)) or "none"
                    out.fail(f"the circuit has no pathway {pre} -> {post}, so no {post} cell receives from {c.source!r}",
                             c.span, expected=f"a pathway of the circuit: {have}",
                             hint="drop `receiving from` or choose classes the circuit connects")


def check_bath(p: ast.Protocol, circuit, out: Collector) -> None:
    seen: dict[str, ast.ReceptorBlock] = {}
    for item in p.bath:
        if isinstance(item, ast.ReceptorBlock):
            if item.receptor not in circuit.receptors:
                out.fail(f"unknown receptor {item.receptor!r}", item.span,
                         expected="a receptor of the circuit: " + ", ".join(sorted(circuit.receptors)),
                         hint=suggest(item.receptor, circuit.receptors))
            elif item.receptor in seen:
                out.fail(f"receptor {item.receptor!r} is blocked twice", item.span,
                         hint="keep one `block` line per receptor")
            seen[item.receptor] = item
        elif isinstance(item, ast.BathSetting):
            if item.value.si < 0:
                out.fail(f"{item.name} cannot be negative", item.value.span or item.span,
                         expected=DIMENSIONS["concentration"])
            if item.name == "calcium" and item.value.si == 0:
                out.fail("calcium 0 mM abolishes evoked release entirely", item.value.span or item.span,
                         expected="a positive concentration", hint="use a small value such as 0.5 mM")


def check_stimuli(p: ast.Protocol, circuit, out: Collector) -> None:
    seen: set[str] = set()
    for block in p.stimuli:
        if block.cell in seen:
            out.fail(f"cell {block.cell!r} has two `stimulate` blocks", block.span,
                     hint="list all its stimuli in one block")
        seen.add(block.cell)
        kinds = {type(i) for i in block.items}
        if ast.SpikeTimes in kinds and kinds - {ast.SpikeTimes}:
            out.fail(f"cell {block.cell!r} mixes `spikes at` with current stimuli", block.span,
                     expected="either explicit spike times or current pulses",
                     hint="`spikes at` makes the cell a spike source; use pulses to make it fire instead")
    rec = {r.cell: r for r in p.recordings}
    for block in p.stimuli:
        r = rec.get(block.cell)
        if r is not None and r.mode == "off" and any(not isinstance(i, ast.SpikeTimes) for i in block.items):
            out.fail(f"cell {block.cell!r} is stimulated with current but its electrode is off", block.span,
                     hint=f"use `record {block.cell}: current clamp`")


def check_recordings(p: ast.Protocol, circuit, out: Collector) -> None:
    seen: set[str] = set()
    stim = {s.cell for s in p.stimuli if any(isinstance(i, ast.SpikeTimes) for i in s.items)}
    for r in p.recordings:
        if r.cell in seen:
            out.fail(f"cell {r.cell!r} has two `record` lines", r.span, hint="keep one per cell")
        seen.add(r.cell)
        if r.cell in stim and r.mode != "off":
            out.fail(f"cell {r.cell!r} is a spike source (`spikes at`) and has no membrane to record", r.span,
                     hint=f"use `record {r.cell}: off` or drive it with current pulses")


def check_measures(p: ast.Protocol, circuit, out: Collector) -> None:
    recorded = {r.cell for r in p.recordings if r.mode != "off"}
    stimulated = {s.cell for s in p.stimuli}
    classes = {pick.name: pick.cell_class for pick in p.cells.picks}
    patches = {x.name: x for x in p.cells.patches}
    for block in p.measures:
        on_network = block.cell == NETWORK_TARGET
        if block.cell in patches:
            for item in block.items:
                spec = COLLECTORS.get(item.collector, {})
                for opt in item.options:
                    if opt.name not in spec.get("options", {}):
                        out.fail(f"`{item.collector}` has no option {opt.name!r}", opt.span,
                                 expected="one of " + (", ".join(spec.get("options", {})) or "no options"),
                                 hint=suggest(opt.name, spec.get("options", {})))
                if spec.get("needs_recording") and not all(m in recorded for m in patches[block.cell].members):
                    out.fail(f"`{item.collector}` reads every cell of the patch {block.cell!r}, which is not recorded",
                             item.span, hint=f"add `record {block.cell}: current clamp`")
            continue
        if on_network and p.network is None:
            out.fail("`measure network:` needs an embedded network", block.span,
                     expected="a `network:` block giving the simulated region",
                     hint="add `network:` with a line such as `region within 300 um of post`")
            continue
        for item in block.items:
            spec = COLLECTORS.get(item.collector)
            if spec is None:
                out.fail(f"unknown collector {item.collector!r}", item.span,
                         expected="one of " + ", ".join(sorted(COLLECTORS)),
                         hint=suggest(item.collector, COLLECTORS))
                continue
            scope = spec.get("scope", "cell")
            if scope == "patch":
                out.fail(f"`{item.collector}` reads a multi-cell patch, and {block.cell!r} is not one", item.span,
                         expected="`measure PATCH:` with PATCH selected as `PATCH is N of CLASS within R`",
                         hint="select the cells as a patch in `cells:`")
                continue
            if on_network != (scope == "network"):
                fitting = sorted(k for k, v in COLLECTORS.items() if (v.get("scope", "cell") == "network") == on_network)
                where = "the network" if on_network else f"cell {block.cell!r}"
                out.fail(f"`{item.collector}` does not apply to {where}", item.span,
                         expected="one of " + ", ".join(fitting),
                         hint="network collectors go under `measure network:`" if scope == "network"
                         else "cell collectors go under `measure CELL:`")
                continue
            if spec["needs_source"] and item.source is None:
                out.fail(f"`{item.collector}` needs a presynaptic cell", item.span,
                         expected=f"`{item.collector} to CELL`", hint=f"e.g. `{item.collector} to pre`")
            if spec.get("needs_recording", spec["needs_source"]) and block.cell not in recorded:
                out.fail(f"`{item.collector}` on {block.cell!r} needs a recorded cell", item.span,
                         hint=f"add `record {block.cell}: current clamp`")
            if item.source is not None:
                if item.source not in stimulated:
                    out.fail(f"{item.source!r} is not stimulated, so it evokes no responses", item.source_span or item.span,
                             hint=f"add a `stimulate {item.source}:` block")
                pre, post = classes.get(item.source), classes.get(block.cell)
                if pre in circuit.classes and post in circuit.classes and find_pathway(circuit, pre, post) is None:
                    out.fail(f"the circuit has no pathway {pre} -> {post}", item.source_span or item.span,
                             expected="a pathway of the circuit: " + ", ".join(sorted(circuit.pathways)))
            for opt in item.options:
                if opt.name not in spec["options"]:
                    out.fail(f"`{item.collector}` has no option {opt.name!r}", opt.span,
                             expected="one of " + (", ".join(spec["options"]) or "no options"),
                             hint=suggest(opt.name, spec["options"]))
                    continue
                dim = spec["options"][opt.name][0]
                try:
                    expect(opt.value, dim, f"option {opt.name!r}")
                except ProtocolError as exc:
                    out.diagnostics.extend(exc.diagnostics)


def check_inputs(p: ast.Protocol, circuit, out: Collector) -> None:
    """Poisson inputs name a receptor of the circuit; activated classes exist and reach the cell."""
    classes = {pick.name: pick.cell_class for pick in p.cells.picks}
    for block in p.stimuli:
        for item in block.items:
            if isinstance(item, ast.PoissonInput) and item.receptor is not None \
                    and item.receptor not in circuit.receptors:
                out.fail(f"unknown receptor {item.receptor!r}", item.receptor_span or item.span,
                         expected="a receptor of the circuit: " + ", ".join(sorted(circuit.receptors)),
                         hint=suggest(item.receptor, circuit.receptors))
            elif isinstance(item, ast.Activate):
                if item.cell_class not in circuit.classes:
                    out.fail(f"unknown cell class {item.cell_class!r}", item.class_span or item.span,
                             expected=f"a cell class of the circuit: {_class_list(circuit)}",
                             hint=suggest(item.cell_class, circuit.classes))
                elif classes.get(block.cell) in circuit.classes and \
                        find_pathway(circuit, item.cell_class, classes[block.cell]) is None:
                    out.fail(f"the circuit has no pathway {item.cell_class} -> {classes[block.cell]}, so activating "
                             f"{item.cell_class} cells reaches no synapse on {block.cell!r}", item.class_span or item.span,
                             expected="a class with a pathway onto this cell: " + ", ".join(
                                 sorted(pw.pre for pw in circuit.pathways.values() if pw.post == classes[block.cell])))


def _steps_of(p: ast.Protocol, cell: str) -> list:
    for block in p.stimuli:
        if block.cell == cell:
            return [i for i in block.items if isinstance(i, (ast.Step, ast.StepFamily))]
    return []


def _amplitudes(item) -> list[float]:
    if isinstance(item, ast.StepFamily):
        return [q.si for q in item.values]
    return [item.amplitude.si] if hasattr(item.amplitude, "si") else []


def check_cell_collectors(p: ast.Protocol, circuit, out: Collector) -> None:
    """passive needs a hyperpolarising step, firing a depolarising one, fi a family of steps."""
    rec = {r.cell: r for r in p.recordings}
    for block in p.measures:
        for item in block.items:
            need = COLLECTORS.get(item.collector, {}).get("needs_step")
            if need is None:
                continue
            r = rec.get(block.cell)
            if r is not None and r.mode != "current clamp":
                out.fail(f"`{item.collector}` reads current-clamp step responses; {block.cell!r} is in {r.mode}",
                         item.span, hint=f"use `record {block.cell}: current clamp`")
                continue
            steps = _steps_of(p, block.cell)
            amps = [a for s in steps for a in _amplitudes(s)]
            example = f"`steps of -50 pA to 300 pA by 50 pA for 500 ms at 100 ms` in `stimulate {block.cell}:`"
            if need == "family" and not any(isinstance(s, ast.StepFamily) for s in steps):
                out.fail(f"`{item.collector}` needs a family of current steps on {block.cell!r}", item.span,
                         expected="a `steps of ...` line", hint=f"add {example}")
            elif need == "hyperpolarising" and not any(a < 0 for a in amps):
                out.fail(f"`{item.collector}` needs a hyperpolarising current step on {block.cell!r}", item.span,
                         expected="a `step` or `steps of` with a negative current",
                         hint=f"add `step -50 pA for 500 ms at 100 ms`, or {example}")
            elif need == "depolarising" and not any(a > 0 for a in amps):
                out.fail(f"`{item.collector}` needs a depolarising current step on {block.cell!r}", item.span,
                         expected="a `step` or `steps of` with a positive current", hint=f"add {example}")
            if len(steps) > 1:
                out.fail(f"`{item.collector}` reads one step per sweep, but {block.cell!r} has {len(steps)} step lines",
                         steps[1].span, hint="keep one `step` or `steps of` line for a characterised cell")


def _layer_ok(layer: str, span, circuit, out: Collector) -> None:
    if layer not in circuit.layers:
        out.fail(f"unknown layer {layer!r}", span, expected="a layer of the circuit: " + ", ".join(circuit.layers),
                 hint=suggest(layer, circuit.layers))


def _class_ok(name: str, span, circuit, out: Collector, *, allow_all: bool = False) -> bool:
    if name in circuit.classes or (allow_all and name == "all"):
        return True
    expected = f"a cell class of the circuit: {_class_list(circuit)}" + (", or `all`" if allow_all else "")
    out.fail(f"unknown cell class {name!r}", span, expected=expected, hint=suggest(name, circuit.classes))
    return False


def _pathway_ok(pre: str, post: str, span, circuit, out: Collector) -> bool:
    ok = _class_ok(pre, span, circuit, out) & _class_ok(post, span, circuit, out)
    if ok and find_pathway(circuit, pre, post) is None:
        out.fail(f"the circuit has no pathway {pre} -> {post}", span,
                 expected="a pathway of the circuit: " + ", ".join(sorted(circuit.pathways)),
                 hint=suggest(f"{pre}->{post}", circuit.pathways))
        return False
    return ok


def check_lesions(p: ast.Protocol, circuit, out: Collector) -> None:
    """Lesions name classes, layers and pathways the circuit has; a pathway is cut or scaled once."""
    changed: dict[tuple[str, str], ast.Cut | ast.ScalePathway] = {}
    silenced: dict[str, ast.Silence] = {}
    for item in p.lesions:
        if isinstance(item, ast.Remove):
            _class_ok(item.cell_class, item.class_span or item.span, circuit, out, allow_all=True)
            for place in item.places:
                if isinstance(place, ast.InLayer):
                    _layer_ok(place.layer, place.span or item.span, circuit, out)
        elif isinstance(item, ast.Silence):
            if _class_ok(item.cell_class, item.span, circuit, out):
                if item.cell_class in silenced:
                    out.fail(f"class {item.cell_class!r} is silenced twice", item.span,
                             hint=f"the first line is {silenced[item.cell_class].span.line}")
                silenced[item.cell_class] = item
        elif isinstance(item, (ast.Cut, ast.ScalePathway)):
            if _pathway_ok(item.pre, item.post, item.span, circuit, out):
                key = (item.pre, item.post)
                if key in changed:
                    out.fail(f"pathway {item.pre} -> {item.post} is cut or scaled twice", item.span,
                             expected="one `cut` or `scale` line per pathway",
                             hint=f"the first line is {changed[key].span.line}")
                changed[key] = item
        else:  # pragma: no cover - the parser builds only these
            raise AssertionError(f"internal error: unknown lesion {item!r}")


def check_network(p: ast.Protocol, circuit, out: Collector) -> None:
    """The embedded network's region layers, background classes and receptors exist."""
    if p.network is None:
        return
    for region in p.network.regions:
        for place in region.places:
            if isinstance(place, ast.InLayer):
                _layer_ok(place.layer, place.span or region.span, circuit, out)
    for bg in p.network.background:
        spans = list(bg.class_spans) + [bg.span] * (len(bg.classes) - len(bg.class_spans))
        for name, span in zip(bg.classes, spans):
            _class_ok(name, span, circuit, out)
        if bg.kind == "poisson" and bg.receptor not in circuit.receptors:
            out.fail(f"unknown receptor {bg.receptor!r}", bg.receptor_span or bg.span,
                     expected="a receptor of the circuit: " + ", ".join(sorted(circuit.receptors)),
                     hint=suggest(bg.receptor, circuit.receptors))
    for c in circuit.classes.values():
        if c.model != "adex":
            out.fail(f"embedded networks simulate adaptive exponential cells only; class {c.name!r} uses "
                     f"{c.model!r}", p.network.span,
                     expected="a circuit whose classes all use the `adex` model",
                     hint="record these cells in isolated mode (drop the `network:` block)")
            break


# fewest presynaptic spikes a Tsodyks-Markram fit can use (three parameters besides the efficacy)
MIN_FIT_SPIKES = 3


def _presynaptic_events(p: ast.Protocol, cell: str) -> int | None:
    """Presynaptic spikes a cell's stimuli ask for (pulses, train pulses, explicit times); None if unknown."""
    count = 0
    for block in p.stimuli:
        if block.cell != cell:
            continue
        for item in block.items:
            if isinstance(item, ast.Pulse):
                count += 1
            elif isinstance(item, ast.Train):
                count += item.count
            elif isinstance(item, ast.SpikeTimes):
                count += len(item.times)
    return count


def check_fits(p: ast.Protocol, circuit, out: Collector) -> None:
    """A plasticity fit needs a train: at least 3 presynaptic spikes per sweep."""
    for block in p.measures:
        for item in block.items:
            if item.collector != "plasticity" or item.source is None:
                continue
            n = _presynaptic_events(p, item.source)
            if n is not None and n < MIN_FIT_SPIKES:
                out.fail(f"a Tsodyks-Markram fit needs at least {MIN_FIT_SPIKES} presynaptic spikes per sweep, "
                         f"and {item.source!r} fires {n}", item.span,
                         expected=f"a train of {MIN_FIT_SPIKES} or more pulses on {item.source!r}",
                         hint=f"e.g. `train 8 pulses of 1.5 nA for 2 ms at 20 Hz from 100 ms` and a recovery "
                              f"`pulse` after it in `stimulate {item.source}:`")


CHECKS = (
    check_classes,
    check_connectivity_constraints,
    check_bath,
    check_stimuli,
    check_recordings,
    check_measures,
    check_inputs,
    check_cell_collectors,
    check_lesions,
    check_network,
    check_fits,
    check_references,
)


def run_checks(protocol: ast.Protocol, circuit) -> Collector:
    """Run every check in order; raise one ProtocolError listing all errors.

    Returns:
        The collector (its warnings are for the caller to show).
    """
    from ..language.patch import expand_patches
    from ..measure.registry import patch_collectors

    protocol = expand_patches(protocol, patch_collectors())
    out = Collector()
    for check in CHECKS:
        check(protocol, circuit, out)
    unique = {}
    for d in out.diagnostics:
        unique.setdefault((d.span, d.message), d)
    out.diagnostics = list(unique.values())
    out.raise_if_any()
    return out
