"""Recordings: the engine's output (and an importer's), plain numpy arrays per cell and sweep.

No Brian2 here, so result collectors and importers of real data share this type.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np


@dataclass
class Recordings:
    """Voltage traces and spike times of one run.

    Attributes:
        sample_dt: sampling interval of the traces (s).
        time: (n_samples,) sweep time of each sample (s), starting at 0.
        traces: role -> (n_repeat, n_sweeps, n_samples) membrane potential (V), recorded roles only.
        spikes: role -> list over repeats of list over sweeps of spike-time arrays (s, sweep time).
        release: synapse name -> (n_repeat, n_sweeps, n_spikes) released amount per presynaptic
            spike (number of sites released if stochastic, n_sites * u * R if deterministic);
            filled only when the engine is asked to record release.
        meta: engine facts (target, wall time, layout, versions).
    """

    sample_dt: float
    time: np.ndarray
    traces: dict[str, np.ndarray]
    spikes: dict[str, list[list[np.ndarray]]]
    release: dict[str, np.ndarray] = field(default_factory=dict)
    meta: dict = field(default_factory=dict)

    @property
    def n_repeat(self) -> int:
        return next(iter(self.traces.values())).shape[0] if self.traces else len(next(iter(self.spikes.values())))

    @property
    def n_sweeps(self) -> int:
        return next(iter(self.traces.values())).shape[1] if self.traces else len(next(iter(self.spikes.values()))[0])
