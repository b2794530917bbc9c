"""Cell selection: turns the `cells:` block into concrete circuit cell ids for every repeat.

Selection is seeded and reproducible. Each repeat picks a fresh first cell (in a seeded random
order) and completes the group by drawing each later cell at random among the candidates
that satisfy its constraints. When fewer groups than asked exist, the error says how many
candidates each step left.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..language import ast
from ..language.errors import error


@dataclass
class Selection:
    names: list[str]
    ids: dict[str, np.ndarray]      # role -> (n_repeat,) int


def _candidates(pick: ast.CellPick, chosen: dict[str, int], pool: np.ndarray, instance) -> list[tuple[str, np.ndarray]]:
    """Apply the pick's constraints one by one; return (step label, remaining ids) per step."""
    steps = [(f"class {pick.cell_class}", pool)]
    current = pool[~np.isin(pool, list(chosen.values()))]
    for c in pick.constraints:
        if isinstance(c, ast.Within):
            d = instance.distance(np.full(current.shape, chosen[c.of]), current)
            current = current[d <= c.distance.si]
            label = f"within {c.distance} of {c.of}"
        elif isinstance(c, ast.ReceivingFrom):
            ok = instance.connected(np.full(current.shape, chosen[c.source]), current)
            current = current[ok]
            label = f"receiving from {c.source}"
        else:  # pragma: no cover - the parser only builds these two
            raise AssertionError(f"internal error: unknown constraint {c!r}")
        steps.append((label, current))
    return steps


def select_cells(cells: ast.Cells, instance, rng: np.random.Generator,
                 excluded: np.ndarray | None = None) -> Selection:
    """Pick ``cells.repeat`` groups of cells satisfying every constraint.

    Args:
        cells: the `cells:` block.
        instance: an instantiated circuit (ids_of, distance, connected).
        rng: the selection's random generator (derived from the protocol seed).
        excluded: optional (n_cells,) bool, cells that may not be picked (removed by a lesion).

    Returns:
        Selection with one id array per role, each of length ``cells.repeat``.

    Raises:
        ProtocolError: when fewer groups than asked satisfy the constraints; the message
            gives the candidates left after each step.
    """
    picks = cells.picks
    pools = {p.name: instance.ids_of(p.cell_class) for p in picks}
    if excluded is not None and excluded.any():
        pools = {name: ids[~excluded[ids]] for name, ids in pools.items()}
    first = picks[0]
    order = rng.permutation(pools[first.name])
    groups: list[dict[str, int]] = []
    # per pick, per step: how many first cells still had a candidate after that step
    survivors = {p.name: None for p in picks[1:]}
    tried = 0
    for first_id in order:
        if len(groups) == cells.repeat:
            break
        tried += 1
        chosen = {first.name: int(first_id)}
        for p in picks[1:]:
            steps = _candidates(p, chosen, pools[p.name], instance)
            counts = np.array([len(s[1]) > 0 for s in steps], dtype=int)
            survivors[p.name] = counts if survivors[p.name] is None else survivors[p.name] + counts
            last = steps[-1][1]
            if len(last) == 0:
                break
            chosen[p.name] = int(rng.choice(last))
        else:
            groups.append(chosen)
    if len(groups) < cells.repeat:
        lines = [f"{first.cell_class}: {len(pools[first.name])} cells of that class for {first.name!r}"]
        for p in picks[1:]:
            counts = survivors[p.name]
            if counts is None:
                continue
            steps = _candidates(p, {first.name: int(order[0])}, pools[p.name], instance)
            for (label, _), n in zip(steps, counts):
                lines.append(f"{p.name}: {label}: {n} of {tried} tried {first.name} cells still had a candidate")
        span = cells.repeat_span or cells.span
        raise error(f"only {len(groups)} of {cells.repeat} requested groups satisfy the selection",
                    span, expected="a selection that the circuit can satisfy; candidates left per step: "
                    + "; ".join(lines),
                    hint="relax a constraint (a larger distance), pick another class, or lower `repeat`")
    ids = {p.name: np.array([g[p.name] for g in groups], dtype=int) for p in picks}
    return Selection(names=[p.name for p in picks], ids=ids)
