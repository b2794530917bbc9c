"""Bench sheet: a protocol file (and optionally its run folder) in; a printable sheet for the rig out.

``write_sheet`` writes, into a new folder::

    sheet.html                    self-contained page (styles inline, figures embedded)
    sheet.pdf                     the same content on A4 portrait pages
    stimuli/<role>_sweeptype<k>.csv   the stimulus files (protolang.report.stimulus)
    figures/<role>_sweeptype<k>.png   the waveform figures embedded in the page

The sheet states the purpose, the solutions, the cells to target and how to find them, the
recording configuration, every stimulus (plotted, timed, with its injected charge), the
analysis definitions in words and, given a run folder of the same protocol text, the model's
predictions beside empty columns to write the measured values in. It opens with the cautions:
the protocol comes from a model, its predictions are not measurements, and the lab's own
approvals, safety rules and animal-care protocols take precedence.

The folder is built under a temporary name next to its destination and renamed into place,
so it is complete or absent. matplotlib draws on Agg-backed figures (no pyplot); the PDF is
written through matplotlib's PdfPages.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import math
import os
import shutil
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from ..language import ast
from ..language.errors import error
from . import html as H
from .stimulus import (DEFAULT_RATE, StimulusWaveform, exported_roles, holding_text, mode_text, parse_rate,
                       plan_point, refuse_existing, replace_folder, stimulus_waveforms, sweep_ranges,
                       temporary_folder, write_stimulus_files, scan_text)
from .write import _new_figure, _save_figure, atomic_write

if TYPE_CHECKING:
    import pandas as pd

    from ..plan.model import Plan

SHEET_HTML = "sheet.html"
SHEET_PDF = "sheet.pdf"
STIMULI_DIR = "stimuli"
FIGURES_DIR = "figures"
OWNED = {SHEET_HTML, SHEET_PDF, STIMULI_DIR, FIGURES_DIR}
MEASURED_COLUMN = "measured (mean +- SD, n)"
NOTES_COLUMN = "notes"
MAX_LISTED_EVENTS = 24           # a longer list of event times shows its start and its end
MAX_LISTED_SYNAPSES = 6          # more connections between selected cells are summarised per pathway

CAUTIONS = [
    "This sheet was generated from an in-silico protocol run on a computational model. Cell classes, "
    "positions, connections and every number here describe that model, not tissue.",
    "Model predictions are model outputs, not measurements; compare them with your recordings, do not "
    "report them as data.",
    "This sheet is not a substitute for the lab's own approvals, safety rules and animal-care protocols, "
    "which take precedence over anything written here.",
    "Check every stimulus amplitude and duration against the rig's amplifier limits and the cell's health "
    "before applying it; stop when the cell deteriorates.",
    "Prepare all solutions under the lab's own standard operating procedures; the concentrations here are "
    "the protocol's targets, not a recipe.",
]


# --- content: a list of sections of blocks, rendered to HTML and to PDF ----------------------
@dataclass
class Para:
    text: str
    note: bool = False


@dataclass
class Sub:
    """A small heading inside a section."""
    text: str


@dataclass
class Bullets:
    items: list[str]


@dataclass
class Defs:
    pairs: list[tuple[str, str]]


@dataclass
class Table:
    df: "pd.DataFrame"
    caption: str | None = None
    blanks: tuple[str, ...] = ()


@dataclass
class Wave:
    wave: StimulusWaveform
    caption: str


@dataclass
class Pre:
    text: str


@dataclass
class Section:
    title: str
    anchor: str
    blocks: list = field(default_factory=list)


# --- small helpers -------------------------------------------------------------------------
def _ms(seconds: float) -> str:
    return f"{seconds * 1e3:g}"


def _sweeps_word(sweeps: list[int]) -> str:
    return f"sweep{'s' if len(sweeps) > 1 else ''} {sweep_ranges(sweeps)}"


def _duration(seconds: float) -> str:
    return f"{seconds:g} s" if seconds < 120 else f"{seconds / 60:.3g} min"


def _q(q) -> str:
    return str(q) if q is not None else ""


def _leading_comments(text: str) -> list[str]:
    """The comment lines at the top of a protocol file, without their ``#``."""
    out = []
    for line in text.splitlines():
        s = line.strip()
        if not s:
            if out:
                break
            continue
        if not s.startswith("#"):
            break
        out.append(s.lstrip("#").strip())
    return [line for line in out if line]


def _sha256(text: str) -> str:
    return hashlib.sha256(text.encode()).hexdigest()


def _frame(rows: list[dict], columns: list[str]) -> "pd.DataFrame":
    import pandas as pd

    return pd.DataFrame(rows, columns=columns)


# --- sections ----------------------------------------------------------------------------
def _purpose(exp, plan: "Plan", point: int, sha: str) -> Section:
    sec = Section("Purpose", "purpose")
    sec.blocks.append(Para(f"Protocol: {plan.title}"))
    comments = _leading_comments(exp.text)
    if comments:
        sec.blocks.append(Para("From the protocol file's comments: " + " ".join(comments)))
    values = exp.points()[point][0]
    pairs = [("protocol file", Path(exp.path).name if exp.path else "<text>"),
             ("protocol sha256", sha),
             ("model circuit", f"{Path(plan.circuit_file).name} (sha256 {plan.circuit_hash[:16]}...), seed {plan.seed}")]
    if values:
        pairs.append(("scan point", f"{point + 1} of {len(exp.points())}: "
                      + ", ".join(f"@{n} = {q}" for n, q in values.items())))
    note = getattr(exp.circuit, "note", "") or ""
    if "invent" in note.lower():
        pairs.append(("about the circuit", "the circuit file describes itself as invented: "
                      + " ".join(note.split())))
    sec.blocks.append(Defs(pairs))
    if plan.notes:
        sec.blocks.append(Para("Notes from planning the simulation (about the model, not instructions for the rig):",
                               note=True))
        sec.blocks.append(Bullets(list(plan.notes)))
    return sec


def _solutions(protocol: ast.Protocol, plan: "Plan") -> Section:
    sec = Section("Solutions (bath)", "solutions")
    stated = {item.name for item in protocol.bath if isinstance(item, ast.BathSetting)}
    cond = plan.conditions

    def where(name: str) -> str:
        return "as the protocol states" if name in stated else "the model circuit's default; the protocol does not say"
    pairs = [("calcium", f"{cond['calcium']:g} mM ({where('calcium')})"),
             ("magnesium", f"{cond['magnesium']:g} mM ({where('magnesium')})"),
             ("temperature", f"{cond['temperature'] - 273.15:g} degC ({where('temperature')})")]
    blocks = cond.get("blocks") or {}
    if blocks:
        for receptor, frac in blocks.items():
            amount = "complete block" if frac >= 1.0 else f"{frac * 100:g} % of the conductance removed"
            pairs.append((f"block {receptor}", f"{amount}; choose the antagonist and its concentration by the "
                                               f"lab's own practice"))
    else:
        pairs.append(("receptor blocks", "none"))
    sec.blocks.append(Defs(pairs))
    model_only = [f"lesion: {rec.text}" for rec in plan.lesions]
    if plan.network is not None:
        model_only.append(f"embedded network: region {plan.network.region}, with its background drive")
    if model_only:
        sec.blocks.append(Para("Manipulations of the model with no direct bench counterpart implied:", note=True))
        sec.blocks.append(Bullets(model_only))
    sec.blocks.append(Para("Prepare solutions under the lab's own standard operating procedures.", note=True))
    return sec


def _distances(plan: "Plan", a: str, b: str) -> np.ndarray:
    return np.linalg.norm(plan.role(a).positions - plan.role(b).positions, axis=1) * 1e6


def _span_text(values: np.ndarray, unit: str) -> str:
    if values.size == 1:
        return f"{values[0]:.0f} {unit}"
    return f"{values.min():.0f} to {values.max():.0f} {unit} (median {np.median(values):.0f})"


def _cells(protocol: ast.Protocol, plan: "Plan", circuit) -> Section:
    sec = Section("Cells to target", "cells")
    rows = []
    for pick in protocol.cells.picks:
        cls = circuit.classes.get(pick.cell_class)
        layer = ""
        if cls is not None and cls.layer in circuit.layers:
            ly = circuit.layers[cls.layer]
            layer = f"{cls.layer} ({ly.top * 1e6:g} to {ly.bottom * 1e6:g} um below the model slab's top face)"
        if isinstance(pick, ast.PatchPick):
            members = list(pick.members)
            d = np.concatenate([_distances(plan, m, members[0]) for m in members[1:]]) if len(members) > 1 \
                else np.zeros(0)
            rows.append({"cell": f"{pick.name} ({members[0]} to {members[-1]})", "class": pick.cell_class,
                         "model layer": layer,
                         "how to find it": f"a multi-cell patch of {pick.count} cells, each within {pick.radius} "
                                           f"of {members[0]}",
                         "model's selection": (f"distance to {members[0]}: " + _span_text(d, "um")) if d.size else ""})
            continue
        how, chosen = [], []
        for c in pick.constraints:
            if isinstance(c, ast.Within):
                how.append(f"within {c.distance} of {c.of} (soma to soma)")
                chosen.append(f"distance to {c.of}: " + _span_text(_distances(plan, pick.name, c.of), "um"))
            elif isinstance(c, ast.ReceivingFrom):
                how.append(f"receiving a connection from {c.source}: test for responses to {c.source}'s spikes "
                           f"before recording a pair")
                syn = next((s for s in plan.synapses if s.pre == c.source and s.post == pick.name), None)
                if syn is not None:
                    chosen.append(f"{int(syn.connected.sum())} of {plan.n_repeat} connected")
        rows.append({"cell": pick.name, "class": pick.cell_class, "model layer": layer,
                     "how to find it": "; ".join(how) or "any cell of the class",
                     "model's selection": "; ".join(chosen)})
    sec.blocks.append(Table(_frame(rows, ["cell", "class", "model layer", "how to find it", "model's selection"])))
    groups = "pairs" if len(plan.roles) == 2 else ("cells" if len(plan.roles) == 1 else "groups of cells")
    pairs = [("number wanted", f"{plan.n_repeat} {groups} (the protocol's repeat {plan.n_repeat})")]
    if len(plan.synapses) <= MAX_LISTED_SYNAPSES:
        for syn in plan.synapses:
            dist = syn.distance * 1e6 if syn.distance is not None else np.zeros(0)
            text = f"{syn.pathway}: {int(syn.connected.sum())} of {plan.n_repeat} selected pairs connected in the model"
            if dist.size:
                text += "; soma distance " + _span_text(dist, "um")
            pairs.append((f"{syn.pre} -> {syn.post}", text))
    else:                                   # a multi-cell patch: one line per pathway
        by_pathway: dict[str, list] = {}
        for syn in plan.synapses:
            by_pathway.setdefault(syn.pathway, []).append(syn)
        for pathway, syns in by_pathway.items():
            linked = sum(int(s.connected.sum()) for s in syns)
            pairs.append((pathway, f"{linked} of {len(syns) * plan.n_repeat} ordered pairs of selected cells "
                                   f"connected in the model"))
    sec.blocks.append(Defs(pairs))
    sec.blocks.append(Para("Layers and distances are those of the model circuit; map them onto the preparation "
                           "by the lab's own landmarks.", note=True))
    return sec


def _recording(plan: "Plan") -> Section:
    sec = Section("Recording configuration", "recording")
    rows = []
    for role in plan.roles:
        if role.spike_times is not None:
            mode = "model spike source (fires at set times; no membrane in the model)"
            hold = ""
        else:
            mode, hold = mode_text(role), holding_text(role)
        series = f"{role.series_resistance / 1e6:g} MOhm" if role.mode == "voltage clamp" and \
            role.series_resistance is not None else ""
        rows.append({"cell": role.name, "class": role.cell_class, "mode": mode, "holding": hold,
                     "series resistance (model)": series})
    sec.blocks.append(Table(_frame(rows, ["cell", "class", "mode", "holding", "series resistance (model)"])))
    sec.blocks.append(Para("A bias current to hold a potential in current clamp is set per cell at the rig. Recording "
                           "noise and the model's sampling rate describe the simulation, not settings for the rig.",
                           note=True))
    return sec


_KIND_WORDS = {
    ast.Pulse: "pulse", ast.Train: "train", ast.SpikeTimes: "set spike times (model spike source)",
    ast.Step: "step", ast.StepFamily: "step family (one amplitude per sweep)", ast.Ramp: "ramp",
    ast.Sine: "sine", ast.Chirp: "chirp (linear frequency sweep)", ast.Noise: "noise (random, model input)",
    ast.PoissonInput: "Poisson synaptic input (model only)", ast.Activate: "extracellular activation",
}


def _item_row(cell: str, item, clamp: bool) -> dict:
    """One row of the timing table: a stimulus line in the protocol's words and numbers."""
    rel = " (from holding)" if clamp else ""
    row = {"cell": cell, "line": f"{item.span.line}" if item.span is not None else "",
           "stimulus": _KIND_WORDS.get(type(item), type(item).__name__),
           "onset (ms)": "", "duration (ms)": "", "amplitude": "", "frequency": "", "pulses": "", "notes": ""}
    if isinstance(item, ast.Pulse):
        row.update({"onset (ms)": _ms(item.at.si), "duration (ms)": _ms(item.duration.si),
                    "amplitude": _q(item.amplitude), "pulses": "1"})
    elif isinstance(item, ast.Train):
        last = item.start.si + (item.count - 1) / item.rate.si
        row.update({"onset (ms)": _ms(item.start.si), "duration (ms)": f"{_ms(item.duration.si)} each",
                    "amplitude": _q(item.amplitude), "frequency": _q(item.rate), "pulses": str(item.count),
                    "notes": f"last pulse at {last * 1e3:g} ms"})
    elif isinstance(item, ast.SpikeTimes):
        times = ", ".join(_ms(t.si) for t in item.times)
        row.update({"onset (ms)": _ms(item.times[0].si) if item.times else "", "pulses": str(len(item.times)),
                    "notes": f"fires at {times} ms; evoke spikes at these times by the lab's usual means"})
    elif isinstance(item, ast.Step):
        row.update({"onset (ms)": _ms(item.at.si), "duration (ms)": _ms(item.duration.si),
                    "amplitude": _q(item.amplitude) + rel})
    elif isinstance(item, ast.StepFamily):
        how = f"by {item.step}" if item.step is not None else f"in {item.count} steps"
        row.update({"onset (ms)": _ms(item.at.si), "duration (ms)": _ms(item.duration.si),
                    "amplitude": f"{item.start} to {item.stop} {how}{rel}",
                    "notes": f"sweeps 1 to {len(item.values)}: " + ", ".join(str(v) for v in item.values)})
    elif isinstance(item, ast.Ramp):
        row.update({"onset (ms)": _ms(item.start.si), "duration (ms)": _ms(item.stop.si - item.start.si),
                    "amplitude": f"{item.start_amplitude} to {item.stop_amplitude}{rel}"})
    elif isinstance(item, ast.Sine):
        offset = f" around {item.offset}" if item.offset is not None else ""
        row.update({"onset (ms)": _ms(item.start.si), "duration (ms)": _ms(item.stop.si - item.start.si),
                    "amplitude": f"{item.amplitude}{offset}{rel}", "frequency": _q(item.frequency)})
    elif isinstance(item, ast.Chirp):
        row.update({"onset (ms)": _ms(item.start.si), "duration (ms)": _ms(item.stop.si - item.start.si),
                    "amplitude": f"{item.amplitude}{rel}", "frequency": f"{item.f_start} to {item.f_stop}"})
    elif isinstance(item, ast.Noise):
        rev = f", reversal {item.reversal}" if item.reversal is not None else ""
        row.update({"onset (ms)": _ms(item.start.si), "duration (ms)": _ms(item.stop.si - item.start.si),
                    "amplitude": f"mean {item.mean}, sd {item.sd}, tau {item.tau}{rev}",
                    "notes": "random; not in the stimulus files"})
    elif isinstance(item, ast.PoissonInput):
        row.update({"onset (ms)": _ms(item.start.si), "duration (ms)": _ms(item.stop.si - item.start.si),
                    "amplitude": f"{item.conductance} {item.receptor} per input spike", "frequency": _q(item.rate),
                    "notes": "model-only synaptic drive; not in the stimulus files"})
    elif isinstance(item, ast.Activate):
        times = ", ".join(_ms(t.si) for t in item.times)
        row.update({"onset (ms)": _ms(item.times[0].si) if item.times else "", "pulses": str(len(item.times)),
                    "amplitude": f"{item.fraction} of {item.cell_class} cells projecting to {cell}",
                    "notes": f"at {times} ms; set the extracellular stimulus intensity by the lab's own practice"})
    return row


def _stimuli(protocol: ast.Protocol, plan: "Plan", waves: list[StimulusWaveform], rate: float) -> Section:
    sec = Section("Stimuli", "stimuli")
    sec.blocks.append(Defs([
        ("sweeps", f"{plan.n_sweeps}, one every {plan.interval:g} s (start to start)"),
        ("sweep length", f"{plan.sweep_length * 1e3:g} ms"),
        ("time per group", f"about {_duration(plan.n_sweeps * plan.interval)} of sweeps per "
                           f"{'pair' if len(plan.roles) == 2 else 'group'}"),
        ("stimulus files", f"{STIMULI_DIR}/<cell>_sweeptype<k>.csv at {rate:g} Hz: current in pA for current "
                           f"injection, command potential in mV for voltage clamp"),
    ]))
    clamp = {r.name: r.mode == "voltage clamp" for r in plan.roles}
    rows = [_item_row(block.cell, item, clamp.get(block.cell, False))
            for block in protocol.stimuli for item in block.items]
    columns = ["cell", "line", "stimulus", "onset (ms)", "duration (ms)", "amplitude", "frequency", "pulses", "notes"]
    if rows:
        sec.blocks.append(Table(_frame(rows, columns), caption="Timing: one row per stimulus line of the protocol "
                                                               "(line = line number in the protocol file)"))
    else:
        sec.blocks.append(Para("The protocol stimulates no cell."))
    events = []
    for role in plan.roles:
        if role.events:
            shown = [_ms(e.time) + (" (probe)" if e.probe else "") for e in sorted(role.events, key=lambda e: e.time)]
            if len(shown) > MAX_LISTED_EVENTS:
                shown = shown[:MAX_LISTED_EVENTS - 4] + ["..."] + shown[-4:]
            times = ", ".join(shown)
            events.append({"cell": role.name, "events": len(role.events), "event times (ms)": times})
    if events:
        sec.blocks.append(Table(_frame(events, ["cell", "events", "event times (ms)"]),
                                caption="Presynaptic events per sweep (pulse onsets or set spike times); a lone "
                                        "pulse after a train is the recovery probe"))
    charge_rows = []
    for w in waves:
        size = f"{w.values.min():.4g} to {w.values.max():.4g} {w.unit}"
        charge = "not applicable (voltage clamp)" if w.voltage_clamp else f"{w.charge * 1e12:.4g}"
        charge_rows.append({"cell": w.role, "sweep type": f"{w.sweep_type} of {w.n_types}",
                            "sweeps": sweep_ranges(w.sweeps), "range": size,
                            "injected charge per sweep (pC)": charge, "file": f"{STIMULI_DIR}/{w.file_name}"})
    if charge_rows:
        sec.blocks.append(Table(_frame(charge_rows, ["cell", "sweep type", "sweeps", "range",
                                                     "injected charge per sweep (pC)", "file"]),
                                caption="Stimulus waveforms: range of the current (pA) or command potential (mV); injected "
                                        "charge is the net charge of the stimulus in one sweep (closed form; holding "
                                        "current not included)"))
    no_file = [r.name for r in plan.roles if r.spike_times is None and r not in exported_roles(plan)
               and (r.noise or r.poisson)]
    if no_file:
        sec.blocks.append(Para("Random or synaptic inputs only (no stimulus file): " + ", ".join(no_file), note=True))
    held_only = [r.name for r in plan.roles if r.recorded and r.mode == "current clamp" and r.spike_times is None
                 and r not in exported_roles(plan) and not (r.noise or r.poisson)]
    if held_only:
        sec.blocks.append(Para("Recorded without a stimulus (no stimulus file; only the holding set in the recording "
                               "configuration): " + ", ".join(held_only), note=True))
    for w in waves:
        what = "command potential" if w.voltage_clamp else "injected current"
        charge = f"; injected charge {w.charge * 1e12:.4g} pC per sweep" if w.charge is not None else ""
        sec.blocks.append(Wave(w, f"{w.role} ({w.mode if w.mode != 'off' else 'not recorded'}): {what}, sweep type {w.sweep_type} of {w.n_types}, "
                                  f"{_sweeps_word(w.sweeps)}{charge}; file {STIMULI_DIR}/{w.file_name}"))
    return sec


def _option(opts: dict, name: str, scale: float, unit: str) -> str:
    return f"{opts[name] * scale:g} {unit}"


def _collector_words(m, plan: "Plan") -> list[str]:
    """Short plain sentences defining what one measure line computes, with its options filled in."""
    o = m.options
    if m.collector == "responses":
        vc = plan.role(m.cell).mode == "voltage clamp"
        what = "clamp current" if vc else "membrane potential"
        floor = _option(o, "current_threshold", 1e12, "pA") if vc else _option(o, "threshold", 1e3, "mV")
        src = plan.role(m.source)
        event = (f"each set firing time of {src.name}" if src.spike_times is not None else
                 f"each spike of {src.name}, matched to its stimulus onset (at most 10 ms later)")
        return [
            f"Event: {event}.",
            f"Baseline: the mean {what} over the {_option(o, 'baseline', 1e3, 'ms')} before each event, taken anew "
            f"before every event of a train.",
            f"Response window: from the event for up to {_option(o, 'window', 1e3, 'ms')}, ending early at the next "
            f"event or the end of the sweep.",
            f"Amplitude: the peak of the {what} in the window (after a 0.3 ms running mean) minus its baseline, "
            f"counted positive along the connection's sign" + (" (an inward current counts positive)." if vc else
                                                               " (hyperpolarising responses count positive too)."),
            f"Failure: an amplitude below {o['noise_factor']:g} x the baseline noise SD (the SD over the 50 ms before "
            f"the sweep's first event) or below {floor}, whichever is larger.",
            "Amplitude of a connection: the mean first response over sweeps, failures included. CV: SD / mean of "
            "the first response over sweeps. Failure rate: the fraction of failed first responses.",
            "Latency: from the spike to 10 % of the peak; rise time: from 20 % to 80 % of the peak; both averaged "
            "over the first responses that did not fail.",
            "Decay: a single exponential fitted from the peak to the end of the window on the sweep-averaged "
            "response followed by the longest window (the recovery probe when there is one).",
            "Paired-pulse ratio (PPR): mean second response / mean first response over sweeps (a ratio of means); "
            "ratio k/1 likewise for train event k; recovery ratio: probe response / first response.",
            "Pathway summary: mean, SD and n over the connected pairs.",
        ]
    if m.collector == "plasticity":
        return [f"Short-term dynamics: the Tsodyks-Markram model (U, D, F and efficacy) fitted by least squares to "
                f"the mean response to each spike of the train and the recovery probe, per connection and per "
                f"pathway; intervals from {o['bootstrap']:g} bootstrap resamples of the sweeps; a synapse-class "
                f"label from the fit."]
    if m.collector == "spikes":
        return ["Spike count, first spike time and rate (count / sweep length) of the cell in every sweep."]
    if m.collector == "passive":
        return ["Read from the smallest hyperpolarising step, on the sweep-averaged trace.",
                "Resting potential: the mean before the step. Steady state: the mean of the last 100 ms of the step "
                "(at most its second half).",
                "Input resistance: (steady state - resting potential) / step current.",
                "Membrane time constant: an exponential fitted from the step onset to the peak response.",
                "Sag ratio: (peak - steady state) / (peak - rest); 0 without sag."]
    if m.collector == "firing":
        return ["Spikes during each depolarising step: count, rate (count / step duration), first-spike latency.",
                "Spike threshold: where dV/dt first reaches 20 V/s; amplitude: peak - threshold; half-width at half "
                "amplitude; AHP depth: threshold - the minimum within 10 ms after the peak.",
                "Adaptation index: the mean of (ISI[k+1] - ISI[k]) / (ISI[k+1] + ISI[k]); 0 for regular firing.",
                "Shape and latency from the lowest step that fires; adaptation and the firing-pattern label from the "
                "highest step."]
    if m.collector == "fi":
        return ["F-I curve: firing rate (spike count / step duration) against step current over the family.",
                "F-I slope: the least-squares slope over the steps that fire, in Hz/nA; family rheobase: the lowest "
                "step that fires."]
    if m.collector == "rheobase":
        return [f"Rheobase: the smallest step current ({_option(o, 'width', 1e3, 'ms')} steps) that makes the cell "
                f"fire, searched between {_option(o, 'low', 1e12, 'pA')} and {_option(o, 'high', 1e12, 'pA')} to "
                f"within {_option(o, 'tolerance', 1e12, 'pA')}. The model searches with test steps of its own; at "
                f"the rig use the lab's own step search."]
    if m.collector == "connectivity":
        return [f"Every ordered pair of the patch is tested: the presynaptic cell fires in its turn and the pair "
                f"counts as connected when the other cell's spike-triggered average response exceeds "
                f"{o['detection_factor']:g} noise SDs.",
                f"Connection probability per {_option(o, 'distance_bin', 1e6, 'um')} distance bin with Wilson 95 % "
                f"intervals; reciprocity against independence; in- and out-degrees."]
    if m.collector == "activity":
        return [f"Population activity of the simulated network (model only), from {_option(o, 'discard', 1e3, 'ms')} "
                f"into each sweep, in {_option(o, 'bin', 1e3, 'ms')} bins: firing rate, ISI CV, synchrony (Golomb's "
                f"chi), spike-count correlation, population bursts."]
    from ..measure.registry import COLLECTORS

    return [COLLECTORS[m.collector]["description"]]


def _measure_title(m) -> str:
    return f"{m.cell}: {m.collector}" + (f" to {m.source}" if m.source else "")


_UNITS = {"time": "ms", "number": "", "fraction": "fraction", "voltage": "mV", "resistance": "MOhm",
          "current": "pA", "gain": "Hz/nA", "frequency": "Hz"}


def measure_rows(plan: "Plan", protocol: ast.Protocol) -> list[dict]:
    """The measures the protocol collects that have a per-unit definition (REFERENCE_MEASURES).

    Returns:
        One dict per (measure, cell, source): ``measure, cell, source, unit, description, ref``
        (``ref`` is the record :func:`protolang.measure.compare.model_values` reads).
    """
    from ..measure.registry import REFERENCE_MEASURES

    receiving = {(p.name, c.source) for p in protocol.cells.picks if isinstance(p, ast.CellPick)
                 for c in p.constraints if isinstance(c, ast.ReceivingFrom)}
    rows, seen = [], set()
    for m in plan.measures:
        for name, entry in REFERENCE_MEASURES.items():
            if m.collector not in entry["collectors"]:
                continue
            on_patch = m.collector == "connectivity"
            if entry["source"] != (m.source is not None) and not on_patch:
                continue
            if name == "probability" and not on_patch and (m.cell, m.source) in receiving:
                continue   # every pair was chosen connected: no probability to measure
            key = (name, m.cell, m.source)
            if key in seen:
                continue
            seen.add(key)
            trace = "mV"
            if not on_patch:
                try:
                    trace = "pA" if plan.role(m.cell).mode == "voltage clamp" else "mV"
                except KeyError:
                    pass
            unit = trace if entry["dimension"] == "trace" else _UNITS.get(entry["dimension"], "")
            rows.append({"measure": name, "cell": m.cell, "source": m.source, "unit": unit,
                         "description": entry["description"],
                         "ref": {"measure": name, "cell": m.cell, "source_cell": m.source, "unit": trace,
                                 "on_patch": on_patch}})
    return rows


def _analysis(plan: "Plan", rows: list[dict]) -> Section:
    sec = Section("Analysis definitions", "analysis")
    done = set()
    for m in plan.measures:
        key = (m.collector, m.source, tuple(sorted(m.options.items())))
        cells = [x.cell for x in plan.measures if (x.collector, x.source, tuple(sorted(x.options.items()))) == key]
        if key in done:
            continue
        done.add(key)
        title = _measure_title(m) if len(cells) == 1 else f"{', '.join(cells)}: {m.collector}" + (
            f" to {m.source}" if m.source else "")
        sec.blocks.append(Sub(title))
        sec.blocks.append(Bullets(_collector_words(m, plan)))
    if rows:
        sec.blocks.append(Sub("Measures reported, one value per connection, tested pair or cell"))
        sec.blocks.append(Defs([(r["measure"] + (f" ({r['unit']})" if r["unit"] else ""), r["description"])
                                for r in {r["measure"]: r for r in rows}.values()]))
    if plan.references:
        refs = []
        for ref in plan.references:
            what = f"{ref['measure']} of {ref['cell']}" + (f" from {ref['source_cell']}" if ref["source_cell"] else "")
            unit = f" {ref['unit']}" if ref["unit"] else ""
            value = (f"{ref['value']:g}{unit}" if ref["value"] is not None
                     else f"{ref['low']:g} to {ref['high']:g}{unit}")
            extra = (f", SD {ref['sd']:g}" if ref["sd"] is not None else "") + (
                f", n {ref['n']}" if ref["n"] is not None else "")
            memo = " (recalled from memory, not checked against the paper)" if ref["from_memory"] else ""
            refs.append(f"{what}: published {value}{extra}; {ref['source']}{memo}")
        sec.blocks.append(Sub("Published values the protocol compares with"))
        sec.blocks.append(Bullets(refs))
    return sec


# --- predictions from a run folder -----------------------------------------------------------
def _run_error(message: str, expected: str, hint: str):
    return error(message, None, expected=expected, hint=hint)


def read_run_tables(run_dir: Path, protocol_file: str, sha: str, point: int, n_points: int,
                    names: set[str], circuit_sha: str | None = None) -> tuple[dict, dict]:
    """Check a run folder against the protocol text and read the tables ``names`` of one point.

    Args:
        run_dir: the run folder (of a whole scan, or of one point).
        protocol_file: the protocol file as the user named it (for messages).
        sha: sha256 of the protocol text; must equal the run's ``protocol_sha256``.
        point: the scan point, 0-based.
        n_points: how many scan points the protocol has.
        names: the tables to read.
        circuit_sha: sha256 of the circuit file the protocol resolves against now; must equal
            the run's ``circuit_sha256`` (predictions of another circuit are refused).

    Returns:
        ``(tables, provenance)``.

    Raises:
        ProtocolError: the folder or its provenance is missing or unreadable, was made from
            another protocol text (sha256 differs), holds another scan point, or lacks a table.
    """
    import pandas as pd

    again = f"run the protocol first: protolang run {protocol_file} --out RUN_DIR"
    if not run_dir.is_dir():
        raise _run_error(f"run folder {str(run_dir)!r} not found", "a run folder written by `protolang run`", again)
    prov_path = run_dir / "provenance.json"
    try:
        prov = json.loads(prov_path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise _run_error(f"{str(prov_path)!r} not found: {str(run_dir)!r} is not a run folder",
                         "a run folder written by `protolang run` (with provenance.json and tables/)", again) from None
    except (OSError, ValueError) as exc:
        raise _run_error(f"{str(prov_path)!r} cannot be read ({exc})", "the JSON file written by `protolang run`",
                         again) from None
    theirs = prov.get("protocol_sha256") if isinstance(prov, dict) else None
    if theirs != sha:
        raise _run_error(
            f"run folder {str(run_dir)!r} was made from another protocol text (protocol_sha256 "
            f"{str(theirs)[:12]}...) than {protocol_file!r} (sha256 {sha[:12]}...): its predictions would be for "
            f"another protocol", "the run folder of this protocol file, unchanged since the run",
            f"give the run folder of this protocol, or run it again: protolang run {protocol_file} --out RUN_DIR")
    if prov.get("kind") == "recordings":
        raise _run_error(f"{str(run_dir)!r} is a recording set (imported data), not a model run: the sheet's "
                         f"predictions column holds model outputs only", "a run folder written by `protolang run`",
                         f"give the model's run folder: protolang run {protocol_file} --out RUN_DIR")
    if circuit_sha is not None and prov.get("circuit_sha256") != circuit_sha:
        raise _run_error(
            f"run folder {str(run_dir)!r} was made with another circuit file (circuit_sha256 "
            f"{str(prov.get('circuit_sha256'))[:12]}...) than the one {protocol_file!r} names now "
            f"(sha256 {circuit_sha[:12]}...): its predictions would be for another model",
            "a run of this protocol on this circuit", f"run it again: protolang run {protocol_file} --out RUN_DIR")
    base = run_dir
    if (run_dir / "points").is_dir():
        base = run_dir / "points" / f"{point + 1:02d}"
        if not base.is_dir():
            raise _run_error(f"run folder {str(run_dir)!r} has no scan point {point + 1} ({str(base)!r} is missing)",
                             f"a scanned run folder with points/01 to points/{n_points:02d}",
                             "check --point, or run the protocol again")
    elif isinstance(prov.get("scan_point"), int) and prov["scan_point"] != point + 1:
        raise _run_error(f"run folder {str(run_dir)!r} holds scan point {prov['scan_point']}, not point {point + 1}",
                         f"the run folder of scan point {point + 1}", f"pass --point {prov['scan_point']}")
    tables = {}
    for name in sorted(names):
        pq, csv = base / "tables" / f"{name}.parquet", base / "tables" / f"{name}.csv"
        path = pq if pq.exists() else csv if csv.exists() else None
        if path is None:
            raise _run_error(f"run folder {str(run_dir)!r} has no table {name!r} ({str(pq)!r} is missing)",
                             f"tables/{name}.parquet or tables/{name}.csv, written by `protolang run`",
                             "the run folder may be incomplete; run the protocol again")
        try:
            tables[name] = pd.read_parquet(path, engine="pyarrow") if path == pq else pd.read_csv(path)
        except (OSError, ValueError) as exc:   # pyarrow's ArrowInvalid is a ValueError
            raise _run_error(f"table {str(path)!r} cannot be read ({type(exc).__name__}: {exc})",
                             "a table written by protolang", "the run folder may be damaged; run again") from None
    return tables, prov


def model_predictions(rows: list[dict], tables: dict) -> list[dict]:
    """Model mean, SD (ddof=1) and n of every measure row, read from the run's tables.

    Returns:
        The rows with ``mean``, ``sd`` and ``n`` added.
    """
    from ..measure.compare import model_values

    out = []
    for r in rows:
        values = model_values(r["ref"], tables)
        n = int(values.size)
        out.append(dict(r, n=n, mean=float(np.mean(values)) if n else math.nan,
                        sd=float(np.std(values, ddof=1)) if n > 1 else math.nan))
    return out


def tables_needed(rows: list[dict]) -> set[str]:
    """The run tables the measure rows read (REFERENCE_MEASURES; ``patch_pairs`` for a patch)."""
    from ..measure.registry import REFERENCE_MEASURES

    return {"patch_pairs" if r["ref"]["on_patch"] else REFERENCE_MEASURES[r["measure"]]["table"] for r in rows}


def _predictions(rows: list[dict], predicted: list[dict] | None, run_dir: Path | None, prov: dict | None) -> Section:
    sec = Section("Model predictions and measured values", "predictions")
    columns = ["measure", "cell", "from", "unit", "model mean", "model SD", "model n"]
    if predicted is not None:
        sec.blocks.append(Para("Model outputs, not measurements: what the model gave for this protocol. n counts "
                               "model connections, tested pairs or cells."))
        info = [("run folder", str(run_dir))]
        if prov:
            info.append(("run", f"seed {prov.get('seed')}, started {prov.get('started', '?')}, protolang "
                                f"{(prov.get('versions') or {}).get('protolang', '?')}"))
        sec.blocks.append(Defs(info))
        data = [{"measure": r["measure"], "cell": r["cell"], "from": r["source"] or "", "unit": r["unit"],
                 "model mean": r["mean"], "model SD": r["sd"], "model n": r["n"]} for r in predicted]
    else:
        sec.blocks.append(Para("No model run was given (add --run RUN_DIR for the model's predictions); the table "
                               "leaves room for the measured values.", note=True))
        data = [{"measure": r["measure"], "cell": r["cell"], "from": r["source"] or "", "unit": r["unit"],
                 "model mean": None, "model SD": None, "model n": None} for r in rows]
    if data:
        sec.blocks.append(Table(_frame(data, columns), caption="Write the measured mean +- SD and n beside the model's",
                                blanks=(MEASURED_COLUMN, NOTES_COLUMN)))
    else:
        sec.blocks.append(Para("The protocol collects no measure with a per-connection or per-cell summary; see the "
                               "run folder's tables.", note=True))
    return sec


def _session() -> Section:
    sec = Section("Session record", "session")
    items = ["date", "rig", "experimenter", "preparation (per the lab's own records)", "internal solution",
             "bath temperature measured", "amplifier, filter and sampling settings", "cells or pairs recorded"]
    sec.blocks.append(Table(_frame([{"item": i} for i in items], ["item"]), blanks=("entry",)))
    return sec


# --- rendering: HTML -----------------------------------------------------------------------
def _caution_html(title: str, items: list[str]) -> str:
    return f'<div class="caution"><strong>{H.escape(title)}</strong>\n{H.bullet_list(items)}</div>\n'


def _contents_html(sections: list[Section]) -> str:
    links = "".join(f'<li><a href="#{H.escape(s.anchor)}">{H.escape(s.title)}</a></li>\n' for s in sections)
    return f"<nav><ul>\n{links}</ul></nav>\n"


def _draw_waveform(ax, wave: StimulusWaveform) -> None:
    ax.plot(wave.time * 1e3, wave.values, color="black", lw=0.8, drawstyle="steps-post")
    ax.set_xlabel("time in sweep (ms)", fontsize=8)
    ax.set_ylabel("command (mV)" if wave.voltage_clamp else "current (pA)", fontsize=8)
    ax.set_title(f"{wave.role}: sweep type {wave.sweep_type} of {wave.n_types} ({_sweeps_word(wave.sweeps)})",
                 fontsize=8)
    ax.tick_params(labelsize=7)
    ax.set_xlim(0, wave.time[-1] * 1e3 if len(wave.time) else 1.0)
    ax.spines[["top", "right"]].set_visible(False)


def _figures(waves: list[StimulusWaveform], folder: Path) -> dict[str, Path]:
    folder.mkdir(parents=True, exist_ok=True)
    out = {}
    for w in waves:
        fig = _new_figure(7.0, 2.0)
        _draw_waveform(fig.add_subplot(), w)
        name = w.file_name[:-len(".csv")] + ".png"
        out[w.file_name] = _save_figure(fig, folder / name)
    return out


def render_html(title: str, sections: list[Section], figures: dict[str, Path]) -> str:
    """The sheet as one self-contained HTML page (figures embedded as data: URIs)."""
    body = _caution_html("Read first", CAUTIONS)
    body += _contents_html(sections)
    for sec in sections:
        parts = []
        for b in sec.blocks:
            if isinstance(b, Para):
                parts.append(H.paragraph(b.text, cls="note" if b.note else None))
            elif isinstance(b, Sub):
                parts.append(f"<h3>{H.escape(b.text)}</h3>\n")
            elif isinstance(b, Bullets):
                parts.append(H.bullet_list(b.items))
            elif isinstance(b, Defs):
                parts.append(H.definitions(b.pairs))
            elif isinstance(b, Table):
                parts.append(H.table(b.df, caption=b.caption, max_rows=None, blank_columns=b.blanks))
            elif isinstance(b, Wave):
                parts.append(H.figure(figures[b.wave.file_name], b.caption))
            elif isinstance(b, Pre):
                parts.append(H.preformatted(b.text))
        body += H.section(sec.title, "".join(parts), anchor=sec.anchor)
    return H.page(title, body)


# --- rendering: PDF ------------------------------------------------------------------------
class _PdfPages:
    """A4 portrait pages with text, ruled tables and waveform axes flowed from top to bottom."""

    W, H = 8.27, 11.69           # inches (A4)
    LEFT, RIGHT, TOP, BOTTOM = 0.6, 0.6, 0.6, 0.75
    FONT = "DejaVu Sans"
    SLACK = 1.03                 # rendered text runs about 1 % wider than its outline metrics

    def __init__(self, pdf, footer: str):
        from matplotlib.textpath import TextToPath

        self.pdf, self.footer = pdf, footer
        self.fig = None
        self.y = 0.0
        self.pages = 0
        self._tp = TextToPath()
        self._props: dict = {}

    @property
    def width(self) -> float:
        return self.W - self.LEFT - self.RIGHT

    def _prop(self, size: float, weight: str, family: str):
        from matplotlib.font_manager import FontProperties

        key = (size, weight, family)
        if key not in self._props:
            self._props[key] = FontProperties(family=family, size=size, weight=weight)
        return self._props[key]

    def text_width(self, text: str, size: float, weight: str = "normal", family: str | None = None) -> float:
        """Width of ``text`` in inches."""
        if not text:
            return 0.0
        w, _, _ = self._tp.get_text_width_height_descent(text, self._prop(size, weight, family or self.FONT),
                                                         ismath=False)
        return w * self.SLACK / 72.0

    def wrap(self, text: str, size: float, width: float, weight: str = "normal", family: str | None = None) -> list[str]:
        """Greedy word wrap to ``width`` inches; words longer than a line are cut."""
        lines: list[str] = []
        for para in str(text).split("\n"):
            line = ""
            for word in para.split(" "):
                trial = f"{line} {word}" if line else word
                if self.text_width(trial, size, weight, family) <= width:
                    line = trial
                    continue
                if line:
                    lines.append(line)
                while self.text_width(word, size, weight, family) > width and len(word) > 1:
                    cut = len(word)
                    while cut > 1 and self.text_width(word[:cut], size, weight, family) > width:
                        cut = max(1, int(cut * 0.8)) if cut > 8 else cut - 1
                    lines.append(word[:cut])
                    word = word[cut:]
                line = word
            lines.append(line)
        return lines

    def _new_page(self) -> None:
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure

        self._flush()
        self.fig = Figure(figsize=(self.W, self.H))
        FigureCanvasAgg(self.fig)
        self.pages += 1
        self.y = self.TOP
        self._put(self.LEFT, self.H - 0.45, f"{self.footer}   |   page {self.pages}", 6.5, color="0.35")

    def _flush(self) -> None:
        if self.fig is not None:
            self.pdf.savefig(self.fig)
            self.fig = None

    def close(self) -> None:
        self._flush()

    def room(self, height: float) -> None:
        if self.fig is None or self.y + height > self.H - self.BOTTOM:
            self._new_page()

    def _put(self, x: float, y: float, text: str, size: float, weight: str = "normal", color="black",
             family: str | None = None) -> None:
        self.fig.text(x / self.W, 1 - y / self.H, text, fontsize=size, fontweight=weight, color=color,
                      va="top", ha="left", family=family or self.FONT, parse_math=False)

    def _rect(self, x: float, y: float, w: float, h: float, face="none", edge="0.45", lw=0.5) -> None:
        from matplotlib.patches import Rectangle

        self.fig.add_artist(Rectangle((x / self.W, 1 - (y + h) / self.H), w / self.W, h / self.H,
                                      transform=self.fig.transFigure, facecolor=face, edgecolor=edge, linewidth=lw))

    @staticmethod
    def line_height(size: float) -> float:
        return size * 1.32 / 72.0

    def title(self, text: str) -> None:
        self.room(0.6)
        for line in self.wrap(text, 15, self.width, "bold"):
            self._put(self.LEFT, self.y, line, 15, "bold")
            self.y += self.line_height(15)
        self.y += 0.12

    def heading(self, text: str) -> None:
        self.room(0.9)                        # keep a heading with what follows
        self.y += 0.08
        self._put(self.LEFT, self.y, text, 12, "bold")
        self.y += self.line_height(12) + 0.02
        self._rect(self.LEFT, self.y, self.width, 0.0, edge="0.5", lw=0.6)
        self.y += 0.08

    def subheading(self, text: str, size: float = 10) -> None:
        self.room(self.line_height(size) + 0.5)   # keep it with what follows
        self.y += 0.04
        for line in self.wrap(text, size, self.width, "bold"):
            self._put(self.LEFT, self.y, line, size, "bold")
            self.y += self.line_height(size)
        self.y += 0.03

    def preformatted(self, text: str, size: float = 7) -> None:
        """Lines kept as written (indentation too), in a monospaced font; long lines are cut."""
        mono = "DejaVu Sans Mono"
        lh = size * 1.25 / 72.0
        for raw in text.expandtabs(4).splitlines():
            body = raw.lstrip()
            indent = raw[:len(raw) - len(body)]
            room = self.width - self.text_width(indent, size, family=mono)
            for piece in (self.wrap(body, size, room, family=mono) if body else [""]):
                self.room(lh)
                if piece:
                    self._put(self.LEFT, self.y, indent + piece, size, family=mono)
                self.y += lh
        self.y += 0.05

    def paragraph(self, text: str, size: float = 9, indent: float = 0.0, bullet: bool = False,
                  color="black", family: str | None = None) -> None:
        lh = self.line_height(size)
        x = self.LEFT + indent + (0.16 if bullet else 0.0)
        lines = self.wrap(text, size, self.width - (x - self.LEFT), family=family)
        if len(lines) * lh <= 1.0:
            self.room(len(lines) * lh)        # a short paragraph stays on one page
        for k, line in enumerate(lines):
            self.room(lh)
            if bullet and k == 0:
                self._put(x - 0.13, self.y, "\u2022", size, color=color)
            self._put(x, self.y, line, size, color=color, family=family)
            self.y += lh
        self.y += 0.05

    def defs(self, pairs: list[tuple[str, str]], size: float = 9) -> None:
        key_w = min(max((self.text_width(k, size, "bold") for k, _ in pairs), default=0.5) + 0.15, 2.3)
        lh = self.line_height(size)
        for key, value in pairs:
            keys = self.wrap(key, size, key_w - 0.1, "bold")
            vals = self.wrap(str(value), size, self.width - key_w)
            self.room(lh * max(len(keys), len(vals)))
            for k, line in enumerate(keys):
                self._put(self.LEFT, self.y + k * lh, line, size, "bold")
            for k, line in enumerate(vals):
                self._put(self.LEFT + key_w, self.y + k * lh, line, size)
            self.y += lh * max(len(keys), len(vals)) + 0.02
        self.y += 0.05

    def caution(self, title: str, items: list[str], size: float = 9) -> None:
        lh = self.line_height(size)
        pad = 0.1
        body = [self.wrap(t, size, self.width - 2 * pad - 0.18) for t in items]
        height = 2 * pad + lh * (1 + sum(len(b) for b in body)) + 0.04 * len(items)
        self.room(height)
        self._rect(self.LEFT, self.y, self.width, height, face="#fff4f4", edge="#aa3333", lw=1.5)
        y = self.y + pad
        self._put(self.LEFT + pad, y, title, size + 1, "bold", color="#881111")
        y += lh + 0.03
        for lines in body:
            self._put(self.LEFT + pad + 0.03, y, "\u2022", size)
            for line in lines:
                self._put(self.LEFT + pad + 0.18, y, line, size)
                y += lh
            y += 0.04
        self.y += height + 0.12

    def table(self, header: list[str], rows: list[list[str]], n_blank: int, caption: str | None,
              size: float = 7.5) -> None:
        pad = 0.04
        lh = self.line_height(size)
        n_text = len(header) - n_blank
        natural = [max([self.text_width(header[c], size, "bold")] + [self.text_width(r[c], size) for r in rows])
                   + 2 * pad + 0.02 for c in range(n_text)]
        blank_w = 1.3 if n_blank else 0.0
        avail = self.width - n_blank * blank_w

        def longest_word(c: int) -> float:
            words = [w for text in [header[c]] + [r[c] for r in rows] for w in text.split()]
            return max([self.text_width(w, size, "bold") for w in words] + [0.0]) + 2 * pad + 0.02
        mins = [min(longest_word(c), natural[c], 1.8) for c in range(n_text)]
        want = [natural[c] - mins[c] for c in range(n_text)]
        if sum(natural) <= avail:
            widths = list(natural)
            if n_blank:
                blank_w += (avail - sum(natural)) / n_blank
        elif sum(mins) <= avail:                  # every column keeps its longest word; the rest shared
            share = (avail - sum(mins)) / sum(want)
            widths = [mins[c] + want[c] * share for c in range(n_text)]
        else:
            widths = [m * avail / sum(mins) for m in mins]
        widths += [blank_w] * n_blank

        def cells_of(values: list[str], weight: str) -> list[list[str]]:
            return [self.wrap(v, size, widths[c] - 2 * pad, weight) for c, v in enumerate(values)]

        def height(cells: list[list[str]], minimum: float) -> float:
            return max(max(len(c) for c in cells) * lh + 2 * pad, minimum)

        head_cells = cells_of(header, "bold")
        head_h = height(head_cells, 0.0)

        def draw(cells, h, weight, face):
            x = self.LEFT
            for c, lines in enumerate(cells):
                self._rect(x, self.y, widths[c], h, face=face)
                for k, line in enumerate(lines):
                    self._put(x + pad, self.y + pad + k * lh, line, size, weight)
                x += widths[c]
            self.y += h

        def start(cont: bool) -> None:
            if caption:
                text = caption + (" (continued)" if cont else "")
                for line in self.wrap(text, 8, self.width):
                    self._put(self.LEFT, self.y, line, 8, color="0.25")
                    self.y += self.line_height(8)
                self.y += 0.03
            draw(head_cells, head_h, "bold", "#e8e8e8")

        cap_h = (len(self.wrap(caption, 8, self.width)) * self.line_height(8) + 0.03) if caption else 0.0
        first = cells_of(rows[0], "normal") if rows else None
        self.room(cap_h + head_h + (height(first, 0.32 if n_blank else 0.0) if first else 0.0))
        start(False)
        for values in rows:
            cells = cells_of(values, "normal")
            h = height(cells, 0.32 if n_blank else 0.0)
            if self.y + h > self.H - self.BOTTOM:
                self._new_page()
                start(True)
            draw(cells, h, "normal", "none")
        self.y += 0.15

    def waveform(self, wave: StimulusWaveform, caption: str) -> None:
        lines = self.wrap(caption, 7.5, self.width)
        total = 1.95 + len(lines) * self.line_height(7.5) + 0.1
        self.room(total)
        ax = self.fig.add_axes(((self.LEFT + 0.6) / self.W, 1 - (self.y + 1.45) / self.H,
                                (self.width - 0.7) / self.W, 1.2 / self.H))
        _draw_waveform(ax, wave)
        self.y += 1.95
        for line in lines:
            self._put(self.LEFT, self.y, line, 7.5, color="0.25")
            self.y += self.line_height(7.5)
        self.y += 0.1


def _cell_text(value: Any) -> str:
    return H.format_value(value, 4)[0]


def render_pdf(path: Path, title: str, sections: list[Section], footer: str) -> int:
    """Write the sheet as an A4 portrait PDF (matplotlib PdfPages, Agg-backed figures); return the page count."""
    from matplotlib.backends.backend_pdf import PdfPages

    with PdfPages(path, metadata={"Title": title, "Creator": "protolang bench sheet"}) as pdf:
        doc = _PdfPages(pdf, footer)
        doc.title(title)
        doc.caution("Read first", CAUTIONS)
        for sec in sections:
            doc.heading(sec.title)
            for b in sec.blocks:
                if isinstance(b, Para):
                    doc.paragraph(b.text, color="0.3" if b.note else "black")
                elif isinstance(b, Sub):
                    doc.subheading(b.text)
                elif isinstance(b, Bullets):
                    for item in b.items:
                        doc.paragraph(item, indent=0.05, bullet=True)
                elif isinstance(b, Defs):
                    doc.defs(b.pairs)
                elif isinstance(b, Table):
                    header = [str(c) for c in b.df.columns] + list(b.blanks)
                    rows = [[_cell_text(v) for v in values] + [""] * len(b.blanks)
                            for values in b.df.itertuples(index=False, name=None)]
                    doc.table(header, rows, len(b.blanks), b.caption)
                elif isinstance(b, Wave):
                    doc.waveform(b.wave, b.caption)
                elif isinstance(b, Pre):
                    doc.preformatted(b.text)
        doc.close()
        return doc.pages


# --- the whole sheet -------------------------------------------------------------------------
def _owned(path: Path) -> bool:
    return path.name in OWNED


def write_sheet(protocol_path: str | os.PathLike, out_dir: str | os.PathLike, *, run_dir: str | os.PathLike | None = None,
                point: int = 0, rate: float = DEFAULT_RATE, force: bool = False) -> dict[str, Path]:
    """Write the bench sheet of one protocol (one scan point) into the new folder ``out_dir``.

    Args:
        protocol_path: the protocol file.
        out_dir: the folder to create (layout in the module docstring).
        run_dir: a run folder of the same protocol text; adds the model's predictions.
        point: scan point, 0-based.
        rate: sample rate of the stimulus files (Hz).
        force: replace an existing folder written by this command.

    Returns:
        ``{relative path: Path}`` of every file written (``sheet.html``, ``sheet.pdf``,
        ``stimuli/...``, ``figures/...``).

    Raises:
        ProtocolError: a missing or bad protocol, a bad point or rate, an existing ``out_dir``
            without ``force``, or a run folder that is missing, incomplete or of another protocol.
    """
    from ..api import load
    from ..language.patch import expand_patches
    from ..measure.registry import patch_collectors

    out = Path(out_dir).resolve()
    refuse_existing(out, force, _owned, "sheet folder")
    exp = load(protocol_path)
    sha = _sha256(exp.text)
    plan = plan_point(exp, point)
    protocol = exp.points()[point][1]
    expanded = expand_patches(protocol, patch_collectors())
    waves = stimulus_waveforms(plan, rate)
    rows = measure_rows(plan, expanded)
    predicted = prov = None
    run_path = None
    if run_dir is not None:
        run_path = Path(run_dir)
        tables, prov = read_run_tables(run_path, str(protocol_path), sha, point, len(exp.points()),
                                       tables_needed(rows), circuit_sha=plan.circuit_hash)
        predicted = model_predictions(rows, tables)
    sections = [
        _purpose(exp, plan, point, sha),
        _solutions(protocol, plan),
        _cells(protocol, plan, exp.circuit),
        _recording(plan),
        _stimuli(expanded, plan, waves, rate),
        _analysis(plan, rows),
        _predictions(rows, predicted, run_path, prov),
        _session(),
        Section("Protocol file as written", "protocol", [Pre(exp.text)]),
    ]
    title = f"Bench sheet: {plan.title}"
    footer = (f"protolang bench sheet, {Path(exp.path).name if exp.path else 'protocol'} sha256 {sha[:12]}; generated "
              f"from a model: predictions are not measurements")
    tmp = temporary_folder(out)
    try:
        written: dict[str, Path] = {}
        for path in write_stimulus_files(plan, waves, tmp / STIMULI_DIR, scan_text(exp, point)):
            written[f"{STIMULI_DIR}/{path.name}"] = path
        figures = _figures(waves, tmp / FIGURES_DIR)
        for path in figures.values():
            written[f"{FIGURES_DIR}/{path.name}"] = path
        page = render_html(title, sections, figures)

        def write_html(t: str) -> None:
            with open(t, "w", encoding="utf-8") as fh:
                fh.write(page)
        written[SHEET_HTML] = atomic_write(tmp / SHEET_HTML, write_html)
        written[SHEET_PDF] = atomic_write(tmp / SHEET_PDF, lambda t: render_pdf(Path(t), title, sections, footer))
        replace_folder(tmp, out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return {rel: out / rel for rel in written}


def cmd_sheet(args: argparse.Namespace) -> int:
    """``protolang sheet``: write the bench sheet, its PDF and the stimulus files of one protocol.

    Args:
        args: parsed by the parser that :func:`add_sheet_parser` adds.

    Returns:
        0 on success.

    Raises:
        ProtocolError: see :func:`write_sheet`.
    """
    rate = parse_rate(args.rate)
    paths = write_sheet(args.file, args.out, run_dir=args.run, point=args.point - 1, rate=rate, force=args.force)
    n_stim = sum(1 for k in paths if k.startswith(f"{STIMULI_DIR}/"))
    print(f"bench sheet written to {paths[SHEET_HTML]} and {paths[SHEET_PDF]}; {n_stim} stimulus file(s) in "
          f"{Path(paths[SHEET_HTML]).parent / STIMULI_DIR}")
    print("the sheet comes from a model: check it against the lab's own approvals, safety rules and animal-care "
          "protocols before use")
    return 0


def add_sheet_parser(subparsers) -> argparse.ArgumentParser:
    """Add the ``sheet`` subcommand (``set_defaults(func=cmd_sheet)``) to an argparse subparsers object.

    Returns:
        The new subparser.
    """
    p = subparsers.add_parser("sheet", help="write a printable bench sheet (HTML and PDF) and stimulus files for the rig")
    p.add_argument("file", metavar="FILE", help="protocol file")
    p.add_argument("--out", required=True, metavar="DIR", help="folder to create")
    p.add_argument("--run", metavar="RUN_DIR", help="run folder of this protocol: adds the model's predictions")
    p.add_argument("--point", type=int, default=1, metavar="K", help="scan point (1-based; default 1)")
    p.add_argument("--rate", default="20 kHz", help="sample rate of the stimulus files (default 20 kHz)")
    p.add_argument("--force", action="store_true", help="replace an existing sheet folder")
    p.set_defaults(func=cmd_sheet)
    return p
