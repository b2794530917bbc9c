"""Results folder queries: a results folder in; combined tables (``RESULTS/tables/<name>.parquet``), run lists and exports out.

``combine_tables`` stacks one table over every successful run of the folder, each row led by
the run it came from (``run_key, protocol, title, point``) and the run's scan values
(``param_<name>``, as text). ``protolang results`` lists the index, filters it and exports the
run list or a combined table as CSV, Parquet or JSON.
"""

from __future__ import annotations

import argparse
import json
import math
import os
from pathlib import Path
from typing import TYPE_CHECKING

from ..language.errors import error, suggest
from ..report.write import atomic_write
from .index import STATUSES, ResultIndex

if TYPE_CHECKING:
    import pandas as pd

TABLES_DIR = "tables"
MANIFEST = "combined.json"       # in RESULTS/tables: which ok runs the combined tables were built from
LEAD_COLUMNS = ("run_key", "protocol", "title", "point")
EXPORT_FORMATS = (".csv", ".parquet", ".json")
ERROR_WIDTH = 80


def _params(text) -> dict:
    if text is None or (isinstance(text, float) and math.isnan(text)) or text == "":
        return {}
    return json.loads(text)


def _run_folder(results: Path, row) -> Path:
    folder = row.folder if isinstance(row.folder, str) and row.folder else f"runs/{row.key}"
    return results / folder


def _read_parquet(path: Path) -> "pd.DataFrame":
    import pandas as pd

    try:
        return pd.read_parquet(path, engine="pyarrow")
    except (OSError, ValueError) as exc:   # pyarrow's ArrowInvalid is a ValueError
        raise error(f"table {str(path)!r} cannot be read ({type(exc).__name__}: {exc})", None,
                    expected="a Parquet table written by protolang",
                    hint="the run folder may be damaged; remove it and run the batch again") from None


def _is_missing(value) -> bool:
    import pandas as pd

    return value is None or (pd.api.types.is_scalar(value) and bool(pd.isna(value)))


def _arrow_safe(df: "pd.DataFrame") -> "pd.DataFrame":
    """Turn object columns that Parquet cannot store (values of clashing types) into text."""
    import pyarrow as pa

    for col in df.columns:
        if df[col].dtype != object:
            continue
        try:
            pa.array(df[col], from_pandas=True)
        except (pa.ArrowInvalid, pa.ArrowTypeError, pa.ArrowNotImplementedError):
            df[col] = df[col].map(lambda v: None if _is_missing(v) else str(v)).astype("str")
    return df


def _stack(parts: list["pd.DataFrame"]) -> "pd.DataFrame":
    """Concatenate, keeping the dtypes of the non-empty parts and the columns of all of them."""
    import pandas as pd

    columns: list[str] = []
    for df in parts:
        columns.extend(c for c in df.columns if c not in columns)
    filled = [df for df in parts if len(df)]
    # Empty parts would only drag the dtypes of filled columns towards object or float.
    out = pd.concat(filled or parts, ignore_index=True)
    for col in columns:
        if col not in out.columns:
            out[col] = None
    return out[columns]


def _with_lead(df: "pd.DataFrame", row, params: dict, param_names: list[str]) -> "pd.DataFrame":
    import pandas as pd

    df = df.reset_index(drop=True)
    # A run folder of a whole scan numbers its points in its own 'point' column; keep those.
    point = df.pop("point") if "point" in df.columns else int(row.point) if not _is_missing(row.point) else 1
    lead_names = set(LEAD_COLUMNS) | {f"param_{n}" for n in param_names}
    df = df.rename(columns={c: f"table_{c}" for c in df.columns if c in lead_names})
    lead = {"run_key": row.key, "protocol": row.protocol, "title": row.title, "point": point}
    for name in param_names:
        lead[f"param_{name}"] = pd.Series([params.get(name)] * len(df), dtype="str") if name in params \
            else pd.Series([None] * len(df), dtype="str")
    return pd.concat([pd.DataFrame(lead, index=df.index), df], axis=1)


def _read_manifest(results: Path) -> dict | None:
    try:
        return json.loads((results / TABLES_DIR / MANIFEST).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None


def combine_tables(results_dir: str | os.PathLike) -> dict[str, Path]:
    """Stack every table over the folder's successful runs into ``RESULTS/tables/<name>.parquet``.

    Each run's ``<folder>/tables/<name>.parquet`` is read (``runs/<key>`` unless the index names
    another folder), led by ``run_key, protocol, title, point`` and one text column
    ``param_<name>`` per scan parameter of any run (empty where a run lacks it). A table missing
    from some runs is stacked from the others; columns whose types differ between runs are
    upcast by pandas, or stored as text when Parquet cannot hold the mix. Tables that no
    successful run has any more are removed, and ``tables/combined.json`` records the runs used.

    Args:
        results_dir: a results folder written by ``protolang batch``.

    Returns:
        ``{table name: path of the combined Parquet file}``.

    Raises:
        ProtocolError: not a results folder, or a run's table cannot be read.
    """
    results = Path(results_dir)
    with ResultIndex(results, create=False) as index:
        runs = index.runs(status="ok")
    param_names: list[str] = []
    rows = []
    for row in runs.itertuples(index=False):
        params = _params(row.params)
        param_names.extend(n for n in params if n not in param_names)
        rows.append((row, params))
    found: dict[str, list] = {}
    missing: list[str] = []
    for row, params in rows:
        folder = _run_folder(results, row)
        if not folder.is_dir():
            missing.append(row.key)
            continue
        for path in sorted((folder / TABLES_DIR).glob("*.parquet")):
            found.setdefault(path.stem, []).append((row, params, path))
    out_dir = results / TABLES_DIR
    out_dir.mkdir(exist_ok=True)
    written: dict[str, Path] = {}
    for name in sorted(found):
        parts = [_with_lead(_read_parquet(path), row, params, param_names) for row, params, path in found[name]]
        table = _arrow_safe(_stack(parts))
        written[name] = atomic_write(out_dir / f"{name}.parquet",
                                     lambda tmp, t=table: t.to_parquet(tmp, index=False, engine="pyarrow"))
    previous = _read_manifest(results) or {}
    for name in previous.get("tables", []):
        stale = out_dir / f"{name}.parquet"
        if name not in written and stale.is_file():
            stale.unlink()
    manifest = {"runs": sorted(str(k) for k in runs["key"]), "tables": sorted(written), "missing_folders": missing}
    atomic_write(out_dir / MANIFEST, lambda tmp: Path(tmp).write_text(json.dumps(manifest, indent=1) + "\n",
                                                                       encoding="utf-8"))
    return written


def _combined_table(results: Path, name: str, ok_keys: list[str]) -> "pd.DataFrame":
    """The combined table ``name``, rebuilt when the successful runs changed since it was built."""
    manifest = _read_manifest(results)
    path = results / TABLES_DIR / f"{name}.parquet"
    fresh = manifest is not None and manifest.get("runs") == sorted(ok_keys)
    if not fresh or (name in manifest.get("tables", []) and not path.is_file()):
        combine_tables(results)
        manifest = _read_manifest(results) or {}
    present = manifest.get("tables", [])
    if name not in present:
        raise error(f"results folder {str(results)!r} has no combined table {name!r}", None,
                    expected="one of " + (", ".join(present) if present else "(none: no successful run wrote a table)"),
                    hint=suggest(name, present) or "run 'protolang results RESULTS' to see the runs and their status")
    return _read_parquet(path)


# -- export -----------------------------------------------------------------------------

def _export_path(text: str) -> tuple[Path, str]:
    path = Path(text)
    fmt = path.suffix.lower()
    if fmt not in EXPORT_FORMATS:
        raise error(f"cannot export to {text!r}: unknown file type {path.suffix or '(no suffix)'!r}", None,
                    expected="a file name ending in " + ", ".join(EXPORT_FORMATS),
                    hint=f"for example --export {path.with_suffix('.csv').name}")
    if not path.parent.is_dir():
        raise error(f"cannot export to {text!r}: folder {str(path.parent)!r} does not exist", None,
                    expected="a file in an existing folder", hint="create the folder first")
    return path, fmt


def _plain(value):
    """A JSON value for one cell: numpy scalars unwrapped, missing values as null."""
    if _is_missing(value):
        return None
    if hasattr(value, "item") and not isinstance(value, (str, bytes)):
        return value.item()
    return value


def export_frame(df: "pd.DataFrame", path: Path, fmt: str) -> Path:
    """Write ``df`` to ``path`` atomically as CSV, Parquet or JSON (a list of row objects).

    Args:
        df: the table.
        path: destination; its folder must exist.
        fmt: ``.csv``, ``.parquet`` or ``.json``.

    Returns:
        ``path``.
    """
    if fmt == ".csv":
        return atomic_write(path, lambda tmp: df.to_csv(tmp, index=False))
    if fmt == ".parquet":
        return atomic_write(path, lambda tmp: df.to_parquet(tmp, index=False, engine="pyarrow"))
    if fmt == ".json":
        # json.dumps writes floats exactly (repr), unlike DataFrame.to_json's fixed precision.
        records = [{str(c): _plain(v) for c, v in zip(df.columns, values)}
                   for values in df.itertuples(index=False, name=None)]

        def write(tmp: str) -> None:
            with open(tmp, "w", encoding="utf-8") as fh:
                json.dump(records, fh, indent=1, allow_nan=False)
                fh.write("\n")
        return atomic_write(path, write)
    raise AssertionError(f"internal error: export format {fmt!r} is not one of {EXPORT_FORMATS}")


# -- listing ----------------------------------------------------------------------------

def _first_line(text, width: int = ERROR_WIDTH) -> str:
    if _is_missing(text) or not str(text).strip():
        return ""
    line = str(text).strip().splitlines()[0]
    return line if len(line) <= width else line[:width - 3] + "..."


def format_runs(runs: "pd.DataFrame") -> str:
    """The run list as an aligned text table (key shortened to 12 characters)."""
    header = ("key", "title", "point", "params", "status", "wall_s", "error")
    right = {"point", "wall_s"}
    lines = []
    for row in runs.itertuples(index=False):
        title = row.title if isinstance(row.title, str) and row.title else (
            Path(row.protocol).name if isinstance(row.protocol, str) and row.protocol else "-")
        params = ", ".join(f"{k}={v}" for k, v in _params(row.params).items()) or "-"
        wall = "-" if _is_missing(row.wall_s) else f"{row.wall_s:.1f}"
        point = "-" if _is_missing(row.point) else str(int(row.point))
        lines.append((str(row.key)[:12], title, point, params, str(row.status or "-"), wall, _first_line(row.error)))
    widths = [max(len(h), *(len(line[i]) for line in lines)) if lines else len(h) for i, h in enumerate(header)]

    def fmt(cells) -> str:
        text = "  ".join(c.rjust(w) if h in right else c.ljust(w) for h, c, w in zip(header, cells, widths))
        return text.rstrip()
    return "\n".join([fmt(header)] + [fmt(line) for line in lines])


def _summary(runs: "pd.DataFrame") -> str:
    counts = runs["status"].fillna("-").value_counts()
    parts = [f"{int(counts[s])} {s}" for s in (*STATUSES, "-") if s in counts.index]
    return f"{len(runs)} run{'s' if len(runs) != 1 else ''}: " + ", ".join(parts)


def cmd_results(args: argparse.Namespace) -> int:
    """``protolang results``: list, filter and export the runs (or a combined table) of a results folder.

    Args:
        args: parsed by the parser that :func:`add_results_parser` adds.

    Returns:
        0 on success.

    Raises:
        ProtocolError: not a results folder, an unknown export file type or table name,
            ``--table`` without ``--export``.
    """
    results = Path(args.results)
    target = _export_path(args.export) if args.export else None
    if args.table is not None and target is None:
        raise error(f"--table {args.table} needs --export FILE", None,
                    expected="--export with a .csv, .parquet or .json file",
                    hint=f"for example --table {args.table} --export {args.table}.csv")
    with ResultIndex(results, create=False) as index:
        runs = index.runs(status=args.status, protocol=args.protocol, batch=args.batch)
        filtered = args.status is not None or args.protocol is not None or args.batch is not None
        ok_keys = list(index.runs(status="ok")["key"]) if args.table is not None else []
    if args.table is not None:
        table = _combined_table(results, args.table, ok_keys)
        if filtered:
            table = table[table["run_key"].isin(set(runs["key"]))].reset_index(drop=True)
        export_frame(table, *target)
        print(f"table {args.table}: {len(table)} rows from {table['run_key'].nunique()} runs written to {target[0]}")
        manifest = _read_manifest(results) or {}
        if manifest.get("missing_folders"):
            print(f"warning: {len(manifest['missing_folders'])} successful runs have no run folder any more and "
                  f"are not in the table: " + ", ".join(k[:12] for k in manifest["missing_folders"]))
        return 0
    if target is not None:
        export_frame(runs, *target)
        print(f"{len(runs)} runs written to {target[0]}")
        return 0
    if runs.empty:
        print(f"no runs in {results}" + (" match the filters" if filtered else ""))
        return 0
    print(format_runs(runs))
    print(_summary(runs))
    return 0


def add_results_parser(subparsers) -> argparse.ArgumentParser:
    """Add the ``results`` subcommand (``set_defaults(func=cmd_results)``) to an argparse subparsers object.

    Returns:
        The new subparser.
    """
    p = subparsers.add_parser("results", help="list the runs of a results folder; export them or a combined table")
    p.add_argument("results", metavar="RESULTS", help="results folder written by 'protolang batch'")
    p.add_argument("--status", nargs="+", choices=STATUSES, metavar="S",
                   help="only runs with one of these statuses (" + ", ".join(STATUSES) + ")")
    p.add_argument("--protocol", metavar="TEXT", help="only runs whose protocol path or title contains TEXT "
                                                      "(case-insensitive)")
    p.add_argument("--batch", metavar="ID", help="only runs of this batch")
    p.add_argument("--table", metavar="NAME", help="export the combined table NAME over the successful runs "
                                                   "(with --export)")
    p.add_argument("--export", metavar="FILE", help="write the run list (or --table) to FILE: .csv, .parquet or .json")
    p.set_defaults(func=cmd_results)
    return p
