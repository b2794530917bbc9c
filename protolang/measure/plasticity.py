"""The `plasticity` collector: a plan's responses to a presynaptic train in, fitted Tsodyks-Markram parameters out.

Per connected pair (repeat) the amplitudes of its responses (sweeps x presynaptic spikes, the
``responses`` measure's own definitions) are fitted by :func:`protolang.measure.stp_fit.fit_tm`
at the nominal spike times, with bootstrap intervals over sweeps; a ``pathway`` row fits the
responses of all its connections pooled as sweeps. A fit that does not converge says so and
gives no parameters. Table ``plasticity``: ``scope`` ("connection" or "pathway"), pathway,
repeat, cells, then the columns of :func:`protolang.measure.stp_fit.summary_columns`.
Brian2 is never imported here.
"""

from __future__ import annotations

from dataclasses import replace
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from . import stp_fit as S
from .collect import collect_responses, trace_unit
from .registry import option_defaults

if TYPE_CHECKING:
    from ..engine.recordings import Recordings
    from ..plan.model import MeasurePlan, Plan


def _matrix(group: pd.DataFrame, column: str, n_sweeps: int, n_events: int) -> np.ndarray:
    """(n_sweeps, n_events) amplitudes of one connection, failures included (as measured)."""
    out = np.full((n_sweeps, n_events), np.nan)
    out[group["sweep"].to_numpy(int), group["event"].to_numpy(int) - 1] = group[column].to_numpy(float)
    return out


def collect_plasticity(plan: "Plan", recordings: "Recordings", measure: "MeasurePlan") -> pd.DataFrame:
    """Run one ``plasticity to SOURCE`` measure.

    Args:
        plan: the plan (the source's nominal events give the spike times).
        recordings: the run's recordings.
        measure: option ``bootstrap`` (resamples of the sweeps; 0 for none).

    Returns:
        The ``plasticity`` DataFrame.
    """
    opts = dict(option_defaults("plasticity"), **measure.options)
    n_boot = int(round(opts["bootstrap"]))
    unit = trace_unit(recordings, measure.cell)
    # the responses are measured exactly as the `responses` collector measures them, with its defaults
    as_responses = replace(measure, collector="responses", options=option_defaults("responses"))
    responses, _ = collect_responses(plan, recordings, as_responses)
    column = f"amplitude_{unit.label}"
    times = np.array([e.time for e in plan.role(measure.source).events])
    n_events, n_sweeps = times.size, plan.n_sweeps
    rows, pooled = [], {}
    connected = responses[responses["connected"]]
    for (pathway, repeat), group in connected.groupby(["pathway", "repeat"], sort=True):
        amps = _matrix(group, column, n_sweeps, n_events) / unit.scale
        pooled.setdefault(pathway, []).append(amps)
        rows.append(_row("connection", pathway, int(repeat), group.iloc[0], times, amps, n_boot, plan.seed, unit)
                    | {"pre": measure.source, "post": measure.cell})
    for pathway, parts in pooled.items():
        amps = np.concatenate(parts, axis=0)
        rows.append(_row("pathway", pathway, -1, None, times, amps, n_boot, plan.seed, unit)
                    | {"pre": measure.source, "post": measure.cell})
    return pd.DataFrame(rows)


def _row(scope, pathway, repeat, first, times, amps, n_boot, seed, unit) -> dict:
    head = {"scope": scope, "pathway": pathway, "repeat": repeat,
            "pre_id": int(first["pre_id"]) if first is not None else -1,
            "post_id": int(first["post_id"]) if first is not None else -1}
    # Depression and facilitation first; a connection whose F the train cannot resolve (or a
    # 3-spike protocol, too short for four parameters) is refitted depression-only, and the
    # table says which model each row holds.
    for fit_F in ((True, False) if times.size >= 4 else (False,)):
        fit = S.fit_tm(times, amps, fit_F=fit_F)
        if fit.converged:
            break
    boot = None
    if fit.converged and n_boot > 0 and amps.shape[0] >= 2:
        boot = S.bootstrap_tm(times, amps, n_boot=n_boot, seed=int(seed) + max(repeat, 0), fit_F=fit.fit_F)
        fit = boot.fit
    row = head | S.summarise_fit(fit, boot, label=unit.label, scale=unit.scale)
    row["tm_model"] = "depression and facilitation" if fit.fit_F else "depression only"
    return row
