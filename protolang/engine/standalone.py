"""Compile-once scans: takes Plans that differ only in numbers, hands out one Recordings per plan from one compiled C++ binary.

The points of a scan usually share their network structure: the same roles, cells, synapses,
sweep layout, monitors and equations, with other per-cell, per-synapse or per-waveform numbers
(release probability from the calcium law, holding currents, stimulus amplitudes). Such plans
are built once with Brian2's ``cpp_standalone`` device (a network like
:func:`protolang.engine.build.build_network` makes for the runtime targets), compiled once, and
the binary is run once per plan with that plan's numbers passed on its command line.

Which numbers a plan hands over comes from the builder's ledger (``Built.ledger``, every array
written into a group, Synapses object or TimedArray): each plan is first built under Brian2's
runtime device without running it (a "dry build", some tens of milliseconds for a paired
protocol), which gives its ledger and its :func:`structure_key`: a hash of everything else
(object types, names and sizes, equations, event and reset code, namespace constants, clocks,
connectivity, spike-generator tables, monitor settings, every state value outside the ledger,
the shapes of the ledger's arrays, run length, seed). Plans with equal keys can share a binary.

The compiled project lives in ``<build_dir>/<hash of key and toolchain>``. Brian2 2.9 cannot
load a project another process compiled (its Python objects, which map variables to files,
exist only in the process that generated the code), so a later process builds the network
under the standalone device again (about a tenth of a second for a paired protocol, after
importing Brian2); Brian2 rewrites only changed files, and with the clock assignments of
main.cpp put in a fixed order (:func:`_sort_clock_starts`) nothing changes, so ``make`` finds
nothing to compile. Builds take an exclusive lock on the project, runs a shared one; each run
writes its results and its command-line arrays to files of its own, so processes can share a
project.

The binary is started here rather than through ``device.run``, so that the next run proceeds
while Python reads the last one; reading then goes through Brian2's own objects, pointed at the
run's results folder (:func:`_adopt`: the few device attributes ``device.run`` sets, as Brian2
2.9.0 names them).
"""

from __future__ import annotations

import dataclasses
import fcntl
import gc
import hashlib
import json
import os
import platform
import re
import resource
import shutil
import subprocess
import time
import uuid
from collections import deque
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterator

import numpy as np

from protolang.engine.build import TIMED_ARRAY_VALUES, Built, build_network
from protolang.engine.recordings import Recordings
from protolang.engine.run import _EXPECTED_WARNINGS, _brian_failure, _import_brian2, build_or_explain, read_back
from protolang.language.errors import ProtocolError
from protolang.plan.model import Plan

#: Short arrays are shown by value in a difference message, longer ones by digest.
_SHOWN = 6

#: Attributes of Brian2 objects that enter the generated code or the run schedule.
_CODE_ATTRIBUTES = ("equations", "event_driven", "method_choice", "events", "event_codes", "_refractory",
                    "abstract_code", "code", "event", "prepost", "template", "record_variables", "record",
                    "_rates", "_N", "_rate", "_weight", "_target_var", "multisynaptic_index", "when", "order")

#: Name of the file marking a project whose compilation finished.
_BUILT_MARK = "protolang_built.json"


# --------------------------------------------------------------------------- dry builds


@dataclass
class DryBuild:
    """A plan built under the runtime device, not run: its structure and its ledger."""

    key: str
    items: list[tuple[str, str, str]]            # (what, digest, shown) in a fixed order
    ledger: dict[tuple[str, str], np.ndarray]    # (owner, variable) -> values as Brian2 stores them
    notes: list[str] = field(default_factory=list)
    n_synapses: dict[str, int] = field(default_factory=dict)
    merged: dict = field(default_factory=dict)


def _digest(arr: np.ndarray) -> str:
    arr = np.ascontiguousarray(arr)
    return f"{arr.dtype.str}{arr.shape}:" + hashlib.sha256(arr.tobytes()).hexdigest()[:32]


def _canonical(value: Any) -> tuple[str, str]:
    """(digest, shown) of a value that enters the generated code: numbers by dimension and
    value, text as text, TimedArrays by name, shape and time step, Brian2 objects by name."""
    from brian2 import Function, TimedArray
    from brian2.equations.equations import Equations

    if isinstance(value, TimedArray):
        text = f"TimedArray {value.name} {np.shape(value.values)} dt={float(value.dt)!r}"
        return text, text
    if isinstance(value, Function):
        impl = getattr(value, "pyfunc", None)
        text = f"Function {getattr(impl, '__module__', '')}.{getattr(impl, '__qualname__', '')}"
        return text, text
    if isinstance(value, Equations):
        text = str(value)
        return text, text
    if value is None or isinstance(value, (bool, str)):
        return repr(value), repr(value)
    if isinstance(value, (int, float, np.number, np.ndarray)):   # Brian2 quantities are arrays
        dim = str(getattr(value, "dim", ""))
        arr = np.asarray(value)
        if arr.dtype == object:
            parts = [_canonical(v) for v in arr.ravel()]
            text = repr([p[0] for p in parts])
            return text, text
        shown = (repr(arr.tolist()) if arr.size <= _SHOWN else f"{arr.size} values, shape {arr.shape}")
        return f"{dim}|{_digest(arr)}", shown + (f" {dim}" if dim else "")
    if isinstance(value, dict):
        parts = [(repr(k), _canonical(v)) for k, v in sorted(value.items(), key=lambda kv: repr(kv[0]))]
        return repr([(k, d) for k, (d, _) in parts]), repr({k: s for k, (_, s) in parts})
    if isinstance(value, (list, tuple, set, frozenset)):
        seq = sorted(value, key=repr) if isinstance(value, (set, frozenset)) else list(value)
        parts = [_canonical(v) for v in seq]
        return repr([d for d, _ in parts]), repr([s for _, s in parts])
    name = getattr(value, "name", None)
    if isinstance(name, str):
        text = f"{type(value).__name__} {name}"
        return text, text
    # anything else by its text without memory addresses
    text = re.sub(r" at 0x[0-9a-fA-F]+", "", repr(value))
    return text, text


def _auto_name(obj: Any) -> tuple[int, str, int] | None:
    """(1, type, number) for an object Brian2 named itself (``poissoninput``, ``poissoninput_2``)."""
    base = type(obj).__name__.lower()
    auto = re.fullmatch(re.escape(base) + r"(?:_(\d+))?", obj.name)
    return (1, base, int(auto.group(1) or 0)) if auto else None


def _labelled_objects(network: Any) -> list[tuple[str, Any]]:
    """(label, object) of every object of the network and the objects they contain, in an
    order and with labels that do not depend on other Brian2 objects alive in the process.

    The builder names its objects; an object Brian2 names itself (``poissoninput_3``: the
    lowest free number) is labelled by its type and creation order instead, and an object
    inside another by its owner's label, its type and its place there.
    """
    # within one build the numbers Brian2 hands out grow with creation order
    tops = sorted(((_auto_name(obj) or (0, obj.name, 0)), obj) for obj in network.objects)
    out: list[tuple[str, Any]] = []
    counts: dict[str, int] = {}

    def walk(label: str, obj: Any) -> None:
        out.append((label, obj))
        for k, inner in enumerate(getattr(obj, "contained_objects", ())):
            walk(f"{label} / {type(inner).__name__} {k}", inner)

    for key, obj in tops:
        kind = type(obj).__name__
        if key[0] == 1:
            counts[kind] = counts.get(kind, 0) + 1
            walk(f"{kind} #{counts[kind]}", obj)
        else:
            walk(f"{kind} {obj.name!r}", obj)
    return out


def _variable(target: Any, name: str) -> Any:
    """The Brian2 Variable behind ``target.<name>``: a Synapses object's delays live in its
    pathway (``<synapses>_pre``)."""
    if name in target.variables:
        return target.variables[name]
    for pathway in getattr(target, "_pathways", ()):
        if name in pathway.variables:
            return pathway.variables[name]
    raise AssertionError(f"internal error: {target.name!r} has no variable {name!r}")


def _is_table(entry: Any) -> bool:
    """Whether a ledger entry holds a TimedArray's table (not a group's state variable)."""
    return entry.variable == TIMED_ARRAY_VALUES and not hasattr(entry.target, "variables")


def _ledger_variables(built: Built) -> dict[int, tuple[str, str]]:
    """id of each Brian2 Variable the ledger wrote -> its ledger entry's (owner, variable)."""
    return {id(_variable(e.target, e.variable)): (e.owner, e.variable) for e in built.ledger if not _is_table(e)}


def _describe(plan: Plan, built: Built, b2: Any) -> list[tuple[str, str, str]]:
    """Everything of a dry-built network that must agree for one binary to serve two plans."""
    from brian2.core.variables import ArrayVariable
    from brian2.groups.subgroup import Subgroup

    layout = built.layout
    items: list[tuple[str, str, str]] = []

    def add(what: str, value: Any) -> None:
        digest, shown = _canonical(value)
        items.append((what, digest, shown))

    for f in dataclasses.fields(layout):
        add(f"sweep layout: {f.name}", getattr(layout, f.name))
    add("seed", int(plan.seed))
    add("time step", float(b2.defaultclock.dt_))
    in_ledger = _ledger_variables(built)
    for entry in built.ledger:
        # the values may differ, their shape and type may not
        arr = np.asarray(entry.values)
        add(f"shape of {entry.owner}.{entry.variable}", (str(arr.dtype.kind), arr.shape))
    for label, obj in _labelled_objects(built.network):
        add(f"{label}: clock", float(obj.clock.dt_))
        if hasattr(obj, "variables") and hasattr(obj, "__len__"):
            try:
                add(f"{label}: size", len(obj))
            except (TypeError, NotImplementedError):
                pass
        for attr in _CODE_ATTRIBUTES:
            try:
                value = getattr(obj, attr)
            except Exception:   # properties that exist only after a run
                continue
            if callable(value) and not hasattr(value, "variables"):
                continue
            add(f"{label}: {attr.lstrip('_')}", value)
        for attr in ("source", "target", "group"):
            other = getattr(obj, attr, None)
            if other is not None and hasattr(other, "name"):
                if isinstance(other, Subgroup):     # named by Brian2 after the objects alive
                    add(f"{label}: {attr}", f"{other.source.name}[{other.start}:{other.stop}]")
                else:
                    add(f"{label}: {attr}", other.name)
        namespace = getattr(obj, "namespace", None)
        if isinstance(namespace, dict):
            for name in sorted(namespace):
                add(f"{label}: constant {name}", namespace[name])
        variables = getattr(obj, "variables", None)
        if variables is None:
            continue
        for name in sorted(variables):
            var = variables[name]
            if not isinstance(var, ArrayVariable) or getattr(var.owner, "name", None) != obj.name:
                continue
            if id(var) in in_ledger:
                continue
            add(f"{label}: values of {name}", np.asarray(var.get_value()))
    return items


def _forget(network: Any) -> None:
    """Mark a dry-built network's objects as used, so Brian2 does not warn when they go."""
    for _, obj in _labelled_objects(network):
        obj._network = -1


@contextmanager
def _runtime_device(b2: Any) -> Iterator[None]:
    from brian2.devices.device import get_device, reset_device, runtime_device, set_device

    if get_device() is runtime_device:
        yield
        return
    set_device(runtime_device)
    try:
        yield
    finally:
        reset_device()


def dry_build(plan: Plan, *, record_release: bool = False, merge: bool = True) -> DryBuild:
    """Build a plan's network under Brian2's runtime device without running it.

    Args:
        plan: the resolved experiment.
        record_release, merge: as for :func:`protolang.engine.run.run_plan`.

    Returns:
        The plan's :class:`DryBuild`: structure key, the items the key hashes, and the ledger.

    Raises:
        ProtocolError: parameters the simulation cannot use (the builder's own checks).
    """
    b2 = _import_brian2()
    saved_dt = b2.defaultclock.dt
    built: Built | None = None
    try:
        with _runtime_device(b2):
            for attempt in range(2):
                built = build_or_explain(plan, b2, record_release=record_release, merge=merge, ledger=True)
                auto = [_auto_name(obj) for obj in built.network.objects if _auto_name(obj)]
                if attempt or not any(number for _, _, number in auto):
                    break
                # Brian2 numbered an unnamed object (the embedded network's PoissonInput) after
                # one still alive, and that name enters the generated code: free it, build again
                _forget(built.network)
                built = None
                gc.collect()
            items = _describe(plan, built, b2)
            ledger = {}
            for entry in built.ledger:
                if _is_table(entry):
                    values = entry.target.values
                else:
                    values = _variable(entry.target, entry.variable).get_value()
                ledger[(entry.owner, entry.variable)] = np.array(values, copy=True)
            _forget(built.network)
    finally:
        b2.defaultclock.dt = saved_dt
    key = hashlib.sha256(repr([(what, digest) for what, digest, _ in items]).encode()).hexdigest()
    out = DryBuild(key=key, items=items, ledger=ledger, notes=list(built.notes), n_synapses=dict(built.n_synapses),
                   merged={name: list(idents) for name, (_, idents) in built.merged.items()})
    if auto:
        built = None
        gc.collect()    # so that the next build finds the same names free
    return out


def structure_key(plan: Plan, *, record_release: bool = False, merge: bool = True) -> str:
    """Hash of everything two plans must share for one compiled binary to simulate both.

    It covers the object types, names and sizes, equations and event code, namespace constants
    (receptor kinetics, noise and Poisson settings, sweep interval: compiled into the code),
    clocks, connectivity, explicit spike times, monitor settings, run length, seed, the shapes
    of all ledger arrays and every state value the ledger does not hold. Computing it builds
    the plan's network under Brian2's runtime device without running it.

    Args:
        plan: the resolved experiment.
        record_release, merge: as for :func:`protolang.engine.run.run_plan`.

    Returns:
        A 64-character hex digest.

    Raises:
        ProtocolError: parameters the simulation cannot use.
    """
    return dry_build(plan, record_release=record_release, merge=merge).key


def first_difference(a: DryBuild, b: DryBuild) -> str:
    """Plain words for the first item in which two dry builds' structures differ ("" if none)."""
    for (what, da, sa), (what_b, db, sb) in zip(a.items, b.items):
        if what != what_b:
            return f"{what} against {what_b}"
        if da != db:
            return f"{what}: {sa} against {sb}" if sa != sb else f"{what} differs"
    if len(a.items) != len(b.items):
        longer = a.items if len(a.items) > len(b.items) else b.items
        return f"{longer[min(len(a.items), len(b.items))][0]} exists in one plan only"
    return ""


# --------------------------------------------------------------------------- project folder


def _toolchain() -> dict:
    """What else decides the compiled code: versions, compiler flags, threads, machine."""
    b2 = _import_brian2()
    prefs = b2.prefs
    cpu = platform.processor()
    try:    # the code is compiled with -march=native: another CPU model gets its own folder
        with open("/proc/cpuinfo") as handle:
            cpu = next((line.split(":", 1)[1].strip() for line in handle if line.startswith("model name")), cpu)
    except OSError:
        pass
    return {"brian2": b2.__version__, "machine": platform.machine(), "cpu": cpu,
            "compile_args": list(prefs["codegen.cpp.extra_compile_args_gcc"]),
            "openmp_threads": 0, "float": str(prefs["core.default_float_dtype"])}


def project_directory(build_dir: str | os.PathLike, key: str) -> Path:
    """The project folder of a structure key under ``build_dir`` (the key and the toolchain
    hashed together, so a new Brian2 version or other compiler flags get their own folder)."""
    text = json.dumps({"structure": key, "toolchain": _toolchain()}, sort_keys=True)
    return Path(build_dir) / ("scan-" + hashlib.sha256(text.encode()).hexdigest()[:24])


@contextmanager
def _locked(project: Path, exclusive: bool) -> Iterator[None]:
    """An advisory lock on the project: exclusive to build, shared to run the binary."""
    project.mkdir(parents=True, exist_ok=True)
    with open(project / ".protolang.lock", "a+") as handle:
        try:
            fcntl.flock(handle.fileno(), fcntl.LOCK_EX if exclusive else fcntl.LOCK_SH)
        except OSError:     # a file system without locks: one process per project folder then
            yield
            return
        try:
            yield
        finally:
            fcntl.flock(handle.fileno(), fcntl.LOCK_UN)


def _run_args(project: Path, tag: str, built: Built, ledger: dict[tuple[str, str], np.ndarray]) -> list[str]:
    """Command-line values of every ledger entry for one run: ``owner.variable=file`` with the
    variable's owner as the compiled code names it (a Synapses object's delays belong to its
    pathway). Arrays go to ``static_arrays/protolang_<tag>_...`` files named by their content,
    so points with equal arrays share a file and the call can remove its own files at the end."""
    out, done = [], set()
    for entry in built.ledger:
        if (entry.owner, entry.variable) in done:
            continue
        done.add((entry.owner, entry.variable))
        values = ledger[(entry.owner, entry.variable)]
        if _is_table(entry):
            name = f"{entry.target.name}.values"
            arr = np.ascontiguousarray(values, dtype=entry.target.values.dtype)
        else:
            var = _variable(entry.target, entry.variable)
            name = f"{var.owner.name}.{var.name}"
            arr = np.ascontiguousarray(values, dtype=var.dtype)
        fname = f"protolang_{tag}_{name}_{hashlib.md5(arr.tobytes()).hexdigest()}.dat"
        path = project / "static_arrays" / fname
        if not path.exists():
            arr.tofile(path)
        out.append(f"{name}=static_arrays/{fname}")
    return out


# --------------------------------------------------------------------------- the runs


def _sort_clock_starts(device: Any) -> None:
    """Put Brian2's start-of-run clock assignments in main.cpp in name order.

    Brian2 writes them in the iteration order of a set of clocks, which changes from process
    to process, so an unchanged network would otherwise recompile main.cpp in every process.
    The assignments go to different clocks' arrays, so their order does not matter.
    """
    from brian2.core.clocks import Clock

    clock_arrays = {name for var, name in device.arrays.items() if isinstance(getattr(var, "owner", None), Clock)}
    queue = device.main_queue

    def is_clock_start(item) -> bool:
        return item[0] == "set_by_single_value" and item[1][0] in clock_arrays

    i = 0
    while i < len(queue):
        j = i
        while j < len(queue) and is_clock_start(queue[j]):
            j += 1
        if j > i + 1:
            queue[i:j] = sorted(queue[i:j], key=lambda item: item[1][0])
        i = max(j, i + 1)


def _warnings(logs) -> list[str]:
    """Brian2's warnings as ``run_plan`` reports them (those about code made on purpose left out)."""
    return [f"{name}: {msg}" for level, name, msg in logs if not any(w in str(msg) for w in _EXPECTED_WARNINGS)]


@dataclass
class _BinaryRun:
    """One run of the compiled binary in flight: its point, results folder and process."""

    point: int
    results: Path
    names: set[str]              # ``owner.variable`` set on its command line
    process: subprocess.Popen
    log: Any                     # its stdout/stderr file


def _start_binary(device: Any, prefs: Any, project: Path, point: int, results: Path, args: list[str]) -> _BinaryRun:
    """Start the binary on its own results folder (what ``device.run`` does, without waiting,
    so several runs and the reading of finished ones overlap)."""
    results.mkdir(parents=True)
    command = prefs["devices.cpp_standalone.run_cmd_unix"]
    command = [command] if isinstance(command, str) else list(command)
    env = dict(os.environ)
    env.update(prefs["devices.cpp_standalone.run_environment_variables"])
    env.update(device.run_environment_variables)
    log = open(results / "stdout.txt", "w")
    # the binary appends file names to the results folder, so it must end with a separator
    process = subprocess.Popen(command + ["--results_dir", str(results) + os.sep] + args, cwd=project,
                               stdout=log, stderr=subprocess.STDOUT, env=env)
    return _BinaryRun(point, results, {arg.split("=", 1)[0] for arg in args}, process, log)


def _adopt(device: Any, run: _BinaryRun) -> None:
    """Let Brian2's objects read the results of one finished run, as after ``device.run``: the
    device reads from that folder, and forgets the values it cached of variables the command
    line set and of the clocks' times."""
    device.results_dir = str(run.results) + os.sep
    device.has_been_run = True
    for var in list(device.array_cache):
        try:
            name = f"{var.owner.name}.{var.name}"
        except (ReferenceError, AttributeError):   # owner gone (Brian2 keeps weak references)
            continue
        if name in run.names:
            device.array_cache[var] = None
    for clock in device.clocks:
        device.array_cache[clock.variables["t"]] = None


def run_points_standalone(plans: list[Plan], build_dir: str | os.PathLike,
                          progress: Callable[[str], None] | None = None, *, record_release: bool = False, merge: bool = True, jobs: int = 1,
                          on_point: Callable[[int, Recordings], None] | None = None) -> list[Recordings]:
    """Simulate plans of one network structure with one compiled C++ standalone binary.

    The network of ``plans[0]`` is built with Brian2's ``cpp_standalone`` device and compiled
    once (or found compiled under ``build_dir``); the binary then runs once per plan with that
    plan's ledger values (:func:`dry_build`) on its command line, one OpenMP thread each
    (``make -j2``). The next run starts before the results of the last one are read, so the
    binary and Python overlap even with ``jobs=1``.

    Args:
        plans: the plans, e.g. the points of a scan (``Experiment.plan(k)``), in run order.
        build_dir: cache folder of compiled projects (one subfolder per structure and
            toolchain, see :func:`project_directory`); created if missing.
        progress: optional callable receiving short stage messages.
        record_release, merge: as for :func:`protolang.engine.run.run_plan`.
        jobs: binaries running at the same time (each one process with one thread). Leave it
            at 1 when the caller already runs several processes per core.
        on_point: called as ``on_point(k, recordings)`` as soon as plan k's recordings are
            read, while later runs go on (e.g. to collect its tables meanwhile).

    Returns:
        One Recordings per plan, as :func:`protolang.engine.run.run_plan` returns them, with
        ``meta["target"] == "cpp_standalone"``, ``meta["run_s"]`` the CPU seconds of the
        plan's binary run, and ``meta["standalone"]`` (project folder, structure key, whether
        this call compiled, the times of the structure check, code generation, compilation and
        reading back).

    Raises:
        ValueError: the plans do not share one structure (:func:`structure_key`); the message
            names the first difference. Run them separately instead.
        ProtocolError: parameters the simulation cannot use, a numerical blow-up, or a failure
            inside Brian2 or the binary, cited at the plan's spans where known.
    """
    say = progress or (lambda _msg: None)
    if not plans:
        return []
    if jobs < 1:
        raise ValueError(f"jobs must be at least 1, not {jobs}")
    say("loading Brian2")
    b2 = _import_brian2()
    from brian2.devices.device import all_devices, reset_device, set_device
    from brian2.utils.logger import catch_logs

    t_start = time.perf_counter()
    say(f"checking that {len(plans)} plan(s) share one network structure")
    dry = []
    for k, plan in enumerate(plans):
        dry.append(dry_build(plan, record_release=record_release, merge=merge))
        if dry[k].key != dry[0].key:
            raise ValueError(f"plan {k + 1} of {len(plans)} cannot share a compiled network with plan 1: "
                             f"{first_difference(dry[0], dry[k])}")
        if k:
            # keep only what differs from the first plan: memory stays small for large networks
            dry[k].ledger = {name: values for name, values in dry[k].ledger.items()
                             if not np.array_equal(values, dry[0].ledger[name])}
    t_dry = time.perf_counter() - t_start
    key = dry[0].key
    project = project_directory(build_dir, key).resolve()
    device = all_devices["cpp_standalone"]
    prefs = b2.prefs
    saved = {name: prefs[name] for name in ("devices.cpp_standalone.openmp_threads",
                                            "devices.cpp_standalone.extra_make_args_unix")}
    saved_dt = b2.defaultclock.dt
    numpy_state = np.random.get_state()
    run_tag = f"results_{os.getpid()}_{uuid.uuid4().hex[:8]}"
    plan0 = plans[0]
    built: Built | None = None
    out: list[Recordings] = []
    inflight: deque[_BinaryRun] = deque()
    device.reinit()
    # Brian2 numbers some objects after those still alive, and names enter the code: let
    # finished builds go, so the same structure generates the same code in every process
    gc.collect()
    set_device(device, build_on_run=False)
    try:
        prefs["devices.cpp_standalone.openmp_threads"] = 0
        prefs["devices.cpp_standalone.extra_make_args_unix"] = ["-j2"]
        with catch_logs() as logs:
            t0 = time.perf_counter()
            b2.start_scope()
            b2.seed(int(plan0.seed))
            try:
                built = build_network(plan0, b2, record_release=record_release, merge=merge, ledger=True)
                if list(dict.fromkeys((e.owner, e.variable) for e in built.ledger)) != list(dry[0].ledger):
                    raise AssertionError("internal error: the standalone and the dry build wrote different values")
                # the values on the command line take effect here, before the spike queues read
                # the delays (Brian2 would otherwise apply them just before the run loop)
                device.apply_run_args()
                built.network.run(built.layout.duration * b2.second, namespace={})
                _sort_clock_starts(device)
            except (ProtocolError, AssertionError):
                raise
            except Exception as exc:  # Brian2 rejected something while generating code
                raise _brian_failure(exc, "building", plan0, built) from exc
            say(f"compiling the network once for {len(plans)} plan(s) in {project}")
            binary = project / "main"
            before = binary.stat().st_mtime_ns if binary.exists() else None
            t1 = time.perf_counter()
            with _locked(project, exclusive=True):
                try:
                    device.build(directory=str(project), compile=True, run=False, with_output=False)
                except Exception as exc:
                    raise _brian_failure(exc, "compiling", plan0, built) from exc
                (project / _BUILT_MARK).write_text(json.dumps(
                    {"structure_key": key, "toolchain": _toolchain(),
                     "finished": time.strftime("%Y-%m-%dT%H:%M:%S%z")}, indent=1))
            t2 = time.perf_counter()
            compiled = before is None or binary.stat().st_mtime_ns != before
        build_warnings = _warnings(logs)
        make_s = device.timers["compile"]["make"]
        waiting = list(range(len(plans)))

        def launch() -> None:
            while waiting and len(inflight) < jobs:
                k = waiting.pop(0)
                ledger = dict(dry[0].ledger)
                ledger.update(dry[k].ledger)
                args = _run_args(project, run_tag, built, ledger)
                inflight.append(_start_binary(device, prefs, project, k, project / f"{run_tag}_{k}", args))

        with _locked(project, exclusive=False):
            launch()
            while inflight:
                run = inflight.popleft()
                k, plan = run.point, plans[run.point]
                say(f"point {k + 1}/{len(plans)}: reading the run of the compiled network "
                    f"({plan.n_replicas} replicas, {built.layout.duration:g} s)")
                used = resource.getrusage(resource.RUSAGE_CHILDREN)
                code = run.process.wait()
                done = resource.getrusage(resource.RUSAGE_CHILDREN)
                run.log.close()
                if code:
                    tail = (run.results / "stdout.txt").read_text(errors="replace").strip().splitlines()[-3:]
                    raise _brian_failure(RuntimeError(f"the compiled network exited with status {code}: "
                                                      + " / ".join(tail)), "running", plan, built)
                launch()
                with catch_logs() as logs:
                    t4 = time.perf_counter()
                    _adopt(device, run)
                    point = dataclasses.replace(built, notes=list(dry[k].notes), n_synapses=dict(dry[k].n_synapses))
                    recordings = read_back(plan, point, record_release)
                    t5 = time.perf_counter()
                shutil.rmtree(run.results, ignore_errors=True)
                binary_s = (done.ru_utime - used.ru_utime) + (done.ru_stime - used.ru_stime)
                recordings.meta.update({
                    "target": "cpp_standalone",
                    "brian2": b2.__version__,
                    "numpy": np.__version__,
                    "build_s": (t2 - t0) if k == 0 else 0.0,
                    "run_s": binary_s,
                    "n_replicas": plan.n_replicas,
                    "layout": plan.layout,
                    "dt": plan.dt,
                    "sample_dt": built.layout.sample_dt,
                    "simulated_s": built.layout.duration,
                    "seed": int(plan.seed),
                    "n_synapses": dict(dry[k].n_synapses),
                    "merged_objects": dict(dry[k].merged),
                    "notes": list(point.notes),
                    "warnings": build_warnings + _warnings(logs),
                    "standalone": {"project": str(project), "structure_key": key, "compiled_now": compiled,
                                   "point": k, "points": len(plans), "jobs": jobs, "openmp_threads": 0,
                                   "structure_check_s": t_dry, "codegen_s": t1 - t0, "compile_s": t2 - t1,
                                   "make_s": make_s, "binary_cpu_s": binary_s, "read_s": t5 - t4},
                })
                out.append(recordings)
                if on_point is not None:
                    on_point(k, recordings)
    finally:
        for run in inflight:        # a failed point: stop the runs still going
            run.process.kill()
            run.process.wait()
            run.log.close()
        for path in project.glob(f"{run_tag}_*"):
            shutil.rmtree(path, ignore_errors=True)
        for path in project.glob(f"static_arrays/protolang_{run_tag}_*"):
            path.unlink(missing_ok=True)
        for name, value in saved.items():
            prefs[name] = value
        reset_device()
        device.reinit()
        b2.defaultclock.dt = saved_dt
        np.random.set_state(numpy_state)
    return out
