"""Tests of the single-cell measures against closed forms, published firing patterns and independent integrations."""

from __future__ import annotations

import functools
import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.optimize import brentq

from protolang.measure import cell as C

MV = 1e-3
MS = 1e-3
PA = 1e-12
NS = 1e-9
PF = 1e-12
MOHM = 1e6


# --- independent reference: adaptive exponential integrate-and-fire ----------------------
# Equations of Brette and Gerstner 2005 (J Neurophysiol 94:3637-3642), integrated here with
# scipy's solve_ivp (RK45, tight tolerances) and a terminal event at the spike cut, then
# restarted from the reset: no fixed time step, so it shares no code or scheme with the
# Brian2 engine.

ADEX_VT = -50.0 * MV
ADEX_DELTA_T = 2.0 * MV
ADEX_CUT = 0.0          # spike cut at 0 mV, as in the Naud et al. 2008 set-up


def adex_run(c_m, g_l, e_l, a, tau_w, b, v_r, current, *, onset, stop, t_end, sample_dt=None):
    """Spike times (s) and, if ``sample_dt`` is given, the potential sampled every sample_dt (V)."""

    def rhs(t, y):
        v, w = y
        i_inj = current if onset <= t < stop else 0.0
        expo = math.exp(min((v - ADEX_VT) / ADEX_DELTA_T, 50.0))
        return [(-g_l * (v - e_l) + g_l * ADEX_DELTA_T * expo - w + i_inj) / c_m,
                (a * (v - e_l) - w) / tau_w]

    def cut(t, y):
        return y[0] - ADEX_CUT
    cut.terminal = True
    cut.direction = 1

    # The step edges are integration breakpoints so the solver never straddles them.
    edges = [0.0, onset, stop, t_end]
    samples = None if sample_dt is None else np.full(int(round(t_end / sample_dt)), np.nan)
    spikes = []
    t, y = 0.0, [e_l, 0.0]
    for seg_end in edges[1:]:
        while t < seg_end:
            sol = solve_ivp(rhs, (t, seg_end), y, events=cut, method="RK45", rtol=1e-8,
                            atol=[1e-9, 1e-15], max_step=1e-3, dense_output=samples is not None)
            t_stop = sol.t_events[0][0] if sol.t_events[0].size else seg_end
            if samples is not None:
                k0 = math.ceil(t / sample_dt - 1e-9)
                k1 = min(math.ceil(t_stop / sample_dt - 1e-9), samples.size)
                if k1 > k0:
                    samples[k0:k1] = sol.sol(sample_dt * np.arange(k0, k1))[0]
            if sol.t_events[0].size:
                spikes.append(float(t_stop))
                t, y = float(t_stop), [v_r, float(sol.y_events[0][0][1]) + b]
            else:
                t, y = float(seg_end), [float(sol.y[0][-1]), float(sol.y[1][-1])]
    return np.asarray(spikes), samples


# Naud, Marcille, Clopath and Gerstner 2008, Biol Cybern 99:335-347, firing-pattern parameter
# sets (Table 1, as adapted to the published figures in a public reimplementation; REFERENCES
# A9): C (pF), g_L (nS), E_L (mV), a (nS), tau_w (ms), b (pA), V_r (mV), step I (pA), and the
# label the paper gives the pattern, mapped to our trade labels.
NAUD_2008 = {
    "tonic spiking": ((200, 10, -70, 2, 30, 0, -58, 500), "tonic"),
    "adaptation": ((200, 12, -70, 2, 300, 60, -58, 500), "adapting"),
    "initial burst": ((130, 18, -58, 4, 150, 120, -50, 400), "initial burst"),
    "regular bursting": ((200, 10, -58, 2, 120, 100, -46, 210), "bursting"),
    "delayed accelerating": ((200, 12, -70, -10, 300, 0, -58, 300), "delayed"),
    "delayed regular bursting": ((100, 10, -65, -10, 90, 30, -47, 110), "delayed"),
    "transient spiking": ((100, 10, -65, 10, 90, 100, -47, 180), "transient"),
    "irregular spiking": ((100, 12, -60, -11, 130, 30, -48, 160), "irregular"),
}
NAUD_ONSET = 0.100          # s of rest before the step
NAUD_STEP = 0.600           # s, the step length of the paper's figures


def _naud_si(row):
    c, gl, el, a, tw, b, vr, i = row
    return dict(c_m=c * PF, g_l=gl * NS, e_l=el * MV, a=a * NS, tau_w=tw * MS, b=b * PA,
                v_r=vr * MV, current=i * PA)


@functools.lru_cache(maxsize=None)
def naud_run(name, sample_dt=None):
    row, _ = NAUD_2008[name]
    return adex_run(**_naud_si(row), onset=NAUD_ONSET, stop=NAUD_ONSET + NAUD_STEP,
                    t_end=NAUD_ONSET + NAUD_STEP, sample_dt=sample_dt)


@pytest.mark.parametrize("name", list(NAUD_2008))
def test_naud_2008_patterns_get_the_published_label(name):
    # Naud, Marcille, Clopath & Gerstner 2008, Biol Cybern 99:335-347 (pattern names per set);
    # the 600 ms step of the paper suffices for every set.
    spikes, _ = naud_run(name)
    pattern = C.firing_pattern(spikes, NAUD_ONSET, NAUD_ONSET + NAUD_STEP)
    expected = NAUD_2008[name][1]
    assert pattern.label == expected, (name, pattern.rule, pattern.numbers)
    assert pattern.label in C.PATTERN_LABELS
    assert pattern.rule and pattern.numbers["n_spikes"] == spikes.size


def test_naud_adaptation_trace_without_spike_shape_goes_through_step_firing():
    # Naud et al. 2008 "adaptation" set, sampled at 10 kHz: the label survives the full
    # per-sweep path with the model's spike times, and the shape values are refused.
    dt = 1e-4
    spikes, trace = naud_run("adaptation", sample_dt=dt)
    res = C.step_firing(trace, dt, NAUD_ONSET, NAUD_ONSET + NAUD_STEP, spike_times=spikes)
    assert res.pattern.label == "adapting"
    assert res.n_spikes == spikes.size
    assert res.latency == pytest.approx(spikes[0] - NAUD_ONSET)
    assert res.adaptation_index > 0 and res.isi_ratio > C.ADAPTING_ISI_RATIO
    assert math.isnan(res.threshold) and math.isnan(res.half_width) and math.isnan(res.ahp_depth)
    assert "reset" in res.shape_reason


# --- integrate-and-fire traces have no spike shape ---------------------------------------

def test_adex_trace_gives_nan_shape_with_the_reset_reason():
    # Brette & Gerstner 2005 AdEx with the Naud et al. 2008 "tonic spiking" set: the trace
    # is cut and reset, so threshold, amplitude, half-width and AHP must be NaN, not numbers.
    dt = 1e-4
    spikes, trace = naud_run("tonic spiking", sample_dt=dt)
    assert spikes.size > 20
    shapes = C.spike_shapes(trace, dt, spikes)
    assert shapes.times.size == spikes.size
    assert not shapes.shaped.any()
    for arr in (shapes.threshold, shapes.amplitude, shapes.half_width, shapes.ahp_depth):
        assert np.all(np.isnan(arr))
    assert C.REASON_RESET in shapes.reason
    # Detecting spikes from such a trace finds none and says why.
    assert C.detect_spikes(trace, dt).size == 0
    res = C.step_firing(trace, dt, NAUD_ONSET, NAUD_ONSET + NAUD_STEP)
    assert res.n_spikes == 0 and "integrate-and-fire resets" in res.shape_reason


def lif_spike_times(current, *, tau, r, e_l, theta, v_r, t_ref, onset, stop):
    """Exact spike times of a leaky integrate-and-fire cell starting at rest (A12)."""
    drive = r * current + e_l
    if drive <= theta:
        return np.zeros(0)
    first = tau * math.log((drive - e_l) / (drive - theta))
    isi = t_ref + tau * math.log((drive - v_r) / (drive - theta))
    times = onset + first + isi * np.arange(int((stop - onset) / isi) + 2)
    return times[times < stop]


def lif_trace(current, *, tau, r, e_l, theta, v_r, t_ref, onset, stop, t_end, dt):
    """Exact sampled potential of the same cell (charging curves between resets)."""
    t = dt * np.arange(int(round(t_end / dt)))
    spikes = lif_spike_times(current, tau=tau, r=r, e_l=e_l, theta=theta, v_r=v_r, t_ref=t_ref,
                             onset=onset, stop=stop)
    v = np.full(t.size, e_l)
    drive = r * current + e_l
    starts = np.concatenate(([onset], spikes + t_ref))
    start_v = np.concatenate(([e_l], np.full(spikes.size, v_r)))
    for k, (t_a, v_a) in enumerate(zip(starts, start_v)):
        t_b = spikes[k] if k < spikes.size else stop
        sel = (t >= t_a) & (t < t_b)
        v[sel] = drive + (v_a - drive) * np.exp(-(t[sel] - t_a) / tau)
    for s in spikes:
        v[(t >= s) & (t < s + t_ref)] = v_r
    return v, spikes


LIF = dict(tau=20 * MS, r=100 * MOHM, e_l=-70 * MV, theta=-50 * MV, v_r=-70 * MV, t_ref=2 * MS)


def test_lif_trace_gives_nan_shape_with_the_no_upstroke_reason():
    # Leaky integrate-and-fire (textbook; Gerstner, Kistler, Naud & Paninski 2014, Neuronal Dynamics):
    # the potential creeps to threshold and resets, so no spike shape exists.
    dt = 1e-4
    v, spikes = lif_trace(400 * PA, **LIF, onset=0.1, stop=0.6, t_end=0.7, dt=dt)
    assert spikes.size > 5
    shapes = C.spike_shapes(v, dt, spikes)
    assert not shapes.shaped.any() and np.all(np.isnan(shapes.half_width))
    assert C.REASON_NO_UPSTROKE in shapes.reason
    res = C.step_firing(v, dt, 0.1, 0.6, spike_times=spikes)
    assert res.n_spikes == spikes.size and math.isnan(res.amplitude)
    assert res.pattern.label == "tonic"        # regular firing, no adaptation in a LIF


# --- LIF closed form: rheobase search, rates, F-I slope ----------------------------------

def lif_fire_factory(tau, r, theta_minus_el, duration):
    """Exact vectorised LIF ``fire``: spikes within ``duration`` iff R I (1 - e^(-T/tau)) > theta - E_L."""
    r = np.asarray(r, dtype=float)[:, None]
    gap = np.asarray(theta_minus_el, dtype=float)[:, None]
    calls = []

    def fire(currents):
        calls.append(currents.shape)
        return r * currents * (1.0 - math.exp(-duration / tau)) > gap

    return fire, calls


def test_rheobase_search_finds_lif_rheobase_per_cell():
    # Leaky IF rheobase I_rh = (theta - E_L) / R (textbook closed form, REFERENCES A12;
    # Gerstner et al. 2014, Neuronal Dynamics). A 1 s step makes the finite-duration
    # correction e^(-50) negligible.
    r = np.array([100, 200, 50, 300]) * MOHM
    gap = np.array([20, 15, 25, 12]) * MV
    exact = gap / r
    tol = 1 * PA
    fire, calls = lif_fire_factory(20 * MS, r, gap, 1.0)
    res = C.rheobase_search(fire, np.zeros(4), np.full(4, 1000 * PA), tolerance=tol, parallel=8)
    assert all(reason == "" for reason in res.reasons)
    assert np.all(res.rheobase >= exact) and np.all(res.rheobase - exact <= tol)
    assert np.all(res.high - res.low <= tol)
    # One batch per round, one row per cell; 1 bracket check + ceil(log_9(1000 pA / 1 pA)) rounds.
    assert res.rounds == 1 + math.ceil(math.log(1000) / math.log(9)) == len(calls)
    assert calls[0] == (4, 2) and all(shape == (4, 8) for shape in calls[1:])
    assert res.n_tested == 4 * 2 + 4 * 8 * (res.rounds - 1)
    # Bisection (one current per round) needs more rounds for the same tolerance.
    fire1, _ = lif_fire_factory(20 * MS, r, gap, 1.0)
    res1 = C.rheobase_search(fire1, np.zeros(4), np.full(4, 1000 * PA), tolerance=tol, parallel=1)
    assert np.all(np.abs(res1.rheobase - exact) <= tol) and res1.rounds > res.rounds


def test_rheobase_search_refuses_a_bad_bracket():
    # A bracket must have a silent low end and a firing high end (common practice, no
    # single source): otherwise NaN with the reason, never an invented value.
    r = np.array([100, 100, 100]) * MOHM
    gap = np.array([20, 20, 20]) * MV                       # rheobase 200 pA each
    fire, _ = lif_fire_factory(20 * MS, r, gap, 1.0)
    res = C.rheobase_search(fire, np.array([250, 0, 0]) * PA, np.array([400, 150, 400]) * PA,
                            tolerance=1 * PA)
    assert math.isnan(res.rheobase[0]) and "low end" in res.reasons[0]
    assert math.isnan(res.rheobase[1]) and "high end" in res.reasons[1]
    assert res.rheobase[2] == pytest.approx(200 * PA, abs=1 * PA) and res.reasons[2] == ""
    with pytest.raises(ValueError, match="low"):
        C.rheobase_search(fire, np.array([300, 0, 0]) * PA, np.array([200, 400, 400]) * PA,
                          tolerance=1 * PA)
    with pytest.raises(ValueError, match="tolerance"):
        C.rheobase_search(fire, 0.0, 1e-9, tolerance=0.0)


def lif_rate(current, *, tau, r, e_l, theta, v_r, t_ref):
    # REFERENCES A12: f = 1 / (t_ref + tau ln((R I + E_L - V_r) / (R I + E_L - theta))) above rheobase.
    drive = r * current + e_l
    if drive <= theta:
        return 0.0
    return 1.0 / (t_ref + tau * math.log((drive - v_r) / (drive - theta)))


def test_fi_curve_and_slope_match_the_lif_rate_formula():
    # Leaky IF firing rate in closed form (textbook, REFERENCES A12): rates measured from
    # exact spike trains (count / step duration) lie within 1 / T of the formula, and the
    # least-squares slope over the supra-threshold points matches the formula's within 1 %.
    onset, duration = 0.1, 10.0
    currents = np.arange(100, 625, 25) * PA
    counts = [C.spikes_in_step(lif_spike_times(i, **LIF, onset=onset, stop=onset + duration),
                               onset, onset + duration).size for i in currents]
    curve = C.fi_curve(currents[::-1], np.asarray(counts[::-1]), duration=duration)
    exact = np.array([lif_rate(i, **LIF) for i in currents])
    assert np.array_equal(curve.current, currents)
    assert np.all(np.abs(curve.rate - exact) <= 1.0 / duration + 1e-9)
    assert np.all(curve.rate[currents <= 200 * PA] == 0)
    assert curve.lowest_firing == pytest.approx(225 * PA)
    supra = exact > 0
    slope_exact = np.polyfit(currents[supra], exact[supra], 1)[0]
    assert curve.n_supra == int(supra.sum())
    assert curve.slope == pytest.approx(slope_exact, rel=0.01)
    assert curve.slope * C.HZ_PER_A_TO_HZ_PER_NA == pytest.approx(slope_exact * 1e-9, rel=0.01)
    assert math.isnan(C.fi_slope(currents[:3], [0.0, 0.0, 5.0]))


# --- passive properties --------------------------------------------------------------------

def test_passive_charging_curve_gives_input_resistance_and_tau():
    # Passive single compartment V = E_L + I R (1 - e^(-t/tau)) (textbook; Johnston & Wu
    # 1995, Foundations of Cellular Neurophysiology; REFERENCES A1), with recording noise.
    rng = np.random.default_rng(20240611)
    dt, onset, stop, t_end = 1e-4, 0.1, 0.6, 0.8
    e_l, r, tau, i = -70 * MV, 150 * MOHM, 20 * MS, -50 * PA
    t = dt * np.arange(int(round(t_end / dt)))
    v = np.full(t.size, e_l)
    on = (t >= onset) & (t < stop)
    v[on] += i * r * (1.0 - np.exp(-(t[on] - onset) / tau))
    off = t >= stop
    v_stop = i * r * (1.0 - math.exp(-(stop - onset) / tau))
    v[off] += v_stop * np.exp(-(t[off] - stop) / tau)
    v += rng.normal(0.0, 0.2 * MV, t.size)
    p = C.passive_properties(v, dt, onset, stop, i)
    assert p.rest == pytest.approx(e_l, abs=0.05 * MV)
    assert p.input_resistance == pytest.approx(r, rel=0.01)
    assert p.tau == pytest.approx(tau, rel=0.02)
    # A passive cell has no sag beyond the noise bias of the smoothed peak: at most ~4 SD of
    # the noise averaged over the 5 ms peak window, relative to the deflection.
    bias_bound = 4 * 0.2 * MV / math.sqrt(C.PEAK_SMOOTH / dt) / abs(i * r)
    assert 0.0 <= p.sag_ratio < bias_bound
    assert C.input_resistance(v, dt, onset, stop, i) == pytest.approx(p.input_resistance)
    assert C.membrane_time_constant(v, dt, onset, stop) == pytest.approx(p.tau)
    with pytest.raises(ValueError, match="non-zero"):
        C.input_resistance(v, dt, onset, stop, 0.0)


def test_membrane_tau_is_nan_when_the_fit_has_nothing_to_fit():
    # Never invent: a flat trace has no charging curve to fit (common practice, no single source).
    v = np.full(5000, -70 * MV)
    assert math.isnan(C.membrane_time_constant(v, 1e-4, 0.1, 0.4))
    assert math.isnan(C.fit_charging(np.arange(5) * 1e-4, np.full(5, -0.07)))


def test_sag_ratio_on_a_known_sag():
    # Synthetic sag: dV(t) = -A (1 - e^(-t/tau_m)) + B (1 - e^(-t/tau_h)); its minimum is at
    # t* = ln(A tau_h / (B tau_m)) / (1/tau_m - 1/tau_h) (closed form, derived here).
    dt, onset, stop, t_end = 1e-4, 0.1, 1.1, 1.2
    e_l, a_mv, b_mv, tau_m, tau_h = -65 * MV, 12 * MV, 4 * MV, 15 * MS, 80 * MS
    t = dt * np.arange(int(round(t_end / dt)))
    v = np.full(t.size, e_l)
    on = (t >= onset) & (t < stop)
    s = t[on] - onset
    v[on] += -a_mv * (1 - np.exp(-s / tau_m)) + b_mv * (1 - np.exp(-s / tau_h))
    t_star = math.log(a_mv * tau_h / (b_mv * tau_m)) / (1 / tau_m - 1 / tau_h)
    v_min = e_l - a_mv * (1 - math.exp(-t_star / tau_m)) + b_mv * (1 - math.exp(-t_star / tau_h))
    v_ss = e_l - a_mv + b_mv
    expected = (v_min - v_ss) / (v_min - e_l)
    assert C.sag_ratio(v, dt, onset, stop) == pytest.approx(expected, rel=0.005)
    p = C.passive_properties(v, dt, onset, stop, -100 * PA)
    assert p.t_peak - onset == pytest.approx(t_star, abs=0.5 * MS)
    assert p.peak == pytest.approx(v_min, abs=0.01 * MV)


# --- spike shape --------------------------------------------------------------------------

def gaussian_spike(dt, *, base=-65 * MV, height=100 * MV, sigma=0.25 * MS, t_spike=50 * MS,
                   ahp=8 * MV, ahp_delay=5 * MS, ahp_sigma=1 * MS, t_end=80 * MS):
    t = dt * np.arange(int(round(t_end / dt)))
    v = base + height * np.exp(-0.5 * ((t - t_spike) / sigma) ** 2) \
        - ahp * np.exp(-0.5 * ((t - t_spike - ahp_delay) / ahp_sigma) ** 2)
    # Closed forms: dV/dt = (H/sigma) u e^(-u^2/2) with u = (t_spike - t)/sigma on the rise
    # (the AHP term contributes < 1e-6 mV there).
    u = brentq(lambda x: height / sigma * x * math.exp(-0.5 * x * x) - C.DVDT_CRITERION, 1.0, 10.0,
               xtol=1e-14)
    v_thr = base + height * math.exp(-0.5 * u * u)
    v_peak = base + height
    half = 0.5 * (v_thr + v_peak)
    width = 2.0 * sigma * math.sqrt(2.0 * math.log(height / (half - base)))
    return v, dict(threshold=v_thr, peak=v_peak, half_width=width, ahp_depth=v_thr - (base - ahp),
                   t_thr=t_spike - u * sigma)


@pytest.mark.parametrize("dt, tol_v, tol_w", [(2e-5, 0.1 * MV, 0.005), (1e-4, 0.5 * MV, 0.03)])
def test_gaussian_spike_shape_measures(dt, tol_v, tol_w):
    # Synthetic spike of known threshold, peak and half-width (closed forms of a Gaussian,
    # derived here) followed by a Gaussian AHP of known depth.
    v, exact = gaussian_spike(dt)
    times = C.detect_spikes(v, dt)
    assert times.size == 1 and times[0] == pytest.approx(exact["t_thr"], abs=dt)
    s = C.spike_shapes(v, dt)
    assert s.reason == "" and s.shaped.all()
    assert s.threshold[0] == pytest.approx(exact["threshold"], abs=tol_v)
    assert s.peak[0] == pytest.approx(exact["peak"], abs=tol_v)
    assert s.amplitude[0] == pytest.approx(exact["peak"] - exact["threshold"], abs=2 * tol_v)
    assert s.half_width[0] == pytest.approx(exact["half_width"], rel=tol_w)
    assert s.ahp_depth[0] == pytest.approx(exact["ahp_depth"], abs=tol_v)
    assert s.ahp_depth[0] > 0
    # Given spike times (e.g. a 0 mV crossing from a simulator) find the same upstroke.
    given = C.spike_shapes(v, dt, [exact["t_thr"] + 0.3 * MS])
    assert given.threshold[0] == pytest.approx(s.threshold[0])


def hh_run(i_amp, *, onset=10.0, stop=60.0, t_end=70.0, dt=0.01):
    """Hodgkin & Huxley 1952 squid axon, 6.3 degC, mV/ms/uA/cm^2 (REFERENCES A8), via solve_ivp."""
    def rates(v):
        am = 0.1 * (v + 40) / (1 - math.exp(-(v + 40) / 10))
        bm = 4 * math.exp(-(v + 65) / 18)
        ah = 0.07 * math.exp(-(v + 65) / 20)
        bh = 1 / (1 + math.exp(-(v + 35) / 10))
        an = 0.01 * (v + 55) / (1 - math.exp(-(v + 55) / 10))
        bn = 0.125 * math.exp(-(v + 65) / 80)
        return am, bm, ah, bh, an, bn

    def rhs(t, y):
        v, m, h, n = y
        am, bm, ah, bh, an, bn = rates(v)
        i_inj = i_amp if onset <= t < stop else 0.0
        i_ion = 120 * m ** 3 * h * (v - 50) + 36 * n ** 4 * (v + 77) + 0.3 * (v + 54.387)
        return [i_inj - i_ion, am * (1 - m) - bm * m, ah * (1 - h) - bh * h, an * (1 - n) - bn * n]

    def up(t, y):
        return y[0]
    up.direction = 1

    t_eval = dt * np.arange(int(round(t_end / dt)))
    y0 = [-64.996, 0.0530, 0.5960, 0.3177]     # resting state (REFERENCES A8)
    sol = solve_ivp(rhs, (0.0, t_end), y0, t_eval=t_eval, events=up, method="LSODA",
                    rtol=1e-8, atol=1e-8, max_step=0.05)
    return sol.y[0] * MV, sol.t_events[0] * MS, dt * MS


def test_hodgkin_huxley_spikes_are_detected_and_shaped():
    # Hodgkin & Huxley 1952, J Physiol 117:500-544, 6.3 degC, 10 uA/cm^2 step: repetitive
    # firing with a first spike peaking near +40.3 mV (REFERENCES A8, derived there with RK4).
    v, zero_crossings, dt = hh_run(10.0)
    times = C.detect_spikes(v, dt)
    assert times.size == zero_crossings.size >= 3
    # Threshold crossings precede each 0 mV crossing by less than 1.5 ms.
    lead = zero_crossings - times
    assert np.all((lead > 0) & (lead < 1.5 * MS))
    s = C.spike_shapes(v, dt)
    assert s.reason == ""
    assert s.peak[0] == pytest.approx(40.3 * MV, abs=0.5 * MV)
    assert np.all(s.threshold < -40 * MV) and np.all(s.threshold > -65 * MV)
    assert np.all(s.half_width > 0.5 * MS) and np.all(s.half_width < 3 * MS)
    assert np.all(s.ahp_depth > 0)
    # Level crossings at 0 mV reproduce the solver's own event times.
    assert np.allclose(C.detect_spikes(v, dt, level=0.0), zero_crossings, atol=dt)
    res = C.step_firing(v, dt, 10 * MS, 60 * MS)
    assert res.shape_reason == "" and res.threshold == pytest.approx(s.threshold[0])
    assert res.pattern.label in ("tonic", "adapting")


# --- firing-pattern rules on constructed trains ------------------------------------------

@pytest.mark.parametrize("spikes, half_width, label", [
    ([], math.nan, "silent"),
    (np.arange(0.010, 1.0, 0.005), 0.3e-3, "fast spiking"),           # 200 Hz, narrow spikes
    (np.arange(0.010, 1.0, 0.005), math.nan, "tonic"),                # same train, no shape known
    (np.arange(0.010, 1.0, 0.005), 1.0e-3, "tonic"),                  # same train, broad spikes
    ([0.010, 0.030, 0.050], math.nan, "transient"),
    ([0.700], math.nan, "delayed"),
])
def test_pattern_rules_on_constructed_trains(spikes, half_width, label):
    # The written label rules (common practice, no single source) on trains built to sit
    # clearly on one side of each threshold.
    assert C.firing_pattern(np.asarray(spikes), 0.0, 1.0, half_width=half_width).label == label


def test_adaptation_index_and_cv2_definitions():
    # Adaptation index as mean normalised ISI difference (common practice, no single
    # source); CV2 as defined by Holt, Softky, Koch & Douglas 1996, J Neurophysiol 75:1806-1814.
    isi = np.array([10.0, 20.0, 20.0, 40.0])
    assert C.adaptation_index(isi) == pytest.approx((10 / 30 + 0 + 20 / 60) / 3)
    assert C.cv2(isi) == pytest.approx((20 / 30 + 0 + 40 / 60) / 3)
    assert math.isnan(C.adaptation_index([5.0]))
