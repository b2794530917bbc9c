"""One figure per published reference: the model's values against the published mean, SD and range."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from .write import _new_figure, _save_figure, slug


def comparison_figure_name(ref: dict) -> str:
    """``comparison_amplitude_post_from_pre.png``."""
    tail = f"_from_{ref['source_cell']}" if ref.get("source_cell") else ""
    return f"comparison_{slug(ref['measure'])}_{slug(ref['cell'])}{tail}.png"


def write_comparison_figures(fig_dir: Path, references: list[dict], tables: dict) -> dict[str, Path]:
    """Per reference: model values (one dot per connection or cell, jittered) and their mean, beside
    the published mean +- SD (and range); the title says whether they agree.

    Returns:
        ``{file name: Path}``.
    """
    from ..measure.compare import model_values

    table = tables.get("comparison")
    if table is None or not references:
        return {}
    fig_dir = Path(fig_dir)
    fig_dir.mkdir(parents=True, exist_ok=True)
    written = {}
    for ref, (_, row) in zip(references, table.iterrows()):
        values = model_values(ref, tables)
        fig = _new_figure(4.6, 3.8)
        ax = fig.add_subplot()
        rng = np.random.default_rng(0)
        if values.size:
            ax.scatter(rng.uniform(-0.12, 0.12, values.size), values, s=14, alpha=0.6, color="tab:blue",
                       label=f"model (n = {values.size})")
            sd = float(np.std(values, ddof=1)) if values.size > 1 else 0.0
            ax.errorbar([0.35], [values.mean()], yerr=[sd], fmt="o", color="tab:blue", capsize=5)
        else:
            ax.text(0.27, 0.5, "no model values", transform=ax.transAxes, ha="center", va="center", color="tab:red")
        if ref["value"] is not None:
            label = "published" + (f" (n = {ref['n']})" if ref["n"] is not None else "")
            yerr = [ref["sd"]] if ref["sd"] is not None else None
            ax.errorbar([1.0], [ref["value"]], yerr=yerr, fmt="s", color="tab:orange", capsize=5, label=label)
        if ref["low"] is not None:
            ax.vlines(1.25, ref["low"], ref["high"], color="tab:orange", linestyles="dashed", label="published range")
        ax.set_xlim(-0.5, 1.6)
        ax.set_xticks([0.1, 1.1], ["model", "published"])
        unit = f" ({ref['unit']})" if ref["unit"] else ""
        ax.set_ylabel(f"{ref['measure']}{unit}")
        agreement = row["agreement"]
        source = ref["source"] if len(ref["source"]) < 60 else ref["source"][:57] + "..."
        memo = " [from memory]" if ref["from_memory"] else ""
        ax.set_title(f"{ref['measure']} of {ref['cell']}: agreement {agreement} ({ref['rule_text']})\n"
                     f"{source}{memo}", fontsize=8)
        ax.legend(fontsize=7, loc="best")
        name = comparison_figure_name(ref)
        written[name] = _save_figure(fig, fig_dir / name)
    return written
