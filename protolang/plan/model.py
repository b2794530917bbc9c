"""Plan objects: the fully resolved experiment (SI numbers, concrete cells, waveforms, layout).

The plan is the contract between the front end and the Brian2 engine. Everything is
plain Python and numpy: no Brian2 here. Conventions:

* all values SI (s, V, A, S, F, mol/m^3 = mM, m);
* ``n_repeat`` independent instances of the selected cell group ("pairs");
  every per-instance array has shape ``(n_repeat,)``;
* in the ``replicas`` layout the engine simulates ``n_repeat * n_sweeps`` copies, replica
  index ``r = repeat * n_sweeps + sweep``; in the ``sequential`` layout it simulates
  ``n_repeat`` copies for ``n_sweeps * interval`` of continuous time.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field, fields, is_dataclass

import numpy as np


@dataclass
class StimulusEvent:
    """One nominal presynaptic event (a pulse onset or an explicit spike), sweep time in s."""

    time: float
    index: int          # 1-based event number within the sweep
    item: int           # 0-based index of the stimulus line that made it
    kind: str           # "pulse" | "train" | "spike"
    probe: bool = False  # a lone pulse after a train: used for the recovery ratio


@dataclass
class CurrentPulse:
    """A square current pulse (A) from ``start`` for ``duration`` seconds."""

    start: float
    duration: float
    amplitude: float


@dataclass
class WaveSegment:
    """A deterministic stimulus segment on [start, stop) (s), rendered by ``plan.waveforms``.

    ``kind``: "square" (``amplitude``), "ramp" (``amplitude`` -> ``amplitude_end``), "sine"
    (``amplitude`` x sin(2 pi ``frequency`` t) + ``offset``), "chirp" (frequency rising linearly
    from ``frequency`` to ``frequency_end``). Amplitudes are currents (A) in current clamp and
    command offsets from the holding potential (V) in voltage clamp. ``per_sweep`` (n_sweeps,)
    replaces ``amplitude`` sweep by sweep (a family of steps).
    """

    kind: str
    start: float
    stop: float
    amplitude: float = 0.0
    amplitude_end: float = 0.0
    frequency: float = 0.0
    frequency_end: float = 0.0
    offset: float = 0.0
    per_sweep: np.ndarray | None = None


@dataclass
class NoiseSpec:
    """Ornstein-Uhlenbeck input on [start, stop): a current (A) or, with ``reversal``, a conductance (S)."""

    mean: float
    sd: float
    tau: float
    start: float
    stop: float
    reversal: float | None = None
    # the ongoing drive of an embedded network (the same as its class's cells get)
    background: bool = False


@dataclass
class PoissonSpec:
    """Poisson spike input at ``rate`` (Hz) through ``receptor``, peak ``conductance`` (S) per spike."""

    rate: float
    conductance: float
    receptor: str
    start: float
    stop: float
    # the ongoing drive of an embedded network: on for the whole run, its events not recorded
    background: bool = False


@dataclass
class RolePlan:
    """One selected cell role (``pre``, ``post``...) across all repeats."""

    name: str
    cell_class: str
    model: str                                   # "adex" | "hh_cortical" | "hh_squid"
    cell_ids: np.ndarray                         # (n_repeat,) int, ids in the circuit
    positions: np.ndarray                        # (n_repeat, 3) m
    # model parameters, SI, each (n_repeat,); Hodgkin-Huxley roles also carry their rate
    # factors ("phi...", Q10^((T - T_ref)/10) at the bath temperature), set by the plan
    params: dict[str, np.ndarray]
    recorded: bool = False
    mode: str = "current clamp"                  # or "voltage clamp" or "off"
    holding_current: np.ndarray | None = None    # (n_repeat,) A, includes bias for a held potential
    holding_potential: float | None = None       # V, when holding was asked as a potential
    noise_sd: float = 0.0                        # V, Gaussian recording noise added to the trace
    pulses: list[CurrentPulse] = field(default_factory=list)
    spike_times: np.ndarray | None = None        # explicit firing times (s): the role is a spike source
    events: list[StimulusEvent] = field(default_factory=list)
    segments: list[WaveSegment] = field(default_factory=list)   # steps, ramps, sines, chirps, families
    noise: list[NoiseSpec] = field(default_factory=list)
    poisson: list[PoissonSpec] = field(default_factory=list)
    series_resistance: float | None = None       # Ohm, voltage clamp only
    # optional (n_repeat, n_sweeps) factor multiplying the rendered waveform of each cell and sweep
    # (a rheobase search gives every cell its own step currents with one unit-step waveform)
    amplitude_scale: np.ndarray | None = None
    silenced: bool = False                       # a lesion took away its spike generation


@dataclass
class ReceptorPlan:
    """Kinetics of one receptor type, shared by all synapses onto a cell (SI), at the bath
    temperature (the plan has already divided the circuit's rise and decay by the Q10 factor)."""

    name: str                 # "AMPA", "NMDA", "GABA_A"
    rise: float               # s
    decay: float              # s
    reversal: float           # V
    scale: float = 1.0        # 1 - blocked fraction
    mg_block: bool = False    # Jahr-Stevens magnesium block (NMDA)
    peak_factor: float = 1.0  # jump in x that gives a unit peak of g (see engine)


@dataclass
class SynapsePlan:
    """The connection ``pre -> post`` in every repeat."""

    name: str                          # "pre_to_post"
    pre: str
    post: str
    pathway: str                       # circuit pathway name, e.g. "pyramidal_deep->pyramidal_deep"
    connected: np.ndarray              # (n_repeat,) bool
    n_sites: np.ndarray                # (n_repeat,) int release sites
    site_conductance: np.ndarray       # (n_repeat,) S, peak conductance of one released site
    U: np.ndarray                      # (n_repeat,) release probability after the calcium law
    U_reference: np.ndarray            # (n_repeat,) U at the circuit's reference calcium
    D: np.ndarray                      # (n_repeat,) s recovery time constant
    F: np.ndarray                      # (n_repeat,) s facilitation time constant (0 = none)
    delay: np.ndarray                  # (n_repeat,) s, latency + distance / velocity
    receptors: dict[str, float]        # receptor -> relative peak conductance (AMPA 1.0, NMDA 0.4)
    stochastic: bool = True
    distance: np.ndarray | None = None           # (n_repeat,) m, soma to soma
    rule_probability: np.ndarray | None = None   # (n_repeat,) the circuit rule's p at that distance


@dataclass
class PatchPlan:
    """A multi-cell patch: its cells (roles, in order), and how far apart their turns are."""

    name: str
    cell_class: str
    members: list[str]
    radius: float                      # m
    turn: float                        # s between the turns of consecutive cells (0: never stimulated)
    pathway: str | None                # the circuit pathway between its cells, if any


@dataclass
class ActivationPlan:
    """Extracellular activation: a fraction of a class's cells that project to ``target`` fire at ``times``.

    One entry per activated source cell (``M`` of them over all repeats); connection arrays have
    shape ``(M,)`` and follow :class:`SynapsePlan`'s meaning.
    """

    name: str
    target: str
    cell_class: str
    pathway: str
    fraction: float
    times: np.ndarray                  # s, sweep time
    source_repeat: np.ndarray          # (M,) repeat index each source belongs to
    source_ids: np.ndarray             # (M,) circuit ids
    n_sites: np.ndarray
    site_conductance: np.ndarray
    U: np.ndarray
    U_reference: np.ndarray
    D: np.ndarray
    F: np.ndarray
    delay: np.ndarray
    receptors: dict[str, float]
    stochastic: bool = True


@dataclass
class LesionRecord:
    """What one lesion line did: counts per class and pathway, and the exact cells removed.

    ``removed_ids`` lists circuit ids: for a lesion relative to a selected cell, one list per
    repeat (the cells around that repeat's cell); otherwise one list for the whole circuit.
    Connection counts are circuit connections (pre -> post cell pairs) of the whole circuit,
    plus those of the simulated network in embedded mode.
    """

    text: str
    kind: str                                    # "remove" | "cut" | "silence" | "scale"
    span: str
    cells: dict[str, int] = field(default_factory=dict)          # class -> cells removed/silenced
    connections: dict[str, int] = field(default_factory=dict)    # pathway -> connections removed/scaled
    factor: float | None = None
    removed_ids: list = field(default_factory=list)
    per_repeat: bool = False


@dataclass
class PopulationPlan:
    """The simulated cells of an embedded network besides the selected ones, every repeat's copy.

    Cells are ordered by class (file order), then repeat, then circuit id, so each class is one
    contiguous block. Arrays have shape (M,).
    """

    model: str                                   # "adex"
    class_names: list[str]
    class_index: np.ndarray                      # (M,) index into class_names
    repeat: np.ndarray                           # (M,) the repeat whose subcircuit holds the cell
    cell_ids: np.ndarray                         # (M,) circuit ids
    positions: np.ndarray                        # (M, 3) m
    params: dict[str, np.ndarray]
    silenced: np.ndarray                         # (M,) bool

    @property
    def size(self) -> int:
        return int(self.cell_ids.shape[0])


@dataclass
class EdgeSet:
    """Circuit connections of one receptor set between two endpoints of an embedded network.

    An endpoint is ``"network"`` (index into the population) or a role name (index = repeat).
    Parameters per connection follow :class:`SynapsePlan`; ``weights`` gives each receptor's
    relative peak conductance per connection (pathways sharing a receptor set differ in it).
    """

    name: str
    pre: str
    post: str
    pre_index: np.ndarray
    post_index: np.ndarray
    pathway: np.ndarray                          # (K,) index into NetworkPlan.pathways
    n_sites: np.ndarray
    site_conductance: np.ndarray
    U: np.ndarray
    U_reference: np.ndarray
    D: np.ndarray
    F: np.ndarray
    delay: np.ndarray
    weights: dict[str, np.ndarray]
    stochastic: bool = True

    @property
    def size(self) -> int:
        return int(self.pre_index.shape[0])


@dataclass
class BackgroundPlan:
    """Ongoing drive of every simulated cell of ``classes`` for the whole run."""

    kind: str                                    # "poisson" | "noise"
    classes: list[str]
    rate: float = 0.0                            # Hz (poisson)
    conductance: float = 0.0                     # S per input spike (poisson)
    receptor: str = ""
    mean: float = 0.0                            # A or S (noise)
    sd: float = 0.0
    tau: float = 0.0
    reversal: float | None = None


@dataclass
class NetworkPlan:
    """Embedded mode: the subcircuit simulated around the selected cells."""

    region: str
    population: PopulationPlan
    edges: list[EdgeSet]
    background: list[BackgroundPlan]
    pathways: list[str]
    counts: dict                                 # summary: cells per class, connections per pathway
    memory_estimate: float                       # bytes, before building
    memory_limit: float

    def to_plain(self) -> dict:
        """A summary for plan.json: counts, not the (possibly million-long) arrays."""
        return {"region": self.region, "cells": self.population.size,
                "connections": int(sum(e.size for e in self.edges)),
                "release_sites": int(sum(int(np.sum(e.n_sites)) for e in self.edges)),
                "edge_sets": {e.name: e.size for e in self.edges},
                "background": _plain(self.background), "counts": _plain(self.counts),
                "memory_estimate_GB": round(self.memory_estimate / 1e9, 3),
                "memory_limit_GB": round(self.memory_limit / 1e9, 3)}


@dataclass
class MeasurePlan:
    cell: str
    collector: str
    source: str | None
    options: dict[str, float]          # SI values
    span: str = ""


@dataclass
class Plan:
    title: str
    protocol_file: str
    protocol_hash: str
    circuit_file: str
    circuit_hash: str
    seed: int
    dt: float
    sample_dt: float
    sweep_length: float
    n_sweeps: int
    interval: float
    n_repeat: int
    layout: str                        # "replicas" | "sequential"
    layout_reason: str
    mode: str                          # "isolated" | "embedded"
    conditions: dict[str, float | str | dict]
    roles: list[RolePlan]
    receptors: dict[str, ReceptorPlan]
    synapses: list[SynapsePlan]
    measures: list[MeasurePlan]
    spans: dict[str, str] = field(default_factory=dict)   # Brian2 object name -> "file:line:col"
    activations: list[ActivationPlan] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    lesions: list[LesionRecord] = field(default_factory=list)
    network: NetworkPlan | None = None
    patches: list[PatchPlan] = field(default_factory=list)
    # published references (protolang.plan.references.reference_plans), in table-column units
    references: list[dict] = field(default_factory=list)

    def role(self, name: str) -> RolePlan:
        for r in self.roles:
            if r.name == name:
                return r
        raise KeyError(name)

    @property
    def n_replicas(self) -> int:
        return self.n_repeat * self.n_sweeps if self.layout == "replicas" else self.n_repeat

    def to_dict(self) -> dict:
        return _plain(self)

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), indent=1, sort_keys=False)


def _plain(obj):
    if hasattr(obj, "to_plain"):
        return obj.to_plain()
    if is_dataclass(obj):
        return {f.name: _plain(getattr(obj, f.name)) for f in fields(obj)}
    if isinstance(obj, dict):
        return {str(k): _plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, np.generic):
        return obj.item()
    return obj
