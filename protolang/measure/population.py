"""The `activity` collector: a Plan and its Recordings' population spikes in, per-class activity tables out.

For every repeat's copy of the embedded network and every sweep, the analysed stretch is
``[sweep start + discard, sweep end)`` of run time; the measures are those of
:mod:`protolang.measure.network` (rates, ISI CV, Golomb's synchrony chi, spike-count
correlation, population bursts, state label). Tables: ``populations`` (one row per repeat,
sweep and class, plus an all-cells row) and ``bursts`` (one row per detected burst). Brian2 is
never imported here.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from . import network as N
from .registry import option_defaults

if TYPE_CHECKING:
    from ..engine.recordings import Recordings
    from ..plan.model import MeasurePlan, Plan


def analysis_windows(recordings: "Recordings", discard: float) -> list[tuple[int, float, float]]:
    """(sweep, start, stop) in run time of every sweep's analysed stretch."""
    pop = recordings.population
    out = []
    for s in range(recordings.n_sweeps):
        start = s * pop["interval"] + discard
        stop = s * pop["interval"] + pop["sweep_length"]
        out.append((s, start, stop))
    return out


def collect_activity(plan: "Plan", recordings: "Recordings", measure: "MeasurePlan"
                     ) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Run one ``activity`` measure.

    Args:
        plan: the plan (embedded mode).
        recordings: the run's recordings with ``population`` spikes.
        measure: options ``discard`` (s skipped at each sweep's start) and ``bin`` (s, count bin of
            the synchrony measure and the spike-count correlation).

    Returns:
        ``(populations, bursts)`` DataFrames.

    Raises:
        AssertionError: no population spikes in the recordings, or a discard as long as the sweep
            (the front end rules both out).
    """
    opts = dict(option_defaults("activity"), **measure.options)
    pop = recordings.population
    if not pop:
        raise AssertionError("internal error: an activity measure without population recordings")
    discard, width = float(opts["discard"]), float(opts["bin"])
    if discard >= pop["sweep_length"]:
        raise AssertionError("internal error: the activity window is empty (discard >= sweep length)")
    times, cells = np.asarray(pop["times"], float), np.asarray(pop["cells"], np.int64)
    names = np.asarray(pop["class_names"], dtype=object)[np.asarray(pop["class_index"])]
    repeat = np.asarray(pop["repeat"])
    rows, bursts = [], []
    for r in np.unique(repeat):
        members = np.flatnonzero(repeat == r)
        local = np.full(repeat.size, -1, dtype=np.int64)
        local[members] = np.arange(members.size)
        mine = local[cells] >= 0
        t_r, c_r = times[mine], local[cells[mine]]
        for sweep, start, stop in analysis_windows(recordings, discard):
            table = N.summarise_population(t_r, c_r, names[members], start, stop, count_bin=width, state_bin=width)
            # repeats and sweeps count from 0, as in every other table
            table.insert(0, "sweep", sweep)
            table.insert(0, "repeat", int(r))
            rows.append(table)
            b = N.population_bursts(t_r, c_r, members.size, start, stop)
            if len(b):
                b = b.copy()
                b.insert(0, "sweep", sweep)
                b.insert(0, "repeat", int(r))
                # burst times relative to the sweep start, as every other sweep time in the tables
                for col in ("start_ms", "stop_ms", "peak_time_ms"):
                    if col in b:
                        b[col] = b[col] - (start - discard) * 1e3
                bursts.append(b)
    populations = pd.concat(rows, ignore_index=True)
    populations.insert(2, "discard_ms", discard * 1e3)
    burst_table = pd.concat(bursts, ignore_index=True) if bursts else pd.DataFrame(
        columns=["repeat", "sweep", *N.BURST_COLUMNS])
    return populations, burst_table
