"""The batch runner: discovery, cache and invalidation, failures, crashed workers, interruption, executors."""

from __future__ import annotations

import os
import signal
import threading
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml

from protolang.batch.index import ResultIndex
from protolang.batch.pool import DaskPool, LocalPool
from protolang.batch.runner import batch
from protolang.batch.units import discover
from protolang.language.errors import ProtocolError

DEMO = Path(__file__).resolve().parents[1] / "demo" / "slab.circuit.yaml"

PAIR = """protocol "{title}"
circuit "{circuit}" seed {seed}
{scan}
cells:
    pre is {pre}
    post is {post} within 200 um of pre, receiving from pre
    repeat 2

sweeps 2 every 10 s
simulate deterministic

record post: current clamp, holding -65 mV

stimulate pre:
    pulse {amp} for 2 ms at 50 ms
    pulse 1.5 nA for 2 ms at 80 ms

measure post:
    responses to pre
"""


def _library(tmp_path: Path, *, slow: bool = False) -> tuple[Path, Path]:
    """Two protocols (one scanned over 2 points) on a copy of the demo circuit: 3 runs."""
    circuit = tmp_path / "circuit.yaml"
    circuit.write_text(DEMO.read_text())
    lib = tmp_path / "lib"
    lib.mkdir()
    (lib / "deep.protocol").write_text(PAIR.format(title="deep pair", circuit=circuit, seed=1, scan="",
                                                   pre="pyramidal_deep", post="pyramidal_deep", amp="1.5 nA"))
    (lib / "sub").mkdir()
    (lib / "sub" / "basket.protocol").write_text(
        PAIR.format(title="pyramid to basket", circuit=circuit, seed=2, scan="scan @amp: 1.5 nA, 2 nA\n",
                    pre="pyramidal_deep", post="basket_fast", amp="@amp"))
    return lib, circuit


def _index_rows(results: Path) -> pd.DataFrame:
    with ResultIndex(results, create=False) as index:
        return index.runs()


def test_discover_finds_protocols_and_refuses_empty_or_missing(tmp_path):
    lib, _ = _library(tmp_path)
    assert [p.name for p in discover([str(lib)])] == ["deep.protocol", "basket.protocol"]
    (tmp_path / "empty").mkdir()
    with pytest.raises(ProtocolError, match="holds no protocols"):
        discover([str(tmp_path / "empty")])
    with pytest.raises(ProtocolError, match="does not exist"):
        discover([str(tmp_path / "nowhere")])


@pytest.mark.brian2
@pytest.mark.slow
def test_cache_partial_invalidation_and_fresh(tmp_path):
    lib, circuit = _library(tmp_path)
    results = tmp_path / "results"
    first = batch([str(lib)], results, jobs=2, target="numpy", quiet=True)
    assert (first.total, first.ran, first.ok, first.cached) == (3, 3, 3, 0)
    rows = _index_rows(results)
    assert sorted(rows["status"]) == ["ok"] * 3
    assert (results / "tables" / "connections.parquet").exists()
    combined = pd.read_parquet(results / "tables" / "connections.parquet")
    assert set(combined["title"]) == {"deep pair", "pyramid to basket"}

    # unchanged library: nothing runs, and it is quick
    t = time.perf_counter()
    again = batch([str(lib)], results, jobs=2, target="numpy", quiet=True)
    assert (again.ran, again.cached) == (0, 3)
    assert time.perf_counter() - t < 3.0

    # one protocol changed: only its run again
    deep = lib / "deep.protocol"
    deep.write_text(deep.read_text().replace("holding -65 mV", "holding -66 mV"))
    third = batch([str(lib)], results, jobs=2, target="numpy", quiet=True)
    assert (third.ran, third.cached) == (1, 2)

    # one pathway of the circuit changed: only the runs whose plans use it
    data = yaml.safe_load(circuit.read_text())
    for pw in data["pathways"]:
        if (pw["pre"], pw["post"]) == ("pyramidal_deep", "basket_fast"):
            pw["release"]["U"]["mean"] = 0.55
    circuit.write_text(yaml.safe_dump(data, sort_keys=False))
    fourth = batch([str(lib)], results, jobs=2, target="numpy", quiet=True)
    assert (fourth.ran, fourth.cached) == (2, 1)

    fresh = batch([str(lib)], results, jobs=2, target="numpy", quiet=True, fresh=True)
    assert (fresh.ran, fresh.cached) == (3, 0)


@pytest.mark.brian2
@pytest.mark.slow
def test_invalid_protocol_is_reported_and_the_others_run(tmp_path):
    lib, _ = _library(tmp_path)
    (lib / "broken.protocol").write_text((lib / "deep.protocol").read_text().replace("pyramidal_deep", "pyramidal_dep", 1))
    summary = batch([str(lib)], tmp_path / "results", jobs=2, target="numpy", quiet=True)
    assert (summary.invalid, summary.ok) == (1, 3)
    assert not summary.all_ok
    rows = _index_rows(tmp_path / "results")
    bad = rows[rows["status"] == "invalid"]
    assert len(bad) == 1 and "pyramidal_dep" in bad["error"].iloc[0] and "broken.protocol" in bad["error"].iloc[0]


@pytest.mark.brian2
@pytest.mark.slow
def test_killed_worker_costs_one_run_and_the_batch_finishes(tmp_path):
    lib, _ = _library(tmp_path)
    results = tmp_path / "results"
    killed: list[int] = []

    def killer():
        # wait until a run is under way in a worker, then kill that worker outright
        deadline = time.time() + 60
        while time.time() < deadline and not killed:
            if (results / "index.sqlite").exists():
                try:
                    rows = _index_rows(results)
                except Exception:
                    rows = None
                if rows is not None and (rows["status"] == "running").any():
                    import multiprocessing

                    children = multiprocessing.active_children()
                    if children:
                        os.kill(children[0].pid, signal.SIGKILL)
                        killed.append(children[0].pid)
                        return
            time.sleep(0.05)

    thread = threading.Thread(target=killer)
    thread.start()
    summary = batch([str(lib)], results, jobs=1, target="numpy", quiet=True)
    thread.join()
    assert killed, "no worker was running"
    assert summary.crashed == 1 and summary.ok == 2
    rows = _index_rows(results)
    assert len(rows) == 3 and not rows["status"].isin(["running", "queued"]).any()
    crashed = rows[rows["status"] == "crashed"]
    assert "exit code" in crashed["error"].iloc[0]
    # the next batch runs only the crashed one
    again = batch([str(lib)], results, jobs=1, target="numpy", quiet=True)
    assert (again.ran, again.ok, again.cached) == (1, 1, 2)


class _InterruptedPool(LocalPool):
    """Runs the first task, then behaves as if Ctrl-C arrived."""

    def run(self, tasks, on_start, on_done):
        tasks = list(tasks)
        super().run(tasks[:1], on_start, on_done)
        on_start(tasks[1])
        raise KeyboardInterrupt


@pytest.mark.brian2
@pytest.mark.slow
def test_interrupt_and_resume(tmp_path):
    lib, _ = _library(tmp_path)
    results = tmp_path / "results"
    with pytest.raises(KeyboardInterrupt):
        batch([str(lib)], results, jobs=1, target="numpy", quiet=True, pool_factory=_InterruptedPool)
    rows = _index_rows(results)
    assert sorted(rows["status"]) == ["interrupted", "ok"]
    resumed = batch([str(lib)], results, jobs=1, target="numpy", quiet=True)
    assert (resumed.cached, resumed.ran, resumed.ok) == (1, 2, 2)
    assert sorted(_index_rows(results)["status"]) == ["ok"] * 3


def _tables(results: Path) -> dict[str, pd.DataFrame]:
    out = {}
    for name in ("responses", "connections"):
        df = pd.read_parquet(results / "tables" / f"{name}.parquet")
        out[name] = df.drop(columns=[c for c in df.columns if c == "run_key"]).sort_values(
            ["title", "point", "repeat"] + (["sweep", "event"] if name == "responses" else [])).reset_index(drop=True)
    return out


@pytest.mark.brian2
@pytest.mark.slow
def test_same_results_sequential_pool_and_dask(tmp_path):
    from distributed import LocalCluster

    lib, _ = _library(tmp_path)
    one = batch([str(lib)], tmp_path / "r1", jobs=1, target="numpy", quiet=True)
    two = batch([str(lib)], tmp_path / "r2", jobs=2, target="numpy", quiet=True)
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        dask = batch([str(lib)], tmp_path / "r3", scheduler=cluster.scheduler_address, target="numpy", quiet=True)
    assert one.ok == two.ok == dask.ok == 3
    a, b, c = _tables(tmp_path / "r1"), _tables(tmp_path / "r2"), _tables(tmp_path / "r3")
    for name in a:
        pd.testing.assert_frame_equal(a[name], b[name])
        pd.testing.assert_frame_equal(a[name], c[name])


def test_unreachable_scheduler_is_a_quick_clear_error():
    t = time.perf_counter()
    with pytest.raises(ProtocolError, match="cannot reach the Dask scheduler"):
        DaskPool("tcp://127.0.0.1:9")
    assert time.perf_counter() - t < 15


class _Tty:
    """A terminal-like stream that keeps what was written."""

    def __init__(self):
        self.text = ""

    def isatty(self):
        return True

    def write(self, s):
        self.text += s

    def flush(self):
        pass


def test_progress_bar_counts_failures_and_eta_and_quiet_mode():
    import io

    from protolang.batch.runner import Progress
    from protolang.batch.units import Unit

    def unit(status, error=None):
        return Unit(protocol="/x/a.protocol", point=0, n_points=1, title="a", params={}, pre_key="p",
                    status=status, error=error)

    tty = _Tty()
    bar = Progress(4, stream=tty)
    bar.advance(unit("cached"), cached=True)
    bar.advance(unit("ok"), wall_s=2.0)
    bar.advance(unit("failed", "boom\nmore"), wall_s=1.0)
    last = tty.text.split("\r")[-1]
    assert "3/4 runs" in last and "1 cached" in last and "1 failed" in last and "ETA" in last

    log = io.StringIO()
    lines = Progress(2, stream=log)
    lines.advance(unit("ok"), wall_s=1.0)
    lines.advance(unit("failed", "boom\nmore"), wall_s=1.0)
    assert log.getvalue().splitlines() == ["[1/2] ok: a.protocol", "[2/2] failed: a.protocol (boom)"]

    quiet = io.StringIO()
    silent = Progress(1, stream=quiet, quiet=True)
    silent.advance(unit("failed", "boom"))
    silent.note("something")
    silent.finish()
    assert quiet.getvalue() == ""


@pytest.mark.brian2
@pytest.mark.slow
def test_standalone_target_compiles_once_per_scan_and_matches_the_runtime_target(tmp_path):
    from protolang.api import load

    lib, _ = _library(tmp_path)
    scanned = lib / "sub" / "basket.protocol"
    compiled = load(scanned).run(tmp_path / "sa", target="standalone")
    runtime = load(scanned).run(tmp_path / "np", target="numpy")
    # both scan points (1.5 and 2 nA) share one compiled network: the amplitude is a run-time number
    assert compiled.provenance["timings"]["standalone_binaries"] == 1
    assert compiled.provenance["engine"]["target"] == "cpp_standalone"
    a = compiled.tables["connections"]["amplitude_mean_mV"].to_numpy()
    b = runtime.tables["connections"]["amplitude_mean_mV"].to_numpy()
    # deterministic release: the same numbers up to floating-point order (numpy vs C++)
    np.testing.assert_allclose(a, b, rtol=1e-6)
    # the batch runner takes the same target, one run folder per point
    summary = batch([str(scanned)], tmp_path / "results", jobs=1, target="standalone", quiet=True)
    assert summary.ok == 2
