"""Shared by the benchmarks: how protolang itself is timed (simulate, then collect)."""

from __future__ import annotations

import time


def protolang_run(plan, target):
    """Simulate and collect as ``Experiment.run`` does, without writing a run folder.

    Returns:
        (total seconds, simulate seconds, collect seconds, tables).
    """
    from protolang.engine import run_plan
    from protolang.measure.collect import collect

    t0 = time.perf_counter()
    rec = run_plan(plan, target=target)
    t1 = time.perf_counter()
    tables = collect(plan, rec)
    t2 = time.perf_counter()
    return t2 - t0, t1 - t0, t2 - t1, tables
