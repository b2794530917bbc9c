"""Recordings: the engine's output (and an importer's), plain numpy arrays per cell and sweep.

No Brian2 here, so result collectors and importers of real data share this type.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np


@dataclass
class Recordings:
    """Traces and spike times of one run.

    Attributes:
        sample_dt: sampling interval of the traces (s).
        time: (n_samples,) sweep time of each sample (s), starting at 0.
        traces: role -> (n_repeat, n_sweeps, n_samples), recorded roles only: the membrane
            potential (V) in current clamp; in voltage clamp the clamp current (A) the
            amplifier passes into the cell, (V_cmd - v)/Rs, which at steady state equals the
            cell's net membrane current, so inward currents (an EPSC at -70 mV) are negative.
            ``meta["trace_units"]`` gives "V" or "A" per role.
        spikes: role -> list over repeats of list over sweeps of spike-time arrays (s, sweep time).
        release: synapse name -> (n_repeat, n_sweeps, n_spikes) released amount per presynaptic
            spike (number of sites released if stochastic, n_sites * u * R if deterministic);
            filled only when the engine is asked to record release.
        inputs: input name -> list over repeats of list over sweeps of event-time arrays (s,
            sweep time, sorted): the events of each Poisson input (``<role>_poisson_<k>``) and
            the source spikes of each extracellular activation (its plan name; one event per
            activated source and activation time, before the synaptic delay).
        meta: engine facts (target, wall time, layout, versions, trace units).
        population: spikes of the embedded network's population (empty in isolated mode):
            ``times`` (s, run time) and ``cells`` (index into the population) of every spike,
            per-cell ``class_names``/``class_index``, ``repeat`` and ``cell_ids``, and the run's
            ``interval`` and ``sweep_length`` (s), which place sweep ``s`` at
            ``[s*interval, s*interval + sweep_length)`` of run time.
    """

    sample_dt: float
    time: np.ndarray
    traces: dict[str, np.ndarray]
    spikes: dict[str, list[list[np.ndarray]]]
    release: dict[str, np.ndarray] = field(default_factory=dict)
    meta: dict = field(default_factory=dict)
    inputs: dict[str, list[list[np.ndarray]]] = field(default_factory=dict)
    population: dict = field(default_factory=dict)

    @property
    def n_repeat(self) -> int:
        return next(iter(self.traces.values())).shape[0] if self.traces else len(next(iter(self.spikes.values())))

    @property
    def n_sweeps(self) -> int:
        return next(iter(self.traces.values())).shape[1] if self.traces else len(next(iter(self.spikes.values()))[0])
