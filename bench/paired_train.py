"""Benchmark: the demo train protocol (50 pairs x 30 sweeps) in protolang vs hand-written Brian2.

Prints ratios measured in this one run against two baselines on the same code-generation target:
a per-sweep loop (timed over a few sweeps and extrapolated) and an expert single-network script.
Targets: >= 300x faster than the loop, <= 1.2x the expert's time, same first-response mean within
sampling error. Also times `protolang check` from a cold start.

Usage: python bench/paired_train.py [--target cython|numpy] [--loop-sweeps 5]
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(ROOT))

import baselines  # noqa: E402

import protolang  # noqa: E402
from common import protolang_run  # noqa: E402


def cold_check_seconds(path: Path) -> float:
    best = []
    for _ in range(3):
        t0 = time.perf_counter()
        subprocess.run([sys.executable, "-m", "protolang.cli", "check", str(path)], check=True,
                       capture_output=True, cwd=ROOT)
        best.append(time.perf_counter() - t0)
    return min(best)


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--target", default="cython", choices=["cython", "numpy"])
    ap.add_argument("--loop-sweeps", type=int, default=5)
    ap.add_argument("--protocol", default=str(ROOT / "demo" / "pyramid_pair_train.protocol"))
    args = ap.parse_args()
    os.environ.setdefault("CYTHON_CACHE_DIR", str(ROOT / ".cache" / "cython"))

    exp = protolang.load(args.protocol)
    plan = exp.plan()
    n = plan.n_repeat * plan.n_sweeps
    print(f"protocol: {plan.title}: {plan.n_repeat} pairs x {plan.n_sweeps} sweeps = {n} sweeps, "
          f"{plan.sweep_length * 1e3:g} ms each, target {args.target}")

    # warm the compile caches of all three so that no one pays compilation in the timings
    print("warming compile caches ...", flush=True)
    small = exp.plan()
    small.n_sweeps = 1
    protolang_run(small, args.target)  # noqa: the result is not needed
    baselines.loop(plan, args.target, 1)
    baselines.expert(small, args.target)

    t_loop, amps_loop = baselines.loop(plan, args.target, args.loop_sweeps)
    t_expert, amps_expert = baselines.expert(plan, args.target)
    t_ours, t_sim, _, tables = protolang_run(plan, args.target)
    t_check = cold_check_seconds(Path(args.protocol))

    resp = tables["responses"]
    first = resp[(resp["event"] == 1)]["amplitude_mV"].to_numpy(dtype=float)
    first = first[np.isfinite(first)]
    loop_total = t_loop * n
    se = np.sqrt(first.var() / len(first) + amps_expert.var() / len(amps_expert))
    z = (first.mean() - amps_expert.mean()) / se

    print(f"loop (per sweep, {args.loop_sweeps} timed): {t_loop:.3f} s/sweep -> {loop_total:.0f} s extrapolated")
    print(f"expert single network:            {t_expert:.2f} s")
    print(f"protolang (simulate + collect):   {t_ours:.2f} s  (simulate {t_sim:.2f} s, collect {t_ours - t_sim:.2f} s)")
    print(f"speed-up over loop:               {loop_total / t_ours:.0f}x with collect, "
          f"{loop_total / t_sim:.0f}x simulation alone   (target >= 300x)")
    print(f"time relative to expert:          {t_ours / t_expert:.2f}x with collect, "
          f"{t_sim / t_expert:.2f}x simulation alone   (target <= 1.2x)")
    print(f"loop / expert (the ceiling any single-network script reaches here): {loop_total / t_expert:.0f}x")
    print(f"first response mean: protolang {first.mean():.4f} mV (n={len(first)}), "
          f"expert {amps_expert.mean():.4f} mV (n={len(amps_expert)}), z = {z:.2f}")
    print(f"protolang check, cold start:      {t_check:.2f} s   (target < 0.5 s)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
