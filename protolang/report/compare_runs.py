"""Model run against recording set: two result folders in, the ``comparison`` table (CSV, Parquet) out.

The recording set (from ``protolang import``) plays the part a paper plays in a protocol's
``reference`` blocks: for every measure its tables hold, per cell or pair, its n, mean and SD
become a reference (:func:`protolang.measure.compare.recorded_references`), and the model run's
values are judged against it with the rule ``within K sd`` of the recordings. Columns are those
of the replay comparison (``reference_*`` = the recordings).
"""

from __future__ import annotations

import argparse
import json
import os
from pathlib import Path

from ..language.errors import error

CONDITION_SLACK = {"calcium": 0.05, "magnesium": 0.05, "temperature": 1.0}   # mM, mM, K (as in reference checks)


def read_folder_tables(folder: str | os.PathLike, what: str) -> tuple[dict, dict, dict]:
    """Tables, plan and provenance of a run folder or recording set.

    Returns:
        ``(tables, plan, provenance)``: ``{name: DataFrame}`` (Parquet when present, else CSV)
        and the two JSON documents as dicts.

    Raises:
        ProtocolError: the folder or its tables are missing, or its JSON is unreadable.
    """
    import pandas as pd

    folder = Path(folder)
    if not folder.is_dir():
        raise error(f"{what} folder {str(folder)!r} not found", None, expected=f"a {what} folder",
                    hint="run `protolang run FILE --out DIR` (model) or `protolang import` (recordings) first")
    docs = {}
    for name in ("plan.json", "provenance.json"):
        try:
            docs[name] = json.loads((folder / name).read_text(encoding="utf-8"))
        except FileNotFoundError:
            raise error(f"{what} folder {str(folder)!r} has no {name}", None,
                        expected=f"a folder written by protolang with {name}",
                        hint="give the folder that `protolang run` or `protolang import` wrote") from None
        except (OSError, ValueError) as exc:
            raise error(f"cannot read {folder / name}: {exc}", None, expected="a JSON file written by protolang") from None
    tables = {}
    tdir = folder / "tables"
    for path in sorted(tdir.glob("*.csv")) if tdir.is_dir() else []:
        parquet = path.with_suffix(".parquet")
        tables[path.stem] = pd.read_parquet(parquet) if parquet.exists() else pd.read_csv(path)
    if not tables:
        raise error(f"{what} folder {str(folder)!r} has no tables", None, expected="tables/*.csv",
                    hint="the run may have failed; run it again")
    return tables, docs["plan.json"], docs["provenance.json"]


def _bath(plan: dict) -> dict[str, float]:
    cond = plan.get("conditions") or {}
    out = {k: float(cond[k]) for k in ("calcium", "magnesium", "temperature") if isinstance(cond.get(k), (int, float))}
    recorded = cond.get("recorded") or {}
    for key, name, shift in (("calcium_mM", "calcium", 0.0), ("magnesium_mM", "magnesium", 0.0),
                             ("temperature_degC", "temperature", 273.15)):
        if isinstance(recorded.get(key), (int, float)):
            out[name] = float(recorded[key]) + shift
    return out


def _bath_text(bath: dict[str, float]) -> str:
    parts = []
    for name, value in bath.items():
        parts.append(f"{name} {value - 273.15:g} degC" if name == "temperature" else f"{name} {value:g} mM")
    return "; ".join(parts)


def compare_folders(model_dir: str | os.PathLike, recorded_dir: str | os.PathLike, *, within: float = 2.0,
                    out: str | os.PathLike | None = None) -> tuple["object", list[str]]:
    """The comparison table of a model run against a recording set.

    Args:
        model_dir: a run folder (unscanned, or one batch point).
        recorded_dir: a recording set written by ``protolang import``.
        within: K of the rule ``within K sd`` (SD of the recordings).
        out: folder to write ``comparison.csv`` and ``comparison.parquet`` into (created).

    Returns:
        ``(table, warnings)``.

    Raises:
        ProtocolError: unreadable folders, a scanned model run, a recording set that is not one.
    """
    from ..measure.compare import compare, recorded_references
    from .write import write_tables

    if not within > 0:
        raise error(f"--within must be positive, got {within:g}", None, expected="a number of SDs such as 2")
    model, model_plan, model_prov = read_folder_tables(model_dir, "model run")
    recorded, rec_plan, rec_prov = read_folder_tables(recorded_dir, "recording set")
    if rec_prov.get("kind") != "recordings":
        raise error(f"{str(recorded_dir)!r} is not a recording set (its provenance.json has no \"kind\": \"recordings\")",
                    None, expected="a folder written by `protolang import`",
                    hint="to compare two model runs, read their tables directly; this command compares model and data")
    if any(c.startswith("scan_") for t in model.values() for c in t.columns):
        raise error(f"model run {str(model_dir)!r} is a scan: its tables mix several points", None,
                    expected="an unscanned run or one point of a batch",
                    hint="run the point on its own (`protolang batch` writes one folder per point)")
    warnings = []
    if model_prov.get("protocol_sha256") != rec_prov.get("protocol_sha256"):
        warnings.append(f"the model run used protocol {model_prov.get('protocol_file')} and the recordings "
                        f"{rec_prov.get('protocol_file')}: the two protocols differ")
    mbath, rbath = _bath(model_plan), _bath(rec_plan)
    diffs = [f"{name} {_bath_text({name: rbath[name]}).split(' ', 1)[1]} (model {_bath_text({name: mbath[name]}).split(' ', 1)[1]})"
             for name in CONDITION_SLACK if name in mbath and name in rbath
             and abs(mbath[name] - rbath[name]) > CONDITION_SLACK[name]]
    if diffs:
        warnings.append("bath differs between model and recordings: " + "; ".join(diffs))
    sources = ", ".join(Path(s["file"]).name for s in rec_prov.get("sources", [])) or str(recorded_dir)
    label = "simulated data read back" if rec_prov.get("simulated") else "recordings"
    if rec_prov.get("simulated"):
        warnings.append(f"{str(recorded_dir)!r} holds simulated data (a protolang NWB export read back), "
                        f"not recordings from cells")
    refs = recorded_references(recorded, within=within, source=f"{label}: {sources}",
                               conditions=_bath_text(rbath), differences="; ".join(diffs))
    # a probability from pairs all chosen as connected ("receiving from") measures nothing
    chosen = [t.get("connections") for t in (model, recorded)]
    if all(c is not None and not c.empty and c["connected"].astype(bool).all() for c in chosen):
        refs = [r for r in refs if r["measure"] != "probability"]
    if not refs:
        raise error(f"recording set {str(recorded_dir)!r} has no measure to compare", None,
                    expected="tables with connection or cell measures", hint="check the protocol's measure lines")
    table = compare(refs, model)
    table = table.rename(columns={"reference_line": "recording_set"})
    table["recording_set"] = str(Path(recorded_dir))
    table.insert(0, "model_run", str(Path(model_dir)))
    if out is not None:
        out = Path(out)
        if (out / "provenance.json").exists() or (out / "plan.json").exists():
            raise error(f"--out {str(out)!r} is a run folder or recording set: its own comparison table would be "
                        f"replaced", None, expected="a folder of its own for the comparison",
                        hint="e.g. --out comparisons/model_vs_lab")
        out.mkdir(parents=True, exist_ok=True)
        write_tables(out, {"comparison": table})
    return table, warnings


def cmd_compare(args) -> int:
    import sys

    import pandas as pd

    table, warnings = compare_folders(args.model, args.recordings, within=args.within, out=args.out)
    for w in warnings:
        print(f"warning: {w}", file=sys.stderr)
    shown = ["measure", "cell", "from_cell", "unit", "model_n", "model_mean", "model_sd", "reference_n",
             "reference_mean", "reference_sd", "agreement"]
    with pd.option_context("display.width", 200, "display.max_columns", 20):
        print(table[shown].rename(columns={"reference_n": "rec_n", "reference_mean": "rec_mean",
                                           "reference_sd": "rec_sd"}).to_string(index=False,
                                                                                float_format=lambda x: f"{x:.4g}"))
    agree = int((table["agreement"] == "yes").sum())
    print(f"{agree} of {len(table)} measures agree within {args.within:g} SD of the recordings"
          + (f"; table written to {args.out}/tables/comparison.csv" if args.out else ""))
    if args.require_agreement and agree < len(table):
        return 2
    return 0


def add_compare_parser(subparsers) -> argparse.ArgumentParser:
    """Add ``protolang compare MODEL_RUN RECORDING_SET [--within K] [--out DIR] [--require-agreement]``."""
    p = subparsers.add_parser("compare", help="judge a model run against a recording set (from `protolang import`)")
    p.add_argument("model", metavar="MODEL_RUN", help="run folder of the model")
    p.add_argument("recordings", metavar="RECORDING_SET", help="folder written by `protolang import`")
    p.add_argument("--within", type=float, default=2.0, help="agreement when |model mean - recorded mean| <= K x "
                                                             "recorded SD (default K = 2)")
    p.add_argument("--out", default=None, help="folder to write tables/comparison.csv and .parquet into")
    p.add_argument("--require-agreement", action="store_true", help="exit with status 2 unless every measure agrees")
    p.set_defaults(func=cmd_compare)
    return p
