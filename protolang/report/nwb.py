"""NWB export and reading: a plan and its recordings in, an intracellular NWB file out; any such file in, SI arrays out.

Layout of an exported file (NWB, the open standard for neurophysiology data; written with pynwb)::

    session        title of the protocol, start time of the run; ``notes`` say the data are
                   simulated (an in-silico model, not an animal recording) and name the protocol,
                   circuit, seed and hashes; ``protocol`` holds the protocol text;
                   ``data_collection`` names protolang's version and the engine target
    subject        says "NO ANIMAL" (an in-silico model): sex 'U', age 'P0D/', no species, so that
                   NWB checkers find the subject they require without an invented animal
    device         "protolang virtual amplifier" (a simulation, no hardware)
    electrodes     one IntracellularElectrode per recorded cell, named ``ROLE[REPEAT]`` (``post[2]``
                   is the cell ``post`` of repeat 2, counted from 0); ``cell_id`` = that name,
                   ``location`` = the cell class, the description names role, class and circuit id
    acquisition    ``ROLE[REPEAT]_sweepS_response``: CurrentClampSeries (V, bias_current = the
                   holding current) or VoltageClampSeries (A, the clamp current, inward negative)
    stimulus       ``ROLE[REPEAT]_sweepS_stimulus``: CurrentClampStimulusSeries (A, the injected
                   waveform without the bias current) or VoltageClampStimulusSeries (V, holding
                   potential plus command steps); deterministic part only (no noise or Poisson input)
    time line      repeats and sweeps one after another: sweep S of repeat R starts at
                   ``(R * n_sweeps + S) * interval`` s of session time; ``sweep_number`` is that
                   running index ``R * n_sweeps + S``
    icephys tables intracellular_recordings (one row per cell and sweep; electrodes category
                   columns role, repeat, cell_id (circuit id), cell_class, x_um, y_um, z_um),
                   simultaneous_recordings (one row per repeat and sweep, columns repeat, sweep),
                   sequential_recordings (one row per repeat and sweep type, ``stimulus_type``
                   describes the stimuli), repetitions (one row per repeat), experimental_conditions
                   (one row: calcium_mM, magnesium_mM, temperature_degC, blocks)
    units          one unit per cell and repeat of every role with spikes recorded: the model's
                   spike times (threshold crossings of the simulated cell) in session time, with
                   columns role, repeat, cell_id and the sweeps as observation intervals
    processing     module ``protolang``: table ``protolang_pairs`` (synapse, pathway, pre, post,
                   repeat, pre_cell_id, post_cell_id, connected, n_release_sites, distance_um),
                   simulated model facts that real recordings do not carry

:func:`read_nwb` reads such a file back, and any other intracellular NWB file (without the
protolang columns), into :class:`NWBContent`. pynwb and h5py are imported inside the functions:
importing this module loads neither them nor Brian2.
"""

from __future__ import annotations

import argparse
import datetime as _dt
import hashlib
import json
import math
import os
import re
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from ..language.errors import ProtocolError, error
from .write import atomic_write

if TYPE_CHECKING:
    import pandas as pd

    from ..engine.recordings import Recordings
    from ..plan.model import Plan, RolePlan

DEVICE_NAME = "protolang virtual amplifier"
MODULE_NAME = "protolang"
PAIRS_TABLE = "protolang_pairs"
NWB_FILE = "recordings.nwb"
# per-cell columns of the intracellular_recordings table's electrodes category
CELL_COLUMNS = ("role", "repeat", "cell_id", "cell_class", "x_um", "y_um", "z_um")
CONDITION_COLUMNS = ("calcium_mM", "magnesium_mM", "temperature_degC", "blocks")
KELVIN_AT_0C = 273.15
# base units a series may state, -> the SI symbol used by protolang
_BASE_UNITS = {"volts": "V", "volt": "V", "v": "V", "amperes": "A", "ampere": "A", "amps": "A", "amp": "A", "a": "A"}
# relative tolerance for "the same sample rate" and for regular timestamps
_RATE_TOL = 1e-6


def electrode_name(role: str, repeat: int) -> str:
    """The electrode (and unit) name of one recorded cell: ``ROLE[REPEAT]``, repeat counted from 0."""
    return f"{role}[{repeat}]"


# --- export ----------------------------------------------------------------------------------
def _version() -> str:
    from ..api import __version__

    return __version__


def _session_start(provenance: dict | None) -> _dt.datetime:
    """The run's start time from ``provenance["started"]`` (local zone if it has none), else now."""
    text = (provenance or {}).get("started")
    if isinstance(text, str) and text:
        for parse in (_dt.datetime.fromisoformat, lambda t: _dt.datetime.strptime(t, "%Y-%m-%dT%H:%M:%S%z")):
            try:
                when = parse(text)
            except ValueError:
                continue
            return when if when.tzinfo is not None else when.astimezone()
    return _dt.datetime.now().astimezone()


def _fmt_amp(value: float, mode: str) -> str:
    """A stimulus amplitude as text: nA in current clamp, mV in voltage clamp."""
    return f"{value * 1e3:.4g} mV" if mode == "voltage clamp" else f"{value * 1e9:.4g} nA"


def _stimulus_label(role: "RolePlan", sweep: int, scale: float) -> str:
    """Short text of a role's deterministic stimulus in one sweep (empty when it has none)."""
    parts = []
    if role.spike_times is not None and len(role.spike_times):
        parts.append(f"{len(role.spike_times)} timed spikes")
    if role.pulses:
        amps = sorted({p.amplitude * scale for p in role.pulses})
        widths = sorted({p.duration for p in role.pulses})
        parts.append(f"{len(role.pulses)} pulse{'s' * (len(role.pulses) > 1)} of "
                     + "/".join(_fmt_amp(a, role.mode) for a in amps)
                     + " for " + "/".join(f"{w * 1e3:g}" for w in widths) + " ms")
    for seg in role.segments:
        amp = (seg.amplitude if seg.per_sweep is None else float(seg.per_sweep[sweep])) * scale
        span = f"from {seg.start * 1e3:g} to {seg.stop * 1e3:g} ms"
        if seg.kind == "square":
            parts.append(f"step {_fmt_amp(amp, role.mode)} {span}")
        elif seg.kind == "ramp":
            parts.append(f"ramp {_fmt_amp(amp, role.mode)} to {_fmt_amp(seg.amplitude_end * scale, role.mode)} {span}")
        elif seg.kind == "sine":
            parts.append(f"sine {_fmt_amp(amp, role.mode)} at {seg.frequency:g} Hz {span}")
        else:
            parts.append(f"chirp {_fmt_amp(amp, role.mode)} {seg.frequency:g}-{seg.frequency_end:g} Hz {span}")
    return ", ".join(parts)


def _scale(role: "RolePlan", repeat: int, sweep: int) -> float:
    return 1.0 if role.amplitude_scale is None else float(role.amplitude_scale[repeat, sweep])


def _sweep_types(plan: "Plan", sample_dt: float, n_samples: int):
    """Sweep types: which (repeat, sweep) share every role's stimulus.

    Returns:
        (types, waves): ``types`` maps (repeat, sweep) -> stimulus_type text; ``waves`` maps
        role name -> (library waveforms (n_samples, K), column index per sweep).
    """
    from ..plan.waveforms import library

    waves = {role.name: library(role, plan.n_sweeps, sample_dt, n_samples) for role in plan.roles}
    types: dict[tuple[int, int], str] = {}
    for r in range(plan.n_repeat):
        for s in range(plan.n_sweeps):
            labels = []
            for role in plan.roles:
                text = _stimulus_label(role, s, _scale(role, r, s))
                if text:
                    labels.append(f"{role.name}: {text}")
            types[(r, s)] = "; ".join(labels) if labels else "no stimulus"
    return types, waves


def _blocks_text(blocks: dict) -> str:
    """Receptor blocks as text, ``"GABA_A 100 %, NMDA 50 %"`` or ``"none"``."""
    if not blocks:
        return "none"
    return ", ".join(f"{name} {100.0 * float(frac):g} %" for name, frac in blocks.items())


def _parse_blocks(text: str):
    """Inverse of :func:`_blocks_text`: receptor -> blocked fraction; the text itself if it does not parse."""
    if text.strip().lower() == "none" or not text.strip():
        return {}
    out = {}
    for part in text.split(","):
        m = re.fullmatch(r"\s*([A-Za-z0-9_]+)\s+([0-9.eE+-]+)\s*%\s*", part)
        if not m:
            return text
        out[m.group(1)] = float(m.group(2)) / 100.0
    return out


def _float_or_nan(value) -> float:
    try:
        return float(value)
    except (TypeError, ValueError):
        return math.nan


def write_nwb(path: str | os.PathLike, plan: "Plan", recordings: "Recordings", *,
              provenance: dict | None = None, protocol_text: str | None = None) -> Path:
    """Write one run's plan and recordings as an intracellular NWB file (layout in the module docstring).

    Traces are written as float64 exactly as given (float32 traces from a run folder are widened,
    not rounded). The file is written under a temporary name in its folder and moved into place.

    Args:
        path: the ``.nwb`` file to write; its folder must exist.
        plan: the resolved plan of the run.
        recordings: the run's recordings (the traces of the recorded roles and every role's spikes).
        provenance: the run's provenance (``started``, hashes, engine facts), if known.
        protocol_text: the protocol file's text, stored in the session's ``protocol`` field.

    Returns:
        ``path`` as a Path.

    Raises:
        ProtocolError: nothing was recorded, the traces do not fit the plan, or the folder is missing.
    """
    path = Path(path)
    if not path.parent.is_dir():
        raise error(f"cannot write {str(path)!r}: folder {str(path.parent)!r} does not exist", None,
                    expected="an .nwb file in an existing folder", hint="create the folder first")
    if not recordings.traces:
        raise error(f"nothing to write to {str(path)!r}: no cell of {plan.title!r} has recorded traces", None,
                    expected="at least one 'record CELL: current clamp' or 'voltage clamp' line",
                    hint="NWB export holds intracellular traces; record a cell and run again")
    for role, tr in recordings.traces.items():
        shape = np.shape(tr)
        if len(shape) != 3 or shape[:2] != (plan.n_repeat, plan.n_sweeps):
            raise error(f"traces of {role!r} have shape {shape}, the plan has {plan.n_repeat} repeats x "
                        f"{plan.n_sweeps} sweeps", None, expected="(n_repeat, n_sweeps, n_samples) traces of this plan",
                        hint="export the recordings with the plan they were made with")
        try:
            plan.role(role)
        except KeyError:
            raise error(f"traces of {role!r} belong to no cell of the plan", None,
                        expected="one of " + ", ".join(r.name for r in plan.roles),
                        hint="export the recordings with the plan they were made with") from None
    nwbfile = build_nwbfile(plan, recordings, provenance=provenance, protocol_text=protocol_text)

    def write(tmp: str) -> None:
        from pynwb import NWBHDF5IO

        with warnings.catch_warnings():
            # the temporary name ends in .tmp until the finished file is moved to its .nwb name
            warnings.filterwarnings("ignore", message=r".*does not end in '\.nwb'")
            with NWBHDF5IO(tmp, "w") as io:
                io.write(nwbfile)
    return atomic_write(path, write)


def build_nwbfile(plan: "Plan", recordings: "Recordings", *, provenance: dict | None = None,
                  protocol_text: str | None = None):
    """Build the in-memory ``pynwb.NWBFile`` that :func:`write_nwb` writes (same arguments)."""
    from hdmf.common import DynamicTable, VectorData
    from pynwb import H5DataIO, NWBFile
    from pynwb.file import Subject
    from pynwb.icephys import (CurrentClampSeries, CurrentClampStimulusSeries, VoltageClampSeries,
                               VoltageClampStimulusSeries)
    from pynwb.misc import Units

    prov = provenance or {}
    version = _version()
    meta = recordings.meta or {}
    plan_sha = hashlib.sha256(plan.to_json().encode()).hexdigest()
    started = _session_start(provenance)
    # the same data exported twice get the same identifier; a run folder's float32 traces another one
    digest = hashlib.sha256(f"{plan_sha}|{plan.seed}|{prov.get('started', '')}".encode())
    for role in sorted(recordings.traces):
        digest.update(role.encode())
        digest.update(np.ascontiguousarray(recordings.traces[role], dtype=np.float64))
    ident = digest.hexdigest()
    target = meta.get("target") or prov.get("engine", {}).get("target") or "unknown"
    engine = f"Brian2 {meta['brian2']}" if meta.get("brian2") else "Brian2"
    protocol_name = prov.get("protocol_file") or plan.protocol_file
    notes = (f"SIMULATED DATA: every trace and spike time in this file was computed by protolang {version}, "
             f"an in-silico model of a slice experiment, not recorded from an animal or a tissue. "
             f"Protocol {protocol_name!r} (sha256 {prov.get('protocol_sha256') or plan.protocol_hash}), "
             f"circuit {plan.circuit_file!r} (sha256 {plan.circuit_hash}), seed {plan.seed}, "
             f"plan sha256 {plan_sha}. Cells are the model's cells, named ROLE[REPEAT] after the protocol's "
             f"cells; repeats and their sweeps lie on the session time line one after another, "
             f"sweep S of repeat R starting at (R * {plan.n_sweeps} + S) * {plan.interval:g} s.")
    data_collection = (f"Simulated with protolang {version} on {engine}, code-generation target {target}, "
                       f"layout {plan.layout}, mode {plan.mode}, time step {plan.dt * 1e3:g} ms, "
                       f"sampling {1.0 / recordings.sample_dt / 1e3:g} kHz.")
    generated_by = [["protolang", version]]
    if meta.get("brian2"):
        generated_by.append(["brian2", str(meta["brian2"])])
    nwbfile = NWBFile(
        session_description=plan.title,
        identifier=f"protolang-{ident[:40]}",
        session_start_time=started,
        experiment_description=(f"In-silico experiment (simulation, not an animal recording): {plan.title}. "
                                f"{plan.n_repeat} repeat(s) of the selected cells, {plan.n_sweeps} sweep(s) "
                                f"of {plan.sweep_length * 1e3:g} ms every {plan.interval:g} s."),
        notes=notes,
        protocol=protocol_text,
        data_collection=data_collection,
        keywords=["simulation", "in silico", "intracellular electrophysiology", "protolang"],
        was_generated_by=generated_by,
        subject=Subject(
            subject_id=f"protolang-model-seed-{plan.seed}",
            description=(f"NO ANIMAL: the cells are simulated by protolang from the circuit file "
                         f"{Path(plan.circuit_file).name!r} with seed {plan.seed} (an in-silico model). "
                         f"Sex 'U' (unknown) and age 'P0D/' (an open range: zero days or more) stand for 'not "
                         f"applicable'; no species is given because no animal was recorded."),
            sex="U", age="P0D/"),
    )
    device = nwbfile.create_device(
        name=DEVICE_NAME,
        description="A simulation: protolang's ideal virtual amplifier (no hardware, no filtering; "
                    "voltage clamp through the stated series resistance). Not a physical device.")

    n_samples = int(np.shape(next(iter(recordings.traces.values())))[2])
    rate = 1.0 / float(recordings.sample_dt)
    types, waves = _sweep_types(plan, float(recordings.sample_dt), n_samples)
    cond = plan.conditions
    cols: dict[str, list] = {c: [] for c in CELL_COLUMNS}
    electrodes = {}
    groups: dict[tuple[int, int], list[int]] = {}
    recorded = [plan.role(name) for name in recordings.traces]
    for role in recorded:
        for r in range(plan.n_repeat):
            name = electrode_name(role.name, r)
            rs = (f"; series resistance {role.series_resistance / 1e6:g} MOhm, uncompensated"
                  if role.mode == "voltage clamp" and role.series_resistance is not None else "")
            electrodes[(role.name, r)] = nwbfile.create_icephys_electrode(
                name=name, device=device, cell_id=name, location=role.cell_class,
                description=(f"virtual whole-cell electrode on a simulated cell: role {role.name!r}, repeat {r}, "
                             f"cell class {role.cell_class!r}, circuit cell id {int(role.cell_ids[r])}, "
                             f"{role.mode}{rs}"),
                initial_access_resistance=(f"{role.series_resistance:g} Ohm (model series resistance)"
                                           if role.mode == "voltage clamp" and role.series_resistance is not None
                                           else None))
    for r in range(plan.n_repeat):
        for s in range(plan.n_sweeps):
            k = r * plan.n_sweeps + s
            start = k * plan.interval
            rows = []
            for role in recorded:
                trace = np.asarray(recordings.traces[role.name][r, s], dtype=np.float64)
                lib, index = waves[role.name]
                wave = lib[:, index[s]] * _scale(role, r, s)
                electrode = electrodes[(role.name, r)]
                label = f"{electrode.name}_sweep{s}"
                stim_text = types[(r, s)]
                common = dict(electrode=electrode, rate=rate, starting_time=start, sweep_number=np.uint32(k), gain=1.0,
                              stimulus_description=stim_text)
                noise = f"; Gaussian recording noise of SD {role.noise_sd:g} added" if role.noise_sd else ""
                if role.mode == "voltage clamp":
                    hold = float(role.holding_potential if role.holding_potential is not None else 0.0)
                    response = VoltageClampSeries(
                        name=f"{label}_response", data=H5DataIO(trace, compression="gzip", shuffle=True),
                        unit="amperes", conversion=1.0,
                        description=(f"simulated clamp current of {electrode.name} (A, inward negative), "
                                     f"repeat {r} sweep {s}, holding {hold * 1e3:g} mV{noise}"),
                        **common)
                    stimulus = VoltageClampStimulusSeries(
                        name=f"{label}_stimulus", data=H5DataIO(hold + wave, compression="gzip", shuffle=True),
                        unit="volts", description=(f"command potential of {electrode.name} (V): holding "
                                                   f"{hold * 1e3:g} mV plus the protocol's command steps"),
                        **common)
                else:
                    bias = float(role.holding_current[r]) if role.holding_current is not None else 0.0
                    response = CurrentClampSeries(
                        name=f"{label}_response", data=H5DataIO(trace, compression="gzip", shuffle=True),
                        unit="volts", conversion=1.0, bias_current=bias,
                        description=(f"simulated membrane potential of {electrode.name} (V), repeat {r} sweep {s}, "
                                     f"bias current {bias * 1e12:.6g} pA{noise}"),
                        **common)
                    stimulus = CurrentClampStimulusSeries(
                        name=f"{label}_stimulus", data=H5DataIO(wave, compression="gzip", shuffle=True),
                        unit="amperes", description=(f"injected current of {electrode.name} (A) besides the "
                                                     f"bias current; deterministic stimuli only (no noise or "
                                                     f"Poisson input)"),
                        **common)
                rows.append(nwbfile.add_intracellular_recording(electrode=electrode, stimulus=stimulus,
                                                                response=response))
                pos_um = np.asarray(role.positions[r], dtype=float) * 1e6
                for col, value in zip(CELL_COLUMNS, (role.name, r, int(role.cell_ids[r]), role.cell_class,
                                                     float(pos_um[0]), float(pos_um[1]), float(pos_um[2]))):
                    cols[col].append(value)
            groups[(r, s)] = rows
    ir = nwbfile.get_intracellular_recordings()
    descriptions = {"role": "the protocol's name of the cell (protolang)",
                    "repeat": "repeat of the protocol's cell selection, from 0 (protolang)",
                    "cell_id": "the cell's id in the simulated circuit (protolang)",
                    "cell_class": "cell class of the simulated circuit (protolang)",
                    "x_um": "soma position x in the simulated circuit (um)",
                    "y_um": "soma position y in the simulated circuit (um)",
                    "z_um": "soma position z in the simulated circuit (um)"}
    for col in CELL_COLUMNS:
        ir.add_column(name=col, description=descriptions[col], data=cols[col], category="electrodes")

    sim = nwbfile.get_icephys_simultaneous_recordings()
    sim.add_column(name="repeat", description="repeat of the protocol's cell selection, from 0 (protolang)")
    sim.add_column(name="sweep", description="sweep within the repeat, from 0 (protolang)")
    sim_rows = {key: nwbfile.add_icephys_simultaneous_recording(recordings=rows, repeat=key[0], sweep=key[1])
                for key, rows in groups.items()}
    rep_rows = []
    for r in range(plan.n_repeat):
        seq_rows, order = [], {}
        for s in range(plan.n_sweeps):
            order.setdefault(types[(r, s)], []).append(sim_rows[(r, s)])
        for text, members in order.items():
            seq_rows.append(nwbfile.add_icephys_sequential_recording(simultaneous_recordings=members,
                                                                     stimulus_type=text))
        rep_rows.append(nwbfile.add_icephys_repetition(sequential_recordings=seq_rows))
    conds = nwbfile.get_icephys_experimental_conditions()
    cdesc = {"calcium_mM": "extracellular calcium of the simulated bath (mM)",
             "magnesium_mM": "extracellular magnesium of the simulated bath (mM)",
             "temperature_degC": "temperature of the simulated bath (degC)",
             "blocks": "receptor blocks of the simulated bath, 'RECEPTOR PERCENT %' or 'none'"}
    for col in CONDITION_COLUMNS:
        conds.add_column(name=col, description=cdesc[col])
    nwbfile.add_icephys_experimental_condition(
        repetitions=rep_rows, calcium_mM=_float_or_nan(cond.get("calcium")),
        magnesium_mM=_float_or_nan(cond.get("magnesium")),
        temperature_degC=_float_or_nan(cond.get("temperature")) - KELVIN_AT_0C,
        blocks=_blocks_text(cond.get("blocks") or {}))

    if recordings.spikes:
        units = Units(name="units", resolution=float(plan.dt),
                      description=("the model's spike times, s of session time: threshold crossings of the "
                                   "simulated cell's membrane potential (or the given times of a spike-source "
                                   "cell); one unit per protolang cell ROLE[REPEAT]; observation intervals are "
                                   "the sweeps"))
        units.add_column(name="role", description="the protocol's name of the cell (protolang)")
        units.add_column(name="repeat", description="repeat of the protocol's cell selection, from 0 (protolang)")
        units.add_column(name="cell_id", description="the cell's id in the simulated circuit (protolang)")
        for role_name, per_repeat in recordings.spikes.items():
            try:
                cell_ids = plan.role(role_name).cell_ids
            except KeyError:
                raise error(f"spikes of {role_name!r} belong to no cell of the plan", None,
                            expected="one of " + ", ".join(r.name for r in plan.roles),
                            hint="export the recordings with the plan they were made with") from None
            for r, sweeps in enumerate(per_repeat):
                times, intervals = [], []
                for s, spk in enumerate(sweeps):
                    start = (r * plan.n_sweeps + s) * plan.interval
                    times.append(np.asarray(spk, dtype=np.float64).ravel() + start)
                    intervals.append([start, start + plan.sweep_length])
                units.add_unit(spike_times=np.concatenate(times) if times else np.zeros(0),
                               obs_intervals=intervals, role=role_name, repeat=r, cell_id=int(cell_ids[r]),
                               id=len(units))
        nwbfile.units = units

    if plan.synapses:
        rows = {k: [] for k in ("synapse", "pathway", "pre", "post", "repeat", "pre_cell_id", "post_cell_id",
                                "connected", "n_release_sites", "distance_um")}
        for syn in plan.synapses:
            pre_ids, post_ids = plan.role(syn.pre).cell_ids, plan.role(syn.post).cell_ids
            for r in range(plan.n_repeat):
                rows["synapse"].append(syn.name)
                rows["pathway"].append(syn.pathway)
                rows["pre"].append(syn.pre)
                rows["post"].append(syn.post)
                rows["repeat"].append(r)
                rows["pre_cell_id"].append(int(pre_ids[r]))
                rows["post_cell_id"].append(int(post_ids[r]))
                rows["connected"].append(bool(syn.connected[r]))
                rows["n_release_sites"].append(int(syn.n_sites[r]))
                rows["distance_um"].append(float(syn.distance[r]) * 1e6 if syn.distance is not None else math.nan)
        pdesc = {"synapse": "protolang's name of the connection",
                 "pathway": "the circuit pathway (PRE_CLASS->POST_CLASS)",
                 "pre": "presynaptic protocol cell", "post": "postsynaptic protocol cell",
                 "repeat": "repeat of the protocol's cell selection, from 0",
                 "pre_cell_id": "presynaptic cell's id in the simulated circuit",
                 "post_cell_id": "postsynaptic cell's id in the simulated circuit",
                 "connected": "whether the simulated circuit connects pre to post in this repeat",
                 "n_release_sites": "number of release sites of the simulated connection",
                 "distance_um": "soma-to-soma distance in the simulated circuit (um)"}
        table = DynamicTable(
            name=PAIRS_TABLE,
            description="protolang's simulated cell pairs: model facts (connectivity, release sites, distance) "
                        "that real recordings do not carry",
            columns=[VectorData(name=k, description=pdesc[k], data=v) for k, v in rows.items()])
        module = nwbfile.create_processing_module(
            name=MODULE_NAME, description="simulated model facts from protolang, absent from real recordings")
        module.add(table)
    return nwbfile


# --- run folders -----------------------------------------------------------------------------
def _read_provenance(run_dir: Path) -> dict:
    prov_path = run_dir / "provenance.json"
    try:
        return json.loads(prov_path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise error(f"{str(prov_path)!r} not found: {str(run_dir)!r} is not a run folder", None,
                    expected="a run folder written by 'protolang run' (provenance.json, recordings.npz)",
                    hint="give the folder passed to 'protolang run --out'") from None
    except (OSError, ValueError) as exc:
        raise error(f"{str(prov_path)!r} cannot be read ({type(exc).__name__}: {exc})", None,
                    expected="the JSON file protolang wrote", hint="the run folder may be damaged; run again") from None


def _protocol_path(prov: dict, prov_path: Path) -> Path:
    """The run's protocol file (:func:`protolang.report.write.locate_protocol`), else the recorded path."""
    from .write import locate_protocol

    recorded = prov.get("protocol_file")
    if not recorded:
        raise error(f"{str(prov_path)!r} names no protocol file (field 'protocol_file')", None,
                    expected="a run of a protocol file", hint="run the protocol from its file, then export")
    return locate_protocol(prov, prov_path.parent) or Path(recorded)


def _as_run(plan: "Plan", prov: dict) -> str:
    """The plan's JSON with the protocol and circuit paths it was resolved from replaced by those
    the run recorded, so that a moved project (same files, other paths) hashes as it did."""
    text = plan.to_json()
    for now, then in ((plan.circuit_file, prov.get("circuit_file")), (plan.protocol_file, prov.get("protocol_file"))):
        if now and then and now != then:
            text = text.replace(json.dumps(str(now))[1:-1], json.dumps(str(then))[1:-1])
    return text


def export_run_folder(run_dir: str | os.PathLike, out: str | os.PathLike | None = None) -> Path:
    """Export a run folder's recordings as NWB, after checking that its protocol still makes the same plan.

    Reads ``provenance.json`` and ``recordings.npz``, loads the protocol named in
    ``provenance["protocol_file"]``, checks its sha256, resolves the plan of the folder's point
    (``point`` in a point folder of a scanned run, ``scan_point`` in a batch run, else the first)
    and checks the plan's sha256 against ``plan_sha256`` (a scanned run lists one per point).

    Args:
        run_dir: a run folder written by ``protolang run`` or the batch runner, or a
            ``points/NN`` folder of a scanned run.
        out: the NWB file to write; default ``RUN_DIR/recordings.nwb``.

    Returns:
        The path written.

    Raises:
        ProtocolError: not a run folder, the protocol file is gone or changed, the plan differs,
            or the folder holds imported recordings.
    """
    import protolang

    from .write import read_recordings_npz

    run = Path(run_dir)
    if not run.is_dir():
        raise error(f"run folder {str(run)!r} not found", None, expected="a run folder written by 'protolang run'",
                    hint="check the path")
    prov = _read_provenance(run)
    prov_path = run / "provenance.json"
    if prov.get("kind") == "recordings":
        raise error(f"{str(run)!r} holds imported recordings, not a simulation run", None,
                    expected="a run folder written by 'protolang run'",
                    hint="the recordings came from the files named under 'sources' in provenance.json; "
                         "export those instead")
    npz = run / "recordings.npz"
    if not npz.exists():
        hint = ("a scanned run keeps each point under points/NN/; export one of those folders"
                if (run / "points").is_dir() else "the run folder may be incomplete; run the protocol again")
        raise error(f"{str(npz)!r} not found", None, expected="the recordings.npz of a run folder", hint=hint)
    proto = _protocol_path(prov, prov_path)
    if not proto.exists():
        raise error(f"the protocol file of this run, {str(proto)!r}, is gone (field 'protocol_file' of "
                    f"{str(prov_path)!r})", None, expected="the protocol file the run was made from",
                    hint="restore the protocol file (or run the export from the folder the run was started in)")
    try:
        text = proto.read_text(encoding="utf-8")   # as protolang.load reads it, so the hashes compare
    except (OSError, UnicodeDecodeError) as exc:
        raise error(f"cannot read the protocol file {str(proto)!r} ({type(exc).__name__}: {exc})", None,
                    expected="the protocol file the run was made from (UTF-8 text)",
                    hint="restore the protocol file as it was run") from None
    want = prov.get("protocol_sha256")
    have = hashlib.sha256(text.encode()).hexdigest()
    if want and have != want:
        raise error(f"the protocol file {str(proto)!r} changed since the run (sha256 {have[:12]}..., the run's "
                    f"{str(prov_path)!r} records {want[:12]}...)", None,
                    expected="the protocol exactly as it was run",
                    hint="restore the protocol as run (version control), or run the changed protocol again "
                         "and export that run")
    exp = protolang.load(proto)
    # a batch run records its point as scan_point; a point folder of a scanned run as point
    point = int(prov.get("point") or prov.get("scan_point") or 1) - 1
    try:
        plan = exp.plan(point)
    except IndexError:
        raise error(f"{str(prov_path)!r} names scan point {point + 1}, the protocol has {len(exp.points())}", None,
                    expected="a scan point of the protocol", hint="restore the protocol as run") from None
    plan_sha = hashlib.sha256(plan.to_json().encode()).hexdigest()
    recorded = prov.get("plan_sha256")
    if isinstance(recorded, list):   # a scanned run lists every point's plan hash
        recorded = recorded[point] if 0 <= point < len(recorded) else None
    if recorded and plan_sha != recorded:
        plan_sha = hashlib.sha256(_as_run(plan, prov).encode()).hexdigest()
    if recorded and plan_sha != recorded:
        raise error(f"the protocol {str(proto)!r} no longer resolves to the plan of this run (plan sha256 "
                    f"{plan_sha[:12]}..., {str(prov_path)!r} records {recorded[:12]}...)", None,
                    expected="the same circuit and protolang version as the run",
                    hint="the circuit file or protolang changed since the run; run the protocol again and export "
                         "that run")
    recordings = read_recordings_npz(npz)
    target = Path(out) if out is not None else run / NWB_FILE
    return write_nwb(target, plan, recordings, provenance=prov, protocol_text=text)


def cmd_nwb(args: argparse.Namespace) -> int:
    """``protolang nwb``: export a run folder as an NWB file.

    Returns:
        0 on success.

    Raises:
        ProtocolError: see :func:`export_run_folder`.
    """
    path = export_run_folder(args.run, args.out)
    size = path.stat().st_size
    print(f"NWB file written to {path} ({size / 1e6:.1f} MB)")
    return 0


def add_nwb_parser(subparsers) -> argparse.ArgumentParser:
    """Add the ``nwb`` subcommand (``set_defaults(func=cmd_nwb)``) to an argparse subparsers object.

    Returns:
        The new subparser.
    """
    p = subparsers.add_parser("nwb", help="export a run folder's traces, stimuli and spikes as an NWB file")
    p.add_argument("run", metavar="RUN_DIR", help="run folder written by 'protolang run'")
    p.add_argument("--out", metavar="FILE", help=f"NWB file to write (default: RUN_DIR/{NWB_FILE})")
    p.set_defaults(func=cmd_nwb)
    return p


# --- reading ---------------------------------------------------------------------------------
@dataclass
class SweepSeries:
    """One recorded series (a cell's response in one sweep) with its stimulus, in SI units."""

    electrode: str            # the IntracellularElectrode's name
    index: int                # row of the intracellular_recordings table (or order found)
    group: int | None         # simultaneous-recording row this belongs to (None if the file has no such table)
    starting_time: float      # s, session time
    rate: float               # Hz
    data: np.ndarray          # float64, SI: V for current clamp, A for voltage clamp
    unit: str                 # "V" or "A"
    mode: str                 # "current clamp" or "voltage clamp"
    stimulus: np.ndarray | None   # float64 SI (A for current clamp, V for voltage clamp), None if absent
    sweep_number: int | None
    stimulus_type: str | None  # from the sequential recordings table when present


@dataclass
class NWBContent:
    """What :func:`read_nwb` found in an intracellular NWB file."""

    path: str
    # name -> {"description", "location", "cell_id"} plus, in protolang's exports, role, repeat, cell_class,
    # x_um, y_um, z_um and circuit_cell_id (the circuit's id, column cell_id of the electrodes category)
    electrodes: dict[str, dict]
    series: list[SweepSeries]         # in starting_time order
    spikes: dict[str, np.ndarray]     # ROLE[REPEAT] -> spike times (s, session time)
    pairs: "pd.DataFrame | None"      # the protolang_pairs table when present
    conditions: dict                  # calcium_mM, magnesium_mM, temperature_degC, blocks when present
    session: dict = field(default_factory=dict)   # description, identifier, start_time, notes, protocol


def _fail(path, message: str, expected: str, hint: str | None = None) -> ProtocolError:
    return error(f"{path}: {message}", None, expected=expected, hint=hint)


def _raw_unit(series) -> str | None:
    """The unit the file states for a series (pynwb replaces a clamp series' unit on reading)."""
    data = series.data
    attrs = getattr(data, "attrs", None)
    if attrs is not None and "unit" in attrs:
        unit = attrs["unit"]
        return unit.decode() if isinstance(unit, bytes) else str(unit)
    return series.unit


def _si_unit(path, series, kind: str) -> str:
    """``"V"`` or ``"A"`` for a series, or a ProtocolError naming the series and its unit."""
    unit = _raw_unit(series)
    si = _BASE_UNITS.get(str(unit).strip().lower()) if unit is not None else None
    if si is None:
        raise _fail(path, f"{kind} series {series.name!r} has unit {unit!r} (field 'unit')",
                    "unit 'volts' or 'amperes'",
                    "NWB stores the SI base unit with a 'conversion' factor (millivolt data: unit 'volts', "
                    "conversion 0.001); fix the unit attribute of that series")
    return si


def _series_mode(series, unit: str) -> str:
    from pynwb.icephys import (CurrentClampSeries, CurrentClampStimulusSeries, VoltageClampSeries,
                               VoltageClampStimulusSeries)

    if isinstance(series, (CurrentClampSeries, CurrentClampStimulusSeries)):   # IZeroClampSeries included
        return "current clamp"
    if isinstance(series, (VoltageClampSeries, VoltageClampStimulusSeries)):
        return "voltage clamp"
    # a plain PatchClampSeries: recorded potentials mean current clamp, recorded currents voltage clamp
    return "current clamp" if unit == "V" else "voltage clamp"


def _timing(path, series) -> tuple[float, float]:
    """(starting_time s, rate Hz) of a series with a rate or with regular timestamps."""
    if series.rate is not None:
        rate = float(series.rate)
        start = float(series.starting_time or 0.0)
    else:
        ts = np.asarray(series.timestamps[:] if series.timestamps is not None else [], dtype=float)
        if ts.size < 2:
            raise _fail(path, f"series {series.name!r} has neither a rate nor two timestamps",
                        "a 'rate' (Hz) or regular 'timestamps'")
        step = np.diff(ts)
        mean = float(np.mean(step))
        if mean <= 0 or np.max(np.abs(step - mean)) > 1e-3 * mean:
            raise _fail(path, f"series {series.name!r} has irregular timestamps", "regularly sampled data",
                        "resample the series to a fixed rate")
        rate, start = 1.0 / mean, float(ts[0])
    if not rate > 0 or not math.isfinite(rate):
        raise _fail(path, f"series {series.name!r} has rate {rate!r}", "a positive sample rate (Hz)")
    return start, rate


def _si_data(series, start: int = 0, count: int | None = None) -> np.ndarray:
    data = series.data
    stop = None if count is None or count < 0 else start + count
    raw = np.asarray(data[start:stop], dtype=np.float64)
    conversion = float(getattr(series, "conversion", 1.0) or 1.0)
    offset = float(getattr(series, "offset", 0.0) or 0.0)
    out = raw * conversion if conversion != 1.0 else raw
    return out + offset if offset != 0.0 else out


def _table_column(table, name):
    """A column of a DynamicTable as a list, or None when the table has no such column."""
    if table is None or name not in table.colnames:
        return None
    col = table[name]
    return [v.decode() if isinstance(v, bytes) else v for v in col[:]]


def _ragged_rows(table, name: str) -> list[np.ndarray]:
    """Row indices held by each row of a ragged DynamicTableRegion column (icephys grouping tables)."""
    if table is None or name not in table.colnames or not len(table):
        return []
    col = table[name]
    ends = np.asarray(col.data[:], dtype=np.int64)
    flat = np.asarray(col.target.data[:], dtype=np.int64)
    starts = np.concatenate([[0], ends[:-1]])
    return [flat[a:b] for a, b in zip(starts, ends)]


def _plain_value(value):
    if isinstance(value, np.generic):
        return value.item()
    return value


def read_nwb(path: str | os.PathLike) -> NWBContent:
    """Read an intracellular NWB file (protolang's own export or any lab's) into plain SI arrays.

    Every PatchClampSeries in ``acquisition`` becomes a :class:`SweepSeries`; the
    intracellular_recordings table, where present, pairs each response with its stimulus and
    the simultaneous/sequential tables give its group and stimulus type (without the table, a
    stimulus of the same electrode and sweep number is looked up in ``stimulus``). protolang's
    own columns (cells, pairs, conditions, units) are read when present.

    Args:
        path: the ``.nwb`` file.

    Returns:
        The file's electrodes, series (in starting time order), spikes, pairs, conditions and session.

    Raises:
        ProtocolError: the file is missing or not an NWB file, holds no intracellular series, a
            series' unit is neither volts nor amperes, its timing is unusable, or the series of one
            simultaneous recording have different sample rates.
    """
    p = Path(path)
    shown = str(path)
    if not p.exists():
        raise _fail(shown, "file not found", "a path to an .nwb file", "check the spelling and the folder")
    if p.is_dir():
        raise _fail(shown, "is a folder", "a path to an .nwb file",
                    f"an exported run keeps its file at {str(p / NWB_FILE)!r}")
    import h5py

    try:
        is_hdf5 = h5py.is_hdf5(str(p))
    except OSError as exc:
        raise _fail(shown, f"cannot be read ({exc})", "a readable .nwb file") from None
    if not is_hdf5:
        raise _fail(shown, "is not an HDF5 file", "an NWB 2 file (NWB 2 files are HDF5 files)",
                    "convert the recordings (ABF, text, ...) to NWB 2 first, or check that this is the right file")
    try:
        with h5py.File(str(p), "r") as h5:
            version = h5.attrs.get("nwb_version")
            old = "nwb_version" in h5 and version is None
    except OSError as exc:
        raise _fail(shown, f"cannot be opened as HDF5 ({exc})", "a readable .nwb file") from None
    if old:
        raise _fail(shown, "is an NWB 1 file", "an NWB 2 file (root attribute 'nwb_version' 2.x)",
                    "convert it to NWB 2 first")
    if version is None:
        raise _fail(shown, "is an HDF5 file but not an NWB file (no root attribute 'nwb_version')",
                    "an NWB 2 file", "export the recordings to NWB 2 (pynwb) first")
    from pynwb import NWBHDF5IO

    try:
        io = NWBHDF5IO(str(p), "r", load_namespaces=True)
    except Exception as exc:   # pynwb raises many kinds for a non-NWB HDF5 file
        raise _fail(shown, f"is an HDF5 file but not an NWB file ({type(exc).__name__}: {exc})",
                    "an NWB 2 file with a 'nwb_version' attribute",
                    "convert the data to NWB 2 (pynwb) first") from None
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")   # unit overrides and deprecations of foreign files
            try:
                nwbfile = io.read()
            except Exception as exc:
                raise _fail(shown, f"cannot be read as NWB ({type(exc).__name__}: {exc})",
                            "an NWB 2 file pynwb can read", "validate it with 'python -m pynwb.validate'") from None
            try:
                return _content(shown, nwbfile)
            except ProtocolError:
                raise
            except Exception as exc:   # an unusual layout of another lab's file: say where, not a traceback
                raise _fail(shown, f"its intracellular data cannot be read ({type(exc).__name__}: {exc})",
                            "PatchClampSeries in acquisition, optionally with the icephys tables",
                            "validate it with 'python -m pynwb.validate' or nwbinspector") from None
    finally:
        io.close()


def _content(path: str, nwbfile) -> NWBContent:
    from pynwb.icephys import IZeroClampSeries, PatchClampSeries

    acquired = [ts for ts in nwbfile.acquisition.values() if isinstance(ts, PatchClampSeries)]
    if not acquired:
        found = ", ".join(f"{k} ({type(v).__name__})" for k, v in list(nwbfile.acquisition.items())[:5]) or "nothing"
        raise _fail(path, f"no PatchClampSeries in acquisition (found {found})",
                    "intracellular data: CurrentClampSeries or VoltageClampSeries in acquisition",
                    "protolang reads intracellular (patch-clamp) recordings only")

    # electrodes
    electrodes: dict[str, dict] = {}
    for name, el in (nwbfile.icephys_electrodes or {}).items():
        electrodes[name] = {"description": el.description, "location": el.location, "cell_id": el.cell_id}

    # pair responses and stimuli through the intracellular_recordings table
    entries = []   # (index, response series, start, count, stimulus series | None, stim start, stim count)
    ir = nwbfile.intracellular_recordings
    seen = set()
    if ir is not None and len(ir):
        cats = ir.category_tables
        responses = cats["responses"]["response"][:]
        stimuli = cats["stimuli"]["stimulus"][:] if "stimuli" in cats else [None] * len(ir)
        ecat = cats.get("electrodes")
        extra = {col: _table_column(ecat, col) for col in CELL_COLUMNS}
        el_col = _table_column(ecat, "electrode") or [None] * len(ir)
        for i, (resp, stim, el) in enumerate(zip(responses, stimuli, el_col)):
            ts = resp.timeseries if resp is not None and resp.idx_start >= 0 else None
            if not isinstance(ts, PatchClampSeries) or nwbfile.acquisition.get(ts.name) is not ts:
                continue
            st = None
            if stim is not None and stim.idx_start >= 0 and stim.timeseries is not ts \
                    and isinstance(stim.timeseries, PatchClampSeries):
                st = stim.timeseries
            entries.append((i, ts, int(resp.idx_start), int(resp.count), st,
                            int(stim.idx_start) if st is not None else 0, int(stim.count) if st is not None else -1))
            seen.add(id(ts))
            el = el if el is not None else ts.electrode
            info = electrodes.setdefault(el.name, {"description": el.description, "location": el.location,
                                                   "cell_id": el.cell_id})
            for col, values in extra.items():
                if values is not None:
                    key = "circuit_cell_id" if col == "cell_id" else col
                    info[key] = _plain_value(values[i])
    # series the table does not list
    stim_by_key = {}
    for ts in nwbfile.stimulus.values():
        if isinstance(ts, PatchClampSeries):
            stim_by_key.setdefault((ts.electrode.name, ts.sweep_number), ts)
    next_index = len(ir) if ir is not None else 0
    for ts in acquired:
        if id(ts) in seen:
            continue
        st = None
        if not isinstance(ts, IZeroClampSeries) and ts.sweep_number is not None:
            st = stim_by_key.get((ts.electrode.name, ts.sweep_number))
        entries.append((next_index, ts, 0, -1, st, 0, -1))
        next_index += 1
        electrodes.setdefault(ts.electrode.name, {"description": ts.electrode.description,
                                                  "location": ts.electrode.location,
                                                  "cell_id": ts.electrode.cell_id})

    # groups and stimulus types
    group_of: dict[int, int] = {}
    type_of_group: dict[int, str] = {}
    group_keys: dict[int, tuple] = {}
    sim = nwbfile.icephys_simultaneous_recordings
    if sim is not None:
        for g, rows in enumerate(_ragged_rows(sim, "recordings")):
            for row in rows:
                group_of[int(row)] = g
    seq = nwbfile.icephys_sequential_recordings
    if seq is not None:
        texts = _table_column(seq, "stimulus_type") or [None] * len(seq)
        for members, text in zip(_ragged_rows(seq, "simultaneous_recordings"), texts):
            for g in members:
                type_of_group[int(g)] = None if text is None else str(text)

    series: list[SweepSeries] = []
    for index, ts, r0, count, st, s0, scount in entries:
        unit = _si_unit(path, ts, "response")
        start, rate = _timing(path, ts)
        start += max(r0, 0) / rate
        stimulus = None
        if st is not None:
            _si_unit(path, st, "stimulus")
            stimulus = _si_data(st, max(s0, 0), scount)
        group = group_of.get(index) if sim is not None else None
        series.append(SweepSeries(
            electrode=ts.electrode.name, index=index, group=group, starting_time=start, rate=rate,
            data=_si_data(ts, max(r0, 0), count), unit=unit, mode=_series_mode(ts, unit), stimulus=stimulus,
            sweep_number=int(ts.sweep_number) if ts.sweep_number is not None else None,
            stimulus_type=type_of_group.get(group) if group is not None else None))
        if group is not None:
            group_keys.setdefault(group, (rate, ts.name))
            first_rate, first_name = group_keys[group]
            if abs(rate - first_rate) > _RATE_TOL * first_rate:
                raise _fail(path, f"simultaneous recording {group} mixes sample rates: {first_name!r} at "
                                  f"{first_rate:g} Hz, {ts.name!r} at {rate:g} Hz (field 'rate')",
                            "one sample rate for every series recorded together",
                            "resample the series of that sweep to one rate")
    series.sort(key=lambda s: (s.starting_time, s.index))

    # spikes: protolang's units (role and repeat columns)
    spikes: dict[str, np.ndarray] = {}
    units = nwbfile.units
    if units is not None and len(units) and {"role", "repeat"} <= set(units.colnames):
        roles, repeats = units["role"][:], units["repeat"][:]
        for i in range(len(units)):
            role = roles[i].decode() if isinstance(roles[i], bytes) else str(roles[i])
            spikes[electrode_name(role, int(repeats[i]))] = np.asarray(units["spike_times"][i], dtype=np.float64)

    pairs = None
    module = nwbfile.processing.get(MODULE_NAME)
    if module is not None and PAIRS_TABLE in module.data_interfaces:
        pairs = module[PAIRS_TABLE].to_dataframe().reset_index(drop=True)
        for col in pairs.columns:
            if pairs[col].dtype == object:
                pairs[col] = pairs[col].map(lambda v: v.decode() if isinstance(v, bytes) else v)

    conditions: dict = {}
    ec = nwbfile.icephys_experimental_conditions
    if ec is not None and len(ec):
        for col in CONDITION_COLUMNS:
            values = _table_column(ec, col)
            if values is not None:
                value = _plain_value(values[0])
                conditions[col] = _parse_blocks(value) if col == "blocks" and isinstance(value, str) else value

    start_time = nwbfile.session_start_time
    session = {"description": nwbfile.session_description, "identifier": nwbfile.identifier,
               "start_time": start_time.isoformat() if start_time is not None else None,
               "notes": nwbfile.notes, "protocol": nwbfile.protocol,
               "data_collection": nwbfile.data_collection}
    return NWBContent(path=path, electrodes=electrodes, series=series, spikes=spikes, pairs=pairs,
                      conditions=conditions, session=session)
