"""The public facade, read as the pipeline: load -> check -> plan -> simulate -> collect -> write.

``load(path)`` parses a protocol file; the returned :class:`Experiment` resolves it against its
circuit and runs it. Brian2, pandas and matplotlib are imported only by the stages that need them.
"""

from __future__ import annotations

import hashlib
import json
import os
import platform
import shutil
import sys
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

from .language import parse
from .language.errors import ProtocolError, error, remember_source

__version__ = "0.1.0"
# Code-generation target that compiles one C++ binary per network structure (see engine/standalone.py).
STANDALONE = "standalone"


@dataclass
class PointRun:
    """One point of a scan (or the single run of an unscanned protocol)."""

    values: dict          # scan name -> Quantity; empty without scans
    plan: object
    recordings: object
    tables: dict


@dataclass
class Result:
    """What a run produced: plan, raw recordings, tables and (if written) the run folder.

    For a scanned protocol, ``tables`` are combined over points (``scan_*`` columns), ``points``
    holds each point's plan, recordings and tables, and ``plan``/``recordings`` are the first point's.
    """

    plan: object
    recordings: object
    tables: dict
    provenance: dict
    out_dir: Path | None = None
    paths: dict = field(default_factory=dict)
    points: list = field(default_factory=list)


class Experiment:
    """A parsed protocol bound to its file; resolves its circuit lazily."""

    def __init__(self, protocol, path: str | None, text: str):
        self.protocol = protocol
        self.path = path
        self.text = text
        self._circuit = None
        self._instances: dict[int, object] = {}

    # -- front end ---------------------------------------------------------------
    @property
    def circuit_path(self) -> Path:
        base = Path(self.path).parent if self.path else Path.cwd()
        return (base / self.protocol.circuit).resolve() if not Path(self.protocol.circuit).is_absolute() \
            else Path(self.protocol.circuit)

    @property
    def circuit(self):
        if self._circuit is None:
            from .circuit import load_circuit

            path = self.circuit_path
            if not path.exists():
                raise error(f"circuit file {self.protocol.circuit!r} not found (looked for {path})",
                            self.protocol.circuit_span,
                            expected="a path to a circuit YAML file, relative to the protocol file",
                            hint="check the spelling or give the path relative to this protocol")
            self._circuit = load_circuit(str(path))
        return self._circuit

    def points(self) -> list[tuple[dict, object]]:
        """``[(scan values, protocol)]``: one entry per scan point, or one with no values."""
        if not self.protocol.scans:
            return [({}, self.protocol)]
        return [(dict(pt.values), pt.protocol) for pt in self.protocol.points]

    def check(self) -> list:
        """Check names, units and selections against the circuit (every scan point); return warnings.

        Raises:
            ProtocolError: on any error.
        """
        from .language.errors import Collector
        from .plan.check import run_checks

        out, seen = Collector(), set()
        for _, protocol in self.points():
            try:
                found = run_checks(protocol, self.circuit).diagnostics
            except ProtocolError as exc:
                found = exc.diagnostics
            for d in found:
                if (d.span, d.message) not in seen:
                    seen.add((d.span, d.message))
                    out.diagnostics.append(d)
        out.raise_if_any()
        return out.warnings

    def plan(self, point: int = 0):
        """Resolve into a Plan (concrete cells, SI values, sweep layout); ``point`` picks a scan point."""
        from .plan.resolve import resolve

        points = self.points()
        if not 0 <= point < len(points):
            raise IndexError(f"point {point} of {len(points)}")
        protocol = points[point][1]
        return resolve(protocol, self.circuit, self._instance(protocol.seed), source_text=self.text)

    def _instance(self, seed: int):
        """The instantiated circuit for ``seed``, built once: every scan point shares it."""
        if seed not in self._instances:
            from .circuit import instantiate

            self._instances[seed] = instantiate(self.circuit, seed)
        return self._instances[seed]

    # -- back end ----------------------------------------------------------------
    def run(self, out: str | os.PathLike | None = None, *, target: str = "auto",
            progress: Callable[[str], None] | None = None, force: bool = False, nwb: bool = False) -> Result:
        """Simulate, collect the tables and (if ``out`` is given) write the run folder.

        Args:
            out: run folder to create; written atomically (all or nothing).
            target: Brian2 code-generation target: "numpy", "cython" or "auto".
            progress: callable receiving one line per stage.
            force: replace an existing run folder.
            nwb: also write ``recordings.nwb`` (each point's folder of a scan), the virtual
                recordings in full precision (:func:`protolang.report.nwb.write_nwb`).

        Returns:
            Result with ``tables`` (dict of DataFrames) and ``recordings``.
        """
        say = progress or (lambda msg: None)
        _refuse_existing(out, force)
        timings = {"plan_s": 0.0, "simulate_s": 0.0, "collect_s": 0.0}
        t0 = time.perf_counter()
        points = self.points()
        # resolve every point first: a bad point fails before any simulation
        plans = []
        for k in range(len(points)):
            t = time.perf_counter()
            plans.append(self.plan(k))
            timings["plan_s"] += time.perf_counter() - t
        _check_searches(plans)
        for note in plans[0].notes:
            say(note)
        say(f"layout: {plans[0].layout}: {plans[0].layout_reason}")
        compiled = _standalone_recordings(plans, say, timings) if target == STANDALONE else [None] * len(plans)
        runs: list[PointRun] = []
        for k, ((values, _), plan) in enumerate(zip(points, plans)):
            where = ""
            if values:
                where = f"point {k + 1}/{len(points)} (" + ", ".join(f"@{n} = {q}" for n, q in values.items()) + "): "
            recordings, tables = _simulate_and_collect(plan, target, say, timings, where, recordings=compiled[k])
            runs.append(PointRun(values=values, plan=plan, recordings=recordings, tables=tables))
        prov = provenance(self, plans[0], runs[0].recordings, timings)
        if self.protocol.scans:
            from .report.scan import combine

            prov["scan_points"] = [{n: str(q) for n, q in r.values.items()} for r in runs]
            prov["plan_sha256"] = [hashlib.sha256(r.plan.to_json().encode()).hexdigest() for r in runs]
            tables = combine([(r.values, r.tables) for r in runs])
        else:
            tables = runs[0].tables
        if nwb:
            prov["nwb_file"] = "recordings.nwb"   # in each point's folder for a scan
        result = Result(plan=runs[0].plan, recordings=runs[0].recordings, tables=tables, provenance=prov,
                        points=runs)
        prov["wall_time_s"] = time.perf_counter() - t0   # up to writing the folder
        if out is not None:
            say("writing run folder")
            result.out_dir, result.paths = _write_atomically(Path(out), result, force,
                                                             nwb_text=self.text if nwb else None)
        return result

    def run_point(self, point: int, out: str | os.PathLike | None = None, *, target: str = "auto",
                  progress: Callable[[str], None] | None = None, force: bool = False, plan=None) -> Result:
        """Run one scan point (0-based) as a run of its own: the batch runner's unit of work.

        The run folder has the layout of an unscanned run; its tables carry no ``scan_*`` columns
        and its provenance records the point and its values (``scan_point``, ``scan``).

        Args:
            point: the scan point, 0-based (0 for an unscanned protocol).
            out: run folder to create, written atomically.
            target: Brian2 code-generation target.
            progress: callable receiving one line per stage.
            force: replace an existing run folder.
            plan: the point's plan if the caller resolved it already.

        Returns:
            The Result of that point.
        """
        say = progress or (lambda msg: None)
        _refuse_existing(out, force)
        values = self.points()[point][0]
        timings = {"plan_s": 0.0, "simulate_s": 0.0, "collect_s": 0.0}
        t0 = time.perf_counter()
        if plan is None:
            plan = self.plan(point)
        timings["plan_s"] = time.perf_counter() - t0
        _check_searches([plan])
        compiled = _standalone_recordings([plan], say, timings)[0] if target == STANDALONE else None
        recordings, tables = _simulate_and_collect(plan, target, say, timings, recordings=compiled)
        prov = provenance(self, plan, recordings, timings)
        prov["scan_point"] = point + 1
        prov["scan"] = {n: str(q) for n, q in values.items()}
        run = PointRun(values={}, plan=plan, recordings=recordings, tables=tables)
        result = Result(plan=plan, recordings=recordings, tables=tables, provenance=prov, points=[run])
        prov["wall_time_s"] = time.perf_counter() - t0
        if out is not None:
            result.out_dir, result.paths = _write_atomically(Path(out), result, force)
        return result


def _refuse_existing(out, force: bool) -> None:
    if out is not None and Path(out).exists() and not force:
        raise error(f"run folder {str(out)!r} already exists", None,
                    expected="a new folder name", hint="choose another --out or pass --force")


def _check_searches(plans: list) -> None:
    """The rheobase collector simulates test steps of its own: refuse bad ones before any run."""
    if any(m.collector == "rheobase" for plan in plans for m in plan.measures):
        from .measure.rheobase import check_rheobase

        for plan in plans:
            if any(m.collector == "rheobase" for m in plan.measures):
                check_rheobase(plan)


def standalone_cache() -> Path:
    """Where compiled standalone projects are kept: ``$PROTOLANG_STANDALONE_CACHE`` or ~/.cache/protolang/standalone."""
    return Path(os.environ.get("PROTOLANG_STANDALONE_CACHE", Path.home() / ".cache" / "protolang" / "standalone"))


def _standalone_recordings(plans: list, say: Callable[[str], None], timings: dict) -> list:
    """Simulate plans with Brian2's C++ standalone device: one compiled binary per network structure,
    run once per plan with that plan's numbers (a scan over calcium or amplitudes compiles once)."""
    from .engine.standalone import run_points_standalone, structure_key

    t = time.perf_counter()
    groups: dict[str, list[int]] = {}
    for k, plan in enumerate(plans):
        groups.setdefault(structure_key(plan), []).append(k)
    out: list = [None] * len(plans)
    for key, members in groups.items():
        say(f"standalone: {len(members)} point(s) share one compiled network ({key[:12]})")
        for k, rec in zip(members, run_points_standalone([plans[k] for k in members], standalone_cache(),
                                                         progress=say)):
            out[k] = rec
    timings["simulate_s"] += time.perf_counter() - t
    timings["standalone_binaries"] = len(groups)
    return out


def _simulate_and_collect(plan, target: str, say: Callable[[str], None], timings: dict, where: str = "",
                          recordings=None):
    """Simulate one plan (unless ``recordings`` are given), run its rheobase search if it has one,
    collect its tables; add to ``timings``."""
    from .engine import run_plan
    from .measure.collect import collect

    if recordings is None:
        say(f"{where}simulating {plan.n_repeat} repeats x {plan.n_sweeps} sweeps "
            f"({plan.n_replicas} replicas, {plan.sweep_length * 1e3:g} ms each)")
        t1 = time.perf_counter()
        recordings = run_plan(plan, target=target, progress=say)
        timings["simulate_s"] += time.perf_counter() - t1
    rheobase = None
    if any(m.collector == "rheobase" for m in plan.measures):
        from .measure.rheobase import measure_rheobase

        say(f"{where}searching the rheobase")
        t3 = time.perf_counter()
        # the search simulates many small test networks: a runtime target suits it better
        search_target = "auto" if target == STANDALONE else target
        rheobase = measure_rheobase(plan, run_plan, target=search_target, progress=say)
        timings["rheobase_s"] = timings.get("rheobase_s", 0.0) + time.perf_counter() - t3
    say(f"{where}collecting tables")
    t2 = time.perf_counter()
    tables = collect(plan, recordings, rheobase=rheobase)
    timings["collect_s"] += time.perf_counter() - t2
    return recordings, tables


def _write_atomically(out: Path, result: Result, force: bool, nwb_text: str | None = None):
    """Write the run folder under a temporary name and rename it into place when complete.

    With ``nwb_text`` (the protocol's text) each point's recordings also go to ``recordings.nwb``.
    """
    from .report.write import write_recordings_npz, write_run

    def add_nwb(folder: Path, point) -> Path:
        from .report.nwb import write_nwb

        return write_nwb(folder / "recordings.nwb", point.plan, point.recordings,
                         provenance=result.provenance, protocol_text=nwb_text)

    out = out.resolve()
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.partial-", dir=out.parent))
    mask = os.umask(0)
    os.umask(mask)
    os.chmod(tmp, 0o777 & ~mask)  # mkdtemp makes 0700; a run folder is meant to be shared
    try:
        if len(result.points) > 1 or (result.points and result.points[0].values):
            from .report.scan import write_scan

            paths = write_scan(tmp, result.points, result.tables, result.provenance)
            if nwb_text is not None:
                for k, point in enumerate(result.points):
                    paths[f"points/{k + 1:02d}/recordings.nwb"] = add_nwb(tmp / "points" / f"{k + 1:02d}", point)
        else:
            paths = write_run(tmp, result.plan, result.recordings, result.tables, result.provenance)
            paths["recordings.npz"] = write_recordings_npz(tmp, result.recordings)
            if nwb_text is not None:
                paths["recordings.nwb"] = add_nwb(tmp, result)
        if out.exists() and force:
            shutil.rmtree(out)
        os.replace(tmp, out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    fixed = {k: out / k for k in paths}
    return out, fixed


def _versions() -> dict:
    from importlib import metadata

    out = {"python": platform.python_version(), "protolang": __version__}
    for pkg in ("brian2", "numpy", "scipy", "pandas", "lark", "PyYAML", "matplotlib", "Cython", "sympy"):
        try:
            out[pkg] = metadata.version(pkg)
        except metadata.PackageNotFoundError:
            out[pkg] = None
    return out


def provenance(exp: Experiment, plan, recordings, timings: dict) -> dict:
    """Versions, seeds, hashes and timings of one run."""
    plan_json = plan.to_json()
    return {
        "protocol_file": exp.path,
        "protocol_path": str(Path(exp.path).resolve()) if exp.path else None,   # found from any folder
        "protocol_sha256": hashlib.sha256(exp.text.encode()).hexdigest(),
        "circuit_file": plan.circuit_file,
        "circuit_sha256": plan.circuit_hash,
        "plan_sha256": hashlib.sha256(plan_json.encode()).hexdigest(),
        "seed": plan.seed,
        "layout": plan.layout,
        # what the lesions removed (counts; the exact cell ids are in plan.json)
        "lesions": [{"line": l.text, "kind": l.kind, "cells_per_class": dict(l.cells),
                     "connections_per_pathway": dict(l.connections), "factor": l.factor,
                     "summed_over_repeats": l.per_repeat} for l in plan.lesions],
        "network": plan.network.to_plain() if plan.network is not None else None,
        "engine": {k: v for k, v in recordings.meta.items() if isinstance(v, (str, int, float, bool, type(None)))},
        "versions": _versions(),
        "platform": {"system": platform.system(), "machine": platform.machine(),
                     "processor": platform.processor(), "cpus": os.cpu_count()},
        "command": sys.argv,
        "timings": timings,
        "started": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
    }


def load(path: str | os.PathLike) -> Experiment:
    """Parse a protocol file.

    Raises:
        ProtocolError: if the file is missing or does not parse.
    """
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise error(f"protocol file {str(path)!r} not found", None, expected="a path to a .protocol file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise error(f"cannot read protocol file {str(path)!r}: {exc}", None) from None
    remember_source(str(path), text)
    return Experiment(parse(text, str(path)), str(path), text)


def loads(text: str, file: str = "<string>") -> Experiment:
    """Parse protocol text (paths inside it are relative to the current directory)."""
    remember_source(file, text)
    return Experiment(parse(text, file), None if file == "<string>" else file, text)


__all__ = ["Experiment", "PointRun", "Result", "load", "loads", "ProtocolError", "__version__"]


def _json_default(o):  # pragma: no cover - used by callers that dump provenance
    return str(o)


def dumps_provenance(prov: dict) -> str:
    return json.dumps(prov, indent=1, default=_json_default)
