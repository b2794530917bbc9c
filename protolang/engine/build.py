"""Network builder: takes a Plan and the brian2 module, hands out one explicit Brian2 Network of named objects with its monitors.

Cell models: adaptive exponential integrate-and-fire (forward Euler, spike cut and reset) and
the Hodgkin-Huxley-type models of :mod:`protolang.engine.models` (exponential Euler; a spike is
counted when v rises above 0 mV, and the cell stays refractory while v > 0 mV, so each spike
counts once). Temperature enters through the rate factors the plan puts in each role's
parameters and through the receptor time constants the plan has already scaled: the engine
applies no temperature scaling of its own.

Stimuli: every role's pulses and wave segments are rendered by
:func:`protolang.plan.waveforms.library` into one waveform library (a 2-D TimedArray of plain
numbers, one column per distinct waveform over all roles, never one per replica). In the
replicas layout each cell reads the column of its sweep through a per-cell index. In the
sequential layout the library is read at the time within the sweep, ``(t + dt/4) mod
interval``, and a role whose waveform changes from sweep to sweep finds its column in a small
(n_sweeps x roles) table ``sweep_columns`` read at row ``floor((t + dt/4)/interval)``;
``RolePlan.amplitude_scale`` enters as a per-cell factor (replicas) or through the
(n_sweeps x cells) table ``sweep_scale`` (sequential).

Voltage clamp (``mode == "voltage clamp"``): the amplifier passes ``I_clamp = (V_cmd - v)/Rs``
into the cell, V_cmd being the holding potential plus the rendered command offsets, and the
cell's own currents stay as they are. ``I_clamp`` is what is recorded: at steady state it
equals the cell's net membrane current with the amplifier's sign convention, so inward
currents (an EPSC at -70 mV) come out negative and a depolarising command step gives a
positive capacitive transient. A clamped AdEx cell whose clamp time constant
Rs*C/(1 + Rs*gL) is below 4 time steps is integrated by exponential Euler (forward Euler
diverges there), with its exponential spike current and magnesium block held over each step.
Cells start at the steady state of the clamp (the holding potential minus the series-resistance
error), with w or the gates at steady state there.

Ornstein-Uhlenbeck inputs run all the time with the exact one-step update
(:func:`models.noise_update`), started from their stationary distribution, and enter the
membrane only inside their window; several inputs on one cell add up. Poisson inputs are one
PoissonGroup cell per replica, its rate switched on inside the window, each spike adding
``conductance * peak_factor`` to the cell's receptor drive (the receptor's block scale applies
in the current, as for synapses). Extracellular activation: one SpikeGeneratorGroup holding
every activated source once per replica it feeds, connected through the same Tsodyks-Markram
release synapses as the role-to-role connections.

Shared objects: every Brian2 object costs a fixed overhead per time step, so membrane roles
whose equations and namespace come out identical (same cell model, receptors, Hodgkin-Huxley
currents, stimulus text, noise inputs; not voltage-clamped, no release accumulators) share one
NeuronGroup, each role a contiguous block of ``n_cells`` cells (:class:`RoleBlock`), and
role-to-role synapses between the same two groups with the same receptors and release kind
share one Synapses object. Per-cell and per-synapse values are concatenated, so deterministic
results do not change; random draws come in another order.

Object names follow protocol identifiers so diagnostics can cite the protocol:
``cell_<role>`` (NeuronGroup or SpikeGeneratorGroup of one role), ``cells_<role>_<role>...``
(NeuronGroup shared by several roles), ``cell_<role>_poisson<k>`` (Poisson input and its
``_syn``), ``syn_<synapse>`` (Synapses of one synapse plan), ``syns_<synapse>_<synapse>...``
(Synapses shared by several), ``act_<activation>`` (source group and its ``_syn``),
``trace_<role>``, ``spikes_<role>`` (or ``trace_<group>``, ``spikes_<group>`` for a shared
group), ``release_<synapse>``, ``inputs_<...>`` (monitors), ``stim_library``, ``sweep_columns``,
``sweep_scale``.
Every per-replica array is built with numpy (no Python loop over replicas), and
connectivity is passed as explicit i/j arrays so every code-generation target builds the
same network.
"""

from __future__ import annotations

import math
from dataclasses import astuple, dataclass, field
from typing import Any, Callable

import numpy as np

from protolang.engine import models
from protolang.language.errors import Collector, Span, suggest
from protolang.plan.model import ActivationPlan, Plan, RolePlan, SynapsePlan
from protolang.plan.waveforms import library as render_library

#: Rate standing in for "instantaneous" (D or F equal to 0): exp(-dt*rate) underflows to 0.
INSTANT_RATE = 1e12

#: A voltage-clamped AdEx cell switches to exponential Euler below this many time steps of
#: clamp time constant (forward Euler diverges below 2; BRIAN2_NOTES section 5).
CLAMP_EXPONENTIAL_STEPS = 4.0

#: Poisson inputs draw at most one event per time step; above this rate*dt a note says so.
POISSON_COARSE = 0.1

def span_of(plan: Plan, *keys: str) -> Span | None:
    """The source span recorded in ``plan.spans`` under the first of ``keys`` present."""
    for key in keys:
        text = plan.spans.get(key)
        if not text:
            continue
        parts = str(text).rsplit(":", 2)
        if len(parts) == 3 and parts[1].isdigit() and parts[2].isdigit():
            return Span(parts[0], int(parts[1]), int(parts[2]))
        return Span(str(text), 0, 0)
    return None


def object_names(plan: Plan) -> dict[tuple[str, str], str]:
    """Brian2 object name for each ("role" | "synapse", identifier) of the plan, made unique."""
    names: dict[tuple[str, str], str] = {}
    used: set[str] = set()
    items = [("role", r.name, "cell_") for r in plan.roles]
    items += [("synapse", s.name, "syn_") for s in plan.synapses]
    items += [("activation", a.name, "act_") for a in plan.activations]
    for kind, ident, prefix in items:
        base = prefix + models.identifier(ident)
        name, k = base, 1
        while name in used:
            k += 1
            name = f"{base}_{k}"
        used.add(name)
        names[(kind, ident)] = name
    return names


def release_suffix(plan: Plan, syn: SynapsePlan) -> str:
    """Suffix of a synapse's per-cell release variables (by position: protocol names could end
    in ``_pre``/``_post``, which Brian2 reserves)."""
    return f"s{plan.synapses.index(syn)}"


@dataclass
class Layout:
    """Where sweeps live: replica expansion, run duration and sweep windows."""

    kind: str                 # "replicas" | "sequential"
    n_repeat: int
    n_sweeps: int
    n_cells: int              # cells per role in the network
    dt: float
    sample_dt: float
    sweep_length: float
    interval: float           # sweep start spacing in continuous time (sequential only)
    duration: float           # simulated time
    n_samples: int            # samples per sweep
    sweep_start_samples: np.ndarray  # (n_sweeps,) first sample of each sweep (sequential)

    def expand(self, per_repeat: np.ndarray) -> np.ndarray:
        """Per-repeat values to per-cell values (replica r = repeat*n_sweeps + sweep)."""
        per_repeat = np.asarray(per_repeat)
        if self.kind == "replicas":
            return np.repeat(per_repeat, self.n_sweeps, axis=0)
        return per_repeat

    @property
    def sweep_time(self) -> str:
        """Brian2 expression of the time within the current sweep; a quarter step keeps grid
        times on the right side of window edges and sweep starts."""
        if self.kind == "replicas":
            return "(t + 0.25*dt)"
        return "((t + 0.25*dt) % sweep_interval)"

    @property
    def sweep_row(self) -> str:
        """Brian2 expression (a time) that reads row ``sweep`` of a per-sweep TimedArray whose
        dt is the simulation step (sequential layout)."""
        return "floor((t + 0.25*dt)/sweep_interval)*dt"

    def cells_of_repeats(self, repeats: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Cell indices of the given repeats and, for each, the repeat it belongs to."""
        repeats = np.asarray(repeats, dtype=np.int64)
        if self.kind == "replicas":
            cells = (repeats[:, None] * self.n_sweeps + np.arange(self.n_sweeps)[None, :]).ravel()
            return cells, np.repeat(repeats, self.n_sweeps)
        return repeats.copy(), repeats.copy()


def make_layout(plan: Plan, notes: list[str]) -> Layout:
    """Check the plan's timing and work out the run duration and sweep windows.

    Raises:
        ProtocolError: sampling interval not a multiple of the time step, sweeps overlapping.
    """
    fail = Collector()
    dt, sample_dt = float(plan.dt), float(plan.sample_dt)
    if not dt > 0:
        fail.fail(f"time step {dt!r} s is not positive", span_of(plan, "dt"),
                  expected="a positive time step such as 0.025 ms")
    if not sample_dt > 0:
        fail.fail(f"sampling interval {sample_dt!r} s is not positive", span_of(plan, "sample_dt"),
                  expected="a positive sampling interval such as 0.1 ms")
    if plan.layout not in ("replicas", "sequential"):
        raise AssertionError(f"internal error: unknown sweep layout {plan.layout!r}")
    fail.raise_if_any()
    ratio = sample_dt / dt
    if ratio < 1 - 1e-9 or abs(ratio - round(ratio)) > 1e-6:
        fail.fail(f"sampling interval {sample_dt * 1e3:g} ms is not a whole number of time steps "
                  f"({dt * 1e3:g} ms)", span_of(plan, "sample_dt"),
                  expected="a sampling interval that is a multiple of the time step",
                  hint=f"use {max(round(ratio), 1) * dt * 1e3:g} ms")
    n_samples = int(round(plan.sweep_length / sample_dt))
    if n_samples < 1:
        fail.fail(f"sweep length {plan.sweep_length * 1e3:g} ms is shorter than one sample",
                  span_of(plan, "sweep_length"), expected="a sweep longer than the sampling interval")
    fail.raise_if_any()
    sweep_length = n_samples * sample_dt
    if plan.layout == "replicas":
        return Layout("replicas", plan.n_repeat, plan.n_sweeps, plan.n_repeat * plan.n_sweeps,
                      dt, sample_dt, sweep_length, sweep_length, sweep_length, n_samples,
                      np.zeros(plan.n_sweeps, dtype=np.int64))
    interval_samples = int(round(plan.interval / sample_dt))
    if abs(interval_samples * sample_dt - plan.interval) > 1e-9:
        notes.append(f"sweep interval rounded to {interval_samples * sample_dt:g} s "
                     f"(a whole number of samples)")
    if interval_samples < n_samples:
        fail.fail(f"sweeps of {sweep_length:g} s do not fit into an interval of {plan.interval:g} s",
                  span_of(plan, "interval"), expected="an interval at least as long as the sweep")
        fail.raise_if_any()
    interval = interval_samples * sample_dt
    starts = np.arange(plan.n_sweeps, dtype=np.int64) * interval_samples
    duration = (plan.n_sweeps - 1) * interval + sweep_length
    return Layout("sequential", plan.n_repeat, plan.n_sweeps, plan.n_repeat, dt, sample_dt,
                  sweep_length, interval, duration, n_samples, starts)


@dataclass(frozen=True)
class RoleBlock:
    """Where one role's cells live: cells ``start .. start + size - 1`` of the Brian2 group named
    ``group``; the role's cell k (replica or repeat k of the layout) is group cell ``start + k``."""

    group: str
    start: int
    size: int

    @property
    def stop(self) -> int:
        return self.start + self.size

    def cells(self, local: np.ndarray | None = None) -> np.ndarray:
        """Group indices of the role's cells: all of them, or those at positions ``local``."""
        local = np.arange(self.size) if local is None else np.asarray(local, dtype=np.int64)
        return self.start + local

    def take(self, values: Any) -> np.ndarray:
        """The role's part (first axis) of a per-cell array of its group."""
        return np.asarray(values)[self.start:self.stop]


@dataclass
class Assignment:
    """One set of plain numbers the builder wrote into a Brian2 object: a state variable of a
    group or Synapses object (``variable``), or the table of a TimedArray (``variable ==
    "values"``). ``target`` is the Brian2 object itself."""

    owner: str
    variable: str
    values: np.ndarray
    target: Any = field(default=None, repr=False, compare=False)


#: Ledger name of a TimedArray's table.
TIMED_ARRAY_VALUES = "values"


def assign(ledger: list[Assignment] | None, target: Any, variable: str, values: Any) -> None:
    """Set ``target.<variable>`` to plain SI numbers and record the values in ``ledger``.

    Every number the builder puts into a group's or a Synapses object's state passes here, so
    the ledger lists everything that may change between plans of one network structure (the
    compile-once path of :mod:`protolang.engine.standalone` hands them to the compiled binary).
    """
    setattr(target, variable + "_", values)
    if ledger is not None:
        # the builder never changes an array after handing it over, so no copy is needed
        ledger.append(Assignment(target.name, variable, np.asarray(values), target))


def timed_array(b2: Any, ledger: list[Assignment] | None, name: str, values: np.ndarray, dt: float) -> Any:
    """A TimedArray of plain numbers at time step ``dt`` (s), recorded in ``ledger``."""
    table = b2.TimedArray(values, dt=dt * b2.second, name=name)
    if ledger is not None:
        ledger.append(Assignment(name, TIMED_ARRAY_VALUES, np.asarray(values), table))
    return table


@dataclass
class Built:
    """The network and the handles needed to read it back.

    Roles of one kind may share a Brian2 group (:func:`cell_groups`): ``blocks`` says where each
    role's cells are, ``groups`` which roles a group holds. ``cells``, ``spike_monitors`` and
    ``trace_monitors`` map every role to its group's object (shared by merged roles), and
    ``trace_rows`` gives the role's rows in its trace monitor. ``ledger`` (built with
    ``ledger=True``) lists every array of numbers written into the network (:func:`assign`).
    """

    network: Any
    layout: Layout
    names: dict[tuple[str, str], str]
    cells: dict[str, Any] = field(default_factory=dict)              # role -> group holding its cells
    blocks: dict[str, RoleBlock] = field(default_factory=dict)       # role -> its cells in that group
    groups: dict[str, list[str]] = field(default_factory=dict)       # group name -> roles, block order
    merged: dict[str, tuple[str, tuple[str, ...]]] = field(default_factory=dict)  # merged object -> (kind, identifiers)
    adex_roles: list[str] = field(default_factory=list)
    hh_roles: list[str] = field(default_factory=list)
    trace_monitors: dict[str, Any] = field(default_factory=dict)     # role -> StateMonitor of its group
    trace_rows: dict[str, slice] = field(default_factory=dict)       # role -> its rows in that monitor
    trace_variables: dict[str, str] = field(default_factory=dict)    # role -> "v" | "I_clamp"
    trace_units: dict[str, str] = field(default_factory=dict)        # role -> "V" | "A"
    input_monitors: dict[str, tuple[Any, np.ndarray]] = field(default_factory=dict)  # name -> (mon, cell of source)
    spike_monitors: dict[str, Any] = field(default_factory=dict)     # role -> SpikeMonitor of its group
    release_monitors: dict[str, tuple[Any, str]] = field(default_factory=dict)  # syn -> (mon, var)
    n_synapses: dict[str, int] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    population: Any = None                                           # embedded network's NeuronGroup
    population_spikes: Any = None                                    # and its SpikeMonitor
    ledger: list[Assignment] | None = None                           # numbers written, if asked


def _per_repeat(plan: Plan, values: Any, what: str) -> np.ndarray:
    arr = np.asarray(values, dtype=float)
    if arr.ndim == 0:
        return np.full(plan.n_repeat, float(arr))
    if arr.shape != (plan.n_repeat,):
        raise AssertionError(f"internal error: {what} has shape {arr.shape}, "
                             f"expected ({plan.n_repeat},)")
    return arr


def _check_adex(plan: Plan, role: RolePlan, name: str, fail: Collector) -> dict[str, np.ndarray]:
    missing = [p for p in models.ADEX_PARAMS if p not in role.params]
    if missing:
        raise AssertionError(f"internal error: role {role.name!r} lacks AdEx parameters {missing}")
    p = {k: _per_repeat(plan, role.params[k], f"parameter {k} of role {role.name!r}")
         for k in models.ADEX_PARAMS}
    span = span_of(plan, name, role.name)
    for key, rule, text in (("C", p["C"] > 0, "positive"), ("DeltaT", p["DeltaT"] > 0, "positive"),
                            ("tau_w", p["tau_w"] > 0, "positive"), ("gL", p["gL"] >= 0, "zero or positive"),
                            ("t_ref", p["t_ref"] >= 0, "zero or positive")):
        bad = ~(rule & np.isfinite(p[key]))
        if bad.any():
            fail.fail(f"cell parameter {key} of role {role.name!r} is {p[key][bad][0]:g} "
                      f"(repeat {int(np.flatnonzero(bad)[0])})", span,
                      expected=f"a finite {text} value")
    for key in ("EL", "VT", "Vr", "Vcut", "a", "b"):
        if not np.isfinite(p[key]).all():
            fail.fail(f"cell parameter {key} of role {role.name!r} is not a finite number", span,
                      expected="a finite value")
    if np.all(p["C"] > 0):
        tau_m = np.where(p["gL"] > 0, p["C"] / np.where(p["gL"] > 0, p["gL"], 1.0), np.inf)
        fastest = float(np.min(np.minimum(tau_m, p["tau_w"])))
        if plan.dt > 0.5 * fastest:
            fail.fail(f"time step {plan.dt * 1e3:g} ms is too coarse for role {role.name!r}: its fastest "
                      f"time constant is {fastest * 1e3:g} ms", span,
                      expected="a time step well below the membrane and adaptation time constants",
                      hint=f"use a time step of at most {fastest * 1e3 / 10:.3g} ms")
    return p


#: Spike detection of the Hodgkin-Huxley models: upward crossing of 0 mV, refractory above it.
HH_SPIKE_THRESHOLD = "v > 0*mV"

#: Time step above which Hodgkin-Huxley spikes are resolved too coarsely (a note, not an error).
HH_COARSE_DT = 0.05e-3

#: Name of the engine's (exp(x) - 1)/x in the Hodgkin-Huxley rate texts.
EXPREL_NAME = "protolang_exprel"
_exprel_function: Any = None


def _numpy_exprel(x):
    x = np.asarray(x, dtype=float)
    small = np.abs(x) < 1e-6
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        return np.where(small, 1.0 + x / 2.0 + x * x / 6.0, np.expm1(x) / np.where(small, 1.0, x))


def exprel_function(b2: Any) -> Any:
    """A Brian2 Function for (exp(x) - 1)/x, exact at 0.

    Brian2's own ``exprel`` checks units on every numpy call, which made it about nine
    tenths of a Hodgkin-Huxley step on the numpy target; this one is a plain numpy
    function there and a C function on the compiled targets.
    """
    global _exprel_function
    if _exprel_function is None:
        from brian2.codegen.generators.cpp_generator import CPPCodeGenerator
        from brian2.codegen.generators.cython_generator import CythonCodeGenerator
        from brian2.codegen.generators.numpy_generator import NumpyCodeGenerator

        fn = b2.Function(_numpy_exprel, arg_units=[1], return_unit=1)
        fn.implementations.add_implementation(NumpyCodeGenerator, code=_numpy_exprel)
        fn.implementations.add_implementation(CythonCodeGenerator, name="_protolang_exprel", code=(
            "cdef inline double _protolang_exprel(double x) nogil:\n"
            "    if fabs(x) < 1e-16:\n"
            "        return 1.0\n"
            "    return expm1(x) / x\n"))
        fn.implementations.add_implementation(CPPCodeGenerator, name="_protolang_exprel", code=(
            "static inline double _protolang_exprel(double x)\n"
            "{\n"
            "    if (fabs(x) < 1e-16) return 1.0;\n"
            "    return expm1(x)/x;\n"
            "}\n"))
        _exprel_function = fn
    return _exprel_function


def _check_hh(plan: Plan, role: RolePlan, name: str, fail: Collector,
              notes: list[str]) -> dict[str, np.ndarray]:
    needed = models.MODEL_PARAMS[role.model] + models.HH_RATE_FACTORS[role.model]
    missing = [p for p in needed if p not in role.params]
    if missing:
        raise AssertionError(f"internal error: role {role.name!r} lacks {role.model} parameters {missing}")
    p = {k: _per_repeat(plan, role.params[k], f"parameter {k} of role {role.name!r}") for k in needed}
    span = span_of(plan, name, role.name)
    positive = ("diam", "length", "c_m", "g_leak") + models.HH_RATE_FACTORS[role.model] + \
        (("tau_max",) if role.model == "hh_cortical" else ())
    for key in needed:
        rule = p[key] > 0 if key in positive else (
            p[key] >= 0 if key.startswith("g") else np.ones(p[key].shape, dtype=bool))
        bad = ~(rule & np.isfinite(p[key]))
        if bad.any():
            text = "positive" if key in positive else ("zero or positive" if key.startswith("g") else "")
            fail.fail(f"cell parameter {key} of role {role.name!r} is {p[key][bad][0]:g} "
                      f"(repeat {int(np.flatnonzero(bad)[0])})", span,
                      expected=f"a finite {text} value".replace("  ", " "))
    if plan.dt > HH_COARSE_DT:
        notes.append(f"role {role.name!r}: a time step of {plan.dt * 1e3:g} ms resolves "
                     f"Hodgkin-Huxley spikes coarsely; {HH_COARSE_DT * 1e3:g} ms or less is usual")
    return p


def _check_synapse(plan: Plan, syn: SynapsePlan, name: str, fail: Collector) -> dict[str, np.ndarray]:
    s = {k: _per_repeat(plan, getattr(syn, k), f"{k} of synapse {syn.name!r}")
         for k in ("n_sites", "site_conductance", "U", "D", "F", "delay")}
    connected = np.asarray(syn.connected, dtype=bool)
    if connected.shape != (plan.n_repeat,):
        raise AssertionError(f"internal error: connected of {syn.name!r} has shape {connected.shape}")
    s["connected"] = connected
    _check_release(s, connected, f"synapse {syn.name!r}", "repeat", span_of(plan, name, syn.name), fail)
    for rec in syn.receptors:
        if rec not in plan.receptors:
            raise AssertionError(f"internal error: synapse {syn.name!r} uses unknown receptor {rec!r}")
    return s


def _check_release(s: dict[str, np.ndarray], active: np.ndarray, what: str, unit: str,
                   span: Span | None, fail: Collector) -> None:
    """Refuse release parameters the Tsodyks-Markram synapses cannot use (where ``active``)."""
    rules = (("U", (s["U"] >= 0) & (s["U"] <= 1), "a release probability between 0 and 1"),
             ("D", s["D"] >= 0, "a recovery time constant >= 0"),
             ("F", s["F"] >= 0, "a facilitation time constant >= 0"),
             ("delay", s["delay"] >= 0, "a delay >= 0"),
             ("site_conductance", s["site_conductance"] >= 0, "a conductance >= 0"),
             ("n_sites", (s["n_sites"] >= 0) & (s["n_sites"] == np.round(s["n_sites"])),
              "a whole number of release sites >= 0"))
    for key, ok, expected in rules:
        bad = active & ~(ok & np.isfinite(s[key]))
        if bad.any():
            fail.fail(f"{what}: {key} is {s[key][bad][0]:g} "
                      f"({unit} {int(np.flatnonzero(bad)[0])})", span, expected=expected)


def _check_receptors(plan: Plan, fail: Collector) -> None:
    for rname, rec in plan.receptors.items():
        span = span_of(plan, f"receptor_{models.identifier(rname)}", rname)
        if not (rec.decay > 0 and np.isfinite(rec.decay)):
            fail.fail(f"receptor {rname!r}: decay time constant {rec.decay!r} s is not positive", span,
                      expected="a positive decay time constant")
        if not (rec.rise >= 0 and np.isfinite(rec.rise)):
            fail.fail(f"receptor {rname!r}: rise time constant {rec.rise!r} s is negative", span,
                      expected="a rise time constant >= 0 (0 for an instantaneous rise)")


def _event_steps(times: Any, layout: Layout, what: str, span: Span | None, fail: Collector,
                 notes: list[str]) -> np.ndarray | None:
    """Event times within a sweep moved onto the time grid (s), sorted; None if unusable."""
    times = np.sort(np.asarray(times, dtype=float).ravel())
    if times.size and (not np.isfinite(times).all() or times[0] < 0):
        fail.fail(f"{what} fires at a negative or undefined time", span,
                  expected="spike times >= 0 within the sweep")
        return None
    inside = times < layout.sweep_length
    if not inside.all():
        notes.append(f"{what}: {int((~inside).sum())} spike(s) after the end of the sweep "
                     f"are not simulated")
        times = times[inside]
    steps = np.round(times / layout.dt).astype(np.int64)
    if np.any(np.diff(steps) == 0):
        fail.fail(f"{what} fires twice within one time step ({layout.dt * 1e3:g} ms)", span,
                  expected="spike times at least one time step apart")
        return None
    return steps * layout.dt


def _run_times(step_times: np.ndarray, layout: Layout) -> np.ndarray:
    """One source's event times in run time: as given (replicas) or once per sweep (sequential)."""
    if layout.kind == "replicas":
        return step_times
    interval_steps = int(round(layout.interval / layout.dt))
    return (step_times[None, :] + (np.arange(layout.n_sweeps)[:, None] * interval_steps) * layout.dt).ravel()


def _spike_source(plan: Plan, role: RolePlan, layout: Layout, name: str,
                  fail: Collector, notes: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """Indices and times of a role that fires at explicit times in every sweep."""
    step_times = _event_steps(role.spike_times, layout, f"role {role.name!r}", span_of(plan, name, role.name),
                              fail, notes)
    if step_times is None:
        return np.zeros(0, np.int64), np.zeros(0)
    per_cell = _run_times(step_times, layout)
    n = layout.n_cells
    return np.repeat(np.arange(n), per_cell.size), np.tile(per_cell, n)


def _finite(*values: float | None) -> bool:
    return all(v is not None and math.isfinite(v) for v in values)


def _check_inputs(plan: Plan, role: RolePlan, name: str, spike_source: bool, layout: Layout,
                  fail: Collector, notes: list[str]) -> None:
    """Refuse a role's clamp, noise, Poisson and waveform settings the engine cannot simulate."""
    span = span_of(plan, name, role.name)
    if spike_source:
        extras = [word for word, present in (
            ("current waveforms", bool(role.pulses or role.segments)), ("noise", bool(role.noise)),
            ("Poisson input", bool(role.poisson)), ("a voltage clamp", role.mode == "voltage clamp"))
            if present]
        if extras:
            fail.fail(f"role {role.name!r} fires at explicit times (it has no membrane), so it cannot "
                      f"also take {', '.join(extras)}", span,
                      expected="explicit spike times alone on this cell",
                      hint="drop the spike times or the other stimuli")
        return
    if role.mode == "voltage clamp":
        if not _finite(role.holding_potential):
            fail.fail(f"voltage-clamped role {role.name!r} has no holding potential", span,
                      expected="a holding potential such as -70 mV")
        rs = role.series_resistance
        if not (_finite(rs) and rs > 0):
            fail.fail(f"voltage-clamped role {role.name!r} has series resistance {rs!r}", span,
                      expected="a series resistance greater than 0, such as 10 MOhm")
        if role.pulses:
            fail.fail(f"role {role.name!r} is voltage-clamped, but pulses and trains inject current", span,
                      expected="command waveforms (step, steps of, ramp, sine, chirp) on a voltage-clamped cell",
                      hint="record the cell in current clamp, or give the stimulus as command steps")
    elif role.mode not in ("current clamp", "off"):
        raise AssertionError(f"internal error: role {role.name!r} has recording mode {role.mode!r}")
    for k, spec in enumerate(role.noise):
        ok = (_finite(spec.mean, spec.sd, spec.tau, spec.start, spec.stop) and spec.sd >= 0 and spec.tau > 0
              and 0 <= spec.start < spec.stop)
        if spec.reversal is not None:
            ok = ok and _finite(spec.reversal) and spec.mean >= 0
        if not ok:
            fail.fail(f"noise input {k + 1} of role {role.name!r}: mean {spec.mean:g}, sd {spec.sd:g}, "
                      f"tau {spec.tau:g} s, window {spec.start:g}-{spec.stop:g} s", span,
                      expected="sd >= 0, tau > 0 and 0 <= start < stop (a mean >= 0 for conductance noise)")
    for k, spec in enumerate(role.poisson):
        if spec.receptor not in plan.receptors:
            fail.fail(f"Poisson input {k + 1} of role {role.name!r} acts through receptor {spec.receptor!r}, "
                      f"which the circuit does not define", span,
                      expected="one of " + ", ".join(repr(r) for r in plan.receptors),
                      hint=suggest(spec.receptor, plan.receptors))
        if not (_finite(spec.rate, spec.conductance, spec.start, spec.stop) and spec.rate >= 0
                and spec.conductance >= 0 and 0 <= spec.start < spec.stop):
            fail.fail(f"Poisson input {k + 1} of role {role.name!r}: rate {spec.rate:g} Hz, conductance "
                      f"{spec.conductance:g} S, window {spec.start:g}-{spec.stop:g} s", span,
                      expected="rate >= 0, conductance >= 0 and 0 <= start < stop")
        elif spec.rate * layout.dt > 1.0:
            fail.fail(f"Poisson input {k + 1} of role {role.name!r}: {spec.rate:g} Hz is more than one event "
                      f"per time step ({layout.dt * 1e3:g} ms)", span,
                      expected=f"a rate below {1 / layout.dt:g} Hz", hint="use a smaller time step")
        elif spec.rate * layout.dt > POISSON_COARSE:
            notes.append(f"role {role.name!r}: Poisson input {k + 1} draws at most one event per time step "
                         f"and has {spec.rate * layout.dt:.2g} events per step on average; a smaller time "
                         f"step would follow a Poisson process more closely")
    for seg in role.segments:
        if seg.per_sweep is not None and np.shape(seg.per_sweep) != (plan.n_sweeps,):
            raise AssertionError(f"internal error: a step family of {role.name!r} has {np.size(seg.per_sweep)} "
                                 f"amplitudes for {plan.n_sweeps} sweeps")
    if role.amplitude_scale is not None:
        scale = np.asarray(role.amplitude_scale, dtype=float)
        if scale.shape != (plan.n_repeat, plan.n_sweeps):
            raise AssertionError(f"internal error: amplitude_scale of {role.name!r} has shape {scale.shape}, "
                                 f"expected ({plan.n_repeat}, {plan.n_sweeps})")
        if not np.isfinite(scale).all():
            fail.fail(f"role {role.name!r}: a stimulus amplitude factor is not a finite number", span,
                      expected="finite amplitudes")


def _check_activation(plan: Plan, act: ActivationPlan, name: str, layout: Layout, fail: Collector,
                      notes: list[str]) -> dict[str, np.ndarray] | None:
    """Per-source arrays of an extracellular activation, checked; ``times`` on the time grid."""
    span = span_of(plan, name, act.name)
    m = int(np.asarray(act.source_ids).size)
    values = {}
    for key in ("source_repeat", "n_sites", "site_conductance", "U", "D", "F", "delay"):
        arr = np.asarray(getattr(act, key), dtype=float)
        if arr.shape != (m,):
            raise AssertionError(f"internal error: {key} of activation {act.name!r} has shape {arr.shape}, "
                                 f"expected ({m},)")
        values[key] = arr
    rep = values["source_repeat"]
    if m and (rep.min() < 0 or rep.max() >= plan.n_repeat or np.any(rep != np.round(rep))):
        raise AssertionError(f"internal error: activation {act.name!r} names repeats outside 0..{plan.n_repeat - 1}")
    values["source_repeat"] = rep.astype(np.int64)
    for rec in act.receptors:
        if rec not in plan.receptors:
            raise AssertionError(f"internal error: activation {act.name!r} uses unknown receptor {rec!r}")
    _check_release(values, np.ones(m, dtype=bool), f"activation {act.name!r}", "source", span, fail)
    times = _event_steps(act.times, layout, f"activation {act.name!r}", span, fail, notes)
    if times is None:
        return None
    values["times"] = times
    return values


@dataclass
class StimulusLibrary:
    """Every role's rendered waveforms as columns of one table (plain SI numbers)."""

    values: np.ndarray                  # (n_steps + 1, K), the last row 0
    columns: dict[str, np.ndarray]      # role -> (n_sweeps,) column of each sweep
    scales: dict[str, np.ndarray]       # role -> (n_repeat, n_sweeps) amplitude factors


def stimulus_library(plan: Plan, layout: Layout) -> StimulusLibrary | None:
    """Render each role's pulses and segments (:func:`protolang.plan.waveforms.library`) and
    pool the distinct columns of all roles; None when no role has a waveform.

    The trailing zero row is what Brian2 returns past the end of a sweep (it holds the last
    value), so the gaps between sweeps of the sequential layout carry no stimulus.
    """
    import hashlib

    n_steps = int(round(layout.sweep_length / layout.dt))
    cols: list[np.ndarray] = []
    seen: dict[bytes, int] = {}
    columns: dict[str, np.ndarray] = {}
    scales: dict[str, np.ndarray] = {}
    for role in plan.roles:
        if role.spike_times is not None or not (role.pulses or role.segments):
            continue
        waves, index = render_library(role, plan.n_sweeps, layout.dt, n_steps)
        if waves.ndim != 2 or waves.shape[0] != n_steps or index.shape != (plan.n_sweeps,):
            raise AssertionError(f"internal error: waveform library of {role.name!r} has shape {waves.shape}")
        where = []
        for k in range(waves.shape[1]):
            col = np.ascontiguousarray(waves[:, k], dtype=np.float64)
            key = hashlib.sha256(col.data).digest()
            if key not in seen:
                seen[key] = len(cols)
                cols.append(col)
            where.append(seen[key])
        columns[role.name] = np.asarray(where, dtype=np.int64)[index]
        if role.amplitude_scale is not None:
            scales[role.name] = np.asarray(role.amplitude_scale, dtype=float)
    if not cols:
        return None
    values = np.zeros((n_steps + 1, len(cols)))
    values[:n_steps] = np.stack(cols, axis=1)
    return StimulusLibrary(values, columns, scales)


def _stimulus_text(role: RolePlan, layout: Layout, lib: StimulusLibrary, column_slot: dict[str, int],
                   scale_slot: dict[str, int]) -> tuple[str, tuple[str, ...], dict[str, np.ndarray]]:
    """The stimulus expression of a role, the per-cell variables it reads and their values."""
    cols = lib.columns[role.name]
    decl: list[str] = []
    per_cell: dict[str, np.ndarray] = {}
    if layout.kind == "replicas":
        expr = "stim_library(t, stim_index)"
        decl.append("stim_index : integer (constant)")
        per_cell["stim_index"] = np.tile(cols, layout.n_repeat)
        if role.name in lib.scales:
            expr += "*stim_scale"
            decl.append("stim_scale : 1 (constant)")
            per_cell["stim_scale"] = lib.scales[role.name].ravel()
        return expr, tuple(decl), per_cell
    if role.name in column_slot:
        column = f"int(sweep_columns({layout.sweep_row}, {column_slot[role.name]}) + 0.5)"
    else:
        column = "stim_index"
        decl.append("stim_index : integer (constant)")
        per_cell["stim_index"] = np.full(layout.n_cells, cols[0], dtype=np.int64)
    expr = f"stim_library({layout.sweep_time}, {column})"
    if role.name in scale_slot:
        expr += f"*sweep_scale({layout.sweep_row}, scale_slot)"
        decl.append("scale_slot : integer (constant)")
        per_cell["scale_slot"] = scale_slot[role.name] + np.arange(layout.n_cells)
    return expr, tuple(decl), per_cell


@dataclass
class SynapseArrays:
    """Per-synapse values of Tsodyks-Markram release synapses (one entry per connection, or per
    release site if ``stochastic``), with source and target cells as indices of their groups."""

    pre: np.ndarray
    post: np.ndarray
    U: np.ndarray
    rate_D: np.ndarray                 # 1/s
    rate_F: np.ndarray                 # 1/s
    delay: np.ndarray                  # s
    sites: np.ndarray | None           # release sites per connection (deterministic only)
    stochastic: bool
    receptors: tuple[str, ...]         # receptor names, in plan order
    q: dict[str, np.ndarray]           # receptor suffix -> jump of x per released site (S/s)

    @property
    def size(self) -> int:
        return int(self.pre.size)

    @staticmethod
    def concat(parts: list["SynapseArrays"]) -> "SynapseArrays":
        """One set of arrays holding ``parts`` one after another (same kind and receptors)."""
        first = parts[0]
        if any(p.stochastic != first.stochastic or p.receptors != first.receptors for p in parts):
            raise AssertionError("internal error: merging synapses of different kinds")
        if len(parts) == 1:
            return first

        def cat(key: str) -> np.ndarray:
            return np.concatenate([getattr(p, key) for p in parts])

        return SynapseArrays(
            pre=cat("pre"), post=cat("post"), U=cat("U"), rate_D=cat("rate_D"), rate_F=cat("rate_F"),
            delay=cat("delay"), sites=None if first.sites is None else cat("sites"),
            stochastic=first.stochastic, receptors=first.receptors,
            q={k: np.concatenate([p.q[k] for p in parts]) for k in first.q})


def _tm_arrays(plan: Plan, pre: np.ndarray, post: np.ndarray, which: np.ndarray,
               values: dict[str, np.ndarray], receptors: dict[str, float], stochastic: bool,
               suffix_of: dict[str, str]) -> SynapseArrays:
    """Synapses ``pre[k] -> post[k]`` with the parameters at ``which[k]`` of ``values``; one
    synapse per release site when ``stochastic`` (so possibly none at all)."""
    sites = np.round(values["n_sites"]).astype(np.int64)
    if stochastic:
        count = sites[which]
        pre, post, which = np.repeat(pre, count), np.repeat(post, count), np.repeat(which, count)
    rec_names = [r for r in plan.receptors if r in receptors]
    D, F = values["D"], values["F"]
    q = {}
    for rname in rec_names:
        rec = plan.receptors[rname]
        # a receptor's weight is one number for a synapse plan, one per connection for an edge set
        weight = np.asarray(receptors[rname], dtype=float)
        jump = values["site_conductance"] * weight * models.peak_factor(rec.rise, rec.decay)
        q[suffix_of[rname]] = jump[which]
    return SynapseArrays(
        pre=np.asarray(pre, dtype=np.int64), post=np.asarray(post, dtype=np.int64), U=values["U"][which],
        rate_D=np.where(D > 0, 1.0 / np.where(D > 0, D, 1.0), INSTANT_RATE)[which],
        rate_F=np.where(F > 0, 1.0 / np.where(F > 0, F, 1.0), INSTANT_RATE)[which],
        delay=values["delay"][which], sites=None if stochastic else sites[which].astype(float),
        stochastic=stochastic, receptors=tuple(rec_names), q=q)


def _tm_object(b2: Any, name: str, source: Any, target: Any, arrays: SynapseArrays,
               release_var: str | None = None, ledger: list[Assignment] | None = None) -> Any:
    """The Brian2 Synapses object of ``arrays`` (which must hold at least one synapse)."""
    suffixes = list(arrays.q)
    group = b2.Synapses(source, target, model=models.synapse_model(arrays.stochastic, suffixes),
                        on_pre=models.synapse_on_pre(arrays.stochastic, suffixes, release_var),
                        namespace={}, name=name)
    group.connect(i=arrays.pre, j=arrays.post)
    assign(ledger, group, "U", arrays.U)
    assign(ledger, group, "rate_D", arrays.rate_D)
    assign(ledger, group, "rate_F", arrays.rate_F)
    assign(ledger, group, "u_fac", 0.0)
    assign(ledger, group, "t_last", 0.0)
    if arrays.stochastic:
        assign(ledger, group, "available", 1.0)
    else:
        assign(ledger, group, "R", 1.0)
        assign(ledger, group, "sites", arrays.sites)
    for suffix, q in arrays.q.items():
        assign(ledger, group, f"q_{suffix}", q)
    assign(ledger, group, "delay", arrays.delay)
    return group


def _tm_synapses(b2: Any, plan: Plan, name: str, source: Any, target: Any, pre: np.ndarray,
                 post: np.ndarray, which: np.ndarray, values: dict[str, np.ndarray],
                 receptors: dict[str, float], stochastic: bool, suffix_of: dict[str, str],
                 release_var: str | None = None, ledger: list[Assignment] | None = None) -> tuple[Any, int]:
    """Tsodyks-Markram release synapses ``pre[k] -> post[k]`` with the parameters at ``which[k]``
    of ``values``; one synapse per release site when ``stochastic``. (None, 0) if there are none."""
    arrays = _tm_arrays(plan, pre, post, which, values, receptors, stochastic, suffix_of)
    if arrays.size == 0:
        return None, 0
    return _tm_object(b2, name, source, target, arrays, release_var, ledger), arrays.size


def _hh_cells(plan: Plan, role: RolePlan, params: dict[str, np.ndarray], hold: np.ndarray, clamp: bool,
              layout: Layout, notes: list[str]) -> tuple[np.ndarray, dict[str, np.ndarray], frozenset[str]]:
    """Per-cell values of a role's Hodgkin-Huxley cells, started at rest under their holding
    current (or at the steady state of their voltage clamp).

    Returns:
        (v0 per repeat, variable -> per-cell values, the variables to set only where the
        equations have them: parameters and gates of left-out currents).
    """
    model = role.model
    if clamp:
        v0, found = models.clamp_rest(model, params, float(role.holding_potential),
                                      float(role.series_resistance), hold)
        if not found.all():
            notes.append(f"role {role.name!r}: no steady state of the voltage clamp found in "
                         f"{int((~found).sum())} repeat(s); started at the holding potential")
    elif role.holding_potential is not None:
        # the plan's holding current makes this potential a steady state (checked stable there)
        v0 = np.full(plan.n_repeat, float(role.holding_potential))
    else:
        v0, found = models.hh_rest(model, params, hold)
        if not found.all():
            notes.append(f"role {role.name!r}: no resting state under the holding current in "
                         f"{int((~found).sum())} repeat(s); started at E_leak")
    if not clamp:
        stable = models.holding_is_stable(model, params, v0)
        if not stable.all():
            notes.append(f"role {role.name!r}: the resting state under the holding current is unstable "
                         f"in {int((~stable).sum())} repeat(s): the cell fires or oscillates from the start")
    per_cell = {"area": layout.expand(models.membrane_area(params))}
    optional = models.MODEL_PARAMS[model] + models.HH_RATE_FACTORS[model] + models.hh_gates(model)
    for key in models.MODEL_PARAMS[model] + models.HH_RATE_FACTORS[model]:
        per_cell[key] = layout.expand(params[key])
    per_cell["v"] = layout.expand(v0)
    gates = models.gate_steady_states(model, params, v0)
    for gate in models.hh_gates(model):
        per_cell[gate] = layout.expand(gates[gate])
    return v0, per_cell, frozenset(optional)


#: Stream of the noise processes' starting values (apart from every other use of the seed).
_NOISE_STREAM = 0x0C0FFEE


def _noise_namespace(b2: Any, role: RolePlan, dt: float) -> tuple[tuple[models.NoiseTerm, ...], dict]:
    terms, ns = [], {}
    for k, spec in enumerate(role.noise):
        conductance = spec.reversal is not None
        unit = b2.siemens if conductance else b2.amp
        terms.append(models.NoiseTerm(k, conductance))
        ns[f"noise_start_{k}"] = spec.start * b2.second
        ns[f"noise_stop_{k}"] = spec.stop * b2.second
        ns[f"noise_mean_{k}"] = spec.mean * unit
        ns[f"noise_decay_{k}"] = math.exp(-dt / spec.tau)
        ns[f"noise_kick_{k}"] = spec.sd * math.sqrt(-math.expm1(-2.0 * dt / spec.tau)) * unit
        if conductance:
            ns[f"noise_E_{k}"] = spec.reversal * b2.volt
    return tuple(terms), ns


@dataclass
class StimulusTables:
    """The waveform library and, in the sequential layout, the per-sweep tables that index it:
    where each role finds its column and amplitude factors, and the Brian2 namespace entries."""

    library: StimulusLibrary | None
    column_slot: dict[str, int]        # role -> column of ``sweep_columns`` (waveform varies by sweep)
    scale_slot: dict[str, int]         # role -> first column of ``sweep_scale``
    namespace: dict[str, Any]


def _stimulus_tables(b2: Any, plan: Plan, layout: Layout,
                     ledger: list[Assignment] | None = None) -> StimulusTables:
    lib = stimulus_library(plan, layout)
    namespace: dict[str, Any] = {"sweep_interval": layout.interval * b2.second}
    column_slot: dict[str, int] = {}
    scale_slot: dict[str, int] = {}
    if lib is not None:
        namespace["stim_library"] = timed_array(b2, ledger, "stim_library", lib.values, layout.dt)
        if layout.kind == "sequential":
            varying = [r for r, cols in lib.columns.items() if np.any(cols != cols[0])]
            if varying:
                table = np.stack([lib.columns[r] for r in varying], axis=1).astype(float)
                column_slot = {r: k for k, r in enumerate(varying)}
                namespace["sweep_columns"] = timed_array(b2, ledger, "sweep_columns", table, layout.dt)
            if lib.scales:
                table = np.concatenate([lib.scales[r].T for r in lib.scales], axis=1)
                offsets = np.cumsum([0] + [lib.scales[r].shape[0] for r in lib.scales])
                scale_slot = {r: int(o) for r, o in zip(lib.scales, offsets)}
                namespace["sweep_scale"] = timed_array(b2, ledger, "sweep_scale", table, layout.dt)
    return StimulusTables(lib, column_slot, scale_slot, namespace)


@dataclass
class CellSpec:
    """One membrane role's Brian2 model before any Brian2 object exists.

    Roles with equal ``key`` have identical equations, namespace, events and start-of-step code,
    so one NeuronGroup can hold them all; their ``per_cell`` values are then concatenated role
    after role (:func:`_neuron_group`).
    """

    role: str
    kind: str                          # "adex" | "hh"
    key: tuple
    equations: str
    threshold: str
    reset: str | None
    refractory: str
    method: str
    namespace: dict[str, Any]
    events: dict[str, str]
    update: str                        # start-of-step code, "" for none
    release_vars: list[str]
    per_cell: dict[str, np.ndarray]    # variable -> (n_cells,) values
    optional: frozenset[str] = frozenset()   # per_cell variables set only if the equations declare them
    shared: dict[str, float] = field(default_factory=dict)   # (shared) variables, plain SI numbers


def namespace_key(namespace: dict[str, Any]) -> tuple:
    """A comparable fingerprint of a Brian2 namespace: numbers (and quantities) by dimension and
    value, anything else (TimedArrays, Functions) by identity, so two roles share a group only
    when every name their equations read has the same meaning."""
    out = []
    for name in sorted(namespace):
        value = namespace[name]
        if isinstance(value, (int, float, np.ndarray, np.number)):   # Brian2 quantities are arrays
            arr = np.asarray(value, dtype=float)
            out.append((name, str(getattr(value, "dim", "")), arr.shape, tuple(arr.ravel().tolist())))
        else:
            out.append((name, "object", id(value)))
    return tuple(out)


def _membrane_spec(b2: Any, plan: Plan, role: RolePlan, index: int, layout: Layout, stim: StimulusTables,
                   receptors: list[str], suffix_of: dict[str, str], release_vars: list[str],
                   params: dict[str, np.ndarray], mg_needed: bool, notes: list[str]) -> CellSpec:
    """The model of a membrane role (AdEx or Hodgkin-Huxley) with its per-cell starting values.

    The key holds everything that enters the equations or the namespace: cell model, receptor
    set, Hodgkin-Huxley currents, stimulus text, noise specs and the equation text itself.
    Voltage-clamped roles and roles with release accumulators get their own name in the key
    (their series resistance, holding potential and release events are not merged).
    """
    n = layout.n_cells
    terms = [models.ReceptorTerm(suffix_of[r], plan.receptors[r].mg_block) for r in receptors]
    clamp = role.mode == "voltage clamp"
    stim_expr, decl, stim_cells = (None, (), {})
    if stim.library is not None and role.name in stim.library.columns:
        stim_expr, decl, stim_cells = _stimulus_text(role, layout, stim.library, stim.column_slot, stim.scale_slot)
    noise_terms, noise_ns = _noise_namespace(b2, role, layout.dt)
    inputs = models.CellInputs(stimulus=stim_expr, declarations=decl, clamp=clamp, noise=noise_terms,
                               sweep_time=layout.sweep_time)
    namespace: dict[str, Any] = dict(stim.namespace, **noise_ns)
    for term, rname in zip(terms, receptors):
        rec = plan.receptors[rname]
        pgg, pgx, pxx = models.propagator(rec.rise, rec.decay, layout.dt)
        namespace[f"E_{term.suffix}"] = rec.reversal * b2.volt
        namespace[f"scale_{term.suffix}"] = float(rec.scale)
        namespace[f"P_gg_{term.suffix}"] = pgg
        namespace[f"P_gx_{term.suffix}"] = pgx * b2.second
        namespace[f"P_xx_{term.suffix}"] = pxx
    events = {f"release_{s}": f"deliveries_{s} > 0.5" for s in release_vars}
    hold = (np.zeros(plan.n_repeat) if role.holding_current is None
            else _per_repeat(plan, role.holding_current, f"holding current of role {role.name!r}"))
    per_cell: dict[str, np.ndarray] = {}
    optional: frozenset[str] = frozenset()
    update = ""
    channels: list[str] = []
    if role.model == "adex":
        kind = "adex"
        linear = False
        if clamp:
            rs = float(role.series_resistance)
            tau_clamp = float(np.min(rs * params["C"] / (1.0 + rs * params["gL"])))
            linear = tau_clamp < CLAMP_EXPONENTIAL_STEPS * layout.dt
            if linear:
                notes.append(f"role {role.name!r}: the clamp time constant ({tau_clamp * 1e3:.3g} ms) is "
                             f"below {CLAMP_EXPONENTIAL_STEPS:g} time steps; the cell is integrated by "
                             f"exponential Euler")
        equations = models.adex_equations(terms, inputs, release_vars, linear=linear, gated=role.silenced)
        threshold = models.ADEX_GATED_THRESHOLD if role.silenced else "v > Vcut"
        reset, refractory = "v = Vr\nw += b", "t_ref"
        if role.silenced:
            # a lesion took the spike current away: the cell integrates its inputs but cannot fire
            per_cell["spike_gate"] = np.zeros(n)
        method = "exponential_euler" if linear else "euler"
        if clamp:
            v0, found = models.clamp_rest("adex", params, float(role.holding_potential),
                                          float(role.series_resistance), hold)
            if not found.all():
                notes.append(f"role {role.name!r}: no steady state of the voltage clamp found in "
                             f"{int((~found).sum())} repeat(s); started at the holding potential")
        else:
            v0, has_rest = models.adex_rest(params, hold)
            if not has_rest.all():
                notes.append(f"role {role.name!r}: no resting state under the holding current in "
                             f"{int((~has_rest).sum())} repeat(s); started at EL")
        for key in models.ADEX_PARAMS:
            per_cell[key] = layout.expand(params[key])
        per_cell["v"] = layout.expand(v0)
        per_cell["w"] = layout.expand(params["a"] * (v0 - params["EL"]))
        if linear:
            per_cell["I_exp"] = layout.expand(params["gL"] * params["DeltaT"]
                                              * np.exp((v0 - params["VT"]) / params["DeltaT"]))
            for t in terms:
                if t.mg_block:
                    per_cell[f"B_{t.suffix}"] = models.mg_unblocked(
                        layout.expand(v0), float(plan.conditions["magnesium"]))
            update = models.adex_linear_update(terms)
        else:
            extras = models.load_conductances(inputs)
            if extras:
                update = models.conductance_update(terms, extras)
            elif terms:
                update = models.conductance_update(terms)
    else:
        kind = "hh"
        # leave out currents no repeat has: fewer state variables, same dynamics
        channels = [ch for ch, g in models.hh_channels(role.model).items() if np.any(params[g] > 0)]
        equations = models.hh_equations(role.model, channels, terms, inputs, release_vars, exprel=EXPREL_NAME)
        namespace[EXPREL_NAME] = exprel_function(b2)
        threshold, reset, refractory = HH_SPIKE_THRESHOLD, None, HH_SPIKE_THRESHOLD
        method = "exponential_euler"
        v0, hh_values, optional = _hh_cells(plan, role, params, hold, clamp, layout, notes)
        per_cell.update(hh_values)
        if terms:
            update = models.hh_conductance_update(terms)
    per_cell["I_hold"] = layout.expand(hold)
    per_cell.update(stim_cells)
    if clamp:
        per_cell["V_hold"] = np.full(n, float(role.holding_potential))
        per_cell["R_series"] = np.full(n, float(role.series_resistance))
    if noise_terms:
        rng = np.random.default_rng([int(plan.seed), _NOISE_STREAM, index])
        for term, spec in zip(noise_terms, role.noise):
            # start each process in its stationary distribution
            per_cell[f"noise_{term.index}"] = spec.mean + spec.sd * rng.standard_normal(n)
        update = "\n".join(part for part in (update, models.noise_update(noise_terms)) if part)
    shared: dict[str, float] = {}
    if mg_needed and any(t.mg_block for t in terms):
        shared["Mg"] = float(plan.conditions["magnesium"])
        if kind == "hh":
            for t in terms:
                if t.mg_block:
                    per_cell[f"B_{t.suffix}"] = models.mg_unblocked(
                        layout.expand(v0), float(plan.conditions["magnesium"]))
    key: tuple = (kind, role.model, tuple(receptors), tuple(channels), stim_expr, decl,
                  tuple(astuple(spec) for spec in role.noise), equations, update, method,
                  tuple(sorted(events.items())), namespace_key(namespace), tuple(sorted(shared.items())))
    if clamp or release_vars:
        key += (("alone", role.name),)
    return CellSpec(role=role.name, kind=kind, key=key, equations=equations, threshold=threshold,
                    reset=reset, refractory=refractory, method=method, namespace=namespace, events=events,
                    update=update, release_vars=list(release_vars), per_cell=per_cell, optional=optional,
                    shared=shared)


#: Longest run of joined identifiers in the name of a merged object; longer lists are abbreviated.
MERGED_NAME_LENGTH = 40


def merged_name(prefix: str, idents: list[str], used: set[str]) -> str:
    """A readable Brian2 name for one object standing for several protocol identifiers.

    ``prefix`` and the identifiers joined by ``_`` (``<first>_and_<k>_more`` when that is long),
    made unique against ``used`` (which it extends). The name also stays clear of every
    ``cell_<role>`` name, so the monitors ``trace_<name>`` and ``spikes_<name>`` cannot meet
    a role's own ``trace_<role>`` and ``spikes_<role>``.
    """
    joined = "_".join(idents)
    if len(joined) > MERGED_NAME_LENGTH:
        joined = f"{idents[0]}_and_{len(idents) - 1}_more"
    base = prefix + joined
    name, k = base, 1
    while name in used or "cell_" + name in used:
        k += 1
        name = f"{base}_{k}"
    used.add(name)
    return name


def cell_groups(plan: Plan, specs: dict[str, CellSpec], names: dict[tuple[str, str], str],
                merge: bool) -> list[tuple[str, list[str]]]:
    """Which roles share a Brian2 group: (group name, roles in block order), in plan order.

    Membrane roles with equal :attr:`CellSpec.key` share one group when ``merge`` is on; spike
    sources and every other role stay alone. A group of one role keeps the role's own object
    name (``cell_<role>``); a merged group is called ``cells_<role>_<role>...``.
    """
    members: dict[tuple, list[str]] = {}
    for role in plan.roles:
        spec = specs.get(role.name)
        key = spec.key if (spec is not None and merge) else ("alone", role.name)
        members.setdefault(key, []).append(role.name)
    used = set(names.values())
    out = []
    for roles in members.values():
        if len(roles) == 1:
            out.append((names[("role", roles[0])], roles))
        else:
            out.append((merged_name("cells_", [models.identifier(r) for r in roles], used), roles))
    return out


def _neuron_group(b2: Any, name: str, specs: list[CellSpec], layout: Layout,
                  ledger: list[Assignment] | None = None) -> Any:
    """One NeuronGroup holding the cells of ``specs`` (one key) role after role."""
    first = specs[0]
    for spec in specs[1:]:
        if spec.key != first.key or list(spec.per_cell) != list(first.per_cell):
            raise AssertionError(f"internal error: roles {first.role!r} and {spec.role!r} cannot share a group")
    group = b2.NeuronGroup(layout.n_cells * len(specs), first.equations, threshold=first.threshold,
                           reset=first.reset, refractory=first.refractory, method=first.method,
                           namespace=first.namespace, events=first.events or None, name=name)
    for var in first.per_cell:
        if var in first.optional and var not in group.variables:
            continue
        values = (first.per_cell[var] if len(specs) == 1
                  else np.concatenate([spec.per_cell[var] for spec in specs]))
        assign(ledger, group, var, values)
    for var, value in first.shared.items():
        assign(ledger, group, var, value)
    if first.update:
        group.run_regularly(first.update, when="start", name=f"{name}_conductance")
    for s in first.release_vars:
        event = f"release_{s}"
        group.set_event_schedule(event, when="after_synapses", order=0)
        group.run_on_event(event, f"released_{s} = 0\ndeliveries_{s} = 0", when="after_synapses", order=2)
    return group


def synapse_classes(parts: list[tuple[SynapsePlan, SynapseArrays]], blocks: dict[str, RoleBlock],
                    merge: bool, recorded: bool) -> list[list[tuple[SynapsePlan, SynapseArrays]]]:
    """Which role-to-role synapses share one Brian2 Synapses object, in plan order.

    Synapses whose sources lie in one group and whose targets lie in one group, with the same
    receptors and the same release kind (stochastic or not), merge when ``merge`` is on and
    release is not ``recorded`` (a recorded synapse writes its own per-cell accumulator).
    """
    classes: dict[tuple, list[tuple[SynapsePlan, SynapseArrays]]] = {}
    for syn, arrays in parts:
        key: tuple = (blocks[syn.pre].group, blocks[syn.post].group, arrays.receptors, arrays.stochastic)
        if recorded or not merge:
            key = ("alone", syn.name)
        classes.setdefault(key, []).append((syn, arrays))
    return list(classes.values())


def build_network(plan: Plan, b2: Any, *, record_release: bool = False, merge: bool = True,
                  progress: Callable[[str], None] | None = None, ledger: bool = False) -> Built:
    """Build the Brian2 network of a plan (one network for all repeats and sweeps).

    Args:
        plan: the resolved experiment.
        b2: the imported ``brian2`` module.
        record_release: add per-cell release accumulators and event monitors (role-to-role
            synapses).
        merge: let roles with identical equations share one NeuronGroup, and their synapses
            one Synapses object (:func:`cell_groups`, :func:`synapse_classes`); every Brian2
            object costs a fixed overhead per time step. False builds one object per role and
            per synapse. Deterministic results agree either way to rounding; random draws
            (stochastic release, noise) come in another order.
        progress: optional callable receiving stage messages.
        ledger: keep ``Built.ledger``, every array of numbers written into a group, a Synapses
            object or a TimedArray (:func:`assign`), in the order written.

    Returns:
        The network and its monitors.

    Raises:
        ProtocolError: parameters the simulation cannot use (cited at the plan's spans).
    """
    say = progress or (lambda _msg: None)
    notes: list[str] = []
    layout = make_layout(plan, notes)
    names = object_names(plan)
    fail = Collector()
    _check_receptors(plan, fail)
    roles = {r.name: r for r in plan.roles}
    if len(roles) != len(plan.roles):
        raise AssertionError("internal error: two roles share a name")

    adex_params: dict[str, dict[str, np.ndarray]] = {}
    hh_params: dict[str, dict[str, np.ndarray]] = {}
    spike_sources: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    for role in plan.roles:
        name = names[("role", role.name)]
        if role.spike_times is not None:
            spike_sources[role.name] = _spike_source(plan, role, layout, name, fail, notes)
        elif role.model == "adex":
            adex_params[role.name] = _check_adex(plan, role, name, fail)
        elif role.model in models.HH_MODELS:
            hh_params[role.name] = _check_hh(plan, role, name, fail, notes)
        else:
            fail.fail(f"role {role.name!r} uses cell model {role.model!r}, which the engine cannot simulate",
                      span_of(plan, name, role.name),
                      expected="cell model 'adex', " + ", ".join(repr(m) for m in models.HH_MODELS))
        _check_inputs(plan, role, name, role.spike_times is not None, layout, fail, notes)
    membranes = [r.name for r in plan.roles if r.name in adex_params or r.name in hh_params]
    syn_params: dict[str, dict[str, np.ndarray]] = {}
    for syn in plan.synapses:
        name = names[("synapse", syn.name)]
        if syn.pre not in roles or syn.post not in roles:
            raise AssertionError(f"internal error: synapse {syn.name!r} joins unknown roles")
        if syn.post in spike_sources:
            fail.fail(f"synapse {syn.name!r} ends on role {syn.post!r}, which fires at explicit times and "
                      f"has no membrane", span_of(plan, name, syn.name),
                      expected="a postsynaptic role that is a simulated cell")
        syn_params[syn.name] = _check_synapse(plan, syn, name, fail)
    act_params: dict[str, dict[str, np.ndarray] | None] = {}
    for act in plan.activations:
        name = names[("activation", act.name)]
        if act.target not in roles:
            raise AssertionError(f"internal error: activation {act.name!r} targets unknown role {act.target!r}")
        if act.target in spike_sources:
            fail.fail(f"activation {act.name!r} targets role {act.target!r}, which fires at explicit times "
                      f"and has no membrane", span_of(plan, name, act.name),
                      expected="a target that is a simulated cell")
        act_params[act.name] = _check_activation(plan, act, name, layout, fail, notes)
    fail.raise_if_any()

    # receptors per postsynaptic role (in plan order) and recorded synapses
    needed: dict[str, set[str]] = {r: set() for r in membranes}
    release_on: dict[str, list[str]] = {r: [] for r in membranes}
    for syn in plan.synapses:
        needed[syn.post].update(syn.receptors)
        if record_release:
            release_on[syn.post].append(release_suffix(plan, syn))
    for act in plan.activations:
        needed[act.target].update(act.receptors)
    for role in plan.roles:
        if role.name in needed:
            needed[role.name].update(spec.receptor for spec in role.poisson)
    if plan.network is not None:
        for edge in plan.network.edges:
            if edge.post in needed:
                needed[edge.post].update(edge.weights)
    receptors_on = {r: [rec for rec in plan.receptors if rec in needed[r]] for r in membranes}
    suffix_of: dict[str, str] = {}
    for rname in plan.receptors:
        suffix = models.variable_suffix(rname)
        while suffix in suffix_of.values():     # e.g. "GABA-A" and "GABA_A"
            suffix = f"{suffix}{len(suffix_of)}"
        suffix_of[rname] = suffix
    mg_needed = any(plan.receptors[r].mg_block for recs in receptors_on.values() for r in recs)
    if mg_needed and "magnesium" not in plan.conditions:
        raise AssertionError("internal error: the plan uses a magnesium block but has no 'magnesium' condition")

    b2.defaultclock.dt = layout.dt * b2.second
    objects: list[Any] = []
    built = Built(network=None, layout=layout, names=names, notes=notes, ledger=[] if ledger else None)
    n = layout.n_cells
    stim = _stimulus_tables(b2, plan, layout, built.ledger)

    specs: dict[str, CellSpec] = {}
    for index, role in enumerate(plan.roles):
        if role.name in spike_sources:
            if role.recorded:
                notes.append(f"role {role.name!r} fires at explicit times and has no membrane trace")
            continue
        params = adex_params[role.name] if role.name in adex_params else hh_params[role.name]
        specs[role.name] = _membrane_spec(b2, plan, role, index, layout, stim, receptors_on[role.name],
                                          suffix_of, release_on[role.name], params, mg_needed, notes)
    guests = _population_guests(plan, specs, merge)
    if plan.network is not None:
        objects += _population(b2, plan, built, specs, guests, receptors_on, suffix_of, say)
    grouping = [(g, members) for g, members in cell_groups(plan, specs, names, merge) if members[0] not in guests]
    say(f"building {len(grouping)} cell group(s) for {len(plan.roles)} role(s), {n} cell(s) each "
        f"({layout.kind} layout)")
    for gname, members in grouping:
        if members[0] in spike_sources:
            idx, times = spike_sources[members[0]]
            group = b2.SpikeGeneratorGroup(n, idx, times * b2.second, name=gname)
        else:
            group = _neuron_group(b2, gname, [specs[r] for r in members], layout, built.ledger)
        objects.append(group)
        built.groups[gname] = list(members)
        if len(members) > 1:
            built.merged[gname] = ("role", tuple(members))
        for k, r in enumerate(members):
            built.blocks[r] = RoleBlock(gname, k * n, n)
            built.cells[r] = group
    for role in plan.roles:
        if role.name in specs:
            (built.adex_roles if specs[role.name].kind == "adex" else built.hh_roles).append(role.name)

    say(f"building {len(plan.synapses)} synapse group(s)")
    parts: list[tuple[SynapsePlan, SynapseArrays]] = []
    for syn in plan.synapses:
        sp = syn_params[syn.name]
        sites = np.round(sp["n_sites"]).astype(np.int64)
        repeats = np.flatnonzero(sp["connected"] & (sites > 0))
        cells, rep_of_cell = layout.cells_of_repeats(repeats)
        arrays = _tm_arrays(plan, built.blocks[syn.pre].cells(cells), built.blocks[syn.post].cells(cells),
                            rep_of_cell, sp, syn.receptors, syn.stochastic, suffix_of)
        built.n_synapses[syn.name] = arrays.size
        if arrays.size == 0:
            notes.append(f"synapse {syn.name!r} connects no repeat; it is left out of the network")
        else:
            parts.append((syn, arrays))
    used = set(names.values()) | set(built.groups)
    for members in synapse_classes(parts, built.blocks, merge, record_release):
        first = members[0][0]
        if len(members) == 1:
            name = names[("synapse", first.name)]
        else:
            name = merged_name("syns_", [models.identifier(s.name) for s, _ in members], used)
            built.merged[name] = ("synapse", tuple(s.name for s, _ in members))
        rel_var = release_suffix(plan, first) if record_release else None
        objects.append(_tm_object(b2, name, built.cells[first.pre], built.cells[first.post],
                                  SynapseArrays.concat([arrays for _, arrays in members]), rel_var,
                                  built.ledger))
    if record_release:
        for syn in plan.synapses:
            # roles receiving recorded synapses are never merged, so the monitor's cells are the role's
            rel_var = release_suffix(plan, syn)
            mon = b2.EventMonitor(built.cells[syn.post], f"release_{rel_var}", variables=[f"released_{rel_var}"],
                                  when="after_synapses", order=1,
                                  name="release_" + names[("synapse", syn.name)].removeprefix("syn_"))
            objects.append(mon)
            built.release_monitors[syn.name] = (mon, f"released_{rel_var}")

    # Poisson inputs: one source cell per replica, on only inside its window
    for role in plan.roles:
        name = names[("role", role.name)]
        for k, spec in enumerate(role.poisson):
            key = f"{role.name}_poisson_{k}"
            if spec.rate <= 0 or spec.conductance <= 0:
                notes.append(f"role {role.name!r}: Poisson input {k + 1} has no rate or no conductance; "
                             f"it is left out of the network")
                built.input_monitors[key] = (None, np.zeros(0, dtype=np.int64))
                continue
            rec = plan.receptors[spec.receptor]
            jump = spec.conductance * models.peak_factor(rec.rise, rec.decay)
            if spec.background and role.name in guests:
                continue    # the population's own background input reaches the guest's cells
            if spec.background:
                # ongoing drive of an embedded network: always on, events not recorded, so the
                # binomial PoissonInput does it with one code object instead of three
                block = built.blocks[role.name]
                objects.append(b2.PoissonInput(built.cells[role.name][block.start:block.stop],
                                               f"x_{suffix_of[spec.receptor]}", N=1, rate=spec.rate * b2.Hz,
                                               weight=jump * b2.siemens / b2.second))
                continue
            ts = layout.sweep_time
            source = b2.PoissonGroup(
                n, rates=f"poisson_rate*int({ts} >= poisson_start and {ts} < poisson_stop)",
                namespace={"poisson_rate": spec.rate * b2.Hz, "poisson_start": spec.start * b2.second,
                           "poisson_stop": spec.stop * b2.second, "sweep_interval": layout.interval * b2.second},
                name=f"{name}_poisson{k}")
            link = b2.Synapses(source, built.cells[role.name],
                               on_pre=f"x_{suffix_of[spec.receptor]}_post += poisson_jump",
                               namespace={"poisson_jump": jump * b2.siemens / b2.second},
                               name=f"{name}_poisson{k}_syn")
            link.connect(i=np.arange(n), j=built.blocks[role.name].cells())
            mon = b2.SpikeMonitor(source, record=True, name=f"inputs_{name.removeprefix('cell_')}_poisson{k}")
            objects += [source, link, mon]
            built.input_monitors[key] = (mon, np.arange(n))

    # extracellular activation: every source once per replica it feeds
    for act in plan.activations:
        name = names[("activation", act.name)]
        ap = act_params[act.name]
        m = int(ap["source_repeat"].size)
        if m == 0 or ap["times"].size == 0:
            notes.append(f"activation {act.name!r} activates no cell; it is left out of the network")
            built.input_monitors[act.name] = (None, np.zeros(0, dtype=np.int64))
            built.n_synapses[act.name] = 0
            continue
        if layout.kind == "replicas":
            n_gen = m * layout.n_sweeps
            gen_target = (ap["source_repeat"][:, None] * layout.n_sweeps
                          + np.arange(layout.n_sweeps)[None, :]).ravel()
            gen_param = np.repeat(np.arange(m), layout.n_sweeps)
        else:
            n_gen = m
            gen_target = ap["source_repeat"].copy()
            gen_param = np.arange(m)
        per_gen = _run_times(ap["times"], layout)
        source = b2.SpikeGeneratorGroup(n_gen, np.repeat(np.arange(n_gen), per_gen.size),
                                        np.tile(per_gen, n_gen) * b2.second, name=name)
        valid = np.flatnonzero(np.round(ap["n_sites"])[gen_param] > 0)
        group, count = _tm_synapses(b2, plan, f"{name}_syn", source, built.cells[act.target], valid,
                                    built.blocks[act.target].cells(gen_target[valid]), gen_param[valid], ap,
                                    act.receptors, act.stochastic, suffix_of, ledger=built.ledger)
        built.n_synapses[act.name] = count
        mon = b2.SpikeMonitor(source, record=True, name=f"inputs_{name.removeprefix('act_')}")
        objects += [source, mon] + ([group] if group is not None else [])
        built.input_monitors[act.name] = (mon, gen_target)

    if plan.network is not None:
        objects += _network_connections(b2, plan, built, suffix_of)
    objects += _monitors(b2, plan, built, membranes)
    built.network = b2.Network(*objects, name="protolang_network")
    return built


def _population_guests(plan: Plan, specs: dict[str, CellSpec], merge: bool) -> list[str]:
    """Selected cells of an embedded run that can live in the population's group: free AdEx cells
    (current clamp or unrecorded, no waveform, no noise or Poisson input but the background, no
    release accumulators). Their connections then share the population's Synapses objects."""
    if plan.network is None or not merge:
        return []
    out = []
    for role in plan.roles:
        spec = specs.get(role.name)
        if spec is None or spec.kind != "adex" or role.mode == "voltage clamp" or spec.release_vars:
            continue
        if role.pulses or role.segments or role.amplitude_scale is not None or "I_exp" in spec.per_cell:
            continue
        if not all(x.background for x in role.noise) or not all(x.background for x in role.poisson):
            continue
        out.append(role.name)
    return out


def _population(b2: Any, plan: Plan, built: Built, specs: dict[str, CellSpec], guests: list[str],
                receptors_on: dict[str, list[str]], suffix_of: dict[str, str],
                say: Callable[[str], None]) -> list[Any]:
    """The embedded network's population group (with its guest roles after its own cells), its
    background input and its spike monitor."""
    from .network import POPULATION_NAME, build_population

    net = plan.network
    if built.layout.kind != "sequential":
        raise AssertionError("internal error: an embedded network in the replicas layout")
    say(f"building the embedded network: {net.population.size} cells, {len(net.edges)} connection set(s), "
        f"{len(guests)} selected cell role(s) inside it")
    roles = {r.name: r for r in plan.roles}
    group, objects = build_population(
        b2, plan, suffix_of, built.layout.dt,
        [(specs[r].per_cell, roles[r].cell_class, roles[r].silenced, receptors_on[r]) for r in guests])
    objects.append(group)
    if built.ledger is not None:
        _record_state(built.ledger, group)
    built.population = group
    n, start = built.layout.n_cells, net.population.size
    if guests:
        built.groups[group.name] = list(guests)
    for k, r in enumerate(guests):
        built.blocks[r] = RoleBlock(group.name, start + k * n, n)
        built.cells[r] = group
    built.population_spikes = b2.SpikeMonitor(group, name=f"spikes_{POPULATION_NAME}")
    objects.append(built.population_spikes)
    return objects


def _record_state(ledger: list[Assignment], group: Any) -> None:
    """Record the state variables of a group that :mod:`protolang.engine.network` filled (the
    embedded population), read back from the group in equation order, so the ledger lists
    them like the values written through :func:`assign`."""
    eqs = group.equations
    for name in (eq.varname for eq in eqs.ordered):
        if name in eqs.diff_eq_names or name in eqs.parameter_names:
            ledger.append(Assignment(group.name, name, np.array(getattr(group, name + "_"), copy=True), group))


def _network_connections(b2: Any, plan: Plan, built: Built, suffix_of: dict[str, str]) -> list[Any]:
    """The embedded network's connections: one Synapses object per pair of Brian2 groups, its
    receptor sets sharing it (each connection's weight of a receptor its pathway lacks is 0: a
    few additions per event instead of one more object's overhead every step)."""
    from .network import POPULATION_NAME, edge_values

    group = built.population

    def endpoint(name: str, index: np.ndarray) -> tuple[Any, np.ndarray]:
        if name == POPULATION_NAME:
            return group, index
        # a role's cell k of the sequential layout is its repeat k
        return built.cells[name], built.blocks[name].cells(index)

    pairs: dict[tuple[str, str, bool], list] = {}
    for edge in plan.network.edges:
        source, _ = endpoint(edge.pre, edge.pre_index[:0])
        target, _ = endpoint(edge.post, edge.post_index[:0])
        pairs.setdefault((source.name, target.name, edge.stochastic), []).append(edge)
    objects = []
    for (source_name, target_name, stochastic), edges in pairs.items():
        receptors = [r for r in plan.receptors if any(r in e.weights for e in edges)]
        parts = []
        for edge in edges:
            source, pre = endpoint(edge.pre, edge.pre_index)
            target, post = endpoint(edge.post, edge.post_index)
            weights = {r: edge.weights.get(r, np.zeros(edge.size)) for r in receptors}
            arrays = _tm_arrays(plan, pre, post, np.arange(edge.size), edge_values(edge), weights,
                                stochastic, suffix_of)
            built.n_synapses[f"network:{edge.name}"] = arrays.size
            if arrays.size:
                parts.append(arrays)
        if parts:
            objects.append(_tm_object(b2, f"net_{source_name}_to_{target_name}", source, target,
                                      SynapseArrays.concat(parts), ledger=built.ledger))
    return objects


def _monitors(b2: Any, plan: Plan, built: Built, membranes: list[str]) -> list[Any]:
    """One trace monitor (recorded roles' cells only) and one spike monitor per group.

    A group of one role names them ``trace_<role>`` and ``spikes_<role>``; a merged group
    ``trace_<group>`` and ``spikes_<group>``.
    """
    layout, roles = built.layout, {r.name: r for r in plan.roles}
    out = []
    for gname, members in built.groups.items():
        group = built.cells[members[0]]
        ident = built.names[("role", members[0])].removeprefix("cell_") if len(members) == 1 else gname
        recorded = [r for r in members if roles[r].recorded and r in membranes]
        if recorded:
            variables = {"I_clamp" if roles[r].mode == "voltage clamp" else "v" for r in recorded}
            if len(variables) != 1:
                raise AssertionError(f"internal error: group {gname!r} mixes clamped and unclamped roles")
            var = variables.pop()
            cells = np.concatenate([built.blocks[r].cells() for r in recorded])
            whole = len(recorded) == len(members) and group is not built.population
            mon = b2.StateMonitor(group, var, record=True if whole else cells,
                                  dt=layout.sample_dt * b2.second, name=f"trace_{ident}")
            out.append(mon)
            for k, r in enumerate(recorded):
                built.trace_monitors[r] = mon
                built.trace_rows[r] = slice(k * layout.n_cells, (k + 1) * layout.n_cells)
                built.trace_variables[r] = var
                built.trace_units[r] = "A" if var == "I_clamp" else "V"
        if group is built.population:
            spikes = built.population_spikes      # guests of the population share its monitor
        else:
            spikes = b2.SpikeMonitor(group, name=f"spikes_{ident}")
            out.append(spikes)
        for r in members:
            built.spike_monitors[r] = spikes
    return out
