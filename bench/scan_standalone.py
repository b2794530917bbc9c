"""Benchmark: a 20-point calcium scan as 20 runtime runs against one compiled C++ standalone binary.

The protocol (written below, on the invented demo circuit) records deep pyramid pairs with an
8-pulse train and a recovery probe at 20 calcium concentrations. It runs
(a) as protolang runs a scan today: ``Experiment.run`` on the cython target, one network built and
    simulated per point (compile cache warmed first, untimed);
(b) compile-once: the points planned, :func:`protolang.engine.standalone.run_points_standalone`
    (one build, one compilation in a fresh project folder, one binary run per point), the same
    collectors per point and the same combined tables;
(c), (d) (b) again on the project folder (b) left behind, as a later batch or process would find
    it, with one and with two binaries running at a time;
(e) (d) without the tables: planning and simulation only, to set against (a)'s simulation time.
Prints the wall times of all of them, the compile time on its own, the ratios (target >= 5x) and
how far the traces and the first-response means of (a) and (b) are apart.

Usage: python bench/scan_standalone.py [--points 20] [--pairs 20] [--sweeps 10] [--build-dir DIR]
"""

from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(ROOT))

import protolang  # noqa: E402

PROTOCOL = """\
# Invented demo scenario: deep pyramid pairs across extracellular calcium (benchmark).
protocol "deep pyramid pairs: train and recovery probe across calcium"
circuit "{circuit}" seed 7

scan @ca: 1.0 mM to 2.0 mM in {points} steps

bath:
    calcium @ca
    magnesium 1.0 mM

cells:
    pre is pyramidal_deep
    post is pyramidal_deep within 150 um of pre, receiving from pre
    repeat {pairs}

sweeps {sweeps} every 10 s

record pre: current clamp
record post: current clamp, holding -70 mV, noise 0.03 mV

stimulate pre:
    train 8 pulses of 1.5 nA for 2 ms at 20 Hz from 100 ms
    pulse 1.5 nA for 2 ms at 1000 ms

measure post:
    responses to pre
"""


def first_response_mean(tables: dict) -> float:
    resp = tables["responses"]
    amps = resp[resp["event"] == 1]["amplitude_mV"].to_numpy(dtype=float)
    return float(np.nanmean(amps))


def compile_once(exp, build_dir: Path, jobs: int, tabulate: bool = True) -> tuple[float, list, list, dict]:
    """Plan, simulate every point with one binary, collect and combine, as Experiment.run does;
    each point's tables are collected as soon as its recordings are read, while later points run.
    Without ``tabulate``: plan and simulate only."""
    from protolang.engine.standalone import run_points_standalone
    from protolang.measure.collect import collect
    from protolang.report.scan import combine

    t0 = time.perf_counter()
    points = exp.points()
    plans = [exp.plan(k) for k in range(len(points))]
    t1 = time.perf_counter()
    tables: dict[int, dict] = {}
    collect_s = [0.0]

    def on_point(k, rec):
        t = time.perf_counter()
        tables[k] = collect(plans[k], rec)
        collect_s[0] += time.perf_counter() - t

    recordings = run_points_standalone(plans, build_dir, jobs=jobs, on_point=on_point if tabulate else None)
    t2 = time.perf_counter()
    if tabulate:
        combine([(values, tables[k]) for k, (values, _) in enumerate(points)])
    t3 = time.perf_counter()
    sa = recordings[0].meta["standalone"]
    parts = {"plan": t1 - t0, "simulate (and collect)": t2 - t1, "of which collect": collect_s[0],
             "structure check": sa["structure_check_s"], "codegen": sa["codegen_s"], "compile": sa["compile_s"],
             "make": sa["make_s"], "binary CPU": sum(r.meta["run_s"] for r in recordings),
             "read back": sum(r.meta["standalone"]["read_s"] for r in recordings), "combine": t3 - t2,
             "compiled now": sa["compiled_now"]}
    return t3 - t0, recordings, [tables.get(k) for k in range(len(points))], parts


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--points", type=int, default=20)
    ap.add_argument("--pairs", type=int, default=20)
    ap.add_argument("--sweeps", type=int, default=10)
    ap.add_argument("--build-dir", default=None,
                    help="project cache folder for (b) to (e) (default: a fresh temporary folder, removed at the end)")
    args = ap.parse_args()
    os.environ.setdefault("CYTHON_CACHE_DIR", str(ROOT / ".cache" / "cython"))

    text = PROTOCOL.format(circuit=ROOT / "demo" / "slab.circuit.yaml", points=args.points, pairs=args.pairs,
                           sweeps=args.sweeps)
    exp = protolang.loads(text, str(ROOT / "bench" / "scan_standalone.protocol"))
    plan = exp.plan(0)
    print(f"protocol: {plan.title}: {len(exp.points())} points x {plan.n_repeat} pairs x {plan.n_sweeps} sweeps "
          f"({plan.n_replicas} replicas, {plan.sweep_length * 1e3:g} ms each)")

    from protolang.engine import run_plan

    print("warming the cython compile cache (untimed) ...", flush=True)
    run_plan(plan, target="cython")

    print("(a) Experiment.run, cython, one run per point ...", flush=True)
    t0 = time.perf_counter()
    result = exp.run(None, target="cython")
    t_runtime = time.perf_counter() - t0
    sim_runtime = result.provenance["timings"]["simulate_s"]

    temporary = args.build_dir is None
    build_dir = Path(tempfile.mkdtemp(prefix="protolang_scan_")) if temporary else Path(args.build_dir)
    try:
        print(f"(b) compile once, jobs 1, project folder under {build_dir} ...", flush=True)
        t_cold, rec_b, tables_b, parts_b = compile_once(exp, build_dir, 1)
        print("(c) compile once, jobs 1, on the project folder (b) left ...", flush=True)
        t_warm, _, _, parts_c = compile_once(exp, build_dir, 1)
        print("(d) compile once, jobs 2, on the project folder (b) left ...", flush=True)
        t_two, _, _, parts_d = compile_once(exp, build_dir, 2)
        print("(e) as (d), simulation only (no tables) ...", flush=True)
        t_sim, _, _, parts_e = compile_once(exp, build_dir, 2, tabulate=False)
    finally:
        if temporary:
            shutil.rmtree(build_dir, ignore_errors=True)

    worst = 0.0
    for run, rec in zip(result.points, rec_b):
        for role, trace in run.recordings.traces.items():
            worst = max(worst, float(np.abs(trace - rec.traces[role]).max() / np.abs(trace).max()))
    means_a = [first_response_mean(run.tables) for run in result.points]
    means_b = [first_response_mean(t) for t in tables_b]

    def breakdown(parts: dict) -> str:
        return ", ".join(f"{k} {v:.2f} s" if isinstance(v, float) else f"{k} {v}" for k, v in parts.items())

    print()
    print(f"(a) runtime, cython (warm cache):          {t_runtime:7.2f} s   (simulate {sim_runtime:.2f} s, "
          f"collect {result.provenance['timings']['collect_s']:.2f} s)")
    print(f"(b) compile once, fresh project, jobs 1:   {t_cold:7.2f} s   ({breakdown(parts_b)})")
    print(f"(c) compile once, project found, jobs 1:   {t_warm:7.2f} s   ({breakdown(parts_c)})")
    print(f"(d) compile once, project found, jobs 2:   {t_two:7.2f} s   ({breakdown(parts_d)})")
    print(f"compile time alone (b):                    {parts_b['compile']:7.2f} s   (make {parts_b['make']:.2f} s)")
    print(f"(e) simulation only, project found, jobs 2: {t_sim:5.2f} s   ({breakdown(parts_e)})")
    for name, total in (("b", t_cold), ("c", t_warm), ("d", t_two)):
        print(f"speed-up (a)/({name}): {t_runtime / total:5.1f}x whole scan (plan, simulate, collect, combine)"
              + ("   (target >= 5x)" if name == "d" else ""))
    print(f"speed-up of the simulation, (a) simulate / (e): {sim_runtime / t_sim:5.1f}x")
    print(f"largest trace difference (a) vs (b), relative to the largest |value| of the trace: {worst:.2e}")
    print("first-response mean per point, mV:")
    for k, (ma, mb) in enumerate(zip(means_a, means_b)):
        print(f"  point {k + 1:2d}: runtime {ma:.5f}  standalone {mb:.5f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
