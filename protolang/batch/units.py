"""Protocol files and folders in, run units out: one per scan point, each with its cache keys.

A unit's **pre-key** hashes what can be read without resolving anything (the protocol text, the
circuit file's bytes, the point, the protolang version and the engine settings): an unchanged
library is recognised from it at once. Its **key** hashes the resolved plan (cells, parameters,
connections, stimuli, measures and references, without file names, spans or notes) with the
version and engine settings: a change to one pathway of the circuit changes the key of exactly
the runs whose plans use it, so only those run again.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field
from pathlib import Path

from ..language.errors import ProtocolError, error, render

# Plan fields that name files or places, not the experiment: left out of the run key.
_VOLATILE = frozenset({"protocol_file", "protocol_hash", "circuit_file", "circuit_hash", "spans", "span", "notes",
                       "title"})


@dataclass
class Unit:
    """One run: a protocol's scan point (0-based ``point``), with its cache keys and state."""
    protocol: str
    point: int
    n_points: int
    title: str
    params: dict[str, str]
    pre_key: str
    key: str | None = None
    status: str = "queued"
    error: str | None = None
    extra: dict = field(default_factory=dict)

    @property
    def label(self) -> str:
        tail = f" [{', '.join(f'@{k} = {v}' for k, v in self.params.items())}]" if self.params else ""
        return f"{Path(self.protocol).name}{tail}"


def discover(paths: list[str]) -> list[Path]:
    """Every protocol file named by ``paths``: files as given, folders searched for ``*.protocol``.

    Raises:
        ProtocolError: a path that does not exist, a folder without protocols, no paths at all.
    """
    if not paths:
        raise error("no protocols given", None, expected="protocol files or folders holding *.protocol files",
                    hint="e.g. protolang batch protocols/")
    found: list[Path] = []
    for text in paths:
        p = Path(text)
        if not p.exists():
            raise error(f"{text!r} does not exist", None, expected="a protocol file or a folder of protocols",
                        hint="check the path")
        if p.is_dir():
            inside = sorted(q for q in p.rglob("*.protocol") if q.is_file())
            if not inside:
                raise error(f"the folder {text!r} holds no protocols", None,
                            expected="a folder with *.protocol files (searched recursively)",
                            hint="give the folder of the protocol library, or the files themselves")
            found.extend(inside)
        else:
            found.append(p)
    unique, seen = [], set()
    for p in found:
        r = p.resolve()
        if r not in seen:
            seen.add(r)
            unique.append(r)
    return unique


def _digest(obj) -> str:
    return hashlib.sha256(json.dumps(obj, sort_keys=True, default=str).encode()).hexdigest()


def engine_settings(target: str) -> dict:
    """What, besides the plan, decides a run's numbers: the protolang version and the code target."""
    from ..api import __version__

    return {"protolang": __version__, "target": target}


def expand(path: Path, target: str) -> tuple[list[Unit], str | None]:
    """The units of one protocol file, or ``([], error text)`` when it does not even parse.

    Cheap: parses the protocol and hashes the circuit file's bytes; resolves nothing.
    """
    from ..api import load

    try:
        exp = load(path)
        circuit_bytes = exp.circuit_path.read_bytes()
    except ProtocolError as exc:
        return [], str(exc)
    except OSError as exc:
        return [], f"{path}: cannot read the circuit file: {exc}"
    circuit_sha = hashlib.sha256(circuit_bytes).hexdigest()
    points = exp.points()
    units = []
    for k, (values, _) in enumerate(points):
        params = {name: str(q) for name, q in values.items()}
        pre_key = _digest({"text": exp.text, "circuit": circuit_sha, "point": k, "engine": engine_settings(target)})
        units.append(Unit(protocol=str(path), point=k, n_points=len(points), title=exp.protocol.title,
                          params=params, pre_key=pre_key))
    return units, None


def _stable(obj):
    """The plan's plain form without file names, spans and notes."""
    if isinstance(obj, dict):
        return {k: _stable(v) for k, v in obj.items() if k not in _VOLATILE}
    if isinstance(obj, list):
        return [_stable(v) for v in obj]
    return obj


def plan_key(plan, target: str) -> str:
    """The run key: a hash of the resolved plan's content, the version and the engine settings."""
    return _digest({"plan": _stable(plan.to_dict()), "engine": engine_settings(target)})


def estimated_cost(plan) -> float:
    """A rough relative cost of simulating a plan (cells x simulated seconds), for ordering runs.

    Handing out the longest runs first keeps workers from idling at the end of a batch (the
    longest-processing-time rule of list scheduling).
    """
    cells = sum(len(r.cell_ids) for r in plan.roles)
    if plan.network is not None:
        cells += plan.network.to_plain().get("cells", 0) * plan.n_repeat
    return float(cells * plan.n_sweeps * plan.sweep_length)


def resolve_units(units: list[Unit], target: str) -> dict[str, str]:
    """Check and plan every unit of one protocol file; set ``key`` or an ``invalid`` status.

    All units must come from the same file. Returns ``{pre_key: key}`` for the resolved ones.
    """
    from ..api import load

    if not units:
        return {}
    try:
        exp = load(units[0].protocol)
        exp.check()
    except ProtocolError as exc:
        for u in units:
            u.status, u.error = "invalid", str(exc)
        return {}
    out = {}
    for u in units:
        try:
            plan = exp.plan(u.point)
            u.key = plan_key(plan, target)
            u.extra["cost"] = estimated_cost(plan)
            out[u.pre_key] = u.key
        except ProtocolError as exc:
            u.status, u.error = "invalid", "\n".join(render(d) for d in exc.diagnostics)
    return out
