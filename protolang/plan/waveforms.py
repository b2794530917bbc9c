"""Stimulus rendering: a role's pulses and wave segments -> sampled waveforms, one per distinct sweep.

The engine feeds these arrays to Brian2 as one waveform library (time x column) indexed by a
per-cell integer, so sweeps of a step family are replicas of one network. Values are currents
(A) for a current-clamped cell and command offsets from the holding potential (V) for a
voltage-clamped one. No Brian2 here.
"""

from __future__ import annotations

import numpy as np

from .model import RolePlan, WaveSegment


def _segment(seg: WaveSegment, t: np.ndarray, amplitude: float) -> np.ndarray:
    inside = (t >= seg.start - 1e-12) & (t < seg.stop - 1e-12)
    out = np.zeros_like(t)
    tau = t[inside] - seg.start
    if seg.kind == "square":
        out[inside] = amplitude
    elif seg.kind == "ramp":
        frac = tau / (seg.stop - seg.start)
        out[inside] = amplitude + (seg.amplitude_end - amplitude) * frac
    elif seg.kind == "sine":
        out[inside] = seg.offset + amplitude * np.sin(2 * np.pi * seg.frequency * tau)
    elif seg.kind == "chirp":
        # instantaneous frequency f1 + (f2 - f1) tau / T, so the phase is its integral
        T = seg.stop - seg.start
        phase = 2 * np.pi * (seg.frequency * tau + (seg.frequency_end - seg.frequency) * tau ** 2 / (2 * T))
        out[inside] = amplitude * np.sin(phase)
    else:  # pragma: no cover - resolve builds only these kinds
        raise AssertionError(f"internal error: unknown wave segment {seg.kind!r}")
    return out


def render(role: RolePlan, sweep: int, dt: float, n_steps: int) -> np.ndarray:
    """The role's deterministic stimulus in ``sweep`` (0-based), sampled every ``dt`` from 0."""
    t = np.arange(n_steps) * dt
    wave = np.zeros(n_steps)
    for p in role.pulses:
        i0 = int(round(p.start / dt))
        i1 = max(int(round((p.start + p.duration) / dt)), i0 + 1)
        wave[i0:i1] += p.amplitude
    for seg in role.segments:
        amp = seg.amplitude if seg.per_sweep is None else float(seg.per_sweep[sweep])
        wave += _segment(seg, t, amp)
    return wave


def library(role: RolePlan, n_sweeps: int, dt: float, n_steps: int) -> tuple[np.ndarray, np.ndarray]:
    """Distinct waveforms of the role over its sweeps.

    Returns:
        (waves, index): ``waves`` (n_steps, K) and ``index`` (n_sweeps,) giving each sweep's column.
    """
    varies = any(seg.per_sweep is not None for seg in role.segments)
    if not varies:
        return render(role, 0, dt, n_steps)[:, None], np.zeros(n_sweeps, dtype=int)
    cols, index, seen = [], np.zeros(n_sweeps, dtype=int), {}
    for k in range(n_sweeps):
        key = tuple(float(seg.per_sweep[k]) if seg.per_sweep is not None else 0.0 for seg in role.segments)
        if key not in seen:
            seen[key] = len(cols)
            cols.append(render(role, k, dt, n_steps))
        index[k] = seen[key]
    return np.stack(cols, axis=1), index
