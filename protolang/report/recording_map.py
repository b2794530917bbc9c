"""Recording map reader: a small YAML file saying which data column or electrode is which protocol cell.

A map ties real recordings to a protocol: one entry under ``repeats`` per set of cells recorded
together (the protocol's ``repeat``), what unit the data carry, the sample rate, and what the
lab knows that the data do not say (whether a pair was connected, the soma distance). Layout::

    # recording map (invented example)
    file: cells.nwb              # an NWB file (else --nwb), or CSV files under repeats
    sample_rate: 20 kHz          # CSV traces: samples per second (or give time_column)
    time_column: time_s          # optional CSV column of sample times in seconds
    sweeps: 20                   # optional: use only the first N sweeps of every repeat
    spike_threshold: -20 mV      # optional: upward crossing that counts as a spike (default -20 mV)
    stimulus_times: [100 ms, 150 ms]   # optional: the rig's event times, replacing the protocol's
    cells:                       # protocol cell -> data column pattern ({sweep} = 1-based sweep) and unit
      pre:  {column: "pre_{sweep}", unit: mV}
      post: {column: "post_{sweep}", unit: mV}
    repeats:
      - file: pair01.csv         # CSV: one file per repeat, one column per cell and sweep
        connected: yes
        distance: 85 um
      - electrodes: {pre: e0, post: e1}   # NWB: which electrode holds which cell
        connected: no

Every problem is reported with ``file:line:col``, the key, what was expected and a hint. The
map is data, never code. No Brian2 or matplotlib here.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import yaml

from ..language.errors import Span, error, remember_source, suggest
from ..language.units import UNITS, parse_quantity

MAP_KEYS = ("sample_rate", "time_column", "sweeps", "spike_threshold", "stimulus_times", "cells",
            "repeats", "file", "note")
REPEAT_KEYS = ("file", "electrodes", "connected", "distance", "note")
CELL_KEYS = ("column", "unit")
DEFAULT_SPIKE_THRESHOLD = -0.020   # V: an overshooting action potential crosses it, a PSP does not
# trace units a map may name: unit -> (kind, factor to SI)
TRACE_UNITS = {"V": ("potential", 1.0), "mV": ("potential", 1e-3), "uV": ("potential", 1e-6),
               "A": ("current", 1.0), "nA": ("current", 1e-9), "pA": ("current", 1e-12)}


@dataclass
class CellColumn:
    """Where one protocol cell's traces are: a CSV column pattern or an NWB electrode."""

    role: str
    column: str | None
    unit: str | None
    span: Span | None = None


@dataclass
class RepeatEntry:
    """One recorded cell set (a repeat of the protocol)."""

    file: Path | None
    electrodes: dict[str, str]
    connected: bool | None
    distance: float | None          # m
    span: Span | None = None


@dataclass
class RecordingMap:
    """A parsed recording map (SI values)."""

    path: str
    sample_rate: float | None
    time_column: str | None
    sweeps: int | None
    spike_threshold: float
    stimulus_times: list[float] | None
    cells: dict[str, CellColumn]
    repeats: list[RepeatEntry]
    file: Path | None = None           # the one NWB file a map may name at its top
    spans: dict[str, Span] = field(default_factory=dict)

    def span(self, key: str) -> Span | None:
        return self.spans.get(key)


def _span(path: str, node: yaml.Node) -> Span:
    return Span(path, node.start_mark.line + 1, node.start_mark.column + 1,
                node.end_mark.line + 1, node.end_mark.column + 1)


def _scalar(path: str, node: yaml.Node, key: str, expected: str) -> str:
    if not isinstance(node, yaml.ScalarNode):
        raise error(f"recording map key {key!r} needs {expected}", _span(path, node), expected=expected)
    return str(node.value)


def _mapping(path: str, node: yaml.Node, key: str, allowed: tuple[str, ...]) -> dict[str, tuple[yaml.Node, yaml.Node]]:
    if not isinstance(node, yaml.MappingNode):
        raise error(f"recording map key {key!r} needs a mapping of 'key: value' lines", _span(path, node),
                    expected="key: value lines")
    out = {}
    for k, v in node.value:
        name = str(k.value)
        if allowed and name not in allowed:
            raise error(f"unknown key {name!r} in {key!r} of the recording map", _span(path, k),
                        expected="one of " + ", ".join(allowed), hint=suggest(name, allowed))
        if name in out:
            raise error(f"key {name!r} given twice in {key!r}", _span(path, k), expected="each key once")
        out[name] = (k, v)
    return out


def _quantity(path: str, node: yaml.Node, key: str, dimension: str, example: str) -> float:
    text = _scalar(path, node, key, f"a {dimension} such as '{example}'")
    q = parse_quantity(text, _span(path, node))
    if q.dimension != dimension:
        got = "a plain number" if not q.unit else f"{q.unit!r} ({q.dimension})"
        raise error(f"recording map key {key!r} needs a {dimension}, got {got}", _span(path, node),
                    expected=f"a {dimension} such as '{example}'", hint=f"write e.g. {key}: {example}")
    return q.si


def _bool(path: str, node: yaml.Node, key: str) -> bool:
    text = _scalar(path, node, key, "yes or no").strip().lower()
    if text in ("yes", "true", "on"):
        return True
    if text in ("no", "false", "off"):
        return False
    raise error(f"recording map key {key!r} needs yes or no, got {node.value!r}", _span(path, node),
                expected="yes or no", hint="write connected: yes (a response was seen) or connected: no")


def read_map(path: str | Path, roles: dict[str, str]) -> RecordingMap:
    """Read and check a recording map.

    Args:
        path: the YAML file.
        roles: protocol cell name -> its recording mode ("current clamp", "voltage clamp" or
            "off"), to check units against the declared mode.

    Returns:
        The parsed :class:`RecordingMap`; file paths are relative to the map's folder.

    Raises:
        ProtocolError: unreadable file, malformed YAML, unknown keys, wrong kinds of value,
            units that do not fit a cell's clamp mode, cells the protocol does not have.
    """
    path = str(path)
    try:
        text = Path(path).read_text(encoding="utf-8")
    except FileNotFoundError:
        raise error(f"recording map {path!r} not found", None, expected="a path to a YAML recording map",
                    hint="see README section 'Real recordings back through the collectors'") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise error(f"cannot read recording map {path!r}: {exc}", None, expected="a UTF-8 YAML file") from None
    remember_source(path, text)
    try:
        root = yaml.compose(text, Loader=yaml.SafeLoader)
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line, col = (mark.line + 1, mark.column + 1) if mark is not None else (1, 1)
        raise error(f"malformed YAML: {exc.problem or exc}", Span(path, line, col),
                    expected="YAML mappings of 'key: value' lines", hint="check the indentation") from None
    if root is None:
        raise error(f"recording map {path!r} is empty", Span(path, 1, 1), expected="cells: and repeats: keys")
    top = _mapping(path, root, "the recording map", MAP_KEYS)
    base = Path(path).parent
    spans = {k: _span(path, kn) for k, (kn, _v) in top.items()}

    def need(key: str, hint: str):
        if key not in top:
            raise error(f"recording map {path!r} has no {key!r}", Span(path, 1, 1), expected=f"a {key!r} key",
                        hint=hint)
        return top[key][1]

    sample_rate = None
    if "sample_rate" in top:
        sample_rate = _quantity(path, top["sample_rate"][1], "sample_rate", "frequency", "20 kHz")
        if sample_rate <= 0:
            raise error("sample_rate must be positive", _span(path, top["sample_rate"][1]),
                        expected="a positive frequency such as '20 kHz'")
    time_column = _scalar(path, top["time_column"][1], "time_column", "a column name") if "time_column" in top else None
    sweeps = None
    if "sweeps" in top:
        node = top["sweeps"][1]
        text_value = _scalar(path, node, "sweeps", "a whole number")
        if not text_value.isdigit() or int(text_value) < 1:
            raise error(f"sweeps needs a whole number of 1 or more, got {text_value!r}", _span(path, node),
                        expected="a whole number such as 20")
        sweeps = int(text_value)
    threshold = DEFAULT_SPIKE_THRESHOLD
    if "spike_threshold" in top:
        threshold = _quantity(path, top["spike_threshold"][1], "spike_threshold", "voltage", "-20 mV")
    stim = None
    if "stimulus_times" in top:
        node = top["stimulus_times"][1]
        if not isinstance(node, yaml.SequenceNode) or not node.value:
            raise error("stimulus_times needs a list of times", _span(path, node),
                        expected="a list such as [100 ms, 150 ms]")
        stim = [_quantity(path, n, "stimulus_times", "time", "100 ms") for n in node.value]
        if any(b <= a for a, b in zip(stim, stim[1:])):
            raise error("stimulus_times must increase", _span(path, node), expected="increasing times")

    cells: dict[str, CellColumn] = {}
    for role, (kn, vn) in _mapping(path, need("cells", "name each recorded protocol cell, e.g. "
                                                       "cells: {post: {column: 'post_{sweep}', unit: mV}}"),
                                   "cells", ()).items():
        if role not in roles:
            raise error(f"recording map names cell {role!r}, which the protocol does not have", _span(path, kn),
                        expected="one of the protocol's cells: " + ", ".join(roles), hint=suggest(role, roles))
        fields = _mapping(path, vn, f"cells.{role}", CELL_KEYS)
        column = _scalar(path, fields["column"][1], f"cells.{role}.column", "a column name") \
            if "column" in fields else None
        unit = None
        if "unit" in fields:
            unode = fields["unit"][1]
            unit = _scalar(path, unode, f"cells.{role}.unit", "a unit")
            if unit not in TRACE_UNITS:
                raise error(f"cells.{role}.unit {unit!r} is not a trace unit", _span(path, unode),
                            expected="one of " + ", ".join(TRACE_UNITS), hint=suggest(unit, TRACE_UNITS))
            kind = TRACE_UNITS[unit][0]
            mode = roles[role]
            want = "current" if mode == "voltage clamp" else "potential"
            if mode == "off":
                raise error(f"cell {role!r} is not recorded in the protocol (record ... off), but the map gives "
                            f"it a trace", _span(path, kn), expected="only cells the protocol records")
            if kind != want:
                raise error(f"cells.{role}.unit {unit!r} is a {kind}, but the protocol records {role!r} in {mode}, "
                            f"whose trace is a membrane {want}", _span(path, unode),
                            expected=f"a {want} unit: " + ", ".join(u for u, (k, _f) in TRACE_UNITS.items() if k == want),
                            hint="a current-clamp trace is a potential (mV); a voltage-clamp trace is the clamp "
                                 "current (pA)")
        cells[role] = CellColumn(role, column, unit, _span(path, kn))

    repeats: list[RepeatEntry] = []
    rnode = need("repeats", "list one entry per recorded cell set, e.g. repeats: [{file: pair01.csv, connected: yes}]")
    if not isinstance(rnode, yaml.SequenceNode) or not rnode.value:
        raise error("repeats needs a list with one entry per recorded cell set", _span(path, rnode),
                    expected="a list of entries such as '- file: pair01.csv'")
    for k, node in enumerate(rnode.value):
        key = f"repeats[{k}]"
        fields = _mapping(path, node, key, REPEAT_KEYS)
        file = base / _scalar(path, fields["file"][1], f"{key}.file", "a file name") if "file" in fields else None
        electrodes = {}
        if "electrodes" in fields:
            for role, (ekn, evn) in _mapping(path, fields["electrodes"][1], f"{key}.electrodes", ()).items():
                if role not in cells:
                    raise error(f"{key}.electrodes names cell {role!r}, which 'cells' does not list",
                                _span(path, ekn), expected="one of " + ", ".join(cells), hint=suggest(role, cells))
                electrodes[role] = _scalar(path, evn, f"{key}.electrodes.{role}", "an electrode name")
        connected = _bool(path, fields["connected"][1], f"{key}.connected") if "connected" in fields else None
        distance = None
        if "distance" in fields:
            distance = _quantity(path, fields["distance"][1], f"{key}.distance", "length", "85 um")
            if not math.isfinite(distance) or distance < 0:
                raise error(f"{key}.distance must be 0 or more", _span(path, fields["distance"][1]),
                            expected="a length such as '85 um'")
        repeats.append(RepeatEntry(file, electrodes, connected, distance, _span(path, node)))
    file = None
    if "file" in top:
        file = base / _scalar(path, top["file"][1], "file", "a file name")
        if file.suffix.lower() != ".nwb":
            raise error(f"the map's top-level 'file' names {file.name!r}, not an NWB file", _span(path, top["file"][1]),
                        expected="an .nwb file (CSV files are named per repeat: repeats: - file: NAME.csv)",
                        hint="move it under 'repeats'")
    return RecordingMap(path, sample_rate, time_column, sweeps, threshold, stim, cells, repeats, file, spans)


def trace_factor(unit: str) -> float:
    """The factor taking a map's trace unit to SI."""
    return TRACE_UNITS[unit][1]


__all__ = ["RecordingMap", "RepeatEntry", "CellColumn", "read_map", "trace_factor", "UNITS"]
