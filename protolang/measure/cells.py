"""Cell characterisation collectors: recorded step responses -> per-sweep, per-cell and per-class tables.

Collectors (see docs/cell-measures.md for every definition):

* ``passive`` reads the sweeps whose step is hyperpolarising and takes the smallest such
  step (closest to linear): resting potential, input resistance, membrane time constant,
  sag ratio, from the sweep-averaged trace of each cell.
* ``firing`` reads every sweep with a depolarising step: spike count, rate, first-spike
  latency, first-spike shape, adaptation, firing-pattern label. The per-cell summary takes
  spike shape and latency from the lowest step that makes the cell fire and adaptation and
  the pattern label from the highest step (common practice, no single source).
* ``fi`` uses the step family: firing rate against step current per cell, the F-I slope
  over supra-threshold steps, and the lowest step that fires ("family rheobase").
* ``rheobase`` needs no step in the protocol: it simulates test steps of its own
  (:mod:`protolang.measure.rheobase`), and its rows (``rheobase_pA``, ``rheobase_rounds``,
  ``rheobase_note``) are merged here into the cell's row.

Tables: ``cell_sweeps`` (one row per cell and sweep), ``cells`` (one row per cell) and
``classes`` (mean, SD and n over the cells of each class; pattern counts).
"""

from __future__ import annotations

import math
from collections import Counter

import numpy as np
import pandas as pd

from . import cell as cf

STEP_COLLECTORS = ("passive", "firing", "fi")
CELL_COLLECTORS = STEP_COLLECTORS + ("rheobase",)
RHEOBASE_COLUMNS = ("rheobase_pA", "rheobase_rounds", "rheobase_note")


def _amplitudes(seg_amp: float, per_sweep, n_sweeps: int) -> np.ndarray:
    return np.asarray(per_sweep, dtype=float) if per_sweep is not None else np.full(n_sweeps, seg_amp)


def _role_step(role, n_sweeps):
    squares = [s for s in role.segments if s.kind == "square"]
    if not squares:
        raise AssertionError(f"internal error: cell {role.name!r} has no step for the cell collectors")
    seg = squares[0]
    return seg.start, seg.stop, _amplitudes(seg.amplitude, seg.per_sweep, n_sweeps)


def _rheobase_rows(rheobase: pd.DataFrame | None, role_name: str, n_repeat: int) -> list[dict]:
    """The rheobase collector's values for each repeat of ``role_name``."""
    if rheobase is None:
        raise AssertionError(f"internal error: role {role_name!r} has a rheobase measure but no rheobase rows "
                             f"reached collect(); the rheobase collector simulates test steps, so pass "
                             f"rheobase=protolang.measure.rheobase.measure_rheobase(plan, run_plan)")
    mine = rheobase[rheobase["role"] == role_name]
    by_repeat = {int(r["repeat"]): r for _, r in mine.iterrows()}
    if sorted(by_repeat) != list(range(n_repeat)):
        raise AssertionError(f"internal error: rheobase rows of role {role_name!r} cover repeats "
                             f"{sorted(by_repeat)}, not 0..{n_repeat - 1}")
    return [{"rheobase_pA": float(by_repeat[r]["rheobase_pA"]),
             "rheobase_rounds": int(by_repeat[r]["rheobase_rounds"]),
             "rheobase_note": str(by_repeat[r]["rheobase_note"])} for r in range(n_repeat)]


def collect_cells(plan, recordings, measures, rheobase: pd.DataFrame | None = None) -> dict[str, pd.DataFrame]:
    """Run the cell collectors of ``measures`` and build the ``cell_sweeps``, ``cells`` and ``classes`` tables.

    Args:
        plan: the plan (roles, steps, cell ids).
        recordings: the run's recordings (current-clamp traces in V, spikes in s).
        measures: the plan's MeasurePlans of the collectors in :data:`CELL_COLLECTORS`.
        rheobase: rows of :func:`protolang.measure.rheobase.measure_rheobase` (columns
            ``role``, ``repeat`` and :data:`RHEOBASE_COLUMNS`), needed when a measure is
            ``rheobase``.

    Returns:
        ``{"cells": ..., "classes": ...}`` and ``"cell_sweeps"`` when a firing or F-I
        collector ran.

    Raises:
        AssertionError: internal errors (a stepped collector on a cell without a step, a
            rheobase measure without rheobase rows).
    """
    by_role: dict[str, set[str]] = {}
    for m in measures:
        by_role.setdefault(m.cell, set()).add(m.collector)
    sweep_rows, cell_rows = [], []
    dt = recordings.sample_dt
    for role_name, wanted in by_role.items():
        role = plan.role(role_name)
        n_repeat = plan.n_repeat
        rheobase_rows = _rheobase_rows(rheobase, role_name, n_repeat) if "rheobase" in wanted else None
        if wanted & set(STEP_COLLECTORS):
            traces = recordings.traces[role_name]
            n_repeat, n_sweeps, _ = traces.shape
            onset, stop, amps = _role_step(role, n_sweeps)
        spikes = recordings.spikes.get(role_name)
        for rep in range(n_repeat):
            base = {"role": role_name, "cell_class": role.cell_class, "repeat": rep,
                    "cell_id": int(role.cell_ids[rep])}
            row = dict(base)
            if "passive" in wanted:
                row.update(_passive(traces[rep], dt, onset, stop, amps))
            per_sweep = []
            if wanted & {"firing", "fi"}:
                for k in range(n_sweeps):
                    if amps[k] <= 0:
                        continue
                    times = None if spikes is None else np.asarray(spikes[rep][k], dtype=float)
                    f = cf.step_firing(traces[rep, k], dt, onset, stop, spike_times=times)
                    per_sweep.append((k, amps[k], f))
                    sweep_rows.append({**base, "sweep": k, "step_pA": amps[k] * 1e12, "n_spikes": f.n_spikes,
                                       "rate_Hz": f.rate, "first_spike_latency_ms": f.latency * 1e3,
                                       "threshold_mV": f.threshold * 1e3, "spike_amplitude_mV": f.amplitude * 1e3,
                                       "half_width_ms": f.half_width * 1e3, "ahp_mV": f.ahp_depth * 1e3,
                                       "adaptation_index": f.adaptation_index, "isi_ratio": f.isi_ratio,
                                       "pattern": f.pattern.label, "pattern_rule": f.pattern.rule,
                                       "shape_note": f.shape_reason})
            if "firing" in wanted:
                row.update(_firing_summary(per_sweep))
            if "fi" in wanted:
                row.update(_fi_summary(per_sweep))
            if rheobase_rows is not None:
                row.update(rheobase_rows[rep])
            cell_rows.append(row)
    tables = {"cells": pd.DataFrame(cell_rows)}
    if sweep_rows:
        tables["cell_sweeps"] = pd.DataFrame(sweep_rows)
    tables["classes"] = summarise_classes(tables["cells"])
    return tables


def _passive(traces: np.ndarray, dt: float, onset: float, stop: float, amps: np.ndarray) -> dict:
    neg = np.flatnonzero(amps < 0)
    nan = {"rest_mV": math.nan, "input_resistance_MOhm": math.nan, "tau_ms": math.nan, "sag_ratio": math.nan,
           "passive_step_pA": math.nan, "passive_sweeps": 0}
    if len(neg) == 0:
        return nan
    smallest = amps[neg].max()                      # the least negative step: closest to linear
    use = neg[amps[neg] == smallest]
    mean = traces[use].mean(axis=0)
    p = cf.passive_properties(mean, dt, onset, stop, smallest)
    return {"rest_mV": p.rest * 1e3, "input_resistance_MOhm": p.input_resistance / 1e6, "tau_ms": p.tau * 1e3,
            "sag_ratio": p.sag_ratio, "passive_step_pA": smallest * 1e12, "passive_sweeps": int(len(use))}


def _firing_summary(per_sweep: list) -> dict:
    firing = [(k, a, f) for k, a, f in per_sweep if f.n_spikes > 0]
    out = {"threshold_mV": math.nan, "spike_amplitude_mV": math.nan, "half_width_ms": math.nan, "ahp_mV": math.nan,
           "first_spike_latency_ms": math.nan, "adaptation_index": math.nan, "isi_ratio": math.nan,
           "max_rate_Hz": 0.0, "pattern": "silent", "pattern_step_pA": math.nan}
    if not firing:
        return out
    _, a_low, low = min(firing, key=lambda x: x[1])
    _, a_high, high = max(firing, key=lambda x: x[1])
    out.update({"threshold_mV": low.threshold * 1e3, "spike_amplitude_mV": low.amplitude * 1e3,
                "half_width_ms": low.half_width * 1e3, "ahp_mV": low.ahp_depth * 1e3,
                "first_spike_latency_ms": low.latency * 1e3, "adaptation_index": high.adaptation_index,
                "isi_ratio": high.isi_ratio, "max_rate_Hz": max(f.rate for _, _, f in firing),
                "pattern": high.pattern.label, "pattern_step_pA": a_high * 1e12})
    return out


def _fi_summary(per_sweep: list) -> dict:
    if not per_sweep:
        return {"fi_slope_Hz_per_nA": math.nan, "family_rheobase_pA": math.nan, "fi_points": 0}
    by_amp: dict[float, list[float]] = {}
    for _, a, f in per_sweep:
        by_amp.setdefault(float(a), []).append(f.rate)
    currents = np.array(sorted(by_amp))
    rates = np.array([np.mean(by_amp[c]) for c in currents])
    curve = cf.fi_curve(currents, rates)
    return {"fi_slope_Hz_per_nA": curve.slope * cf.HZ_PER_A_TO_HZ_PER_NA, "family_rheobase_pA":
            curve.lowest_firing * 1e12, "fi_points": int(len(currents))}


def summarise_classes(cells: pd.DataFrame) -> pd.DataFrame:
    """Mean, SD and n over the cells of each class for every numeric column; pattern counts."""
    skip = {"repeat", "cell_id", "passive_sweeps", "fi_points", "rheobase_rounds"}
    numeric = [c for c in cells.columns if c not in skip and pd.api.types.is_numeric_dtype(cells[c])]
    rows = []
    for cls, group in cells.groupby("cell_class", sort=True):
        row = {"cell_class": cls, "n_cells": len(group)}
        for c in numeric:
            vals = group[c].to_numpy(dtype=float)
            vals = vals[np.isfinite(vals)]
            row[f"{c}_mean"] = float(vals.mean()) if len(vals) else math.nan
            row[f"{c}_sd"] = float(vals.std(ddof=1)) if len(vals) > 1 else math.nan
            row[f"{c}_n"] = int(len(vals))
        if "pattern" in group.columns:
            counts = Counter(group["pattern"])
            row["pattern_most_common"] = counts.most_common(1)[0][0]
            row["pattern_counts"] = "; ".join(f"{k}: {v}" for k, v in sorted(counts.items()))
        rows.append(row)
    return pd.DataFrame(rows)
