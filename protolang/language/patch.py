"""Multi-cell patches: a protocol with `NAME is N of CLASS within R` lines in, the same protocol with one selected cell per patched cell out.

A patch ``p`` of N cells becomes the cells ``p_1`` (any cell of the class) and ``p_2`` ... ``p_N``
(each within R of ``p_1``). ``record p:`` becomes one record line per cell; ``stimulate p in turn
every T:`` gives cell k (from 0) the same stimuli shifted by k x T, so one cell fires at a time,
as a lab stimulates the cells of a multi-cell recording one after another; ``measure p:`` keeps
the patch's own collectors (which read every cell of the patch) and repeats the others per cell.
"""

from __future__ import annotations

from dataclasses import replace

from . import ast
from .units import UNITS, Quantity

# the time fields of each stimulus that a turn shifts
_TIME_FIELDS = {
    ast.Pulse: ("at",), ast.Train: ("start",), ast.Step: ("at",), ast.StepFamily: ("at",),
    ast.Ramp: ("start", "stop"), ast.Sine: ("start", "stop"), ast.Chirp: ("start", "stop"),
    ast.Noise: ("start", "stop"), ast.PoissonInput: ("start", "stop"),
}


def _later(q, shift: float):
    """``q`` (a time) moved ``shift`` seconds later, in its own unit; a scan reference stays."""
    if not isinstance(q, Quantity) or shift == 0.0:
        return q
    factor = UNITS[q.unit][1] if q.unit else 1.0
    return Quantity(q.value + shift / factor, q.unit, q.span)


def shift_stimulus(item, shift: float):
    """A stimulus line moved ``shift`` seconds later."""
    if isinstance(item, ast.SpikeTimes):
        return replace(item, times=tuple(_later(t, shift) for t in item.times))
    if isinstance(item, ast.Activate):
        return replace(item, times=tuple(_later(t, shift) for t in item.times))
    names = _TIME_FIELDS.get(type(item))
    if names is None:
        raise AssertionError(f"internal error: no time fields known for {type(item).__name__}")
    return replace(item, **{n: _later(getattr(item, n), shift) for n in names})


def patches_of(protocol: ast.Protocol) -> dict[str, ast.PatchPick]:
    """The protocol's patches by name."""
    return {p.name: p for p in protocol.cells.picks if isinstance(p, ast.PatchPick)}


def expand_patches(protocol: ast.Protocol, patch_collectors: frozenset[str] = frozenset()) -> ast.Protocol:
    """Replace every patch by its cells (see the module docstring); a protocol without one is returned as is.

    Args:
        protocol: the parsed protocol.
        patch_collectors: collectors that read a whole patch (kept on the patch's `measure` block).

    Returns:
        The protocol with single-cell picks, record lines, stimuli and measures.
    """
    patches = patches_of(protocol)
    if not patches:
        return protocol
    picks = []
    for pick in protocol.cells.picks:
        if not isinstance(pick, ast.PatchPick):
            picks.append(pick)
            continue
        first, *rest = pick.members
        picks.append(ast.CellPick(name=first, cell_class=pick.cell_class, span=pick.span,
                                  class_span=pick.class_span))
        for name in rest:
            picks.append(ast.CellPick(name=name, cell_class=pick.cell_class,
                                      constraints=(ast.Within(distance=pick.radius, of=first, span=pick.span),),
                                      span=pick.span, class_span=pick.class_span))
    recordings = []
    for rec in protocol.recordings:
        members = patches[rec.cell].members if rec.cell in patches else (rec.cell,)
        recordings += [replace(rec, cell=m) for m in members]
    stimuli = []
    for block in protocol.stimuli:
        if block.cell not in patches:
            stimuli.append(block)
            continue
        turn = block.turn.si if isinstance(block.turn, Quantity) else 0.0
        for k, member in enumerate(patches[block.cell].members):
            stimuli.append(replace(block, cell=member, turn=None,
                                   items=tuple(shift_stimulus(i, k * turn) for i in block.items)))
    measures = []
    for block in protocol.measures:
        if block.cell not in patches:
            measures.append(block)
            continue
        own = tuple(i for i in block.items if i.collector in patch_collectors)
        if own:
            measures.append(replace(block, items=own))
        per_cell = tuple(i for i in block.items if i.collector not in patch_collectors)
        if per_cell:
            measures += [replace(block, cell=m, items=per_cell) for m in patches[block.cell].members]
    cells = replace(protocol.cells, picks=tuple(picks), patches=tuple(patches.values()))
    return replace(protocol, cells=cells, recordings=tuple(recordings), stimuli=tuple(stimuli),
                   measures=tuple(measures))


__all__ = ["expand_patches", "patches_of", "shift_stimulus"]
