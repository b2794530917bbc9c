"""Command line: a thin layer over the public API (check, parse, plan, run, predict, batch, results, nwb, import, compare,
report, sheet, stimulus).

User errors print as ``file:line:col: error: ...`` and exit with status 1; there is never a
traceback for a user's mistake. ``run --require-agreement`` exits with status 2 when a published
reference does not agree. Unexpected internal failures exit with status 3 and say so.
"""

from __future__ import annotations

import argparse
import os
import sys
import time


def _err(msg: str) -> None:
    print(msg, file=sys.stderr, flush=True)


def cmd_check(args) -> int:
    from .api import load
    from .language.errors import ProtocolError, render

    status = 0
    for path in args.files:
        try:
            exp = load(path)
            warnings = exp.check()
            if args.resolve:
                for k in range(len(exp.points())):
                    exp.plan(k)
        except ProtocolError as exc:
            _err(str(exc))
            status = 1
            continue
        for w in warnings:
            _err(render(w))
        print(f"{path}: ok")
    return status


def cmd_parse(args) -> int:
    from .api import load
    from .language import dump, format_protocol

    exp = load(args.file)
    print(dump(exp.protocol) if args.dump else format_protocol(exp.protocol))
    return 0


def cmd_plan(args) -> int:
    from .api import load

    exp = load(args.file)
    plan = exp.plan(args.point - 1)
    if args.dump:
        print(plan.to_json())
        return 0
    print(f"protocol   {plan.title}")
    points = exp.points()
    if len(points) > 1 or points[0][0]:
        shown = ", ".join(f"@{n} = {q}" for n, q in points[args.point - 1][0].items())
        print(f"scan       {len(points)} points; showing point {args.point}: {shown}")
    print(f"circuit    {plan.circuit_file} (seed {plan.seed})")
    print(f"cells      " + ", ".join(f"{r.name}: {r.cell_class}" for r in plan.roles) + f"; {plan.n_repeat} repeats")
    for s in plan.synapses:
        print(f"synapse    {s.name} ({s.pathway}): {int(s.connected.sum())}/{plan.n_repeat} connected")
    print(f"sweeps     {plan.n_sweeps} x {plan.sweep_length * 1e3:g} ms, every {plan.interval:g} s")
    print(f"layout     {plan.layout}: {plan.layout_reason}")
    print(f"bath       calcium {plan.conditions['calcium']:g} mM, magnesium {plan.conditions['magnesium']:g} mM, "
          f"temperature {plan.conditions['temperature'] - 273.15:g} degC, "
          f"release factor {plan.conditions['release_factor']:.4f}, blocks {plan.conditions['blocks'] or 'none'}")
    q10 = plan.conditions.get("q10_factors", {})
    for rname, rec in sorted(q10.get("receptors", {}).items()):
        if abs(rec.get("factor", 1.0) - 1.0) > 1e-12:
            print(f"kinetics   {rname} rise and decay divided by {rec['factor']:.4g} (Q10 at bath temperature)")
    for r in plan.roles:
        rates = {k: float(v[0]) for k, v in r.params.items() if k.startswith("phi")}
        if rates:
            print(f"kinetics   {r.name} ({r.model}) gating rate factors " + ", ".join(f"{k} {v:.4g}" for k, v in rates.items()))
    for lesion in plan.lesions:
        what = [f"{n} {k} cells" for k, n in lesion.cells.items()]
        what += [f"{n} {k} connections" for k, n in lesion.connections.items()]
        scope = " (summed over repeats)" if lesion.per_repeat else ""
        print(f"lesion     {lesion.text}: " + (", ".join(what) or "nothing in this circuit") + scope)
    if plan.network is not None:
        summary = plan.network.to_plain()
        print(f"network    region {summary['region']}: {summary['cells']} cells, {summary['connections']} connections "
              f"({summary['release_sites']} release sites), estimated {summary['memory_estimate_GB']:g} GB of "
              f"{summary['memory_limit_GB']:g} GB allowed")
    for ref in plan.references:
        what = f"{ref['measure']} of {ref['cell']}" + (f" from {ref['source_cell']}" if ref["source_cell"] else "")
        unit = f" {ref['unit']}" if ref["unit"] else ""
        value = f"{ref['value']:g}{unit}" if ref["value"] is not None else f"{ref['low']:g} to {ref['high']:g}{unit}"
        extra = (f", sd {ref['sd']:g}" if ref["sd"] is not None else "") + (f", n {ref['n']}" if ref["n"] is not None else "")
        memo = " [from memory]" if ref["from_memory"] else ""
        differs = f"; differs: {ref['differences']}" if ref["differences"] else ""
        print(f"reference  {what}: {value}{extra}, agree {ref['rule_text']} ({ref['source']}){memo}{differs}")
    for note in plan.notes:
        print(note)
    return 0


def cmd_run(args) -> int:
    from .api import load

    start = time.perf_counter()

    def progress(msg: str) -> None:
        if not args.quiet:
            _err(f"[{time.perf_counter() - start:7.1f} s] {msg}")

    exp = load(args.file)
    result = exp.run(args.out, target=args.target, progress=progress, force=args.force, nwb=args.nwb)
    for name, table in result.tables.items():
        progress(f"table {name}: {len(table)} rows")
    print(f"results written to {result.out_dir}")
    comparison = result.tables.get("comparison")
    if comparison is None or comparison.empty:
        if args.require_agreement:
            _err("--require-agreement: the protocol has no reference blocks, so nothing was compared")
            return 2
        return 0
    failing = 0
    for _, row in comparison.iterrows():
        scan = "".join(f" {c[5:]}={row[c]}" for c in comparison.columns if c.startswith("scan_"))
        what = f"{row['measure']} of {row['cell']}" + (f" from {row['from_cell']}" if row["from_cell"] else "")
        print(f"reference  {what}{scan}: agreement {row['agreement']} ({row['reason']}; {row['source']})")
        failing += row["agreement"] != "yes"
    if failing:
        print(f"{failing} of {len(comparison)} comparisons do not agree")
        if args.require_agreement:
            return 2
    return 0


def cmd_predict(args) -> int:
    from .language.errors import error
    from .language.units import parse_quantity
    from .predict import Standard, predict

    start = time.perf_counter()

    def progress(msg: str) -> None:
        if not args.quiet:
            _err(f"[{time.perf_counter() - start:7.1f} s] {msg}")

    distance = parse_quantity(args.distance)
    if distance.dimension != "length" or distance.si <= 0:
        raise error(f"--distance needs a positive length, got {args.distance!r}", None,
                    expected="a length such as '150 um'", hint="e.g. --distance '150 um'")
    for flag, value in (("--pairs", args.pairs), ("--sweeps", args.sweeps), ("--probes", args.probes)):
        if value < 1:
            raise error(f"{flag} must be at least 1, got {value}", None, expected="a positive whole number")
    if args.bootstrap < 0:
        raise error(f"--bootstrap must be 0 or more, got {args.bootstrap}", None, expected="a whole number >= 0")
    standard = Standard(pairs=args.pairs, sweeps=args.sweeps, distance_um=distance.si * 1e6, seed=args.seed,
                        bootstrap=args.bootstrap, probes=args.probes)
    table = predict(args.circuit, args.out, standard=standard, replays=args.replays or [], target=args.target,
                    force=args.force, progress=progress)
    shown = ["pathway", "status", "probability", "amplitude_mV", "cv", "failure_rate", "ppr", "tm_U", "tm_D_ms",
             "tm_F_ms", "reference_backed", "references_agreeing"]
    with __import__("pandas").option_context("display.width", 200, "display.max_columns", 20):
        print(table[shown].to_string(index=False, float_format=lambda x: f"{x:.3g}"))
    print(f"prediction table written to {args.out}/predictions.csv")
    return 0


def cmd_batch(args) -> int:
    from .batch.runner import batch
    from .language.errors import error

    if args.jobs is not None and args.jobs < 1:
        raise error(f"-j must be at least 1, got {args.jobs}", None, expected="a number of worker processes")
    try:
        summary = batch(args.paths, args.results, jobs=args.jobs, scheduler=args.scheduler, fresh=args.fresh,
                        target=args.target, quiet=args.quiet)
    except KeyboardInterrupt:
        _err("interrupted: finished runs are kept and indexed; the same command resumes with the rest")
        return 130
    print(f"batch {summary.batch}: {summary.total} runs: {summary.ok} ok, {summary.cached} cached, "
          f"{summary.failed} failed, {summary.crashed} crashed, {summary.invalid} invalid "
          f"({summary.wall_s:.1f} s); results in {args.results}")
    for u in summary.units:
        if u.status in ("failed", "crashed", "invalid") and u.error:
            print(f"  {u.status}: {u.label}: {u.error.splitlines()[0]}")
    return 0 if summary.all_ok else 1


def build_parser() -> argparse.ArgumentParser:
    ap = argparse.ArgumentParser(prog="protolang", description="In-silico paired-recording protocols on Brian2.")
    sub = ap.add_subparsers(dest="command", required=True)
    p = sub.add_parser("check", help="parse and check protocols against their circuits (no simulation)")
    p.add_argument("files", nargs="+")
    p.add_argument("--resolve", action="store_true", help="also resolve cell selections (slower)")
    p.set_defaults(func=cmd_check)
    p = sub.add_parser("parse", help="show the parsed protocol (canonical text, or the AST with --dump)")
    p.add_argument("file")
    p.add_argument("--dump", action="store_true")
    p.set_defaults(func=cmd_parse)
    p = sub.add_parser("plan", help="show the resolved plan (summary, or JSON with --dump)")
    p.add_argument("file")
    p.add_argument("--dump", action="store_true")
    p.add_argument("--point", type=int, default=1, help="scan point to show (1-based)")
    p.set_defaults(func=cmd_plan)
    p = sub.add_parser("run", help="simulate a protocol and write its run folder")
    p.add_argument("file")
    p.add_argument("--out", required=True, help="run folder to create")
    p.add_argument("--target", default="auto", choices=["auto", "numpy", "cython", "standalone"],
                   help="Brian2 code-generation target (auto: cython when a compiler works; standalone: one compiled C++ binary per network structure, re-run per scan point)")
    p.add_argument("--force", action="store_true", help="replace an existing run folder")
    p.add_argument("--nwb", action="store_true", help="also write the virtual recordings as recordings.nwb "
                                                      "(Neurodata Without Borders, full precision)")
    p.add_argument("--quiet", action="store_true", help="no progress lines")
    p.add_argument("--require-agreement", action="store_true",
                   help="exit with status 2 when any reference does not agree (or has no model data); "
                        "the run folder is written either way")
    p.set_defaults(func=cmd_run)
    p = sub.add_parser("predict", help="run the standard paired protocol over every pathway of a circuit and "
                                       "write the predicted connection-type table")
    p.add_argument("circuit", help="circuit YAML file")
    p.add_argument("--out", required=True, help="output folder to create")
    p.add_argument("--pairs", type=int, default=30, help="repeats per pathway: one connected pair and --probes distance-only pairs each")
    p.add_argument("--sweeps", type=int, default=20, help="sweeps per pair (one every 10 s)")
    p.add_argument("--probes", type=int, default=4,
                   help="postsynaptic cells per repeat chosen by distance only, for the connection probability")
    p.add_argument("--distance", default="150 um", help="largest soma distance of a tested pair (default 150 um)")
    p.add_argument("--seed", type=int, default=1, help="seed of the standard protocol's selection and noise")
    p.add_argument("--bootstrap", type=int, default=0,
                   help="bootstrap resamples behind the fitted U, D, F intervals in each run folder (default 0)")
    p.add_argument("--replays", nargs="*", metavar="PATH",
                   help="replay protocols, folders of them, or their run folders: their references back rows")
    p.add_argument("--target", default="auto", choices=["auto", "numpy", "cython", "standalone"])
    p.add_argument("--force", action="store_true", help="replace an existing output folder")
    p.add_argument("--quiet", action="store_true", help="no progress lines")
    p.set_defaults(func=cmd_predict)
    p = sub.add_parser("batch", help="run every protocol (and scan point) under files and folders, cached and indexed")
    p.add_argument("paths", nargs="+", help="protocol files or folders (searched for *.protocol)")
    p.add_argument("--results", default="results", help="results folder (created or reused; default: results)")
    p.add_argument("-j", "--jobs", type=int, default=None, help="local worker processes (default: all cores)")
    p.add_argument("--scheduler", default=None, help="address of a Dask distributed scheduler to run on instead")
    p.add_argument("--fresh", action="store_true", help="ignore the cache: run everything again")
    p.add_argument("--target", default="auto", choices=["auto", "numpy", "cython", "standalone"])
    p.add_argument("--quiet", action="store_true", help="no progress output (for CI logs)")
    p.set_defaults(func=cmd_batch)
    from .batch.results import add_results_parser
    from .report.compare_runs import add_compare_parser
    from .report.importer import add_import_parser
    from .report.nwb import add_nwb_parser
    from .report.run_report import add_report_parser
    from .report.sheet import add_sheet_parser
    from .report.stimulus import add_stimulus_parser

    add_results_parser(sub)
    add_nwb_parser(sub)
    add_import_parser(sub)
    add_compare_parser(sub)
    add_report_parser(sub)
    add_sheet_parser(sub)
    add_stimulus_parser(sub)
    return ap


def main(argv: list[str] | None = None) -> int:
    from .language.errors import ProtocolError

    args = build_parser().parse_args(argv)
    try:
        return args.func(args)
    except ProtocolError as exc:
        _err(str(exc))
        return 1
    except KeyboardInterrupt:
        _err("interrupted; nothing was written")
        return 130
    except Exception as exc:  # a bug of ours, not the user's: say so plainly
        if os.environ.get("PROTOLANG_DEBUG"):
            raise
        _err(f"protolang internal error (please report; set PROTOLANG_DEBUG=1 for a traceback): "
             f"{type(exc).__name__}: {exc}")
        return 3


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
