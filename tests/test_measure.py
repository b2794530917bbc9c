"""Tests of the result collectors and the run writer against closed forms and textbook statistics."""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import brentq

from protolang.engine.recordings import Recordings
from protolang.measure import features as F
from protolang.measure.collect import collect
from protolang.plan.model import (CurrentPulse, MeasurePlan, Plan, ReceptorPlan, RolePlan,
                                  StimulusEvent, SynapsePlan)
from protolang.report.write import read_recordings_npz, write_recordings_npz, write_run

DT = 1e-4            # 10 kHz sampling
MV = 1e-3
MS = 1e-3
REPO = Path(__file__).resolve().parents[1]


# --- synthetic waveforms -------------------------------------------------------------

def doe(t, t1, t2):
    """Difference of exponentials e^(-t/t2) - e^(-t/t1), zero before t = 0."""
    t = np.asarray(t, dtype=float)
    return np.where(t > 0, np.exp(-np.clip(t, 0, None) / t2) - np.exp(-np.clip(t, 0, None) / t1), 0.0)


def doe_peak_time(t1, t2):
    # REFERENCES.md A2: t_peak = t1*t2/(t2-t1)*ln(t2/t1) (closed form of the difference of exponentials)
    return t1 * t2 / (t2 - t1) * math.log(t2 / t1)


def unit_psp(t, t1, t2):
    """Difference-of-exponentials PSP scaled to a peak of exactly 1."""
    return doe(t, t1, t2) / float(doe(doe_peak_time(t1, t2), t1, t2))


def level_time(t1, t2, fraction):
    """Exact time the unit PSP rises through ``fraction`` of its peak (brentq on the closed form)."""
    tp = doe_peak_time(t1, t2)
    return brentq(lambda x: float(unit_psp(x, t1, t2)) - fraction, 1e-12, tp, xtol=1e-15)


# --- per-response features against closed forms -----------------------------------------

T1, T2 = 1.0 * MS, 20.0 * MS
DELAY = 1.2 * MS
EVENT = 0.10003       # between two samples on purpose


def _psp_trace(amplitude=1.0 * MV, t1=T1, t2=T2, rest=-70 * MV, length=0.3, event=EVENT, delay=DELAY):
    t = np.arange(0, length, DT)
    return rest + amplitude * unit_psp(t - event - delay, t1, t2)


@pytest.mark.parametrize("smooth, rise_tol", [(0.0, 0.005), (F.DEFAULT_SMOOTH, 0.015)])
def test_difference_of_exponentials_psp(smooth, rise_tol):
    trace = _psp_trace()
    f = F.response_features(trace, DT, EVENT, EVENT + 0.040, smooth=smooth)
    # Closed forms of REFERENCES.md A2 (difference of exponentials), solved with brentq
    t20, t80, t10 = (level_time(T1, T2, x) for x in (0.2, 0.8, 0.1))
    assert f.amplitude == pytest.approx(1.0 * MV, rel=2e-3)
    assert f.baseline == pytest.approx(-70 * MV, abs=1e-12)
    assert not f.failure
    assert f.time_to_peak == pytest.approx(DELAY + doe_peak_time(T1, T2), abs=DT)
    assert f.rise_20_80 == pytest.approx(t80 - t20, rel=rise_tol)
    assert f.latency == pytest.approx(DELAY + t10, abs=0.05 * MS)
    # Late phase of the difference of exponentials decays with t2 (REFERENCES.md A2); the
    # fit starts at the peak, where the fast term is still ~5 %, hence 2 %, not exact.
    assert f.decay_tau == pytest.approx(T2, rel=0.02)
    # Area: integral of the closed form over the window (event + delay to event + 40 ms)
    length = 0.040 - DELAY
    norm = float(doe(doe_peak_time(T1, T2), T1, T2))
    exact_area = 1.0 * MV / norm * (T2 * (1 - math.exp(-length / T2)) - T1 * (1 - math.exp(-length / T1)))
    assert f.area == pytest.approx(exact_area, rel=0.01)


@pytest.mark.parametrize("smooth", [0.0, F.DEFAULT_SMOOTH])
def test_charging_curve_rise_is_tau_ln4(smooth):
    # V = R*I*(1 - exp(-t/tau)): 20-80 % rise = tau*ln 4 (textbook; Johnston and Wu 1995,
    # Foundations of Cellular Neurophysiology). Window = 10 tau, so the end value is R*I to 5e-5.
    tau, RI, t_on = 20 * MS, 5 * MV, 0.05
    t = np.arange(0, t_on + 12 * tau, DT)
    trace = -65 * MV + RI * np.where(t >= t_on, 1 - np.exp(-(t - t_on) / tau), 0.0)
    f = F.response_features(trace, DT, t_on, t_on + 10 * tau, smooth=smooth)
    assert f.rise_20_80 == pytest.approx(tau * math.log(4), rel=0.003)
    assert f.amplitude == pytest.approx(RI, rel=1e-3)
    assert math.isnan(f.decay_tau)     # the peak is the end of the window: nothing to fit


def test_failures_in_gaussian_noise():
    # Common practice, no single source: a failure is a response below a multiple of the
    # baseline noise SD; pure noise must be a failure, a 10-SD response must not.
    rng = np.random.default_rng(11)
    sd = 0.1 * MV
    n_sweeps, t = 200, np.arange(0, 0.25, DT)
    zero = -70 * MV + rng.normal(0, sd, (n_sweeps, t.size))
    big = _psp_trace(amplitude=10 * sd, length=0.25)[None, :] + rng.normal(0, sd, (n_sweeps, t.size))
    fails_zero, fails_big, noises = [], [], []
    for trace in zero:
        feats, noise, level = F.sweep_features(trace, DT, [EVENT], [EVENT + 0.04])
        fails_zero.append(feats[0].failure)
        noises.append(noise)
        assert level == pytest.approx(3 * noise)
    for trace in big:
        feats, _, _ = F.sweep_features(trace, DT, [EVENT], [EVENT + 0.04])
        fails_big.append(feats[0].failure)
        assert feats[0].amplitude == pytest.approx(10 * sd, abs=3 * sd)
    assert all(fails_zero)
    assert not any(fails_big)
    # noise SD from the 50 ms pre-stimulus stretch: ~500 samples, SE of an SD ~ 3 %
    assert np.mean(noises) == pytest.approx(sd, rel=0.03)


def test_binomial_release_failure_rate_and_cv():
    # Binomial release (del Castillo and Katz 1954, J Physiol 124:560-573; REFERENCES.md A3):
    # n sites each releasing with probability p, fixed quantal PSP q:
    # failure rate (1-p)^n and CV sqrt((1-p)/(n p)) (no recording noise in that formula).
    rng = np.random.default_rng(2024)
    n, p, q, sd, n_sweeps = 5, 0.3, 0.2 * MV, 0.01 * MV, 1000
    released = rng.binomial(n, p, n_sweeps)
    t = np.arange(0, 0.16, DT)
    shape = unit_psp(t - EVENT - DELAY, T1, T2)
    traces = -70 * MV + released[:, None] * q * shape[None, :] + rng.normal(0, sd, (n_sweeps, t.size))
    amps, fails, lats, rises = [], [], [], []
    for trace in traces:
        (f,), _, _ = F.sweep_features(trace, DT, [EVENT], [EVENT + 0.04])
        amps.append([f.amplitude]); fails.append([f.failure]); lats.append([f.latency]); rises.append([f.rise_20_80])
    m = F.connection_metrics(amps, fails, lats, rises)
    # detection is exact here (q = 20 noise SD): failures are precisely the zero-release sweeps
    assert np.array_equal(np.array(fails)[:, 0], released == 0)
    expected = (1 - p) ** n
    se = math.sqrt(expected * (1 - expected) / n_sweeps)
    assert abs(m["failure_rate"] - expected) < 4 * se
    cv_expected = math.sqrt((1 - p) / (n * p))
    assert m["cv"] == pytest.approx(cv_expected, rel=0.08)   # SE of a CV at N = 1000 is ~3 %
    assert m["amplitude_mean"][0] == pytest.approx(n * p * q, rel=0.05)
    assert m["n_sweeps"] == n_sweeps


def _train_traces(amps, onsets, t1=0.5 * MS, t2=10 * MS, length=1.4, sign=1.0, delay=DELAY):
    t = np.arange(0, length, DT)
    out = np.full((amps.shape[0], t.size), -60 * MV)
    for s in range(amps.shape[0]):
        for k, on in enumerate(onsets):
            out[s] += sign * amps[s, k] * unit_psp(t - on - delay, t1, t2)
    return out


def test_ppr_and_train_ratios_are_ratios_of_means():
    # Paired-pulse and train ratios as mean(A_k)/mean(A_1) (ratio of means; common
    # practice, no single source). Responses 200 ms apart with a 10 ms decay do not overlap,
    # so the drawn amplitudes are exactly what a correct measurement returns.
    rng = np.random.default_rng(5)
    onsets = np.array([0.1, 0.3, 0.5, 0.7, 1.2])
    probe = np.array([False, False, False, False, True])
    n_sweeps = 40
    a1 = rng.uniform(0.2, 2.0, n_sweeps) * MV
    amps = np.column_stack([a1, 0.6 * rng.uniform(0.2, 2.0, n_sweeps) * MV,
                            rng.uniform(0.1, 0.8, n_sweeps) * MV, rng.uniform(0.1, 0.6, n_sweeps) * MV,
                            0.9 * rng.uniform(0.2, 2.0, n_sweeps) * MV])
    traces = _train_traces(amps, onsets)
    stops = F.window_stops(onsets, 0.04, traces.shape[1] * DT)
    rows = [F.sweep_features(tr, DT, onsets, stops, threshold=0.01 * MV)[0] for tr in traces]
    measured = np.array([[f.amplitude for f in r] for r in rows])
    np.testing.assert_allclose(measured, amps, rtol=2e-3)
    m = F.connection_metrics(measured, [[f.failure for f in r] for r in rows],
                             [[f.latency for f in r] for r in rows], [[f.rise_20_80 for f in r] for r in rows],
                             probe=probe)
    expected = amps.mean(axis=0) / amps[:, 0].mean()
    assert m["ppr"] == pytest.approx(expected[1], rel=3e-3)
    np.testing.assert_allclose(m["ratios"], expected, rtol=3e-3)
    assert m["recovery_ratio"] == pytest.approx(expected[4], rel=3e-3)
    # the definition matters: the mean of per-sweep ratios differs by more than 10 % here
    assert abs(np.mean(amps[:, 1] / amps[:, 0]) / expected[1] - 1) > 0.10


def test_ipsp_sign_is_detected_and_reported_positive():
    # A hyperpolarising response is measured like a depolarising one along its own sign
    # (common practice, no single source); its rise equals the mirrored EPSP's.
    onsets = np.array([0.1])
    amps = np.full((10, 1), 0.8 * MV)
    ipsp = _train_traces(amps, onsets, t1=1 * MS, t2=15 * MS, length=0.3, sign=-1.0)
    epsp = _train_traces(amps, onsets, t1=1 * MS, t2=15 * MS, length=0.3, sign=+1.0)
    stops = F.window_stops(onsets, 0.04, 0.3)[None, :].repeat(10, axis=0)
    times = onsets[None, :].repeat(10, axis=0)
    assert F.connection_sign(ipsp, DT, times, stops) == -1.0
    assert F.connection_sign(epsp, DT, times, stops) == 1.0
    fi = F.response_features(ipsp[0], DT, 0.1, 0.14, sign=-1.0)
    fe = F.response_features(epsp[0], DT, 0.1, 0.14, sign=+1.0)
    assert fi.amplitude == pytest.approx(0.8 * MV, rel=2e-3)
    assert fi.area > 0 and fi.area == pytest.approx(fe.area, rel=1e-9)
    assert fi.rise_20_80 == pytest.approx(fe.rise_20_80, rel=1e-9)
    assert fi.decay_tau == pytest.approx(fe.decay_tau, rel=1e-6)
    # measured with the wrong sign, the IPSP is no response at all
    assert F.response_features(ipsp[0], DT, 0.1, 0.14, sign=+1.0).failure


def test_decay_fit_refuses_to_invent_a_value():
    trace = _psp_trace()
    short = F.response_features(trace, DT, EVENT, EVENT + 0.010)
    assert short.amplitude == pytest.approx(1 * MV, rel=2e-3)
    assert math.isnan(short.decay_tau)            # post-peak stretch < 15 ms
    t = np.arange(0, 0.03, DT)
    assert math.isnan(F.fit_decay(t, np.exp(-t / 1.0)))     # tau 1 s over 30 ms: > 5 x stretch
    assert math.isnan(F.fit_decay(t, -np.exp(-t / 0.01)))   # no positive peak
    assert math.isnan(F.fit_decay(t[:50], np.exp(-t[:50] / 0.002)))  # 4.9 ms stretch
    assert F.fit_decay(t, 2.0 * np.exp(-t / 0.005)) == pytest.approx(0.005, rel=1e-6)


def test_match_spikes_flags_missing_and_extra():
    nominal = np.array([0.1, 0.15, 0.2])
    times, extra = F.match_spikes(nominal, [0.1012, 0.1030, 0.2011, 0.05])
    assert times[0] == pytest.approx(0.1012)
    assert math.isnan(times[1])
    assert times[2] == pytest.approx(0.2011)
    np.testing.assert_allclose(extra, [0.05, 0.1030])


# --- collect() end to end on a hand-made plan ----------------------------------------------

N_REPEAT, N_SWEEPS, LENGTH = 3, 6, 0.5
ONSETS = np.array([0.100, 0.150, 0.200, 0.400])
TRUE_AMPS = np.array([1.0, 0.7, 0.5, 0.9]) * MV      # per event, repeat 0; repeat 1 at half size
SPIKE_LAG = 1.0 * MS


def _plan() -> Plan:
    events = [StimulusEvent(time=float(t), index=k + 1, item=0 if k < 3 else 1,
                            kind="train" if k < 3 else "pulse", probe=k == 3) for k, t in enumerate(ONSETS)]
    pulses = [CurrentPulse(start=float(t), duration=2 * MS, amplitude=1.5e-9) for t in ONSETS]
    params = {"C": np.full(N_REPEAT, 200e-12), "g_L": np.full(N_REPEAT, 10e-9)}
    pre = RolePlan(name="pre", cell_class="pyramidal_deep", model="adex", cell_ids=np.array([11, 12, 13]),
                   positions=np.array([[0, 0, 0], [0, 0, 0], [0, 0, 0]], dtype=float) * 1e-6,
                   params=params, recorded=True, mode="current clamp",
                   holding_current=np.zeros(N_REPEAT), holding_potential=None, noise_sd=0.0,
                   pulses=pulses, spike_times=None, events=events)
    post = RolePlan(name="post", cell_class="basket_fast", model="adex", cell_ids=np.array([21, 22, 23]),
                    positions=np.array([[30, 40, 0], [0, 50, 0], [120, 0, 0]], dtype=float) * 1e-6,
                    params=params, recorded=True, mode="current clamp",
                    holding_current=np.full(N_REPEAT, 0.1e-9), holding_potential=-70 * MV,
                    noise_sd=0.02 * MV, pulses=[], spike_times=None, events=[])
    syn = SynapsePlan(name="pre_to_post", pre="pre", post="post", pathway="pyramidal_deep->basket_fast",
                      connected=np.array([True, True, False]), n_sites=np.array([5, 3, 0]),
                      site_conductance=np.array([0.3e-9, 0.3e-9, 0.0]), U=np.full(3, 0.5),
                      U_reference=np.full(3, 0.5), D=np.full(3, 0.8), F=np.zeros(3),
                      delay=np.full(3, 1e-3), receptors={"AMPA": 1.0}, stochastic=True)
    return Plan(
        title="hand-made pair (test)", protocol_file="test.protocol", protocol_hash="0" * 64,
        circuit_file="test.circuit.yaml", circuit_hash="1" * 64, seed=3, dt=0.025 * MS, sample_dt=DT,
        sweep_length=LENGTH, n_sweeps=N_SWEEPS, interval=10.0, n_repeat=N_REPEAT, layout="replicas",
        layout_reason="isolated cells, sweeps independent", mode="isolated",
        conditions={"calcium": 2.0, "magnesium": 1.0, "blocks": {}},
        roles=[pre, post],
        receptors={"AMPA": ReceptorPlan(name="AMPA", rise=0.2 * MS, decay=2 * MS, reversal=0.0)},
        synapses=[syn],
        measures=[MeasurePlan(cell="post", collector="responses", source="pre", options={"window": 0.040},
                              span="test.protocol:20:5"),
                  MeasurePlan(cell="pre", collector="spikes", source=None, options={}, span="test.protocol:21:5")],
        spans={"pre_to_post": "test.protocol:9:5"}, notes=["hand-made for tests"],
    )


def _recordings(seed=8):
    """Post traces: unit PSPs (0.5/10 ms) 1 ms after each presynaptic spike, amplitudes known."""
    rng = np.random.default_rng(seed)
    t = np.arange(0, LENGTH, DT)
    scale = np.array([1.0, 0.5, 0.0])
    traces = np.empty((N_REPEAT, N_SWEEPS, t.size))
    spikes, amps = [], np.zeros((N_REPEAT, N_SWEEPS, ONSETS.size))
    for r in range(N_REPEAT):
        per_sweep = []
        for s in range(N_SWEEPS):
            spk = list(ONSETS + SPIKE_LAG)
            a = TRUE_AMPS * scale[r]
            if r == 0 and s == 2:
                a = a.copy(); a[0] = 0.0          # a failure of the first response
            if r == 1 and s == 4:
                spk.pop(1); a = a.copy(); a[1] = 0.0   # presynaptic spike 2 missing
            if r == 0 and s == 5:
                spk.append(0.170)                 # an extra spike inside the window of event 2
            v = -70 * MV + rng.normal(0, 0.02 * MV, t.size)
            for k, on in enumerate(ONSETS):
                v += a[k] * unit_psp(t - on - SPIKE_LAG - 1.0 * MS, 0.5 * MS, 10 * MS)
            traces[r, s] = v
            amps[r, s] = a
            per_sweep.append(np.array(sorted(spk)))
        spikes.append(per_sweep)
    rec = Recordings(sample_dt=DT, time=t, traces={"post": traces, "pre": traces * 0 - 0.065},
                     spikes={"pre": spikes, "post": [[np.zeros(0)] * N_SWEEPS for _ in range(N_REPEAT)]},
                     meta={"target": "synthetic"})
    return rec, amps


RESPONSE_COLUMNS = [
    "pathway", "synapse", "pre", "post", "repeat", "pre_id", "post_id", "connected", "sweep", "event", "kind",
    "probe", "nominal_time_ms", "event_time_ms", "presynaptic_spike", "extra_pre_spikes", "window_ms", "sign",
    "noise_sd_mV", "failure_level_mV", "baseline_mV", "amplitude_mV", "failure", "latency_ms",
    "rise_20_80_ms", "time_to_peak_ms", "decay_tau_ms", "area_mV_ms"]
CONNECTION_COLUMNS = [
    "pathway", "synapse", "pre", "post", "repeat", "pre_id", "post_id", "pre_class", "post_class", "distance_um",
    "connected", "n_release_sites", "sign", "n_sweeps", "n_events", "pre_spikes_missing", "extra_pre_spikes",
    "noise_sd_mV", "amplitude_mean_mV", "amplitude_sd_mV", "cv", "failure_rate", "latency_ms", "rise_20_80_ms",
    "decay_tau_ms", "decay_event", "ppr", "ratio_3_1", "recovery_ratio", "event_1_amplitude_mV",
    "event_2_amplitude_mV", "event_3_amplitude_mV", "event_4_amplitude_mV"]


@pytest.fixture(scope="module")
def collected():
    plan = _plan()
    rec, amps = _recordings()
    return plan, rec, amps, collect(plan, rec)


def test_collect_tables_and_columns(collected):
    plan, rec, amps, tables = collected
    assert set(tables) == {"responses", "connections", "pathways", "spikes"}
    resp, conn, path = tables["responses"], tables["connections"], tables["pathways"]
    assert list(resp.columns) == RESPONSE_COLUMNS
    assert list(conn.columns) == CONNECTION_COLUMNS
    assert len(resp) == N_REPEAT * N_SWEEPS * ONSETS.size
    assert len(conn) == N_REPEAT
    metrics = ["distance_um", "n_release_sites", "amplitude_mean_mV", "amplitude_sd_mV", "cv", "failure_rate",
               "latency_ms", "rise_20_80_ms", "decay_tau_ms", "ppr", "ratio_3_1", "recovery_ratio",
               "event_1_amplitude_mV", "event_2_amplitude_mV", "event_3_amplitude_mV", "event_4_amplitude_mV"]
    assert list(path.columns) == (["pathway", "pre_class", "post_class", "n_pairs_tested", "n_pairs"]
                                  + [f"{m}_{s}" for m in metrics for s in ("mean", "sd", "n")])
    assert list(tables["spikes"].columns) == ["role", "cell_class", "repeat", "cell_id", "sweep", "n_spikes",
                                             "first_spike_ms", "rate_Hz"]


def test_collect_values(collected):
    plan, rec, amps, tables = collected
    resp, conn, path = tables["responses"], tables["connections"], tables["pathways"]
    ok = resp["presynaptic_spike"]
    measured = resp[ok]
    true = amps.reshape(-1)[ok.to_numpy()] / MV
    hit = true > 0
    # 20 uV noise: an extreme taken in noise reads high by about one to two noise SD
    # (the peak definition), so amplitudes agree within 2.5 noise SD, 50 uV
    np.testing.assert_allclose(measured["amplitude_mV"].to_numpy()[hit], true[hit], atol=0.05)
    assert (measured["failure"].to_numpy(dtype=bool) == ~hit).all()
    # the missing presynaptic spike: a row with NaN features
    gone = resp[~ok]
    assert len(gone) == 1 and int(gone["repeat"].iloc[0]) == 1 and int(gone["event"].iloc[0]) == 2
    assert gone["amplitude_mV"].isna().all() and gone["failure"].isna().all()
    # the extra spike at 170 ms lies in the window of event 2 (151-191 ms)
    extra = resp[resp["extra_pre_spikes"] > 0]
    assert len(extra) == 1 and int(extra["sweep"].iloc[0]) == 5 and int(extra["event"].iloc[0]) == 2
    assert resp["event_time_ms"][ok].to_numpy() == pytest.approx(measured["nominal_time_ms"].to_numpy() + 1.0)
    # latency measured from the presynaptic spike: 1 ms delay + 10 % level of the 0.5/10 ms PSP
    lat_exact = (1.0 * MS + level_time(0.5 * MS, 10 * MS, 0.1)) / MS
    c0 = conn.iloc[0]
    assert c0["latency_ms"] == pytest.approx(lat_exact, abs=0.1)
    assert c0["distance_um"] == pytest.approx(50.0)
    assert c0["failure_rate"] == pytest.approx(1 / 6)
    a = amps[0] / MV
    assert c0["ppr"] == pytest.approx(a[:, 1].mean() / a[:, 0].mean(), rel=0.03)
    assert c0["ratio_3_1"] == pytest.approx(a[:, 2].mean() / a[:, 0].mean(), rel=0.03)
    assert c0["recovery_ratio"] == pytest.approx(a[:, 3].mean() / a[:, 0].mean(), rel=0.03)
    assert c0["decay_event"] == 4          # all windows 40 ms: the probe wins the tie
    assert c0["decay_tau_ms"] == pytest.approx(10.0, rel=0.03)
    assert c0["n_sweeps"] == N_SWEEPS and c0["extra_pre_spikes"] == 1
    assert conn.iloc[1]["pre_spikes_missing"] == 1
    assert not bool(conn.iloc[2]["connected"])
    assert conn.iloc[2]["failure_rate"] == 1.0
    p = path.iloc[0]
    assert p["n_pairs_tested"] == 3 and p["n_pairs"] == 2
    assert p["amplitude_mean_mV_mean"] == pytest.approx(conn["amplitude_mean_mV"][:2].mean())
    assert p["amplitude_mean_mV_sd"] == pytest.approx(conn["amplitude_mean_mV"][:2].std(ddof=1))
    assert p["amplitude_mean_mV_n"] == 2
    spk = tables["spikes"]
    assert len(spk) == N_REPEAT * N_SWEEPS
    assert spk["n_spikes"].tolist() == [len(s) for per in rec.spikes["pre"] for s in per]
    assert spk["first_spike_ms"].iloc[0] == pytest.approx(101.0)
    assert spk["rate_Hz"].iloc[0] == pytest.approx(4 / LENGTH)


def test_spike_source_events_are_the_given_times():
    plan = _plan()
    rec, amps = _recordings()
    pre = plan.role("pre")
    pre.spike_times = ONSETS + SPIKE_LAG
    pre.pulses = []
    pre.events = [StimulusEvent(time=float(t), index=k + 1, item=0, kind="spike", probe=False)
                  for k, t in enumerate(pre.spike_times)]
    del rec.spikes["pre"]                      # a spike source needs no recorded spikes
    plan.measures = plan.measures[:1]
    tables = collect(plan, rec)
    resp = tables["responses"]
    assert resp["presynaptic_spike"].all() and (resp["extra_pre_spikes"] == 0).all()
    assert resp["event_time_ms"].to_numpy() == pytest.approx(np.tile(ONSETS + SPIKE_LAG, N_REPEAT * N_SWEEPS) / MS)
    c0 = tables["connections"].iloc[0]
    assert np.isnan(c0["recovery_ratio"])     # no event is marked as a probe
    assert c0["ratio_4_1"] == pytest.approx(amps[0][:, 3].mean() / amps[0][:, 0].mean(), rel=0.03)


def test_unknown_collector_is_an_internal_error():
    plan = _plan()
    rec, _ = _recordings()
    plan.measures = [MeasurePlan(cell="post", collector="mystery", source=None, options={})]
    with pytest.raises(AssertionError, match="internal error"):
        collect(plan, rec)


def test_write_run_outputs(collected, tmp_path):
    plan, rec, amps, tables = collected
    out = tmp_path / "run"
    provenance = {"seed": np.int64(3), "wall_time_s": np.float64(1.5), "versions": {"numpy": np.__version__},
                  "protocol": Path("test.protocol")}
    paths = write_run(out, plan, rec, tables, provenance)
    npz = write_recordings_npz(out, rec)
    for name in tables:
        assert f"tables/{name}.csv" in paths and f"tables/{name}.parquet" in paths
        csv = pd.read_csv(paths[f"tables/{name}.csv"])
        pq = pd.read_parquet(paths[f"tables/{name}.parquet"])
        assert list(csv.columns) == list(tables[name].columns) == list(pq.columns)
        assert len(csv) == len(pq) == len(tables[name])
    pngs = [k for k in paths if k.endswith(".png")]
    assert sorted(pngs) == ["figures/pyramidal_deep_to_basket_fast_summary.png",
                            "figures/pyramidal_deep_to_basket_fast_sweeps.png"]
    for k in pngs:
        assert paths[k].read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert json.loads(paths["plan.json"].read_text())["title"] == plan.title
    prov = json.loads(paths["provenance.json"].read_text())
    assert prov == {"seed": 3, "wall_time_s": 1.5, "versions": {"numpy": np.__version__},
                    "protocol": "test.protocol"}
    on_disk = {p.resolve() for p in out.rglob("*") if p.is_file()}
    assert on_disk == set(paths.values()) | {npz.resolve()}   # nothing else: no temp files left
    back = read_recordings_npz(npz)
    # traces are stored in single precision: 1e-7 relative, far below recording noise
    np.testing.assert_allclose(back.traces["post"], rec.traces["post"], rtol=1e-6, atol=0)
    for r in range(N_REPEAT):
        for s in range(N_SWEEPS):
            np.testing.assert_array_equal(back.spikes["pre"][r][s], rec.spikes["pre"][r][s])
    assert back.meta == rec.meta and back.sample_dt == rec.sample_dt


def test_provenance_that_is_not_json_fails_cleanly(collected, tmp_path):
    plan, rec, amps, tables = collected
    with pytest.raises(TypeError, match="provenance value of type object"):
        write_run(tmp_path / "run", plan, rec, tables, {"bad": object()})
    assert not (tmp_path / "run").exists()


# --- the collector catalogue stays light ----------------------------------------------------

def test_registry_imports_nothing_heavy():
    # The front end imports the catalogue to check names; it must not drag in the heavy stack.
    path = REPO / "protolang" / "measure" / "registry.py"
    code = (
        "import importlib.util, sys\n"
        f"spec = importlib.util.spec_from_file_location('registry', {str(path)!r})\n"
        "mod = importlib.util.module_from_spec(spec); spec.loader.exec_module(mod)\n"
        "heavy = [m for m in ('numpy', 'pandas', 'matplotlib', 'brian2', 'scipy') if m in sys.modules]\n"
        "print(','.join(heavy)); print(sorted(mod.COLLECTORS))\n"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    heavy, names = done.stdout.splitlines()
    assert heavy == ""
    assert {'responses', 'spikes', 'passive', 'firing', 'fi'} <= set(eval(names))


def test_registry_matches_the_language_reference():
    from protolang.measure.registry import COLLECTORS

    # docs/language.md, measure section: defaults 40 ms, 2 ms, 0.05 mV, 3
    opts = COLLECTORS["responses"]["options"]
    assert opts == {"window": ("time", 0.040), "baseline": ("time", 0.002),
                    "threshold": ("voltage", 0.05e-3), "noise_factor": ("number", 3.0),
                    "current_threshold": ("current", 2e-12)}
    assert COLLECTORS["responses"]["needs_source"] and not COLLECTORS["spikes"]["needs_source"]
    assert COLLECTORS["spikes"]["options"] == {}
    doc = (REPO / "docs" / "language.md").read_text()
    for name in COLLECTORS:
        assert f"`{name}" in doc
