"""The `connectivity` collector: a Plan with a multi-cell patch and its Recordings in, the lab's connectivity tables out.

Every ordered pair (a, b) of a patch, in every repeat, is tested the way a lab tests it: the
spikes a fired during its turn trigger an average of b's trace over all sweeps, and the pair
counts as connected when that average response stands out from its own noise
(:func:`protolang.measure.anatomy.detect_response`), never by reading the circuit. Beside each
result the tables give the circuit's truth: whether the connection exists and the analytic
probability of the circuit's rule at that distance. Tables:

* ``patch_pairs``: one row per repeat and ordered pair (distance, detected, amplitude, noise,
  latency, connected in the circuit, rule probability);
* ``patch_connectivity``: connection probability by distance bin with Wilson 95 % intervals
  (:func:`~protolang.measure.anatomy.probability_by_distance`), the circuit rule's mean
  probability of the tested pairs, and the fraction of them the circuit really connects;
* ``patch_reciprocity``: reciprocal pairs against the independence expectation;
* ``patch_degrees``: in- and out-degree of each patched cell among its patch.

Brian2 is never imported here.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from . import anatomy as A
from .collect import trace_unit
from .registry import option_defaults

if TYPE_CHECKING:
    from ..engine.recordings import Recordings
    from ..plan.model import MeasurePlan, PatchPlan, Plan

UM = 1e6
MS = 1e3
# Pre-spike stretch of the noise estimate and of the trend carried through the response window.
# 30 ms (3x the detector's default): the trend is extrapolated 15 ms ahead, and the error of a
# line fitted over L grows as (distance / L)^1.5; a patch's turns leave the cell quiet that long.
NOISE_STRETCH = 30e-3


def _truth(plan: "Plan", pre: str, post: str) -> tuple[np.ndarray, np.ndarray]:
    """(connected, rule probability) per repeat of the circuit connection pre -> post."""
    syn = next((s for s in plan.synapses if s.pre == pre and s.post == post), None)
    if syn is None:
        # no pathway between the classes, or every receptor blocked: the circuit connects nothing
        zeros = np.zeros(plan.n_repeat)
        return zeros.astype(bool), zeros
    # a cut pathway's synapse plan is already unconnected: the truth is the lesioned circuit's
    connected = np.asarray(syn.connected, dtype=bool)
    rule = syn.rule_probability if syn.rule_probability is not None else np.full(plan.n_repeat, np.nan)
    return connected, np.asarray(rule, dtype=float)


def collect_connectivity(plan: "Plan", recordings: "Recordings", measure: "MeasurePlan"
                         ) -> dict[str, pd.DataFrame]:
    """Run one ``connectivity`` measure on a patch.

    Args:
        plan: the plan; ``measure.cell`` names one of ``plan.patches``.
        recordings: traces and spikes of every cell of the patch.
        measure: options ``distance_bin`` (m) and ``detection_factor``.

    Returns:
        ``{"patch_pairs", "patch_connectivity", "patch_reciprocity", "patch_degrees"}`` DataFrames.

    Raises:
        AssertionError: a patch without recordings (the front end rules it out).
    """
    opts = dict(option_defaults("connectivity"), **measure.options)
    patch: PatchPlan = next(p for p in plan.patches if p.name == measure.cell)
    members = patch.members
    roles = {r.name: r for r in plan.roles}
    missing = [m for m in members if m not in recordings.traces]
    if missing:
        raise AssertionError(f"internal error: patch cells without traces: {missing}")
    unit = trace_unit(recordings, members[0])
    rows = []
    for r in range(plan.n_repeat):
        for a in members:
            spikes = recordings.spikes[a][r]
            for b in members:
                if a == b:
                    continue
                found = A.detect_response(recordings.traces[b][r], recordings.sample_dt, spikes,
                                          factor=float(opts["detection_factor"]), noise_stretch=NOISE_STRETCH)
                connected, rule = _truth(plan, a, b)
                pa, pb = roles[a].positions[r], roles[b].positions[r]
                rows.append({
                    "patch": patch.name, "repeat": r, "pre": a, "post": b,
                    "pre_id": int(roles[a].cell_ids[r]), "post_id": int(roles[b].cell_ids[r]),
                    "cell_class": patch.cell_class,
                    "distance_um": float(np.linalg.norm(pa - pb)) * UM,
                    "presynaptic_spikes": found.n_events, "tested": bool(found.tested),
                    "detected": bool(found.detected),
                    f"amplitude_{unit.label}": found.amplitude * unit.scale,
                    f"noise_{unit.label}": found.noise * unit.scale,
                    "latency_ms": found.latency * MS,
                    "connected_in_circuit": bool(connected[r]), "rule_probability": float(rule[r]),
                })
    pairs = pd.DataFrame(rows)
    tested = pairs["tested"].to_numpy()
    distance = pairs["distance_um"].to_numpy() / UM
    top = max(patch.radius * 2.0, float(distance.max()) if len(distance) else 0.0)
    width = float(opts["distance_bin"])
    bins = np.arange(0.0, top + width, width)
    table = A.probability_by_distance(distance, tested, pairs["detected"].to_numpy(), bins,
                                      rule_probability=pairs["rule_probability"].to_numpy())
    # the circuit's own answer for the same tested pairs: how far sampling and detection are from it
    truth = pairs["connected_in_circuit"].to_numpy() & tested
    scope, lo, hi = table["scope"].to_numpy(), table["distance_from_um"].to_numpy(), table["distance_to_um"].to_numpy()
    d_um = pairs["distance_um"].to_numpy()
    circuit_p = []
    for k in range(len(table)):
        if scope[k] == "all":
            inside = tested & (d_um >= bins[0] * UM) & (d_um <= bins[-1] * UM)
        else:
            last = k == int(np.sum(scope != "all")) - 1
            inside = tested & (d_um >= lo[k]) & ((d_um <= hi[k]) if last else (d_um < hi[k]))
        circuit_p.append(float(truth[inside].sum() / inside.sum()) if inside.any() else np.nan)
    table.insert(0, "patch", patch.name)
    table["circuit_probability"] = circuit_p
    table["sampled_minus_circuit"] = table["probability"] - table["circuit_probability"]
    key = pairs["repeat"].astype(str) + ":"
    recip = A.reciprocity(key + pairs["pre"], key + pairs["post"], pairs["detected"].to_numpy(),
                          tested=tested, rule_probability=pairs["rule_probability"].to_numpy())
    recip.insert(0, "patch", patch.name)
    true_recip = A.reciprocity(key + pairs["pre"], key + pairs["post"], truth, tested=tested)
    recip["reciprocal_pairs_in_circuit"] = true_recip["reciprocal_pairs"].to_numpy()
    cells, _summary = A.degrees(pairs["repeat"].to_numpy(), pairs["pre"].to_numpy(), pairs["post"].to_numpy(),
                                pairs["detected"].to_numpy(), tested=tested)
    true_cells, _ = A.degrees(pairs["repeat"].to_numpy(), pairs["pre"].to_numpy(), pairs["post"].to_numpy(),
                              truth, tested=tested)
    cells = cells.rename(columns={"patch": "repeat"})
    cells.insert(0, "patch", patch.name)
    cells["cell_class"] = patch.cell_class
    cells["in_degree_in_circuit"] = true_cells["in_degree"].to_numpy()
    cells["out_degree_in_circuit"] = true_cells["out_degree"].to_numpy()
    return {"patch_pairs": pairs, "patch_connectivity": table, "patch_reciprocity": recip, "patch_degrees": cells}
