"""Tasks in, results out, on local worker processes or a Dask cluster; a crashed worker costs one task.

A task is a plain dict (protocol path, scan point, run folder, target); :func:`execute` runs it
and returns a plain dict (status, times, error). Both executors call the same function, so a run
gives the same numbers sequentially, on the local pool or on Dask. The local pool keeps
``jobs`` long-lived worker processes (each imports Brian2 once and shares the compile cache
with the others); when one dies mid-task (killed, out of memory, a crash in compiled code) its
task is reported as ``crashed`` with the exit code and a fresh worker takes its place.
"""

from __future__ import annotations

import multiprocessing
import os
import time
import traceback
from collections import deque
from multiprocessing.connection import wait
from typing import Callable, Iterable

from ..language.errors import ProtocolError, error

# How long the scheduler of a Dask cluster may take to answer before the batch gives up.
SCHEDULER_TIMEOUT_S = 5.0


def _import_brian2_off_main_thread() -> None:
    """Import Brian2 from a worker thread (a Dask worker runs tasks in threads).

    Brian2's import installs a SIGINT handler, which Python allows only in the main thread; the
    handler matters for interactive runs, not for a batch worker, so it is skipped there.
    """
    import signal
    import sys
    import threading

    if "brian2" in sys.modules or threading.current_thread() is threading.main_thread():
        return
    original = signal.signal
    signal.signal = lambda *args, **kwargs: None
    try:
        import brian2  # noqa: F401
    finally:
        signal.signal = original


def execute(task: dict) -> dict:
    """Run one task (in whatever process) and describe the outcome; never raises for a failed run."""
    from ..api import load

    _import_brian2_off_main_thread()
    started = time.time()
    out = {"key": task["key"], "started": started, "pid": os.getpid()}
    try:
        exp = load(task["protocol"])
        exp.run_point(task["point"], task["out"], target=task["target"], force=True)
        out.update(status="ok", error=None)
    except ProtocolError as exc:
        out.update(status="failed", error=str(exc))
    except Exception as exc:   # a bug or a resource failure in this run; the batch goes on
        tail = "".join(traceback.format_exception(exc)[-3:]).strip()
        out.update(status="failed", error=f"{type(exc).__name__}: {exc}\n{tail}")
    out["ended"] = time.time()
    out["wall_s"] = out["ended"] - started
    return out


def _worker(conn) -> None:
    """Worker process: take tasks from the pipe until told to stop."""
    while True:
        try:
            task = conn.recv()
        except EOFError:
            return
        if task is None:
            return
        conn.send(execute(task))


class LocalPool:
    """``jobs`` worker processes fed one task at a time over a pipe each."""

    def __init__(self, jobs: int):
        self.jobs = max(1, int(jobs))
        self._ctx = multiprocessing.get_context("spawn")
        self._workers: list[tuple] = []

    def _start(self):
        parent, child = self._ctx.Pipe()
        proc = self._ctx.Process(target=_worker, args=(child,), daemon=True)
        proc.start()
        child.close()
        return proc, parent

    def run(self, tasks: Iterable[dict], on_start: Callable[[dict], None], on_done: Callable[[dict], None]) -> None:
        """Run every task; call ``on_start(task)`` as it is handed out and ``on_done(result)`` as it ends.

        Raises:
            KeyboardInterrupt: passed on after the workers are stopped (the caller marks the
                tasks still running as interrupted).
        """
        pending = deque(tasks)
        busy: dict[int, dict] = {}        # worker index -> task
        self._workers = [self._start() for _ in range(min(self.jobs, len(pending)) or 1)]
        try:
            for i in range(len(self._workers)):
                self._hand_out(i, pending, busy, on_start)
            while busy:
                conns = {w[1]: i for i, w in enumerate(self._workers)}
                sentinels = {w[0].sentinel: i for i, w in enumerate(self._workers)}
                ready = wait(list(conns) + list(sentinels), timeout=1.0)
                for obj in ready:
                    if obj in conns:
                        i = conns[obj]
                        try:
                            result = obj.recv()
                        except (EOFError, OSError):
                            continue   # the worker died while sending: its sentinel reports it
                        busy.pop(i, None)
                        on_done(result)
                        self._hand_out(i, pending, busy, on_start)
                for obj in ready:
                    if obj in sentinels:
                        i = sentinels[obj]
                        proc, conn = self._workers[i]
                        if proc.is_alive():
                            continue
                        task = busy.pop(i, None)
                        if task is not None:
                            on_done({"key": task["key"], "status": "crashed", "started": task.get("_started"),
                                     "ended": time.time(),
                                     "wall_s": time.time() - task.get("_started", time.time()),
                                     "error": f"the worker process (pid {proc.pid}) died with exit code "
                                              f"{proc.exitcode} while running this task"})
                        conn.close()
                        self._workers[i] = self._start()
                        self._hand_out(i, pending, busy, on_start)
        finally:
            self.close()

    def _hand_out(self, i: int, pending: deque, busy: dict, on_start) -> None:
        if not pending:
            return
        task = pending.popleft()
        task["_started"] = time.time()
        on_start(task)
        busy[i] = task
        self._workers[i][1].send(task)

    def close(self) -> None:
        for proc, conn in self._workers:
            try:
                conn.send(None)
            except (OSError, BrokenPipeError):
                pass
        for proc, conn in self._workers:
            proc.join(timeout=2.0)
            if proc.is_alive():
                proc.terminate()
                proc.join(timeout=2.0)
            conn.close()
        self._workers = []


class DaskPool:
    """The same tasks on a Dask distributed cluster (``execute`` runs on its workers)."""

    def __init__(self, address: str):
        try:
            from distributed import Client
        except ImportError:   # pragma: no cover - distributed is a dependency
            raise error("the Dask scheduler needs the 'distributed' package", None,
                        hint="pip install distributed") from None
        self.address = address
        try:
            self.client = Client(address, timeout=f"{SCHEDULER_TIMEOUT_S:g}s")
        except (OSError, TimeoutError, ValueError) as exc:
            raise error(f"cannot reach the Dask scheduler at {address!r} within {SCHEDULER_TIMEOUT_S:g} s: {exc}",
                        None, expected="the address of a running scheduler, e.g. tcp://10.0.0.5:8786",
                        hint="start one with 'dask scheduler' (and workers with 'dask worker ADDRESS'), "
                             "or drop --scheduler to use local processes") from None

    def run(self, tasks: Iterable[dict], on_start: Callable[[dict], None], on_done: Callable[[dict], None]) -> None:
        from distributed import as_completed

        futures = {}
        try:
            for task in tasks:
                task["_started"] = time.time()
                on_start(task)
                fut = self.client.submit(execute, {k: v for k, v in task.items() if not k.startswith("_")},
                                         key=f"protolang-run-{task['key']}-{time.time_ns()}", pure=False)
                futures[fut] = task
            for fut in as_completed(list(futures)):
                task = futures[fut]
                try:
                    on_done(fut.result())
                except Exception as exc:   # KilledWorker, CommClosedError: the worker, not the run
                    on_done({"key": task["key"], "status": "crashed", "started": task["_started"],
                             "ended": time.time(), "wall_s": time.time() - task["_started"],
                             "error": f"the Dask worker running this task was lost: {type(exc).__name__}: {exc}"})
        finally:
            for fut in futures:
                if not fut.done():
                    fut.cancel()
            self.close()

    def close(self) -> None:
        try:
            self.client.close()
        except Exception:   # pragma: no cover - closing a dead connection
            pass
