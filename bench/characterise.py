"""Benchmark: characterising 4 classes x 20 cells with 10 current steps each in protolang vs hand-written Brian2.

The demo protocol demo/characterise_classes.protocol (800 cell-sweeps of 900 ms: passive,
firing and F-I collectors) runs in protolang (simulate + collect) and in two hand-written
baselines on the same code-generation target (bench/cell_baselines.py): a per-cell,
per-step loop (timed over a few cell-steps and extrapolated) and an expert single-network
script. Compile caches are warmed first, so nobody pays compilation in the timings.
Printed: the three times, the ratios (targets: >= 100x faster than the loop, <= 1.2x the
expert's time) and the mean firing rate per class in protolang and in the expert script.

Usage: python bench/characterise.py [--target cython|numpy] [--loop-runs 8]
"""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(ROOT))

import cell_baselines  # noqa: E402

import protolang  # noqa: E402
from common import protolang_run  # noqa: E402


def class_rates(plan, rates_by_role):
    """Mean rate (Hz) over cells and depolarising steps, per class."""
    out = {}
    for role in plan.roles:
        _, _, amps = cell_baselines.step_of(role)
        out[role.cell_class] = float(rates_by_role[role.name][:, amps > 0].mean())
    return out


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--target", default="cython", choices=["cython", "numpy"])
    ap.add_argument("--loop-runs", type=int, default=8, help="cell-steps timed in the loop baseline")
    ap.add_argument("--protocol", default=str(ROOT / "demo" / "characterise_classes.protocol"))
    args = ap.parse_args()
    os.environ.setdefault("CYTHON_CACHE_DIR", str(ROOT / ".cache" / "cython"))

    exp = protolang.load(args.protocol)
    plan = exp.plan()
    n_steps = sum(cell_baselines.step_of(r)[2].size for r in plan.roles)
    n = plan.n_repeat * n_steps
    print(f"protocol: {plan.title}: {len(plan.roles)} classes x {plan.n_repeat} cells x "
          f"{n_steps // len(plan.roles)} steps = {n} cell-sweeps of {plan.sweep_length * 1e3:g} ms, "
          f"layout {plan.layout}, target {args.target}")

    # warm the compile caches of all three (a whole run each: which objects exist, e.g. synapse
    # groups, may depend on the selection, and the timings must not include compilation)
    print("warming compile caches ...", flush=True)
    protolang_run(plan, args.target)
    cell_baselines.loop(plan, args.target, 1)
    cell_baselines.expert(plan, args.target)

    t_loop, loop_rates = cell_baselines.loop(plan, args.target, args.loop_runs)
    t_expert, expert_rates = cell_baselines.expert(plan, args.target)
    t_ours, t_sim, t_collect, tables = protolang_run(plan, args.target)

    sweeps = tables["cell_sweeps"]
    ours = {}
    for role in plan.roles:
        _, _, amps = cell_baselines.step_of(role)
        mine = sweeps[sweeps["role"] == role.name]
        grid = np.zeros((plan.n_repeat, amps.size))
        grid[mine["repeat"].to_numpy(int), mine["sweep"].to_numpy(int)] = mine["rate_Hz"].to_numpy(float)
        ours[role.name] = grid
    rates_ours, rates_expert = class_rates(plan, ours), class_rates(plan, expert_rates)
    # the loop's few timed cell-steps, against protolang's same cell-steps
    loop_diff = max(abs(rate - ours[name][r, s]) for name, r, s, rate in loop_rates)

    loop_total = t_loop * n
    print(f"loop (per cell-step, {args.loop_runs} timed): {t_loop:.3f} s -> {loop_total:.0f} s extrapolated")
    print(f"expert single network:          {t_expert:.2f} s")
    print(f"protolang (simulate + collect): {t_ours:.2f} s  (simulate {t_sim:.2f} s, collect {t_collect:.2f} s)")
    print(f"speed-up over loop:             {loop_total / t_ours:.0f}x   (target >= 100x)")
    print(f"time relative to expert:        {t_ours / t_expert:.2f}x   (target <= 1.2x)")
    print("mean firing rate over cells and depolarising steps (Hz):")
    for cls in rates_ours:
        print(f"    {cls:20s} protolang {rates_ours[cls]:8.3f}   expert {rates_expert[cls]:8.3f}   "
              f"difference {rates_ours[cls] - rates_expert[cls]:+.3f}")
    worst = max(abs(rates_ours[c] - rates_expert[c]) for c in rates_ours)
    # same equations, parameters, time step and step currents: the only difference allowed is the
    # start (protolang starts at the resting state with the exponential term, the scripts at E_L),
    # far below one spike per step (2 Hz in a 500 ms step)
    agree = worst < 0.5 and loop_diff < 0.5
    print(f"rates agree: {'yes' if agree else 'NO'} (largest class-mean difference {worst:.3f} Hz; loop vs "
          f"protolang on the timed cell-steps {loop_diff:.3f} Hz; limit 0.5 Hz)")
    return 0 if agree else 1


if __name__ == "__main__":
    sys.exit(main())
