"""Population-activity measures: spike times (s) and cell indices of one population in, rates, ISI CV, synchrony, count correlations, population bursts and a per-class summary out.

Everything here works on plain numpy arrays, so spikes recorded in a slice or an array
are analysed by exactly the code that analyses simulated ones. Data convention:

* one population of ``n_cells`` cells, numbered ``0 .. n_cells - 1``;
* its spikes as two flat arrays of equal length, ``times`` (s, float) and ``cells``
  (int, the cell that fired), in any order;
* the observation window ``[start, stop)`` (s). Spikes outside it are ignored, so the
  whole recording can be handed in with the window of interest;
* where classes matter, ``classes`` (n_cells,) holds each cell's class name.

Binning: a window is cut into ``n = max(1, round((stop - start) / bin_width))`` equal bins
that tile it exactly, so the bin actually used is ``(stop - start) / n`` and can differ
from the requested width by a fraction of a bin (and no spike is lost at the end).

Definitions (each is repeated where it is coded):

* **rate**: spikes in the window / window length, per cell (Hz).
* **ISI CV**: standard deviation over mean of a cell's inter-spike intervals within the
  window (population SD, ``ddof = 0``), the coefficient of variation of Dayan and Abbott
  2001 (Theoretical Neuroscience, ch. 1): 1 for a Poisson train, 0 for a periodic one.
* **population rate**: spikes of all cells per bin / (n_cells x bin), in Hz per cell,
  optionally smoothed by a Gaussian kernel (edges reflected, so no spike is lost).
* **active cell**: a cell whose binned spike count varies over the window. In practice
  a cell that fired at least once; a cell that fires exactly once in every bin is also
  left out, since it carries no fluctuation to correlate.
* **synchrony chi**: Golomb and Rinzel 1993 (Phys Rev E 48:4810-4814) and 1994
  (Physica D 72:259-282); Golomb 2007 (Scholarpedia 2(1):1347): ``chi^2 = Var_t[mean_i x_i(t)] / mean_i Var_t[x_i(t)]`` with
  ``x_i(t)`` the spike count of active cell ``i`` in state bins (default 5 ms). 1 for
  identical trains; about ``1/sqrt(N)`` for ``N`` independent cells.
* **spike-count correlation**: mean Pearson correlation of the binned counts over all
  distinct pairs of active cells (default bins 10 ms), computed exactly without forming
  the pair matrix.
* **population burst**: an interval where the smoothed population rate stays above
  ``max(k x median rate, floor, Poisson chance level)``; details in :func:`population_bursts`.
* **state**: "synchronous" when chi >= :data:`SYNCHRONY_THRESHOLD`, else "asynchronous";
  "undetermined" with fewer than :data:`STATE_MIN_SPIKES_PER_CELL` spikes per active cell.

Nothing loops over spikes: spikes are binned with ``np.bincount`` on ``cell * n_bins + bin``
and per-cell statistics come from sorted flat indices, so memory grows with the number
of spikes and bins, never with ``n_cells x n_bins``.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, NamedTuple

import numpy as np

if TYPE_CHECKING:   # pandas only inside the functions that build tables
    import pandas as pd

STATE_BIN = 5e-3                # s, bins of the counts chi is computed on
COUNT_BIN = 10e-3               # s, bins of the counts pair correlations are computed on
RATE_BIN = 1e-3                 # s, bins of the population rate
RATE_SMOOTH_SD = 2e-3           # s, SD of the Gaussian kernel smoothing the population rate
KERNEL_HALF_WIDTH_SD = 4.0      # the Gaussian kernel is cut at this many SD each side
BURST_FACTOR = 4.0              # burst threshold in units of the median population rate
BURST_FLOOR_HZ = 10.0           # Hz per cell, lowest burst threshold
BURST_CHANCE_P = 1e-6           # chance of independent cells reaching the burst threshold, per kernel width
BURST_MERGE_GAP = 10e-3         # s, bursts closer than this are one burst
BURST_MIN_CELLS = 3             # fewest distinct cells a burst must contain
MIN_ISI_INTERVALS = 2           # fewest intervals an ISI CV is computed from
SYNCHRONY_THRESHOLD = 0.3       # chi at and above which a population is labelled synchronous
ALL_CELLS = "all cells"         # class label of the summary row over the whole population

STATE_LABELS = ("synchronous", "asynchronous", "undetermined")

# A spike a hair below ``stop`` must not land in a bin past the last one through round-off.
_EPS_BINS = 1e-9


class Synchrony(NamedTuple):
    """Golomb's synchrony measure and how many cells it was computed on."""

    chi: float
    n_cells: int


class CountCorrelation(NamedTuple):
    """Mean pairwise spike-count correlation and how many pairs it averages."""

    mean: float
    n_pairs: int


# --- input checks ---------------------------------------------------------------------

def _window(start, stop) -> tuple[float, float]:
    try:
        start, stop = float(start), float(stop)
    except (TypeError, ValueError):
        raise ValueError(f"the observation window must be two numbers in s, got start {start!r}, "
                         f"stop {stop!r}") from None
    if not (math.isfinite(start) and math.isfinite(stop)):
        raise ValueError(f"the observation window must be finite, got start {start!r} s, stop {stop!r} s")
    if stop <= start:
        raise ValueError(f"the observation window is empty or negative: start {start!r} s, stop {stop!r} s; "
                         "stop must come after start (e.g. start=0.0, stop=2.0)")
    return start, stop


def _positive(value, name: str, unit: str) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a positive number in {unit}, got {value!r}") from None
    if not (math.isfinite(v) and v > 0):
        raise ValueError(f"{name} must be a positive number in {unit}, got {value!r}")
    return v


def _non_negative(value, name: str, unit: str) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a number >= 0 in {unit}, got {value!r}") from None
    if not (math.isfinite(v) and v >= 0):
        raise ValueError(f"{name} must be a number >= 0 in {unit}, got {value!r}")
    return v


def _n_cells(n_cells) -> int:
    if isinstance(n_cells, (bool, np.bool_)) or not isinstance(n_cells, (int, np.integer)) or n_cells < 1:
        raise ValueError(f"n_cells must be a whole number of cells >= 1, got {n_cells!r}")
    return int(n_cells)


def _times(times) -> np.ndarray:
    t = np.asarray(times, dtype=float)
    if t.ndim != 1:
        raise ValueError(f"times must be a flat (1-D) array of spike times in s, got shape {t.shape}")
    if not np.isfinite(t).all():
        bad = int(np.flatnonzero(~np.isfinite(t))[0])
        raise ValueError(f"times[{bad}] is {float(t[bad])!r}; spike times must be finite numbers in s")
    return t


def _spikes(times, cells, n_cells, start, stop) -> tuple[np.ndarray, np.ndarray, int, float, float]:
    """Checked spikes inside ``[start, stop)``: (times, cells as intp, n_cells, start, stop)."""
    n = _n_cells(n_cells)
    start, stop = _window(start, stop)
    t = _times(times)
    raw = np.asarray(cells)
    if raw.ndim != 1:
        raise ValueError(f"cells must be a flat (1-D) array of cell indices, got shape {raw.shape}")
    if raw.size != t.size:
        raise ValueError(f"times and cells differ in length ({t.size} vs {raw.size}); "
                         "give one cell index per spike time")
    if raw.size and not np.issubdtype(raw.dtype, np.integer):
        # Indices read back from a CSV arrive as floats; accept them when they are whole.
        as_float = np.asarray(raw, dtype=float) if np.issubdtype(raw.dtype, np.number) else None
        if as_float is None or not (np.isfinite(as_float).all() and (as_float == np.round(as_float)).all()):
            raise ValueError(f"cells must hold whole-number cell indices, got dtype {raw.dtype}")
        raw = as_float.astype(np.int64)
    c = raw.astype(np.intp, copy=False) if raw.size else np.zeros(0, dtype=np.intp)
    if c.size:
        lo, hi = int(c.min()), int(c.max())
        if lo < 0 or hi >= n:
            bad = lo if lo < 0 else hi
            where = int(np.flatnonzero(c == bad)[0])
            raise ValueError(f"cells[{where}] is {bad}, outside 0..{n - 1} (n_cells = {n}); "
                             "every spike must name a cell of this population")
    keep = (t >= start) & (t < stop)
    return t[keep], c[keep], n, start, stop


def _classes(classes) -> np.ndarray:
    cls = np.asarray(classes)
    if cls.ndim != 1 or cls.size == 0:
        raise ValueError(f"classes must be a flat, non-empty array with one class name per cell, got shape {cls.shape}")
    return cls.astype(str)


def _grid(start: float, stop: float, bin_width: float) -> tuple[int, float]:
    """Number of bins tiling ``[start, stop)`` and the bin width they actually have (s)."""
    n_bins = max(1, int(round((stop - start) / bin_width)))
    return n_bins, (stop - start) / n_bins


def _bin_of(times: np.ndarray, start: float, width: float, n_bins: int) -> np.ndarray:
    b = np.floor((times - start) / width + _EPS_BINS).astype(np.intp)
    return np.clip(b, 0, n_bins - 1)


# --- per-cell measures ------------------------------------------------------------------

def cell_rates(times, cells, n_cells: int, start: float, stop: float) -> np.ndarray:
    """Firing rate of every cell over the window.

    Args:
        times: (n_spikes,) spike times (s).
        cells: (n_spikes,) index of the cell of each spike, in ``0 .. n_cells - 1``.
        n_cells: number of cells in the population (silent ones included).
        start, stop: observation window (s); spikes outside ``[start, stop)`` are ignored.

    Returns:
        (n_cells,) rates in Hz.

    Raises:
        ValueError: empty or negative window, mismatched arrays, cell index out of range,
            non-finite times.
    """
    _, c, n, start, stop = _spikes(times, cells, n_cells, start, stop)
    return np.bincount(c, minlength=n) / (stop - start)


def isi_cv(times, cells, n_cells: int, start: float, stop: float,
           min_intervals: int = MIN_ISI_INTERVALS) -> np.ndarray:
    """Coefficient of variation of every cell's inter-spike intervals within the window.

    CV = SD / mean of the intervals between successive spikes of a cell that both lie in
    ``[start, stop)`` (SD with ``ddof = 0``), as defined by Dayan and Abbott 2001
    (Theoretical Neuroscience, ch. 1): 1 for a Poisson train, 0 for a periodic one.

    Args:
        times: (n_spikes,) spike times (s).
        cells: (n_spikes,) cell index of each spike.
        n_cells: number of cells.
        start, stop: observation window (s).
        min_intervals: fewest intervals a CV is computed from (>= 2).

    Returns:
        (n_cells,) CV (dimensionless); NaN for cells with fewer than ``min_intervals``
        intervals (or whose intervals are all zero).

    Raises:
        ValueError: bad spikes or window (see :func:`cell_rates`), ``min_intervals`` < 2.
    """
    if isinstance(min_intervals, bool) or not isinstance(min_intervals, (int, np.integer)) or min_intervals < 2:
        raise ValueError(f"min_intervals must be a whole number >= 2 (one interval has no spread), "
                         f"got {min_intervals!r}")
    t, c, n, _, _ = _spikes(times, cells, n_cells, start, stop)
    order = np.lexsort((t, c))
    t, c = t[order], c[order]
    same = c[1:] == c[:-1]
    isi = np.diff(t)[same]
    owner = c[1:][same]
    count = np.bincount(owner, minlength=n)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.bincount(owner, weights=isi, minlength=n) / count
        # Two passes (deviations from each cell's own mean) avoid the cancellation of E[x^2] - E[x]^2.
        var = np.bincount(owner, weights=(isi - mean[owner]) ** 2, minlength=n) / count
        cv = np.sqrt(var) / mean
    cv[(count < min_intervals) | ~(mean > 0)] = np.nan
    return cv


# --- population rate --------------------------------------------------------------------

def _kernel(sd_bins: float) -> np.ndarray:
    """Unit-sum Gaussian of SD ``sd_bins`` (in bins) cut at 4 SD; ``[1.0]`` when under half a bin."""
    radius = int(math.ceil(KERNEL_HALF_WIDTH_SD * sd_bins))
    if radius < 1:
        return np.ones(1)
    k = np.arange(-radius, radius + 1, dtype=float)
    kernel = np.exp(-0.5 * (k / sd_bins) ** 2)
    return kernel / kernel.sum()


def _gaussian_smooth(signal: np.ndarray, sd_bins: float) -> np.ndarray:
    """Convolve with a normalised Gaussian, edges reflected so the sum is kept."""
    kernel = _kernel(sd_bins)
    radius = kernel.size // 2
    if radius < 1:
        return signal.astype(float)
    # Symmetric reflection folds the mass a symmetric kernel would push past an edge back
    # inside, so the smoothed rate integrates to the same spike count.
    padded = np.pad(signal.astype(float), radius, mode="symmetric")
    return np.convolve(padded, kernel, mode="valid")


def population_rate(times, n_cells: int, start: float, stop: float, bin_width: float = RATE_BIN,
                    smooth_sd: float = RATE_SMOOTH_SD) -> tuple[np.ndarray, np.ndarray]:
    """Instantaneous population rate per cell, optionally smoothed by a Gaussian kernel.

    ``rate(bin) = spikes of all cells in the bin / (n_cells x bin width)``. Smoothing
    convolves with a Gaussian of SD ``smooth_sd`` cut at 4 SD, with the signal reflected
    at the window edges; the smoothed rate keeps the integral (spikes / n_cells) as long
    as the kernel is shorter than the window.

    Args:
        times: (n_spikes,) spike times of the population (s); cell identity is not needed.
        n_cells: number of cells the rate is divided by.
        start, stop: observation window (s); spikes outside it are ignored.
        bin_width: bin width (s); adjusted so whole bins tile the window.
        smooth_sd: SD of the Gaussian kernel (s); 0 for no smoothing.

    Returns:
        ``(centres, rate)``: bin centres (s) and the rate (Hz per cell), both (n_bins,).

    Raises:
        ValueError: empty or negative window, non-finite times, ``n_cells`` < 1,
            ``bin_width`` <= 0 or ``smooth_sd`` < 0.
    """
    n = _n_cells(n_cells)
    start, stop = _window(start, stop)
    width = _positive(bin_width, "bin_width", "s")
    sd = _non_negative(smooth_sd, "smooth_sd", "s")
    t = _times(times)
    t = t[(t >= start) & (t < stop)]
    n_bins, width = _grid(start, stop, width)
    counts = np.bincount(_bin_of(t, start, width, n_bins), minlength=n_bins)
    rate = counts / (n * width)
    if sd > 0:
        rate = _gaussian_smooth(rate, sd / width)
    centres = start + (np.arange(n_bins) + 0.5) * width
    return centres, rate


# --- synchrony and correlations ----------------------------------------------------------

class _BinnedCounts(NamedTuple):
    n_bins: int
    bins: np.ndarray        # (n_spikes,) bin of each spike
    cells: np.ndarray       # (n_spikes,) cell of each spike
    total: np.ndarray       # (n_cells,) spikes per cell
    var_num: np.ndarray     # (n_cells,) n_bins^2 x Var_t[x_i], exact in integers
    active: np.ndarray      # (n_cells,) bool, count varies over the bins


def _binned(t: np.ndarray, c: np.ndarray, n: int, start: float, stop: float, bin_width: float) -> _BinnedCounts:
    """Per-cell count statistics on a bin grid, without the (n_cells x n_bins) matrix."""
    width = _positive(bin_width, "bin_width", "s")
    n_bins, width = _grid(start, stop, width)
    b = _bin_of(t, start, width, n_bins)
    flat = c.astype(np.int64) * n_bins + b
    occupied, per_bin = np.unique(flat, return_counts=True)
    total = np.bincount(c, minlength=n).astype(np.float64)
    sum_sq = np.bincount(occupied // n_bins, weights=per_bin.astype(np.float64) ** 2, minlength=n)
    # n_bins^2 Var = n_bins * sum(x^2) - (sum x)^2: integers, exact in float64 below 2^53,
    # so a cell with constant counts gets exactly zero and is left out.
    var_num = n_bins * sum_sq - total ** 2
    return _BinnedCounts(n_bins, b, c, total, var_num, var_num > 0)


def golomb_synchrony(times, cells, n_cells: int, start: float, stop: float,
                     bin_width: float = STATE_BIN) -> Synchrony:
    """Population synchrony chi: variance of the population-mean count over the mean variance of the cells' counts.

    Sources: Golomb and Rinzel 1993, Phys Rev E 48:4810-4814; Golomb and Rinzel 1994,
    Physica D 72:259-282; Golomb 2007, Scholarpedia 2(1):1347. They define chi on
    membrane potentials or activity variables; counting spikes in bins is the common
    practice for spike data (no single source).

    ``chi^2 = Var_t[X(t)] / mean_i Var_t[x_i(t)]`` with ``x_i(t)`` the spike count of
    cell ``i`` in state bins of ``bin_width`` (default 5 ms), ``X(t) = mean_i x_i(t)``
    and variances over the bins of the window. Only active cells (count varying over the
    bins, in practice cells that fired) enter both the mean signal and the denominator,
    so silent cells neither dilute the synchrony nor divide by zero.

    chi is 1 for identical trains and 0 for perfectly independent ones in the limit of
    many cells; for ``N`` finite independent cells ``chi^2`` is about ``1/N``, so chi is
    biased upward by about ``1/sqrt(N)``. For cells of equal count variance,
    ``chi^2 = 1/N + (1 - 1/N) r`` with ``r`` the mean pairwise count correlation.

    Args:
        times: (n_spikes,) spike times (s).
        cells: (n_spikes,) cell index of each spike.
        n_cells: number of cells.
        start, stop: observation window (s).
        bin_width: state bin width (s).

    Returns:
        ``Synchrony(chi, n_cells)``: chi in [0, 1] and the number of active cells used;
        chi is NaN with fewer than 2 active cells.

    Raises:
        ValueError: bad spikes, window or bin width.
    """
    t, c, n, start, stop = _spikes(times, cells, n_cells, start, stop)
    s = _binned(t, c, n, start, stop, bin_width)
    n_active = int(s.active.sum())
    if n_active < 2:
        return Synchrony(math.nan, n_active)
    pop = np.bincount(s.bins[s.active[s.cells]], minlength=s.n_bins).astype(np.float64)
    pop_var_num = s.n_bins * float(np.dot(pop, pop)) - float(pop.sum()) ** 2
    # Var[X] = pop_var_num / (n_bins^2 n_active^2); mean_i Var[x_i] = sum(var_num) / (n_bins^2 n_active).
    chi_sq = pop_var_num / (n_active * float(s.var_num[s.active].sum()))
    return Synchrony(float(math.sqrt(min(max(chi_sq, 0.0), 1.0))), n_active)


def spike_count_correlation(times, cells, n_cells: int, start: float, stop: float,
                            bin_width: float = COUNT_BIN) -> CountCorrelation:
    """Mean Pearson correlation of binned spike counts over all distinct pairs of active cells.

    Exact over all ``N (N - 1) / 2`` pairs without the pair matrix: with ``z_i`` the
    count vector of cell ``i`` centred and scaled to unit length, the pair correlation
    is ``r_ij = z_i . z_j``, so ``sum_{i != j} r_ij = |sum_i z_i|^2 - N`` and the sum of the
    ``z_i`` is one weighted ``bincount`` over the spikes. No sampling, no seed, and memory
    grows with spikes plus bins only.

    Args:
        times: (n_spikes,) spike times (s).
        cells: (n_spikes,) cell index of each spike.
        n_cells: number of cells.
        start, stop: observation window (s).
        bin_width: count bin width (s), default 10 ms.

    Returns:
        ``CountCorrelation(mean, n_pairs)``; mean is NaN with fewer than 2 active cells.

    Raises:
        ValueError: bad spikes, window or bin width.
    """
    t, c, n, start, stop = _spikes(times, cells, n_cells, start, stop)
    s = _binned(t, c, n, start, stop, bin_width)
    n_active = int(s.active.sum())
    n_pairs = n_active * (n_active - 1) // 2
    if n_active < 2:
        return CountCorrelation(math.nan, n_pairs)
    norm = np.zeros(n)
    norm[s.active] = np.sqrt(s.var_num[s.active] / s.n_bins)     # |x_i - mean_i|
    inv = np.zeros(n)
    inv[s.active] = 1.0 / norm[s.active]
    mean_i = s.total / s.n_bins
    z_sum = np.bincount(s.bins, weights=inv[s.cells], minlength=s.n_bins) - float(np.dot(mean_i, inv))
    r_sum = float(np.dot(z_sum, z_sum)) - n_active
    return CountCorrelation(r_sum / (n_active * (n_active - 1)), n_pairs)


# --- population bursts --------------------------------------------------------------------

def _poisson_upper(mean: float, p: float) -> int:
    """Smallest m with P(Poisson(mean) >= m) <= p."""
    if mean <= 0:
        return 1
    top = int(math.ceil(mean + 40.0 * math.sqrt(mean) + 60.0))
    k = np.arange(top + 1)
    log_fact = np.concatenate(([0.0], np.cumsum(np.log(np.arange(1, top + 1)))))
    pmf = np.exp(k * math.log(mean) - mean - log_fact)
    tail = np.cumsum(pmf[::-1])[::-1]            # tail[m] = P(X >= m), up to a negligible remainder
    below = np.flatnonzero(tail <= p)
    return int(below[0]) if below.size else top + 1


BURST_COLUMNS = ("burst", "start_ms", "stop_ms", "duration_ms", "peak_time_ms", "peak_rate_Hz",
                 "n_spikes", "n_cells_participating", "cells_participating_fraction")


def population_bursts(times, cells, n_cells: int, start: float, stop: float, *,
                      factor: float = BURST_FACTOR, floor: float = BURST_FLOOR_HZ,
                      chance_p: float = BURST_CHANCE_P, merge_gap: float = BURST_MERGE_GAP,
                      min_cells: int = BURST_MIN_CELLS,
                      bin_width: float = RATE_BIN, smooth_sd: float = RATE_SMOOTH_SD) -> "pd.DataFrame":
    """Population bursts: intervals where the smoothed population rate stays above a threshold.

    Rule (protolang's own, with common-practice ingredients):

    1. population rate per cell in bins of ``bin_width`` smoothed by a Gaussian of SD
       ``smooth_sd`` (:func:`population_rate`);
    2. threshold = ``max(factor x median of that rate over the window, floor, chance)``.
       The median keeps a few bursts from raising their own threshold; the floor keeps
       a near-silent population from calling every coincidence a burst. ``chance`` is
       ``m / (n_cells x w)`` with ``w`` the kernel's width at its peak (its area over
       its peak height, ``sqrt(2 pi) x smooth_sd``, or one bin unsmoothed) and ``m`` the
       fewest spikes that independent Poisson cells at the observed mean rate put in a
       window ``w`` with probability at most ``chance_p``: one spike can raise the
       smoothed rate by at most ``1 / (n_cells x w)``, so crossing ``chance`` takes at
       least ``m`` spikes close together. Without it a population of a few dozen cells
       crosses ``factor x median`` on chance coincidences of four or five spikes;
    3. a burst is a run of bins above the threshold, from the left edge of its first bin
       to the right edge of its last;
    4. bursts separated by less than ``merge_gap`` are merged into one;
    5. bursts with spikes from fewer than ``min_cells`` distinct cells are dropped: in a
       small population one cell's own high-frequency burst can cross the threshold,
       and that is not a population event.

    Args:
        times: (n_spikes,) spike times (s).
        cells: (n_spikes,) cell index of each spike.
        n_cells: number of cells.
        start, stop: observation window (s).
        factor: threshold in units of the median population rate.
        floor: lowest threshold (Hz per cell).
        chance_p: probability (per window ``w``) with which independent cells may reach the
            threshold; 0 < chance_p < 1, or 0 to turn the chance level off.
        merge_gap: bursts closer than this (s) are merged.
        min_cells: fewest distinct cells a burst must contain.
        bin_width, smooth_sd: population-rate bins and smoothing (s).

    Returns:
        DataFrame with one row per burst in time order, columns :data:`BURST_COLUMNS`:
        ``start_ms``, ``stop_ms``, ``duration_ms``, ``peak_time_ms`` (time of the highest
        smoothed rate), ``peak_rate_Hz`` (Hz per cell), ``n_spikes`` inside the burst,
        ``n_cells_participating`` and ``cells_participating_fraction`` (cells with at least
        one spike inside, over ``n_cells``). ``attrs["threshold_Hz"]`` holds the threshold.

    Raises:
        ValueError: bad spikes, window, bins, or a negative factor, floor, gap or min_cells.
    """
    import pandas as pd

    t, c, n, start, stop = _spikes(times, cells, n_cells, start, stop)
    factor = _non_negative(factor, "factor", "units of the median rate")
    floor = _non_negative(floor, "floor", "Hz per cell")
    chance_p = _non_negative(chance_p, "chance_p", "probability")
    if chance_p >= 1.0:
        raise ValueError(f"chance_p must be a probability below 1 (or 0 for no chance level), got {chance_p!r}")
    merge_gap = _non_negative(merge_gap, "merge_gap", "s")
    if isinstance(min_cells, bool) or not isinstance(min_cells, (int, np.integer)) or min_cells < 1:
        raise ValueError(f"min_cells must be a whole number >= 1, got {min_cells!r}")
    _, rate = population_rate(t, n, start, stop, bin_width, smooth_sd)
    n_bins, width = _grid(start, stop, _positive(bin_width, "bin_width", "s"))
    peak_width = width / float(_kernel(_non_negative(smooth_sd, "smooth_sd", "s") / width).max())
    chance = 0.0
    if chance_p > 0:
        expected = t.size / (stop - start) * peak_width
        chance = _poisson_upper(expected, chance_p) / (n * peak_width)
    threshold = max(factor * float(np.median(rate)), floor, chance)

    above = np.concatenate(([0], (rate > threshold).astype(np.int8), [0]))
    edge = np.diff(above)
    first, past = np.flatnonzero(edge == 1), np.flatnonzero(edge == -1)   # bins [first, past)
    if first.size:
        # Merge runs whose gap (in bins) is shorter than merge_gap.
        split = (first[1:] - past[:-1]) * width >= merge_gap - _EPS_BINS * width
        first = first[np.concatenate(([True], split))]
        past = past[np.concatenate((split, [True]))]
    n_b = first.size
    # Burst id of every bin (-1 outside bursts), from +1/-1 marks at the burst edges.
    marks = np.zeros(n_bins + 1, dtype=np.int64)
    np.add.at(marks, first, np.arange(1, n_b + 1))
    np.add.at(marks, past, -np.arange(1, n_b + 1))
    bin_id = np.cumsum(marks[:-1]) - 1

    inside = bin_id >= 0
    in_bins = np.flatnonzero(inside)
    order = np.lexsort((rate[in_bins], bin_id[in_bins]))
    last_of = np.flatnonzero(np.diff(np.append(bin_id[in_bins][order], n_b)) != 0)
    peak_bin = in_bins[order][last_of]

    spike_id = bin_id[_bin_of(t, start, width, n_bins)]
    hit = spike_id >= 0
    n_spk = np.bincount(spike_id[hit], minlength=n_b)
    pairs = np.unique(spike_id[hit].astype(np.int64) * n + c[hit])
    n_part = np.bincount(pairs // n, minlength=n_b)

    keep = n_part >= min_cells
    ms = 1e3
    df = pd.DataFrame({
        "burst": np.arange(int(keep.sum())),
        "start_ms": (start + first[keep] * width) * ms,
        "stop_ms": (start + past[keep] * width) * ms,
        "duration_ms": (past[keep] - first[keep]) * width * ms,
        "peak_time_ms": (start + (peak_bin[keep] + 0.5) * width) * ms,
        "peak_rate_Hz": rate[peak_bin[keep]],
        "n_spikes": n_spk[keep],
        "n_cells_participating": n_part[keep],
        "cells_participating_fraction": n_part[keep] / n,
    }, columns=list(BURST_COLUMNS))
    df.attrs["threshold_Hz"] = threshold
    return df


# --- state label and summary -------------------------------------------------------------

def state_label(chi: float, threshold: float = SYNCHRONY_THRESHOLD) -> str:
    """Label a population "synchronous" (chi >= threshold) or "asynchronous".

    The threshold (default 0.3) is protolang's own convention: no single published
    source fixes where asynchronous ends. Mind the finite-size bias: chi of ``N``
    independent cells is about ``1/sqrt(N)`` (0.3 for 11 cells), so labels of small
    populations mean little; :func:`summarise_population` reports that level beside chi.

    Args:
        chi: synchrony measure from :func:`golomb_synchrony`.
        threshold: chi at and above which the population counts as synchronous.

    Returns:
        "synchronous", "asynchronous", or "undetermined" when chi is NaN.

    Raises:
        ValueError: threshold outside (0, 1].
    """
    thr = float(threshold)
    if not (0.0 < thr <= 1.0):
        raise ValueError(f"the synchrony threshold must lie in (0, 1], got {threshold!r}")
    chi = float(chi)
    if math.isnan(chi):
        return "undetermined"
    return "synchronous" if chi >= thr else "asynchronous"


#: A state label needs at least this many spikes per active cell in the window: chi of a
#: near-silent population reflects which few cells happened to fire, not their coordination.
STATE_MIN_SPIKES_PER_CELL = 2.0


SUMMARY_COLUMNS = (
    "cell_class", "n_cells", "window_ms", "n_spikes", "active_fraction", "rate_mean_Hz", "rate_sd_Hz",
    "isi_cv_mean", "n_cells_isi_cv", "synchrony_chi", "synchrony_n_cells", "chi_independent_level",
    "count_correlation_mean", "count_correlation_n_pairs", "n_bursts", "burst_rate_Hz",
    "burst_threshold_Hz", "state",
)


def summarise_population(times, cells, classes, start: float, stop: float, *,
                         state_bin: float = STATE_BIN, count_bin: float = COUNT_BIN,
                         threshold: float = SYNCHRONY_THRESHOLD, burst_factor: float = BURST_FACTOR,
                         burst_floor: float = BURST_FLOOR_HZ, burst_chance_p: float = BURST_CHANCE_P,
                         merge_gap: float = BURST_MERGE_GAP,
                         min_cells: int = BURST_MIN_CELLS) -> "pd.DataFrame":
    """One row per cell class, then one over all cells, of the population measures.

    Columns (:data:`SUMMARY_COLUMNS`): ``cell_class`` (class name, or ``"all cells"``),
    ``n_cells``, ``window_ms``, ``n_spikes``, ``active_fraction`` (cells with >= 1 spike),
    ``rate_mean_Hz`` and ``rate_sd_Hz`` over cells (SD with ddof 1), ``isi_cv_mean`` over
    the ``n_cells_isi_cv`` cells with at least 2 intervals, ``synchrony_chi`` on
    ``synchrony_n_cells`` active cells with ``chi_independent_level`` = 1/sqrt(that
    number) (chi expected from independent cells), ``count_correlation_mean`` over
    ``count_correlation_n_pairs`` pairs, ``n_bursts``, ``burst_rate_Hz`` (bursts per
    second), ``burst_threshold_Hz`` and ``state`` (:func:`state_label`; "undetermined" below
    :data:`STATE_MIN_SPIKES_PER_CELL` spikes per active cell). Each class is
    analysed as its own population (its rate per cell of that class, its own bursts).

    Args:
        times: (n_spikes,) spike times (s).
        cells: (n_spikes,) cell index of each spike.
        classes: (n_cells,) class name of each cell; its length is the population size.
        start, stop: observation window (s).
        state_bin: bin of the synchrony measure (s).
        count_bin: bin of the spike-count correlation (s).
        threshold: synchrony threshold of the state label.
        burst_factor, burst_floor, burst_chance_p, merge_gap, min_cells: burst rule (:func:`population_bursts`).

    Returns:
        DataFrame, classes in order of first appearance, the all-cells row last.

    Raises:
        ValueError: bad spikes, window, classes or options.
    """
    import pandas as pd

    cls = _classes(classes)
    t, c, n, start, stop = _spikes(times, cells, cls.size, start, stop)
    names, first_seen, code = np.unique(cls, return_index=True, return_inverse=True)
    if ALL_CELLS in names:
        raise ValueError(f"a cell class is named {ALL_CELLS!r}, the label of the summary row over "
                         "all cells; rename that class")
    order = np.argsort(first_seen)
    local = np.zeros(n, dtype=np.intp)
    groups: list[tuple[str, np.ndarray, np.ndarray, int]] = []
    spike_code = code[c]
    for k in order:
        # Each class becomes its own population, its cells renumbered 0 .. size - 1.
        members = code == k
        local[members] = np.arange(int(members.sum()))
        mask = spike_code == k
        groups.append((str(names[k]), t[mask], local[c[mask]], int(members.sum())))
    groups.append((ALL_CELLS, t, c, n))

    window = stop - start
    rows = []
    for name, gt, gc, gn in groups:
        rates = cell_rates(gt, gc, gn, start, stop)
        cv = isi_cv(gt, gc, gn, start, stop)
        n_cv = int(np.isfinite(cv).sum())
        sync = golomb_synchrony(gt, gc, gn, start, stop, state_bin)
        corr = spike_count_correlation(gt, gc, gn, start, stop, count_bin)
        bursts = population_bursts(gt, gc, gn, start, stop, factor=burst_factor, floor=burst_floor,
                                   chance_p=burst_chance_p, merge_gap=merge_gap, min_cells=min_cells)
        rows.append({
            "cell_class": name,
            "n_cells": gn,
            "window_ms": window * 1e3,
            "n_spikes": int(gt.size),
            "active_fraction": float((rates > 0).mean()),
            "rate_mean_Hz": float(rates.mean()),
            "rate_sd_Hz": float(rates.std(ddof=1)) if gn > 1 else math.nan,
            "isi_cv_mean": float(np.nanmean(cv)) if n_cv else math.nan,
            "n_cells_isi_cv": n_cv,
            "synchrony_chi": sync.chi,
            "synchrony_n_cells": sync.n_cells,
            "chi_independent_level": 1.0 / math.sqrt(sync.n_cells) if sync.n_cells else math.nan,
            "count_correlation_mean": corr.mean,
            "count_correlation_n_pairs": corr.n_pairs,
            "n_bursts": len(bursts),
            "burst_rate_Hz": len(bursts) / window,
            "burst_threshold_Hz": bursts.attrs["threshold_Hz"],
            "state": (state_label(sync.chi, threshold)
                      if gt.size >= STATE_MIN_SPIKES_PER_CELL * max(sync.n_cells, 1) else "undetermined"),
        })
    return pd.DataFrame(rows, columns=list(SUMMARY_COLUMNS))
