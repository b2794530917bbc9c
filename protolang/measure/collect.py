"""Result collectors: a Plan and its Recordings in, pandas tables (units in the column names) out.

``collect(plan, recordings)`` runs every ``measure`` of the plan and returns
``{table name: DataFrame}``:

* ``responses``: one row per repeat x sweep x presynaptic event;
* ``connections``: one row per tested pair (repeat) of a ``responses`` measure;
* ``pathways``: one row per circuit pathway, mean / SD / n over its *connected* pairs;
* ``spikes``: one row per repeat x sweep of each cell with a ``spikes`` measure;
* ``cell_sweeps``, ``cells``, ``classes``: the cell collectors (:mod:`protolang.measure.cells`).

The features are those of :mod:`protolang.measure.features` (definitions there);
tables hold mV, pA, ms, um, Hz as their column names say. A voltage-clamped cell's trace
is its clamp current (``recordings.meta["trace_units"][role] == "A"``, inward negative):
its responses are postsynaptic currents measured with the same definitions, and every
column that carries the trace's unit says pA instead of mV (``amplitude_pA``,
``baseline_pA``, ``area_pA_ms``...). Brian2 is never imported here.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, NamedTuple

import numpy as np
import pandas as pd

from . import features as F
from .registry import COLLECTORS, option_defaults

if TYPE_CHECKING:   # the engine package may import Brian2; the collectors must not
    from ..engine.recordings import Recordings
    from ..plan.model import MeasurePlan, Plan, RolePlan, SynapsePlan

MV = 1e3    # V -> mV
MS = 1e3    # s -> ms
UM = 1e6    # m -> um


class TraceUnit(NamedTuple):
    """How a recorded trace's unit appears in the tables.

    Attributes:
        si: the trace's SI unit as the engine states it ("V" or "A").
        label: the unit in column names ("mV" or "pA").
        scale: SI value -> table value.
        floor_option: the ``responses`` option giving the failure threshold floor.
    """

    si: str
    label: str
    scale: float
    floor_option: str


TRACE_UNITS = {
    "V": TraceUnit("V", "mV", 1e3, "threshold"),
    "A": TraceUnit("A", "pA", 1e12, "current_threshold"),
}


def trace_unit(recordings: "Recordings", role: str) -> TraceUnit:
    """The unit of ``role``'s trace: ``recordings.meta["trace_units"][role]``, volts when absent.

    Args:
        recordings: the run's recordings (an importer of real data sets ``meta`` the same way).
        role: the recorded role.

    Returns:
        The :class:`TraceUnit`.

    Raises:
        AssertionError: the engine (or importer) named a unit other than "V" or "A".
    """
    unit = (recordings.meta or {}).get("trace_units", {}).get(role, "V")
    if unit not in TRACE_UNITS:
        raise AssertionError(f"internal error: trace of role {role!r} has unit {unit!r}; "
                             f"the collectors read {', '.join(TRACE_UNITS)}")
    return TRACE_UNITS[unit]


def response_columns(label: str = "mV") -> list[str]:
    """Columns of the ``responses`` table for traces whose unit shows as ``label`` ("mV" or "pA")."""
    return [
        "pathway", "synapse", "pre", "post", "repeat", "pre_id", "post_id", "connected", "sweep",
        "event", "kind", "probe", "nominal_time_ms", "event_time_ms", "presynaptic_spike",
        "extra_pre_spikes", "window_ms", "sign", f"noise_sd_{label}", f"failure_level_{label}",
        f"baseline_{label}", f"amplitude_{label}", "failure", "latency_ms", "rise_20_80_ms",
        "time_to_peak_ms", "decay_tau_ms", f"area_{label}_ms",
    ]


def connection_columns(label: str = "mV") -> list[str]:
    """Fixed columns of the ``connections`` table for traces shown in ``label`` ("mV" or "pA").

    Ratio columns ``ratio_<k>_1`` (train events 3...), ``recovery_ratio`` and per-event
    ``event_<k>_amplitude_<label>`` follow them.
    """
    return [
        "pathway", "synapse", "pre", "post", "repeat", "pre_id", "post_id", "pre_class", "post_class",
        "distance_um", "connected", "n_release_sites", "sign", "n_sweeps", "n_events",
        "pre_spikes_missing", "extra_pre_spikes", f"noise_sd_{label}", f"amplitude_mean_{label}",
        f"amplitude_sd_{label}", "cv", "failure_rate", "latency_ms", "rise_20_80_ms", "decay_tau_ms",
        "decay_event", "ppr",
    ]


RESPONSE_COLUMNS = response_columns("mV")
CONNECTION_COLUMNS = connection_columns("mV")
_AMPLITUDE_SUFFIXES = tuple(f"_amplitude_{u.label}" for u in TRACE_UNITS.values())

PATHWAY_KEYS = ["pathway", "pre_class", "post_class", "n_pairs_tested", "n_pairs"]
# then <metric>_mean, <metric>_sd, <metric>_n for every metric in _pathway_metrics()

SPIKE_COLUMNS = ["role", "cell_class", "repeat", "cell_id", "sweep", "n_spikes", "first_spike_ms",
                 "rate_Hz"]


def collect(plan: "Plan", recordings: "Recordings",
            rheobase: pd.DataFrame | None = None) -> dict[str, pd.DataFrame]:
    """Run every measure of ``plan`` on ``recordings``.

    Args:
        plan: the resolved plan (its ``measures`` say what to collect).
        recordings: traces (V, or A for voltage-clamped cells) and spike times (s) of the run.
        rheobase: rows of the ``rheobase`` collector, which simulates test steps of its own
            (:func:`protolang.measure.rheobase.measure_rheobase`); needed when the plan has a
            ``rheobase`` measure, merged into the ``cells`` table.

    Returns:
        ``{table name: DataFrame}`` for the tables the plan's collectors produce
        (``responses``, ``connections``, ``pathways``, ``spikes``, ``cell_sweeps``,
        ``cells``, ``classes``, ``populations``, ``bursts``; ``comparison`` when the protocol has
        ``reference`` blocks); rows of several measures feeding the same table are concatenated.

    Raises:
        AssertionError: an internal error (unknown collector or option, a measured cell
            without traces, a source without a synapse, a rheobase measure without its
            rows): the front end and :func:`protolang.api.Experiment.run` rule these out.
    """
    from .cells import CELL_COLLECTORS, collect_cells

    parts: dict[str, list[pd.DataFrame]] = {}
    cell_measures = [m for m in plan.measures if m.collector in CELL_COLLECTORS]
    if cell_measures:
        for name, table in collect_cells(plan, recordings, cell_measures, rheobase=rheobase).items():
            parts.setdefault(name, []).append(table)
    for measure in plan.measures:
        if measure.collector in CELL_COLLECTORS:
            continue
        if measure.collector == "responses":
            responses, connections = collect_responses(plan, recordings, measure)
            parts.setdefault("responses", []).append(responses)
            parts.setdefault("connections", []).append(connections)
        elif measure.collector == "spikes":
            _options(measure)
            parts.setdefault("spikes", []).append(collect_spikes(plan, recordings, measure))
        elif measure.collector == "plasticity":
            from .plasticity import collect_plasticity

            _options(measure)
            parts.setdefault("plasticity", []).append(collect_plasticity(plan, recordings, measure))
        elif measure.collector == "connectivity":
            from .patch import collect_connectivity

            _options(measure)
            for name, table in collect_connectivity(plan, recordings, measure).items():
                parts.setdefault(name, []).append(table)
        elif measure.collector == "activity":
            from .population import collect_activity

            _options(measure)
            populations, bursts = collect_activity(plan, recordings, measure)
            parts.setdefault("populations", []).append(populations)
            parts.setdefault("bursts", []).append(bursts)
        else:
            raise AssertionError(f"internal error: unknown collector {measure.collector!r} reached collect() "
                                 f"(known: {', '.join(COLLECTORS)})")
    tables = {name: _concat(frames) for name, frames in parts.items()}
    if "connections" in tables:
        tables["connections"] = _order_connection_columns(tables["connections"])
        tables["pathways"] = summarise_pathways(tables["connections"])
    if plan.references:
        from .compare import compare

        tables["comparison"] = compare(plan.references, tables)
    return tables


def _concat(frames: list[pd.DataFrame]) -> pd.DataFrame:
    frames = [f for f in frames if len(f.columns)]
    if len(frames) == 1:
        return frames[0].reset_index(drop=True)
    return pd.concat(frames, ignore_index=True)


def _options(measure: "MeasurePlan") -> dict[str, float]:
    if measure.collector not in COLLECTORS:
        raise AssertionError(f"internal error: unknown collector {measure.collector!r}")
    opts = option_defaults(measure.collector)
    unknown = set(measure.options) - set(opts)
    if unknown:
        raise AssertionError(f"internal error: collector {measure.collector!r} got unknown options "
                             f"{sorted(unknown)}")
    opts.update({k: float(v) for k, v in measure.options.items()})
    return opts


def _synapse(plan: "Plan", pre: str, post: str) -> "SynapsePlan":
    for syn in plan.synapses:
        if syn.pre == pre and syn.post == post:
            return syn
    raise AssertionError(f"internal error: no synapse {pre} -> {post} in the plan for a responses measure")


def _role(plan: "Plan", name: str) -> "RolePlan":
    try:
        return plan.role(name)
    except KeyError:
        raise AssertionError(f"internal error: measure names role {name!r}, which the plan lacks") from None


def event_matrix(plan: "Plan", recordings: "Recordings", source: "RolePlan", repeat: int,
                 nominal: np.ndarray, match: float = F.DEFAULT_SPIKE_MATCH) -> tuple[np.ndarray, list[np.ndarray]]:
    """Presynaptic event times of one repeat: (n_sweeps, n_events) s, NaN where no spike.

    A role with explicit spike times fires at exactly those times; any other source's
    events are its recorded spikes matched to the nominal stimulus onsets
    (:func:`protolang.measure.features.match_spikes`).

    Args:
        plan: the plan (for the sweep count).
        recordings: the run's recordings.
        source: the presynaptic role.
        repeat: repeat index.
        nominal: (n_events,) nominal event times (s), increasing.
        match: longest onset-to-spike delay (s).

    Returns:
        ``(times, spikes)``: event times per sweep and event, and the presynaptic spike
        times of each sweep (s).

    Raises:
        AssertionError: the source's spikes were not recorded (internal error).
    """
    n_sweeps = plan.n_sweeps
    if source.spike_times is not None:
        times = np.tile(nominal, (n_sweeps, 1))
        return times, [np.asarray(nominal, dtype=float) for _ in range(n_sweeps)]
    if source.name not in recordings.spikes:
        raise AssertionError(f"internal error: spikes of source role {source.name!r} were not recorded")
    times = np.full((n_sweeps, nominal.size), np.nan)
    spikes = []
    for s in range(n_sweeps):
        spk = np.asarray(recordings.spikes[source.name][repeat][s], dtype=float)
        times[s], _extra = F.match_spikes(nominal, spk, match)
        spikes.append(spk)
    return times, spikes


def _decay_event(stops: np.ndarray, times: np.ndarray, probe: np.ndarray) -> int | None:
    """Event whose averaged response is fitted for the connection's decay.

    The event followed by the longest window (median over sweeps); on a tie the probe
    (it follows a long recovery, so it sits on a flat baseline), else the earliest event
    (the only one not riding on an earlier response's decay).
    """
    lengths = stops - times
    med = np.array([np.median(c[np.isfinite(c)]) if np.isfinite(c).any() else -np.inf for c in lengths.T])
    if med.size == 0 or not np.isfinite(med).any():
        return None
    longest = np.nonzero(np.isclose(med, med.max(), rtol=0, atol=1e-9))[0]
    probes = [k for k in longest if probe[k]]
    return int(probes[0] if probes else longest[0])


def collect_responses(plan: "Plan", recordings: "Recordings",
                      measure: "MeasurePlan") -> tuple[pd.DataFrame, pd.DataFrame]:
    """Run one ``responses to SOURCE`` measure.

    Args:
        plan: the plan; ``measure.cell`` is the postsynaptic role, ``measure.source`` the
            presynaptic one.
        recordings: the run's recordings.
        measure: the measure (options in SI: window, baseline, threshold, current_threshold,
            noise_factor). The failure floor is ``threshold`` (V) for a membrane-potential
            trace and ``current_threshold`` (A) for a clamp-current trace (see
            :func:`trace_unit`).

    Returns:
        ``(responses, connections)`` DataFrames (columns: :func:`response_columns`,
        :func:`connection_columns` plus ratio and per-event amplitude columns), in mV for a
        membrane-potential trace and pA for a clamp current.

    Raises:
        AssertionError: internal errors (see :func:`collect`).
    """
    opts = _options(measure)
    window, baseline = opts["window"], opts["baseline"]
    noise_factor = opts["noise_factor"]
    if measure.source is None:
        raise AssertionError("internal error: a responses measure without a source reached collect()")
    post = _role(plan, measure.cell)
    pre = _role(plan, measure.source)
    syn = _synapse(plan, pre.name, post.name)
    if post.name not in recordings.traces:
        raise AssertionError(f"internal error: role {post.name!r} is measured but has no recorded trace")
    # A clamp current is measured like a potential; only the unit and the floor differ.
    unit = trace_unit(recordings, post.name)
    u, scale = unit.label, unit.scale
    threshold = opts[unit.floor_option]
    traces = np.asarray(recordings.traces[post.name], dtype=float)
    dt = float(recordings.sample_dt)
    t0 = float(recordings.time[0]) if len(recordings.time) else 0.0
    t_end = t0 + traces.shape[-1] * dt

    events = sorted(pre.events, key=lambda e: e.time)
    nominal = np.array([e.time for e in events], dtype=float)
    probe = np.array([e.probe for e in events], dtype=bool)
    train = [k for k in range(len(events)) if not probe[k]]
    first_nominal = float(nominal.min()) if nominal.size else math.nan

    response_rows: list[dict] = []
    connection_rows: list[dict] = []
    for r in range(plan.n_repeat):
        times, spikes = event_matrix(plan, recordings, pre, r, nominal)
        bounds = np.where(np.isfinite(times), times, nominal[None, :])
        stops = np.array([F.window_stops(times[s], window, t_end, bounds[s]) for s in range(plan.n_sweeps)])
        sign = F.connection_sign(traces[r], dt, times, stops, baseline=baseline, t0=t0) if nominal.size else 1.0
        amp = np.full(times.shape, np.nan)
        fail = np.zeros(times.shape, dtype=bool)
        lat = np.full(times.shape, np.nan)
        rise = np.full(times.shape, np.nan)
        noises, extra_total = [], 0
        base_row = _pair_ids(plan, syn, pre, post, r)
        for s in range(plan.n_sweeps):
            finite = times[s][np.isfinite(times[s])]
            first = min(first_nominal, float(finite.min())) if finite.size else first_nominal
            feats, noise, level = F.sweep_features(
                traces[r, s], dt, times[s], stops[s], sign=sign, baseline=baseline, threshold=threshold,
                noise_factor=noise_factor, first_event=first, t0=t0)
            noises.append(noise)
            spk = spikes[s]
            for k, (ev, f) in enumerate(zip(events, feats)):
                has_spike = bool(np.isfinite(times[s, k]))
                start = times[s, k] if has_spike else nominal[k]
                stop = stops[s, k] if has_spike else min(nominal[k] + window, t_end)
                in_window = int(np.count_nonzero((spk >= start) & (spk < stop)))
                extra = 0 if pre.spike_times is not None else max(in_window - int(has_spike), 0)
                extra_total += extra
                amp[s, k], fail[s, k] = f.amplitude, f.failure
                lat[s, k], rise[s, k] = f.latency, f.rise_20_80
                response_rows.append({
                    **base_row, "sweep": s, "event": ev.index, "kind": ev.kind, "probe": bool(ev.probe),
                    "nominal_time_ms": ev.time * MS, "event_time_ms": times[s, k] * MS,
                    "presynaptic_spike": has_spike, "extra_pre_spikes": extra,
                    "window_ms": f.window * MS, "sign": int(sign), f"noise_sd_{u}": noise * scale,
                    f"failure_level_{u}": level * scale, f"baseline_{u}": f.baseline * scale,
                    f"amplitude_{u}": f.amplitude * scale, "failure": f.failure if f.measured else None,
                    "latency_ms": f.latency * MS, "rise_20_80_ms": f.rise_20_80 * MS,
                    "time_to_peak_ms": f.time_to_peak * MS, "decay_tau_ms": f.decay_tau * MS,
                    f"area_{u}_ms": f.area * scale * MS,
                })
        metrics = F.connection_metrics(amp, fail, lat, rise, probe=probe)
        k_decay = _decay_event(stops, times, probe) if nominal.size else None
        tau = math.nan
        if k_decay is not None:
            avg, _n = F.averaged_response_features(traces[r], dt, times[:, k_decay], stops[:, k_decay],
                                                   sign=sign, baseline=baseline, t0=t0)
            tau = avg.decay_tau
        row = {
            **base_row,
            "pre_class": pre.cell_class, "post_class": post.cell_class,
            "distance_um": float(np.linalg.norm(np.asarray(post.positions[r], dtype=float)
                                                - np.asarray(pre.positions[r], dtype=float))) * UM,
            # imported recordings do not know their release sites (-1 in the recorded plan): empty
            "n_release_sites": int(syn.n_sites[r]) if syn.n_sites[r] >= 0 else None, "sign": int(sign),
            "n_sweeps": metrics["n_sweeps"], "n_events": int(nominal.size),
            "pre_spikes_missing": int(np.count_nonzero(~np.isfinite(times))),
            "extra_pre_spikes": extra_total,
            f"noise_sd_{u}": _nanmedian(noises) * scale,
            f"amplitude_mean_{u}": _at(metrics["amplitude_mean"], metrics["first"]) * scale,
            f"amplitude_sd_{u}": _at(metrics["amplitude_sd"], metrics["first"]) * scale,
            "cv": metrics["cv"], "failure_rate": metrics["failure_rate"],
            "latency_ms": metrics["latency"] * MS, "rise_20_80_ms": metrics["rise_20_80"] * MS,
            "decay_tau_ms": tau * MS,
            "decay_event": events[k_decay].index if k_decay is not None else None,
            "ppr": metrics["ppr"],
        }
        for k in train[2:]:
            row[f"ratio_{events[k].index}_{events[train[0]].index}"] = float(metrics["ratios"][k])
        row["recovery_ratio"] = metrics["recovery_ratio"]
        for k, ev in enumerate(events):
            row[f"event_{ev.index}_amplitude_{u}"] = float(metrics["amplitude_mean"][k]) * scale
        connection_rows.append(row)

    responses = pd.DataFrame(response_rows, columns=response_columns(u))
    responses["failure"] = responses["failure"].astype("boolean")
    connections = pd.DataFrame(connection_rows)
    if connections.empty:
        connections = pd.DataFrame(columns=connection_columns(u))
    connections["decay_event"] = connections["decay_event"].astype("Int64")
    return responses, connections


def _pair_ids(plan: "Plan", syn: "SynapsePlan", pre: "RolePlan", post: "RolePlan", r: int) -> dict:
    return {"pathway": syn.pathway, "synapse": syn.name, "pre": pre.name, "post": post.name,
            "repeat": r, "pre_id": int(pre.cell_ids[r]), "post_id": int(post.cell_ids[r]),
            "connected": bool(syn.connected[r])}


def _at(values: np.ndarray, k: int | None) -> float:
    return float(values[k]) if k is not None else math.nan


def _nanmedian(values: list[float]) -> float:
    arr = np.asarray(values, dtype=float)
    arr = arr[np.isfinite(arr)]
    return float(np.median(arr)) if arr.size else math.nan


def _order_connection_columns(df: pd.DataFrame) -> pd.DataFrame:
    """Fixed columns first, then ratios in event order, recovery, per-event amplitudes."""
    def event_number(col: str) -> int:
        return int(col.split("_")[1])

    ratios = sorted((c for c in df.columns if c.startswith("ratio_")), key=event_number)
    amps = sorted((c for c in df.columns if c.startswith("event_") and c.endswith(_AMPLITUDE_SUFFIXES)),
                  key=lambda c: (event_number(c), c))
    # each unit-carrying column in its place, once per trace unit
    fixed = [c.replace("_mV", f"_{u.label}") for c in connection_columns("mV")
             for u in (TRACE_UNITS.values() if "_mV" in c else [TRACE_UNITS["V"]])]
    order = [c for c in fixed if c in df.columns] + ratios
    order += ["recovery_ratio"] if "recovery_ratio" in df.columns else []
    order += amps
    rest = [c for c in df.columns if c not in order]
    return df[order + rest]


def _pathway_metrics(connections: pd.DataFrame) -> list[str]:
    amplitudes = [f"amplitude_{k}_{u.label}" for u in TRACE_UNITS.values() for k in ("mean", "sd")]
    fixed = ["distance_um", "n_release_sites", *amplitudes, "cv", "failure_rate",
             "latency_ms", "rise_20_80_ms", "decay_tau_ms", "ppr"]
    extra = [c for c in connections.columns
             if c.startswith("ratio_") or c == "recovery_ratio"
             or (c.startswith("event_") and c.endswith(_AMPLITUDE_SUFFIXES))]
    return [c for c in fixed if c in connections.columns] + extra


def summarise_pathways(connections: pd.DataFrame) -> pd.DataFrame:
    """One row per pathway: mean, SD (ddof=1) and n over its connected pairs of every metric.

    Args:
        connections: the ``connections`` table.

    Returns:
        DataFrame with ``pathway, pre_class, post_class, n_pairs_tested, n_pairs`` and
        ``<metric>_mean``, ``<metric>_sd``, ``<metric>_n`` per connection metric; ``n``
        counts the connected pairs where the metric is defined (not NaN). Unconnected
        pairs count only in ``n_pairs_tested``.
    """
    metrics = _pathway_metrics(connections)
    rows = []
    for pathway, group in connections.groupby("pathway", sort=False):
        linked = group[group["connected"].astype(bool)]
        row = {"pathway": pathway,
               "pre_class": group["pre_class"].iloc[0], "post_class": group["post_class"].iloc[0],
               "n_pairs_tested": int(len(group)), "n_pairs": int(len(linked))}
        for m in metrics:
            vals = pd.to_numeric(linked[m], errors="coerce").to_numpy(dtype=float)
            vals = vals[np.isfinite(vals)]
            row[f"{m}_mean"] = float(np.mean(vals)) if vals.size else math.nan
            row[f"{m}_sd"] = float(np.std(vals, ddof=1)) if vals.size > 1 else math.nan
            row[f"{m}_n"] = int(vals.size)
        rows.append(row)
    columns = PATHWAY_KEYS + [f"{m}_{s}" for m in metrics for s in ("mean", "sd", "n")]
    return pd.DataFrame(rows, columns=columns)


def collect_spikes(plan: "Plan", recordings: "Recordings", measure: "MeasurePlan") -> pd.DataFrame:
    """Run one ``spikes`` measure: spike count, first spike and rate per repeat and sweep.

    Args:
        plan: the plan (``sweep_length`` is the rate's time base).
        recordings: the run's recordings.
        measure: the measure (``measure.cell`` is the role).

    Returns:
        DataFrame with :data:`SPIKE_COLUMNS`.

    Raises:
        AssertionError: the role's spikes were not recorded (internal error).
    """
    role = _role(plan, measure.cell)
    if role.name not in recordings.spikes:
        raise AssertionError(f"internal error: spikes of role {role.name!r} were not recorded")
    rows = []
    for r in range(plan.n_repeat):
        for s in range(plan.n_sweeps):
            spk = np.asarray(recordings.spikes[role.name][r][s], dtype=float)
            rows.append({"role": role.name, "cell_class": role.cell_class, "repeat": r,
                         "cell_id": int(role.cell_ids[r]), "sweep": s, "n_spikes": int(spk.size),
                         "first_spike_ms": float(spk.min()) * MS if spk.size else math.nan,
                         "rate_Hz": spk.size / plan.sweep_length})
    return pd.DataFrame(rows, columns=SPIKE_COLUMNS)
