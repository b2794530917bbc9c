"""``protolang batch``: protocol files and folders in; run folders, an index and combined tables out.

Steps: find the protocols and expand their scan points into units; recognise unchanged units by
their pre-key; check and plan the others (a protocol that fails its check is reported before any
simulation and recorded as ``invalid``; the rest still run); recognise units whose plan did not
change by their key; run what is left on the local pool or a Dask cluster, recording each run in
the index as it starts and ends; then write the combined tables. Every run folder is written
atomically, so an interrupted batch leaves whole folders and an index that says which runs did
not finish; the next batch over the same library runs only those.
"""

from __future__ import annotations

import os
import sys
import time
import uuid
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, TextIO

from .units import Unit, discover, expand, resolve_units


@dataclass
class BatchSummary:
    """What a batch did: unit counts by outcome and the wall time."""
    batch: str
    total: int = 0
    cached: int = 0
    ran: int = 0
    ok: int = 0
    failed: int = 0
    crashed: int = 0
    invalid: int = 0
    wall_s: float = 0.0
    units: list = field(default_factory=list)

    @property
    def all_ok(self) -> bool:
        return self.failed == 0 and self.crashed == 0 and self.invalid == 0


class Progress:
    """A one-line progress bar (counts, ETA, failures) on a terminal; one line per run otherwise."""

    def __init__(self, total: int, stream: TextIO | None = None, quiet: bool = False):
        self.total, self.done, self.failed, self.cached = total, 0, 0, 0
        self.stream = stream or sys.stderr
        self.quiet = quiet
        self.tty = hasattr(self.stream, "isatty") and self.stream.isatty()
        self.start = time.perf_counter()
        self._run_times: list[float] = []

    def note(self, text: str) -> None:
        if not self.quiet:
            self._clear()
            print(text, file=self.stream, flush=True)

    def advance(self, unit: Unit, cached: bool = False, wall_s: float | None = None) -> None:
        self.done += 1
        self.cached += cached
        self.failed += unit.status in ("failed", "crashed", "invalid")
        if wall_s is not None and not cached:
            self._run_times.append(wall_s)
        if self.quiet:
            return
        if self.tty:
            self._draw()
        elif not cached:
            extra = f" ({unit.error.splitlines()[0]})" if unit.error else ""
            print(f"[{self.done}/{self.total}] {unit.status}: {unit.label}{extra}", file=self.stream, flush=True)

    def _eta(self) -> str:
        left = self.total - self.done
        if not left:
            return "0 s"
        if not self._run_times:
            return "?"
        elapsed = time.perf_counter() - self.start
        rate = max(self.done - self.cached, 1) / max(elapsed, 1e-9)
        return f"{left / rate:.0f} s"

    def _draw(self) -> None:
        width = 30
        filled = int(width * self.done / max(self.total, 1))
        line = (f"\r[{'#' * filled}{'.' * (width - filled)}] {self.done}/{self.total} runs, "
                f"{self.cached} cached, {self.failed} failed, ETA {self._eta()}   ")
        self.stream.write(line)
        self.stream.flush()

    def _clear(self) -> None:
        if self.tty:
            self.stream.write("\r" + " " * 100 + "\r")

    def finish(self) -> None:
        if self.tty and not self.quiet:
            self.stream.write("\n")
            self.stream.flush()


def _run_folder(results: Path, key: str) -> Path:
    return results / "runs" / key[:24]


def batch(paths: list[str], results: str | os.PathLike, *, jobs: int | None = None, scheduler: str | None = None,
          fresh: bool = False, target: str = "auto", quiet: bool = False, stream: TextIO | None = None,
          pool_factory: Callable | None = None) -> BatchSummary:
    """Run every protocol (and scan point) under ``paths`` into the results folder.

    Args:
        paths: protocol files and folders (searched for ``*.protocol``).
        results: the results folder (created; an existing one is reused: its cache and index).
        jobs: local worker processes (default: all cores); ignored with ``scheduler``.
        scheduler: address of a Dask distributed scheduler; the workers must see the same files.
        fresh: ignore the cache and run everything again.
        target: Brian2 code-generation target of every run.
        quiet: no progress output (the summary is returned).
        stream: where progress goes (default stderr).
        pool_factory: ``(jobs) -> pool`` for tests; default :class:`LocalPool` or :class:`DaskPool`.

    Returns:
        A :class:`BatchSummary`.

    Raises:
        ProtocolError: no protocols, a path that does not exist, an unreachable scheduler, a
            results folder from an incompatible version.
        KeyboardInterrupt: after marking the unfinished runs ``interrupted`` in the index.
    """
    from .index import BatchLock, ResultIndex, batch_alive
    from .pool import DaskPool, LocalPool
    from .results import combine_tables

    started = time.perf_counter()
    results = Path(results).resolve()
    files = discover(list(paths))
    results.mkdir(parents=True, exist_ok=True)
    summary = BatchSummary(batch=time.strftime("%Y%m%d-%H%M%S-") + uuid.uuid4().hex[:6])
    with BatchLock(results, summary.batch), ResultIndex(results) as index:
        # runs left queued or running by a batch that died; a batch still running keeps its own
        for stale in index.unfinished_batches():
            if not batch_alive(results, stale):
                index.mark_unfinished("interrupted", batch=stale)
        # 1. expand files into units (parse only); a file that does not parse is one invalid unit
        units: list[Unit] = []
        broken: list[Unit] = []
        by_file: dict[str, list[Unit]] = {}
        for f in files:
            found, problem = expand(f, target)
            if problem is not None:
                u = Unit(protocol=str(f), point=0, n_points=1, title="", params={},
                         pre_key=f"unparsed:{f}", status="invalid", error=problem)
                broken.append(u)
                continue
            units.extend(found)
            by_file[str(f)] = found
        summary.total = len(units) + len(broken)
        progress = Progress(summary.total, stream=stream, quiet=quiet)
        # 2. units whose pre-key maps to a finished run are done
        todo_files: dict[str, list[Unit]] = {}
        for u in units:
            key = None if fresh else index.alias(u.pre_key)
            row = index.get(key) if key else None
            if row is not None and row["status"] == "ok" and (results / row["folder"]).exists():
                u.key, u.status = key, "cached"
            else:
                todo_files.setdefault(u.protocol, []).append(u)
        # 3. check and plan the rest; units whose plan key maps to a finished run are done too
        to_run: list[Unit] = []
        for protocol, group in todo_files.items():
            for pre_key, key in resolve_units(group, target).items():
                index.add_alias(pre_key, key)
            for u in group:
                if u.status == "invalid":
                    broken.append(u)
                    continue
                row = None if fresh else index.get(u.key)
                if row is not None and row["status"] == "ok" and (results / row["folder"]).exists():
                    u.status = "cached"
                else:
                    to_run.append(u)
        for u in broken:
            progress.note(f"invalid: {u.label}\n{u.error}")
            index.upsert(_row(u, summary.batch, results, target, key=u.key or u.pre_key, folder=""))
            progress.advance(u)
        for u in units:
            if u.status == "cached":
                progress.advance(u, cached=True)
        summary.cached = sum(u.status == "cached" for u in units)
        # 4. run the rest (several units with the same key: one run serves them all)
        distinct: dict[str, list[Unit]] = {}
        for u in to_run:
            distinct.setdefault(u.key, []).append(u)
        ordered = sorted(distinct.items(), key=lambda kv: -kv[1][0].extra.get("cost", 0.0))
        tasks = [{"key": key, "protocol": group[0].protocol, "point": group[0].point,
                  "out": str(_run_folder(results, key)), "target": target}
                 for key, group in ordered]
        summary.ran = len(tasks)

        def on_start(task: dict) -> None:
            first = distinct[task["key"]][0]
            index.upsert(_row(first, summary.batch, results, target, key=task["key"], status="running",
                              started=time.time()))

        def on_done(result: dict) -> None:
            group = distinct[result["key"]]
            for u in group:
                u.status, u.error = result["status"], result.get("error")
            index.update(result["key"], status=result["status"], ended=result.get("ended"),
                         wall_s=result.get("wall_s"), error=result.get("error"))
            for u in group:
                progress.advance(u, wall_s=result.get("wall_s"))

        if tasks:
            if pool_factory is not None:
                pool = pool_factory(jobs)
            elif scheduler:
                pool = DaskPool(scheduler)
            else:
                pool = LocalPool(jobs or os.cpu_count() or 1)
            try:
                pool.run(tasks, on_start, on_done)
            except KeyboardInterrupt:
                index.mark_unfinished("interrupted", batch=summary.batch)
                progress.finish()
                raise
        progress.finish()
        everything = units + [u for u in broken if u not in units]
        for status in ("ok", "failed", "crashed", "invalid"):
            setattr(summary, status, sum(u.status == status for u in everything))
        summary.units = everything
        if summary.ok or summary.cached:
            combine_tables(results)
    summary.wall_s = time.perf_counter() - started
    return summary


def _row(u: Unit, batch_id: str, results: Path, target: str, *, key: str, status: str | None = None,
         started: float | None = None, folder: str | None = None) -> dict:
    import json

    return {"key": key, "pre_key": u.pre_key, "protocol": u.protocol, "title": u.title, "point": u.point + 1,
            "params": json.dumps(u.params), "status": status or u.status, "batch": batch_id, "started": started,
            "ended": None, "wall_s": None, "error": u.error,
            "folder": folder if folder is not None else str(_run_folder(results, key).relative_to(results)),
            "target": target}
