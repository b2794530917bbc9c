"""Import of real recordings: a protocol plus NWB or CSV traces in, a recording-set folder of the same tables out.

The protocol says what was done (cells, clamp modes, stimuli, sweeps, measures); the data say
what was recorded. The importer builds a :class:`~protolang.engine.recordings.Recordings` from
the data and a *recorded plan* from the protocol's plan (one repeat per recorded cell set, the
data's sweep count, length and sample rate; model facts such as circuit cell ids and release
sites replaced by what the lab knows, or left empty), then runs exactly the collectors a model
run runs (:func:`protolang.measure.collect.collect`). The folder it writes has a run folder's
layout (tables, figures, plan.json, provenance.json with ``"kind": "recordings"``,
recordings.npz), so ``protolang report`` and ``protolang compare`` read it like a run.

Sources:

* an NWB file (:func:`protolang.report.nwb.read_nwb`): a file protolang exported carries
  which electrode is which cell (and the model's facts, so its tables come back identical);
  any other intracellular NWB file needs a recording map (:mod:`protolang.report.recording_map`)
  naming the electrode of each cell per repeat;
* CSV traces: one file per repeat, one column per cell and sweep, described by a recording map.

Presynaptic spikes come from the NWB file's units table when protolang wrote it; otherwise
they are detected in current-clamp traces as upward crossings of the map's
``spike_threshold`` (default -20 mV), timed by linear interpolation between samples.
No Brian2 here.
"""

from __future__ import annotations

import copy
import hashlib
import math
import os
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Callable

import numpy as np

from ..language.errors import Span, error, suggest
from .recording_map import DEFAULT_SPIKE_THRESHOLD, RecordingMap, read_map, trace_factor

if TYPE_CHECKING:
    import pandas as pd

    from ..engine.recordings import Recordings
    from ..plan.model import Plan

# measures whose tables come from traces and spikes alone (the others need the model itself)
IMPORTABLE = ("responses", "plasticity", "spikes", "passive", "firing", "fi")
REFRACTORY = 1e-3        # s: a second crossing sooner than this is the same spike
RATE_TOLERANCE = 1e-6    # relative: sample intervals that differ by more are different rates


@dataclass
class CellTraces:
    """One recorded cell of one repeat: traces per sweep (SI) and, when known, spike times."""

    traces: np.ndarray                      # (n_sweeps, n_samples) V or A
    unit: str                               # "V" or "A"
    spikes: list[np.ndarray] | None = None  # per sweep, s in sweep time
    cell_id: int = -1
    position: np.ndarray | None = None      # (3,) m
    starts: np.ndarray | None = None        # (n_sweeps,) s, session time of each sweep (NWB)


@dataclass
class RepeatData:
    """One recorded cell set: its cells, where it came from and what the lab states about it."""

    label: str
    cells: dict[str, CellTraces]
    connected: dict[str, bool] = field(default_factory=dict)      # synapse name -> connected
    n_sites: dict[str, int] = field(default_factory=dict)         # synapse name -> release sites (model only)
    spikes_only: dict[str, list[np.ndarray]] = field(default_factory=dict)   # role -> per-sweep spikes, no trace
    distance: float | None = None                                  # m, between the first synapse's cells


@dataclass
class RecordingSet:
    """Everything read from the data, before it meets the collectors."""

    sample_dt: float
    repeats: list[RepeatData]
    sources: list[str]
    conditions: dict = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    simulated: bool = False     # the source says its data are simulated (protolang's own NWB export)


def _check_length(plan: "Plan", rset: RecordingSet, rmap: RecordingMap | None) -> None:
    """Every stimulus event of the protocol (or the map's stimulus times) must fall inside the sweeps."""
    first = next(iter(rset.repeats[0].cells.values()))
    length = first.traces.shape[-1] * rset.sample_dt
    times = [e.time for r in plan.roles for e in r.events]
    if rmap is not None and rmap.stimulus_times:
        times = list(rmap.stimulus_times)
    if times and max(times) >= length:
        raise error(f"the recorded sweeps last {length * 1e3:g} ms, but the protocol's last stimulus event is at "
                    f"{max(times) * 1e3:g} ms ({', '.join(rset.sources[:2])})", None,
                    expected="sweeps that contain every stimulus event and its response",
                    hint="import the full sweeps, or give the rig's event times with stimulus_times in the map")


# --- checks shared by the readers ------------------------------------------------------------
def _sha256(path: str | os.PathLike) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def detect_spikes(trace: np.ndarray, dt: float, threshold: float = DEFAULT_SPIKE_THRESHOLD,
                  t0: float = 0.0) -> np.ndarray:
    """Upward crossings of ``threshold`` in a membrane-potential trace (s), linearly interpolated.

    Args:
        trace: (n_samples,) V.
        dt: sample interval (s).
        threshold: V.
        t0: time of the first sample (s).

    Returns:
        Crossing times (s); crossings closer than :data:`REFRACTORY` to the previous one are dropped.
    """
    v = np.asarray(trace, dtype=float)
    below = v[:-1] < threshold
    above = v[1:] >= threshold
    idx = np.flatnonzero(below & above)
    frac = (threshold - v[idx]) / (v[idx + 1] - v[idx])
    times = t0 + (idx + frac) * dt
    keep, last = [], -math.inf
    for t in times:
        if t - last >= REFRACTORY:
            keep.append(t)
            last = t
    return np.asarray(keep, dtype=float)


def _protocol_roles(plan: "Plan") -> dict[str, str]:
    return {r.name: (r.mode if r.recorded else "off") for r in plan.roles}


def _check_measures(plan: "Plan") -> None:
    for m in plan.measures:
        if m.collector not in IMPORTABLE:
            span = _parse_span(m.span)
            raise error(f"measure {m.collector!r} of cell {m.cell!r} cannot be computed from recordings: it needs the "
                        f"model itself", span, expected="measures computed from traces: " + ", ".join(IMPORTABLE),
                        hint="import with a copy of the protocol without this measure")


def _parse_span(text: str) -> Span | None:
    try:
        file, line, col = text.rsplit(":", 2)
        return Span(file, int(line), int(col))
    except (ValueError, AttributeError):
        return None


# --- CSV ------------------------------------------------------------------------------------
def _csv_sweeps(pattern: str, columns: list[str], limit: int | None) -> int:
    if "{sweep}" not in pattern:
        return 1
    n = 0
    while pattern.format(sweep=n + 1) in columns and (limit is None or n < limit):
        n += 1
    return n


def read_csv_set(rmap: RecordingMap, plan: "Plan") -> RecordingSet:
    """Read the CSV traces a recording map describes.

    Raises:
        ProtocolError: a missing file or column, non-numeric or missing values, a time column
            whose spacing disagrees with ``sample_rate`` or with another file's, no rate at all,
            repeats with different sweep counts or lengths.
    """
    import pandas as pd

    roles = _protocol_roles(plan)
    recorded = [r for r, mode in roles.items() if mode != "off"]
    for role in recorded:
        if role not in rmap.cells:
            raise error(f"the protocol records cell {role!r} but the recording map {rmap.path!r} does not say where "
                        f"its traces are", rmap.span("cells"), expected=f"an entry 'cells: {role}: {{column: ..., unit: ...}}'",
                        hint="name the CSV column of every recorded cell, with {sweep} for the sweep number")
    for role, cell in rmap.cells.items():
        if cell.column is None or cell.unit is None:
            missing = "column" if cell.column is None else "unit"
            raise error(f"cells.{role} of the recording map has no {missing!r}", cell.span,
                        expected="column: PATTERN and unit: mV (or pA for voltage clamp)",
                        hint="e.g. post: {column: 'post_{sweep}', unit: mV}")
    if rmap.sample_rate is None and rmap.time_column is None:
        raise error(f"recording map {rmap.path!r} gives neither sample_rate nor time_column", Span(rmap.path, 1, 1),
                    expected="sample_rate: 20 kHz, or time_column: NAME", hint="CSV traces need their sample rate")
    dt_all, n_sweeps_all, n_samples_all = None, None, None
    repeats, sources = [], []
    for k, entry in enumerate(rmap.repeats):
        where = f"repeats[{k}]"
        if entry.file is None:
            raise error(f"{where} of the recording map names no file", entry.span, expected="file: NAME.csv",
                        hint="CSV traces are one file per repeat")
        try:
            frame = pd.read_csv(entry.file, comment="#")
        except FileNotFoundError:
            raise error(f"{where}: CSV file {str(entry.file)!r} not found", entry.span,
                        expected="a path relative to the recording map") from None
        except (OSError, UnicodeDecodeError, pd.errors.ParserError, pd.errors.EmptyDataError) as exc:
            raise error(f"{where}: cannot read CSV file {str(entry.file)!r}: {exc}", entry.span,
                        expected="comma-separated columns with a header line") from None
        file = str(entry.file)
        if len(frame) < 2:
            raise error(f"{file} has {len(frame)} data row(s)", entry.span, expected="one row per sample of a sweep",
                        hint="check that the file holds the traces, not only their header")
        columns = [str(c) for c in frame.columns]
        # sample interval
        dt = None if rmap.sample_rate is None else 1.0 / rmap.sample_rate
        if rmap.time_column is not None:
            if rmap.time_column not in columns:
                raise error(f"{file}: no column {rmap.time_column!r} (the map's time_column)", rmap.span("time_column"),
                            expected="one of the file's columns: " + ", ".join(columns[:12]),
                            hint=suggest(rmap.time_column, columns))
            t = _numeric(frame, rmap.time_column, file)
            steps = np.diff(t)
            if steps.size == 0 or np.any(steps <= 0):
                raise error(f"{file}: column {rmap.time_column!r} does not increase", None,
                            expected="sample times in seconds, increasing")
            step = float(np.median(steps))
            if np.max(np.abs(steps - step)) > 1e-3 * step:
                raise error(f"{file}: column {rmap.time_column!r} is not evenly spaced "
                            f"(intervals {steps.min():.6g} to {steps.max():.6g} s)", None,
                            expected="one sample rate per file", hint="resample the traces to one rate")
            # the rate over the whole column, snapped to a whole number of Hz when it is one to
            # float precision (sample times printed in decimal are rarely exact multiples)
            rate = (len(t) - 1) / (t[-1] - t[0])
            rate = float(round(rate)) if abs(rate - round(rate)) <= 1e-6 * rate else rate
            step = 1.0 / rate
            if dt is not None and abs(step - dt) > RATE_TOLERANCE * 1e3 * dt:
                raise error(f"{file}: column {rmap.time_column!r} says {1 / step:.6g} Hz but the recording map's "
                            f"sample_rate says {rmap.sample_rate:.6g} Hz", rmap.span("sample_rate"),
                            expected="matching sample rates", hint="correct sample_rate or drop it")
            dt = step
        if dt_all is not None and abs(dt - dt_all) > RATE_TOLERANCE * 1e3 * dt_all:
            raise error(f"{file} is sampled at {1 / dt:.6g} Hz but {sources[0]} at {1 / dt_all:.6g} Hz", entry.span,
                        expected="one sample rate for all repeats", hint="resample the traces to one rate")
        dt_all = dt if dt_all is None else dt_all
        # sweeps present per cell
        counts = {role: _csv_sweeps(cell.column, columns, rmap.sweeps) for role, cell in rmap.cells.items()}
        n_sweeps = rmap.sweeps or max(counts.values())
        for role, cell in rmap.cells.items():
            for s in range(1, n_sweeps + 1):
                col = cell.column.format(sweep=s) if "{sweep}" in cell.column else cell.column
                if col not in columns:
                    raise error(f"{file}: no column {col!r} (cell {role!r}, sweep {s})", cell.span,
                                expected=f"columns {cell.column!r} for sweeps 1 to {n_sweeps}",
                                hint=suggest(col, columns) or "check the file's header line or set 'sweeps:' "
                                                             "in the map to use fewer sweeps")
        if n_sweeps_all is not None and n_sweeps != n_sweeps_all:
            raise error(f"{file} has {n_sweeps} sweeps but {sources[0]} has {n_sweeps_all}", entry.span,
                        expected="the same number of sweeps in every repeat",
                        hint="set 'sweeps: N' in the map to use the first N of each")
        n_sweeps_all = n_sweeps
        if n_samples_all is not None and len(frame) != n_samples_all:
            raise error(f"{file} has {len(frame)} samples per sweep but {sources[0]} has {n_samples_all}", entry.span,
                        expected="sweeps of one length", hint="cut the sweeps to one length")
        n_samples_all = len(frame)
        cells = {}
        for role, cell in rmap.cells.items():
            factor = trace_factor(cell.unit)
            si_unit = "A" if roles[role] == "voltage clamp" else "V"
            traces = np.stack([_numeric(frame, cell.column.format(sweep=s) if "{sweep}" in cell.column else cell.column,
                                        file) * factor for s in range(1, n_sweeps + 1)])
            cells[role] = CellTraces(traces=traces, unit=si_unit)
        connected = {}
        for syn in plan.synapses:
            if entry.connected is None:
                raise error(f"{where} of the recording map does not say whether the pair was connected",
                            entry.span, expected="connected: yes or connected: no",
                            hint="the lab decides connectivity; protolang does not guess it")
            connected[syn.name] = entry.connected
        repeats.append(RepeatData(label=file, cells=cells, connected=connected, distance=entry.distance))
        sources.append(file)
    return RecordingSet(sample_dt=float(dt_all), repeats=repeats, sources=sources)


def _numeric(frame: "pd.DataFrame", column: str, file: str) -> np.ndarray:
    import pandas as pd

    values = pd.to_numeric(frame[column], errors="coerce").to_numpy(dtype=float)
    bad = np.flatnonzero(~np.isfinite(values))
    if bad.size:
        row = int(bad[0])
        raise error(f"{file}: column {column!r} has a missing or non-numeric value at data row {row + 1} "
                    f"({frame[column].iloc[row]!r})", Span(file, row + 2, 1),
                    expected="a number in every row", hint="fill or cut the gap before importing")
    return values


# --- NWB ------------------------------------------------------------------------------------
def read_nwb_set(path: str, plan: "Plan", rmap: RecordingMap | None) -> RecordingSet:
    """Read an intracellular NWB file into repeats of the protocol's cells.

    Without a map the file must carry protolang's own cell columns (an export of a run);
    with a map, each repeat names its electrodes and sweeps are the electrodes' series in
    time order.

    Raises:
        ProtocolError: see :func:`protolang.report.nwb.read_nwb`, plus electrodes the file
            lacks, cells recorded in a mode other than the protocol's, sweep counts or
            rates that do not match.
    """
    from .nwb import read_nwb

    content = read_nwb(path)
    roles = _protocol_roles(plan)
    by_electrode: dict[str, list] = {}
    for s in content.series:
        by_electrode.setdefault(s.electrode, []).append(s)
    rates = {s.rate for s in content.series}
    if len(rates) > 1:
        raise error(f"{path}: the intracellular series have different sample rates ({', '.join(f'{r:g}' for r in sorted(rates))} Hz)",
                    None, expected="one sample rate for every series", hint="resample to one rate before importing")
    rate = rates.pop()
    # (role, repeat) -> electrode
    layout: list[dict[str, str]] = []
    pairs_meta: dict[tuple[str, int], dict] = {}
    if rmap is None:
        tagged = {name: info for name, info in content.electrodes.items() if info.get("role") is not None}
        if not tagged:
            raise error(f"{path} does not say which electrode is which protocol cell", None,
                        expected="an NWB file exported by protolang, or a recording map",
                        hint="write a recording map with 'repeats: - electrodes: {pre: NAME, post: NAME}' and pass --map")
        in_file = sorted({str(info["role"]) for info in tagged.values()})
        recorded = sorted(r for r, mode in roles.items() if mode != "off")
        if in_file != recorded:
            title = content.session.get("description") or "another protocol"
            raise error(f"{path} holds cells {', '.join(in_file)} (exported from {title!r}), but the protocol records "
                        f"{', '.join(recorded)}", None, expected="the protocol the file was exported from",
                        hint="import with the protocol that was run, or write a recording map that names the electrodes")
        n_repeat = 1 + max(int(info["repeat"]) for info in tagged.values())
        layout = [{} for _ in range(n_repeat)]
        for name, info in tagged.items():
            layout[int(info["repeat"])][str(info["role"])] = name
        if content.pairs is not None:
            for row in content.pairs.to_dict("records"):
                pairs_meta[(str(row["synapse"]), int(row["repeat"]))] = row
    else:
        for k, entry in enumerate(rmap.repeats):
            if not entry.electrodes:
                raise error(f"repeats[{k}] of the recording map names no electrodes", entry.span,
                            expected="electrodes: {CELL: ELECTRODE, ...}", hint="NWB traces are found by electrode name")
            for role, name in entry.electrodes.items():
                if name not in content.electrodes:
                    raise error(f"repeats[{k}]: electrode {name!r} is not in {path}", entry.span,
                                expected="one of " + ", ".join(sorted(content.electrodes)),
                                hint=suggest(name, content.electrodes))
            layout.append(dict(entry.electrodes))
    threshold = rmap.spike_threshold if rmap is not None else DEFAULT_SPIKE_THRESHOLD
    repeats, n_sweeps_all, n_samples, pending = [], None, None, []
    for r, electrodes in enumerate(layout):
        for role in roles:
            if roles[role] != "off" and role not in electrodes:
                raise error(f"{path}: no electrode for cell {role!r} in repeat {r}", None,
                            expected="one electrode per recorded protocol cell",
                            hint="list it under the repeat's 'electrodes' in the recording map")
        cells, starts = {}, None
        for role, name in electrodes.items():
            if role not in roles:
                raise error(f"{path}: electrode {name!r} is tagged as cell {role!r}, which the protocol does not have",
                            None, expected="one of " + ", ".join(roles), hint="import with the protocol that was run")
            series = sorted(by_electrode.get(name, []), key=lambda s: s.starting_time)
            if not series:
                raise error(f"{path}: electrode {name!r} has no recorded series", None,
                            expected="current- or voltage-clamp series for every named electrode")
            want = roles[role]
            for s in series:
                if s.mode != want:
                    raise error(f"{path}: electrode {name!r} (cell {role!r}) holds a {s.mode} series, but the protocol "
                                f"records {role!r} in {want}", None, expected=f"{want} series",
                                hint="check which electrode is which cell, or the protocol's record lines")
            if rmap is not None and rmap.sweeps is not None:
                if len(series) < rmap.sweeps:
                    raise error(f"{path}: electrode {name!r} has {len(series)} sweeps, the map asks for {rmap.sweeps}",
                                rmap.span("sweeps"), expected=f"at most {len(series)} sweeps")
                series = series[:rmap.sweeps]
            if n_sweeps_all is not None and len(series) != n_sweeps_all:
                raise error(f"{path}: electrode {name!r} has {len(series)} sweeps, other cells have {n_sweeps_all}",
                            None, expected="the same number of sweeps for every cell and repeat",
                            hint="set 'sweeps: N' in the recording map to use the first N")
            n_sweeps_all = len(series)
            length = min(len(s.data) for s in series)
            n_samples = length if n_samples is None else min(n_samples, length)
            these = np.array([s.starting_time for s in series])
            starts = these if starts is None else starts
            cells[role] = (series, name)
        per_role: dict[str, CellTraces] = {}
        for role, (series, name) in cells.items():
            info = content.electrodes.get(name, {})
            pos = None
            if all(info.get(k) is not None for k in ("x_um", "y_um", "z_um")):
                pos = np.array([info["x_um"], info["y_um"], info["z_um"]], dtype=float) * 1e-6
            circuit_id = info.get("circuit_cell_id")
            per_role[role] = CellTraces(traces=[s.data for s in series], unit=series[0].unit,
                                        cell_id=int(circuit_id) if circuit_id is not None else -1, position=pos,
                                        starts=np.array([s.starting_time for s in series]))
        repeat = RepeatData(label=f"{path} repeat {r}", cells=per_role)
        # spikes: the file's own (protolang's units) or detected
        for role in roles:
            key = f"{role}[{r}]"
            ref_starts = per_role[role].starts if role in per_role else starts
            if key in content.spikes and ref_starts is not None:
                # cut into sweeps below, once the common sweep length is known
                pending.append((repeat, role, np.asarray(content.spikes[key], dtype=float), ref_starts))
        for syn in plan.synapses:
            meta = pairs_meta.get((syn.name, r))
            if meta is not None:
                repeat.connected[syn.name] = bool(meta["connected"])
                repeat.n_sites[syn.name] = int(meta["n_release_sites"])
            elif rmap is not None and rmap.repeats[r].connected is not None:
                repeat.connected[syn.name] = rmap.repeats[r].connected
                repeat.distance = rmap.repeats[r].distance
            else:
                raise error(f"{path}: repeat {r} does not say whether {syn.pre} -> {syn.post} was connected", None,
                            expected="connected: yes or no for every repeat in the recording map",
                            hint="the lab decides connectivity; protolang does not guess it")
        repeats.append(repeat)
    # cut every series (and the file's spike times) to the common sweep length and stack
    length = n_samples / rate
    for repeat, role, spk, starts_of in pending:
        per_sweep = [spk[(spk >= s0 - 1e-9) & (spk < s0 + length - 1e-9)] - s0 for s0 in starts_of]
        if role in repeat.cells:
            repeat.cells[role].spikes = per_sweep
        else:
            repeat.spikes_only[role] = per_sweep
    for repeat in repeats:
        for role, cell in repeat.cells.items():
            cell.traces = np.stack([np.asarray(d[:n_samples], dtype=float) for d in cell.traces])
            if cell.spikes is None and cell.unit == "V":
                cell.spikes = [detect_spikes(tr, 1.0 / rate, threshold) for tr in cell.traces]
    notes = []
    if any(len(s.data) != n_samples for s in content.series):
        notes.append(f"series of unequal length were cut to the shortest, {n_samples} samples")
    simulated = str(content.session.get("notes") or "").lstrip().upper().startswith("SIMULATED")
    if simulated:
        notes.append("the NWB file says its data are simulated (a protolang export), not recorded from cells")
    return RecordingSet(sample_dt=1.0 / rate, repeats=repeats, sources=[str(path)],
                        conditions=dict(content.conditions), notes=notes, simulated=simulated)


# --- the recorded plan and recordings ------------------------------------------------------
def recorded_plan(plan: "Plan", rset: RecordingSet, rmap: RecordingMap | None = None) -> "Plan":
    """The protocol's plan reshaped to the data: repeats, sweeps, length, rate and cell facts.

    Model facts the data cannot supply are emptied: circuit cell ids become -1, positions NaN
    (unless the map gives a distance), release sites -1, unless the file is protolang's own
    export, which carries them.
    """
    new = copy.deepcopy(plan)
    n_rep = len(rset.repeats)
    first = rset.repeats[0]
    any_cell = next(iter(first.cells.values()))
    n_sweeps, n_samples = any_cell.traces.shape
    new.n_repeat = n_rep
    new.n_sweeps = n_sweeps
    new.sample_dt = rset.sample_dt
    new.dt = rset.sample_dt
    new.sweep_length = n_samples * rset.sample_dt
    new.layout = "sequential"
    new.layout_reason = "recorded data: one repeat per recorded cell set, sweeps as recorded"
    new.notes = list(plan.notes) + list(rset.notes)
    for role in new.roles:
        ids = np.full(n_rep, -1, dtype=np.int64)
        pos = np.full((n_rep, 3), np.nan)
        for r, rep in enumerate(rset.repeats):
            cell = rep.cells.get(role.name)
            if cell is not None:
                ids[r] = cell.cell_id
                if cell.position is not None:
                    pos[r] = cell.position
        role.cell_ids = ids
        role.positions = pos
        role.holding_current = None if role.holding_current is None else np.full(n_rep, np.nan)
        role.amplitude_scale = None
        role.model = "recorded"    # a real cell, not one of the engine's models
        # the model's parameters say nothing about a recorded cell: kept as names, emptied as values
        role.params = {k: np.full((n_rep,) + np.shape(v)[1:], np.nan) if np.ndim(v) else v
                       for k, v in role.params.items()}
        if rmap is not None and rmap.stimulus_times is not None and role.events:
            events = sorted(role.events, key=lambda e: e.time)
            if len(events) != len(rmap.stimulus_times):
                raise error(f"stimulus_times lists {len(rmap.stimulus_times)} times but the protocol stimulates "
                            f"{role.name!r} {len(events)} times per sweep", rmap.span("stimulus_times"),
                            expected=f"{len(events)} times", hint="list one time per stimulus event, in order")
            for ev, t in zip(events, rmap.stimulus_times):
                ev.time = float(t)
    for syn in new.synapses:
        syn.connected = np.array([bool(rep.connected.get(syn.name, False)) for rep in rset.repeats])
        syn.n_sites = np.array([int(rep.n_sites.get(syn.name, -1)) for rep in rset.repeats], dtype=np.int64)
        for name in ("site_conductance", "delay", "rule_probability"):
            if getattr(syn, name, None) is not None:
                setattr(syn, name, np.full(n_rep, np.nan))
        distance = np.array([np.nan if rep.distance is None else rep.distance for rep in rset.repeats])
        syn.distance = distance
        pre, post = new.role(syn.pre), new.role(syn.post)
        for r, d in enumerate(distance):
            if math.isfinite(d) and not np.isfinite(pre.positions[r]).all():
                pre.positions[r] = (0.0, 0.0, 0.0)
                post.positions[r] = (d, 0.0, 0.0)
    if rset.conditions:
        new.conditions = dict(new.conditions, recorded=dict(rset.conditions))
    return new


def build_recordings(plan: "Plan", rset: RecordingSet, threshold: float) -> "Recordings":
    """Recordings of the data in the engine's layout (traces per role: repeat x sweep x sample)."""
    from ..engine.recordings import Recordings

    first = next(iter(rset.repeats[0].cells.values()))
    n_sweeps, n_samples = first.traces.shape
    traces, spikes, units = {}, {}, {}
    for role in plan.roles:
        cells = [rep.cells.get(role.name) for rep in rset.repeats]
        if all(c is not None for c in cells):
            traces[role.name] = np.stack([c.traces for c in cells])
            units[role.name] = cells[0].unit
        per_repeat = []
        for rep, cell in zip(rset.repeats, cells):
            if cell is not None and cell.spikes is not None:
                per_repeat.append([np.asarray(s, dtype=float) for s in cell.spikes])
            elif role.name in rep.spikes_only:
                per_repeat.append(rep.spikes_only[role.name])
            elif cell is not None and cell.unit == "V":
                per_repeat.append([detect_spikes(tr, rset.sample_dt, threshold) for tr in cell.traces])
            else:
                per_repeat = None
                break
        if per_repeat is not None:
            spikes[role.name] = per_repeat
    meta = {"target": "recordings", "trace_units": units, "sources": list(rset.sources)}
    return Recordings(sample_dt=rset.sample_dt, time=np.arange(n_samples) * rset.sample_dt, traces=traces,
                      spikes=spikes, meta=meta)


# --- the whole import -----------------------------------------------------------------------
@dataclass
class ImportResult:
    plan: "Plan"
    recordings: "Recordings"
    tables: dict
    provenance: dict
    out_dir: Path | None = None


def import_recordings(protocol: str | os.PathLike, out: str | os.PathLike | None, *, nwb: str | None = None,
                      map_path: str | None = None, point: int = 0, force: bool = False,
                      progress: Callable[[str], None] | None = None) -> ImportResult:
    """Analyse real (or exported) recordings of ``protocol`` with the model's collectors.

    Args:
        protocol: the protocol file the recordings followed.
        out: recording-set folder to create (atomically; None: do not write).
        nwb: an intracellular NWB file (else the map's CSV files are read).
        map_path: recording map (required for CSV, and for NWB files protolang did not write).
        point: scan point of the protocol (0-based).
        force: replace an existing folder.
        progress: receives one line per stage.

    Returns:
        The :class:`ImportResult`.

    Raises:
        ProtocolError: any problem with the protocol, map or data (file, line or field named).
    """
    from .. import __version__
    from ..api import Result, _refuse_existing, _versions, _write_atomically, load
    from ..measure.collect import collect

    say = progress or (lambda msg: None)
    _refuse_existing(out, force)
    t0 = time.perf_counter()
    exp = load(protocol)
    points = exp.points()
    if not 0 <= point < len(points):
        raise error(f"--point {point + 1} is out of range: the protocol has {len(points)} scan point(s)", None,
                    expected=f"1 to {len(points)}")
    plan = exp.plan(point)
    _check_measures(plan)
    if plan.mode != "isolated" or plan.activations or plan.patches:
        raise error("only paired and single-cell protocols can be imported (no embedded network, extracellular "
                    "activation or multi-cell patch)", None, expected="a protocol of recorded cells and their stimuli")
    roles = _protocol_roles(plan)
    rmap = read_map(map_path, roles) if map_path else None
    if nwb is None and rmap is not None and rmap.file is not None:
        nwb = str(rmap.file)     # the map names its NWB file
    if nwb is not None:
        say(f"reading {nwb}")
        rset = read_nwb_set(str(nwb), plan, rmap)
    else:
        if rmap is None:
            raise error("CSV traces need a recording map", None, expected="--map MAP.yaml",
                        hint="or pass an NWB file with --nwb")
        say(f"reading {len(rmap.repeats)} CSV file(s) named in {map_path}")
        rset = read_csv_set(rmap, plan)
    threshold = rmap.spike_threshold if rmap is not None else DEFAULT_SPIKE_THRESHOLD
    _check_length(plan, rset, rmap)
    rplan = recorded_plan(plan, rset, rmap)
    recordings = build_recordings(rplan, rset, threshold)
    say(f"collecting tables: {rplan.n_repeat} repeat(s) x {rplan.n_sweeps} sweep(s)")
    tables = collect(rplan, recordings)
    sources = [{"file": str(Path(s).resolve()), "sha256": _sha256(s)} for s in rset.sources]
    prov = {
        "kind": "recordings",
        # True when the source says it is simulated (protolang's own export read back): not data from cells
        "simulated": rset.simulated,
        "protocol_file": exp.path,
        "protocol_path": str(Path(exp.path).resolve()) if exp.path else None,
        "protocol_sha256": hashlib.sha256(exp.text.encode()).hexdigest(),
        "circuit_file": plan.circuit_file,
        "circuit_sha256": plan.circuit_hash,
        "plan_sha256": hashlib.sha256(rplan.to_json().encode()).hexdigest(),
        "scan_point": point + 1,
        "sources": sources,
        "map_file": str(Path(map_path).resolve()) if map_path else None,
        "map_sha256": _sha256(map_path) if map_path else None,
        "spike_threshold_mV": threshold * 1e3,
        "conditions_recorded": rset.conditions,
        "notes": rset.notes,
        "versions": _versions(),
        "protolang": __version__,
        "timings": {"import_s": time.perf_counter() - t0},
        "started": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
    }
    result = ImportResult(plan=rplan, recordings=recordings, tables=tables, provenance=prov)
    if out is not None:
        say("writing recording set")
        wrapped = Result(plan=rplan, recordings=recordings, tables=tables, provenance=prov, points=[])
        result.out_dir, _paths = _write_atomically(Path(out), wrapped, force)
    return result


def cmd_import(args) -> int:
    import sys

    say = (lambda msg: None) if args.quiet else (lambda msg: print(msg, file=sys.stderr, flush=True))
    result = import_recordings(args.protocol, args.out, nwb=args.nwb, map_path=args.map, point=args.point - 1,
                               force=args.force, progress=say)
    plan = result.plan
    print(f"imported {plan.n_repeat} repeat(s) x {plan.n_sweeps} sweep(s) at {1 / plan.sample_dt:g} Hz; "
          f"tables: {', '.join(sorted(result.tables))}; recording set in {result.out_dir}")
    return 0


def add_import_parser(subparsers):
    """Add ``protolang import PROTOCOL (--nwb FILE | --map MAP) --out DIR``."""
    p = subparsers.add_parser("import", help="analyse real recordings (NWB, or CSV with a recording map) with the "
                                             "collectors of a protocol; writes a recording set")
    p.add_argument("protocol", help="the protocol the recordings followed")
    p.add_argument("--nwb", default=None, metavar="FILE", help="intracellular NWB file")
    p.add_argument("--map", default=None, metavar="MAP", help="recording map (YAML): needed for CSV traces and for "
                                                             "NWB files protolang did not write")
    p.add_argument("--out", required=True, help="recording-set folder to create")
    p.add_argument("--point", type=int, default=1, help="scan point of the protocol (1-based)")
    p.add_argument("--force", action="store_true", help="replace an existing folder")
    p.add_argument("--quiet", action="store_true", help="no progress lines")
    p.set_defaults(func=cmd_import)
    return p
