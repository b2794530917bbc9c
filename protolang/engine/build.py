"""Network builder: takes a Plan and the brian2 module, hands out one explicit Brian2 Network of named objects with its monitors.

Cell models: adaptive exponential integrate-and-fire (forward Euler, spike cut and reset) and
the Hodgkin-Huxley-type models of :mod:`protolang.engine.models` (exponential Euler; a spike is
counted when v rises above 0 mV, and the cell stays refractory while v > 0 mV, so each spike
counts once). Temperature enters through the rate factors the plan puts in each role's
parameters and through the receptor time constants the plan has already scaled: the engine
applies no temperature scaling of its own.

Object names follow protocol identifiers so diagnostics can cite the protocol:
``cell_<role>`` (NeuronGroup or SpikeGeneratorGroup), ``syn_<synapse>`` (Synapses),
``trace_<role>``, ``spikes_<role>``, ``release_<synapse>`` (monitors), ``stim_library``.
Every per-replica array is built with numpy (no Python loop over replicas), and
connectivity is passed as explicit i/j arrays so every code-generation target builds the
same network.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np

from protolang.engine import models
from protolang.language.errors import Collector, Span
from protolang.plan.model import Plan, RolePlan, SynapsePlan

#: Rate standing in for "instantaneous" (D or F equal to 0): exp(-dt*rate) underflows to 0.
INSTANT_RATE = 1e12


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


@dataclass
class Built:
    """The network and the handles needed to read it back."""

    network: Any
    layout: Layout
    names: dict[tuple[str, str], str]
    cells: dict[str, Any] = field(default_factory=dict)              # role -> group
    adex_roles: list[str] = field(default_factory=list)
    hh_roles: list[str] = field(default_factory=list)
    trace_monitors: dict[str, Any] = field(default_factory=dict)     # role -> StateMonitor
    spike_monitors: dict[str, Any] = field(default_factory=dict)     # role -> SpikeMonitor
    release_monitors: dict[str, tuple[Any, str]] = field(default_factory=dict)  # syn -> (mon, var)
    n_synapses: dict[str, int] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)


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
    span = span_of(plan, name, syn.name)
    rules = (("U", (s["U"] >= 0) & (s["U"] <= 1), "a release probability between 0 and 1"),
             ("D", s["D"] >= 0, "a recovery time constant >= 0"),
             ("F", s["F"] >= 0, "a facilitation time constant >= 0"),
             ("delay", s["delay"] >= 0, "a delay >= 0"),
             ("site_conductance", s["site_conductance"] >= 0, "a conductance >= 0"),
             ("n_sites", (s["n_sites"] >= 0) & (s["n_sites"] == np.round(s["n_sites"])),
              "a whole number of release sites >= 0"))
    for key, ok, expected in rules:
        bad = connected & ~(ok & np.isfinite(s[key]))
        if bad.any():
            fail.fail(f"synapse {syn.name!r}: {key} is {s[key][bad][0]:g} "
                      f"(repeat {int(np.flatnonzero(bad)[0])})", span, expected=expected)
    for rec in syn.receptors:
        if rec not in plan.receptors:
            raise AssertionError(f"internal error: synapse {syn.name!r} uses unknown receptor {rec!r}")
    return s


def _check_receptors(plan: Plan, fail: Collector) -> None:
    for rname, rec in plan.receptors.items():
        span = span_of(plan, f"receptor_{models.identifier(rname)}", rname)
        if not (rec.decay > 0 and np.isfinite(rec.decay)):
            fail.fail(f"receptor {rname!r}: decay time constant {rec.decay!r} s is not positive", span,
                      expected="a positive decay time constant")
        if not (rec.rise >= 0 and np.isfinite(rec.rise)):
            fail.fail(f"receptor {rname!r}: rise time constant {rec.rise!r} s is negative", span,
                      expected="a rise time constant >= 0 (0 for an instantaneous rise)")


def _spike_source(plan: Plan, role: RolePlan, layout: Layout, name: str,
                  fail: Collector, notes: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """Indices and times of a role that fires at explicit times in every sweep."""
    times = np.sort(np.asarray(role.spike_times, dtype=float).ravel())
    span = span_of(plan, name, role.name)
    if times.size and (not np.isfinite(times).all() or times[0] < 0):
        fail.fail(f"role {role.name!r} fires at a negative or undefined time", span,
                  expected="spike times >= 0 within the sweep")
        return np.zeros(0, np.int64), np.zeros(0)
    inside = times < layout.sweep_length
    if not inside.all():
        notes.append(f"role {role.name!r}: {int((~inside).sum())} spike(s) after the end of the sweep "
                     f"are not simulated")
        times = times[inside]
    steps = np.round(times / layout.dt).astype(np.int64)
    if np.any(np.diff(steps) == 0):
        fail.fail(f"role {role.name!r} fires twice within one time step ({layout.dt * 1e3:g} ms)", span,
                  expected="spike times at least one time step apart")
        return np.zeros(0, np.int64), np.zeros(0)
    step_times = steps * layout.dt
    n = layout.n_cells
    if layout.kind == "replicas":
        return np.repeat(np.arange(n), steps.size), np.tile(step_times, n)
    interval_steps = int(round(layout.interval / layout.dt))
    per_cell = (step_times[None, :] + (np.arange(layout.n_sweeps)[:, None] * interval_steps) * layout.dt).ravel()
    return np.repeat(np.arange(n), per_cell.size), np.tile(per_cell, n)


def _stimulus_library(plan: Plan, layout: Layout) -> tuple[np.ndarray | None, dict[str, int]]:
    """One column per distinct pulse waveform (A, sampled at dt), plus a trailing zero row."""
    columns: dict[tuple, int] = {}
    role_column: dict[str, int] = {}
    for role in plan.roles:
        if role.spike_times is not None or not role.pulses:
            continue
        key = tuple(sorted((float(p.start), float(p.duration), float(p.amplitude)) for p in role.pulses))
        role_column[role.name] = columns.setdefault(key, len(columns))
    if not columns:
        return None, role_column
    n_steps = int(round(layout.sweep_length / layout.dt))
    # the last row stays 0: Brian2 holds the last value beyond the end (sequential gaps)
    values = np.zeros((n_steps + 1, len(columns)))
    for key, col in columns.items():
        for start, duration, amplitude in key:
            on = int(round(start / layout.dt))
            off = int(round((start + duration) / layout.dt))
            on, off = max(on, 0), min(off, n_steps)
            if off > on:
                values[on:off, col] += amplitude
    return values, role_column


def _hh_group(b2: Any, plan: Plan, role: RolePlan, params: dict[str, np.ndarray], hold: np.ndarray,
              terms: list, stim_expr: str | None, release_vars: list[str],
              namespace: dict, events: dict, layout: Layout, name: str,
              notes: list[str]) -> tuple[Any, np.ndarray]:
    """A NeuronGroup of Hodgkin-Huxley cells, started at rest under their holding current."""
    model = role.model
    # leave out currents no repeat has: fewer state variables, same dynamics
    channels = [ch for ch, g in models.hh_channels(model).items() if np.any(params[g] > 0)]
    eqs = models.hh_equations(model, channels, terms, stim_expr, release_vars, exprel=EXPREL_NAME)
    namespace = dict(namespace, **{EXPREL_NAME: exprel_function(b2)})
    group = b2.NeuronGroup(layout.n_cells, eqs, threshold=HH_SPIKE_THRESHOLD,
                           refractory=HH_SPIKE_THRESHOLD, method="exponential_euler",
                           namespace=namespace, events=events or None, name=name)
    if role.holding_potential is not None:
        # the plan's holding current makes this potential a steady state (checked stable there)
        v0 = np.full(plan.n_repeat, float(role.holding_potential))
    else:
        v0, found = models.hh_rest(model, params, hold)
        if not found.all():
            notes.append(f"role {role.name!r}: no resting state under the holding current in "
                         f"{int((~found).sum())} repeat(s); started at E_leak")
    stable = models.holding_is_stable(model, params, v0)
    if not stable.all():
        notes.append(f"role {role.name!r}: the resting state under the holding current is unstable "
                     f"in {int((~stable).sum())} repeat(s): the cell fires or oscillates from the start")
    area = models.membrane_area(params)
    group.area_ = layout.expand(area)
    for key in models.MODEL_PARAMS[model] + models.HH_RATE_FACTORS[model]:
        if key in group.variables:
            setattr(group, key + "_", layout.expand(params[key]))
    group.v_ = layout.expand(v0)
    gates = models.gate_steady_states(model, params, v0)
    for gate in models.hh_gates(model):
        if gate in group.variables:
            setattr(group, gate + "_", layout.expand(gates[gate]))
    return group, v0


def build_network(plan: Plan, b2: Any, *, record_release: bool = False,
                  progress: Callable[[str], None] | None = None) -> Built:
    """Build the Brian2 network of a plan (one network for all repeats and sweeps).

    Args:
        plan: the resolved experiment.
        b2: the imported ``brian2`` module.
        record_release: add per-cell release accumulators and event monitors.
        progress: optional callable receiving stage messages.

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
    fail.raise_if_any()

    # receptors and recorded synapses per postsynaptic role, in plan order
    receptors_on: dict[str, list[str]] = {r: [] for r in membranes}
    release_on: dict[str, list[str]] = {r: [] for r in membranes}
    for syn in plan.synapses:
        for rec in plan.receptors:
            if rec in syn.receptors and rec not in receptors_on[syn.post]:
                receptors_on[syn.post].append(rec)
        if record_release:
            release_on[syn.post].append(release_suffix(plan, syn))
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
    built = Built(network=None, layout=layout, names=names, notes=notes)

    library, role_column = _stimulus_library(plan, layout)
    stim_library = None
    if library is not None:
        stim_library = b2.TimedArray(library * b2.amp, dt=layout.dt * b2.second, name="stim_library")
        if layout.kind == "replicas":
            stim_expr = "stim_library(t, stim_index)"
        else:
            # a quarter step keeps t on the right side of each sweep start after the modulo
            stim_expr = "stim_library((t + 0.25*dt) % sweep_interval, stim_index)"

    say(f"building {len(plan.roles)} cell group(s) of {layout.n_cells} cell(s) ({layout.kind} layout)")
    n = layout.n_cells
    for role in plan.roles:
        name = names[("role", role.name)]
        if role.name in spike_sources:
            idx, times = spike_sources[role.name]
            group = b2.SpikeGeneratorGroup(n, idx, times * b2.second, name=name)
            objects.append(group)
            built.cells[role.name] = group
            if role.recorded:
                notes.append(f"role {role.name!r} fires at explicit times and has no membrane trace")
            continue
        terms = [models.ReceptorTerm(suffix_of[r], plan.receptors[r].mg_block)
                 for r in receptors_on[role.name]]
        has_stim = role.name in role_column
        namespace: dict[str, Any] = {}
        if has_stim:
            namespace["stim_library"] = stim_library
            namespace["sweep_interval"] = layout.interval * b2.second
        for term, rname in zip(terms, receptors_on[role.name]):
            rec = plan.receptors[rname]
            pgg, pgx, pxx = models.propagator(rec.rise, rec.decay, layout.dt)
            namespace[f"E_{term.suffix}"] = rec.reversal * b2.volt
            namespace[f"scale_{term.suffix}"] = float(rec.scale)
            namespace[f"P_gg_{term.suffix}"] = pgg
            namespace[f"P_gx_{term.suffix}"] = pgx * b2.second
            namespace[f"P_xx_{term.suffix}"] = pxx
        events = {f"release_{s}": f"deliveries_{s} > 0.5" for s in release_on[role.name]}
        hold = (np.zeros(plan.n_repeat) if role.holding_current is None
                else _per_repeat(plan, role.holding_current, f"holding current of role {role.name!r}"))
        if role.name in adex_params:
            eqs = models.adex_equations(terms, stim_expr if has_stim else None, release_on[role.name])
            group = b2.NeuronGroup(n, eqs, threshold="v > Vcut", reset="v = Vr\nw += b",
                                   refractory="t_ref", method="euler", namespace=namespace,
                                   events=events or None, name=name)
            params = adex_params[role.name]
            v0, has_rest = models.adex_rest(params, hold)
            if not has_rest.all():
                notes.append(f"role {role.name!r}: no resting state under the holding current in "
                             f"{int((~has_rest).sum())} repeat(s); started at EL")
            for key in models.ADEX_PARAMS:
                setattr(group, key + "_", layout.expand(params[key]))
            group.v_ = layout.expand(v0)
            group.w_ = layout.expand(params["a"] * (v0 - params["EL"]))
            built.adex_roles.append(role.name)
        else:
            group, v0 = _hh_group(b2, plan, role, hh_params[role.name], hold, terms,
                                  stim_expr if has_stim else None, release_on[role.name], namespace,
                                  events, layout, name, notes)
            built.hh_roles.append(role.name)
        group.I_hold_ = layout.expand(hold)
        if has_stim:
            group.stim_index_ = np.full(n, role_column[role.name], dtype=np.int32)
        if mg_needed and any(t.mg_block for t in terms):
            group.Mg_ = float(plan.conditions["magnesium"])
            if role.name in hh_params:
                for t in terms:
                    if t.mg_block:
                        setattr(group, f"B_{t.suffix}_", models.mg_unblocked(
                            layout.expand(v0), float(plan.conditions["magnesium"])))
        if terms:
            update = (models.conductance_update(terms) if role.name in adex_params
                      else models.hh_conductance_update(terms))
            group.run_regularly(update, when="start", name=f"{name}_conductance")
        for s in release_on[role.name]:
            event = f"release_{s}"
            group.set_event_schedule(event, when="after_synapses", order=0)
            group.run_on_event(event, f"released_{s} = 0\ndeliveries_{s} = 0",
                               when="after_synapses", order=2)
        objects.append(group)
        built.cells[role.name] = group

    say(f"building {len(plan.synapses)} synapse group(s)")
    for syn in plan.synapses:
        name = names[("synapse", syn.name)]
        sp = syn_params[syn.name]
        suffixes = [suffix_of[r] for r in plan.receptors if r in syn.receptors]
        rec_names = [r for r in plan.receptors if r in syn.receptors]
        rel_var = release_suffix(plan, syn) if record_release else None
        sites = np.round(sp["n_sites"]).astype(np.int64)
        repeats = np.flatnonzero(sp["connected"] & (sites > 0))
        cells, rep_of_cell = layout.cells_of_repeats(repeats)
        if syn.stochastic:
            count = sites[rep_of_cell]
            cells, rep_of_cell = np.repeat(cells, count), np.repeat(rep_of_cell, count)
        built.n_synapses[syn.name] = int(cells.size)
        if cells.size == 0:
            notes.append(f"synapse {syn.name!r} connects no repeat; it is left out of the network")
        else:
            group = b2.Synapses(built.cells[syn.pre], built.cells[syn.post],
                                model=models.synapse_model(syn.stochastic, suffixes),
                                on_pre=models.synapse_on_pre(syn.stochastic, suffixes, rel_var),
                                namespace={}, name=name)
            group.connect(i=cells, j=cells)
            group.U_ = sp["U"][rep_of_cell]
            with np.errstate(divide="ignore"):
                group.rate_D_ = np.where(sp["D"] > 0, 1.0 / sp["D"], INSTANT_RATE)[rep_of_cell]
                group.rate_F_ = np.where(sp["F"] > 0, 1.0 / sp["F"], INSTANT_RATE)[rep_of_cell]
            group.u_fac_ = 0.0
            group.t_last_ = 0.0
            if syn.stochastic:
                group.available_ = 1.0
            else:
                group.R_ = 1.0
                group.sites_ = sites[rep_of_cell].astype(float)
            for suffix, rname in zip(suffixes, rec_names):
                rec = plan.receptors[rname]
                q = (sp["site_conductance"] * float(syn.receptors[rname])
                     * models.peak_factor(rec.rise, rec.decay))
                setattr(group, f"q_{suffix}_", q[rep_of_cell])
            group.delay_ = sp["delay"][rep_of_cell]
            objects.append(group)
        if record_release:
            post = built.cells[syn.post]
            mon = b2.EventMonitor(post, f"release_{rel_var}", variables=[f"released_{rel_var}"],
                                  when="after_synapses", order=1,
                                  name="release_" + name.removeprefix("syn_"))
            objects.append(mon)
            built.release_monitors[syn.name] = (mon, f"released_{rel_var}")

    for role in plan.roles:
        ident = names[("role", role.name)].removeprefix("cell_")
        group = built.cells[role.name]
        if role.recorded and role.name in membranes:
            mon = b2.StateMonitor(group, "v", record=True, dt=layout.sample_dt * b2.second,
                                  name=f"trace_{ident}")
            objects.append(mon)
            built.trace_monitors[role.name] = mon
        spikes = b2.SpikeMonitor(group, name=f"spikes_{ident}")
        objects.append(spikes)
        built.spike_monitors[role.name] = spikes

    built.network = b2.Network(*objects, name="protolang_network")
    return built
