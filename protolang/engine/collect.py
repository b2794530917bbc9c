"""Monitor read-back: takes raw monitor arrays of one run and its layout, hands out per-repeat, per-sweep arrays for Recordings.

Plain numpy. A role's events are first taken out of the group it may share with other roles
(:func:`block_events`); then replica ``r`` of the replicas layout is repeat ``r // n_sweeps``,
sweep ``r % n_sweeps``; in the sequential layout cell ``k`` is repeat ``k`` and sweep ``s`` is
the window ``[s*interval, s*interval + sweep_length)`` of continuous time.
"""

from __future__ import annotations

import numpy as np

from protolang.engine.build import Layout


def block_events(cells: np.ndarray, start: int, size: int, *columns: np.ndarray) -> tuple[np.ndarray, ...]:
    """The events of one role's cells ``start .. start + size - 1`` in a group shared by several
    roles (:class:`protolang.engine.build.RoleBlock`), renumbered from 0 for the role.

    Args:
        cells: (n_events,) group cell index of each event (a monitor's ``i``).
        start, size: the role's block in the group.
        columns: (n_events,) arrays of the same events (times, amounts), filtered alike.

    Returns:
        (role cell index, *columns) of the events inside the block, in their original order.
    """
    cells = np.asarray(cells, dtype=np.int64)
    inside = (cells >= start) & (cells < start + size)
    return (cells[inside] - start,) + tuple(np.asarray(c)[inside] for c in columns)


def cut_traces(values: np.ndarray, layout: Layout) -> np.ndarray:
    """Cut recorded traces into sweeps.

    Args:
        values: (n_cells, n_recorded_samples) recorded values.
        layout: the run's layout.

    Returns:
        (n_repeat, n_sweeps, n_samples) float64 array.
    """
    values = np.asarray(values, dtype=np.float64)
    n = layout.n_samples
    if values.shape[1] < (layout.sweep_start_samples[-1] + n):
        raise AssertionError(f"internal error: {values.shape[1]} samples recorded, "
                             f"{layout.sweep_start_samples[-1] + n} needed")
    if layout.kind == "replicas":
        return values[:, :n].reshape(layout.n_repeat, layout.n_sweeps, n)
    cols = layout.sweep_start_samples[:, None] + np.arange(n)[None, :]
    return values[:, cols]


def _sweep_of(cells: np.ndarray, times: np.ndarray, layout: Layout):
    """Repeat, sweep and sweep time of events; ``inside`` flags events within a sweep window."""
    if layout.kind == "replicas":
        return (cells // layout.n_sweeps, cells % layout.n_sweeps, times,
                np.ones(cells.shape, dtype=bool))
    # half a time step of slack absorbs float error at window starts
    slack = 0.5 * layout.dt
    sweep = np.floor((times + slack) / layout.interval).astype(np.int64)
    sweep_time = times - sweep * layout.interval
    inside = (sweep >= 0) & (sweep < layout.n_sweeps) & (sweep_time < layout.sweep_length - slack)
    return cells, sweep, np.maximum(sweep_time, 0.0), inside


def split_spikes(cells: np.ndarray, times: np.ndarray, layout: Layout) -> list[list[np.ndarray]]:
    """Spike times per repeat per sweep, in sweep time (s), sorted.

    Args:
        cells: (n_spikes,) cell index of each spike.
        times: (n_spikes,) spike time in run time (s).
        layout: the run's layout.

    Returns:
        ``spikes[repeat][sweep]`` arrays of sweep times.
    """
    cells = np.asarray(cells, dtype=np.int64)
    times = np.asarray(times, dtype=np.float64)
    rep, sweep, st, inside = _sweep_of(cells, times, layout)
    rep, sweep, st = rep[inside], sweep[inside], st[inside]
    key = rep * layout.n_sweeps + sweep
    order = np.lexsort((st, key))
    counts = np.bincount(key, minlength=layout.n_repeat * layout.n_sweeps)
    chunks = np.split(st[order], np.cumsum(counts)[:-1])
    return [chunks[r * layout.n_sweeps:(r + 1) * layout.n_sweeps] for r in range(layout.n_repeat)]


def _rank_within(keys: np.ndarray, times: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Sort events by (key, time) and number them 0, 1, ... within each key."""
    order = np.lexsort((times, keys))
    k = keys[order]
    first = np.r_[True, k[1:] != k[:-1]] if k.size else np.zeros(0, dtype=bool)
    starts = np.flatnonzero(first)
    group_start = starts[np.cumsum(first) - 1] if k.size else np.zeros(0, dtype=np.int64)
    return order, np.arange(k.size) - group_start


def release_table(pre_cells: np.ndarray, pre_times: np.ndarray, event_cells: np.ndarray,
                  event_times: np.ndarray, amounts: np.ndarray, layout: Layout) -> np.ndarray:
    """Released amount at each presynaptic spike, per repeat and sweep, NaN-padded.

    The n-th delivery onto postsynaptic cell k belongs to the n-th spike of presynaptic cell k
    (each connection has one delay, so deliveries keep the spikes' order). Spikes without a
    delivery (unconnected repeats, deliveries after the end of the run) give NaN.

    Args:
        pre_cells, pre_times: presynaptic spikes (cell index, run time in s).
        event_cells, event_times, amounts: deliveries (postsynaptic cell, run time, amount).
        layout: the run's layout.

    Returns:
        (n_repeat, n_sweeps, n_spikes_max) float64 array.
    """
    pre_cells = np.asarray(pre_cells, dtype=np.int64)
    pre_times = np.asarray(pre_times, dtype=np.float64)
    event_cells = np.asarray(event_cells, dtype=np.int64)
    amounts = np.asarray(amounts, dtype=np.float64)
    p_order, p_rank = _rank_within(pre_cells, pre_times)
    e_order, e_rank = _rank_within(event_cells, np.asarray(event_times, dtype=np.float64))
    width = int(max(p_rank.max(initial=-1), e_rank.max(initial=-1))) + 2
    p_key = pre_cells[p_order] * width + p_rank
    e_key = event_cells[e_order] * width + e_rank
    value = np.full(p_key.size, np.nan)
    if e_key.size:
        pos = np.clip(np.searchsorted(e_key, p_key), 0, e_key.size - 1)
        hit = e_key[pos] == p_key
        value[hit] = amounts[e_order][pos[hit]]
    rep, sweep, st, inside = _sweep_of(pre_cells[p_order], pre_times[p_order], layout)
    rep, sweep, st, value = rep[inside], sweep[inside], st[inside], value[inside]
    key = rep * layout.n_sweeps + sweep
    s_order, s_rank = _rank_within(key, st)
    n_max = int(s_rank.max(initial=-1)) + 1
    out = np.full((layout.n_repeat, layout.n_sweeps, n_max), np.nan)
    out[rep[s_order], sweep[s_order], s_rank] = value[s_order]
    return out
