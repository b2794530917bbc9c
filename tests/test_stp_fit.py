"""Tests of the short-term plasticity fit against published train responses, scipy's ODE solver and synthetic data."""

from __future__ import annotations

import math
import subprocess
import sys

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from protolang.measure import stp_fit as S

MS = 1e-3
MV = 1e-3

# 8 presynaptic spikes at 20 Hz and a recovery probe 500 ms after the last one.
TRAIN = np.r_[np.arange(8) * 50 * MS, 350 * MS + 500 * MS]

# Gupta, Wang and Markram 2000, Science 287:273-278, class means (U, D s, F s), as in
# REFERENCES.md B5.
GUPTA = {
    "facilitating": (0.16, 0.045, 0.376),     # F1
    "depressing": (0.25, 0.706, 0.021),       # F2
    "pseudo-linear": (0.32, 0.144, 0.062),    # F3
}


def regular(f_hz: float, n: int) -> np.ndarray:
    return np.arange(n) / f_hz


def noisy_sweeps(params, n_sweeps: int, seed: int, cv: float = 0.3, efficacy: float = 1.0 * MV) -> np.ndarray:
    """Sweeps of gamma-distributed responses around the model mean, given CV (always positive)."""
    rng = np.random.default_rng(seed)
    mean = S.tm_amplitudes(TRAIN, *params, A=efficacy)
    shape = 1.0 / cv ** 2
    return mean * rng.gamma(shape, 1.0 / shape, size=(n_sweeps, TRAIN.size))


# --- the model against published train responses ------------------------------------------------

# Markram, Wang and Tsodyks 1998, PNAS 95:5323-5328 (recursion); values as listed in
# REFERENCES.md A5 (derived there from the recursion): U, D (ms), F (ms), f (Hz),
# EPSP_1..5 / A, PPR, steady state / A.
A5_ROWS = [
    (0.03, 130, 530, 20, (0.03, 0.05533, 0.07574, 0.09178, 0.10428), 1.8442, 0.165486),
    (0.03, 130, 530, 70, (0.03, 0.05676, 0.07870, 0.09514, 0.10619), 1.8919, 0.095520),
    (0.5, 800, 0, 20, (0.5, 0.26515, 0.15483, 0.10302, 0.07868), 0.5303, 0.057126),
    (0.16, 45, 376, 20, (0.16, 0.26304, 0.32635, 0.36723, 0.39512), 1.6440, 0.466320),   # Gupta F1
    (0.25, 706, 21, 20, (0.25, 0.20507, 0.15897, 0.12673, 0.10472), 0.8203, 0.057642),   # Gupta F2
    (0.32, 144, 62, 20, (0.32, 0.32282, 0.27338, 0.24269, 0.22837), 1.0088, 0.218093),   # Gupta F3
]


@pytest.mark.parametrize("U, D, F, f, first, ppr, steady", A5_ROWS)
def test_train_matches_markram_wang_tsodyks_table(U, D, F, f, first, ppr, steady):
    # Source: Markram, Wang and Tsodyks 1998, PNAS 95:5323; REFERENCES.md A5 values (5 and 6 decimals).
    amp = S.tm_amplitudes(regular(f, 400), U, D * MS, F * MS)
    np.testing.assert_allclose(amp[:5], first, atol=1e-5)
    assert amp[1] / amp[0] == pytest.approx(ppr, abs=1e-4)
    assert amp[-1] == pytest.approx(steady, abs=1e-6)
    # A scales every response (the model is linear in A).
    np.testing.assert_allclose(S.tm_amplitudes(regular(f, 5), U, D * MS, F * MS, A=2.5 * MV), 2.5 * MV * amp[:5])


# Tsodyks and Markram 1997, PNAS 94:719-723 (depression-only recursion); values as listed in
# REFERENCES.md A4 for A = 1, U = 0.5, tau_rec = 800 ms: f, EPSP_2, EPSP_3, EPSP_5, steady state.
A4_ROWS = [
    (1, 0.42837, 0.41811, 0.41643, 0.416398),
    (10, 0.27938, 0.18203, 0.12012, 0.105148),
    (20, 0.26515, 0.15483, 0.07868, 0.057126),
    (40, 0.25769, 0.14027, 0.05578, 0.029848),
    (100, 0.25311, 0.13119, 0.04127, 0.012270),
]


@pytest.mark.parametrize("f, e2, e3, e5, steady", A4_ROWS)
def test_depression_only_matches_tsodyks_markram_table(f, e2, e3, e5, steady):
    # Source: Tsodyks and Markram 1997, PNAS 94:719; REFERENCES.md A4 values, and its closed forms
    # PPR = 1 - U exp(-T/D), EPSP_st = U (1 - e) / (1 - (1 - U) e) with e = exp(-T/D).
    U, D, T = 0.5, 0.8, 1.0 / f
    amp = S.tm_amplitudes(regular(f, 600), U, D, 0.0)
    np.testing.assert_allclose(amp[[1, 2, 4]], [e2, e3, e5], atol=1e-5)
    assert amp[-1] == pytest.approx(steady, abs=1e-6)
    e = math.exp(-T / D)
    assert amp[1] / amp[0] == pytest.approx(1 - U * e, rel=1e-12)
    assert amp[-1] == pytest.approx(U * (1 - e) / (1 - (1 - U) * e), rel=1e-9)


def test_irregular_spikes_match_solve_ivp():
    # Independent library: scipy.integrate.solve_ivp integrates the between-spike relaxations
    # dR/dt = (1 - R)/D and du/dt = -u/F (Markram, Wang and Tsodyks 1998, event form with jumps
    # u <- u + U(1 - u), R <- R - u R at each spike) across an irregular train.
    rng = np.random.default_rng(3)
    times = np.cumsum(rng.exponential(0.08, size=25)) + 0.01
    U, D, F = 0.2, 0.3, 0.15
    u, R, t_prev, expected = 0.0, 1.0, times[0], []
    for t in times:
        if t > t_prev:
            sol = solve_ivp(lambda _, y: [-y[0] / F, (1 - y[1]) / D], (t_prev, t), [u, R],
                            method="DOP853", rtol=1e-11, atol=1e-13)
            u, R = sol.y[:, -1]
        u = u + U * (1 - u)
        expected.append(u * R)
        R = R - u * R
        t_prev = t
    np.testing.assert_allclose(S.tm_amplitudes(times, U, D, F), expected, rtol=1e-8)


def test_parameter_arrays_broadcast_like_single_calls():
    # Consistency of the vectorised form with one call per parameter set (no outside source).
    U = np.array([0.1, 0.4, 0.8])
    D = np.array([[0.1], [1.0]])
    out = S.tm_amplitudes(TRAIN, U, D, 0.05, A=2.0)
    assert out.shape == (2, 3, TRAIN.size)
    for i in range(2):
        for j in range(3):
            np.testing.assert_allclose(out[i, j], S.tm_amplitudes(TRAIN, U[j], D[i, 0], 0.05, A=2.0), rtol=1e-14)


@pytest.mark.parametrize("F", [0.0, 0.09])
def test_same_event_form_as_the_engine(F):
    # Consistency with protolang's engine: run its deterministic event code line by line in Python
    # (the engine hands the same text to Brian2), with one release site.
    from protolang.engine.build import INSTANT_RATE
    from protolang.engine.models import synapse_on_pre

    lines = synapse_on_pre(False, [], None).splitlines()
    U, D = 0.35, 0.4
    env = {"exp": math.exp, "U": U, "sites": 1.0, "rate_D": 1 / D,
           "rate_F": 1 / F if F > 0 else INSTANT_RATE, "u_fac": 0.0, "R": 1.0, "t_last": 0.0}
    released = []
    for t in TRAIN + 0.1:
        env["t"] = t
        for line in lines:
            exec(line, {}, env)
        released.append(env["rel"])
    np.testing.assert_allclose(S.tm_amplitudes(TRAIN + 0.1, U, D, F), released, rtol=1e-12)


# --- fits of noiseless synthetic trains --------------------------------------------------------

RECOVERY_SETS = [
    GUPTA["facilitating"], GUPTA["depressing"], GUPTA["pseudo-linear"],
    (0.5, 0.8, 0.05),        # strongly depressing pyramid-like connection (REFERENCES.md B3 ranges)
    (0.05, 0.1, 1.0),        # low U, strongly facilitating
    (0.7, 0.3, 0.01),        # facilitation barely visible at 20 Hz
]


@pytest.mark.parametrize("params", RECOVERY_SETS)
def test_fit_recovers_parameters_of_noiseless_train(params):
    # Closed-form generator (tm_amplitudes, checked above against Markram, Wang and Tsodyks 1998);
    # the fit must give U, D, F within 5 % (the acceptance level of the feature).
    amp = S.tm_amplitudes(TRAIN, *params, A=0.8 * MV)
    fit = S.fit_tm(TRAIN, np.tile(amp, (4, 1)))
    assert fit.converged, fit.message
    for got, true in zip((fit.U, fit.D, fit.F), params):
        assert got == pytest.approx(true, rel=0.05)
    assert fit.A == pytest.approx(0.8 * MV, rel=0.05)
    assert fit.relative_rms < 1e-6
    assert fit.n_sweeps == 4 and fit.n_spikes == TRAIN.size


def test_depression_only_fit_and_unmeasured_responses():
    # Closed-form generator; responses that were not measured (NaN) are left out of their spike's mean.
    amp = np.tile(S.tm_amplitudes(TRAIN, 0.5, 0.8, 0.0, A=50e-12), (3, 1))
    amp[0, 2] = np.nan
    amp[:, 5] = np.nan                # no sweep measured spike 6: it only shapes the history
    fit = S.fit_tm(TRAIN, amp, fit_F=False)
    assert fit.converged, fit.message
    assert (fit.U, fit.D, fit.F) == (pytest.approx(0.5, rel=1e-6), pytest.approx(0.8, rel=1e-6), 0.0)
    assert fit.A == pytest.approx(50e-12, rel=1e-6)
    # Three spikes determine U, D and A exactly.
    three = S.fit_tm(TRAIN[:3], S.tm_amplitudes(TRAIN[:3], 0.4, 0.2, 0.0), fit_F=False)
    assert three.converged and three.U == pytest.approx(0.4, rel=1e-6) and three.D == pytest.approx(0.2, rel=1e-6)


def test_user_starts_and_bounds():
    # A narrower bound that excludes the generating D must be reported as hit, not as a measurement.
    amp = S.tm_amplitudes(TRAIN, *GUPTA["depressing"])
    fit = S.fit_tm(TRAIN, amp, bounds={"D": (0.01, 0.3)}, starts=[(0.3, 0.2, 0.05)])
    assert not fit.converged and "D" in fit.at_bound and math.isnan(fit.D)
    assert "upper bound 300 ms" in fit.message
    with pytest.raises(ValueError, match="inside the bounds"):
        S.fit_tm(TRAIN, amp, starts=[(0.3, 20.0, 0.05)])
    with pytest.raises(ValueError, match="unknown parameter 'A'"):
        S.fit_tm(TRAIN, amp, bounds={"A": (0, 1)})


# --- bootstrap of noisy sweeps -----------------------------------------------------------------

@pytest.mark.parametrize("params", [(0.5, 0.8, 0.05), GUPTA["facilitating"]])
def test_bootstrap_intervals_contain_true_parameters(params):
    # Synthetic sweeps (seed 0, 30 sweeps, response CV 0.3, gamma-distributed; common practice, no
    # single source) around the closed-form train: the 95 % percentile intervals (Efron and
    # Tibshirani 1993) contain the generating U, D, F and A.
    sweeps = noisy_sweeps(params, 30, seed=0)
    boot = S.bootstrap_tm(TRAIN, sweeps, n_boot=200, seed=0)
    assert boot.fit.converged, boot.fit.message
    for name, true in zip(S.PARAMETERS, (*params, 1.0 * MV)):
        lo, hi = boot.intervals[name]
        assert lo <= true <= hi, (name, lo, true, hi)
    assert 0.5 <= boot.converged_fraction <= 1.0
    assert boot.samples.shape == (200, 4) and boot.accepted.sum() == round(200 * boot.converged_fraction)


def test_bootstrap_intervals_are_informative_and_reproducible():
    # A well-constrained depressing synapse: the intervals are narrow, not the whole bound range,
    # and a fixed seed gives the same resamples.
    sweeps = noisy_sweeps((0.5, 0.8, 0.05), 30, seed=0)
    a = S.bootstrap_tm(TRAIN, sweeps, n_boot=25, seed=7)
    b = S.bootstrap_tm(TRAIN, sweeps, n_boot=25, seed=7)
    c = S.bootstrap_tm(TRAIN, sweeps, n_boot=25, seed=8)
    np.testing.assert_array_equal(a.samples, b.samples)
    assert not np.array_equal(a.samples, c.samples)
    u_lo, u_hi = a.intervals["U"]
    assert 0.4 < u_lo < u_hi < 0.6
    d_lo, d_hi = a.intervals["D"]
    assert 0.5 < d_lo < d_hi < 1.5
    # Same resamples at a higher confidence: each interval contains the 95 % one.
    wide = S.bootstrap_tm(TRAIN, sweeps, n_boot=25, seed=7, confidence=0.99)
    np.testing.assert_array_equal(wide.samples, a.samples)
    for name in S.PARAMETERS:
        assert wide.intervals[name][0] <= a.intervals[name][0] < a.intervals[name][1] <= wide.intervals[name][1]


def test_bootstrap_without_a_converged_fit_gives_no_intervals():
    # Alternating responses (no Tsodyks-Markram train, see below) with CV 0.1 noise: the fit of all
    # sweeps is rejected, so no interval is claimed.
    rng = np.random.default_rng(1)
    sweeps = np.tile([1.0, 0.2], 5)[:9] * rng.gamma(100, 0.01, size=(10, TRAIN.size))
    boot = S.bootstrap_tm(TRAIN, sweeps, n_boot=5, seed=0)
    assert not boot.fit.converged
    assert boot.converged_fraction == 0.0
    assert all(math.isnan(v) for pair in boot.intervals.values() for v in pair)
    with pytest.raises(ValueError, match="at least 2 sweeps"):
        S.bootstrap_tm(TRAIN, sweeps[0])


# --- synapse classes ------------------------------------------------------------------------------

@pytest.mark.parametrize("label", list(GUPTA))
def test_gupta_class_means_refit_into_their_own_class(label):
    # Gupta, Wang and Markram 2000, Science 287:273 (class means, REFERENCES.md B5), simulated as a
    # 20 Hz train with a recovery probe and refitted.
    amp = S.tm_amplitudes(TRAIN, *GUPTA[label], A=2.0 * MV)
    fit = S.fit_tm(TRAIN, amp)
    assert fit.converged, fit.message
    assert S.classify_tm(fit.U, fit.D, fit.F) == label


def test_class_rule_edges():
    # protolang's rule (F/D thresholds from the Gupta, Wang and Markram 2000 class means).
    assert S.FACILITATING_MIN_RATIO == pytest.approx(math.sqrt(376 / 45 * 62 / 144))
    assert S.DEPRESSING_MAX_RATIO == pytest.approx(math.sqrt(62 / 144 * 21 / 706))
    assert S.classify_tm(0.3, 1.0, 1.0) == "pseudo-linear"
    assert S.classify_tm(0.3, 0.1, 0.2) == "facilitating"
    assert S.classify_tm(0.3, 0.1, 0.01) == "depressing"
    assert S.classify_tm(0.5, 0.8, 0.0) == "depressing"
    assert S.classify_tm(math.nan, math.nan, math.nan) == "unclassified"
    with pytest.raises(ValueError, match="U must lie"):
        S.classify_tm(1.5, 0.1, 0.1)


# --- data no model can produce ----------------------------------------------------------------

@pytest.mark.parametrize("responses", [
    np.tile([1.0, 0.2], 5)[:9] * MV,        # alternating, large first
    np.tile([0.2, 1.0], 5)[:9] * MV,        # alternating, small first
    np.array([1, 0.6, 0.35, 0.2, 0.3, 0.5, 0.8, 1.0, 0.5]) * MV,   # depresses, then recovers mid-train
    np.zeros((5, 9)),                       # all zero
    -S.tm_amplitudes(TRAIN, 0.5, 0.8, 0.05) * MV,   # sign not flipped: no positive efficacy
], ids=["alternating", "alternating-small-first", "recovers-mid-train", "zero", "negative"])
def test_responses_no_model_produces_give_nan_not_numbers(responses):
    # Along a regular train the model's u only grows and R only falls, each settling smoothly
    # (Markram, Wang and Tsodyks 1998 recursion; by induction on it): these patterns, or a
    # response that is not positive, have no Tsodyks-Markram fit.
    fit = S.fit_tm(TRAIN, responses)
    assert fit.converged is False
    assert all(math.isnan(v) for v in fit.params().values())
    assert fit.message.startswith("not converged: ")
    row = S.summarise_fit(fit)
    assert row["tm_class"] == "unclassified" and math.isnan(row["tm_U"]) and row["tm_converged"] is False


def test_poor_fit_inside_the_bounds_is_rejected():
    # Only the lack-of-fit limit catches this one: its best fit sits inside every bound.
    fit = S.fit_tm(TRAIN, np.array([1, 0.6, 0.35, 0.2, 0.3, 0.5, 0.8, 1.0, 0.5]) * MV)
    assert fit.at_bound == () and fit.relative_rms > S.DEFAULT_MAX_RELATIVE_RMS
    assert "relative RMS" in fit.message and math.isnan(fit.U)
    # The limit is the caller's to move (this best fit then fails on its unresolved F instead).
    loose = S.fit_tm(TRAIN, np.array([1, 0.6, 0.35, 0.2, 0.3, 0.5, 0.8, 1.0, 0.5]) * MV, max_relative_rms=0.5)
    assert "relative RMS of" not in loose.message


def test_unresolved_facilitation_is_reported():
    # Depression-only train with F free: any F far below the spike interval fits equally well.
    fit = S.fit_tm(TRAIN, S.tm_amplitudes(TRAIN, 0.5, 0.8, 0.0))
    assert not fit.converged and math.isnan(fit.F)
    assert "F is not constrained" in fit.message and "fit_F=False" in fit.message


# --- input errors ---------------------------------------------------------------------------------

def test_too_few_spikes_raise():
    with pytest.raises(ValueError, match="at least 3 presynaptic spikes"):
        S.fit_tm(TRAIN[:2], [1.0, 0.5])
    with pytest.raises(ValueError, match="at least 4 spikes"):
        S.fit_tm(TRAIN[:3], [1.0, 0.5, 0.4])
    with pytest.raises(ValueError, match="at least 3 presynaptic spikes"):
        S.bootstrap_tm(TRAIN[:2], np.ones((3, 2)))


def test_bad_input_raises():
    with pytest.raises(ValueError, match="strictly increasing"):
        S.tm_amplitudes([0.0, 0.1, 0.1], 0.5, 0.8, 0.0)
    with pytest.raises(ValueError, match="U must lie"):
        S.tm_amplitudes(TRAIN, 0.0, 0.8, 0.0)
    with pytest.raises(ValueError, match="shape"):
        S.fit_tm(TRAIN, np.ones((3, 5)))


# --- table row --------------------------------------------------------------------------------------

def test_summary_row_units_and_columns():
    sweeps = noisy_sweeps((0.5, 0.8, 0.05), 30, seed=0, efficacy=40e-12)
    boot = S.bootstrap_tm(TRAIN, sweeps, n_boot=10, seed=0)
    row = S.summarise_fit(boot.fit, boot, label="pA", scale=1e12)
    assert list(row) == S.summary_columns("pA")
    assert row["tm_D_ms"] == pytest.approx(boot.fit.D * 1e3)
    assert row["tm_F_low_ms"] == pytest.approx(boot.intervals["F"][0] * 1e3)
    assert row["tm_A_pA"] == pytest.approx(boot.fit.A * 1e12)
    assert row["tm_A_low_pA"] <= row["tm_A_pA"] <= row["tm_A_high_pA"]
    assert row["n_sweeps"] == 30 and row["n_spikes"] == 9
    assert row["tm_class"] == "depressing" and row["tm_converged"] is True
    # A rejected fit's row can carry its own bootstrap (NaN parameters compare equal to themselves).
    failed = S.bootstrap_tm(TRAIN, np.tile([1.0, 0.2], 5)[:9] * np.ones((3, 1)), n_boot=2)
    assert S.summarise_fit(failed.fit, failed)["tm_boot_converged_fraction"] == 0.0
    bare = S.summarise_fit(boot.fit)
    assert math.isnan(bare["tm_U_low"]) and bare["tm_U"] == row["tm_U"]
    other = S.fit_tm(TRAIN, sweeps[:5])
    with pytest.raises(ValueError, match="different fit"):
        S.summarise_fit(other, boot)


def test_module_imports_no_heavy_libraries():
    # The fit must stay usable without Brian2, matplotlib or pandas being loaded.
    code = ("import sys, protolang.measure.stp_fit; "
            "print(sorted(m for m in ('brian2', 'matplotlib', 'pandas') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"
