"""Single-cell characterisation: current-clamp traces (V), step times and spike times (s) in, passive, spike and firing numbers (SI) out.

Everything here works on plain numpy arrays, so imported real recordings are analysed
by exactly the code that analyses simulated ones. Units are SI in and out: traces in
volts, times in seconds, currents in amperes, resistances in ohms, rates in Hz, F-I
slopes in Hz/A (tables show Hz/nA: multiply by :data:`HZ_PER_A_TO_HZ_PER_NA`). A trace
is a 1-D array sampled every ``dt`` seconds, its first sample at sweep time ``t0``
(default 0); a current step runs over ``[onset, stop)``.

Definitions (the way a slice lab characterises a cell; each is repeated where it is
coded). Where practice varies between labs the choice made here is stated; thresholds
marked CP are common practice with no single source.

Passive properties (a small hyperpolarising step, no spikes):

* **resting potential**: mean of the samples before the step onset (all of them, or the
  last ``rest_stretch`` seconds if given).
* **steady state**: mean of the last ``steady_stretch`` (default 100 ms, at most the
  second half of the step) of the step.
* **input resistance**: (steady state - resting potential) / step current.
* **peak response**: the extreme of the trace during the step along the sign of the
  steady-state deflection (the most negative point for a hyperpolarising step), read on
  the trace smoothed by a centred 5 ms running mean so recording noise is not taken for
  a peak (a sag develops over tens of ms, so the mean barely moves its true minimum).
* **membrane time constant**: least-squares fit (``scipy.optimize.curve_fit``) of a
  single exponential ``V(t) = V_inf + A exp(-(t - onset) / tau)`` with free ``V_inf``,
  ``A`` and ``tau`` to the raw trace from the step onset to the time of the peak
  response (so the sag of an h-current does not enter the fit). NaN when the stretch
  has fewer than 10 samples, the fit does not converge, tau is not positive or tau is
  longer than 5 times the fitted stretch: never a guessed value.
* **sag ratio**: ``(V_peak - V_ss) / (V_peak - V_rest)``, 0 for no sag, approaching 1
  when the response relaxes all the way back to rest. With recording noise a passive
  cell gives a small positive value (the smoothed peak sits a few SD of the smoothed
  noise beyond the steady state). CP; other labs use ``V_ss / V_peak`` deflection ratios.

Spikes:

* **spike detection** (traces with a spike shape): an upward crossing of ``dV/dt =
  criterion`` (default 20 V/s, CP) starts an upstroke; its **peak** is the first local
  maximum after it; crossings before that peak (a kink on the upstroke) belong to the
  same spike. An upstroke is a spike when the peak is at least ``min_height`` (default
  20 mV, CP) above the threshold and the trace does not fall below threshold within one
  sample of the peak (see integrate-and-fire below). dV/dt is the central difference
  (``numpy.gradient``). The **spike time** is the threshold crossing. Alternatively an
  upward crossing of a voltage ``level`` (linear interpolation) marks a spike.
* **given spike times**: integrate-and-fire models have no spike shape, so their spike
  times must come from the model. Each given time is matched to the upstroke whose
  threshold crossing lies within ``match_window`` (default 2 ms) before it (or up to
  two samples after it, for rounding to the sample grid).
* **spike threshold**: the potential at which dV/dt first reaches the criterion before
  the spike (linear interpolation between the two samples that bracket the criterion).
* **spike amplitude**: peak minus threshold.
* **half-width**: time between the rising and falling crossings of the level halfway
  between threshold and peak (linear interpolation between samples).
* **afterhyperpolarisation depth**: threshold minus the minimum of the raw trace from
  the peak to the earlier of ``ahp_window`` (default 10 ms, the fast AHP, CP) after the
  peak and the next spike's threshold crossing; positive when the trace dips below
  threshold.
* **integrate-and-fire traces**: a spike cut by a reset carries the potential from its
  highest sample to below threshold within one sample, and a leaky integrate-and-fire
  trace never reaches the dV/dt criterion at all. Threshold, amplitude, half-width and
  AHP are then NaN and the reason is stated; no number is invented. The one-sample rule
  assumes sampling at 10 kHz or faster, at which a real action potential needs several
  samples to repolarise.

Firing during a step (spikes with ``onset <= t < stop``):

* **first-spike latency**: first spike time minus step onset.
* **ISIs**: differences of successive spike times.
* **firing rate**: spike count / step duration.
* **adaptation index** (primary): mean over successive ISI pairs of
  ``(ISI_{k+1} - ISI_k) / (ISI_{k+1} + ISI_k)``; 0 for regular firing, positive when
  firing slows, negative when it accelerates; needs 2 ISIs. Reported beside it, the
  **ISI ratio** last ISI / first ISI, which does not shrink as more spikes are added and
  is therefore what the pattern label uses.
* **CV2** of a set of ISIs (Holt, Softky, Koch and Douglas 1996, J Neurophysiol
  75:1806-1814): mean of ``2 |ISI_{k+1} - ISI_k| / (ISI_{k+1} + ISI_k)``, a local
  irregularity measure that a slow trend (adaptation) hardly moves.

F-I curve and rheobase:

* **F-I curve**: (current, rate) pairs sorted by current; counts become rates by
  dividing by the step duration.
* **F-I slope**: least-squares slope of rate against current over the supra-threshold
  points (rate above zero); Hz/A. NaN with fewer than two such points.
* **rheobase**: the smallest step current that makes the cell fire, found by a
  vectorised multi-section search (:func:`rheobase_search`): each round tests
  ``parallel`` currents evenly spaced inside every cell's bracket in one batch, and the
  bracket shrinks to the interval between the highest silent and the lowest firing
  tested current, ``parallel + 1`` times narrower per round. The reported rheobase is the
  upper end of the final bracket (the smallest current seen to fire), within
  ``tolerance`` of the true value. A bracket whose low end fires or whose high end does
  not is refused (NaN with the reason).

Firing-pattern label (the trade's words; CP, no single source; applied in this order,
first match wins; thresholds are module constants):

1. **silent**: no spike during the step (outside the eight trade labels).
2. **delayed**: one spike at or after half the step; or, with two or more spikes,
   first-spike latency >= 2 x the mean ISI ((t_last - t_first) / (n - 1)) and >= 20 ms.
3. **transient**: the silence from the last spike to the step end is longer than both
   2 x the longest ISI and 25 % of the step (spiking does not persist).
4. **bursting** / 5. **initial burst**: the sorted ISIs split in two groups at their
   largest ratio between neighbours, when that ratio is >= 3 and every short ISI is
   <= 20 ms (above 50 Hz). Runs of consecutive short ISIs are bursts: two or more runs
   give "bursting"; a single run that starts with the first ISI gives "initial burst".
6. **irregular**: CV2 of the late ISIs (those starting in the second half of the step,
   at least 3 of them) >= 0.3.
7. **adapting**: ISI ratio (last / first) >= 1.5.
8. **fast spiking**: first-spike half-width measured and <= 0.5 ms and firing rate
   >= 50 Hz (a trace without spike shape cannot be called fast spiking).
9. **tonic**: everything else (regular, little adaptation).

The numbers each rule read are returned with the label so a user can see why.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
from scipy.optimize import OptimizeWarning, curve_fit

from protolang.measure.features import index_range, smooth_trace

DVDT_CRITERION = 20.0           # V/s, spike threshold criterion (CP)
MIN_SPIKE_HEIGHT = 0.020        # V, peak above threshold for an upstroke to be a spike (CP)
MATCH_WINDOW = 0.002            # s, a given spike time may follow its upstroke by this much
AHP_WINDOW = 0.010              # s, fast AHP window after the peak (CP)
STEADY_STRETCH = 0.100          # s, end of the step averaged for the steady state
PEAK_SMOOTH = 0.005             # s, running mean used to find the peak of a passive response
MIN_FIT_SAMPLES = 10            # fewest samples a time constant is fitted on
MAX_TAU_FACTOR = 5.0            # fitted tau longer than this x the stretch -> NaN
HZ_PER_A_TO_HZ_PER_NA = 1e-9    # F-I slope, SI -> table unit

# Firing-pattern thresholds (CP, no single source; see the module docstring).
DELAY_ISI_FACTOR = 2.0          # latency >= this x mean ISI ...
DELAY_MIN_LATENCY = 0.020       # ... and >= this (s)
DELAY_SINGLE_FRACTION = 0.5     # a lone spike at or after this fraction of the step is delayed
TRANSIENT_ISI_FACTOR = 2.0      # end silence > this x longest ISI ...
TRANSIENT_STEP_FRACTION = 0.25  # ... and > this fraction of the step
BURST_GAP_RATIO = 3.0           # largest neighbour ratio of sorted ISIs that splits short/long
BURST_MAX_ISI = 0.020           # s, longest ISI inside a burst
IRREGULAR_CV2 = 0.3             # CV2 of the late ISIs at or above this is irregular
IRREGULAR_MIN_ISIS = 3          # fewest late ISIs the irregularity is judged on
ADAPTING_ISI_RATIO = 1.5        # last / first ISI at or above this is adapting
FAST_MAX_HALF_WIDTH = 0.5e-3    # s
FAST_MIN_RATE = 50.0            # Hz

PATTERN_LABELS = ("silent", "delayed", "transient", "bursting", "initial burst", "irregular",
                  "adapting", "fast spiking", "tonic")

REASON_NO_UPSTROKE = ("no upstroke: dV/dt never reaches the spike criterion near the spike "
                      "(integrate-and-fire trace without spike shape)")
REASON_RESET = ("reset: the potential falls from its highest sample to below threshold within "
                "one sample (integrate-and-fire reset, no repolarisation phase)")
REASON_NO_SPIKES = "no spikes"

# A time exactly on a sample must count as that sample despite float round-off.
_EPS_SAMPLES = 1e-6


# --- passive properties -------------------------------------------------------------------

@dataclass(frozen=True)
class PassiveFeatures:
    """Passive response to one current step, SI units; NaN where not measurable.

    Attributes:
        rest: resting potential before the step (V).
        steady: steady-state potential at the end of the step (V).
        peak: peak response during the step along the deflection's sign (V).
        t_peak: time of the peak (s, sweep clock).
        input_resistance: (steady - rest) / current (ohm).
        tau: membrane time constant (s).
        sag_ratio: (peak - steady) / (peak - rest), dimensionless.
        current: step current (A).
    """

    rest: float
    steady: float
    peak: float
    t_peak: float
    input_resistance: float
    tau: float
    sag_ratio: float
    current: float


def _segment(trace: np.ndarray, dt: float, start: float, stop: float, t0: float) -> np.ndarray:
    i0, i1 = index_range(start, stop, dt, trace.size, t0)
    return trace[i0:i1]


def resting_potential(trace: np.ndarray, dt: float, onset: float, *, t0: float = 0.0,
                      rest_stretch: float | None = None) -> float:
    """Resting potential: mean of the samples before the step onset.

    Args:
        trace: 1-D membrane potential (V).
        dt: sampling interval (s).
        onset: step onset (s).
        t0: time of sample 0 (s).
        rest_stretch: average only the last this-many seconds before the onset (default:
            every sample before it).

    Returns:
        Mean potential in V; NaN when no sample precedes the onset.
    """
    trace = np.asarray(trace, dtype=float)
    start = t0 if rest_stretch is None else onset - rest_stretch
    seg = _segment(trace, dt, start, onset, t0)
    return float(np.mean(seg)) if seg.size else math.nan


def steady_state(trace: np.ndarray, dt: float, onset: float, stop: float, *, t0: float = 0.0,
                 steady_stretch: float = STEADY_STRETCH) -> float:
    """Steady-state potential: mean of the last ``steady_stretch`` of the step.

    The stretch is capped at the second half of the step, so a short step is not averaged
    over its charging phase.

    Args:
        trace: 1-D membrane potential (V).
        dt: sampling interval (s).
        onset, stop: step interval (s).
        t0: time of sample 0 (s).
        steady_stretch: length of the averaged end stretch (s).

    Returns:
        Mean potential in V; NaN when the stretch holds no sample.
    """
    trace = np.asarray(trace, dtype=float)
    stretch = min(steady_stretch, 0.5 * (stop - onset))
    seg = _segment(trace, dt, stop - stretch, stop, t0)
    return float(np.mean(seg)) if seg.size else math.nan


def input_resistance(trace: np.ndarray, dt: float, onset: float, stop: float, current: float, *,
                     t0: float = 0.0, rest_stretch: float | None = None,
                     steady_stretch: float = STEADY_STRETCH) -> float:
    """Input resistance from one small current step: (V_ss - V_rest) / I.

    Args:
        trace: 1-D membrane potential (V).
        dt: sampling interval (s).
        onset, stop: step interval (s).
        current: step amplitude (A), negative for a hyperpolarising step.
        t0: time of sample 0 (s).
        rest_stretch: see :func:`resting_potential`.
        steady_stretch: see :func:`steady_state`.

    Returns:
        Input resistance in ohm; NaN when rest or steady state cannot be measured.

    Raises:
        ValueError: if ``current`` is zero or not finite.
    """
    if not (math.isfinite(current) and current != 0.0):
        raise ValueError(f"input resistance needs a non-zero step current, got {current!r} A")
    rest = resting_potential(trace, dt, onset, t0=t0, rest_stretch=rest_stretch)
    vss = steady_state(trace, dt, onset, stop, t0=t0, steady_stretch=steady_stretch)
    return (vss - rest) / current


def peak_response(trace: np.ndarray, dt: float, onset: float, stop: float, sign: float, *,
                  t0: float = 0.0, smooth: float = PEAK_SMOOTH) -> tuple[float, float]:
    """Extreme of the step response along ``sign`` on the smoothed trace.

    Args:
        trace: 1-D membrane potential (V).
        dt: sampling interval (s).
        onset, stop: step interval (s).
        sign: -1 to find the most negative point, +1 the most positive.
        t0: time of sample 0 (s).
        smooth: centred running-mean width (s).

    Returns:
        ``(v_peak, t_peak)`` in V and s; NaNs when the step holds no sample.
    """
    trace = np.asarray(trace, dtype=float)
    i0, i1 = index_range(onset, stop, dt, trace.size, t0)
    if i1 <= i0:
        return math.nan, math.nan
    sm = smooth_trace(trace, dt, smooth)[i0:i1]
    k = int(np.argmax(sign * sm))
    return float(sm[k]), float(t0 + (i0 + k) * dt)


def _charging(t, v_inf, amp, rate):
    return v_inf + amp * np.exp(-rate * t)


def fit_charging(t: np.ndarray, v: np.ndarray, *, min_samples: int = MIN_FIT_SAMPLES,
                 max_tau_factor: float = MAX_TAU_FACTOR) -> float:
    """Time constant of ``v(t) = V_inf + A exp(-t / tau)`` by least squares, or NaN.

    Args:
        t: (n,) times from the step onset (s).
        v: (n,) potentials (V).
        min_samples: fewest samples a fit is tried on.
        max_tau_factor: a tau longer than this times the stretch gives NaN.

    Returns:
        tau in s, or NaN when there are too few samples, the fit does not converge, tau
        is not positive or tau is not well inside the stretch.
    """
    t = np.asarray(t, dtype=float)
    v = np.asarray(v, dtype=float)
    if t.size < min_samples or t.size != v.size or not np.all(np.isfinite(v)):
        return math.nan
    stretch = float(t[-1] - t[0])
    if stretch <= 0:
        return math.nan
    v_end = float(np.mean(v[-max(2, t.size // 10):]))
    amp0 = float(v[0]) - v_end
    if amp0 == 0.0:
        return math.nan
    # Starting guess: the time the response covers 63 % of its way.
    reached = np.nonzero(np.abs(v - v_end) <= abs(amp0) / math.e)[0]
    tau0 = float(t[reached[0]] - t[0]) if reached.size and t[reached[0]] > t[0] else stretch / 3.0
    try:
        with warnings.catch_warnings(), np.errstate(over="ignore", invalid="ignore"):
            warnings.simplefilter("error", OptimizeWarning)
            popt, pcov = curve_fit(_charging, t - t[0], v, p0=(v_end, amp0, 1.0 / tau0), maxfev=5000)
    except (RuntimeError, ValueError, OptimizeWarning):
        return math.nan
    rate = float(popt[2])
    if not (np.all(np.isfinite(pcov)) and rate > 0):
        return math.nan
    tau = 1.0 / rate
    if tau > max_tau_factor * stretch:
        return math.nan
    return tau


def membrane_time_constant(trace: np.ndarray, dt: float, onset: float, stop: float, *,
                           t0: float = 0.0, rest_stretch: float | None = None,
                           steady_stretch: float = STEADY_STRETCH,
                           smooth: float = PEAK_SMOOTH) -> float:
    """Membrane time constant from the onset of a small step (single-exponential fit).

    The fit runs from the step onset to the peak response (see the module docstring).

    Args:
        trace: 1-D membrane potential (V).
        dt: sampling interval (s).
        onset, stop: step interval (s).
        t0: time of sample 0 (s).
        rest_stretch, steady_stretch, smooth: see :func:`passive_properties`.

    Returns:
        tau in s, or NaN when it cannot be fitted.
    """
    return passive_properties(trace, dt, onset, stop, math.nan, t0=t0, rest_stretch=rest_stretch,
                              steady_stretch=steady_stretch, smooth=smooth).tau


def sag_ratio(trace: np.ndarray, dt: float, onset: float, stop: float, *, t0: float = 0.0,
              rest_stretch: float | None = None, steady_stretch: float = STEADY_STRETCH,
              smooth: float = PEAK_SMOOTH) -> float:
    """Sag ratio ``(V_peak - V_ss) / (V_peak - V_rest)`` of one step response.

    Args:
        trace: 1-D membrane potential (V).
        dt: sampling interval (s).
        onset, stop: step interval (s).
        t0: time of sample 0 (s).
        rest_stretch, steady_stretch, smooth: see :func:`passive_properties`.

    Returns:
        The ratio (0 = no sag), NaN when the response has no deflection.
    """
    return passive_properties(trace, dt, onset, stop, math.nan, t0=t0, rest_stretch=rest_stretch,
                              steady_stretch=steady_stretch, smooth=smooth).sag_ratio


def passive_properties(trace: np.ndarray, dt: float, onset: float, stop: float, current: float, *,
                       t0: float = 0.0, rest_stretch: float | None = None,
                       steady_stretch: float = STEADY_STRETCH,
                       smooth: float = PEAK_SMOOTH) -> PassiveFeatures:
    """Resting potential, input resistance, time constant and sag of one small step.

    Args:
        trace: 1-D membrane potential (V).
        dt: sampling interval (s).
        onset, stop: step interval (s).
        current: step amplitude (A); NaN or 0 leaves the input resistance NaN.
        t0: time of sample 0 (s).
        rest_stretch: see :func:`resting_potential`.
        steady_stretch: see :func:`steady_state`.
        smooth: running-mean width for the peak response (s).

    Returns:
        A :class:`PassiveFeatures`.
    """
    trace = np.asarray(trace, dtype=float)
    rest = resting_potential(trace, dt, onset, t0=t0, rest_stretch=rest_stretch)
    vss = steady_state(trace, dt, onset, stop, t0=t0, steady_stretch=steady_stretch)
    nan = math.nan
    if not (math.isfinite(rest) and math.isfinite(vss)) or vss == rest:
        return PassiveFeatures(rest, vss, nan, nan, nan, nan, nan, float(current))
    sign = 1.0 if vss > rest else -1.0
    v_peak, t_peak = peak_response(trace, dt, onset, stop, sign, t0=t0, smooth=smooth)
    r_in = (vss - rest) / current if math.isfinite(current) and current != 0.0 else nan
    i0, i1 = index_range(onset, t_peak + 0.5 * dt, dt, trace.size, t0)
    t = t0 + dt * np.arange(i0, i1)
    tau = fit_charging(t - onset, trace[i0:i1])
    sag = (v_peak - vss) / (v_peak - rest) if v_peak != rest else nan
    return PassiveFeatures(rest=rest, steady=vss, peak=v_peak, t_peak=t_peak, input_resistance=r_in,
                           tau=tau, sag_ratio=float(sag), current=float(current))


# --- spikes -------------------------------------------------------------------------------

@dataclass(frozen=True)
class _Upstrokes:
    """Every upward crossing of the dV/dt criterion in a trace (internal)."""

    onset: np.ndarray       # index of the first sample at or above the criterion
    peak: np.ndarray        # index of the first local maximum after it
    t_thr: np.ndarray       # interpolated threshold time (s)
    v_thr: np.ndarray       # interpolated threshold potential (V)
    reset: np.ndarray       # bool: falls below threshold within one sample of the peak
    complete: np.ndarray    # bool: the peak is a true maximum (trace does not end rising)


def _upstrokes(v: np.ndarray, dt: float, t0: float, criterion: float) -> _Upstrokes:
    n = v.size
    empty = np.zeros(0, dtype=int)
    if n < 3:
        f = np.zeros(0)
        return _Upstrokes(empty, empty, f, f, np.zeros(0, bool), np.zeros(0, bool))
    dvdt = np.gradient(v, dt)
    above = dvdt >= criterion
    starts = np.nonzero(above & ~np.concatenate(([False], above[:-1])))[0]
    falling = np.nonzero(np.diff(v) < 0)[0]
    onsets, peaks = [], []
    last_peak = -1
    for i in starts:
        if i <= last_peak:
            continue            # a kink on the upstroke of the spike already found
        j = int(np.searchsorted(falling, i))
        p = int(falling[j]) if j < falling.size else n - 1
        onsets.append(int(i))
        peaks.append(p)
        last_peak = p
    onset = np.asarray(onsets, dtype=int)
    peak = np.asarray(peaks, dtype=int)
    t_thr = np.empty(onset.size)
    v_thr = np.empty(onset.size)
    for k, i in enumerate(onset):
        if i == 0:
            t_thr[k], v_thr[k] = t0, v[0]
            continue
        d0, d1 = dvdt[i - 1], dvdt[i]
        frac = (criterion - d0) / (d1 - d0) if d1 != d0 else 0.0
        t_thr[k] = t0 + (i - 1 + frac) * dt
        v_thr[k] = v[i - 1] + frac * (v[i] - v[i - 1])
    complete = peak < n - 1
    after = np.minimum(peak + 1, n - 1)
    reset = complete & (v[after] < v_thr)
    return _Upstrokes(onset, peak, t_thr, v_thr, reset, complete)


def detect_spikes(trace: np.ndarray, dt: float, *, t0: float = 0.0, criterion: float = DVDT_CRITERION,
                  min_height: float = MIN_SPIKE_HEIGHT, level: float | None = None) -> np.ndarray:
    """Spike times of a trace that has a spike shape.

    Args:
        trace: 1-D membrane potential (V).
        dt: sampling interval (s).
        t0: time of sample 0 (s).
        criterion: dV/dt threshold criterion (V/s).
        min_height: smallest peak-minus-threshold of a spike (V).
        level: if given, spikes are upward crossings of this potential (V) instead, and
            their times are the interpolated crossing times.

    Returns:
        (n_spikes,) spike times in s: threshold crossings (or level crossings). A trace
        from an integrate-and-fire model yields none; pass the model's spike times to the
        other functions instead.
    """
    v = np.asarray(trace, dtype=float)
    if level is not None:
        k = np.nonzero((v[:-1] < level) & (v[1:] >= level))[0]
        frac = (level - v[k]) / (v[k + 1] - v[k])
        return t0 + (k + frac) * dt
    up = _upstrokes(v, dt, t0, criterion)
    ok = ~up.reset & (v[up.peak] - up.v_thr >= min_height) if up.onset.size else np.zeros(0, bool)
    return up.t_thr[ok]


@dataclass(frozen=True)
class SpikeShapes:
    """Per-spike shape measures, SI units; NaN where a spike has no measurable shape.

    Attributes:
        times: (n,) spike times (s), given or detected.
        threshold: (n,) threshold potential (V).
        peak: (n,) peak potential (V).
        amplitude: (n,) peak minus threshold (V).
        half_width: (n,) width at half amplitude (s).
        ahp_depth: (n,) threshold minus the AHP minimum (V).
        shaped: (n,) bool, True where the spike has a spike shape.
        reason: '' when every spike has a shape; otherwise why values are NaN.
    """

    times: np.ndarray
    threshold: np.ndarray
    peak: np.ndarray
    amplitude: np.ndarray
    half_width: np.ndarray
    ahp_depth: np.ndarray
    shaped: np.ndarray
    reason: str = ""


def _interp_time(t_a: float, v_a: float, v_b: float, level: float, dt: float) -> float:
    if v_b == v_a:
        return t_a
    return t_a + (level - v_a) / (v_b - v_a) * dt


def spike_shapes(trace: np.ndarray, dt: float, spike_times: np.ndarray | None = None, *,
                 t0: float = 0.0, criterion: float = DVDT_CRITERION,
                 min_height: float = MIN_SPIKE_HEIGHT, match_window: float = MATCH_WINDOW,
                 ahp_window: float = AHP_WINDOW) -> SpikeShapes:
    """Threshold, amplitude, half-width and AHP depth of every spike (module docstring).

    Args:
        trace: 1-D membrane potential (V).
        dt: sampling interval (s).
        spike_times: spike times (s) known from the model; None to detect them.
        t0: time of sample 0 (s).
        criterion: dV/dt threshold criterion (V/s).
        min_height: smallest peak-minus-threshold of a detected spike (V).
        match_window: how long a given spike time may follow its upstroke (s).
        ahp_window: AHP search window after the peak (s).

    Returns:
        A :class:`SpikeShapes`; spikes without a shape get NaN and ``reason`` says why.
    """
    v = np.asarray(trace, dtype=float)
    up = _upstrokes(v, dt, t0, criterion)
    if spike_times is None:
        ok = ~up.reset & (v[up.peak] - up.v_thr >= min_height) if up.onset.size else np.zeros(0, bool)
        idx = np.nonzero(ok)[0]
        times = up.t_thr[idx]
        match = [int(k) for k in idx]
        no_shape = ["" for _ in match]
    else:
        times = np.sort(np.asarray(spike_times, dtype=float).ravel())
        match, no_shape = [], []
        for ts in times:
            cand = np.nonzero((up.t_thr >= ts - match_window) & (up.t_thr <= ts + 2.0 * dt))[0]
            if cand.size == 0:
                match.append(-1)
                no_shape.append(REASON_NO_UPSTROKE)
                continue
            k = int(cand[np.argmin(np.abs(up.t_thr[cand] - ts))])
            match.append(k)
            no_shape.append(REASON_RESET if up.reset[k] else "")
    n = times.size
    thr, pk, amp, hw, ahp = (np.full(n, np.nan) for _ in range(5))
    shaped = np.zeros(n, dtype=bool)
    used = [k for k in match if k >= 0]
    for s, k in enumerate(match):
        if k < 0 or no_shape[s]:
            continue
        shaped[s] = True
        i_pk = int(up.peak[k])
        thr[s] = up.v_thr[k]
        pk[s] = v[i_pk]
        amp[s] = pk[s] - thr[s]
        # The next spike bounds the search for the fall and the AHP.
        later = [up.onset[j] for j in used if up.onset[j] > i_pk]
        i_next = int(min(later)) if later else v.size
        half = thr[s] + 0.5 * amp[s]
        below = np.nonzero(v[:i_pk] < half)[0]
        if below.size and up.complete[k]:
            j = int(below[-1])
            t_rise = _interp_time(t0 + j * dt, v[j], v[j + 1], half, dt)
            after = np.nonzero(v[i_pk:i_next] < half)[0]
            if after.size:
                j2 = i_pk + int(after[0])
                t_fall = _interp_time(t0 + (j2 - 1) * dt, v[j2 - 1], v[j2], half, dt)
                hw[s] = t_fall - t_rise
        t_pk = t0 + i_pk * dt
        a0, a1 = index_range(t_pk, t_pk + ahp_window, dt, v.size, t0)
        a1 = min(a1, i_next)
        if a1 > a0 and up.complete[k]:
            ahp[s] = thr[s] - float(np.min(v[a0:a1]))
    reasons = sorted({r for r in no_shape if r})
    if reasons:
        bad = int(np.count_nonzero(~shaped))
        reason = f"{bad} of {n} spikes have no spike shape: " + "; ".join(reasons) + \
            "; threshold, amplitude, half-width and AHP are not defined for them"
    elif n == 0:
        reason = REASON_NO_SPIKES
    else:
        reason = ""
    return SpikeShapes(times=times, threshold=thr, peak=pk, amplitude=amp, half_width=hw,
                       ahp_depth=ahp, shaped=shaped, reason=reason)


def count_resets(trace: np.ndarray, dt: float, *, t0: float = 0.0,
                 criterion: float = DVDT_CRITERION) -> int:
    """Number of upstrokes that end in an integrate-and-fire reset rather than a spike.

    A non-zero count tells a caller that detecting spikes from this trace is meaningless
    and the model's spike times are needed.

    Args:
        trace: 1-D membrane potential (V).
        dt: sampling interval (s).
        t0: time of sample 0 (s).
        criterion: dV/dt threshold criterion (V/s).

    Returns:
        The count.
    """
    up = _upstrokes(np.asarray(trace, dtype=float), dt, t0, criterion)
    return int(np.count_nonzero(up.reset))


# --- firing during a step -----------------------------------------------------------------

def spikes_in_step(spike_times: np.ndarray, onset: float, stop: float) -> np.ndarray:
    """Spike times inside a step.

    Args:
        spike_times: spike times (s), any order.
        onset, stop: step interval (s).

    Returns:
        The sorted times with ``onset <= t < stop`` (s).
    """
    st = np.sort(np.asarray(spike_times, dtype=float).ravel())
    return st[(st >= onset) & (st < stop)]


def adaptation_index(isis: np.ndarray) -> float:
    """Mean of ``(ISI_{k+1} - ISI_k) / (ISI_{k+1} + ISI_k)`` over successive ISIs.

    Args:
        isis: (m,) interspike intervals (s) in firing order.

    Returns:
        The index (dimensionless), NaN with fewer than 2 ISIs.
    """
    isi = np.asarray(isis, dtype=float)
    if isi.size < 2:
        return math.nan
    return float(np.mean(np.diff(isi) / (isi[1:] + isi[:-1])))


def cv2(isis: np.ndarray) -> float:
    """CV2 (Holt et al. 1996): mean of ``2 |ISI_{k+1} - ISI_k| / (ISI_{k+1} + ISI_k)``.

    Args:
        isis: (m,) interspike intervals (s) in firing order.

    Returns:
        CV2 (dimensionless), NaN with fewer than 2 ISIs.
    """
    isi = np.asarray(isis, dtype=float)
    if isi.size < 2:
        return math.nan
    return float(np.mean(2.0 * np.abs(np.diff(isi)) / (isi[1:] + isi[:-1])))


@dataclass(frozen=True)
class FiringPattern:
    """A firing-pattern label with the rule that gave it and the numbers it read.

    Attributes:
        label: one of :data:`PATTERN_LABELS`.
        rule: the rule that matched, in words with the numbers filled in.
        numbers: every statistic the rules read (SI; NaN where undefined).
    """

    label: str
    rule: str
    numbers: dict = field(default_factory=dict)


def _burst_runs(isi: np.ndarray) -> tuple[float, np.ndarray | None]:
    """Largest neighbour ratio of the sorted ISIs and the short-ISI mask it implies."""
    if isi.size < 2:
        return math.nan, None
    srt = np.sort(isi)
    ratios = srt[1:] / srt[:-1]
    k = int(np.argmax(ratios))
    return float(ratios[k]), isi <= srt[k]


def _runs(mask: np.ndarray) -> list[tuple[int, int]]:
    runs, start = [], None
    for i, m in enumerate(mask):
        if m and start is None:
            start = i
        if not m and start is not None:
            runs.append((start, i))
            start = None
    if start is not None:
        runs.append((start, mask.size))
    return runs


def firing_pattern(spike_times: np.ndarray, onset: float, stop: float, *,
                   half_width: float = math.nan) -> FiringPattern:
    """Label the response to one depolarising step in trade terms (rules in the module docstring).

    Args:
        spike_times: spike times (s); only those in ``[onset, stop)`` are used.
        onset, stop: step interval (s).
        half_width: first-spike half-width (s), NaN when the trace has no spike shape.

    Returns:
        A :class:`FiringPattern`.

    Raises:
        ValueError: if the step interval is empty.
    """
    duration = stop - onset
    if not duration > 0:
        raise ValueError(f"the step must end after it starts (onset {onset} s, stop {stop} s)")
    st = spikes_in_step(spike_times, onset, stop)
    n = st.size
    isi = np.diff(st)
    nan = math.nan
    latency = float(st[0] - onset) if n else nan
    mean_isi = float((st[-1] - st[0]) / (n - 1)) if n > 1 else nan
    longest = float(isi.max()) if isi.size else 0.0
    end_silence = float(stop - st[-1]) if n else nan
    gap, short = _burst_runs(isi)
    late = isi[st[:-1] >= onset + 0.5 * duration] if n > 1 else isi
    numbers = {
        "n_spikes": n, "rate": n / duration, "latency": latency, "mean_isi": mean_isi,
        "latency_over_mean_isi": latency / mean_isi if n > 1 else nan,
        "end_silence": end_silence, "longest_isi": longest if isi.size else nan,
        "isi_gap_ratio": gap, "n_bursts": 0, "cv2_late": cv2(late), "n_late_isis": int(late.size),
        "adaptation_index": adaptation_index(isi),
        "isi_ratio": float(isi[-1] / isi[0]) if isi.size else nan, "half_width": half_width,
    }
    ms = 1e3
    if n == 0:
        return FiringPattern("silent", "no spike during the step", numbers)
    if n == 1:
        if latency >= DELAY_SINGLE_FRACTION * duration:
            return FiringPattern("delayed", f"one spike, {latency * ms:.1f} ms after onset, in the "
                                 f"second half of the step", numbers)
        return FiringPattern("transient", f"one spike at {latency * ms:.1f} ms, then silence for "
                             f"{end_silence * ms:.1f} ms to the end of the step", numbers)
    if latency >= DELAY_ISI_FACTOR * mean_isi and latency >= DELAY_MIN_LATENCY:
        return FiringPattern("delayed", f"first-spike latency {latency * ms:.1f} ms >= "
                             f"{DELAY_ISI_FACTOR:g} x mean ISI {mean_isi * ms:.1f} ms and >= "
                             f"{DELAY_MIN_LATENCY * ms:g} ms", numbers)
    if end_silence > TRANSIENT_ISI_FACTOR * longest and end_silence > TRANSIENT_STEP_FRACTION * duration:
        return FiringPattern("transient", f"silent for the last {end_silence * ms:.1f} ms of the step, "
                             f"> {TRANSIENT_ISI_FACTOR:g} x longest ISI {longest * ms:.1f} ms and > "
                             f"{TRANSIENT_STEP_FRACTION:.0%} of the step", numbers)
    if short is not None and gap >= BURST_GAP_RATIO and float(isi[short].max()) <= BURST_MAX_ISI:
        runs = _runs(short)
        numbers["n_bursts"] = len(runs)
        if len(runs) >= 2:
            return FiringPattern("bursting", f"{len(runs)} bursts: short ISIs (<= "
                                 f"{isi[short].max() * ms:.1f} ms) separated by ISIs {gap:.1f} x longer",
                                 numbers)
        if runs and runs[0][0] == 0:
            return FiringPattern("initial burst", f"one burst of {runs[0][1] - runs[0][0] + 1} spikes "
                                 f"at onset, then ISIs {gap:.1f} x longer", numbers)
    c2 = numbers["cv2_late"]
    if late.size >= IRREGULAR_MIN_ISIS and c2 >= IRREGULAR_CV2:
        return FiringPattern("irregular", f"CV2 of the {late.size} late ISIs = {c2:.2f} >= "
                             f"{IRREGULAR_CV2:g}", numbers)
    ratio = numbers["isi_ratio"]
    if ratio >= ADAPTING_ISI_RATIO:
        return FiringPattern("adapting", f"last / first ISI = {ratio:.2f} >= {ADAPTING_ISI_RATIO:g}",
                             numbers)
    if math.isfinite(half_width) and half_width <= FAST_MAX_HALF_WIDTH and n / duration >= FAST_MIN_RATE:
        return FiringPattern("fast spiking", f"half-width {half_width * ms:.2f} ms <= "
                             f"{FAST_MAX_HALF_WIDTH * ms:g} ms, {n / duration:.0f} Hz >= "
                             f"{FAST_MIN_RATE:g} Hz, last / first ISI {ratio:.2f}", numbers)
    return FiringPattern("tonic", f"persistent regular firing, last / first ISI = {ratio:.2f} < "
                         f"{ADAPTING_ISI_RATIO:g}", numbers)


@dataclass(frozen=True)
class StepFiring:
    """Firing in response to one depolarising step, SI units; NaN where not defined.

    Attributes:
        spike_times: (n,) spike times inside the step (s).
        n_spikes: spike count inside the step.
        latency: first-spike latency from onset (s).
        isis: (n - 1,) interspike intervals (s).
        rate: spike count / step duration (Hz).
        adaptation_index: see :func:`adaptation_index`.
        isi_ratio: last / first ISI.
        threshold, amplitude, half_width, ahp_depth: first spike's shape (V, V, s, V).
        shape_reason: '' when the first spike's shape was measured, otherwise why not.
        pattern: the :class:`FiringPattern`.
    """

    spike_times: np.ndarray
    n_spikes: int
    latency: float
    isis: np.ndarray
    rate: float
    adaptation_index: float
    isi_ratio: float
    threshold: float
    amplitude: float
    half_width: float
    ahp_depth: float
    shape_reason: str
    pattern: FiringPattern


def step_firing(trace: np.ndarray, dt: float, onset: float, stop: float, *,
                spike_times: np.ndarray | None = None, t0: float = 0.0,
                criterion: float = DVDT_CRITERION, min_height: float = MIN_SPIKE_HEIGHT,
                ahp_window: float = AHP_WINDOW) -> StepFiring:
    """Spike timing, first-spike shape and pattern label of one depolarising step.

    Args:
        trace: 1-D membrane potential (V); may be empty when ``spike_times`` are given
            and no shape is wanted.
        dt: sampling interval (s).
        onset, stop: step interval (s).
        spike_times: the model's spike times (s); None to detect them from the trace.
        t0: time of sample 0 (s).
        criterion, min_height, ahp_window: see :func:`spike_shapes`.

    Returns:
        A :class:`StepFiring`.
    """
    v = np.asarray(trace, dtype=float)
    shapes = spike_shapes(v, dt, spike_times, t0=t0, criterion=criterion, min_height=min_height,
                          ahp_window=ahp_window)
    st = spikes_in_step(shapes.times, onset, stop)
    inside = (shapes.times >= onset) & (shapes.times < stop)
    first = int(np.argmax(inside)) if inside.any() else -1
    nan = math.nan
    thr = amp = hw = ahp = nan
    if first >= 0 and shapes.shaped[first]:
        thr, amp = float(shapes.threshold[first]), float(shapes.amplitude[first])
        hw, ahp = float(shapes.half_width[first]), float(shapes.ahp_depth[first])
        reason = ""
    elif first >= 0:
        reason = shapes.reason
    else:
        resets = count_resets(v, dt, t0=t0, criterion=criterion) if spike_times is None else 0
        reason = (f"no spikes detected, but the trace shows {resets} integrate-and-fire resets: "
                  f"pass the model's spike times") if resets else REASON_NO_SPIKES
    isi = np.diff(st)
    pattern = firing_pattern(st, onset, stop, half_width=hw)
    return StepFiring(spike_times=st, n_spikes=int(st.size), latency=float(st[0] - onset) if st.size else nan,
                      isis=isi, rate=st.size / (stop - onset), adaptation_index=adaptation_index(isi),
                      isi_ratio=float(isi[-1] / isi[0]) if isi.size else nan, threshold=thr,
                      amplitude=amp, half_width=hw, ahp_depth=ahp, shape_reason=reason, pattern=pattern)


# --- F-I curve and rheobase ---------------------------------------------------------------

@dataclass(frozen=True)
class FICurve:
    """An F-I curve, SI units.

    Attributes:
        current: (m,) step currents, ascending (A).
        rate: (m,) firing rates (Hz).
        slope: least-squares slope over the supra-threshold points (Hz/A), NaN if < 2.
        n_supra: number of supra-threshold points.
        lowest_firing: smallest tested current with a rate above zero (A), NaN if none.
    """

    current: np.ndarray
    rate: np.ndarray
    slope: float
    n_supra: int
    lowest_firing: float


def fi_slope(currents: np.ndarray, rates: np.ndarray) -> float:
    """Least-squares slope of rate against current over the points with rate > 0.

    Args:
        currents: (m,) step currents (A).
        rates: (m,) firing rates (Hz).

    Returns:
        Slope in Hz/A; NaN with fewer than two supra-threshold points or a single current.

    Raises:
        ValueError: if the arrays differ in length.
    """
    i = np.asarray(currents, dtype=float).ravel()
    f = np.asarray(rates, dtype=float).ravel()
    if i.shape != f.shape:
        raise ValueError(f"currents and rates differ in length ({i.size} vs {f.size})")
    keep = np.isfinite(i) & np.isfinite(f) & (f > 0)
    i, f = i[keep], f[keep]
    if i.size < 2:
        return math.nan
    di = i - i.mean()
    ss = float(np.sum(di * di))
    if ss == 0.0:
        return math.nan
    return float(np.sum(di * (f - f.mean())) / ss)


def fi_curve(currents: np.ndarray, responses: np.ndarray, *, duration: float | None = None) -> FICurve:
    """F-I curve from (current, spike count or rate) pairs.

    Args:
        currents: (m,) step currents (A).
        responses: (m,) spike counts when ``duration`` is given, else rates (Hz).
        duration: step duration (s) that turns counts into rates.

    Returns:
        A :class:`FICurve` sorted by current.

    Raises:
        ValueError: if the arrays differ in length or ``duration`` is not positive.
    """
    i = np.asarray(currents, dtype=float).ravel()
    r = np.asarray(responses, dtype=float).ravel()
    if i.shape != r.shape:
        raise ValueError(f"currents and responses differ in length ({i.size} vs {r.size})")
    if duration is not None:
        if not duration > 0:
            raise ValueError(f"step duration must be positive, got {duration!r} s")
        r = r / duration
    order = np.argsort(i, kind="stable")
    i, r = i[order], r[order]
    firing = r > 0
    return FICurve(current=i, rate=r, slope=fi_slope(i, r), n_supra=int(np.count_nonzero(firing)),
                   lowest_firing=float(i[firing][0]) if firing.any() else math.nan)


@dataclass(frozen=True)
class RheobaseSearch:
    """Result of :func:`rheobase_search`, one entry per cell, SI units.

    Attributes:
        rheobase: (n_cells,) smallest current seen to fire (A); NaN where refused.
        low, high: (n_cells,) final bracket (A): ``low`` silent, ``high`` firing.
        rounds: batches simulated, the bracket check included.
        n_tested: currents simulated in total (all cells, all rounds).
        reasons: per cell, '' when found, otherwise why not (or a warning).
    """

    rheobase: np.ndarray
    low: np.ndarray
    high: np.ndarray
    rounds: int
    n_tested: int
    reasons: tuple


def _run_fire(fire: Callable[[np.ndarray], np.ndarray], currents: np.ndarray) -> np.ndarray:
    out = np.asarray(fire(currents))
    if out.shape != currents.shape:
        raise ValueError(f"fire() must return one bool per current, shape {currents.shape}, "
                         f"got shape {out.shape}")
    return out.astype(bool)


def rheobase_search(fire: Callable[[np.ndarray], np.ndarray], low, high, *, tolerance: float,
                    parallel: int = 8, max_rounds: int = 60) -> RheobaseSearch:
    """Vectorised multi-section search for the rheobase of one or many cells.

    ``fire`` simulates a whole batch at once: it receives an array of shape
    ``(n_cells, m)`` (row c holds currents for cell c, in A) and returns a bool array of the
    same shape, True where the step made the cell spike. The first round tests both ends of
    every bracket (m = 2); each later round tests ``parallel`` currents evenly spaced inside
    every cell's current bracket (m = ``parallel``) and keeps the interval between the
    highest silent and the lowest firing current. Rows of refused cells still receive
    finite currents (inside their given bracket) so the batch shape stays fixed; their
    results are ignored. The search stops when every accepted bracket is no wider than
    ``tolerance``.

    Args:
        fire: batch simulator, see above.
        low: lower bracket end(s) (A), scalar or (n_cells,); must not fire.
        high: upper bracket end(s) (A), scalar or (n_cells,); must fire.
        tolerance: largest final bracket width (A).
        parallel: currents tested per cell per round.
        max_rounds: safety bound on the number of rounds.

    Returns:
        A :class:`RheobaseSearch`; a cell whose low end fires or whose high end does not
        gets NaN and the reason.

    Raises:
        ValueError: on a non-positive tolerance, ``parallel`` < 1, non-finite or empty
            brackets (``low >= high``), or a ``fire`` result of the wrong shape.
    """
    lo, hi = np.broadcast_arrays(np.atleast_1d(np.asarray(low, dtype=float)),
                                 np.atleast_1d(np.asarray(high, dtype=float)))
    lo, hi = lo.astype(float).ravel().copy(), hi.astype(float).ravel().copy()
    if not (math.isfinite(tolerance) and tolerance > 0):
        raise ValueError(f"tolerance must be a positive current in A, got {tolerance!r}")
    if int(parallel) != parallel or parallel < 1:
        raise ValueError(f"parallel must be a positive whole number of currents, got {parallel!r}")
    parallel = int(parallel)
    if not (np.all(np.isfinite(lo)) and np.all(np.isfinite(hi))):
        raise ValueError("bracket ends must be finite currents in A")
    if np.any(lo >= hi):
        bad = int(np.nonzero(lo >= hi)[0][0])
        raise ValueError(f"bracket of cell {bad} is empty: low {lo[bad]!r} A >= high {hi[bad]!r} A; "
                         f"give low < high")
    n = lo.size
    reasons = ["" for _ in range(n)]
    ends = _run_fire(fire, np.stack([lo, hi], axis=1))
    rounds, n_tested = 1, 2 * n
    ok = ~ends[:, 0] & ends[:, 1]
    for c in range(n):
        if ends[c, 0]:
            reasons[c] = f"refused: the low end {lo[c]:.6g} A already fires; lower it"
        elif not ends[c, 1]:
            reasons[c] = f"refused: the high end {hi[c]:.6g} A does not fire; raise it"
    frac = np.arange(1, parallel + 1) / (parallel + 1)
    while np.any(ok & (hi - lo > tolerance)):
        if rounds >= max_rounds:
            for c in np.nonzero(ok & (hi - lo > tolerance))[0]:
                reasons[c] = f"stopped after {max_rounds} rounds with the bracket still wider than tolerance"
            break
        pts = lo[:, None] + (hi - lo)[:, None] * frac[None, :]
        res = _run_fire(fire, pts)
        rounds += 1
        n_tested += pts.size
        for c in np.nonzero(ok)[0]:
            fired = np.nonzero(res[c])[0]
            if fired.size == 0:
                lo[c] = pts[c, -1]
                continue
            j = int(fired[0])
            if np.any(~res[c, j:]) and not reasons[c]:
                reasons[c] = "warning: firing was not monotonic in current; the lowest firing current was kept"
            new_lo = pts[c, j - 1] if j > 0 else lo[c]
            hi[c] = pts[c, j]
            lo[c] = new_lo
    converged = ok & (hi - lo <= tolerance)
    rheobase = np.where(converged, hi, np.nan)
    return RheobaseSearch(rheobase=rheobase, low=lo, high=hi, rounds=rounds, n_tested=n_tested,
                          reasons=tuple(reasons))
