"""Stimulus rendering against closed forms and an independent signal-processing routine."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.signal import hilbert

from protolang.plan.model import CurrentPulse, RolePlan, WaveSegment
from protolang.plan.waveforms import library, render

DT = 25e-6


def role(**kw):
    r = RolePlan(name="cell", cell_class="c", model="adex", cell_ids=np.zeros(1, int),
                 positions=np.zeros((1, 3)), params={})
    for k, v in kw.items():
        setattr(r, k, v)
    return r


def test_square_pulse_charge():
    # charge of a square pulse = amplitude x width (definition of current)
    w = render(role(pulses=[CurrentPulse(0.1, 0.002, 1.5e-9)]), 0, DT, 8000)
    assert w.sum() * DT == pytest.approx(1.5e-9 * 0.002, rel=1e-9)


def test_ramp_is_linear():
    seg = WaveSegment("ramp", 0.1, 0.6, amplitude=0.0, amplitude_end=400e-12)
    w = render(role(segments=[seg]), 0, DT, 40000)
    t = np.arange(40000) * DT
    inside = (t >= 0.1) & (t < 0.6)
    np.testing.assert_allclose(w[inside], 400e-12 * (t[inside] - 0.1) / 0.5, atol=1e-20)
    assert (w[~inside] == 0).all()


def test_chirp_instantaneous_frequency():
    # the analytic signal (scipy.signal.hilbert) gives the instantaneous frequency, which must
    # rise linearly from f1 to f2 (definition of a linear chirp; common practice, no single source)
    f1, f2, t0, t1 = 1.0, 20.0, 0.5, 10.5
    seg = WaveSegment("chirp", t0, t1, amplitude=50e-12, frequency=f1, frequency_end=f2)
    dt = 1e-3
    w = render(role(segments=[seg]), 0, dt, int(11 / dt))
    t = np.arange(len(w)) * dt
    inside = (t >= t0) & (t < t1)
    phase = np.unwrap(np.angle(hilbert(w[inside])))
    f_inst = np.gradient(phase, dt) / (2 * np.pi)
    tau = t[inside] - t0
    core = slice(len(tau) // 10, -len(tau) // 10)        # away from the edge effects of the transform
    slope, intercept = np.polyfit(tau[core], f_inst[core], 1)
    assert slope == pytest.approx((f2 - f1) / (t1 - t0), rel=0.01)
    assert intercept == pytest.approx(f1, abs=0.05)
    # and the residual ripple of the transform stays small
    assert np.median(np.abs(f_inst[core] - (f1 + (f2 - f1) * tau[core] / (t1 - t0)))) < 0.05


def test_sine_period():
    seg = WaveSegment("sine", 0.0, 1.0, amplitude=1.0, frequency=5.0, offset=0.5)
    w = render(role(segments=[seg]), 0, 1e-4, 10000)
    crossings = np.sum((w[:-1] - 0.5 < 0) & (w[1:] - 0.5 >= 0))
    assert crossings == 5 - 1 or crossings == 5   # upward crossings of the offset in 1 s at 5 Hz
    assert w.max() == pytest.approx(1.5, abs=1e-6)


def test_family_library_shares_columns():
    seg = WaveSegment("square", 0.1, 0.6, per_sweep=np.array([0.0, 1e-10, 2e-10, 1e-10]))
    waves, index = library(role(segments=[seg]), 4, DT, 30000)
    assert waves.shape[1] == 3 and list(index) == [0, 1, 2, 1]
    assert waves[:, index[3]].max() == pytest.approx(1e-10)
