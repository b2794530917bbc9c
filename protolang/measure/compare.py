"""Model against published values: the ``comparison`` table of a protocol's ``reference`` blocks.

For each reference the model's values are read per unit from the collector tables (one value
per connection, tested pair or cell; see :data:`protolang.measure.registry.REFERENCE_MEASURES`),
summarised as n, mean and SD (ddof=1), and the model mean is judged against the published
value by the reference's rule:

* ``within K sd``: ``|model mean - published mean| <= K x published SD``;
* ``within P %``: ``|model mean - published mean| <= P/100 x |published mean|``;
* ``within Q`` (the measure's unit): ``|model mean - published mean| <= Q``;
* ``inside range``: ``low <= model mean <= high``.

A reference with no model values (no connection, every fit failed) gets agreement "no data",
which is not agreement. The judgement compares means only: it is no test of equal
distributions, and its outcome depends on the tolerance the user chose.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

COMPARISON_COLUMNS = [
    "measure", "cell", "from_cell", "unit", "model_n", "model_mean", "model_sd",
    "reference_n", "reference_mean", "reference_sd", "reference_low", "reference_high",
    "difference", "difference_in_sd", "relative_difference", "rule", "agreement", "reason",
    "source", "from_memory", "conditions", "condition_differences", "reference_line",
]
# Slack on the boundary of a rule (relative to the tolerance): a model mean exactly on the edge agrees.
_EDGE = 1e-9


def judge(rule: str, model_mean: float, *, value: float | None = None, sd: float | None = None,
          low: float | None = None, high: float | None = None, tolerance: float | None = None
          ) -> tuple[str, str]:
    """Whether ``model_mean`` agrees with a published value under ``rule``.

    Args:
        rule: "sd", "relative", "absolute" or "range".
        model_mean: the model's mean (NaN: no model values).
        value, sd: the published mean and SD.
        low, high: the published range.
        tolerance: K (published SDs) for "sd", a fraction for "relative", an amount in the
            measure's unit for "absolute"; unused for "range".

    Returns:
        ``("yes" | "no" | "no data", reason)``; the reason shows the numbers compared.
    """
    if model_mean is None or not math.isfinite(model_mean):
        return "no data", "the model gave no value for this measure"
    if rule == "sd" and (sd is None or not math.isfinite(sd)):
        return "no data", "the reference has no SD (a single value), so 'within K sd' cannot be judged"
    if rule == "range":
        inside = low - _EDGE * abs(low) <= model_mean <= high + _EDGE * abs(high)
        word = "inside" if inside else "outside"
        return ("yes" if inside else "no"), f"model mean {model_mean:.4g} {word} {low:.4g} to {high:.4g}"
    diff = abs(model_mean - value)
    if rule == "sd":
        limit, text = tolerance * sd, f"{tolerance:g} x SD {sd:.4g}"
    elif rule == "relative":
        limit, text = tolerance * abs(value), f"{tolerance * 100:g} % of {abs(value):.4g}"
    elif rule == "absolute":
        limit, text = tolerance, f"{tolerance:.4g}"
    else:
        raise ValueError(f"unknown agreement rule {rule!r}")
    ok = diff <= limit * (1 + _EDGE) + 1e-300
    return ("yes" if ok else "no"), f"|{model_mean:.4g} - {value:.4g}| = {diff:.4g} {'<=' if ok else '>'} {limit:.4g} ({text})"


def model_values(ref: dict, tables: dict[str, pd.DataFrame]) -> np.ndarray:
    """The model's values of one reference's measure, one per connection, tested pair or cell.

    Args:
        ref: a record of :func:`protolang.plan.references.reference_plans`.
        tables: the run's tables.

    Returns:
        Finite values in the unit of the table column (fractions as 0..1); empty if none.
    """
    from .registry import REFERENCE_MEASURES

    entry = REFERENCE_MEASURES[ref["measure"]]
    measure = ref["measure"]
    if measure == "probability" and ref.get("on_patch"):
        pairs = tables.get("patch_pairs")
        if pairs is None or pairs.empty:
            return np.array([])
        rows = pairs[(pairs["patch"] == ref["cell"]) & pairs["tested"].astype(bool)]
        return rows["detected"].astype(float).to_numpy()
    table = tables.get(entry["table"])
    if table is None or table.empty:
        return np.array([])
    if entry["table"] == "cells":
        rows = table[table["role"] == ref["cell"]]
    else:
        rows = table[(table["post"] == ref["cell"]) & (table["pre"] == ref["source_cell"])]
        if entry["table"] == "plasticity":
            rows = rows[(rows["scope"] == "connection") & rows["tm_converged"].astype(bool)]
            if measure == "F" and "tm_model" in rows.columns:
                # a depression-only refit sets F = 0 because the train could not resolve F: not a measured 0
                rows = rows[rows["tm_model"] == "depression and facilitation"]
        elif measure == "probability":
            return rows["connected"].astype(float).to_numpy()
        else:
            rows = rows[rows["connected"].astype(bool)]
    columns = entry["column"] if isinstance(entry["column"], tuple) else (entry["column"],)
    for column in columns:
        column = column.format(unit=ref["unit"] or "mV")
        if column not in rows.columns:
            continue
        values = pd.to_numeric(rows[column], errors="coerce").to_numpy(dtype=float)
        values = values[np.isfinite(values)]
        if values.size:
            return values
    return np.array([])


def compare(references: list[dict], tables: dict[str, pd.DataFrame]) -> pd.DataFrame:
    """The ``comparison`` table: one row per reference (columns :data:`COMPARISON_COLUMNS`)."""
    rows = []
    for ref in references:
        values = model_values(ref, tables)
        n = int(values.size)
        mean = float(np.mean(values)) if n else math.nan
        sd = float(np.std(values, ddof=1)) if n > 1 else math.nan
        agreement, reason = judge(ref["rule"], mean, value=ref["value"], sd=ref["sd"], low=ref["low"],
                                  high=ref["high"], tolerance=ref["tolerance"])
        value, ref_sd = ref["value"], ref["sd"]
        diff = mean - value if value is not None and n else math.nan
        rows.append({
            "measure": ref["measure"], "cell": ref["cell"], "from_cell": ref["source_cell"] or "",
            "unit": ref["unit"], "model_n": n, "model_mean": mean, "model_sd": sd,
            "reference_n": ref["n"] if ref["n"] is not None else math.nan,
            "reference_mean": _num(value), "reference_sd": _num(ref_sd),
            "reference_low": _num(ref["low"]), "reference_high": _num(ref["high"]),
            "difference": diff,
            "difference_in_sd": diff / ref_sd if ref_sd else math.nan,
            "relative_difference": diff / abs(value) if value else math.nan,
            "rule": ref["rule_text"], "agreement": agreement, "reason": reason, "source": ref["source"],
            "from_memory": bool(ref["from_memory"]), "conditions": ref["conditions"],
            "condition_differences": ref["differences"], "reference_line": ref["span"],
        })
    return pd.DataFrame(rows, columns=COMPARISON_COLUMNS)


def _num(x) -> float:
    return math.nan if x is None else float(x)


def recorded_references(recorded: dict[str, pd.DataFrame], *, within: float, source: str,
                        conditions: str = "", differences: str = "") -> list[dict]:
    """References made from a recording set's tables: every measure the recordings yield, per cell (pair).

    Each becomes a record like :func:`protolang.plan.references.reference_plans` gives, with
    the recordings' n, mean and SD (ddof=1) as the published value and the rule
    ``within K sd`` (K = ``within``), so :func:`compare` judges a model run against the lab's data
    exactly as against a paper. Measures with fewer than one finite recorded value are left out;
    with a single value (no SD) the rule cannot be applied and the row reads "no data".

    Args:
        recorded: the recording set's tables.
        within: K, the tolerance in recorded SDs.
        source: text naming the recordings (shown in the ``source`` column).
        conditions: the recordings' bath, as text.
        differences: condition differences between model run and recordings, as text.

    Returns:
        Reference records in table-column units.
    """
    from ..plan.references import COLUMN_UNIT
    from .registry import REFERENCE_MEASURES

    refs = []
    for measure, entry in REFERENCE_MEASURES.items():
        table = recorded.get(entry["table"])
        if table is None or table.empty:
            continue
        if entry["table"] == "cells":
            keys = [(cell, None) for cell in dict.fromkeys(table["role"])]
        elif {"post", "pre"} <= set(table.columns):
            keys = list(dict.fromkeys(zip(table["post"], table["pre"])))
        else:
            continue
        for cell, src in keys:
            unit = COLUMN_UNIT.get(entry["dimension"])
            if entry["dimension"] == "trace":
                unit = "pA" if any(c.endswith("_pA") for c in table.columns) else "mV"
            ref = {"measure": measure, "cell": cell, "source_cell": src, "on_patch": False,
                   "dimension": entry["dimension"], "unit": unit}
            values = model_values(ref, recorded)
            if values.size == 0:
                continue
            mean = float(np.mean(values))
            sd = float(np.std(values, ddof=1)) if values.size > 1 else None
            ref.update(value=mean, sd=sd, low=None, high=None, n=int(values.size),
                       rule="sd", tolerance=float(within), rule_text=f"within {within:g} sd",
                       source=source, from_memory=False, note="", conditions=conditions,
                       differences=differences, unaccepted_differences=[], span="")
            refs.append(ref)
    return refs
