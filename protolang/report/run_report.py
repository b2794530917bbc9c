"""Run folder report: a run folder (plan, provenance, tables, figures) in; one self-contained ``report.html`` out.

The page opens from disk in any browser with no server and no network: styles are inline,
figures are embedded as ``data:`` URIs and the only script is a few inline lines that, once the
page has loaded, count the figures the browser decoded and the tables it shows and write the
counts into ``<p id="render-status">`` (attributes ``data-images``, ``data-images-loaded`` and
``data-tables``), so a reader or a headless browser can see that nothing is missing.

Sections, in order: contents, summary, protocol text (when the file the run read is still there,
unchanged), tables (``comparison`` first: the model-against-reference verdict), figures, the
resolved plan (a digest, then the whole ``plan.json`` in a collapsed block), provenance and the
list of files. Works for single runs, scanned runs (``points/NN/`` folders, no top-level
``plan.json``: the first point's plan is shown) and recording sets made from real recordings
(``"kind": "recordings"`` in ``provenance.json``, no engine section).
"""

from __future__ import annotations

import argparse
import csv
import hashlib
import json
import math
import os
import shlex
from pathlib import Path
from typing import TYPE_CHECKING

from ..language.errors import ProtocolError, error
from . import html as H
from .write import _TMP_PREFIX, atomic_write

if TYPE_CHECKING:
    import pandas as pd

REPORT_NAME = "report.html"
MAX_TABLE_ROWS = 200            # rows shown per table; the CSV holds them all
MAX_PLAN_CHARS = 200_000        # characters of plan.json shown in the collapsed block
MAX_FILES = 1000                # entries of the file list
FIRST_TABLE = "comparison"      # the model-against-reference verdict leads the tables
# columns of the comparison table repeated at a glance above it
VERDICT_COLUMNS = ("measure", "cell", "from_cell", "unit", "model_mean", "reference_mean", "rule", "agreement",
                   "reason")
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
RUN_HINT = "run `protolang run FILE --out DIR` first and give DIR"

# Counts decoded figures and shown tables after load (see the module docstring).
RENDER_CHECK = """\
window.addEventListener("load", function () {
  var images = document.images, loaded = 0;
  for (var i = 0; i < images.length; i++) {
    if (images[i].complete && images[i].naturalWidth > 0) { loaded++; }
  }
  var tables = document.querySelectorAll("table.data").length;
  var status = document.getElementById("render-status");
  status.setAttribute("data-images", String(images.length));
  status.setAttribute("data-images-loaded", String(loaded));
  status.setAttribute("data-tables", String(tables));
  status.textContent = "Page check: " + loaded + " of " + images.length + " figures shown, " +
    tables + " tables shown.";
  if (loaded < images.length) { status.className = "caution"; }
});"""

# file-name ending -> what such a figure shows (captions are made from file names)
_FIGURE_KINDS = (
    ("_sweeps", "an example pair's sweeps (grey) and their average (black), presynaptic events "
                "marked; mean response over the connected pairs"),
    ("_summary", "amplitude of each response relative to the first (mean +- SD over connections); "
                 "CV against mean first amplitude"),
    ("_probability", "connection probability against intersomatic distance"),
)
_FIGURE_NAMES = {
    "network_raster": "network spike raster (first repeat, first analysed sweep)",
    "network_rate": "population firing rate per class (first repeat, first analysed sweep)",
}


# -- reading the folder ---------------------------------------------------------------------------
def _folder_error(run_dir: Path, problem: str) -> ProtocolError:
    return error(f"run folder {str(run_dir)!r} {problem}", None,
                 expected="a run folder written by `protolang run` (plan.json, provenance.json, tables/)",
                 hint=RUN_HINT)


def _read_json(path: Path, what: str) -> dict:
    """One JSON object from ``path``; a clear error when it is missing, unreadable or not an object."""
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise error(f"{str(path)!r} not found", None, expected=f"{what} in the run folder",
                    hint=RUN_HINT) from None
    except (OSError, UnicodeDecodeError) as exc:
        raise error(f"{str(path)!r} cannot be read ({type(exc).__name__}: {exc})", None,
                    expected=f"{what} (UTF-8 JSON text)",
                    hint="the run folder may be damaged; run the protocol again") from None
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        raise error(f"{str(path)!r} is not valid JSON (line {exc.lineno}, column {exc.colno}: {exc.msg})",
                    None, expected=f"{what} (a JSON object)",
                    hint="the run folder may be damaged; run the protocol again") from None
    if not isinstance(data, dict):
        raise error(f"{str(path)!r} holds a JSON {type(data).__name__}, not an object", None,
                    expected=f"{what} (a JSON object)",
                    hint="give the folder that `protolang run` wrote") from None
    return data


def _point_folders(run_dir: Path) -> list[Path]:
    points = run_dir / "points"
    if not points.is_dir():
        return []
    return sorted(p for p in points.iterdir() if p.is_dir() and (p / "plan.json").is_file())


def _load_plan(run_dir: Path) -> tuple[dict, str, str | None]:
    """The plan, the file it came from (relative) and a note when it is not the folder's own."""
    own = run_dir / "plan.json"
    if own.exists():
        return _read_json(own, "the resolved plan (plan.json)"), "plan.json", None
    points = _point_folders(run_dir)
    if points:
        rel = f"points/{points[0].name}/plan.json"
        plan = _read_json(points[0] / "plan.json", "the resolved plan of the first scan point")
        note = (f"This is a scanned run: the plan shown is that of point {points[0].name} ({rel}); "
                f"each point's plan is in points/NN/plan.json.")
        return plan, rel, note
    raise error(f"{str(own)!r} not found", None,
                expected="the resolved plan (plan.json) in the run folder, or points/NN/plan.json for a scan",
                hint=RUN_HINT)


def _count_csv_rows(path: Path) -> int:
    """Data rows of a CSV file (quoted line breaks counted once)."""
    with open(path, newline="", encoding="utf-8") as fh:
        return max(sum(1 for _ in csv.reader(fh)) - 1, 0)


def _read_table(path: Path) -> tuple["pd.DataFrame", int]:
    """The first MAX_TABLE_ROWS rows of a CSV table and its total number of rows."""
    import pandas as pd

    try:
        head = pd.read_csv(path, nrows=MAX_TABLE_ROWS)
        total = _count_csv_rows(path) if len(head) >= MAX_TABLE_ROWS else len(head)
    except pd.errors.EmptyDataError:   # a table with no columns is written as an empty line
        return pd.DataFrame(), 0
    except (pd.errors.ParserError, UnicodeDecodeError, OSError, csv.Error) as exc:
        raise error(f"table {str(path)!r} cannot be read ({type(exc).__name__}: {exc})", None,
                    expected="a CSV table written by protolang (UTF-8, header row of column names)",
                    hint="the run folder may be damaged; run the protocol again") from None
    return head, total


def _table_order(names: list[str]) -> list[str]:
    names = sorted(names)
    return ([FIRST_TABLE] if FIRST_TABLE in names else []) + [n for n in names if n != FIRST_TABLE]


def _is_png(path: Path) -> bool:
    try:
        with open(path, "rb") as fh:
            return fh.read(len(PNG_SIGNATURE)) == PNG_SIGNATURE
    except OSError:
        return False


def figure_caption(name: str) -> str:
    """A figure's caption made from its file name (``a_to_b_sweeps.png`` -> ``a -> b: an example pair's ...``)."""
    stem = Path(name).stem
    if stem in _FIGURE_NAMES:
        return _FIGURE_NAMES[stem]
    if stem.startswith("scan_"):
        from .scan import SCAN_MEASURES

        labels = {column: label for _, column, label in SCAN_MEASURES}
        column = stem[len("scan_"):]
        return f"{labels.get(column, _words(column))} against the scanned value (mean +- SD)"
    if stem.startswith("comparison_"):
        return f"model against the published reference: {_words(stem[len('comparison_'):])}"
    for ending, text in _FIGURE_KINDS:
        if stem.endswith(ending) and len(stem) > len(ending):
            subject = stem[:-len(ending)]
            if subject.startswith("patch_"):
                subject = "multi-cell patch " + subject[len("patch_"):]
            return f"{subject.replace('_to_', ' -> ')}: {text}"   # class names keep their underscores
    return _words(stem)


def _words(stem: str) -> str:
    return stem.replace("_to_", " -> ").replace("_from_", " from ").replace("_", " ").strip() or stem


# -- formatting helpers ---------------------------------------------------------------------------
def _num(value, digits: int = 4) -> str:
    text, _ = H.format_value(value, digits)
    return text


def _scaled(value, factor: float, unit: str, digits: int = 4) -> str:
    if isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value):
        return f"{value * factor:.{digits}g} {unit}"
    return "not recorded"


def _is_scalar(value) -> bool:
    return value is None or isinstance(value, (str, int, float, bool))


def _is_flat(value) -> bool:
    """A scalar, or a list or dict of scalars: shown as one line of text."""
    if isinstance(value, list):
        return all(_is_scalar(v) for v in value)
    if isinstance(value, dict):
        return all(_is_scalar(v) for v in value.values())
    return _is_scalar(value)


def _plain_text(value) -> str:
    """A JSON value as one line of text (lists of scalars joined, other values as JSON)."""
    if value is None or (isinstance(value, (list, dict)) and not value):
        return "none"
    if isinstance(value, float):
        return _num(value, 6)
    if _is_scalar(value):
        return _num(value)
    if isinstance(value, list) and all(_is_scalar(v) for v in value):
        return ", ".join(_plain_text(v) for v in value)
    return json.dumps(value, sort_keys=False)


def _clip(text: str, limit: int) -> tuple[str, bool]:
    return (text, False) if len(text) <= limit else (text[:limit], True)


def _size(n: int) -> str:
    if n < 1024:
        return f"{n} bytes"
    value, unit = n / 1024, "kB"
    for bigger in ("MB", "GB"):
        if value < 1024:
            break
        value, unit = value / 1024, bigger
    return f"{value:.1f} {unit}"


# -- sections -------------------------------------------------------------------------------------
def _is_recording_set(prov: dict) -> bool:
    return prov.get("kind") == "recordings"


def _bath(cond: dict) -> str:
    if not cond:
        return "not recorded"
    parts = []
    for key, unit in (("calcium", "mM"), ("magnesium", "mM")):
        if key in cond:
            parts.append(f"{key} {_num(cond[key])} {unit}")
    if isinstance(cond.get("temperature"), (int, float)):
        parts.append(f"temperature {cond['temperature'] - 273.15:.4g} degC")
    blocks = cond.get("blocks") or {}
    if isinstance(blocks, dict) and blocks:
        parts.append("blocks: " + ", ".join(f"{r} {_num(100 * f if isinstance(f, (int, float)) else f)} %"
                                             for r, f in blocks.items()))
    else:
        parts.append("no receptor blocked")
    return "; ".join(parts)


def _cells(plan: dict) -> str:
    roles = plan.get("roles") or []
    parts = []
    for r in roles:
        if not isinstance(r, dict):
            continue
        n = len(r.get("cell_ids") or [])
        extra = [f"{n} cells"] if n else []
        if r.get("model"):
            extra.append(str(r["model"]))
        parts.append(f"{r.get('name', '?')}: {r.get('cell_class', '?')}" + (f" ({', '.join(extra)})" if extra else ""))
    network = plan.get("network")
    if isinstance(network, dict) and network.get("cells") is not None:
        parts.append(f"embedded network of {network['cells']} cells"
                     + (f" in region {network['region']}" if network.get("region") else ""))
    return "; ".join(parts) or "not recorded"


def _summary(plan: dict, prov: dict, plan_note: str | None) -> str:
    pairs: list[tuple[str, object]] = []
    if _is_recording_set(prov):
        files = [str(x.get("file")) if isinstance(x, dict) else str(x) for x in prov.get("sources") or []]
        what = ("SIMULATED data read back from a protolang NWB export (not recorded from cells)"
                if prov.get("simulated") else "real recordings, imported (not simulated)")
        pairs.append(("source", what + (": " + ", ".join(files) if files else "")))
    pairs.append(("protocol file", prov.get("protocol_file") or plan.get("protocol_file") or "not recorded"))
    circuit = prov.get("circuit_file") or plan.get("circuit_file")
    seed = prov.get("seed", plan.get("seed"))
    pairs.append(("circuit and seed", f"{circuit or 'none recorded'}, seed "
                                      f"{'not recorded' if seed is None else _plain_text(seed)}"))
    pairs.append(("cells and classes", _cells(plan)))
    repeats = plan.get("n_repeat")
    pairs.append(("repeats", "not recorded" if repeats is None else _plain_text(repeats)))
    sweeps = plan.get("n_sweeps")
    text = f"{_plain_text(sweeps)} sweeps" if sweeps is not None else "not recorded"
    if isinstance(plan.get("sweep_length"), (int, float)):
        text += f" of {plan['sweep_length'] * 1e3:.4g} ms"
    if isinstance(plan.get("interval"), (int, float)):
        text += f", every {plan['interval']:.4g} s"
    if plan.get("layout"):
        text += f" (layout {plan['layout']})"
    pairs.append(("sweeps and interval", text))
    points = prov.get("scan_points")
    pairs.append(("bath (first scan point)" if plan_note else "bath", _bath(plan.get("conditions") or {})))
    if isinstance(points, list) and points:
        shown = "; ".join(", ".join(f"@{k} = {v}" for k, v in p.items()) for p in points[:8] if isinstance(p, dict))
        more = f"; and {len(points) - 8} more" if len(points) > 8 else ""
        pairs.append(("scan", f"{len(points)} points: {shown}{more}"))
    elif isinstance(prov.get("scan"), dict) and prov["scan"]:
        where = f"point {prov['scan_point']}: " if prov.get("scan_point") is not None else ""
        pairs.append(("scan", where + ", ".join(f"@{k} = {v}" for k, v in prov["scan"].items())))
    engine = prov.get("engine")
    if isinstance(engine, dict) and engine:
        pairs.append(("engine target", engine.get("target") or "not recorded"))
    elif _is_recording_set(prov) and prov.get("simulated"):
        pairs.append(("engine target", "none here: the data were simulated by an earlier run and read back"))
    elif _is_recording_set(prov):
        pairs.append(("engine target", "none: recordings are not simulated"))
    else:
        pairs.append(("engine target", "not recorded"))
    wall = prov.get("wall_time_s")
    imported = (prov.get("timings") or {}).get("import_s") if isinstance(prov.get("timings"), dict) else None
    if not isinstance(wall, (int, float)) and isinstance(imported, (int, float)):
        pairs.append(("import time", f"{imported:.3g} s"))
    else:
        pairs.append(("wall time", f"{wall:.3g} s" if isinstance(wall, (int, float)) else "not recorded"))
    if prov.get("started"):
        pairs.append(("started", prov["started"]))
    body = H.definitions(pairs)
    if plan_note:
        body += H.paragraph(plan_note, cls="note")
    return body


def _protocol_text(prov: dict, run_dir: Path) -> str:
    from .write import locate_protocol

    name = prov.get("protocol_file")
    digest = prov.get("protocol_sha256")
    if not name:
        return H.paragraph("Not available: the provenance names no protocol file.", cls="note")
    path = locate_protocol(prov, run_dir) or Path(name)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        return H.paragraph(f"Not available: {name} no longer exists.", cls="note")
    except (OSError, UnicodeDecodeError) as exc:
        return H.paragraph(f"Not available: {name} cannot be read ({type(exc).__name__}).", cls="note")
    # the run hashed the text as read (universal newlines), encoded as UTF-8
    found = hashlib.sha256(text.encode("utf-8")).hexdigest()
    if not digest:
        return H.paragraph(f"Not available: the provenance records no hash, so {name} cannot be "
                           f"confirmed to be the text that ran.", cls="note")
    if found != digest:
        return H.paragraph(f"Not available: {name} has changed since the run (its sha256 is {found}, "
                           f"the run read {digest}).", cls="note")
    return H.paragraph(f"{name} (sha256 {digest}, unchanged since the run):", cls="note") + H.preformatted(text)


def _tables(run_dir: Path) -> tuple[list[tuple[str, str]], str]:
    table_dir = run_dir / "tables"
    names = _table_order([p.stem for p in table_dir.glob("*.csv") if p.is_file()]) if table_dir.is_dir() else []
    if not names:
        return [], H.paragraph("This folder holds no tables (no tables/*.csv).", cls="note")
    links, parts = [], []
    for name in names:
        rel = f"tables/{name}.csv"
        df, total = _read_table(run_dir / rel)
        ident = "table-" + H.anchor_id(name)
        links.append((ident, name))
        intro = f"{total} rows, {len(df.columns)} columns; file {rel}"
        if (table_dir / f"{name}.parquet").is_file():
            intro += f" (also tables/{name}.parquet)"
        if name == FIRST_TABLE:
            intro = "The model against each published reference: the verdict of this run. " + intro
        if total > len(df):
            intro += f". Showing the first {len(df)} rows"
        body = H.paragraph(intro + ".", cls="note")
        if name == FIRST_TABLE:
            body += _verdict(df, total)
        if len(df.columns):
            body += '<div class="wide">' + H.table(df, max_rows=None, total_rows=total, source=rel) + "</div>\n"
        else:
            body += H.paragraph("The table has no columns.", cls="note")
        parts.append(f'<section id="{H.escape(ident)}">\n<h3>{H.escape(name)}</h3>\n{body}</section>\n')
    return links, "".join(parts)


def _verdict(df: "pd.DataFrame", total: int) -> str:
    """The comparison at a glance: how many references agree, and the columns that say why."""
    if "agreement" not in df.columns or df.empty:
        return ""
    counts = df["agreement"].astype(str).value_counts()
    shown = f"the first {len(df)} of {total}" if total > len(df) else str(len(df))
    text = f"Agreement with the published references ({shown}): " + ", ".join(
        f"{v} {k}" for k, v in counts.items()) + "."
    keep = [c for c in VERDICT_COLUMNS if c in df.columns]
    return H.paragraph(text) + '<div class="wide">' + H.table(df[keep], max_rows=None, cls="verdict") + "</div>\n"


def _figures(run_dir: Path) -> tuple[list[tuple[str, str]], str]:
    fig_dir = run_dir / "figures"
    files = sorted(p for p in fig_dir.iterdir() if p.is_file() and p.suffix.lower() == ".png"
                   and not p.name.startswith(_TMP_PREFIX)) if fig_dir.is_dir() else []
    if not files:
        return [], H.paragraph("This folder holds no figures (no figures/*.png).", cls="note")
    links, parts = [], []
    for path in files:
        ident = "figure-" + H.anchor_id(path.stem)
        caption = f"{figure_caption(path.name)} (figures/{path.name})"
        links.append((ident, path.stem))
        if _is_png(path):
            body = H.figure(path, caption)
        else:
            body = H.paragraph(f"figures/{path.name} is not a PNG image and is not shown.", cls="caution")
        parts.append(f'<div id="{H.escape(ident)}">\n{body}</div>\n')
    return links, "".join(parts)


def _frame(rows: list[dict], columns: list[str]) -> "pd.DataFrame":
    import pandas as pd

    return pd.DataFrame(rows, columns=columns)


def _reference_line(ref: dict) -> str:
    """One published reference of the plan as a line: measure, cell, value or range, source."""
    unit = f" {ref['unit']}" if ref.get("unit") else ""
    if ref.get("value") is not None:
        value = _plain_text(ref["value"]) + unit + (f" (sd {_plain_text(ref['sd'])})" if ref.get("sd") is not None
                                                    else "")
    else:
        value = f"{_plain_text(ref.get('low'))} to {_plain_text(ref.get('high'))}{unit}"
    cell = f"{ref.get('cell')}" + (f" from {ref['source_cell']}" if ref.get("source_cell") else "")
    source = f"; {ref['source']}" if ref.get("source") else ""
    memo = " [from memory]" if ref.get("from_memory") else ""
    return f"{ref.get('measure')} of {cell}: {value}{source}{memo}"


def _plan_digest(plan: dict, plan_file: str, run_dir: Path) -> str:
    pairs = [(k, _plain_text(plan[k])) for k in ("title", "protocol_file", "circuit_file", "circuit_hash",
                                                  "seed", "mode", "n_repeat", "n_sweeps") if k in plan]
    for key, label, factor, unit in (("dt", "dt", 1e6, "us"), ("sample_dt", "sample_dt", 1e3, "ms"),
                                     ("sweep_length", "sweep_length", 1e3, "ms"), ("interval", "interval", 1, "s")):
        if key in plan:
            pairs.append((label, _scaled(plan[key], factor, unit)))
    if plan.get("layout"):
        pairs.append(("layout", f"{plan['layout']}: {plan.get('layout_reason') or ''}".rstrip(": ")))
    cond = plan.get("conditions")
    if isinstance(cond, dict):
        pairs.append(("bath", _bath(cond)))
        if isinstance(cond.get("release_factor"), (int, float)):
            pairs.append(("release factor", _num(cond["release_factor"])))
    body = H.definitions(pairs)

    roles = [r for r in plan.get("roles") or [] if isinstance(r, dict)]
    if roles:
        rows = []
        for r in roles:
            ids = list(r.get("cell_ids") or [])
            hold = r.get("holding_potential")
            rows.append({"role": r.get("name"), "cell class": r.get("cell_class"), "model": r.get("model"),
                         "recording": r.get("mode") if r.get("recorded") else "not recorded",
                         "cells": len(ids),
                         "cell ids": ", ".join(str(i) for i in ids[:8]) + (" ..." if len(ids) > 8 else ""),
                         "holding_mV": hold * 1e3 if isinstance(hold, (int, float)) else None,
                         "noise_sd_mV": r["noise_sd"] * 1e3 if isinstance(r.get("noise_sd"), (int, float)) else None,
                         "events": len(r.get("events") or [])})
        body += "<h3>Cells</h3>\n" + H.table(_frame(rows, list(rows[0])), max_rows=None, cls="plan")
    synapses = [s for s in plan.get("synapses") or [] if isinstance(s, dict)]
    if synapses:
        rows = []
        for s in synapses:
            linked = [bool(c) for c in s.get("connected") or []]
            receptors = s.get("receptors") or {}
            rows.append({"synapse": s.get("name"), "pathway": s.get("pathway"), "pre": s.get("pre"),
                         "post": s.get("post"), "connected": f"{sum(linked)} of {len(linked)}",
                         "receptors": ", ".join(f"{k} {_num(v)}" for k, v in receptors.items())
                         if isinstance(receptors, dict) else _plain_text(receptors),
                         "stochastic": s.get("stochastic")})
        body += "<h3>Synapses</h3>\n" + H.table(_frame(rows, list(rows[0])), max_rows=None, cls="plan")
    measures = [m for m in plan.get("measures") or [] if isinstance(m, dict)]
    if measures:
        rows = [{"cell": m.get("cell"), "collector": m.get("collector"), "source": m.get("source"),
                 "options": _plain_text(m.get("options") or {}), "line": m.get("span")} for m in measures]
        body += "<h3>Measures</h3>\n" + H.table(_frame(rows, list(rows[0])), max_rows=None, cls="plan")
    lesions = [x for x in plan.get("lesions") or [] if isinstance(x, dict)]
    if lesions:
        body += "<h3>Lesions</h3>\n" + H.bullet_list(
            f"{x.get('text')} ({x.get('kind')}): cells {_plain_text(x.get('cells') or {})}, "
            f"connections {_plain_text(x.get('connections') or {})}" for x in lesions)
    network = plan.get("network")
    if isinstance(network, dict) and network:
        body += "<h3>Embedded network</h3>\n" + H.definitions(
            (k, _plain_text(v)) for k, v in network.items() if _is_scalar(v) or isinstance(v, list))
    patches = [p for p in plan.get("patches") or [] if isinstance(p, dict)]
    if patches:
        body += "<h3>Multi-cell patches</h3>\n" + H.bullet_list(
            f"{p.get('name')}: {p.get('cell_class')}, {len(p.get('members') or [])} cells" for p in patches)
    refs = [r for r in plan.get("references") or [] if isinstance(r, dict)]
    if refs:
        body += "<h3>Published references</h3>\n" + H.bullet_list(_reference_line(r) for r in refs)
    notes = [str(n) for n in plan.get("notes") or []]
    if notes:
        body += "<h3>Notes</h3>\n" + H.bullet_list(notes)

    try:
        whole = (run_dir / plan_file).read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError):
        whole = json.dumps(plan, indent=1)
    shown, clipped = _clip(whole, MAX_PLAN_CHARS)
    inner = H.preformatted(shown)
    if clipped:
        inner += H.paragraph(f"Only the first {MAX_PLAN_CHARS} of {len(whole)} characters are shown; "
                             f"the whole plan is in {plan_file}.", cls="note")
    body += H.details(f"The whole plan ({plan_file}, {_size(len(whole.encode('utf-8')))})", inner)
    return body


def _provenance(prov: dict) -> str:
    pairs, nested = [], []
    for key, value in prov.items():
        if key == "command" and isinstance(value, list):
            pairs.append((key, shlex.join(str(v) for v in value)))
        elif _is_scalar(value) or (isinstance(value, list) and all(_is_scalar(v) for v in value)):
            pairs.append((key, _plain_text(value)))
        else:
            nested.append((key, value))
    body = H.definitions(pairs)
    for key, value in nested:
        if isinstance(value, dict) and all(_is_flat(v) for v in value.values()):
            inner = H.definitions((k, _plain_text(v)) for k, v in value.items()) if value else \
                H.paragraph("none", cls="note")
        elif isinstance(value, list) and all(isinstance(v, dict) and all(_is_flat(x) for x in v.values())
                                             for v in value):
            columns = list(dict.fromkeys(k for v in value for k in v))
            rows = [{c: _plain_text(v[c]) if c in v else "" for c in columns} for v in value]
            inner = H.table(_frame(rows, columns), max_rows=None, cls="provenance")
        else:
            text, clipped = _clip(json.dumps(value, indent=1), 20_000)
            inner = H.preformatted(text) + (H.paragraph("Truncated; the whole value is in provenance.json.",
                                                        cls="note") if clipped else "")
        body += f"<h3>{H.escape(key)}</h3>\n{inner}"
    return body


def _files(run_dir: Path, skip: Path | None) -> str:
    rows = []
    for root, dirs, names in os.walk(run_dir):
        dirs[:] = sorted(d for d in dirs if not d.startswith("."))
        for name in sorted(names):
            path = Path(root) / name
            if name.startswith(_TMP_PREFIX) or (skip is not None and path == skip):
                continue
            try:
                size = path.stat().st_size
            except OSError:
                continue
            rows.append({"file": path.relative_to(run_dir).as_posix(), "size": _size(size)})
    if not rows:
        return H.paragraph("No files.", cls="note")
    rows.sort(key=lambda r: (r["file"].count("/"), r["file"]))
    body = H.paragraph(f"{len(rows)} files in {run_dir}.", cls="note")
    body += H.table(_frame(rows[:MAX_FILES], ["file", "size"]), max_rows=None, cls="files")
    if len(rows) > MAX_FILES:
        body += H.paragraph(f"{len(rows) - MAX_FILES} more files, the deepest in the folder, are not listed.",
                            cls="note")
    return body


# -- the page -------------------------------------------------------------------------------------
def render_report(run_dir: str | os.PathLike, out: str | os.PathLike | None = None) -> str:
    """The report page of a run folder as HTML text (what :func:`write_report` writes).

    Args:
        run_dir: the run folder.
        out: where the page will be written (left out of the file list).

    Returns:
        The whole HTML document.

    Raises:
        ProtocolError: not a folder; plan.json or provenance.json missing or not a JSON object;
            a table that cannot be read.
    """
    run_dir = Path(run_dir)
    if not run_dir.exists():
        raise _folder_error(run_dir, "not found")
    if not run_dir.is_dir():
        raise _folder_error(run_dir, "is not a folder")
    prov = _read_json(run_dir / "provenance.json", "the run's provenance (provenance.json)")
    plan, plan_file, plan_note = _load_plan(run_dir)
    title = str(plan.get("title") or prov.get("title") or run_dir.resolve().name)
    table_links, tables = _tables(run_dir)
    figure_links, figures = _figures(run_dir)
    skip = Path(out).resolve() if out is not None else None

    sections = [
        ("summary", "Summary", _summary(plan, prov, plan_note), []),
        ("protocol", "Protocol", _protocol_text(prov, run_dir), []),
        ("tables", "Tables", tables, table_links),
        ("figures", "Figures", figures, figure_links),
        ("plan", "Resolved plan", _plan_digest(plan, plan_file, run_dir), []),
        ("provenance", "Provenance", _provenance(prov), []),
        ("files", "Files", _files(run_dir.resolve(), skip), []),
    ]
    kind = "a run folder"
    if _is_recording_set(prov):
        kind = "a recording set (simulated data read back)" if prov.get("simulated") else "a recording set (real recordings)"
    head = H.paragraph(f"Report of {kind}: {run_dir.resolve()}", cls="note")
    nav = "<nav>\n<h2>Contents</h2>\n" + H.link_list(
        [(ident, name, children) for ident, name, _, children in sections]) + "</nav>\n"
    body = head + nav + "".join(H.section(name, inner, anchor=ident) for ident, name, inner, _ in sections)
    body += ('<p id="render-status" class="note">Page check: this line is filled in by the page\'s inline '
             'script once the page has loaded.</p>\n')
    return H.page(title, body, script=RENDER_CHECK)


def write_report(run_dir: str | os.PathLike, out: str | os.PathLike | None = None) -> Path:
    """Read a run folder and write its self-contained HTML report, atomically.

    Args:
        run_dir: the run folder (single run, scan or recording set).
        out: the page to write; default ``RUN_DIR/report.html``. An existing folder gets
            ``report.html`` inside it; a missing parent folder is created.

    Returns:
        The path written.

    Raises:
        ProtocolError: bad input (see :func:`render_report`) or an ``out`` that cannot be written;
            nothing is written then.
    """
    run_dir = Path(run_dir)
    target = run_dir / REPORT_NAME if out is None else Path(out)
    if target.is_dir():
        target = target / REPORT_NAME
    text = render_report(run_dir, target)      # everything is read before anything is written
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        return atomic_write(target, lambda tmp: Path(tmp).write_text(text, encoding="utf-8"))
    except OSError as exc:
        raise error(f"report {str(target)!r} cannot be written ({type(exc).__name__}: {exc.strerror or exc})",
                    None, expected="a writable file path ending in .html",
                    hint="choose another --out or check the folder's permissions") from None


def cmd_report(args: argparse.Namespace) -> int:
    """``protolang report``: write a run folder's report and say where it is.

    Args:
        args: parsed by the parser that :func:`add_report_parser` adds.

    Returns:
        0 on success.

    Raises:
        ProtocolError: see :func:`write_report`.
    """
    path = write_report(args.run_dir, args.out)
    print(f"report written to {path}")
    print(f"open it in a browser: {path.resolve().as_uri()}")
    return 0


def add_report_parser(subparsers) -> argparse.ArgumentParser:
    """Add the ``report`` subcommand (``set_defaults(func=cmd_report)``) to an argparse subparsers object.

    Returns:
        The new subparser.
    """
    p = subparsers.add_parser("report", help="write one self-contained HTML page of a run folder "
                                             "(opens from disk, no server or network)")
    p.add_argument("run_dir", metavar="RUN_DIR", help="run folder written by 'protolang run' (or a scan or "
                                                      "recording set folder)")
    p.add_argument("--out", metavar="FILE", help=f"where to write the page (default RUN_DIR/{REPORT_NAME})")
    p.set_defaults(func=cmd_report)
    return p
