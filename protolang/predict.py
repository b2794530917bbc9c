"""Prediction table: a circuit in, the standard paired protocol run over every pathway, one row per pathway out.

For each pathway ``PRE -> POST`` of the circuit the standard paired protocol (written out as
protolang text in ``OUT/protocols/``, so every row can be rerun and read) selects, per repeat,
one presynaptic cell, one postsynaptic cell it connects to (``post ... receiving from pre``) and
``probes`` postsynaptic cells chosen by distance only (``probe_1`` ...). The presynaptic cell fires an 8-pulse
20 Hz train and a recovery pulse 550 ms after the train, current-clamped. ``post`` gives the
response measures and the Tsodyks-Markram fit; the probes give the connection probability (the
fraction of the tested pairs that are connected, with a Wilson 95 % interval, beside the
circuit rule's expected fraction for the same pairs). Inhibitory pathways (every receptor reverses
below -50 mV) are recorded at a holding potential of -60 mV, excitatory ones at -70 mV.

Replays (``--replays``: protocols, folders of protocols, or run folders) on the same circuit
file (same content hash) back the rows of the pathways they compare: the table lists their
references and how each fared in its own replay, under the replay's own conditions.
"""

from __future__ import annotations

import json
import math
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

from .language.errors import ProtocolError, error

PREDICTION_COLUMNS = [
    "pathway", "pre_class", "post_class", "status", "n_pairs_tested", "n_pairs_connected", "probability",
    "probability_low", "probability_high", "rule_probability", "n_connections", "amplitude_mV", "amplitude_sd_mV",
    "cv", "failure_rate", "latency_ms", "rise_20_80_ms", "decay_tau_ms", "ppr", "recovery_ratio",
    "tm_U", "tm_D_ms", "tm_F_ms", "tm_model", "tm_class", "tm_converged_fraction", "reference_backed", "references_agreeing",
    "references", "holding_mV", "protocol_file",
]
# Inhibitory when every receptor of the pathway reverses below this (V).
INHIBITORY_REVERSAL = -0.050
# Current-clamp holding potentials: EPSPs from near rest; IPSPs from a depolarised level that gives a
# GABA_A reversal near -75 mV some 15 mV of driving force while a pyramid still holds without firing
# (common practice, no single source).
EXCITATORY_HOLDING_MV = -70
INHIBITORY_HOLDING_MV = -60


@dataclass
class Standard:
    """The standard paired protocol's settings."""
    pairs: int = 30
    sweeps: int = 20
    interval_s: float = 10.0
    distance_um: float = 150.0
    seed: int = 1
    noise_mV: float = 0.03
    rate_Hz: float = 20.0
    pulses: int = 8
    probes: int = 4          # distance-only postsynaptic cells per repeat: tested pairs = pairs x probes
    bootstrap: int = 0       # resamples behind the fit's intervals (0: point fits only, much faster)
    extra: dict = field(default_factory=dict)


def standard_protocol(circuit_path: Path, pathway, standard: Standard, *, inhibitory: bool) -> str:
    """The protolang text of the standard paired protocol for one pathway."""
    holding = INHIBITORY_HOLDING_MV if inhibitory else EXCITATORY_HOLDING_MV
    s = standard
    start_ms = 100.0
    train_end = start_ms + (s.pulses - 1) * 1000.0 / s.rate_Hz
    probe_ms = train_end + 550.0
    return "\n".join([
        f"# Standard paired protocol of 'protolang predict' for the pathway {pathway.pre} -> {pathway.post}.",
        f'protocol "standard pair: {pathway.pre} -> {pathway.post}"',
        f'circuit "{circuit_path}" seed {s.seed}',
        "",
        "cells:",
        f"    pre is {pathway.pre}",
        f"    post is {pathway.post} within {s.distance_um:g} um of pre, receiving from pre",
        *[f"    probe_{k} is {pathway.post} within {s.distance_um:g} um of pre" for k in range(1, s.probes + 1)],
        f"    repeat {s.pairs}",
        "",
        f"sweeps {s.sweeps} every {s.interval_s:g} s",
        "",
        "record pre: current clamp",
        f"record post: current clamp, holding {holding} mV, noise {s.noise_mV:g} mV",
        *[f"record probe_{k}: current clamp, holding {holding} mV, noise {s.noise_mV:g} mV"
          for k in range(1, s.probes + 1)],
        "",
        "stimulate pre:",
        f"    train {s.pulses} pulses of 1.5 nA for 2 ms at {s.rate_Hz:g} Hz from {start_ms:g} ms",
        f"    pulse 1.5 nA for 2 ms at {probe_ms:g} ms",
        "",
        "measure post:",
        "    responses to pre",
        f"    plasticity to pre, bootstrap {s.bootstrap}",
        "",
        *[line for k in range(1, s.probes + 1) for line in (f"measure probe_{k}:", "    responses to pre", "")],
    ])


def _is_inhibitory(circuit, pathway) -> bool:
    return all(circuit.receptors[r].reversal < INHIBITORY_REVERSAL for r in pathway.receptors)


def _value(table, column: str) -> float:
    if table is None or table.empty or column not in table.columns:
        return math.nan
    return float(table[column].iloc[0])


def prediction_row(pathway, tables: dict, plan, holding_mV: float) -> dict:
    """One row of the prediction table from a standard-protocol run's tables."""
    import numpy as np

    from .measure.anatomy import wilson_interval

    conn = tables["connections"]
    probe = conn[conn["post"].astype(str).str.startswith("probe_")]
    post = conn[(conn["post"] == "post") & conn["connected"].astype(bool)]
    k, n = int(probe["connected"].sum()), int(len(probe))
    low, high = wilson_interval(k, n)
    rules = [s.rule_probability for s in plan.synapses if s.pre == "pre" and s.post.startswith("probe_")
             and s.rule_probability is not None]
    rule = float(np.mean(np.concatenate(rules))) if rules else math.nan
    unit = "mV"

    def stat(column: str, how=np.mean) -> float:
        if column not in post.columns:
            return math.nan
        values = post[column].to_numpy(dtype=float)
        values = values[np.isfinite(values)]
        if how is np.std:
            return float(np.std(values, ddof=1)) if values.size > 1 else math.nan
        return float(how(values)) if values.size else math.nan

    fits = tables.get("plasticity")
    row = {"pathway": pathway.name, "pre_class": pathway.pre, "post_class": pathway.post, "status": "ok",
           "n_pairs_tested": n, "n_pairs_connected": k, "probability": k / n if n else math.nan,
           "probability_low": float(low), "probability_high": float(high), "rule_probability": rule,
           "n_connections": int(len(post)), "amplitude_mV": stat(f"amplitude_mean_{unit}"),
           "amplitude_sd_mV": stat(f"amplitude_mean_{unit}", np.std), "cv": stat("cv"),
           "failure_rate": stat("failure_rate"), "latency_ms": stat("latency_ms"),
           "rise_20_80_ms": stat("rise_20_80_ms"), "decay_tau_ms": stat("decay_tau_ms"), "ppr": stat("ppr"),
           "recovery_ratio": stat("recovery_ratio"), "holding_mV": holding_mV}
    if fits is not None and not fits.empty:
        pooled = fits[fits["scope"] == "pathway"]
        single = fits[fits["scope"] == "connection"]
        model = str(pooled["tm_model"].iloc[0]) if len(pooled) and "tm_model" in pooled.columns else ""
        row.update({"tm_U": _value(pooled, "tm_U"), "tm_D_ms": _value(pooled, "tm_D_ms"),
                    # a depression-only fit's F = 0 says the train could not resolve F: leave it empty here
                    "tm_F_ms": math.nan if model == "depression only" else _value(pooled, "tm_F_ms"),
                    "tm_model": model,
                    "tm_class": str(pooled["tm_class"].iloc[0]) if len(pooled) else "",
                    "tm_converged_fraction": float(single["tm_converged"].mean()) if len(single) else math.nan})
    return row


def _replay_sources(paths: list[str]) -> list[Path]:
    """Protocol files and run folders named by ``paths`` (folders searched for ``*.protocol``)."""
    found: list[Path] = []
    for text in paths:
        p = Path(text)
        if not p.exists():
            raise error(f"replay path {text!r} does not exist", None,
                        expected="a protocol file, a folder of protocols or a run folder",
                        hint="check the path given to --replays")
        if p.is_dir() and (p / "plan.json").exists():
            found.append(p)
        elif p.is_dir():
            protocols = sorted(p.rglob("*.protocol"))
            if not protocols:
                raise error(f"no *.protocol files under {text!r}", None,
                            expected="a folder holding protocol files or a run folder (with plan.json)")
            found.extend(protocols)
        else:
            found.append(p)
    return found


def _backing_from_run(plan_dict: dict, comparison) -> list[dict]:
    """Per comparison row of a replay run: the pathway it backs, the measure and how it fared."""
    classes = {r["name"]: r["cell_class"] for r in plan_dict.get("roles", [])}
    classes.update({p["name"]: p["cell_class"] for p in plan_dict.get("patches", [])})
    patches = {p["name"] for p in plan_dict.get("patches", [])}
    out = []
    for _, row in comparison.iterrows():
        cell, pre = row["cell"], row["from_cell"] if isinstance(row["from_cell"], str) else ""
        if cell in patches:
            pathway = f"{classes[cell]}->{classes[cell]}"
        elif pre:
            pathway = f"{classes.get(pre)}->{classes.get(cell)}"
        else:
            continue  # a property of one cell class, not of a pathway
        memo = ", from memory" if bool(row["from_memory"]) else ""
        out.append({"pathway": pathway, "measure": row["measure"], "agreement": row["agreement"],
                    "text": f"{row['measure']} {row['agreement']} ({row['source']}{memo}; {plan_dict.get('title', '')})"})
    return out


def run_replays(paths: list[str], circuit, out: Path, *, target: str, say: Callable[[str], None]
                ) -> tuple[list[dict], list[str]]:
    """Run (or read) the replays on ``circuit``; return their pathway backings and the skipped ones."""
    import pandas as pd

    from .api import load

    backings, skipped = [], []
    for src in _replay_sources(paths):
        if src.is_dir():
            plan_dict = json.loads((src / "plan.json").read_text())
            if plan_dict.get("circuit_hash") != circuit.sha256:
                skipped.append(f"{src}: run on another circuit (content hash differs)")
                continue
            table = src / "tables" / "comparison.csv"
            if not table.exists():
                skipped.append(f"{src}: no comparison table (the protocol has no references)")
                continue
            backings += _backing_from_run(plan_dict, pd.read_csv(table))
            continue
        exp = load(src)
        if exp.circuit.sha256 != circuit.sha256:
            skipped.append(f"{src}: written for another circuit ({exp.circuit_path})")
            continue
        if not exp.protocol.references:
            skipped.append(f"{src}: no reference blocks")
            continue
        say(f"replay {src.name}")
        result = exp.run(out / "replays" / src.stem, target=target, force=True)
        comparison = result.tables.get("comparison")
        if comparison is None:
            continue
        backings += _backing_from_run(result.plan.to_dict() | {"title": result.plan.title}, comparison)
    return backings, skipped


def predict(circuit_file: str, out: str, *, standard: Standard | None = None, replays: list[str] = (),
            target: str = "auto", force: bool = False, progress: Callable[[str], None] | None = None):
    """Run the standard paired protocol over every pathway of a circuit and write the prediction table.

    Args:
        circuit_file: the circuit YAML file.
        out: output folder (created; ``force`` replaces an existing one).
        standard: the standard protocol's settings (pairs, sweeps, distance, seed ...).
        replays: protocol files, folders or run folders whose references back rows.
        target: Brian2 code-generation target.
        force: replace an existing output folder.
        progress: callable receiving one line per stage.

    Returns:
        The prediction table (pandas DataFrame, columns :data:`PREDICTION_COLUMNS`).

    Raises:
        ProtocolError: a bad circuit file, an existing output folder, a bad replay path.
    """
    import shutil

    import pandas as pd

    from .api import load
    from .circuit import load_circuit
    from .report.write import _write_text, atomic_write

    say = progress or (lambda msg: None)
    standard = standard or Standard()
    circuit_path = Path(circuit_file).resolve()
    if not circuit_path.exists():
        raise error(f"circuit file {circuit_file!r} does not exist", None, expected="a circuit YAML file",
                    hint="give the path of a *.circuit.yaml file")
    circuit = load_circuit(circuit_path)
    out_dir = Path(out)
    if out_dir.exists():
        if not force:
            raise error(f"output folder {str(out)!r} already exists", None, expected="a new folder name",
                        hint="choose another --out or pass --force")
        shutil.rmtree(out_dir)
    (out_dir / "protocols").mkdir(parents=True)
    started = time.perf_counter()
    rows = []
    for pathway in circuit.pathways.values():
        inhibitory = _is_inhibitory(circuit, pathway)
        text = standard_protocol(circuit_path, pathway, standard, inhibitory=inhibitory)
        name = pathway.name.replace("->", "_to_")
        proto = out_dir / "protocols" / f"{name}.protocol"
        _write_text(proto, text)
        say(f"pathway {pathway.name}: {standard.pairs} pairs x {standard.sweeps} sweeps")
        base = {"pathway": pathway.name, "pre_class": pathway.pre, "post_class": pathway.post,
                "holding_mV": float(INHIBITORY_HOLDING_MV if inhibitory else EXCITATORY_HOLDING_MV), "protocol_file": f"protocols/{name}.protocol"}
        try:
            result = load(proto).run(out_dir / "runs" / name, target=target)
        except ProtocolError as exc:
            # e.g. no postsynaptic cell within the distance receives from the pathway
            first = exc.diagnostics[0]
            rows.append(base | {"status": f"not run: {first.message}"})
            continue
        rows.append(prediction_row(pathway, result.tables, result.plan, base["holding_mV"]) | base)
    backings, skipped = run_replays(list(replays), circuit, out_dir, target=target, say=say) if replays else ([], [])
    for row in rows:
        mine = [b for b in backings if b["pathway"] == row["pathway"]]
        row["reference_backed"] = bool(mine)
        row["references_agreeing"] = (f"{sum(b['agreement'] == 'yes' for b in mine)} of {len(mine)}"
                                      if mine else "")
        row["references"] = "; ".join(b["text"] for b in mine)
    table = pd.DataFrame(rows).reindex(columns=PREDICTION_COLUMNS)
    atomic_write(out_dir / "predictions.csv", lambda tmp: table.to_csv(tmp, index=False))
    atomic_write(out_dir / "predictions.parquet", lambda tmp: table.to_parquet(tmp, index=False, engine="pyarrow"))
    from .api import _versions

    info = {"circuit": str(circuit_path), "circuit_sha256": circuit.sha256, "standard": standard.__dict__,
            "replays": [str(p) for p in replays], "skipped_replays": skipped, "versions": _versions(),
            "target": target, "wall_time_s": time.perf_counter() - started}
    _write_text(out_dir / "provenance.json", json.dumps(info, indent=1, default=str))
    for line in skipped:
        say(f"replay skipped: {line}")
    return table
