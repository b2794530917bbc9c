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


@dataclass
class Result:
    """What one run produced: the plan, raw recordings, tables and (if written) the run folder."""

    plan: object
    recordings: object
    tables: dict
    provenance: dict
    out_dir: Path | None = None
    paths: dict = field(default_factory=dict)


class Experiment:
    """A parsed protocol bound to its file; resolves its circuit lazily."""

    def __init__(self, protocol, path: str | None, text: str):
        self.protocol = protocol
        self.path = path
        self.text = text
        self._circuit = None

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

    def check(self) -> list:
        """Check names, units and selections against the circuit; return warnings.

        Raises:
            ProtocolError: on any error.
        """
        from .plan.check import run_checks

        return run_checks(self.protocol, self.circuit).warnings

    def plan(self):
        """Resolve into a Plan (concrete cells, SI values, sweep layout)."""
        from .plan.resolve import resolve

        return resolve(self.protocol, self.circuit, source_text=self.text)

    # -- back end ----------------------------------------------------------------
    def run(self, out: str | os.PathLike | None = None, *, target: str = "auto",
            progress: Callable[[str], None] | None = None, force: bool = False) -> Result:
        """Simulate, collect the tables and (if ``out`` is given) write the run folder.

        Args:
            out: run folder to create; written atomically (all or nothing).
            target: Brian2 code-generation target: "numpy", "cython" or "auto".
            progress: callable receiving one line per stage.
            force: replace an existing run folder.

        Returns:
            Result with ``tables`` (dict of DataFrames) and ``recordings``.
        """
        say = progress or (lambda msg: None)
        if out is not None and Path(out).exists() and not force:
            raise error(f"run folder {str(out)!r} already exists", None,
                        expected="a new folder name", hint="choose another --out or pass --force")
        timings = {}
        t0 = time.perf_counter()
        say("planning")
        plan = self.plan()
        timings["plan_s"] = time.perf_counter() - t0
        for note in plan.notes:
            say(note)
        say(f"layout: {plan.layout}: {plan.layout_reason}")
        say(f"simulating {plan.n_repeat} repeats x {plan.n_sweeps} sweeps "
            f"({plan.n_replicas} replicas, {plan.sweep_length * 1e3:g} ms each)")
        from .engine import run_plan

        t1 = time.perf_counter()
        recordings = run_plan(plan, target=target, progress=say)
        timings["simulate_s"] = time.perf_counter() - t1
        say("collecting tables")
        from .measure.collect import collect

        t2 = time.perf_counter()
        tables = collect(plan, recordings)
        timings["collect_s"] = time.perf_counter() - t2
        prov = provenance(self, plan, recordings, timings)
        result = Result(plan=plan, recordings=recordings, tables=tables, provenance=prov)
        if out is not None:
            say("writing run folder")
            result.out_dir, result.paths = _write_atomically(Path(out), plan, recordings, tables, prov, force)
            prov["wall_time_s"] = time.perf_counter() - t0
        return result


def _write_atomically(out: Path, plan, recordings, tables, prov, force: bool):
    from .report.write import write_recordings_npz, write_run

    out = out.resolve()
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.partial-", dir=out.parent))
    mask = os.umask(0)
    os.umask(mask)
    os.chmod(tmp, 0o777 & ~mask)  # mkdtemp makes 0700; a run folder is meant to be shared
    try:
        paths = write_run(tmp, plan, recordings, tables, prov)
        write_recordings_npz(tmp, recordings)
        if out.exists() and force:
            shutil.rmtree(out)
        os.replace(tmp, out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    fixed = {k: (out / Path(v).relative_to(tmp) if str(v).startswith(str(tmp)) else v) for k, v in paths.items()}
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
        "protocol_sha256": hashlib.sha256(exp.text.encode()).hexdigest(),
        "circuit_file": plan.circuit_file,
        "circuit_sha256": plan.circuit_hash,
        "plan_sha256": hashlib.sha256(plan_json.encode()).hexdigest(),
        "seed": plan.seed,
        "layout": plan.layout,
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


__all__ = ["Experiment", "Result", "load", "loads", "ProtocolError", "__version__"]


def _json_default(o):  # pragma: no cover - used by callers that dump provenance
    return str(o)


def dumps_provenance(prov: dict) -> str:
    return json.dumps(prov, indent=1, default=_json_default)
