"""Benchmark: a library of 20 demo protocols through `protolang batch`, against itself and the API.

Measured in this one run, on the same code-generation target, with Brian2's compile cache warmed
first (so no ratio counts one-time compilation):

* 20 protocols on 2 worker processes against 1 worker (target: at least 1.7x);
* re-running the unchanged library (target: under 3 s in total);
* per-run overhead of the batch machinery: 1 worker against calling the API directly, run after
  run in one process (target: under 10 %).

The library is the paired demo protocols, each copied with several seeds (seeds change the cells,
connections and release noise, not the amount of work) until there are 20.

Usage: python bench/batch_library.py [--target cython|numpy] [--keep DIR]
"""

from __future__ import annotations

import argparse
import shutil
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(ROOT))

from protolang.api import load  # noqa: E402
from protolang.batch.runner import batch  # noqa: E402

SOURCES = ["pyramid_pair_train", "pyramid_to_dendrite_targeting", "pyramid_pair_calcium_1_0mM",
           "pyramid_pair_calcium_2_0mM", "epsc_train_frequencies"]


def make_library(folder: Path, n: int = 20) -> list[Path]:
    folder.mkdir(parents=True, exist_ok=True)
    out = []
    for k in range(n):
        name = SOURCES[k % len(SOURCES)]
        text = (ROOT / "demo" / f"{name}.protocol").read_text()
        circuit = (ROOT / "demo" / "slab.circuit.yaml").resolve()
        lines = []
        for line in text.splitlines():
            if line.startswith("circuit "):
                line = f'circuit "{circuit}" seed {100 + k}'
            lines.append(line)
        path = folder / f"{k + 1:02d}_{name}.protocol"
        path.write_text("\n".join(lines) + "\n")
        out.append(path)
    return out


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--target", default="cython", choices=["cython", "numpy"])
    ap.add_argument("--keep", default=None, help="keep the library and results in this folder")
    ap.add_argument("--skip-api", action="store_true", help="skip the API baseline (measure the worker scaling only)")
    args = ap.parse_args()
    work = Path(args.keep) if args.keep else Path(tempfile.mkdtemp(prefix="protolang-bench-batch-"))
    lib = work / "library"
    files = make_library(lib)
    n_units = sum(len(load(f).points()) for f in files)
    print(f"library: {len(files)} protocols, {n_units} runs, target {args.target}")

    # warm the compile cache (and the OS file cache) with one run of each source protocol
    t = time.perf_counter()
    for f in files[:len(SOURCES)]:
        load(f).run_point(0, None, target=args.target)
    print(f"warm-up (compile cache): {time.perf_counter() - t:.1f} s")

    api_s = None
    if not args.skip_api:
        t = time.perf_counter()
        for f in files:
            exp = load(f)
            for k in range(len(exp.points())):
                exp.run_point(k, work / "api" / f"{f.stem}_{k}", target=args.target, force=True)
        api_s = time.perf_counter() - t
        print(f"API, one process, run after run:   {api_s:7.1f} s")

    for old in ("results_1", "results_2"):
        shutil.rmtree(work / old, ignore_errors=True)
    one = batch([str(lib)], work / "results_1", jobs=1, target=args.target, quiet=True)
    print(f"batch, 1 worker:                   {one.wall_s:7.1f} s ({one.ok} ok)")
    two = batch([str(lib)], work / "results_2", jobs=2, target=args.target, quiet=True)
    print(f"batch, 2 workers:                  {two.wall_s:7.1f} s ({two.ok} ok)")
    again = batch([str(lib)], work / "results_2", jobs=2, target=args.target, quiet=True)
    print(f"batch, unchanged library again:    {again.wall_s:7.2f} s ({again.cached} cached, {again.ran} run)")

    print(f"2 workers vs 1 worker:   {one.wall_s / two.wall_s:.2f}x   (target >= 1.7x)")
    print(f"unchanged re-run:        {again.wall_s:.2f} s  (target < 3 s)")
    if api_s is not None:
        print(f"batch overhead vs API:   {100 * (one.wall_s / api_s - 1):+.1f} %  (target < 10 %)")
    if not args.keep:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
