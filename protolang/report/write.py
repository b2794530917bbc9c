"""Run folder writer: a plan, its recordings, tables and provenance in; CSV/Parquet tables, PNG figures and JSON files out.

Layout of one run folder::

    plan.json                  the resolved plan (Plan.to_json)
    provenance.json            versions, seeds, hashes, wall time (as given by the caller)
    tables/<table>.csv         every table, also as tables/<table>.parquet
    figures/<pathway>_sweeps.png   example connection: sweeps in grey, their average in black,
                                   presynaptic events marked; mean response across connections
    figures/<pathway>_summary.png  amplitude per event normalised to the first (mean +- SD over
                                   connections) and CV against mean first amplitude
    recordings.npz             raw traces and spikes (write_recordings_npz)

Every file is written under a temporary name in its own folder and moved into place
with ``os.replace``, so a reader never sees half a file. matplotlib is imported inside
the figure functions and draws on an Agg canvas (no pyplot, no global backend switch).
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import os
import re
import tempfile
from pathlib import Path
from typing import TYPE_CHECKING, Callable

import numpy as np

if TYPE_CHECKING:   # keep pandas, matplotlib and the engine out of import time
    import pandas as pd

    from ..engine.recordings import Recordings
    from ..plan.model import Plan

MS = 1e3
MV = 1e3
_TMP_PREFIX = ".partial-"


def _current_umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


_UMASK = _current_umask()


def atomic_write(path: str | os.PathLike, write: Callable[[str], None]) -> Path:
    """Write ``path`` through ``write(temp_path)`` and move the result into place.

    Args:
        path: final file path; its folder must exist.
        write: callable that writes the whole file to the temporary path it is given.

    Returns:
        ``path`` as a Path.

    Raises:
        Whatever ``write`` raises; the temporary file is removed first.
    """
    path = Path(path)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=_TMP_PREFIX + path.name + ".", suffix=".tmp")
    os.close(fd)
    try:
        write(tmp)
        os.chmod(tmp, 0o666 & ~_UMASK)  # mkstemp makes 0600; give the file the usual mode
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return path


def _write_text(path: Path, text: str) -> Path:
    def write(tmp: str) -> None:
        with open(tmp, "w", encoding="utf-8") as fh:
            fh.write(text)
            if not text.endswith("\n"):
                fh.write("\n")
    return atomic_write(path, write)


def _json_default(obj):
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, os.PathLike):
        return os.fspath(obj)
    if isinstance(obj, (_dt.datetime, _dt.date)):
        return obj.isoformat()
    raise TypeError(f"provenance value of type {type(obj).__name__} cannot be written as JSON")


def write_run(out_dir: str | os.PathLike, plan: "Plan", recordings: "Recordings",
              tables: dict[str, "pd.DataFrame"], provenance: dict) -> dict[str, Path]:
    """Write one run folder (layout in the module docstring).

    Args:
        out_dir: the run folder; created if missing, existing files are replaced.
        plan: the resolved plan.
        recordings: the run's recordings (for the figures).
        tables: ``{name: DataFrame}`` as returned by ``protolang.measure.collect.collect``.
        provenance: JSON-able facts about the run (numpy values and paths are converted).

    Returns:
        ``{path relative to out_dir (with '/'): absolute Path}`` of every file written.

    Raises:
        TypeError: a provenance value cannot be written as JSON.
        OSError: the folder cannot be written.
    """
    # Serialise first: a provenance that cannot be written must not leave half a run folder.
    prov_text = json.dumps(provenance, indent=1, default=_json_default)
    out = Path(out_dir)
    written = write_tables(out, tables)
    for rel, path in write_figures(out / "figures", plan, recordings, tables).items():
        written[f"figures/{rel}"] = path
    written["plan.json"] = _write_text(out / "plan.json", plan.to_json())
    written["provenance.json"] = _write_text(out / "provenance.json", prov_text)
    return {k: p.resolve() for k, p in written.items()}


def write_tables(out_dir: str | os.PathLike, tables: dict[str, "pd.DataFrame"]) -> dict[str, Path]:
    """Write each table as ``out_dir/tables/<name>.csv`` and ``.parquet``, atomically.

    Returns:
        ``{"tables/<name>.csv": Path, ...}``.
    """
    table_dir = Path(out_dir) / "tables"
    table_dir.mkdir(parents=True, exist_ok=True)
    written: dict[str, Path] = {}
    for name, df in tables.items():
        written[f"tables/{name}.csv"] = atomic_write(
            table_dir / f"{name}.csv", lambda tmp, df=df: df.to_csv(tmp, index=False))
        written[f"tables/{name}.parquet"] = atomic_write(
            table_dir / f"{name}.parquet", lambda tmp, df=df: df.to_parquet(tmp, index=False, engine="pyarrow"))
    return written


def slug(name: str) -> str:
    """File-name form of a pathway name: ``pyramidal_deep->basket_fast`` -> ``pyramidal_deep_to_basket_fast``."""
    text = name.replace("->", "_to_")
    text = re.sub(r"[^A-Za-z0-9_.-]+", "_", text).strip("_.")
    return text or "pathway"


def _new_figure(width: float, height: float):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=110, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _save_figure(fig, path: Path) -> Path:
    return atomic_write(path, lambda tmp: fig.savefig(tmp, format="png"))


def write_figures(fig_dir: str | os.PathLike, plan: "Plan", recordings: "Recordings",
                  tables: dict[str, "pd.DataFrame"]) -> dict[str, Path]:
    """Draw the per-pathway figures (needs the ``connections`` and ``responses`` tables).

    Args:
        fig_dir: folder for the PNG files (created).
        plan: the plan (nominal event times).
        recordings: traces for the example and mean responses.
        tables: the collected tables.

    Returns:
        ``{file name: Path}``; empty when there is no ``connections`` table.
    """
    written: dict[str, Path] = {}
    if plan.references and "comparison" in tables:
        from .comparison_figures import write_comparison_figures

        written.update(write_comparison_figures(Path(fig_dir), plan.references, tables))
    if recordings.population and "populations" in tables:
        written.update(_network_figures(Path(fig_dir), recordings, tables))
    if "patch_connectivity" in tables and len(tables["patch_connectivity"]):
        written.update(_patch_figures(Path(fig_dir), tables["patch_connectivity"]))
    if "connections" not in tables or "responses" not in tables or tables["connections"].empty:
        return written
    fig_dir = Path(fig_dir)
    fig_dir.mkdir(parents=True, exist_ok=True)
    connections, responses = tables["connections"], tables["responses"]
    for pathway, group in connections.groupby("pathway", sort=False):
        name = slug(str(pathway))
        resp = responses[responses["pathway"] == pathway]
        fig = _sweeps_figure(plan, recordings, group, resp, str(pathway))
        if fig is not None:
            written[f"{name}_sweeps.png"] = _save_figure(fig, fig_dir / f"{name}_sweeps.png")
        fig = _summary_figure(group, resp, str(pathway))
        written[f"{name}_summary.png"] = _save_figure(fig, fig_dir / f"{name}_summary.png")
    return written


def _network_figures(fig_dir: Path, recordings: "Recordings", tables: dict) -> dict[str, Path]:
    """Raster and population rate of the first repeat's network in its first analysed sweep."""
    from .network_figures import population_rate_figure, raster_figure

    pop = recordings.population
    fig_dir.mkdir(parents=True, exist_ok=True)
    first = tables["populations"].iloc[0]
    start = float(first["discard_ms"]) / 1e3
    stop = float(pop["sweep_length"])
    repeat = np.asarray(pop["repeat"])
    members = np.flatnonzero(repeat == repeat.min())
    local = np.full(repeat.size, -1, dtype=np.int64)
    local[members] = np.arange(members.size)
    cells = np.asarray(pop["cells"], dtype=np.int64)
    keep = local[cells] >= 0
    times, cells = np.asarray(pop["times"], float)[keep], local[cells[keep]]
    classes = np.asarray(pop["class_names"], dtype=object)[np.asarray(pop["class_index"])[members]]
    bursts = tables.get("bursts")
    if bursts is not None and len(bursts):
        bursts = bursts[(bursts["repeat"] == 0) & (bursts["sweep"] == 0)]
    return {"network_raster.png": raster_figure(fig_dir / "network_raster.png", times, cells, classes, start, stop),
            "network_rate.png": population_rate_figure(fig_dir / "network_rate.png", times, cells, classes,
                                                       start, stop, bursts=bursts)}


def _patch_figures(fig_dir: Path, table: "pd.DataFrame") -> dict[str, Path]:
    """Connection probability against distance per patch: sampled with its Wilson interval,
    the circuit rule's probability and the circuit's own fraction of the same pairs."""
    fig_dir.mkdir(parents=True, exist_ok=True)
    written = {}
    for patch, part in table.groupby("patch", sort=False):
        bins = part[(part["scope"] == "bin") & (part["pairs_tested"] > 0)]
        if bins.empty:
            continue
        mid = 0.5 * (bins["distance_from_um"] + bins["distance_to_um"])
        fig = _new_figure(6.0, 4.0)
        ax = fig.add_subplot()
        p = bins["probability"].to_numpy(dtype=float)
        err = np.vstack([p - bins["ci_low"].to_numpy(dtype=float), bins["ci_high"].to_numpy(dtype=float) - p])
        ax.errorbar(mid, p, yerr=err, marker="o", capsize=3, label="sampled (Wilson 95 %)")
        if "rule_probability" in bins:
            ax.plot(mid, bins["rule_probability"], "s--", label="circuit rule")
        if "circuit_probability" in bins:
            ax.plot(mid, bins["circuit_probability"], "^:", label="circuit, same pairs")
        for x, n in zip(mid, bins["pairs_tested"]):
            ax.annotate(f"n={int(n)}", (x, 0), textcoords="offset points", xytext=(0, 3), ha="center", fontsize=7)
        ax.set_xlabel("intersomatic distance (um)")
        ax.set_ylabel("connection probability")
        ax.set_ylim(bottom=0)
        ax.set_title(f"multi-cell patch {patch!r}: connections found by spike-triggered averages", fontsize=9)
        ax.legend(fontsize=7)
        name = f"patch_{slug(str(patch))}_probability.png"
        written[name] = _save_figure(fig, fig_dir / name)
    return written


# Unit of the amplitude columns -> (SI trace to that unit, what the trace is).
_TRACE_SCALE = {"mV": (MV, "membrane potential"), "pA": (1e12, "clamp current")}


def _unit(group: "pd.DataFrame") -> str:
    """Unit of the pathway's amplitude columns: pA for clamp currents (voltage clamp), else mV."""
    col = "amplitude_mean_pA"
    return "pA" if col in group.columns and group[col].notna().any() else "mV"


def _example_row(group: "pd.DataFrame"):
    """The connected pair whose mean first amplitude is nearest the pathway's median."""
    linked = group[group["connected"].astype(bool)]
    pool = linked if len(linked) else group
    amps = pool[f"amplitude_mean_{_unit(group)}"].to_numpy(dtype=float)
    if not np.isfinite(amps).any():
        return pool.iloc[0]
    med = float(np.nanmedian(amps))
    return pool.iloc[int(np.nanargmin(np.abs(amps - med)))]


def _sweeps_figure(plan, recordings, group, resp, pathway):
    ex = _example_row(group)
    pre, post = str(ex["pre"]), str(ex["post"])
    if post not in recordings.traces:
        return None
    unit = _unit(group)
    scale, quantity = _TRACE_SCALE[unit]
    traces = np.asarray(recordings.traces[post], dtype=float) * scale
    t = np.asarray(recordings.time, dtype=float) * MS
    try:
        nominal = np.array(sorted(e.time for e in plan.role(pre).events), dtype=float) * MS
    except KeyError:
        nominal = np.array([])
    windows = resp["window_ms"].to_numpy(dtype=float)
    tail = float(np.nanmax(windows)) if np.isfinite(windows).any() else 40.0
    if nominal.size:
        lo, hi = max(t[0], nominal[0] - 20.0), min(t[-1], nominal[-1] + tail + 10.0)
    else:
        lo, hi = t[0], t[-1]
    view = (t >= lo) & (t <= hi)
    pre_first = (t >= (nominal[0] - 10.0 if nominal.size else lo)) & (t < (nominal[0] if nominal.size else lo + 10.0))
    if not pre_first.any():
        pre_first = view

    fig = _new_figure(11.0, 4.2)
    ax_ex, ax_mean = fig.subplots(1, 2, sharex=True)
    sweeps = traces[int(ex["repeat"])]
    for sweep in sweeps:
        ax_ex.plot(t[view], sweep[view], color="0.78", lw=0.5)
    ax_ex.plot(t[view], sweeps.mean(axis=0)[view], color="black", lw=1.3, label=f"average of {len(sweeps)} sweeps")
    ax_ex.set_title(f"{pathway}\nexample pair {ex['pre_id']} -> {ex['post_id']} (repeat {ex['repeat']})", fontsize=9)
    ax_ex.set_ylabel(f"{post} {quantity} ({unit})")

    same = group[(group["pre"] == pre) & (group["post"] == post) & group["connected"].astype(bool)]
    averages = []
    for r in same["repeat"].astype(int):
        avg = traces[r].mean(axis=0)
        averages.append(avg - avg[pre_first].mean())
    if averages:
        stack = np.array(averages)
        mean = stack.mean(axis=0)
        ax_mean.plot(t[view], mean[view], color="black", lw=1.3)
        if len(averages) > 1:
            sd = stack.std(axis=0, ddof=1)
            ax_mean.fill_between(t[view], (mean - sd)[view], (mean + sd)[view], color="0.8", lw=0,
                                 label="± SD")
    ax_mean.set_title(f"mean of sweep averages over connected pairs (n = {len(averages)})", fontsize=9)
    ax_mean.set_ylabel(f"change from baseline ({unit})")
    for ax in (ax_ex, ax_mean):
        for tn in nominal:
            ax.axvline(tn, color="tab:red", lw=0.6, alpha=0.5)
        ax.set_xlabel("time in sweep (ms)")
        ax.spines[["top", "right"]].set_visible(False)
    ax_ex.legend(loc="upper right", fontsize=8, frameon=False)
    return fig


def _summary_figure(group, resp, pathway):
    unit = _unit(group)
    linked = group[group["connected"].astype(bool)]
    events = resp[["event", "probe"]].drop_duplicates().sort_values("event")
    train = [int(e) for e, p in zip(events["event"], events["probe"]) if not bool(p)]
    labels, means, sds, ns = [], [], [], []
    for e, p in zip(events["event"], events["probe"]):
        e = int(e)
        if bool(p):
            col, label = "recovery_ratio", f"{e}\n(probe)"
        elif train and e == train[0]:
            col, label = None, str(e)
        elif len(train) > 1 and e == train[1]:
            col, label = "ppr", str(e)
        else:
            col, label = f"ratio_{e}_{train[0]}", str(e)
        if col is None:
            vals = np.ones(int(np.isfinite(linked[f"amplitude_mean_{unit}"].to_numpy(dtype=float)).sum()))
        elif col in linked:
            vals = linked[col].to_numpy(dtype=float)
            vals = vals[np.isfinite(vals)]
        else:
            vals = np.array([])
        labels.append(label)
        means.append(float(vals.mean()) if vals.size else math.nan)
        sds.append(float(vals.std(ddof=1)) if vals.size > 1 else 0.0)
        ns.append(vals.size)

    fig = _new_figure(11.0, 4.2)
    ax_bar, ax_cv = fig.subplots(1, 2, width_ratios=[2, 1])
    x = np.arange(len(labels))
    ax_bar.bar(x, means, yerr=sds, color="0.6", edgecolor="black", capsize=3)
    ax_bar.axhline(1.0, color="black", lw=0.6, ls=":")
    ax_bar.set_xticks(x, labels)
    ax_bar.set_xlabel("presynaptic event")
    ax_bar.set_ylabel("amplitude / amplitude of response 1\n(mean ± SD over connections)")
    ax_bar.set_title(f"{pathway}: normalised amplitude, n = {len(linked)} connections", fontsize=9)

    amp = linked[f"amplitude_mean_{unit}"].to_numpy(dtype=float)
    cv = linked["cv"].to_numpy(dtype=float)
    ok = np.isfinite(amp) & np.isfinite(cv)
    ax_cv.scatter(amp[ok], cv[ok], s=14, color="black")
    ax_cv.set_xlabel(f"mean amplitude of response 1 ({unit})")
    ax_cv.set_ylabel("CV of response 1")
    ax_cv.set_title(f"CV against amplitude, n = {int(ok.sum())}", fontsize=9)
    for ax in (ax_bar, ax_cv):
        ax.spines[["top", "right"]].set_visible(False)
    return fig


def write_recordings_npz(out_dir: str | os.PathLike, recordings: "Recordings") -> Path:
    """Save the raw recordings as ``out_dir/recordings.npz`` (uncompressed; traces as float32).

    Traces are stored in single precision (0.01 uV resolution at -70 mV, far below any
    recording noise) and without compression: noisy traces barely compress and
    compressing hundreds of megabytes took longer than the simulation.

    Keys: ``time`` (s), ``sample_dt`` (s), ``trace__<role>`` ((n_repeat, n_sweeps,
    n_samples) V), ``spike_times__<role>`` (all spike times, s, repeat-major then sweep
    order) with ``spike_counts__<role>`` ((n_repeat, n_sweeps) spikes per sweep),
    ``release__<synapse>``, ``meta_json`` (the engine facts as JSON text) and, for an embedded
    run, ``population__<key>`` arrays with ``population_json`` (the population's spikes).

    Args:
        out_dir: the run folder (created if missing).
        recordings: the recordings.

    Returns:
        The path written.
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    arrays: dict[str, np.ndarray] = {
        "time": np.asarray(recordings.time, dtype=float),
        "sample_dt": np.asarray(recordings.sample_dt, dtype=float),
        "meta_json": np.asarray(json.dumps(recordings.meta, default=_json_default)),
    }
    for role, tr in recordings.traces.items():
        arrays[f"trace__{role}"] = np.asarray(tr, dtype=np.float32)
    for role, per_repeat in recordings.spikes.items():
        counts = np.array([[len(s) for s in sweeps] for sweeps in per_repeat], dtype=np.int64)
        flat = [np.asarray(s, dtype=float).ravel() for sweeps in per_repeat for s in sweeps]
        arrays[f"spike_counts__{role}"] = counts.reshape(len(per_repeat), -1)
        arrays[f"spike_times__{role}"] = np.concatenate(flat) if flat else np.zeros(0)
    for name, rel in recordings.release.items():
        arrays[f"release__{name}"] = np.asarray(rel)
    if recordings.population:
        arrays["population_json"] = np.asarray(json.dumps(
            {k: v for k, v in recordings.population.items() if not isinstance(v, np.ndarray)},
            default=_json_default))
        for k, v in recordings.population.items():
            if isinstance(v, np.ndarray):
                arrays[f"population__{k}"] = v

    def write(tmp: str) -> None:
        with open(tmp, "wb") as fh:
            np.savez(fh, **arrays)
    return atomic_write(out / "recordings.npz", write)


def read_recordings_npz(path: str | os.PathLike) -> "Recordings":
    """Load a file written by :func:`write_recordings_npz` back into :class:`Recordings`.

    Args:
        path: the ``recordings.npz`` file.

    Returns:
        The recordings (spike lists rebuilt per repeat and sweep).
    """
    from ..engine.recordings import Recordings

    with np.load(path, allow_pickle=False) as data:
        traces = {k[len("trace__"):]: data[k].astype(float) for k in data.files if k.startswith("trace__")}
        spikes = {}
        for key in data.files:
            if not key.startswith("spike_counts__"):
                continue
            role = key[len("spike_counts__"):]
            counts = data[key]
            flat = data[f"spike_times__{role}"]
            bounds = np.concatenate([[0], np.cumsum(counts.ravel())])
            pieces = [flat[bounds[i]:bounds[i + 1]] for i in range(counts.size)]
            n_sweeps = counts.shape[1]
            spikes[role] = [pieces[r * n_sweeps:(r + 1) * n_sweeps] for r in range(counts.shape[0])]
        release = {k[len("release__"):]: data[k] for k in data.files if k.startswith("release__")}
        population = {}
        if "population_json" in data.files:
            population = json.loads(str(data["population_json"]))
            population.update({k[len("population__"):]: data[k] for k in data.files if k.startswith("population__")})
        return Recordings(sample_dt=float(data["sample_dt"]), time=data["time"], traces=traces,
                          spikes=spikes, release=release, meta=json.loads(str(data["meta_json"])),
                          population=population)


def locate_protocol(prov: dict, folder: str | os.PathLike) -> Path | None:
    """The protocol file a run (or recording set) was made from, wherever the caller stands.

    Tries the path as recorded (relative to the working folder), the absolute path the run
    recorded (``protocol_path``), then (a moved project) the recorded path and its file name
    beside the folder and one level up. The caller checks the file's hash.

    Args:
        prov: the folder's provenance.
        folder: the run folder (or one point's folder).

    Returns:
        The first existing candidate, or None (also when the provenance names no file).
    """
    recorded = prov.get("protocol_file")
    if not recorded:
        return None
    path = Path(recorded)
    candidates = [path]
    if prov.get("protocol_path"):
        candidates.append(Path(prov["protocol_path"]))
    here = Path(folder)
    for base in (here.parent, here.parent.parent):
        if not path.is_absolute():
            candidates.append(base / path)
        candidates.append(base / path.name)
    return next((c for c in candidates if c.is_file()), None)
