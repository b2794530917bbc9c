"""Model text and closed-form numbers for the engine: takes receptor kinetics and cell parameters, hands out Brian2 equation strings, propagators, peak factors and resting states.

Nothing here imports Brian2; the strings are handed to Brian2 by :mod:`protolang.engine.build`.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

import numpy as np

#: Parameters every adaptive exponential integrate-and-fire role must carry (SI units).
ADEX_PARAMS = ("C", "gL", "EL", "VT", "DeltaT", "a", "tau_w", "b", "Vr", "Vcut", "t_ref")

#: Brian2 units of the AdEx parameters, used to declare them as per-neuron constants.
ADEX_UNITS = {
    "C": "farad", "gL": "siemens", "EL": "volt", "VT": "volt", "DeltaT": "volt",
    "a": "siemens", "tau_w": "second", "b": "amp", "Vr": "volt", "Vcut": "volt",
    "t_ref": "second",
}

# Jahr and Stevens 1990 (J Neurosci 10:3178): unblocked NMDA fraction
# 1 / (1 + exp(-0.062 V/mV) [Mg]/3.57 mM).
MG_SLOPE_PER_MV = 0.062
MG_HALF_MM = 3.57

#: Conductances (S) and their drives (S/s) below this are exactly zero for every purpose.
NEGLIGIBLE_SI = 1e-200


def identifier(text: str) -> str:
    """Turn a protocol identifier into a Brian2-safe name fragment (letters, digits, ``_``)."""
    return re.sub(r"\W", "_", text, flags=re.ASCII) or "x"


def variable_suffix(text: str) -> str:
    """Like :func:`identifier`, safe as the end of a Brian2 variable name."""
    cleaned = identifier(text)
    if cleaned.endswith(("_pre", "_post")) or cleaned in ("pre", "post"):
        # Brian2 reads these endings as references to the pre/postsynaptic cell
        cleaned += "_"
    return cleaned


# --------------------------------------------------------------------------- kinetics


def _unit_response(t: float, rise: float, decay: float) -> float:
    """g(t) after a unit jump of x at t = 0 for dg/dt = -g/decay + x, dx/dt = -x/rise."""
    k = 1.0 / rise - 1.0 / decay
    if k == 0.0:
        return t * math.exp(-t / decay)
    # -expm1 keeps precision when rise and decay are close (alpha-function limit)
    return math.exp(-t / decay) * (-math.expm1(-k * t)) / k


def peak_time(rise: float, decay: float) -> float:
    """Time (s) of the conductance peak after one release (difference of exponentials).

    Args:
        rise: rise time constant (s), >= 0.
        decay: decay time constant (s), > 0.

    Returns:
        ``rise*decay/(decay-rise)*ln(decay/rise)``; ``decay`` when they are equal; 0 without rise.
    """
    if rise <= 0.0:
        return 0.0
    if rise == decay:
        return decay
    return rise * decay / (decay - rise) * math.log(decay / rise)


def peak_factor(rise: float, decay: float) -> float:
    """Jump of x (1/s per siemens of peak) that makes one release peak at exactly one siemens.

    Args:
        rise: rise time constant (s); 0 means an instantaneous rise (single exponential).
        decay: decay time constant (s), > 0.

    Returns:
        ``1 / g_unit(t_peak)`` where ``g_unit`` is the response to a unit jump of x;
        ``e/decay`` in the alpha-function limit (rise == decay); 1 (per second) without rise.
    """
    if rise <= 0.0:
        return 1.0
    return 1.0 / _unit_response(peak_time(rise, decay), rise, decay)


def propagator(rise: float, decay: float, dt: float) -> tuple[float, float, float]:
    """Exact one-step propagator of the dual-exponential conductance.

    Over one step ``g <- Pgg*g + Pgx*x`` then ``x <- Pxx*x`` solves
    dg/dt = -g/decay + x, dx/dt = -x/rise exactly (linear system, matrix exponential), so the
    conductance waveform does not depend on the time step. Without rise (rise == 0) the whole
    jump reaches g within the step in which it was made.

    Args:
        rise: rise time constant (s), >= 0.
        decay: decay time constant (s), > 0.
        dt: time step (s).

    Returns:
        (Pgg, Pgx in s, Pxx).
    """
    pgg = math.exp(-dt / decay)
    if rise <= 0.0:
        return pgg, pgg * 1.0, 0.0
    return pgg, _unit_response(dt, rise, decay), math.exp(-dt / rise)


def mg_unblocked(v: np.ndarray | float, mg_mM: float) -> np.ndarray | float:
    """Jahr and Stevens 1990 unblocked NMDA fraction at potential ``v`` (V) and [Mg] (mM)."""
    return 1.0 / (1.0 + np.exp(-MG_SLOPE_PER_MV * np.asarray(v) * 1e3) * mg_mM / MG_HALF_MM)


# --------------------------------------------------------------------------- resting state


def adex_rest(params: dict[str, np.ndarray], current: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Stable resting potential of AdEx cells under a constant current, where one exists.

    Solves ``I + (gL + a)(EL - v) + gL*DeltaT*exp((v - VT)/DeltaT) = 0`` (dv/dt = 0 with
    w = a(v - EL)) on the branch below the fold ``V* = VT + DeltaT*ln((gL + a)/gL)``, where the
    left side decreases with v, by vectorised bisection and Newton polishing.

    Args:
        params: AdEx parameters, each an array of the same shape.
        current: constant injected current (A), same shape.

    Returns:
        (v0, has_rest): v0 is the resting potential where it exists and EL elsewhere; has_rest
        flags the cells with a resting state.
    """
    gl = np.asarray(params["gL"], dtype=float)
    a = np.asarray(params["a"], dtype=float)
    el = np.asarray(params["EL"], dtype=float)
    vt = np.asarray(params["VT"], dtype=float)
    dT = np.asarray(params["DeltaT"], dtype=float)
    i = np.asarray(current, dtype=float)
    gsum = gl + a
    ok = (gl > 0) & (gsum > 0) & (dT > 0)
    gl_s = np.where(ok, gl, 1.0)
    gsum_s = np.where(ok, gsum, 1.0)
    dT_s = np.where(ok, dT, 1.0)

    def f(v):
        expo = np.exp(np.minimum((v - vt) / dT_s, 700.0))
        return i + gsum_s * (el - v) + gl_s * dT_s * expo

    v_fold = vt + dT_s * np.log(gsum_s / gl_s)
    has_rest = ok & (f(v_fold) <= 0.0)
    # below EL + I/(gL + a) the left side is positive whatever the exponential does
    lo = np.minimum(el + i / gsum_s, v_fold) - 0.1
    hi = v_fold.copy()
    for _ in range(80):
        mid = 0.5 * (lo + hi)
        positive = f(mid) > 0.0
        lo = np.where(positive, mid, lo)
        hi = np.where(positive, hi, mid)
    v = 0.5 * (lo + hi)
    for _ in range(3):
        expo = np.exp(np.minimum((v - vt) / dT_s, 700.0))
        slope = -gsum_s + gl_s * expo
        step = np.where(slope < 0.0, f(v) / np.where(slope < 0.0, slope, -1.0), 0.0)
        v = np.clip(v - step, lo, hi)
    return np.where(has_rest, v, el), has_rest


# --------------------------------------------------------------------------- equation text


@dataclass(frozen=True)
class ReceptorTerm:
    """One receptor's conductance on a cell: Brian2 variable suffix and constants."""

    suffix: str           # "AMPA" -> variables g_AMPA, x_AMPA
    mg_block: bool


def adex_equations(receptors: list[ReceptorTerm], stimulus: str | None,
                   release_vars: list[str]) -> str:
    """Brian2 equations of an AdEx cell with per-neuron conductances (one set per receptor).

    Args:
        receptors: conductances that synapses onto this cell use.
        stimulus: the expression of the injected stimulus current, or None without stimulus.
        release_vars: suffixes of per-cell release accumulators (one per recorded synapse).

    Returns:
        Equation text; constants ``E_<r>``, ``scale_<r>``, the stimulus library and the sweep
        interval come from the group's namespace.
    """
    drive = ["gL*(EL - v)", "gL*DeltaT*exp((v - VT)/DeltaT)", "- w", "I_hold"]
    if stimulus is not None:
        drive.append("I_stim")
    if receptors:
        drive.append("I_syn")
    lines = [
        "dv/dt = (" + " + ".join(drive).replace("+ -", "-") + ")/C : volt (unless refractory)",
        "dw/dt = (a*(v - EL) - w)/tau_w : amp",
        "I_hold : amp (constant)",
    ]
    if stimulus is not None:
        lines.append(f"I_stim = {stimulus} : amp")
        lines.append("stim_index : integer (constant)")
    if receptors:
        terms = []
        for r in receptors:
            term = f"g_{r.suffix}*scale_{r.suffix}*(E_{r.suffix} - v)"
            if r.mg_block:
                term += (f"/(1 + exp(-{MG_SLOPE_PER_MV}*v/mV)*Mg/({MG_HALF_MM}*mmolar))")
            terms.append(term)
        lines.append("I_syn = " + " + ".join(terms) + " : amp")
        for r in receptors:
            lines.append(f"g_{r.suffix} : siemens")
            lines.append(f"x_{r.suffix} : siemens/second")
        lines.append("euler_load : 1")
        if any(r.mg_block for r in receptors):
            lines.append("Mg : mmolar (shared)")
    for name in ADEX_PARAMS:
        lines.append(f"{name} : {ADEX_UNITS[name]} (constant)")
    for s in release_vars:
        lines.append(f"released_{s} : 1")
        lines.append(f"deliveries_{s} : 1")
    return "\n".join(lines)


def conductance_update(receptors: list[ReceptorTerm]) -> str:
    """Code that advances every conductance by one exact step (propagators from the namespace).

    It also keeps ``euler_load``, the largest ``dt*(gL + total synaptic conductance)/C`` seen:
    forward Euler overshoots the reversal potentials once it reaches 1 (the reset then hides
    the runaway, so the engine checks this number after the run).
    """
    lines = []
    for r in receptors:
        s = r.suffix
        # Flush values far below any physical conductance to exact zero: a decaying value
        # otherwise ends stuck at the smallest subnormal number (x*P rounds back to itself),
        # and subnormal arithmetic slows every later step many times over.
        lines.append(f"g_{s} = P_gg_{s}*g_{s} + P_gx_{s}*x_{s}")
        lines.append(f"g_{s} = g_{s}*int(abs(g_{s}) > {NEGLIGIBLE_SI}*siemens)")
        lines.append(f"x_{s} = P_xx_{s}*x_{s}*int(abs(x_{s}) > {NEGLIGIBLE_SI}*siemens/second)")
    total = " + ".join(["gL"] + [f"abs(g_{r.suffix}*scale_{r.suffix})" for r in receptors])
    lines.append(f"load_now = ({total})*dt/C")
    lines.append("euler_load = euler_load + (load_now - euler_load)*int(load_now > euler_load)")
    return "\n".join(lines)


def synapse_model(stochastic: bool, receptor_suffixes: list[str]) -> str:
    """Per-synapse state of a Tsodyks-Markram connection (per site if stochastic)."""
    lines = [
        "U : 1 (constant)",
        "rate_D : hertz (constant)",
        "rate_F : hertz (constant)",
        "u_fac : 1",
        "t_last : second",
    ]
    if stochastic:
        lines.append("available : 1")
    else:
        lines.append("R : 1")
        lines.append("sites : 1 (constant)")
    lines += [f"q_{s} : siemens/second (constant)" for s in receptor_suffixes]
    return "\n".join(lines)


def synapse_on_pre(stochastic: bool, receptor_suffixes: list[str], release_var: str | None) -> str:
    """Event code of a Tsodyks-Markram connection at each presynaptic spike.

    Facilitation in event form (Markram, Wang and Tsodyks 1998): ``u_fac`` decays to 0 with F and
    jumps to ``u = u_fac + U(1 - u_fac)`` at each spike, which is the release probability used.
    Deterministic: resources R recover with D, release ``sites*u*R``. Stochastic (one synapse per
    site): an empty site refills with probability ``1 - exp(-dt/D)`` since the last spike, a full
    site releases with probability u.
    """
    elapsed = "(t - t_last)"
    lines = [
        f"u_fac = u_fac*exp(-{elapsed}*rate_F)",
        "u = u_fac + U*(1 - u_fac)",
        "u_fac = u",
    ]
    if stochastic:
        lines += [
            f"available = available + (1 - available)*int(rand() < 1 - exp(-{elapsed}*rate_D))",
            "rel = available*int(rand() < u)",
            "available = available - rel",
        ]
    else:
        lines += [
            f"R = 1 - (1 - R)*exp(-{elapsed}*rate_D)",
            "rel = sites*u*R",
            "R = R - u*R",
        ]
    lines.append("t_last = t")
    lines += [f"x_{s}_post += rel*q_{s}" for s in receptor_suffixes]
    if release_var is not None:
        lines.append(f"released_{release_var}_post += rel")
        lines.append(f"deliveries_{release_var}_post += 1")
    return "\n".join(lines)
