"""Engine facade: takes a Plan, builds and runs its Brian2 network, hands out Recordings.

This package is the only part of protolang that imports Brian2, and it does so lazily (inside
``run_plan``), so the language front end stays fast. Every call uses its own explicit Network,
resets the default clock, seeds Brian2 from the plan and restores the preferences it changed.
"""

from __future__ import annotations

import os
import sys
import time
from typing import Any, Callable

import numpy as np

from protolang.engine import collect
from protolang.engine.build import Built, build_network, span_of
from protolang.engine.recordings import Recordings
from protolang.language.errors import Collector, ProtocolError, error, suggest
from protolang.plan.model import Plan

TARGETS = ("numpy", "cython", "auto")

#: A membrane potential beyond +-1 V means the integration ran away (NaN compares False too).
MAX_PLAUSIBLE_V = 1.0

# Warnings Brian2 emits for code we generate on purpose; they say nothing about the protocol.
_EXPECTED_WARNINGS = (
    "abstract code block that may not be well-defined",
)

_brian2: Any = None
_cython_works: bool | None = None


def _import_brian2() -> Any:
    """Import brian2 once, with its debug log file switched off."""
    global _brian2
    if _brian2 is not None:
        return _brian2
    hook = sys.excepthook
    import brian2

    # Brian2 installs an excepthook that blames Brian2 for any uncaught error in the process.
    if getattr(hook, "__module__", "").startswith("brian2"):
        hook = sys.__excepthook__
    sys.excepthook = hook
    from brian2.utils.logger import BrianLogger

    # Brian2 opens its log file at import time; close it and remove it so runs leave no
    # brian_debug_*.log behind (console logging stays).
    brian2.prefs.logging.file_log = False
    handler = BrianLogger.file_handler
    if handler is not None:
        import logging

        logging.getLogger("brian2").removeHandler(handler)
        handler.close()
        BrianLogger.file_handler = None
        for path in (BrianLogger.tmp_log, getattr(BrianLogger, "tmp_script", None)):
            if path:
                try:
                    os.remove(path)
                except OSError:
                    pass
        BrianLogger.tmp_log = None
        BrianLogger.tmp_script = None
    _brian2 = brian2
    return brian2


def cython_cache_dir() -> str:
    """Directory of compiled Cython extensions: ``$CYTHON_CACHE_DIR/brian_extensions``, else
    ``./.cache/cython/brian_extensions`` under the current directory (Brian2's own layout, so the
    cache is shared with Brian2 runs that set CYTHON_CACHE_DIR)."""
    base = os.environ.get("CYTHON_CACHE_DIR") or os.path.join(os.getcwd(), ".cache", "cython")
    return os.path.join(base, "brian_extensions")


def _cython_available() -> bool:
    global _cython_works
    if _cython_works is None:
        from brian2.codegen.runtime.cython_rt.cython_rt import CythonCodeObject
        from brian2.utils.logger import catch_logs

        with catch_logs():
            _cython_works = bool(CythonCodeObject.is_available())
    return _cython_works


def _resolve_target(target: str, b2: Any) -> str:
    if target not in TARGETS:
        raise error(f"unknown simulation target {target!r}", None,
                    expected="one of " + ", ".join(TARGETS), hint=suggest(target, TARGETS))
    if target == "auto":
        return "cython" if _cython_available() else "numpy"
    if target == "cython" and not _cython_available():
        raise error("the cython target needs a working C++ compiler, and none was found", None,
                    expected="a C++ compiler (g++ or clang++) on PATH",
                    hint="use the numpy target, or 'auto' to fall back to it")
    return target


def _describe(name: str, built: Built | None, plan: Plan) -> tuple[str, Any]:
    """Plain words and span for a Brian2 object name of this plan (or one it contains).

    An object standing for several roles or synapses (merged) names them all and is cited at
    the first one's span.
    """
    names = built.names if built is not None else {}
    candidates = [(obj_name, kind, (ident,)) for (kind, ident), obj_name in names.items()]
    if built is not None:
        candidates += [(obj_name, kind, idents) for obj_name, (kind, idents) in built.merged.items()]
    # longest names first, so "cell_pre_x_..." is not taken for role "pre"
    for obj_name, kind, idents in sorted(candidates, key=lambda item: -len(item[0])):
        if name == obj_name or name.startswith(obj_name + "_"):
            word = {"role": "cell role", "synapse": "synapse"}.get(kind, "extracellular activation")
            first = idents[0]
            if len(idents) > 1:
                word = {"role": "cell roles", "synapse": "synapses"}[kind]
                return (f"{word} {', '.join(repr(i) for i in idents)}",
                        span_of(plan, names.get((kind, first), obj_name), first))
            return f"{word} {first!r}", span_of(plan, obj_name, first)
    return f"simulation object {name!r}", span_of(plan, name)


def _brian_failure(exc: BaseException, stage: str, plan: Plan, built: Built | None) -> ProtocolError:
    """A ProtocolError for an exception raised by Brian2 while building or running."""
    from brian2.core.base import BrianObjectException

    if isinstance(exc, MemoryError):
        return error(f"out of memory while {stage} the simulation "
                     f"({plan.n_replicas} cells per role)", None,
                     expected="a smaller simulation",
                     hint="use fewer repeats or sweeps, a shorter sweep or a longer sampling interval")
    original = exc.__cause__ if isinstance(exc, BrianObjectException) and exc.__cause__ else exc
    reason = f"{type(original).__name__}: {original}".strip().splitlines()[0]
    if isinstance(exc, BrianObjectException):
        what, span = _describe(getattr(exc, "_brian_objname", "?"), built, plan)
        return error(f"the simulator failed while {stage} {what}: {reason}", span,
                     hint="check this object's parameters; if they look right, please report the "
                          "problem with the plan (protolang plan --dump)")
    return error(f"the simulator failed while {stage} the network: {reason}", None,
                 hint="please report the problem with the plan (protolang plan --dump)")


def _where(cell: int, layout: Any) -> str:
    if layout.kind == "replicas":
        return f"repeat {cell // layout.n_sweeps}, sweep {cell % layout.n_sweeps}"
    return f"repeat {cell}"


def _trace_runaway(built: Built, role: str, raw_traces: dict[str, np.ndarray]) -> np.ndarray:
    """Cells whose recorded trace left the physical range: a membrane potential beyond
    :data:`MAX_PLAUSIBLE_V`, or (clamp currents) any undefined value."""
    values = raw_traces[role]
    if built.trace_units.get(role, "V") == "V":
        return ~(np.abs(values) < MAX_PLAUSIBLE_V).all(axis=1)
    return ~np.isfinite(values).all(axis=1)


def _role_traces(built: Built) -> dict[str, np.ndarray]:
    """Each recorded role's rows of its group's trace monitor: (n_cells, n_recorded_samples)."""
    read: dict[str, np.ndarray] = {}
    out = {}
    for role, mon in built.trace_monitors.items():
        if mon.name not in read:
            read[mon.name] = np.asarray(getattr(mon, built.trace_variables[role] + "_"))
        out[role] = read[mon.name][built.trace_rows[role]]
    return out


def _check_stability(built: Built, plan: Plan, raw_traces: dict[str, np.ndarray]) -> None:
    """Raise a ProtocolError naming the first cell whose integration ran away.

    AdEx roles: forward Euler fails silently here: the spike reset catches upward runaways, so the checks
    are the final state, the recorded traces and the largest ``dt*g_total/C`` seen in the run.
    Each role is checked on its own cells of its (possibly shared) group.
    """
    layout = built.layout
    for role in built.adex_roles:
        group, block = built.cells[role], built.blocks[role]
        what, span = _describe(built.names[("role", role)], built, plan)
        v = block.take(group.v_)
        bad = ~(np.isfinite(v) & np.isfinite(block.take(group.w_)) & (np.abs(v) < MAX_PLAUSIBLE_V))
        if role in raw_traces and not bad.any():
            bad = _trace_runaway(built, role, raw_traces)
        if bad.any():
            _raise_runaway(what, span, bad, layout,
                           f"use a smaller time step than {plan.dt * 1e3:g} ms (e.g. {plan.dt * 1e3 / 4:g} ms), "
                           f"or check C, gL, tau_w and the synaptic conductances of this cell")
        if "euler_load" not in group.variables:
            continue
        load = block.take(group.euler_load_)
        worst = float(load.max(initial=0.0))
        if worst >= 1.0:
            cell = int(np.argmax(load))
            c_value = float(block.take(group.C_)[cell])
            raise error(f"numerical blow-up in {what} ({_where(cell, layout)}): its total "
                        f"conductance reached {worst * c_value / plan.dt * 1e9:.3g} nS, too large "
                        f"for a {plan.dt * 1e3:g} ms time step with C = {c_value * 1e12:g} pF", span,
                        expected="conductances with C/g well above the time step",
                        hint=f"use a smaller time step (below {plan.dt / worst * 1e3:.2g} ms) "
                             f"or check the synaptic conductances onto this cell")
        if worst > 0.1:
            built.notes.append(f"role {role!r}: conductances reach {worst:.2g} of the forward-Euler "
                               f"limit; a smaller time step would be more accurate")
    for role in built.hh_roles:
        # exponential Euler keeps these stable for any conductance; a runaway here means
        # parameters no time step can follow (or a bug), so say where it happened
        group, block = built.cells[role], built.blocks[role]
        what, span = _describe(built.names[("role", role)], built, plan)
        v = block.take(group.v_)
        bad = ~(np.isfinite(v) & (np.abs(v) < MAX_PLAUSIBLE_V))
        if role in raw_traces and not bad.any():
            bad = _trace_runaway(built, role, raw_traces)
        if bad.any():
            _raise_runaway(what, span, bad, layout,
                           f"use a smaller time step than {plan.dt * 1e3:g} ms, or check the membrane area, "
                           f"capacitance and conductances of this cell")


def _raise_runaway(what: str, span, bad: np.ndarray, layout, hint: str):
    """The one error for a membrane potential that left the physical range, at the first bad cell."""
    cell = int(np.flatnonzero(bad)[0])
    raise error(f"numerical blow-up in {what} ({_where(cell, layout)}): the membrane potential left the "
                f"physical range or became undefined", span,
                expected="parameters and conductances the time step can follow", hint=hint)


def build_or_explain(plan: "Plan", b2, **options):
    """``build_network(plan, b2, **options)``; a failure inside Brian2 becomes a worded ProtocolError."""
    try:
        return build_network(plan, b2, **options)
    except (ProtocolError, AssertionError):
        raise
    except Exception as exc:  # Brian2 rejected something while building
        raise _brian_failure(exc, "building", plan, None) from exc


def read_back(plan: "Plan", built, record_release: bool):
    """Recordings of a finished network: traces checked for runaway cells, the population checked,
    spikes and traces converted (shared by the runtime and the standalone paths)."""
    raw_traces = _role_traces(built)
    _check_stability(built, plan, raw_traces)
    if built.population is not None:
        from .network import check_population

        fail = Collector()
        check_population(plan, built.population, fail)
        fail.raise_if_any()
    return _collect(plan, built, raw_traces, record_release)


def run_plan(plan: Plan, *, target: str = "numpy", record_release: bool = False, merge: bool = True,
             progress: Callable[[str], None] | None = None) -> Recordings:
    """Simulate a plan with Brian2 and return its recordings.

    Args:
        plan: the resolved experiment (roles, receptors, synapses, layout, seed).
        target: Brian2 code-generation target: "numpy", "cython" (compiled; cache under
            :func:`cython_cache_dir`) or "auto" (cython if a C++ compiler works, else numpy).
        record_release: also record the amount released at every presynaptic spike.
        merge: simulate roles with identical equations in one Brian2 group and their synapses
            in one Synapses object (see :func:`protolang.engine.build.build_network`); the
            recordings have the same shape and meaning either way.
        progress: optional callable receiving short stage messages.

    Returns:
        Recordings with traces (recorded roles: membrane potential in V, or the clamp current in A
        for voltage-clamped roles, as ``meta["trace_units"]`` says), spikes (every role), input
        events (Poisson inputs and extracellular activation), release (if asked) and meta.

    Raises:
        ProtocolError: parameters the simulation cannot use, a numerical blow-up, or a failure
            inside Brian2, cited at the plan's spans where known.
    """
    say = progress or (lambda _msg: None)
    say("loading Brian2")
    b2 = _import_brian2()
    from brian2.utils.logger import catch_logs

    chosen = _resolve_target(target, b2)
    prefs = b2.prefs
    saved = {"codegen.target": prefs["codegen.target"],
             "codegen.runtime.cython.cache_dir": prefs["codegen.runtime.cython.cache_dir"]}
    saved_dt = b2.defaultclock.dt
    numpy_state = np.random.get_state()   # brian2.seed() reseeds numpy's global generator
    built: Built | None = None
    warnings: list[str] = []
    try:
        prefs.codegen.target = chosen
        if chosen == "cython":
            cache = cython_cache_dir()
            os.makedirs(cache, exist_ok=True)
            prefs.codegen.runtime.cython.cache_dir = cache
        b2.start_scope()
        b2.seed(int(plan.seed))
        with catch_logs() as logs:
            t0 = time.perf_counter()
            built = build_or_explain(plan, b2, record_release=record_release, merge=merge, progress=say)
            t1 = time.perf_counter()
            say(f"running {built.layout.duration:g} s of simulated time on the {chosen} target")
            report = None
            if progress is not None:
                def report(elapsed, completed, start, duration):
                    say(f"simulated {completed * 100:.0f} % ({float(elapsed):.1f} s)")
            try:
                built.network.run(built.layout.duration * b2.second, namespace={},
                                  report=report, report_period=10 * b2.second)
            except (ProtocolError, AssertionError):
                raise
            except Exception as exc:  # Brian2 failed while generating code or running
                raise _brian_failure(exc, "running", plan, built) from exc
            t2 = time.perf_counter()
        warnings = [f"{name}: {msg}" for level, name, msg in logs
                    if not any(w in str(msg) for w in _EXPECTED_WARNINGS)]
        say("collecting recordings")
        recordings = read_back(plan, built, record_release)
    finally:
        for key, value in saved.items():
            prefs[key] = value
        b2.defaultclock.dt = saved_dt
        np.random.set_state(numpy_state)
    recordings.meta.update({
        "target": chosen,
        "brian2": b2.__version__,
        "numpy": np.__version__,
        "build_s": t1 - t0,
        "run_s": t2 - t1,
        "n_replicas": plan.n_replicas,
        "layout": plan.layout,
        "dt": plan.dt,
        "sample_dt": built.layout.sample_dt,
        "simulated_s": built.layout.duration,
        "seed": int(plan.seed),
        "n_synapses": dict(built.n_synapses),
        "merged_objects": {name: list(idents) for name, (_, idents) in built.merged.items()},
        "notes": list(built.notes),
        "warnings": warnings,
    })
    if chosen == "cython":
        import Cython

        recordings.meta["cython"] = Cython.__version__
        recordings.meta["cython_cache"] = cython_cache_dir()
    return recordings


def _collect(plan: Plan, built: Built, raw_traces: dict[str, np.ndarray],
             record_release: bool) -> Recordings:
    layout = built.layout
    traces: dict[str, np.ndarray] = {}
    for index, role in enumerate(plan.roles):
        if role.name not in raw_traces:
            continue
        cut = collect.cut_traces(raw_traces.pop(role.name), layout)
        if role.noise_sd > 0:
            rng = np.random.default_rng([int(plan.seed), index])
            cut += rng.normal(0.0, float(role.noise_sd), size=cut.shape)
        traces[role.name] = cut
    # each group's spikes read once, then each role's block in its own cell numbers
    group_spikes: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    role_spikes: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    spikes = {}
    for role in plan.roles:
        block = built.blocks[role.name]
        if block.group not in group_spikes:
            mon = built.spike_monitors[role.name]
            group_spikes[block.group] = (np.asarray(mon.i[:]), np.asarray(mon.t_[:]))
        cells, times = collect.block_events(group_spikes[block.group][0], block.start, block.size,
                                            group_spikes[block.group][1])
        role_spikes[role.name] = (cells, times)
        spikes[role.name] = collect.split_spikes(cells, times, layout)
    release: dict[str, np.ndarray] = {}
    if record_release:
        for syn in plan.synapses:
            mon, var = built.release_monitors[syn.name]
            post = built.blocks[syn.post]
            cells, times, amounts = collect.block_events(np.asarray(mon.i[:]), post.start, post.size,
                                                         np.asarray(mon.t_[:]), np.asarray(getattr(mon, var + "_")))
            release[syn.name] = collect.release_table(*role_spikes[syn.pre], cells, times, amounts, layout)
    inputs: dict[str, list[list[np.ndarray]]] = {}
    for key, (mon, cell_of_source) in built.input_monitors.items():
        if mon is None:
            inputs[key] = [[np.zeros(0) for _ in range(layout.n_sweeps)] for _ in range(layout.n_repeat)]
            continue
        cells = cell_of_source[np.asarray(mon.i[:], dtype=np.int64)]
        inputs[key] = collect.split_spikes(cells, np.asarray(mon.t_[:]), layout)
    population: dict = {}
    if built.population_spikes is not None:
        pop = plan.network.population
        cells = np.asarray(built.population_spikes.i[:], dtype=np.int64)
        own = cells < pop.size      # selected cells inside the population's group come after its own
        population = {"times": np.asarray(built.population_spikes.t_[:], dtype=float)[own],
                      "cells": cells[own],
                      "class_names": list(pop.class_names), "class_index": np.asarray(pop.class_index),
                      "repeat": np.asarray(pop.repeat), "cell_ids": np.asarray(pop.cell_ids),
                      "interval": float(layout.interval), "sweep_length": float(layout.sweep_length)}
    time_axis = np.arange(layout.n_samples) * layout.sample_dt
    units = {role: built.trace_units[role] for role in traces}
    return Recordings(sample_dt=layout.sample_dt, time=time_axis, traces=traces, spikes=spikes,
                      release=release, inputs=inputs, meta={"trace_units": units}, population=population)
