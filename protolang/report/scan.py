"""Scan runs: per-point results in, combined tables with scan columns and measure-vs-value figures out.

A scanned run folder holds ``points/NN/`` (a complete run folder per point), the combined
tables in ``tables/`` (every row carries the point's values in ``scan_<name>_<unit>`` columns)
and ``figures/scan_*.png`` plotting the main measures against the first scanned value.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np

from .write import _json_default, _new_figure, _save_figure, _write_text, write_recordings_npz, write_run, write_tables

# (table, column, axis label) of the measures plotted against a scanned value.
SCAN_MEASURES = (
    ("pathways", "amplitude_mean_mV_mean", "first response amplitude (mV)"),
    ("pathways", "amplitude_mean_pA_mean", "first response amplitude (pA)"),
    ("pathways", "ppr_mean", "paired-pulse ratio"),
    ("pathways", "failure_rate_mean", "failure rate of the first response"),
    ("pathways", "cv_mean", "CV of the first response"),
    ("spikes", "rate_Hz", "firing rate (Hz)"),
    ("populations", "synchrony_chi", "synchrony chi (Golomb)"),
    ("populations", "rate_mean_Hz", "population firing rate (Hz per cell)"),
    ("populations", "isi_cv_mean", "ISI CV"),
)


def scan_column(name: str, unit: str) -> str:
    """Column name of a scanned value: ``scan_<name>_<unit>`` (``%`` written ``pct``)."""
    unit = unit.replace("%", "pct").replace("/", "_per_")
    return f"scan_{name}_{unit}" if unit else f"scan_{name}"


def combine(point_tables: list[tuple[dict, dict]]) -> dict:
    """Concatenate per-point tables, prefixing each row with its point's scan columns.

    Args:
        point_tables: ``[(values, tables)]`` where values maps scan name -> Quantity.

    Returns:
        ``{table name: DataFrame}`` with ``point`` and ``scan_*`` columns first.
    """
    import pandas as pd

    names: list[str] = []
    for _, tables in point_tables:
        names.extend(n for n in tables if n not in names)
    out = {}
    for name in names:
        parts = []
        for k, (values, tables) in enumerate(point_tables):
            if name not in tables:
                continue
            df = tables[name].copy()
            cols = {"point": k + 1}
            cols.update({scan_column(n, q.unit): q.value for n, q in values.items()})
            for i, (col, v) in enumerate(cols.items()):
                df.insert(i, col, v)
            parts.append(df)
        out[name] = pd.concat(parts, ignore_index=True)
    return out


def write_scan(out_dir: str | os.PathLike, runs: list, tables: dict, provenance: dict) -> dict[str, Path]:
    """Write a scanned run folder.

    Args:
        out_dir: the folder (created if missing).
        runs: per point, an object with ``values`` (name -> Quantity), ``plan``, ``recordings``,
            ``tables``.
        tables: the combined tables (:func:`combine`).
        provenance: JSON-able facts about the whole run.

    Returns:
        ``{relative path: Path}`` of every file written.
    """
    prov_text = json.dumps(provenance, indent=1, default=_json_default)
    out = Path(out_dir)
    written = write_tables(out, tables)
    for k, run in enumerate(runs):
        sub = out / "points" / f"{k + 1:02d}"
        point_prov = dict(provenance, point=k + 1,
                          scan={n: str(q) for n, q in run.values.items()})
        for rel, path in write_run(sub, run.plan, run.recordings, run.tables, point_prov).items():
            written[f"points/{k + 1:02d}/{rel}"] = path
        written[f"points/{k + 1:02d}/recordings.npz"] = write_recordings_npz(sub, run.recordings)
    for rel, path in write_scan_figures(out / "figures", tables).items():
        written[f"figures/{rel}"] = path
    written["provenance.json"] = _write_text(out / "provenance.json", prov_text)
    return {k: p.resolve() for k, p in written.items()}


def write_scan_figures(fig_dir: str | os.PathLike, tables: dict) -> dict[str, Path]:
    """One figure per measure present: the measure (mean +- SD over rows) against the first scan column.

    With two or more scans, one line per value of the second scanned quantity.
    """
    fig_dir = Path(fig_dir)
    fig_dir.mkdir(parents=True, exist_ok=True)
    written = {}
    for table, column, label in SCAN_MEASURES:
        df = tables.get(table)
        if df is None or column not in df.columns:
            continue
        scans = [c for c in df.columns if c.startswith("scan_")]
        if not scans:
            continue
        x, group = scans[0], (scans[1] if len(scans) > 1 else None)
        keys = next(([k] for k in ("pathway", "role", "cell_class") if k in df.columns), [])
        fig = _new_figure(6.0, 4.0)
        ax = fig.add_subplot()
        for series_key, part in (df.groupby(keys + ([group] if group else []), sort=True) if keys or group
                                 else [((), df)]):
            sd_col = column[:-len("_mean")] + "_sd" if column.endswith("_mean") else None
            if sd_col in part.columns:
                # summary table: one row per point already; its SD is across connections
                stats = part[[x, column, sd_col]].rename(columns={column: "mean", sd_col: "std"})
            else:
                stats = part.groupby(x)[column].agg(["mean", "std", "count"]).reset_index()
            stats = stats[np.isfinite(stats["mean"])]
            if stats.empty:
                continue
            name = series_key if isinstance(series_key, str) else ", ".join(
                f"{g}" if not (isinstance(g, float)) else f"{group} = {g:g}"
                for g in (series_key if isinstance(series_key, tuple) else (series_key,)))
            ax.errorbar(stats[x], stats["mean"], yerr=stats["std"].fillna(0.0), marker="o", capsize=3,
                        label=name or None)
        if column == "synchrony_chi":
            from ..measure.network import SYNCHRONY_THRESHOLD

            ax.axhline(SYNCHRONY_THRESHOLD, color="0.5", linestyle="--", linewidth=0.8,
                       label=f"state threshold {SYNCHRONY_THRESHOLD:g}")
        name, _, unit = x[len("scan_"):].rpartition("_")
        ax.set_xlabel(f"@{name} ({unit})" if name else f"@{unit}")
        ax.set_ylabel(label)
        spread = {"pathways": "across connections", "populations": "across repeats and sweeps"}.get(
            table, "across cells and sweeps")
        ax.set_title(f"{label}: mean +- SD {spread}", fontsize=9)
        if ax.get_legend_handles_labels()[0]:
            ax.legend(fontsize=7)
        written[f"scan_{column}.png"] = _save_figure(fig, fig_dir / f"scan_{column}.png")
    return written
