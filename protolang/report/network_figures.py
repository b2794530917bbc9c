"""Population figures: spikes of one population (times in s, cell indices, cell classes) in, a raster PNG and a population-rate PNG out.

Both figures draw on an Agg canvas through :mod:`protolang.report.write` (no pyplot, no
global backend switch; matplotlib is imported only when a figure is drawn) and are
written atomically, so a reader never sees half a file. Times are shown in ms.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from ..measure import network as net
from .write import _new_figure, _save_figure

MS = 1e3
MAX_CELLS_PER_CLASS = 100       # raster rows per class before subsampling
RASTER_SEED = 0                 # fixed, so the same cells are drawn on every run
_COLOURS = ("tab:blue", "tab:red", "tab:green", "tab:orange", "tab:purple",
            "tab:brown", "tab:pink", "tab:olive", "tab:cyan", "tab:gray")


def _class_groups(classes: np.ndarray) -> list[tuple[str, np.ndarray]]:
    """(class name, member cell indices) in order of first appearance."""
    names, first_seen, code = np.unique(classes, return_index=True, return_inverse=True)
    return [(str(names[k]), np.flatnonzero(code == k)) for k in np.argsort(first_seen)]


def _checked(times, cells, classes, start, stop):
    cls = net._classes(classes)
    t, c, _, start, stop = net._spikes(times, cells, cls.size, start, stop)
    return t, c, cls, start, stop


def _target(path) -> Path:
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    return path


def raster_figure(path: str | os.PathLike, times, cells, classes, start: float, stop: float, *,
                  max_cells_per_class: int = MAX_CELLS_PER_CLASS, seed: int = RASTER_SEED) -> Path:
    """Draw a spike raster, cells grouped and coloured by class, and write it as PNG.

    Classes with more than ``max_cells_per_class`` cells show a random subset of that
    size, drawn with ``numpy.random.default_rng(seed)`` so the same cells appear every
    time; the class labels say how many of how many cells are shown.

    Args:
        path: PNG file to write (its folder is created).
        times: (n_spikes,) spike times (s).
        cells: (n_spikes,) cell index of each spike.
        classes: (n_cells,) class name of each cell.
        start, stop: time window shown (s); spikes outside it are left out.
        max_cells_per_class: most rows drawn per class.
        seed: seed of the subsampling.

    Returns:
        ``path`` as a Path.

    Raises:
        ValueError: bad spikes, window or classes, ``max_cells_per_class`` < 1.
    """
    if isinstance(max_cells_per_class, bool) or not isinstance(max_cells_per_class, (int, np.integer)) \
            or max_cells_per_class < 1:
        raise ValueError(f"max_cells_per_class must be a whole number >= 1, got {max_cells_per_class!r}")
    t, c, cls, start, stop = _checked(times, cells, classes, start, stop)
    rng = np.random.default_rng(seed)
    row = np.full(cls.size, -1, dtype=np.intp)
    groups = []
    next_row = 0
    for name, members in _class_groups(cls):
        shown = members if members.size <= max_cells_per_class else \
            np.sort(rng.choice(members, size=max_cells_per_class, replace=False))
        row[shown] = next_row + np.arange(shown.size)
        groups.append((name, members.size, shown.size, next_row))
        next_row += shown.size

    fig = _new_figure(10.0, 5.0)
    ax = fig.subplots()
    spike_row = row[c]
    # Tick height shrinks with the number of rows so neighbouring cells do not merge.
    tick = max(1.0, min(6.0, 300.0 / max(next_row, 1)))
    ticks, labels = [], []
    for i, (name, n_total, n_shown, first_row) in enumerate(groups):
        colour = _COLOURS[i % len(_COLOURS)]
        mine = (spike_row >= first_row) & (spike_row < first_row + n_shown)
        ax.plot(t[mine] * MS, spike_row[mine], ls="none", marker="|", ms=tick, mew=0.7, color=colour)
        if i:
            ax.axhline(first_row - 0.5, color="0.6", lw=0.5)
        ticks.append(first_row + (n_shown - 1) / 2.0)
        labels.append(f"{name}\n{n_shown} of {n_total}" if n_shown < n_total else f"{name}\n{n_total} cells")
    ax.set_yticks(ticks, labels, fontsize=8)
    for lab, i in zip(ax.get_yticklabels(), range(len(groups))):
        lab.set_color(_COLOURS[i % len(_COLOURS)])
    ax.set_ylim(next_row - 0.5, -0.5)
    ax.set_xlim(start * MS, stop * MS)
    ax.set_xlabel("time (ms)")
    ax.set_title(f"spike raster: {c.size} spikes of {cls.size} cells, {next_row} cells shown", fontsize=9)
    ax.spines[["top", "right"]].set_visible(False)
    return _save_figure(fig, _target(path))


def population_rate_figure(path: str | os.PathLike, times, cells, classes, start: float, stop: float, *,
                           bursts=None, bin_width: float = net.RATE_BIN,
                           smooth_sd: float = net.RATE_SMOOTH_SD) -> Path:
    """Draw the smoothed population rate of each class and of all cells, bursts shaded, and write it as PNG.

    Args:
        path: PNG file to write (its folder is created).
        times: (n_spikes,) spike times (s).
        cells: (n_spikes,) cell index of each spike.
        classes: (n_cells,) class name of each cell.
        start, stop: time window (s).
        bursts: optional table with ``start_ms`` and ``stop_ms`` columns (as returned by
            :func:`protolang.measure.network.population_bursts`, or a structured array);
            each burst is shaded, and its ``attrs["threshold_Hz"]`` drawn when present.
        bin_width, smooth_sd: population-rate bins and Gaussian smoothing SD (s).

    Returns:
        ``path`` as a Path.

    Raises:
        ValueError: bad spikes, window, classes or bins; ``bursts`` without
            ``start_ms``/``stop_ms``.
    """
    t, c, cls, start, stop = _checked(times, cells, classes, start, stop)
    spans = np.zeros((0, 2))
    if bursts is not None:
        try:
            spans = np.column_stack([np.asarray(bursts["start_ms"], dtype=float),
                                     np.asarray(bursts["stop_ms"], dtype=float)])
        except (KeyError, ValueError, IndexError, TypeError):
            raise ValueError("bursts must have 'start_ms' and 'stop_ms' columns (ms), as population_bursts "
                             "returns") from None

    fig = _new_figure(10.0, 4.0)
    ax = fig.subplots()
    groups = _class_groups(cls)
    for i, (name, members) in enumerate(groups):
        in_class = np.zeros(cls.size, dtype=bool)
        in_class[members] = True
        centres, rate = net.population_rate(t[in_class[c]], members.size, start, stop, bin_width, smooth_sd)
        ax.plot(centres * MS, rate, lw=0.9, color=_COLOURS[i % len(_COLOURS)],
                label=f"{name} (n = {members.size})")
    if len(groups) > 1:
        centres, rate = net.population_rate(t, cls.size, start, stop, bin_width, smooth_sd)
        ax.plot(centres * MS, rate, lw=1.3, color="black", label=f"all cells (n = {cls.size})")
    for lo, hi in spans:
        ax.axvspan(lo, hi, color="0.85", lw=0, zorder=0)
    threshold = getattr(bursts, "attrs", {}).get("threshold_Hz") if bursts is not None else None
    if threshold is not None:
        ax.axhline(float(threshold), color="0.4", lw=0.7, ls="--", label="burst threshold")
    ax.set_xlim(start * MS, stop * MS)
    ax.set_xlabel("time (ms)")
    ax.set_ylabel("population rate (Hz per cell)")
    smooth = f", Gaussian SD {smooth_sd * MS:g} ms" if smooth_sd > 0 else ""
    title = f"population rate, bins {bin_width * MS:g} ms{smooth}"
    if bursts is not None:
        title += f"; {len(spans)} bursts shaded"
    ax.set_title(title, fontsize=9)
    ax.legend(loc="upper right", fontsize=8, frameon=False)
    ax.spines[["top", "right"]].set_visible(False)
    return _save_figure(fig, _target(path))
