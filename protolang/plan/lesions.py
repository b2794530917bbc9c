"""Lesions: the protocol's `lesions:` lines + an instantiated circuit -> which cells, pathways and classes change.

Removals without a distance apply to the whole circuit before cells are selected (a removed
cell is never picked). A removal ``within D of CELL`` is drawn per repeat around that repeat's
selected cell, after selection, and never takes a selected cell itself. Cuts and scales act on
every connection of a pathway; a silenced class keeps its cells, which receive input but cannot
fire. Fractions are drawn from their own seeded stream, one per lesion line (and repeat).
No Brian2 here.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..language import ast
from ..language.errors import error
from ..language.format import lesion_text
from .check import find_pathway
from .model import LesionRecord

_LESION_STREAM = 0x1E5


@dataclass
class LesionState:
    """The combined effect of every lesion line."""

    removed: np.ndarray                                    # (n_cells,) bool, whole-circuit removals
    removed_near: np.ndarray | None = None                 # (n_repeat, n_cells) bool, per-repeat removals
    cut: set[str] = field(default_factory=set)             # pathway names
    scale: dict[str, float] = field(default_factory=dict)  # pathway name -> conductance factor
    silenced: set[str] = field(default_factory=set)        # class names
    records: list[LesionRecord] = field(default_factory=list)

    def gone(self, repeat: int) -> np.ndarray:
        """(n_cells,) bool: cells removed in ``repeat``'s circuit."""
        if self.removed_near is None:
            return self.removed
        return self.removed | self.removed_near[repeat]

    def conductance_factor(self, pathway: str) -> float:
        return 0.0 if pathway in self.cut else self.scale.get(pathway, 1.0)


def _matching(item: ast.Remove, instance) -> np.ndarray:
    """(n_cells,) bool: cells of the line's class (or any) in its layer, distance aside."""
    circuit = instance.circuit
    names = instance.class_names
    keep_class = np.array([item.cell_class in ("all", name) and all(
        circuit.classes[name].layer == p.layer for p in item.places if isinstance(p, ast.InLayer))
        for name in names])
    return keep_class[instance.class_index]


def _draw(candidates: np.ndarray, fraction: ast.Quantity | None, rng: np.random.Generator) -> np.ndarray:
    if fraction is None:
        return candidates
    n = int(round(fraction.si * candidates.size))
    return np.sort(rng.choice(candidates, size=n, replace=False)) if n else candidates[:0]


def _connections_touching(instance, removed: np.ndarray) -> dict[str, int]:
    hit = removed[instance.pre] | removed[instance.post]
    return _per_pathway(instance, hit)


def _per_pathway(instance, mask: np.ndarray) -> dict[str, int]:
    names = list(instance.circuit.pathways)
    counts = np.bincount(instance.pathway_index[mask], minlength=len(names))
    return {names[k]: int(n) for k, n in enumerate(counts) if n}


def _per_class(instance, removed: np.ndarray) -> dict[str, int]:
    counts = np.bincount(instance.class_index[removed], minlength=len(instance.class_names))
    return {name: int(n) for name, n in zip(instance.class_names, counts) if n}


def whole_circuit_lesions(protocol: ast.Protocol, instance) -> LesionState:
    """Apply the lesions that do not depend on selected cells.

    Args:
        protocol: the protocol (its ``lesions`` were checked against the circuit).
        instance: the instantiated circuit.

    Returns:
        The :class:`LesionState`; ``records`` holds one entry per line, in order (distance-bound
        removals are filled in later by :func:`repeat_lesions`).
    """
    circuit = instance.circuit
    state = LesionState(removed=np.zeros(instance.n_cells, dtype=bool))
    for index, item in enumerate(protocol.lesions):
        record = LesionRecord(text=lesion_text(item), kind=type(item).__name__.lower(), span=str(item.span))
        if isinstance(item, ast.Remove):
            record.kind = "remove"
            if not any(isinstance(p, ast.Within) for p in item.places):
                rng = np.random.default_rng(np.random.SeedSequence([protocol.seed, _LESION_STREAM, index]))
                candidates = np.flatnonzero(_matching(item, instance) & ~state.removed)
                chosen = _draw(candidates, item.fraction, rng)
                mask = np.zeros(instance.n_cells, dtype=bool)
                mask[chosen] = True
                state.removed |= mask
                record.cells = _per_class(instance, mask)
                record.connections = _connections_touching(instance, mask)
                record.removed_ids = chosen.tolist()
        elif isinstance(item, ast.Cut):
            name = find_pathway(circuit, item.pre, item.post).name
            state.cut.add(name)
            record.connections = {name: int(np.sum(instance.pathway_index == list(circuit.pathways).index(name)))}
        elif isinstance(item, ast.ScalePathway):
            record.kind = "scale"
            name = find_pathway(circuit, item.pre, item.post).name
            state.scale[name] = float(item.factor.si)
            record.factor = float(item.factor.si)
            record.connections = {name: int(np.sum(instance.pathway_index == list(circuit.pathways).index(name)))}
        elif isinstance(item, ast.Silence):
            state.silenced.add(item.cell_class)
            record.cells = {item.cell_class: int(instance.ids_of(item.cell_class).size)}
        state.records.append(record)
    return state


def repeat_lesions(state: LesionState, protocol: ast.Protocol, instance, selection) -> None:
    """Apply the removals bound to a selected cell (``within D of CELL``), one draw per repeat.

    Raises:
        AssertionError: the selection lacks a cell the parser accepted.
    """
    n_repeat = protocol.cells.repeat
    chosen_cells = np.stack([selection.ids[name] for name in selection.names], axis=1)   # (n_repeat, roles)
    for index, item in enumerate(protocol.lesions):
        if not isinstance(item, ast.Remove):
            continue
        within = [p for p in item.places if isinstance(p, ast.Within)]
        if not within:
            continue
        if state.removed_near is None:
            state.removed_near = np.zeros((n_repeat, instance.n_cells), dtype=bool)
        place = within[0]
        if place.of not in selection.ids:
            raise AssertionError(f"internal error: lesion refers to unselected cell {place.of!r}")
        base = _matching(item, instance) & ~state.removed
        record = state.records[index]
        record.per_repeat = True
        total = np.zeros(instance.n_cells, dtype=int)
        ids_per_repeat = []
        for r in range(n_repeat):
            rng = np.random.default_rng(np.random.SeedSequence([protocol.seed, _LESION_STREAM, index, r]))
            centre = int(selection.ids[place.of][r])
            near = instance.distance(np.full(instance.n_cells, centre), np.arange(instance.n_cells)) <= place.distance.si
            ok = base & near & ~state.removed_near[r]
            ok[chosen_cells[r]] = False
            chosen = _draw(np.flatnonzero(ok), item.fraction, rng)
            state.removed_near[r, chosen] = True
            total[chosen] += 1
            ids_per_repeat.append(chosen.tolist())
        record.removed_ids = ids_per_repeat
        counts = np.bincount(instance.class_index, weights=total, minlength=len(instance.class_names))
        record.cells = {name: int(n) for name, n in zip(instance.class_names, counts) if n}
        hit = total[instance.pre] + total[instance.post]
        names = list(instance.circuit.pathways)
        per = np.bincount(instance.pathway_index, weights=hit, minlength=len(names))
        record.connections = {names[k]: int(n) for k, n in enumerate(per) if n}


def check_pools(protocol: ast.Protocol, instance, state: LesionState) -> None:
    """A selected class whose every cell a lesion removed cannot be recorded: say which line did it."""
    for pick in protocol.cells.picks:
        ids = instance.ids_of(pick.cell_class)
        if ids.size and state.removed[ids].all():
            line = next((it.span.line for it in protocol.lesions if isinstance(it, ast.Remove)
                         and it.cell_class in ("all", pick.cell_class)), None)
            raise error(f"every {pick.cell_class} cell is removed by a lesion, so {pick.name!r} cannot be selected",
                        pick.class_span or pick.span, expected="a class with cells left after the lesions",
                        hint=f"see the `remove` line {line}" if line else "remove fewer cells")
