"""Connectivity statistics of multi-cell recordings: tested and connected cell pairs in, connection probabilities, confidence intervals, reciprocity and degree tables out.

A multi-cell patch records up to a dozen neighbouring cells at once; every ordered pair
(pre, post) is tested by making the presynaptic cell fire and looking for a spike-triggered
response in the postsynaptic one. The numbers a lab reports from such recordings
("virtual anatomy") are computed here from plain arrays, so simulated and imported
recordings go through the same code. Units are SI in (volts or amperes, seconds, metres);
tables show distances in um.

Definitions (each repeated where it is coded):

* **connection criterion** (:func:`detect_response`): average the postsynaptic trace
  around every presynaptic spike, subtract the mean of the ``baseline`` window before the
  spike, take the largest deviation (sign kept) in the latency window, and call the pair
  connected when it exceeds ``factor`` times the noise SD of the averaged trace and an
  absolute floor.
* **connection probability** of a group of ordered pairs: connected / tested, with the
  Wilson score interval (Wilson 1927, J Am Stat Assoc 22:209-212).
* **exact binomial test**: p-values summed from binomial probabilities; two-sided sums
  every outcome no more likely than the observed one.
* **reciprocity**: unordered pairs tested in both directions, connected both ways, compared
  with the count expected if the two directions were independent.
* **degree**: connections a cell receives from (in) or sends to (out) the cells patched
  with it.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from statistics import NormalDist

import numpy as np

UM = 1e6                        # metres -> um for table columns
# s after the presynaptic spike searched for the response peak; unitary EPSPs of cortical
# pyramids in current clamp peak several ms after the spike (common practice, no single source)
DEFAULT_LATENCY = (0.5e-3, 15e-3)
PEAK_MARGIN = 1e-3               # s: an extremum this close to the window's end is a drift, not a peak
DEFAULT_BASELINE = 3e-3         # s before the spike averaged as the baseline
DEFAULT_NOISE_STRETCH = 10e-3   # s before the spike whose SD is the noise
DEFAULT_FACTOR = 4.0            # detection threshold in noise SDs
DEFAULT_MIN_EVENTS = 10         # usable presynaptic spikes needed for a verdict

# Relative tolerance of "no more likely than the observed outcome" in the two-sided exact
# test: binomial probabilities computed along different paths differ in the last bits, and
# an outcome exactly as likely as the observed one must not drop out by round-off. 1e-7 is
# the value common statistics packages use (common practice, no single source).
_TWO_SIDED_RTOL = 1e-7
# A time exactly on a sample must count as that sample despite float round-off.
_EPS_SAMPLES = 1e-6
# Largest (rows x outcomes) block of probabilities the two-sided test builds at once.
_BLOCK = 2_000_000


# --- proportions ---------------------------------------------------------------------------

def _counts(k, n) -> tuple[np.ndarray, np.ndarray]:
    """Broadcast ``k`` and ``n`` to float arrays and check they are counts with k <= n."""
    k = np.asarray(k, dtype=float)
    n = np.asarray(n, dtype=float)
    try:
        k, n = np.broadcast_arrays(k, n)
    except ValueError:
        raise ValueError(f"successes k (shape {k.shape}) and trials n (shape {n.shape}) do not broadcast; "
                         "pass arrays of equal length") from None
    for name, a in (("successes k", k), ("trials n", n)):
        ok = np.isfinite(a) & (a >= 0) & (a == np.round(a))
        if not np.all(ok):
            raise ValueError(f"{name} must be whole numbers >= 0, got {np.atleast_1d(a)[~np.atleast_1d(ok)][:3]!r}; "
                             "pass counts of pairs")
    if np.any(k > n):
        bad = np.atleast_1d(k > n)
        raise ValueError(f"successes k exceed trials n (k={np.atleast_1d(k)[bad][:3]!r}, "
                         f"n={np.atleast_1d(n)[bad][:3]!r}); "
                         "a count of connected pairs cannot exceed the pairs tested")
    return k, n


def _probability(p, name: str = "p") -> np.ndarray:
    p = np.asarray(p, dtype=float)
    ok = np.isfinite(p) & (p >= 0) & (p <= 1)
    if not np.all(ok):
        bad = np.atleast_1d(p)[~np.atleast_1d(ok)]
        raise ValueError(f"{name} must be a probability in [0, 1], got {bad[:3]!r}")
    return p


def _z(confidence: float) -> float:
    if not (isinstance(confidence, (int, float)) and 0.0 < confidence < 1.0):
        raise ValueError(f"confidence must be a number strictly between 0 and 1 (e.g. 0.95), got {confidence!r}")
    return NormalDist().inv_cdf(0.5 + 0.5 * float(confidence))


def wilson_interval(k, n, confidence: float = 0.95):
    """Wilson score interval of a binomial proportion (Wilson 1927, J Am Stat Assoc 22:209-212).

    The interval is the set of p whose score test does not reject ``k`` of ``n`` at the
    given confidence: with ``z`` the two-sided normal quantile and ``phat = k / n``,

        centre = (phat + z^2 / (2n)) / (1 + z^2 / n)
        half   = z / (1 + z^2 / n) * sqrt(phat (1 - phat) / n + z^2 / (4 n^2))

    Unlike the textbook ``phat +- z SE`` interval it stays inside [0, 1] and does not
    collapse to a point at k = 0 or k = n, which are common in connectivity bins.

    For ``n = 0`` the interval is (0, 1): multiplying through by n, the closed form is
    ``(2k + z^2 -+ z sqrt(z^2 + 4k(n-k)/n)) / (2(n + z^2))``, which at k = n = 0 gives
    exactly 0 and 1: no pairs tested, every probability remains possible. Returning the
    uninformative interval rather than NaN keeps tables and plots free of special cases
    (the point estimate k / n is NaN there and says "not measured").

    Args:
        k: successes (array-like of whole numbers >= 0).
        n: trials (array-like of whole numbers >= k), broadcast against ``k``.
        confidence: two-sided confidence level in (0, 1).

    Returns:
        ``(low, high)``: floats for scalar input, arrays of the broadcast shape otherwise.

    Raises:
        ValueError: on negative or fractional counts, k > n, or a confidence outside (0, 1).
    """
    scalar = np.ndim(k) == 0 and np.ndim(n) == 0
    k, n = _counts(k, n)
    z = _z(confidence)
    z2 = z * z
    with np.errstate(invalid="ignore", divide="ignore"):
        # k (n - k) / n written so that n = 0 gives 0, not 0/0.
        spread = np.where(n > 0, k * (n - k) / np.where(n > 0, n, 1.0), 0.0)
        denom = 2.0 * (n + z2)
        centre = (2.0 * k + z2) / denom
        half = z * np.sqrt(z2 + 4.0 * spread) / denom
    low = np.where(k == 0, 0.0, centre - half)
    high = np.where(k == n, 1.0, centre + half)
    # Round-off can push an endpoint a hair outside [0, 1].
    low = np.clip(low, 0.0, 1.0)
    high = np.clip(high, 0.0, 1.0)
    if scalar:
        return float(low), float(high)
    return low, high


def binomial_test(k, n, p, alternative: str = "two-sided"):
    """Exact binomial test of ``k`` successes in ``n`` trials against success probability ``p``.

    * ``"greater"``: P(X >= k); ``"less"``: P(X <= k), X ~ Binomial(n, p).
    * ``"two-sided"``: the sum of P(X = j) over every outcome j no more likely than the
      observed one, P(X = j) <= P(X = k) (1 + 1e-7); the small relative tolerance keeps
      outcomes exactly as likely as k from being dropped by round-off. This is the usual
      rule of the exact test (common practice, no single source); it needs no symmetry of
      the distribution, unlike doubling the smaller tail.

    Binomial probabilities come from ``scipy.stats.binom``; the test logic is this function's.

    Args:
        k: successes (array-like of whole numbers >= 0).
        n: trials (array-like of whole numbers >= k).
        p: success probability under the null hypothesis, in [0, 1].
        alternative: ``"two-sided"``, ``"greater"`` or ``"less"``.

    Returns:
        The p-value (float for scalar input, array of the broadcast shape otherwise), at most 1.

    Raises:
        ValueError: on bad counts, ``k > n``, ``p`` outside [0, 1] or an unknown alternative.
    """
    from scipy.stats import binom

    if alternative not in ("two-sided", "greater", "less"):
        raise ValueError(f"alternative must be 'two-sided', 'greater' or 'less', got {alternative!r}")
    scalar = np.ndim(k) == 0 and np.ndim(n) == 0 and np.ndim(p) == 0
    k, n = _counts(k, n)
    p = _probability(p, "null probability p")
    try:
        k, n, p = np.broadcast_arrays(k, n, p)
    except ValueError:
        raise ValueError(f"k, n and p have shapes {k.shape}, {n.shape}, {p.shape}, which do not broadcast; "
                         "pass arrays of equal length") from None
    if alternative == "greater":
        out = binom.sf(k - 1.0, n, p)
    elif alternative == "less":
        out = binom.cdf(k, n, p)
    else:
        out = _two_sided(k.ravel(), n.ravel(), p.ravel()).reshape(k.shape)
    out = np.minimum(np.asarray(out, dtype=float), 1.0)
    return float(out) if scalar else out


def _two_sided(k: np.ndarray, n: np.ndarray, p: np.ndarray) -> np.ndarray:
    """Two-sided exact p-values for flat arrays, in blocks so the outcome grid stays small."""
    from scipy.stats import binom

    out = np.empty(k.size)
    if k.size == 0:
        return out
    width = int(n.max()) + 1
    rows = max(1, _BLOCK // width)
    outcomes = np.arange(width, dtype=float)
    for s in range(0, k.size, rows):
        kk, nn, pp = k[s:s + rows, None], n[s:s + rows, None], p[s:s + rows, None]
        # Outcomes beyond a row's n have probability 0 and add nothing to the sum.
        pmf = binom.pmf(outcomes[None, :], nn, pp)
        observed = binom.pmf(kk, nn, pp)
        out[s:s + rows] = np.sum(np.where(pmf <= observed * (1.0 + _TWO_SIDED_RTOL), pmf, 0.0), axis=1)
    return out


# --- the connection criterion ----------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class ResponseDetection:
    """Verdict of the connection criterion for one ordered pair, SI units of the trace.

    Attributes:
        amplitude: signed extremum of the baseline-subtracted spike-triggered average in
            the latency window (V or A); NaN without usable spikes.
        noise: SD of the spike-triggered average over the noise stretch (V or A).
        latency: presynaptic spike to the extremum (s).
        n_events: presynaptic spikes averaged.
        tested: at least ``min_events`` spikes were usable, so the verdict counts as a test.
        detected: tested, |amplitude| above both ``factor * noise`` and ``floor``, and the
            extremum a peak inside the latency window.
        threshold: the level |amplitude| had to exceed (V or A).
        time: (n_window,) time of each averaged sample from the spike (s).
        average: (n_window,) baseline-subtracted spike-triggered average (V or A).
    """

    amplitude: float
    noise: float
    latency: float
    n_events: int
    tested: bool
    detected: bool
    threshold: float
    time: np.ndarray
    average: np.ndarray


def detect_response(trace, sample_dt: float, spike_times: Sequence, *,
                    latency: tuple[float, float] = DEFAULT_LATENCY,
                    baseline: float = DEFAULT_BASELINE,
                    noise_stretch: float = DEFAULT_NOISE_STRETCH,
                    factor: float = DEFAULT_FACTOR, floor: float = 0.0,
                    min_events: int = DEFAULT_MIN_EVENTS, t0: float = 0.0,
                    detrend: bool = True) -> ResponseDetection:
    """Decide whether one postsynaptic cell responds to a presynaptic cell's spikes.

    Procedure:

    1. Every presynaptic spike of every sweep is aligned to the nearest sample; spikes
       whose window (``max(baseline, noise_stretch)`` before to ``latency[1]`` after) does
       not fit inside the sweep, or covers a non-finite sample, are skipped.
    2. The windows are averaged (spike-triggered average, STA). With ``detrend`` (default) a
       straight line fitted to the STA over ``[spike - noise_stretch, spike)`` is carried on
       through the response window and subtracted (a membrane still relaxing from the cell's
       own earlier spikes would otherwise look like a response); then the mean over
       ``[spike - baseline, spike)`` is subtracted.
    3. The response is the sample of largest absolute deviation in
       ``[spike + latency[0], spike + latency[1]]``, its sign kept, so inhibitory responses
       come out negative. Its latency is measured from the spike's exact time (the
       average sub-sample offset of the alignment is removed).
    4. The noise is the SD of the STA over ``[spike - noise_stretch, spike)`` after a
       straight line has been fitted and removed. It is the STA's own noise (the raw
       recording noise divided by about sqrt(n_events) for uncorrelated events), which is
       what the extremum must stand out from. The stretch (10 ms by default) is longer
       than the baseline window because an SD from the 30 samples of a 3 ms window at
       10 kHz has a relative standard error of about 1/sqrt(2 x 29) = 13 %; an
       underestimate of that size lowers a 4 SD threshold to 3.5 SD and multiplies the
       false-positive rate about sevenfold. 100 samples bring the error to about 7 %.
       Removing the line keeps the decaying tail of the response to an earlier spike of a
       train (which the STA also averages) from counting as noise.
    5. Connected when at least ``min_events`` spikes were used, |amplitude| exceeds both
       ``factor x noise`` and ``floor``, and the extremum is a peak: it lies more than
       :data:`PEAK_MARGIN` before the end of the latency window (a deflection still growing
       there is a slow drift of the membrane, not a synaptic response).

    With white noise the per-pair false-positive rate at factor 4 is roughly the number of
    samples in the latency window times 2 Phi(-4) = 6.3e-5 (about 0.5 % for 76 samples at
    10 kHz); correlated noise has fewer independent samples and a lower rate.

    Args:
        trace: (n_sweeps, n_samples) postsynaptic recording (V or A).
        sample_dt: sampling interval (s).
        spike_times: one array of presynaptic spike times (s, sweep time) per sweep.
        latency: ``(earliest, latest)`` time after the spike searched for the response (s).
        baseline: window before the spike whose mean is subtracted (s).
        noise_stretch: window before the spike whose detrended SD is the noise (s).
        factor: threshold in noise SDs.
        floor: absolute threshold in the trace's unit (V or A; e.g. 50e-6 V or 2e-12 A);
            0 leaves only the noise criterion.
        min_events: fewest usable spikes for the pair to count as tested.
        t0: sweep time of sample 0 (s).

    Returns:
        A :class:`ResponseDetection`.

    Raises:
        ValueError: if the trace is not 2-D, the number of spike arrays differs from the
            number of sweeps, or a window or threshold is not a positive number.
    """
    trace = np.asarray(trace, dtype=float)
    if trace.ndim != 2:
        raise ValueError(f"trace must be 2-D (n_sweeps, n_samples), got shape {trace.shape}; "
                         "wrap a single sweep as trace[None, :] and its spikes as [spikes]")
    n_sweeps, n_samples = trace.shape
    if isinstance(spike_times, np.ndarray) and spike_times.ndim == 1 and spike_times.dtype != object:
        raise ValueError("spike_times must hold one array of spike times per sweep, got one flat array; "
                         "pass a list with one array per sweep")
    if len(spike_times) != n_sweeps:
        raise ValueError(f"spike_times has {len(spike_times)} sweeps but trace has {n_sweeps}; "
                         "pass one array of spike times per sweep (empty for a sweep without spikes)")
    if not (math.isfinite(sample_dt) and sample_dt > 0):
        raise ValueError(f"sample_dt must be a positive sampling interval in s, got {sample_dt!r}")
    lat0, lat1 = (float(v) for v in latency)
    if not (0.0 <= lat0 <= lat1 and math.isfinite(lat1)):
        raise ValueError(f"latency must be (earliest, latest) in s with 0 <= earliest <= latest, got {latency!r}")
    for name, value in (("baseline", baseline), ("noise_stretch", noise_stretch), ("factor", factor)):
        if not (math.isfinite(value) and value > 0):
            raise ValueError(f"{name} must be a positive number, got {value!r}")
    if not (math.isfinite(floor) and floor >= 0):
        raise ValueError(f"floor must be an amplitude >= 0 in the trace's unit, got {floor!r}")
    if int(min_events) != min_events or min_events < 1:
        raise ValueError(f"min_events must be a whole number >= 1, got {min_events!r}")

    n_base = max(1, int(round(baseline / sample_dt)))
    # At least 5 samples: a line fit leaves n - 2 degrees of freedom for the SD.
    n_noise = max(5, int(round(noise_stretch / sample_dt)))
    n_pre = max(n_base, n_noise)
    l0 = math.ceil(lat0 / sample_dt - _EPS_SAMPLES)
    l1 = math.floor(lat1 / sample_dt + _EPS_SAMPLES)
    if l1 < l0:
        raise ValueError(f"latency window {latency!r} s holds no sample at sample_dt {sample_dt!r} s; widen it")
    offsets = np.arange(-n_pre, l1 + 1)

    sweeps = [np.atleast_1d(np.asarray(s, dtype=float)).ravel() for s in spike_times]
    sweep_of = np.repeat(np.arange(n_sweeps), [s.size for s in sweeps])
    times = np.concatenate(sweeps) if sweeps else np.empty(0)
    finite = np.isfinite(times)
    sweep_of, times = sweep_of[finite], times[finite]
    position = (times - t0) / sample_dt
    centre = np.floor(position + 0.5).astype(np.int64)
    inside = (centre - n_pre >= 0) & (centre + l1 < n_samples)
    sweep_of, centre, position = sweep_of[inside], centre[inside], position[inside]
    windows = trace[sweep_of[:, None], centre[:, None] + offsets[None, :]]
    clean = np.all(np.isfinite(windows), axis=1)
    windows, position, centre = windows[clean], position[clean], centre[clean]
    n_events = int(windows.shape[0])
    time = offsets * sample_dt
    if n_events == 0:
        return ResponseDetection(amplitude=math.nan, noise=math.nan, latency=math.nan, n_events=0,
                                 tested=False, detected=False, threshold=math.nan,
                                 time=time, average=np.full(offsets.size, np.nan))

    sta = windows.mean(axis=0)
    stretch = sta[n_pre - n_noise:n_pre]
    x = np.arange(n_noise, dtype=float)
    slope, intercept = np.polyfit(x, stretch, 1)
    # ddof=2: the line fit used two degrees of freedom.
    noise = float(np.std(stretch - (slope * x + intercept), ddof=2))
    # The membrane may still be relaxing when the spike comes (the cell's own earlier spikes, the
    # tail of an earlier response): the baseline is that trend carried on through the response
    # window, its level set by the last `baseline` before the spike.
    if detrend:
        trend = slope * (np.arange(offsets.size) - (n_pre - n_noise))
        sta = sta - (trend - trend[n_pre - n_base:n_pre].mean())
    sta = sta - sta[n_pre - n_base:n_pre].mean()
    search = sta[n_pre + l0:n_pre + l1 + 1]
    j = int(np.argmax(np.abs(search)))
    amplitude = float(search[j])
    # A response peaks inside the window; a deflection still growing at its end is the
    # membrane's own slow trajectory (recovery from the cell's earlier spikes), not a response.
    peaked = j < search.size - max(1, int(round(PEAK_MARGIN / sample_dt)))
    # The aligned sample sits (position - centre) samples before the true spike on average.
    shift = float(np.mean(position - centre))
    lat = (l0 + j - shift) * sample_dt
    threshold = max(factor * noise, float(floor))
    tested = n_events >= min_events
    detected = bool(tested and peaked and abs(amplitude) > threshold)
    return ResponseDetection(amplitude=amplitude, noise=noise, latency=lat, n_events=n_events,
                             tested=bool(tested), detected=detected, threshold=threshold,
                             time=time, average=sta)


# --- pair tables -------------------------------------------------------------------------------

def _flags(values, name: str, size: int | None = None) -> np.ndarray:
    """A 1-D boolean array from bools or 0/1, with a clear error for anything else."""
    a = np.asarray(values)
    if a.ndim != 1:
        raise ValueError(f"{name} must be a 1-D array with one entry per pair, got shape {a.shape}")
    if a.dtype != bool:
        try:
            f = a.astype(float)
        except (TypeError, ValueError):
            raise ValueError(f"{name} must hold True/False (or 1/0) per pair, got values like {a[:3]!r}") from None
        if not np.all((f == 0) | (f == 1)):
            raise ValueError(f"{name} must hold True/False (or 1/0) per pair, got values like "
                             f"{a[(f != 0) & (f != 1)][:3]!r}")
        a = f == 1
    if size is not None and a.size != size:
        raise ValueError(f"{name} has {a.size} entries but there are {size} pairs; pass one entry per pair")
    return a


def _same_length(**arrays) -> int:
    sizes = {name: np.shape(a)[0] if np.ndim(a) else None for name, a in arrays.items() if a is not None}
    bad = [name for name, s in sizes.items() if s is None]
    if bad:
        raise ValueError(f"{bad[0]} must be an array with one entry per pair, got a scalar")
    if len(set(sizes.values())) > 1:
        listing = ", ".join(f"{name} {s}" for name, s in sizes.items())
        raise ValueError(f"pair arrays differ in length ({listing}); pass one entry per pair in every array")
    return next(iter(sizes.values()))


def _tested_connected(tested, connected, size: int) -> tuple[np.ndarray, np.ndarray]:
    connected = _flags(connected, "connected", size)
    tested = np.ones(size, dtype=bool) if tested is None else _flags(tested, "tested", size)
    if np.any(connected & ~tested):
        i = int(np.nonzero(connected & ~tested)[0][0])
        raise ValueError(f"pair {i} is marked connected but not tested; a connection can only be found in a "
                         "tested pair (set tested True for it)")
    return tested, connected


def _rule(rule_probability, tested: np.ndarray, size: int) -> np.ndarray | None:
    if rule_probability is None:
        return None
    r = np.asarray(rule_probability, dtype=float)
    if r.shape != (size,):
        raise ValueError(f"rule_probability has shape {r.shape} but there are {size} pairs; "
                         "pass the rule's connection probability of every pair")
    _probability(r[tested], "rule_probability of a tested pair")
    return r


def probability_by_distance(distance, tested, connected, bins, rule_probability=None, *,
                            confidence: float = 0.95):
    """Connection probability of ordered pairs by intersomatic distance, with Wilson intervals.

    Bins are half-open ``[from, to)`` except the last, which includes its upper edge (as
    ``numpy.histogram`` does). Pairs outside the bins count in no row. After the bin rows
    comes one row with ``scope == "all"`` and NaN distances covering every tested pair
    inside the bins.

    When the circuit's rule gives each pair an analytic probability, each row also compares
    the count with it: ``rule_probability`` is the mean over the row's tested pairs,
    ``rule_inside_ci`` says whether it lies inside the Wilson interval (edges included;
    <NA> for a row without tested pairs), and ``binomial_p`` is the exact two-sided test of
    the count against Binomial(pairs_tested, rule_probability). Inside a bin the pairs'
    probabilities differ a little; the count then follows a Poisson-binomial law whose
    variance, n p(1-p) - sum (p_i - p)^2, is below the binomial one, so the binomial test
    errs on the side of not rejecting.

    Args:
        distance: (n_pairs,) intersomatic distance of each ordered pair (m).
        tested: (n_pairs,) whether the pair was tested (bool or 0/1).
        connected: (n_pairs,) whether a connection was found (implies tested).
        bins: increasing bin edges (m), or a whole number of equal bins from 0 to the
            largest tested distance.
        rule_probability: optional (n_pairs,) analytic connection probability of each pair.
        confidence: level of the Wilson interval.

    Returns:
        pandas DataFrame, one row per bin then the ``"all"`` row, columns ``scope``,
        ``distance_from_um``, ``distance_to_um``, ``pairs_tested``, ``pairs_connected``,
        ``probability`` (NaN when no pair was tested), ``ci_low``, ``ci_high``, and with a
        rule ``rule_probability``, ``rule_inside_ci``, ``binomial_p``.

    Raises:
        ValueError: on arrays of different lengths, a connected but untested pair, a
            negative or non-finite distance of a tested pair, bad bin edges or a rule
            probability outside [0, 1].
    """
    import pandas as pd

    size = _same_length(distance=distance, tested=tested, connected=connected, rule_probability=rule_probability)
    tested, connected = _tested_connected(tested, connected, size)
    distance = np.asarray(distance, dtype=float)
    if distance.ndim != 1:
        raise ValueError(f"distance must be a 1-D array (m) with one entry per pair, got shape {distance.shape}")
    d = distance[tested]
    if not np.all(np.isfinite(d)) or np.any(d < 0):
        raise ValueError("distance of every tested pair must be a finite number >= 0 (m); "
                         f"got {d[~(np.isfinite(d) & (d >= 0))][:3]!r}")
    rule = _rule(rule_probability, tested, size)
    edges = _edges(bins, d)
    _z(confidence)  # a bad level fails here, before any work

    # digitize against the inner edges gives the bin; the last bin takes its upper edge too.
    which = np.searchsorted(edges, distance, side="right") - 1
    which[distance == edges[-1]] = edges.size - 2
    in_range = tested & (distance >= edges[0]) & (distance <= edges[-1])
    n_bins = edges.size - 1
    groups = [in_range & (which == b) for b in range(n_bins)] + [in_range]

    rows = []
    for b, g in enumerate(groups):
        n = int(g.sum())
        k = int((g & connected).sum())
        low, high = wilson_interval(k, n, confidence)
        row = {
            "scope": "bin" if b < n_bins else "all",
            "distance_from_um": edges[b] * UM if b < n_bins else math.nan,
            "distance_to_um": edges[b + 1] * UM if b < n_bins else math.nan,
            "pairs_tested": n,
            "pairs_connected": k,
            "probability": k / n if n else math.nan,
            "ci_low": low,
            "ci_high": high,
        }
        if rule is not None:
            if n:
                r = float(np.mean(rule[g]))
                # The clamp only absorbs round-off of the mean of values in [0, 1].
                row.update(rule_probability=r, rule_inside_ci=bool(low <= r <= high),
                           binomial_p=binomial_test(k, n, min(max(r, 0.0), 1.0)))
            else:
                row.update(rule_probability=math.nan, rule_inside_ci=pd.NA, binomial_p=math.nan)
        rows.append(row)
    table = pd.DataFrame(rows)
    if rule is not None:
        table["rule_inside_ci"] = table["rule_inside_ci"].astype("boolean")
    return table


def _edges(bins, tested_distance: np.ndarray) -> np.ndarray:
    if np.ndim(bins) == 0:
        if int(bins) != bins or bins < 1:
            raise ValueError(f"bins must be a whole number >= 1 or an array of edges in m, got {bins!r}")
        top = float(tested_distance.max()) if tested_distance.size else 0.0
        if top <= 0:
            raise ValueError("cannot choose bin edges: no tested pair has a distance > 0; pass the edges (m)")
        return np.linspace(0.0, top, int(bins) + 1)
    edges = np.asarray(bins, dtype=float)
    if edges.ndim != 1 or edges.size < 2 or not np.all(np.isfinite(edges)) or np.any(np.diff(edges) <= 0):
        raise ValueError(f"bin edges must be at least two finite, strictly increasing distances in m, got {bins!r}")
    return edges


def _pair_frame(pre, post, connected, tested, patch, rule_probability):
    """Ordered pairs as a DataFrame of tested pairs (patch, pre, post, connected[, rule])."""
    import pandas as pd

    size = _same_length(pre=pre, post=post, connected=connected, tested=tested, patch=patch,
                        rule_probability=rule_probability)
    tested, connected = _tested_connected(tested, connected, size)
    rule = _rule(rule_probability, tested, size)
    frame = pd.DataFrame({
        "patch": np.zeros(size, dtype=int) if patch is None else np.asarray(patch),
        "pre": np.asarray(pre), "post": np.asarray(post), "connected": connected,
    })
    if rule is not None:
        frame["rule"] = rule
    frame = frame[tested].reset_index(drop=True)
    self_pairs = frame["pre"] == frame["post"]
    if self_pairs.any():
        r = frame[self_pairs].iloc[0]
        raise ValueError(f"pair with pre == post (cell {r['pre']!r} in patch {r['patch']!r}); "
                         "a cell is not tested against itself, drop those entries")
    dup = frame.duplicated(["patch", "pre", "post"])
    if dup.any():
        r = frame[dup].iloc[0]
        raise ValueError(f"ordered pair {r['pre']!r} -> {r['post']!r} in patch {r['patch']!r} is listed twice; "
                         "give each tested ordered pair once")
    return frame


def reciprocity(pre, post, connected, *, tested=None, patch=None, rule_probability=None):
    """Reciprocal connections among unordered pairs tested both ways, against independence.

    Only unordered pairs {a, b} with both a -> b and b -> a tested count. The ordered-pair
    connection probability ``p_hat`` is taken over those 2 x pairs ordered pairs, so it
    describes the same population as the reciprocal count. If the two directions were
    independent, each pair would be reciprocal with probability ``p_hat^2``: the expected
    count is ``pairs x p_hat^2``, and the observed count is tested exactly against
    Binomial(pairs, p_hat^2), one-sided (more reciprocal pairs than expected) and
    two-sided. ``p_hat`` comes from the same data, which the test ignores; with hundreds
    of pairs the effect is small. With per-pair rule probabilities the expectation under
    the rule is also given: the sum over pairs of p_ab x p_ba.

    Args:
        pre, post: (n,) cell identifiers of each ordered pair (unique within a patch).
        connected: (n,) whether a connection pre -> post was found.
        tested: optional (n,) whether the ordered pair was tested (default: all were).
        patch: optional (n,) patch (recording) identifier; cells are matched within a patch.
        rule_probability: optional (n,) analytic probability of each ordered pair.

    Returns:
        One-row pandas DataFrame: ``pairs_tested_both_ways``, ``ordered_pairs_connected``,
        ``connection_probability`` (p_hat), ``one_way_pairs``, ``reciprocal_pairs``,
        ``reciprocal_expected``, ``reciprocal_ratio`` (observed / expected),
        ``p_more_reciprocal`` (one-sided), ``p_two_sided``; with a rule also
        ``reciprocal_expected_rule`` and ``reciprocal_ratio_rule``. Ratios are NaN when
        the expectation is 0, p-values NaN when no pair was tested both ways.

    Raises:
        ValueError: on arrays of different lengths, connected but untested pairs, self
            pairs, an ordered pair listed twice or a rule probability outside [0, 1].
    """
    import pandas as pd

    frame = _pair_frame(pre, post, connected, tested, patch, rule_probability)
    back = frame.rename(columns={"pre": "post", "post": "pre", "connected": "back",
                                 **({"rule": "rule_back"} if "rule" in frame else {})})
    # Every unordered pair tested both ways appears twice here (as a->b and as b->a), so
    # counts over it are halved; this needs no ordering of the cell identifiers.
    both = frame.merge(back, on=["patch", "pre", "post"], how="inner")
    forward = both["connected"].to_numpy(bool)
    backward = both["back"].to_numpy(bool)
    pairs = len(both) // 2
    ordered_connected = int(forward.sum())
    p_hat = ordered_connected / (2 * pairs) if pairs else math.nan
    recip = int(np.sum(forward & backward)) // 2
    one_way = int(np.sum(forward ^ backward)) // 2
    expected = pairs * p_hat * p_hat if pairs else math.nan
    row = {
        "pairs_tested_both_ways": pairs,
        "ordered_pairs_connected": ordered_connected,
        "connection_probability": p_hat,
        "one_way_pairs": one_way,
        "reciprocal_pairs": recip,
        "reciprocal_expected": expected,
        "reciprocal_ratio": recip / expected if pairs and expected > 0 else math.nan,
        "p_more_reciprocal": binomial_test(recip, pairs, p_hat * p_hat, "greater") if pairs else math.nan,
        "p_two_sided": binomial_test(recip, pairs, p_hat * p_hat) if pairs else math.nan,
    }
    if "rule" in frame:
        expected_rule = 0.5 * float(np.sum(both["rule"].to_numpy(float) * both["rule_back"].to_numpy(float)))
        row["reciprocal_expected_rule"] = expected_rule
        row["reciprocal_ratio_rule"] = recip / expected_rule if expected_rule > 0 else math.nan
    return pd.DataFrame([row])


def degrees(patch, pre, post, connected, *, tested=None, classes: Mapping | None = None):
    """In- and out-degree of each cell among the cells patched with it, and a per-class summary.

    A cell's in-degree counts the connections found onto it from cells of its own patch,
    its out-degree those it makes onto them; ``in_tested`` and ``out_tested`` count the
    ordered pairs tested in each direction, since a degree means little without the number
    of partners it was measured among (a cell recorded with 3 others cannot exceed 3).

    Args:
        patch: (n,) patch identifier of each ordered pair, or None for a single patch.
        pre, post: (n,) cell identifiers (unique within a patch).
        connected: (n,) whether a connection pre -> post was found.
        tested: optional (n,) whether the ordered pair was tested (default: all were).
        classes: optional mapping from cell to class label; keys ``(patch, cell)`` are
            looked up first, then plain ``cell``.

    Returns:
        ``(cells, summary)`` pandas DataFrames. ``cells``: one row per cell with columns
        ``patch``, ``cell``, ``cell_class``, ``in_degree``, ``out_degree``, ``in_tested``,
        ``out_tested``, ``partners_tested`` (distinct cells tested in either direction).
        ``summary``: one row per class (a single ``"all"`` class without ``classes``) with
        ``n_cells`` and, for in- and out-degree, ``*_mean``, ``*_sd`` (ddof 1, NaN for one
        cell) and ``*_max``, plus ``partners_tested_mean``.

    Raises:
        ValueError: on arrays of different lengths, connected but untested pairs, self
            pairs, a pair listed twice, or a cell missing from ``classes``.
    """
    import pandas as pd

    frame = _pair_frame(pre, post, connected, tested, patch, None)
    frame["connected"] = frame["connected"].astype(int)
    frame["one"] = 1
    out = frame.groupby(["patch", "pre"], sort=False).agg(out_degree=("connected", "sum"),
                                                          out_tested=("one", "sum"))
    inn = frame.groupby(["patch", "post"], sort=False).agg(in_degree=("connected", "sum"),
                                                           in_tested=("one", "sum"))
    out.index.names = ["patch", "cell"]
    inn.index.names = ["patch", "cell"]
    cells = inn.join(out, how="outer").fillna(0).astype(int)
    partners = pd.concat([frame[["patch", "pre", "post"]].rename(columns={"pre": "cell", "post": "other"}),
                          frame[["patch", "post", "pre"]].rename(columns={"post": "cell", "pre": "other"})])
    cells["partners_tested"] = partners.drop_duplicates().groupby(["patch", "cell"]).size()
    cells = cells.reset_index()
    if patch is None:
        cells["patch"] = None

    if classes is None:
        labels = ["all"] * len(cells)
    else:
        labels = []
        for p, c in zip(cells["patch"], cells["cell"]):
            if (p, c) in classes:
                labels.append(classes[(p, c)])
            elif c in classes:
                labels.append(classes[c])
            else:
                raise ValueError(f"cell {c!r} of patch {p!r} has no class in `classes`; add it (keyed by "
                                 "(patch, cell) or by cell)")
    cells.insert(2, "cell_class", labels)
    cells = cells[["patch", "cell", "cell_class", "in_degree", "out_degree", "in_tested", "out_tested",
                   "partners_tested"]]

    summary = cells.groupby("cell_class", sort=True).agg(
        n_cells=("cell", "size"),
        in_degree_mean=("in_degree", "mean"), in_degree_sd=("in_degree", "std"),
        in_degree_max=("in_degree", "max"),
        out_degree_mean=("out_degree", "mean"), out_degree_sd=("out_degree", "std"),
        out_degree_max=("out_degree", "max"),
        partners_tested_mean=("partners_tested", "mean"),
    ).reset_index()
    return cells, summary
