"""Tests of the population-activity measures against their definitions' limits, closed forms for Poisson mixtures, numpy's own correlation and textbook ISI statistics."""

from __future__ import annotations

import math
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from protolang.measure import network as N
from protolang.report import network_figures as NF

REPO = Path(__file__).resolve().parents[1]


# --- synthetic spike trains --------------------------------------------------------------

def poisson_train(rng, rate, duration):
    """Homogeneous Poisson train on [0, duration): Poisson count, then uniform sorted times."""
    return np.sort(rng.uniform(0.0, duration, rng.poisson(rate * duration)))


def poisson_population(rng, n_cells, rate, duration):
    """Independent Poisson trains of n_cells cells as flat (times, cells)."""
    counts = rng.poisson(rate * duration, n_cells)
    cells = np.repeat(np.arange(n_cells), counts)
    return rng.uniform(0.0, duration, cells.size), cells


def shared_private_mixture(rng, n_cells, rate_common, rate_private, duration):
    """Every cell fires one common Poisson train plus its own independent Poisson train."""
    common = poisson_train(rng, rate_common, duration)
    t_priv, c_priv = poisson_population(rng, n_cells, rate_private, duration)
    times = np.concatenate([np.tile(common, n_cells), t_priv])
    cells = np.concatenate([np.repeat(np.arange(n_cells), common.size), c_priv])
    return times, cells


def dense_counts(times, cells, n_cells, start, stop, bin_width):
    """(n_cells, n_bins) count matrix, built the slow obvious way with np.histogram per cell."""
    n_bins = max(1, int(round((stop - start) / bin_width)))
    edges = np.linspace(start, stop, n_bins + 1)
    return np.array([np.histogram(times[cells == i], bins=edges)[0] for i in range(n_cells)], dtype=float)


def shuffled(rng, times, cells):
    """The same spikes in random order: no function may rely on sorted input."""
    p = rng.permutation(times.size)
    return times[p], cells[p]


# --- synchrony chi --------------------------------------------------------------------------

def test_chi_is_one_for_identical_trains():
    # Definition's own limit: identical x_i(t) give Var[mean] = mean Var, chi = 1
    # (Golomb 2007, Scholarpedia 2(1):1347, "Neuronal synchrony measures").
    rng = np.random.default_rng(1)
    train = poisson_train(rng, 8.0, 5.0)
    n = 50
    times, cells = shuffled(rng, np.tile(train, n), np.repeat(np.arange(n), train.size))
    chi, used = N.golomb_synchrony(times, cells, n, 0.0, 5.0)
    assert used == n
    assert abs(chi - 1.0) < 1e-12


def test_chi_ignores_silent_cells():
    # Silent cells have zero variance and are excluded, so adding them leaves chi at its
    # identical-train limit of 1 (Golomb 2007, Scholarpedia: chi defined on active cells here).
    rng = np.random.default_rng(2)
    train = poisson_train(rng, 8.0, 5.0)
    times, cells = np.tile(train, 10), np.repeat(np.arange(10), train.size)
    chi, used = N.golomb_synchrony(times, cells, 40, 0.0, 5.0)
    assert used == 10 and abs(chi - 1.0) < 1e-12
    chi_one, used_one = N.golomb_synchrony(train, np.zeros(train.size, int), 40, 0.0, 5.0)
    assert used_one == 1 and math.isnan(chi_one)


def test_chi_near_zero_for_independent_poisson_trains():
    # Definition's limit with its finite-N bias: for N independent cells chi^2 -> 1/N, so
    # chi ~ 1/sqrt(N) (Golomb 2007, Scholarpedia 2(1):1347); the bound 3/sqrt(N) must hold.
    rng = np.random.default_rng(3)
    n, duration = 200, 10.0
    times, cells = poisson_population(rng, n, 10.0, duration)
    chi, used = N.golomb_synchrony(times, cells, n, 0.0, duration)
    assert used == n
    assert chi < 3.0 / math.sqrt(n)
    # Closed form of the bias (variance of a mean of N independent signals is 1/N of theirs,
    # common practice): N chi^2 -> 1, here within sampling error of 2000 bins (SE ~ 0.03).
    assert n * chi ** 2 == pytest.approx(1.0, abs=0.15)


def test_shared_private_mixture_closed_form():
    # Closed form, common practice (no single source). With counts in bins of width d,
    # x_i = C + P_i, C ~ Poisson(rc d) common to all cells, P_i ~ Poisson(ri d) independent:
    #   Var x_i = (rc + ri) d;  mean_i x_i = C + (1/N) sum_i P_i, Var = rc d + ri d / N;
    #   chi^2 = Var[mean] / mean Var = (rc + ri/N) / (rc + ri);
    #   Cov(x_i, x_j) = Var C = rc d, so the pair correlation is rc / (rc + ri).
    # Both hold for any bin width. Spread over 20 seeds was SD 0.0065 for both estimates.
    rng = np.random.default_rng(4)
    n, rc, ri, duration = 100, 5.0, 15.0, 200.0
    times, cells = shared_private_mixture(rng, n, rc, ri, duration)
    chi, used = N.golomb_synchrony(times, cells, n, 0.0, duration)
    assert used == n
    assert chi ** 2 == pytest.approx((rc + ri / n) / (rc + ri), abs=0.03)
    corr, pairs = N.spike_count_correlation(times, cells, n, 0.0, duration)
    assert pairs == n * (n - 1) // 2
    assert corr == pytest.approx(rc / (rc + ri), abs=0.03)
    assert N.state_label(chi) == "synchronous"      # chi ~ 0.51


def test_chi_and_correlation_match_dense_numpy_computation():
    # Independent general-purpose implementation: numpy's corrcoef and var on the dense
    # count matrix built with np.histogram, against the sparse vectorised formulas.
    rng = np.random.default_rng(5)
    n, start, stop, width = 30, 0.25, 4.25, 7e-3
    times, cells = shared_private_mixture(rng, n, 3.0, 12.0, 5.0)
    # Cells 27-29 silent in the window; cell 26 has a single spike.
    keep = cells < 26
    times, cells = np.append(times[keep], 1.0), np.append(cells[keep], 26)
    times, cells = shuffled(rng, times, cells)
    x = dense_counts(times, cells, n, start, stop, width)
    active = x.var(axis=1) > 0
    xa = x[active]
    chi_ref = math.sqrt(xa.mean(axis=0).var() / xa.var(axis=1).mean())
    r = np.corrcoef(xa)
    r_ref = r[np.triu_indices(xa.shape[0], k=1)].mean()

    chi, used = N.golomb_synchrony(times, cells, n, start, stop, bin_width=width)
    corr, pairs = N.spike_count_correlation(times, cells, n, start, stop, bin_width=width)
    assert used == int(active.sum()) == 27
    assert chi == pytest.approx(chi_ref, abs=1e-12)
    assert pairs == 27 * 26 // 2
    assert corr == pytest.approx(r_ref, abs=1e-12)


def test_chi_and_correlation_identity_for_equal_variances():
    # Exact algebra (common practice, no single source): Var[mean_i x_i] =
    # (1/N^2)(sum_i Var x_i + sum_{i != j} Cov_ij); with equal variances this gives
    # chi^2 = 1/N + (1 - 1/N) r, r the mean pair correlation. Cells here are circular
    # shifts by whole bins of one count sequence, so their count variances are identical.
    rng = np.random.default_rng(15)
    n, n_bins, width = 40, 800, 5e-3
    base = rng.poisson(0.3, n_bins) + (rng.random(n_bins) < 0.2) * rng.poisson(2.0, n_bins)
    shifts = rng.integers(0, 6, n)          # small shifts keep the cells correlated
    counts = np.array([np.roll(base, k) for k in shifts])
    cell_idx, bin_idx = np.nonzero(counts)
    reps = counts[cell_idx, bin_idx]
    cells = np.repeat(cell_idx, reps)
    times = (np.repeat(bin_idx, reps) + 0.5) * width       # bin centres: no edge round-off
    chi, _ = N.golomb_synchrony(times, cells, n, 0.0, n_bins * width, bin_width=width)
    r, _ = N.spike_count_correlation(times, cells, n, 0.0, n_bins * width, bin_width=width)
    assert 0.1 < r < 0.9
    assert chi ** 2 == pytest.approx(1.0 / n + (1.0 - 1.0 / n) * r, abs=1e-12)


# --- ISI CV -------------------------------------------------------------------------------

def test_isi_cv_poisson_periodic_and_gamma():
    # Textbook: CV of ISIs is 1 for a Poisson process, 0 for a periodic train, and
    # 1/sqrt(k) for a gamma-renewal process of shape k (Dayan and Abbott 2001,
    # Theoretical Neuroscience, ch. 1).
    rng = np.random.default_rng(6)
    duration = 500.0
    poisson = poisson_train(rng, 20.0, duration)
    periodic = np.arange(0.0037, duration, 0.1)
    gamma = np.cumsum(rng.gamma(4.0, 1.0 / (4.0 * 20.0), 12000))
    gamma = gamma[gamma < duration]
    lone = np.array([3.0, 4.0])                 # one interval: too few
    trains = [poisson, periodic, gamma, lone]   # cell 4 is silent
    times = np.concatenate(trains)
    cells = np.concatenate([np.full(tr.size, i) for i, tr in enumerate(trains)])
    times, cells = shuffled(rng, times, cells)
    cv = N.isi_cv(times, cells, 5, 0.0, duration)
    assert cv[0] == pytest.approx(1.0, abs=0.04)        # SE ~ 0.01 with 10^4 intervals
    assert cv[1] == pytest.approx(0.0, abs=1e-9)
    assert cv[2] == pytest.approx(0.5, abs=0.03)
    assert math.isnan(cv[3]) and math.isnan(cv[4])


def test_isi_cv_uses_only_intervals_inside_the_window():
    # Hand count: spikes 0.1, 0.2, 0.4 inside [0, 1) give intervals 0.1 and 0.2:
    # mean 0.15, SD 0.05, CV 1/3; the spike at 5 s lies outside and must not add an interval.
    cv = N.isi_cv([0.1, 0.2, 0.4, 5.0], [0, 0, 0, 0], 1, 0.0, 1.0)
    assert cv[0] == pytest.approx(1.0 / 3.0, rel=1e-12)


# --- rates ----------------------------------------------------------------------------------

def test_cell_rates_against_hand_counts():
    # Hand counts in [0, 2) s: cell 0 fires at 0.1 and 0.2 (2.5 s is outside), cell 1 at
    # 0.5 and 1.5 and 1.999, cell 2 never; a spike at exactly stop is outside [start, stop).
    times = [0.1, 0.2, 0.5, 1.5, 2.5, 1.999, 2.0]
    cells = [0, 0, 1, 1, 0, 1, 2]
    rates = N.cell_rates(times, cells, 3, 0.0, 2.0)
    np.testing.assert_allclose(rates, [1.0, 1.5, 0.0])


def test_population_rate_hand_bins_and_integral():
    # Hand count: 4 cells, 10 ms bins on [0, 0.05): spikes at 1, 3, 4 ms (bin 0) and 25 ms
    # (bin 2): rates 3 / (4 x 0.01) = 75 Hz and 25 Hz per cell.
    centres, rate = N.population_rate([0.001, 0.003, 0.004, 0.025], 4, 0.0, 0.05, bin_width=0.01, smooth_sd=0.0)
    np.testing.assert_allclose(centres, [0.005, 0.015, 0.025, 0.035, 0.045])
    np.testing.assert_allclose(rate, [75.0, 0.0, 25.0, 0.0, 0.0])

    # Integral of the rate over time equals spikes / n_cells, smoothed or not (a spike is
    # one spike: common practice); spikes sit near both edges to test the reflection.
    rng = np.random.default_rng(7)
    n, start, stop = 60, 0.5, 2.5
    times, _ = poisson_population(rng, n, 12.0, 3.0)
    times = np.concatenate([times, [0.5, 0.5001, 2.4999]])
    inside = int(((times >= start) & (times < stop)).sum())
    for sd in (0.0, 2e-3, 20e-3):
        centres, rate = N.population_rate(times, n, start, stop, bin_width=1e-3, smooth_sd=sd)
        width = centres[1] - centres[0]
        assert rate.sum() * width == pytest.approx(inside / n, rel=1e-12)


def test_population_rate_of_one_spike_is_a_gaussian():
    # Closed form: one spike smoothed by a unit-area Gaussian of SD s peaks at
    # 1 / (n sqrt(2 pi) s) per cell (sampled at 1 ms bins, s = 2 ms: within 0.1 %).
    n, sd = 10, 2e-3
    centres, rate = N.population_rate([0.1005], n, 0.0, 0.2, bin_width=1e-3, smooth_sd=sd)
    assert centres[np.argmax(rate)] == pytest.approx(0.1005)
    assert rate.max() == pytest.approx(1.0 / (n * math.sqrt(2 * math.pi) * sd), rel=1e-3)


def test_bin_width_is_adjusted_to_tile_the_window():
    # 1.0035 s does not hold whole 5 ms bins: 201 bins of 4.9925 ms are used instead, and no
    # spike (one just below stop) is lost.
    centres, rate = N.population_rate([1.0034], 1, 0.0, 1.0035, bin_width=5e-3, smooth_sd=0.0)
    assert centres.size == 201
    assert centres[1] - centres[0] == pytest.approx(1.0035 / 201)
    assert rate.sum() * (1.0035 / 201) == pytest.approx(1.0)
    assert rate[-1] > 0


# --- bursts ---------------------------------------------------------------------------------

def volleys_on_background(rng, n, rate, duration, volley_times, fraction, jitter):
    """Poisson background plus volleys in which a random fraction of cells fire once each."""
    times, cells = poisson_population(rng, n, rate, duration)
    extra_t, extra_c = [times], [cells]
    for tv in volley_times:
        who = rng.choice(n, size=int(fraction * n), replace=False)
        extra_t.append(tv + rng.normal(0.0, jitter, who.size))
        extra_c.append(who)
    return np.concatenate(extra_t), np.concatenate(extra_c)


def test_planted_volleys_are_found_at_their_times():
    # Planted ground truth (no outside source needed): 3 volleys, each half the cells
    # firing within ~2 ms, on a 5 Hz Poisson background.
    rng = np.random.default_rng(8)
    n, duration, planted = 400, 3.0, [0.6, 1.4, 2.2]
    times, cells = volleys_on_background(rng, n, 5.0, duration, planted, 0.5, 2e-3)
    bursts = N.population_bursts(times, cells, n, 0.0, duration)
    assert list(bursts.columns) == list(N.BURST_COLUMNS)
    assert len(bursts) == 3
    planted_ms = np.array(planted) * 1e3
    np.testing.assert_allclose(bursts["peak_time_ms"], planted_ms, atol=3.0)
    assert (bursts["start_ms"] < planted_ms).all() and (bursts["stop_ms"] > planted_ms).all()
    assert (bursts["duration_ms"] < 20.0).all()
    # Half the cells volley; a few background spikes in the same ~10 ms add at most a few %.
    assert ((bursts["cells_participating_fraction"] >= 0.45) & (bursts["cells_participating_fraction"] < 0.6)).all()
    # Peak: 200 spikes with SD 2 ms, smoothed by SD 2 ms -> 200 / (400 sqrt(2 pi) 2.83 ms) ~ 70 Hz
    # per cell on top of 5 Hz (closed form of two convolved Gaussians).
    assert ((bursts["peak_rate_Hz"] > 50.0) & (bursts["peak_rate_Hz"] < 95.0)).all()
    assert bursts.attrs["threshold_Hz"] == pytest.approx(4.0 * 5.0, rel=0.2)


def test_no_bursts_in_pure_poisson_background():
    # Independent Poisson cells have no population events (definition of independence),
    # large or small populations, low or high rates.
    rng = np.random.default_rng(9)
    for n, rate in ((400, 5.0), (400, 20.0), (50, 5.0), (10, 5.0)):
        times, cells = poisson_population(rng, n, rate, 20.0)
        assert len(N.population_bursts(times, cells, n, 0.0, 20.0)) == 0, (n, rate)


def test_chance_level_is_what_keeps_small_populations_quiet():
    # Without the Poisson chance level, 50 independent cells cross 4 x median on chance
    # coincidences of a few spikes (measured here: it must find some; the rule's reason).
    rng = np.random.default_rng(14)
    times, cells = poisson_population(rng, 50, 5.0, 20.0)
    assert len(N.population_bursts(times, cells, 50, 0.0, 20.0, chance_p=0.0)) > 0
    assert len(N.population_bursts(times, cells, 50, 0.0, 20.0)) == 0


@pytest.mark.parametrize("mean", [0.01, 0.25, 1.77, 10.0, 250.0, 2000.0])
def test_poisson_upper_quantile_matches_scipy(mean):
    # Independent general-purpose library: scipy.stats.poisson survival function.
    from scipy.stats import poisson

    m = N._poisson_upper(mean, 1e-6)
    assert poisson.sf(m - 1, mean) <= 1e-6 < poisson.sf(m - 2, mean)


def test_bursts_closer_than_the_gap_merge():
    # The rule itself: two volleys 15 ms apart are two bursts with no merging and one with a
    # 20 ms merge gap (the rate dips below threshold between them).
    rng = np.random.default_rng(10)
    n = 300
    times, cells = volleys_on_background(rng, n, 2.0, 1.0, [0.400, 0.415], 0.6, 0.5e-3)
    apart = N.population_bursts(times, cells, n, 0.0, 1.0, merge_gap=0.0)
    merged = N.population_bursts(times, cells, n, 0.0, 1.0, merge_gap=0.020)
    assert len(apart) == 2 and len(merged) == 1
    assert merged["start_ms"].iloc[0] == apart["start_ms"].iloc[0]
    assert merged["stop_ms"].iloc[0] == apart["stop_ms"].iloc[1]
    assert merged["n_spikes"].iloc[0] >= apart["n_spikes"].sum()


# --- state label and errors ----------------------------------------------------------------

def test_state_label_both_sides_of_threshold():
    # protolang's own convention (threshold 0.3), checked on both sides and at the edge.
    assert N.SYNCHRONY_THRESHOLD == 0.3
    assert N.state_label(0.29) == "asynchronous"
    assert N.state_label(0.3) == "synchronous"
    assert N.state_label(0.9) == "synchronous"
    assert N.state_label(0.5, threshold=0.6) == "asynchronous"
    assert N.state_label(math.nan) == "undetermined"
    with pytest.raises(ValueError, match=r"threshold must lie in \(0, 1\]"):
        N.state_label(0.5, threshold=0.0)


@pytest.mark.parametrize("call, message", [
    (lambda: N.cell_rates([0.1], [0], 1, 2.0, 1.0), r"window is empty or negative: start 2.0 s, stop 1.0 s"),
    (lambda: N.golomb_synchrony([0.1], [0], 1, 1.0, 1.0), r"window is empty or negative"),
    (lambda: N.cell_rates([0.1, 0.2], [0, 3], 3, 0.0, 1.0), r"cells\[1\] is 3, outside 0..2 \(n_cells = 3\)"),
    (lambda: N.isi_cv([0.1, 0.2], [-1, 0], 3, 0.0, 1.0), r"cells\[0\] is -1, outside 0..2"),
    (lambda: N.cell_rates([0.1, 0.2], [0], 3, 0.0, 1.0), r"times and cells differ in length \(2 vs 1\)"),
    (lambda: N.cell_rates([0.1], [0.5], 3, 0.0, 1.0), r"whole-number cell indices"),
    (lambda: N.cell_rates([math.nan], [0], 3, 0.0, 1.0), r"times\[0\] is nan"),
    (lambda: N.cell_rates([0.1], [0], 0, 0.0, 1.0), r"n_cells must be a whole number of cells >= 1"),
    (lambda: N.population_rate([0.1], 3, 0.0, 1.0, bin_width=0.0), r"bin_width must be a positive number in s"),
    (lambda: N.population_rate([0.1], 3, 0.0, 1.0, smooth_sd=-1e-3), r"smooth_sd must be a number >= 0 in s"),
    (lambda: N.isi_cv([0.1], [0], 1, 0.0, 1.0, min_intervals=1), r"min_intervals must be a whole number >= 2"),
    (lambda: N.summarise_population([0.1], [0], ["a", "all cells"], 0.0, 1.0), r"named 'all cells'"),
    (lambda: N.summarise_population([0.1], [2], ["a", "b"], 0.0, 1.0), r"cells\[0\] is 2, outside 0..1"),
])
def test_bad_input_raises_clear_value_error(call, message):
    with pytest.raises(ValueError, match=message):
        call()


def test_whole_float_cell_indices_are_accepted():
    # Cell indices read back from a CSV arrive as floats.
    np.testing.assert_allclose(N.cell_rates([0.1, 0.2], [1.0, 1.0], 2, 0.0, 1.0), [0.0, 2.0])


# --- summary ---------------------------------------------------------------------------------

def test_summarise_population_per_class_and_all():
    rng = np.random.default_rng(11)
    duration = 4.0
    # Class "locked": 30 cells firing one identical train (chi = 1, Golomb 2007 limit);
    # class "free": 300 independent Poisson cells (chi ~ 1/sqrt(300)); 10 silent "free" cells.
    train = poisson_train(rng, 6.0, duration)
    t_lock, c_lock = np.tile(train, 30), np.repeat(np.arange(30), train.size)
    t_free, c_free = poisson_population(rng, 300, 8.0, duration)
    times = np.concatenate([t_lock, t_free])
    cells = np.concatenate([c_lock, c_free + 30])
    classes = np.array(["locked"] * 30 + ["free"] * 310)
    df = N.summarise_population(times, cells, classes, 0.0, duration)
    assert list(df.columns) == list(N.SUMMARY_COLUMNS)
    assert list(df["cell_class"]) == ["locked", "free", N.ALL_CELLS]
    locked, free, every = (df.iloc[i] for i in range(3))

    assert locked["n_cells"] == 30 and locked["n_spikes"] == 30 * train.size
    assert locked["synchrony_chi"] == pytest.approx(1.0, abs=1e-12)
    assert locked["count_correlation_mean"] == pytest.approx(1.0, abs=1e-12)
    assert locked["state"] == "synchronous"
    assert locked["rate_mean_Hz"] == pytest.approx(train.size / duration)
    assert locked["rate_sd_Hz"] == pytest.approx(0.0, abs=1e-12)

    assert free["n_cells"] == 310 and free["active_fraction"] == pytest.approx(300 / 310)
    assert free["synchrony_n_cells"] == 300
    assert free["chi_independent_level"] == pytest.approx(1 / math.sqrt(300))
    assert free["synchrony_chi"] < 3 / math.sqrt(300)
    assert free["state"] == "asynchronous"
    assert free["n_cells_isi_cv"] == 300
    # ISI CV of Poisson trains of ~32 spikes: near 1, biased a little low by short trains.
    assert 0.85 < free["isi_cv_mean"] < 1.05
    assert abs(free["count_correlation_mean"]) < 0.01

    assert every["n_cells"] == 340 and every["n_spikes"] == times.size
    assert every["rate_mean_Hz"] == pytest.approx(times.size / (340 * duration))
    # Every spike of the locked class is a volley of all its cells; volleys closer than the
    # 10 ms merge gap (plus the kernel's reach) fuse. No gap of this train sits in the
    # ambiguous 10-30 ms band, so the expected count is exact.
    gaps = np.diff(train)
    assert not ((gaps > 0.010) & (gaps < 0.030)).any()
    assert locked["n_bursts"] == 1 + int((gaps >= 0.030).sum())
    assert locked["burst_rate_Hz"] == pytest.approx(locked["n_bursts"] / duration)
    assert free["n_bursts"] == 0 and every["n_bursts"] == 0


def test_summarise_population_is_fast_at_scale():
    # 5,000 cells x 2 s x 10 Hz (~100k spikes) must take well under a second.
    rng = np.random.default_rng(12)
    n, duration = 5000, 2.0
    times, cells = poisson_population(rng, n, 10.0, duration)
    classes = np.array(["pyr"] * 4000 + ["fast"] * 600 + ["slow"] * 400)
    N.summarise_population(times[:10], cells[:10], classes, 0.0, duration)     # warm caches
    t0 = time.perf_counter()
    df = N.summarise_population(times, cells, classes, 0.0, duration)
    elapsed = time.perf_counter() - t0
    assert elapsed < 1.0, f"summarise_population took {elapsed:.2f} s"
    assert df["n_spikes"].iloc[-1] == times.size


def test_measure_module_imports_only_numpy():
    # The collectors must stay importable without Brian2, matplotlib or pandas at import time.
    code = ("import sys, protolang.measure.network, protolang.report.network_figures; "
            "print(sorted(m for m in ('brian2', 'matplotlib', 'pandas') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=REPO,
                         env={"PYTHONPATH": str(REPO), "PATH": "/usr/bin:/bin"}, check=True)
    assert out.stdout.strip() == "[]"


# --- figures -------------------------------------------------------------------------------------

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def test_figures_write_png(tmp_path):
    rng = np.random.default_rng(13)
    n, duration = 600, 2.0
    times, cells = volleys_on_background(rng, n, 5.0, duration, [0.5, 1.5], 0.4, 2e-3)
    classes = np.array(["pyramidal"] * 450 + ["basket"] * 150)
    bursts = N.population_bursts(times, cells, n, 0.0, duration)
    assert len(bursts) == 2

    raster = NF.raster_figure(tmp_path / "fig" / "raster.png", times, cells, classes, 0.0, duration,
                              max_cells_per_class=80)
    rate = NF.population_rate_figure(tmp_path / "rate.png", times, cells, classes, 0.0, duration, bursts=bursts)
    plain = NF.population_rate_figure(tmp_path / "plain.png", times, cells, classes, 0.0, duration)
    for path in (raster, rate, plain):
        assert path.exists() and path.stat().st_size > 5000
        assert path.read_bytes()[:8] == PNG_SIGNATURE
    assert sorted(p.name for p in tmp_path.rglob("*")) == ["fig", "plain.png", "raster.png", "rate.png"]
    with pytest.raises(ValueError, match="start_ms"):
        NF.population_rate_figure(tmp_path / "bad.png", times, cells, classes, 0.0, duration, bursts={"x": [1]})


def test_near_silent_population_gets_no_state_label():
    # chi of a handful of spikes says which cells happened to fire, not how they are coordinated
    # (protolang's rule, no single source): 3 spikes over 3 cells are below 2 spikes per active cell
    times = np.array([0.1, 0.5, 0.9])
    cells = np.array([0, 1, 2])
    table = N.summarise_population(times, cells, np.array(["a"] * 10), 0.0, 1.0)
    assert (table["state"] == "undetermined").all()
