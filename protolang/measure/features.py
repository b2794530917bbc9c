"""Synaptic response features: voltage traces (V) with event times (s) in, per-response and per-connection numbers (SI) out.

Everything here works on plain numpy arrays, so imported real recordings are analysed
by exactly the code that analyses simulated ones. Units are SI in and out: traces in
volts, times in seconds, areas in volt-seconds. A trace is a 1-D array sampled every
``dt`` seconds, its first sample at sweep time ``t0`` (default 0).

Definitions (the way a paired-recording lab measures; each is repeated where it is coded):

* **baseline**: mean of the raw samples in ``[event - baseline, event)`` (default 2 ms),
  measured before *every* event, so a response in a train is measured from the
  potential just before its own presynaptic spike ("local baseline"). No extrapolation
  of the preceding decay is subtracted.
* **response window**: ``[event, min(event + window, next event, end of sweep))``.
* **sign** of a connection: +1 (depolarising) or -1 (hyperpolarising), the sign of the
  largest excursion from baseline of the *sweep-averaged* response, taken over all
  events; all amplitudes are reported positive along that sign, so IPSPs are measured
  like EPSPs.
* **peak amplitude**: the signed extreme of the response window minus the baseline,
  found on the trace smoothed by a centred running mean of ``smooth`` (default 0.3 ms,
  3 samples at 10 kHz, roughly the low-pass filter of a patch amplifier). The running
  mean keeps recording noise from being read as a response: the maximum of a few
  hundred raw noise samples is about 3 noise SD, which would sit right at a 3 SD failure
  threshold. Pass ``smooth=0`` to measure the raw trace.
* **failure**: amplitude below ``max(noise_factor x noise SD, threshold)``; the noise SD
  is the standard deviation of the raw samples (after removing a linear trend) in the
  ``noise_stretch`` (default 50 ms) just before the *first* event of the sweep.
* **latency**: from the event (the presynaptic spike) to the time the response reaches
  10 % of its peak; **20-80 % rise time**: between the 20 % and 80 % levels. Each level
  time is the crossing on the rising phase of the smoothed trace, found by walking back
  from the peak (into the baseline samples if need be) to the last sample below the
  level and interpolating linearly to the next sample, so noise blips earlier in the
  window are not taken for the onset. 10 % for latency is common practice, no single
  source.
* **decay time constant**: least-squares fit (``scipy.optimize.curve_fit``) of
  ``a * exp(-(t - t_peak) / tau)`` to the raw baseline-subtracted response from the peak
  to the end of the window; the asymptote is the pre-event baseline (not a free
  parameter, which a window shorter than a few tau cannot pin down). NaN when the
  stretch after the peak is shorter than ``min_decay_stretch`` (15 ms), when the fit
  does not converge, or when the fitted tau is longer than ``max_tau_factor`` (5) times
  that stretch (the decay is then barely visible and tau would be an extrapolation).
* **area**: trapezoid integral of the raw baseline-subtracted response over the window,
  positive along the connection's sign.

Latency, rise time and decay are NaN for failures: they would only describe noise.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np
from scipy.ndimage import uniform_filter1d
from scipy.optimize import OptimizeWarning, curve_fit

DEFAULT_WINDOW = 0.040          # s, longest response window
DEFAULT_BASELINE = 0.002        # s, baseline window before each event
DEFAULT_THRESHOLD = 0.05e-3     # V, failure threshold floor
DEFAULT_NOISE_FACTOR = 3.0      # failure threshold in units of baseline noise SD
DEFAULT_NOISE_STRETCH = 0.050   # s of pre-stimulus trace used for the noise SD
DEFAULT_SMOOTH = 0.3e-3         # s, running-mean width used for peak and level crossings
DEFAULT_SPIKE_MATCH = 0.010     # s, a presynaptic spike at most this long after its stimulus onset
MIN_DECAY_STRETCH = 0.015       # s, shortest post-peak stretch a decay is fitted on
MAX_TAU_FACTOR = 5.0            # fitted tau longer than this x the stretch -> NaN
ONSET_FRACTION = 0.10           # latency level, fraction of the peak

# A time exactly on a sample must count as that sample despite float round-off
# (0.1 / 1e-4 is 1000.0000000000001).
_EPS_SAMPLES = 1e-6
# Spike times rounded to the simulation grid may sit a hair before their nominal onset.
_EPS_TIME = 1e-9


@dataclass(frozen=True)
class ResponseFeatures:
    """Features of one response, SI units; NaN where not measurable.

    Attributes:
        baseline: mean potential before the event (V).
        amplitude: peak minus baseline along the connection's sign (V).
        failure: amplitude below the failure level (False when not measurable).
        latency: event to 10 % of peak (s).
        rise_20_80: 20 % to 80 % of peak (s).
        time_to_peak: event to peak (s).
        decay_tau: single-exponential decay time constant (s).
        area: integral of the baseline-subtracted response along the sign (V s).
        window: length of the response window actually used (s).
        measured: False when the trace did not cover baseline and window.
    """

    baseline: float
    amplitude: float
    failure: bool
    latency: float
    rise_20_80: float
    time_to_peak: float
    decay_tau: float
    area: float
    window: float
    measured: bool = True


NOT_MEASURED = ResponseFeatures(
    baseline=math.nan, amplitude=math.nan, failure=False, latency=math.nan,
    rise_20_80=math.nan, time_to_peak=math.nan, decay_tau=math.nan, area=math.nan,
    window=math.nan, measured=False,
)


def index_range(t_start: float, t_stop: float, dt: float, n_samples: int, t0: float = 0.0) -> tuple[int, int]:
    """Return the sample slice ``[i0, i1)`` of times ``t0 + i*dt`` in ``[t_start, t_stop)``.

    Args:
        t_start, t_stop: interval in s.
        dt: sampling interval in s.
        n_samples: length of the trace; the slice is clipped to it.
        t0: time of sample 0 in s.

    Returns:
        ``(i0, i1)`` with ``0 <= i0`` and ``i1 <= n_samples`` (empty when ``i1 <= i0``).
    """
    i0 = math.ceil((t_start - t0) / dt - _EPS_SAMPLES)
    i1 = math.ceil((t_stop - t0) / dt - _EPS_SAMPLES)
    return max(i0, 0), min(max(i1, 0), n_samples)


def smooth_trace(trace: np.ndarray, dt: float, width: float = DEFAULT_SMOOTH) -> np.ndarray:
    """Centred running mean over ``width`` seconds (an odd number of samples).

    A centred mean does not shift the time of a linear rise, so rise times survive it.

    Args:
        trace: 1-D array (any unit), or 2-D with time on the last axis.
        dt: sampling interval in s.
        width: averaging width in s; widths under 1.5 samples return a copy.

    Returns:
        Array of the same shape.
    """
    # a half-width of exactly n + 0.5 samples rounds down; the slack keeps a sample interval that
    # differs in the last digits (1e-4 s read from a printed time column) on the same side
    half = int(math.floor(width / (2.0 * dt) + 0.5 - _EPS_SAMPLES))
    trace = np.asarray(trace, dtype=float)
    if half < 1:
        return trace.copy()
    return uniform_filter1d(trace, size=2 * half + 1, axis=-1, mode="nearest")


def noise_sd(trace: np.ndarray, dt: float, first_event: float,
             stretch: float = DEFAULT_NOISE_STRETCH, t0: float = 0.0) -> float:
    """Recording noise: SD of the raw samples in ``[first_event - stretch, first_event)``.

    A straight line is fitted and removed first, so a slow drift of the resting
    potential (a cell still settling) does not count as noise. The stretch is cut at the
    start of the trace.

    Args:
        trace: 1-D trace (V).
        dt: sampling interval (s).
        first_event: time of the first event of the sweep (s).
        stretch: length of the pre-stimulus stretch (s).
        t0: time of sample 0 (s).

    Returns:
        SD in V (``ddof=1``), NaN when fewer than 5 samples are available.
    """
    trace = np.asarray(trace, dtype=float)
    i0, i1 = index_range(first_event - stretch, first_event, dt, trace.size, t0)
    seg = trace[i0:i1]
    if seg.size < 5 or not np.all(np.isfinite(seg)):
        return math.nan
    x = np.arange(seg.size, dtype=float)
    slope, intercept = np.polyfit(x, seg, 1)
    return float(np.std(seg - (slope * x + intercept), ddof=1))


def failure_level(noise: float, noise_factor: float = DEFAULT_NOISE_FACTOR,
                  threshold: float = DEFAULT_THRESHOLD) -> float:
    """Failure threshold: ``max(noise_factor * noise, threshold)``; a NaN noise gives the floor.

    Args:
        noise: baseline noise SD (V), may be NaN.
        noise_factor: multiple of the noise SD.
        threshold: floor (V).

    Returns:
        The level (V) a response amplitude must reach not to be a failure.
    """
    if not math.isfinite(noise):
        return float(threshold)
    return float(max(noise_factor * noise, threshold))


def window_stops(event_times: np.ndarray, window: float, t_end: float,
                 boundaries: np.ndarray | None = None) -> np.ndarray:
    """End of each response window: ``min(event + window, next boundary, t_end)``.

    Args:
        event_times: (n_events,) event times (s), NaN for events without a spike.
        window: longest response window (s).
        t_end: end of the recorded sweep (s).
        boundaries: (n_events,) times that close the previous window (default: the
            event times); give nominal onsets here so a missing spike still ends the
            previous window.

    Returns:
        (n_events,) window ends (s); NaN where the event time is NaN.
    """
    ev = np.asarray(event_times, dtype=float)
    bnd = ev if boundaries is None else np.asarray(boundaries, dtype=float)
    stops = np.full(ev.shape, np.nan)
    for k, t in enumerate(ev):
        if not math.isfinite(t):
            continue
        nxt = [b for b in bnd[k + 1:] if math.isfinite(b) and b > t]
        stop = min(t + window, t_end)
        if nxt:
            stop = min(stop, min(nxt))
        stops[k] = stop
    return stops


def _crossing_before(t: np.ndarray, y: np.ndarray, i_peak: int, level: float) -> float:
    """Time the rising phase crosses ``level``: last sample below it before the peak, interpolated."""
    below = np.nonzero(y[:i_peak] < level)[0]
    if below.size == 0:
        return math.nan
    j = int(below[-1])
    y0, y1 = y[j], y[j + 1]
    if y1 == y0:
        return float(t[j])
    return float(t[j] + (level - y0) / (y1 - y0) * (t[j + 1] - t[j]))


def _exp_decay(t, a, rate):
    return a * np.exp(-rate * t)


def _exp_decay_jac(t, a, rate):
    # analytic derivatives: saves curve_fit the finite-difference calls (most of its time)
    e = np.exp(-rate * t)
    return np.column_stack((e, -a * t * e))


def fit_decay(t: np.ndarray, y: np.ndarray, *, min_stretch: float = MIN_DECAY_STRETCH,
              max_tau_factor: float = MAX_TAU_FACTOR) -> float:
    """Decay time constant of ``y(t) = a * exp(-t / tau)`` by least squares, or NaN.

    The asymptote is fixed at 0: pass the response minus its pre-event baseline, sign
    flipped so the peak is positive, with ``t`` starting at 0 at the peak.

    Args:
        t: (n,) times from the peak (s), starting at 0.
        y: (n,) baseline-subtracted response (any unit), peak first.
        min_stretch: no fit when ``t[-1] - t[0]`` is shorter (s).
        max_tau_factor: a fitted tau longer than this times the stretch gives NaN.

    Returns:
        tau in s, or NaN when the stretch is too short, the peak is not positive, the fit
        does not converge or tau is not well inside the stretch.
    """
    t = np.asarray(t, dtype=float)
    y = np.asarray(y, dtype=float)
    if t.size < 4 or t.size != y.size or not np.all(np.isfinite(y)):
        return math.nan
    t = t - t[0]
    stretch = float(t[-1])
    if stretch < min_stretch or y[0] <= 0:
        return math.nan
    below = np.nonzero(y < y[0] / math.e)[0]
    tau0 = float(t[below[0]]) if below.size and t[below[0]] > 0 else stretch
    # Fitting the rate rather than tau keeps a flat decay (rate -> 0) a smooth limit.
    try:
        with warnings.catch_warnings(), np.errstate(over="ignore", invalid="ignore"):
            warnings.simplefilter("error", OptimizeWarning)
            popt, pcov = curve_fit(_exp_decay, t, y, p0=(float(y[0]), 1.0 / tau0), jac=_exp_decay_jac,
                                   maxfev=2000)
    except (RuntimeError, ValueError, OptimizeWarning):
        return math.nan
    a, rate = float(popt[0]), float(popt[1])
    if not (np.all(np.isfinite(pcov)) and a > 0 and rate > 0):
        return math.nan
    tau = 1.0 / rate
    if tau > max_tau_factor * stretch:
        return math.nan
    return tau


def response_features(trace: np.ndarray, dt: float, event_time: float, stop: float, *,
                      sign: float = 1.0, baseline: float = DEFAULT_BASELINE,
                      failure_at: float = DEFAULT_THRESHOLD, smooth: float = DEFAULT_SMOOTH,
                      smoothed: np.ndarray | None = None, t0: float = 0.0,
                      min_decay_stretch: float = MIN_DECAY_STRETCH,
                      max_tau_factor: float = MAX_TAU_FACTOR,
                      onset_fraction: float = ONSET_FRACTION) -> ResponseFeatures:
    """Measure one response (definitions in the module docstring).

    Args:
        trace: 1-D membrane potential (V).
        dt: sampling interval (s).
        event_time: presynaptic spike (or stimulus) time (s).
        stop: end of the response window (s), see :func:`window_stops`.
        sign: +1 for a depolarising connection, -1 for a hyperpolarising one.
        baseline: baseline window before the event (s).
        failure_at: failure level (V), see :func:`failure_level`.
        smooth: running-mean width used for peak, latency and rise (s).
        smoothed: the trace already smoothed with ``smooth`` (saves work per event).
        t0: time of sample 0 (s).
        min_decay_stretch, max_tau_factor: decay-fit rule, see :func:`fit_decay`.
        onset_fraction: fraction of the peak that defines latency.

    Returns:
        A :class:`ResponseFeatures`; :data:`NOT_MEASURED` when the event time is NaN or
        the trace does not cover one baseline sample and three window samples.
    """
    trace = np.asarray(trace, dtype=float)
    if not (math.isfinite(event_time) and math.isfinite(stop)):
        return NOT_MEASURED
    n = trace.size
    b0, b1 = index_range(event_time - baseline, event_time, dt, n, t0)
    r0, r1 = index_range(event_time, stop, dt, n, t0)
    if b1 - b0 < 1 or r1 - r0 < 3:
        return NOT_MEASURED
    base = float(np.mean(trace[b0:b1]))
    if smoothed is None:
        smoothed = smooth_trace(trace, dt, smooth)
    # The level crossings may lie before the first window sample (a response with almost
    # no delay), so the search runs over the baseline samples too; the peak does not.
    lead = r0 - b0
    t = t0 + dt * np.arange(b0, r1)
    y = sign * (smoothed[b0:r1] - base)
    i_peak = lead + int(np.argmax(y[lead:]))
    amplitude = float(y[i_peak])
    raw = sign * (trace[r0:r1] - base)
    area = float(np.trapezoid(raw, t[lead:]))
    failure = not amplitude >= failure_at
    latency = rise = tau = math.nan
    if not failure and amplitude > 0:
        t_onset = _crossing_before(t, y, i_peak, onset_fraction * amplitude)
        t20 = _crossing_before(t, y, i_peak, 0.2 * amplitude)
        t80 = _crossing_before(t, y, i_peak, 0.8 * amplitude)
        latency = t_onset - event_time
        rise = t80 - t20
        tau = fit_decay(t[i_peak:], raw[i_peak - lead:], min_stretch=min_decay_stretch,
                        max_tau_factor=max_tau_factor)
    return ResponseFeatures(
        baseline=base, amplitude=amplitude, failure=bool(failure), latency=latency,
        rise_20_80=rise, time_to_peak=float(t[i_peak] - event_time), decay_tau=tau,
        area=area, window=float(stop - event_time),
    )


def sweep_features(trace: np.ndarray, dt: float, event_times: np.ndarray, stops: np.ndarray, *,
                   sign: float = 1.0, baseline: float = DEFAULT_BASELINE,
                   threshold: float = DEFAULT_THRESHOLD, noise_factor: float = DEFAULT_NOISE_FACTOR,
                   noise_stretch: float = DEFAULT_NOISE_STRETCH, first_event: float | None = None,
                   smooth: float = DEFAULT_SMOOTH, t0: float = 0.0,
                   min_decay_stretch: float = MIN_DECAY_STRETCH) -> tuple[list[ResponseFeatures], float, float]:
    """Measure every response of one sweep.

    Args:
        trace: 1-D membrane potential (V).
        dt: sampling interval (s).
        event_times: (n_events,) presynaptic spike times (s), NaN for no spike.
        stops: (n_events,) window ends (s), see :func:`window_stops`.
        sign: connection sign, see :func:`connection_sign`.
        baseline, threshold, noise_factor, noise_stretch, smooth, min_decay_stretch:
            see the module docstring (SI).
        first_event: end of the noise stretch (s); default the earliest finite event time.
        t0: time of sample 0 (s).

    Returns:
        ``(features, noise, level)``: one :class:`ResponseFeatures` per event, the noise SD
        (V, NaN if not measurable) and the failure level used (V).
    """
    trace = np.asarray(trace, dtype=float)
    ev = np.asarray(event_times, dtype=float)
    if first_event is None:
        finite = ev[np.isfinite(ev)]
        first_event = float(finite.min()) if finite.size else math.nan
    noise = noise_sd(trace, dt, first_event, noise_stretch, t0) if math.isfinite(first_event) else math.nan
    level = failure_level(noise, noise_factor, threshold)
    smoothed = smooth_trace(trace, dt, smooth)
    feats = [
        response_features(trace, dt, float(t), float(s), sign=sign, baseline=baseline,
                          failure_at=level, smooth=smooth, smoothed=smoothed, t0=t0,
                          min_decay_stretch=min_decay_stretch)
        for t, s in zip(ev, np.asarray(stops, dtype=float))
    ]
    return feats, noise, level


def average_response(traces: np.ndarray, dt: float, event_times: np.ndarray, before: float,
                     after: float, t0: float = 0.0) -> tuple[np.ndarray, np.ndarray, int]:
    """Average the sweeps' responses to one event, aligned on each sweep's own event time.

    Each sweep contributes the samples from ``before`` seconds ahead of its event to
    ``after`` seconds past it, aligned on the first sample at or after the event (so the
    alignment error is below one sample).

    Args:
        traces: (n_sweeps, n_samples) potentials (V).
        dt: sampling interval (s).
        event_times: (n_sweeps,) event times (s), NaN to leave a sweep out.
        before, after: segment extent around the event (s).
        t0: time of sample 0 (s).

    Returns:
        ``(t_rel, mean, n)``: segment times relative to the event (s), the mean segment
        (V; NaN-filled when no sweep qualifies) and the number of sweeps averaged.
    """
    traces = np.atleast_2d(np.asarray(traces, dtype=float))
    nb = int(math.ceil(before / dt - _EPS_SAMPLES))
    na = int(math.ceil(after / dt - _EPS_SAMPLES))
    t_rel = dt * np.arange(-nb, na)
    segments = []
    for trace, te in zip(traces, np.asarray(event_times, dtype=float)):
        if not math.isfinite(te):
            continue
        i_e = math.ceil((te - t0) / dt - _EPS_SAMPLES)
        if i_e - nb < 0 or i_e + na > trace.size:
            continue
        segments.append(trace[i_e - nb:i_e + na])
    if not segments:
        return t_rel, np.full(t_rel.shape, np.nan), 0
    return t_rel, np.mean(segments, axis=0), len(segments)


def connection_sign(traces: np.ndarray, dt: float, event_times: np.ndarray, stops: np.ndarray, *,
                    baseline: float = DEFAULT_BASELINE, smooth: float = DEFAULT_SMOOTH,
                    t0: float = 0.0) -> float:
    """Sign of a connection from its sweep-averaged responses: +1 depolarising, -1 hyperpolarising.

    For every event the sweeps are averaged (:func:`average_response`), the baseline is
    subtracted and the average smoothed; the sign is that of the largest excursion over
    all events. A flat average (no response at all) counts as +1.

    Args:
        traces: (n_sweeps, n_samples) potentials (V).
        dt: sampling interval (s).
        event_times: (n_sweeps, n_events) event times (s), NaN for no spike.
        stops: (n_sweeps, n_events) window ends (s).
        baseline, smooth: see the module docstring (s).
        t0: time of sample 0 (s).

    Returns:
        +1.0 or -1.0.
    """
    ev = np.atleast_2d(np.asarray(event_times, dtype=float))
    st = np.atleast_2d(np.asarray(stops, dtype=float))
    nb = int(math.ceil(baseline / dt - _EPS_SAMPLES))
    best = 0.0
    for k in range(ev.shape[1]):
        lengths = st[:, k] - ev[:, k]
        lengths = lengths[np.isfinite(lengths)]
        if lengths.size == 0 or nb < 1:
            continue
        _, avg, n = average_response(traces, dt, ev[:, k], baseline, float(np.median(lengths)), t0)
        if n == 0:
            continue
        y = smooth_trace(avg, dt, smooth)[nb:] - float(np.mean(avg[:nb]))
        if y.size == 0:
            continue
        extreme = float(y[np.argmax(np.abs(y))])
        if abs(extreme) > abs(best):
            best = extreme
    return -1.0 if best < 0 else 1.0


def averaged_response_features(traces: np.ndarray, dt: float, event_times: np.ndarray,
                               stops: np.ndarray, *, sign: float = 1.0,
                               baseline: float = DEFAULT_BASELINE, smooth: float = DEFAULT_SMOOTH,
                               t0: float = 0.0,
                               min_decay_stretch: float = MIN_DECAY_STRETCH) -> tuple[ResponseFeatures, int]:
    """Features of the sweep-averaged response to one event (used for the connection's decay).

    Args:
        traces: (n_sweeps, n_samples) potentials (V).
        dt: sampling interval (s).
        event_times: (n_sweeps,) this event's time in every sweep (s), NaN for no spike.
        stops: (n_sweeps,) window ends (s); the averaged window is their median length.
        sign, baseline, smooth, min_decay_stretch: see the module docstring.
        t0: time of sample 0 (s).

    Returns:
        ``(features, n)``: features of the average (failure level 0) and the number of
        sweeps averaged; :data:`NOT_MEASURED` and 0 when no sweep has the event.
    """
    ev = np.asarray(event_times, dtype=float)
    lengths = np.asarray(stops, dtype=float) - ev
    lengths = lengths[np.isfinite(lengths)]
    if lengths.size == 0:
        return NOT_MEASURED, 0
    length = float(np.median(lengths))
    t_rel, avg, n = average_response(traces, dt, ev, baseline, length, t0)
    if n == 0:
        return NOT_MEASURED, 0
    feats = response_features(avg, dt, 0.0, length, sign=sign, baseline=baseline, failure_at=0.0,
                              smooth=smooth, t0=float(t_rel[0]), min_decay_stretch=min_decay_stretch)
    return feats, n


def match_spikes(nominal: np.ndarray, spikes: np.ndarray,
                 max_delay: float = DEFAULT_SPIKE_MATCH) -> tuple[np.ndarray, np.ndarray]:
    """Match presynaptic spikes to nominal stimulus onsets.

    The spike of event k is the first spike in ``[onset_k, min(onset_k + max_delay,
    onset_k+1))``; an event without one gets NaN. Spikes not matched to any event are
    extra spikes (doublets, spontaneous firing).

    Args:
        nominal: (n_events,) stimulus onsets (s), increasing.
        spikes: spike times of the presynaptic cell in this sweep (s).
        max_delay: longest stimulus-to-spike delay accepted (s).

    Returns:
        ``(times, extra)``: matched spike time per event (s, NaN for none) and the sorted
        unmatched spike times (s).
    """
    nom = np.asarray(nominal, dtype=float)
    spk = np.sort(np.asarray(spikes, dtype=float).ravel())
    times = np.full(nom.shape, np.nan)
    used = np.zeros(spk.shape, dtype=bool)
    for k, onset in enumerate(nom):
        end = onset + max_delay
        if k + 1 < nom.size:
            end = min(end, nom[k + 1])
        hit = np.nonzero((spk >= onset - _EPS_TIME) & (spk < end) & ~used)[0]
        if hit.size:
            times[k] = spk[hit[0]]
            used[hit[0]] = True
    return times, spk[~used]


def connection_metrics(amplitudes: np.ndarray, failures: np.ndarray, latencies: np.ndarray,
                       rises: np.ndarray, *, probe: np.ndarray | None = None) -> dict:
    """Summarise the responses of one connection over its sweeps.

    Definitions:

    * ``amplitude_mean`` / ``amplitude_sd`` per event: over sweeps that have the
      presynaptic spike, failures included as measured; SD with ``ddof=1``.
    * ``cv`` = SD / mean of the first response (no correction for recording noise).
    * ``failure_rate``: fraction of failures among first responses.
    * ``ratios[k]`` = mean(A_k) / mean(A_1) over the sweeps that have both spikes: a
      ratio of means, not a mean of per-sweep ratios (the latter is biased upwards by
      small first responses).
    * ``ppr``: ratio of the second train event (probe events excluded) to the first.
    * ``recovery_ratio``: ratio of the probe event to the first (NaN without a probe).
    * ``latency`` / ``rise_20_80``: means over non-failures of the first response.

    Args:
        amplitudes: (n_sweeps, n_events) amplitudes (V), NaN where there was no spike.
        failures: (n_sweeps, n_events) bool.
        latencies, rises: (n_sweeps, n_events) in s, NaN where not measured.
        probe: (n_events,) bool, True for the recovery probe event.

    Returns:
        dict with ``n_sweeps`` (sweeps with a first response), ``amplitude_mean``,
        ``amplitude_sd``, ``ratios`` (arrays per event, V / V / 1), ``cv``,
        ``failure_rate``, ``ppr``, ``recovery_ratio``, ``latency`` (s), ``rise_20_80`` (s),
        ``first``, ``second``, ``probe_event`` (column indices used, or None).
    """
    amp = np.atleast_2d(np.asarray(amplitudes, dtype=float))
    fail = np.atleast_2d(np.asarray(failures, dtype=bool))
    lat = np.atleast_2d(np.asarray(latencies, dtype=float))
    rise = np.atleast_2d(np.asarray(rises, dtype=float))
    n_events = amp.shape[1]
    is_probe = np.zeros(n_events, dtype=bool) if probe is None else np.asarray(probe, dtype=bool)
    train = [k for k in range(n_events) if not is_probe[k]]
    probes = [k for k in range(n_events) if is_probe[k]]
    valid = np.isfinite(amp)

    def _mean(x):
        return float(np.mean(x)) if x.size else math.nan

    def _sd(x):
        return float(np.std(x, ddof=1)) if x.size > 1 else math.nan

    amp_mean = np.array([_mean(amp[valid[:, k], k]) for k in range(n_events)])
    amp_sd = np.array([_sd(amp[valid[:, k], k]) for k in range(n_events)])
    first = train[0] if train else None
    second = train[1] if len(train) > 1 else None
    probe_event = probes[0] if probes else None
    ratios = np.full(n_events, np.nan)
    out = {"n_sweeps": 0, "amplitude_mean": amp_mean, "amplitude_sd": amp_sd, "ratios": ratios,
           "cv": math.nan, "failure_rate": math.nan, "ppr": math.nan, "recovery_ratio": math.nan,
           "latency": math.nan, "rise_20_80": math.nan,
           "first": first, "second": second, "probe_event": probe_event}
    if first is None:
        return out
    v1 = valid[:, first]
    a1 = amp[v1, first]
    out["n_sweeps"] = int(v1.sum())
    if a1.size:
        mean1 = float(np.mean(a1))
        out["cv"] = _sd(a1) / mean1 if mean1 != 0 else math.nan
        out["failure_rate"] = float(np.mean(fail[v1, first]))
        ok = v1 & ~fail[:, first]
        out["latency"] = _mean(lat[ok & np.isfinite(lat[:, first]), first])
        out["rise_20_80"] = _mean(rise[ok & np.isfinite(rise[:, first]), first])
    for k in range(n_events):
        both = v1 & valid[:, k]
        denom = float(np.sum(amp[both, first])) if both.any() else 0.0
        if denom != 0:
            ratios[k] = float(np.sum(amp[both, k])) / denom
    if second is not None:
        out["ppr"] = float(ratios[second])
    if probe_event is not None:
        out["recovery_ratio"] = float(ratios[probe_event])
    return out
