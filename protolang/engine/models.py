"""Model text and closed-form numbers for the engine: takes receptor kinetics and cell parameters, hands out Brian2 equation strings, propagators, peak factors, resting states and steady-state currents.

Nothing here imports Brian2; the strings are handed to Brian2 by :mod:`protolang.engine.build`.
The plan stage uses the steady-state functions (:func:`steady_state_current`,
:func:`holding_is_stable`) for holding currents, so they take plain numpy arrays.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from functools import lru_cache

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


@dataclass(frozen=True)
class NoiseTerm:
    """One Ornstein-Uhlenbeck input of a cell: state ``noise_<index>``, a current (A) or a
    conductance (S) acting through its reversal ``noise_E_<index>``."""

    index: int
    conductance: bool


@dataclass(frozen=True)
class CellInputs:
    """What drives a cell besides its synapses, as pieces of equation text.

    Attributes:
        stimulus: expression of the rendered waveform as a plain number: amperes of injected
            current in current clamp, volts of command offset from the holding potential in
            voltage clamp; None without a waveform.
        declarations: per-cell variables the stimulus expression reads.
        clamp: a series-resistance voltage clamp (constants ``V_hold``, ``R_series`` per cell).
        noise: Ornstein-Uhlenbeck inputs, summed.
        sweep_time: expression of the time within the sweep, for the noise windows.
        background: Ornstein-Uhlenbeck inputs that run all the time with per-cell mean and
            kick (``bg_mean_k``, ``bg_kick_k``; zero for cells a background line does not reach):
            the ongoing drive of an embedded network.
    """

    stimulus: str | None = None
    declarations: tuple[str, ...] = ()
    clamp: bool = False
    noise: tuple[NoiseTerm, ...] = ()
    sweep_time: str = "t"
    background: tuple[NoiseTerm, ...] = ()


def input_equations(inputs: CellInputs) -> tuple[list[str], list[str]]:
    """Drive terms (amperes) and equation lines of a cell's stimulus, clamp and noise.

    The clamp passes ``I_clamp = (V_cmd - v)/R_series`` into the cell, ``V_cmd`` being the
    holding potential plus the rendered command offset. A noise input enters only inside its
    window ``[noise_start_k, noise_stop_k)`` of sweep time; its process runs all the time, so
    it is stationary when the window opens. A conductance input is clipped at 0.
    """
    drive: list[str] = []
    lines = list(inputs.declarations)
    if inputs.clamp:
        drive.append("I_clamp")
        command = "V_hold" + (f" + ({inputs.stimulus})*volt" if inputs.stimulus else "")
        lines += ["I_clamp = (V_cmd - v)/R_series : amp", f"V_cmd = {command} : volt",
                  "V_hold : volt (constant)", "R_series : ohm (constant)"]
    elif inputs.stimulus:
        drive.append("I_stim")
        lines.append(f"I_stim = ({inputs.stimulus})*amp : amp")
    if inputs.noise:
        ts = inputs.sweep_time
        terms = []
        for n in inputs.noise:
            k = n.index
            window = f"int({ts} >= noise_start_{k} and {ts} < noise_stop_{k})"
            if n.conductance:
                terms.append(f"noise_{k}*int(noise_{k} > 0*siemens)*(noise_E_{k} - v)*{window}")
                lines.append(f"noise_{k} : siemens")
            else:
                terms.append(f"noise_{k}*{window}")
                lines.append(f"noise_{k} : amp")
        lines.append("I_noise = " + " + ".join(terms) + " : amp")
        drive.append("I_noise")
    if inputs.background:
        terms = []
        for n in inputs.background:
            k, unit = n.index, "siemens" if n.conductance else "amp"
            lines += [f"bg_{k} : {unit}", f"bg_mean_{k} : {unit} (constant)", f"bg_kick_{k} : {unit} (constant)"]
            terms.append(f"bg_{k}*int(bg_{k} > 0*siemens)*(bg_E_{k} - v)" if n.conductance else f"bg_{k}")
        lines.append("I_background = " + " + ".join(terms) + " : amp")
        drive.append("I_background")
    return drive, lines


def background_update(background: tuple[NoiseTerm, ...] | list[NoiseTerm]) -> str:
    """Start-of-step code of the background Ornstein-Uhlenbeck inputs (the exact step of
    :func:`noise_update`, with per-cell mean and kick and a shared ``bg_decay_k``)."""
    return "\n".join(f"bg_{n.index} = bg_mean_{n.index} + (bg_{n.index} - bg_mean_{n.index})*bg_decay_{n.index}"
                     f" + bg_kick_{n.index}*randn()" for n in background)


def load_conductances(inputs: CellInputs) -> list[str]:
    """Conductances besides gL and the receptors that forward Euler must follow (clamp, noise)."""
    out = ["1/R_series"] if inputs.clamp else []
    out += [f"abs(noise_{n.index})" for n in inputs.noise if n.conductance]
    out += [f"abs(bg_{n.index})" for n in inputs.background if n.conductance]
    return out


def adex_equations(receptors: list[ReceptorTerm], inputs: CellInputs, release_vars: list[str],
                   *, linear: bool = False, gated: bool = False) -> str:
    """Brian2 equations of an AdEx cell with per-neuron conductances (one set per receptor).

    Args:
        receptors: conductances that synapses onto this cell use.
        inputs: stimulus, clamp and noise (:func:`input_equations`).
        release_vars: suffixes of per-cell release accumulators (one per recorded synapse).
        linear: write the membrane equation linear in v for the exponential Euler method: the
            exponential spike current (``I_exp``) and the magnesium block (``B_<r>``) become
            variables refreshed at the start of each step (:func:`adex_linear_update`).
        gated: multiply the exponential spike current by a per-cell constant ``spike_gate``
            (1 normal, 0 silenced: the cell integrates its inputs but cannot fire; the threshold
            must test the gate too, see :data:`ADEX_GATED_THRESHOLD`).

    Returns:
        Equation text; constants ``E_<r>``, ``scale_<r>``, the stimulus library, the noise
        constants and the sweep interval come from the group's namespace.
    """
    extra_drive, extra_lines = input_equations(inputs)
    spike = "I_exp" if linear else "gL*DeltaT*exp((v - VT)/DeltaT)"
    if gated:
        spike = f"spike_gate*{spike}"
    drive = ["gL*(EL - v)", spike, "- w", "I_hold"] + extra_drive
    if receptors:
        drive.append("I_syn")
    lines = [
        "dv/dt = (" + " + ".join(drive).replace("+ -", "-") + ")/C : volt (unless refractory)",
        "dw/dt = (a*(v - EL) - w)/tau_w : amp",
        "I_hold : amp (constant)",
    ]
    if linear:
        lines.append("I_exp : amp")
    lines += extra_lines
    if receptors:
        terms = []
        for r in receptors:
            term = f"g_{r.suffix}*scale_{r.suffix}*(E_{r.suffix} - v)"
            if r.mg_block and linear:
                term = f"g_{r.suffix}*scale_{r.suffix}*B_{r.suffix}*(E_{r.suffix} - v)"
            elif r.mg_block:
                term += (f"/(1 + exp(-{MG_SLOPE_PER_MV}*v/mV)*Mg/({MG_HALF_MM}*mmolar))")
            terms.append(term)
        lines.append("I_syn = " + " + ".join(terms) + " : amp")
        for r in receptors:
            lines.append(f"g_{r.suffix} : siemens")
            lines.append(f"x_{r.suffix} : siemens/second")
            if r.mg_block and linear:
                lines.append(f"B_{r.suffix} : 1")
        if any(r.mg_block for r in receptors):
            lines.append("Mg : mmolar (shared)")
    if not linear and (receptors or load_conductances(inputs)):
        lines.append("euler_load : 1")
    for name in ADEX_PARAMS:
        lines.append(f"{name} : {ADEX_UNITS[name]} (constant)")
    if gated:
        lines.append("spike_gate : 1 (constant)")
    for s in release_vars:
        lines.append(f"released_{s} : 1")
        lines.append(f"deliveries_{s} : 1")
    return "\n".join(lines)


#: Threshold of AdEx cells written with ``gated=True``: a silenced cell never reaches it.
ADEX_GATED_THRESHOLD = "v > Vcut and spike_gate > 0.5"


def conductance_update(receptors: list[ReceptorTerm], extra_conductances: tuple[str, ...] | list[str] = ()) -> str:
    """Code that advances every conductance by one exact step (propagators from the namespace).

    It also keeps ``euler_load``, the largest ``dt*(gL + total conductance)/C`` seen, the total
    counting the receptors and ``extra_conductances`` (a clamp's 1/Rs, conductance noise):
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
    total = " + ".join(["gL"] + [f"abs(g_{r.suffix}*scale_{r.suffix})" for r in receptors]
                       + list(extra_conductances))
    lines.append(f"load_now = ({total})*dt/C")
    lines.append("euler_load = euler_load + (load_now - euler_load)*int(load_now > euler_load)")
    return "\n".join(lines)


def adex_linear_update(receptors: list[ReceptorTerm]) -> str:
    """Start-of-step code of an AdEx cell written linear in v: the conductances advance as in
    :func:`hh_conductance_update` (with the magnesium block refreshed) and the exponential spike
    current is evaluated at the step's starting potential, which exponential Euler holds fixed
    over the step like every other coefficient."""
    code = hh_conductance_update(receptors)
    return (code + "\n" if code else "") + "I_exp = gL*DeltaT*exp((v - VT)/DeltaT)"


def noise_update(noise: tuple[NoiseTerm, ...] | list[NoiseTerm]) -> str:
    """Start-of-step code advancing each Ornstein-Uhlenbeck input by one exact step.

    ``n <- mean + (n - mean) e^{-dt/tau} + sd sqrt(1 - e^{-2 dt/tau}) N(0, 1)`` is the exact
    transition of dn = (mean - n)/tau dt + sd sqrt(2/tau) dW (Gillespie 1996, Phys Rev E
    54:2084), so the stationary mean, SD and correlation time do not depend on the time step
    or the cell's integration method. Constants ``noise_mean_k``, ``noise_decay_k`` and
    ``noise_kick_k`` come from the namespace.
    """
    return "\n".join(f"noise_{n.index} = noise_mean_{n.index} + (noise_{n.index} - noise_mean_{n.index})"
                     f"*noise_decay_{n.index} + noise_kick_{n.index}*randn()" for n in noise)


def clamp_rest(model: str, params: dict[str, np.ndarray], v_hold, series, current
               ) -> tuple[np.ndarray, np.ndarray]:
    """Steady state of a cell clamped at ``v_hold`` through the series resistance ``series``.

    Solves ``I_ss(v) = current + (v_hold - v)/series`` (the cell's steady-state I-V curve, see
    :func:`steady_state_current`, against the clamp's voltage divider) by bisection in the
    narrowest bracket around ``v_hold`` (1, 2, 4 ... 128 mV wide on each side), so a fold of the
    I-V curve far from the holding potential does not matter. For a passive cell this is
    v = (v_hold + Rs*gL*EL)/(1 + Rs*gL).

    Args:
        model: "adex", "hh_cortical" or "hh_squid".
        params: the role's parameters, arrays of shape (n,).
        v_hold: command potential (V), scalar or (n,).
        series: series resistance (Ohm), scalar or (n,).
        current: other constant current injected (A), scalar or (n,).

    Returns:
        (v0, found): v0 is the steady potential where the bracket holds one, else ``v_hold``.
    """
    params = {k: np.asarray(val, dtype=float) for k, val in params.items()}
    shape = params["EL"].shape
    v_hold = np.broadcast_to(np.asarray(v_hold, dtype=float), shape)
    series = np.broadcast_to(np.asarray(series, dtype=float), shape)
    current = np.broadcast_to(np.asarray(current, dtype=float), shape)

    def f(v):
        with np.errstate(over="ignore", invalid="ignore"):
            return steady_state_current(model, params, v) - current - (v_hold - v) / series

    found = np.zeros(shape, dtype=bool)
    lo, hi = v_hold.copy(), v_hold.copy()
    for width in 1e-3 * 2.0 ** np.arange(8):
        ok = ~found & (f(v_hold - width) < 0) & (f(v_hold + width) > 0)
        lo, hi = np.where(ok, v_hold - width, lo), np.where(ok, v_hold + width, hi)
        found |= ok
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        below = f(mid) < 0
        lo = np.where(below, mid, lo)
        hi = np.where(below, hi, mid)
    return np.where(found, 0.5 * (lo + hi), v_hold), found


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


# --------------------------------------------------------------------------- Hodgkin-Huxley models
#
# Two single-compartment conductance-based models, both written per membrane area:
#
# * ``hh_squid``: Hodgkin and Huxley 1952 (J Physiol 117:500), modern sign convention (V is the
#   membrane potential, rest near -65 mV), rates scaled by phi = Q10^((T - T_ref)/10).
# * ``hh_cortical``: the minimal cortical models of Pospischil et al. 2008 (Biol Cybern
#   99:427): I_Na and I_Kd in Traub-Miles form with the threshold shift V_T, the slow K+
#   current I_M, the high-threshold Ca2+ current I_L (kinetics of Reuveni et al. 1993,
#   J Neurosci 13:4609) and the low-threshold Ca2+ current I_T (kinetics of Destexhe et al.
#   1996, J Neurophysiol 76:2049, shifted +2 mV for 2 mM calcium, activation at steady state),
#   as in the authors' code. Calcium currents use the fixed reversal E_Ca.
#
# Every rate is written once, as text in ``vm`` (membrane potential in mV), ``vt`` (V_T in mV)
# and ``taumax`` (tau_max in ms), giving 1/ms or ms. The same text is handed to Brian2 and
# evaluated with numpy for steady states, so the simulated cell and the holding currents
# cannot drift apart.

HH_SQUID_PARAMS = ("diam", "length", "c_m", "g_leak", "EL", "gNa", "gK", "ENa", "EK")
HH_CORTICAL_PARAMS = ("diam", "length", "c_m", "g_leak", "EL", "gNa", "gKd", "gM", "tau_max",
                      "gCaL", "gCaT", "VT", "ENa", "EK", "ECa")
HH_MODELS = ("hh_cortical", "hh_squid")

#: Parameters (SI) each role of a model carries, as the circuit layer hands them out.
MODEL_PARAMS: dict[str, tuple[str, ...]] = {
    "adex": ADEX_PARAMS, "hh_cortical": HH_CORTICAL_PARAMS, "hh_squid": HH_SQUID_PARAMS}

#: Rate factors (dimensionless, one per rate group) each Hodgkin-Huxley role carries beside its
#: parameters; the plan sets them from the class's Q10 values and the bath temperature.
HH_RATE_FACTORS: dict[str, tuple[str, ...]] = {
    "hh_cortical": ("phi_Na_Kd", "phi_M", "phi_CaT", "phi_CaL"),
    "hh_squid": ("phi",),
}

#: Brian2 units of the per-area parameters.
_HH_UNITS = {"c_m": "farad/meter**2", "g_leak": "siemens/meter**2", "gNa": "siemens/meter**2",
             "gK": "siemens/meter**2", "gKd": "siemens/meter**2", "gM": "siemens/meter**2",
             "gCaL": "siemens/meter**2", "gCaT": "siemens/meter**2", "EL": "volt", "ENa": "volt",
             "EK": "volt", "ECa": "volt", "VT": "volt", "tau_max": "second"}

# I_T kinetics were measured at 24 degC; the authors scale them with Q10 3 to their 36 degC,
# so the time constant below (written at the 36 degC reference) is divided by 3^1.2.
_T_CURRENT_TO_36C = 3.0 ** 1.2


def q10_factor(q10: float, temperature: float, reference: float) -> float:
    """Rate factor ``q10 ** ((temperature - reference) / 10)`` (temperatures in K or degC alike)."""
    return float(q10 ** ((temperature - reference) / 10.0))


def rate_factor_name(q10_key: str) -> str:
    """Name of the rate factor a circuit Q10 key sets: ``q10`` -> ``phi``, ``q10_M`` -> ``phi_M``."""
    return "phi" + q10_key[3:]


@dataclass(frozen=True)
class Gate:
    """One gating variable: ``kind`` "ab" gives forward/backward rates (1/ms), "it" the steady
    state and time constant (ms); the rates are multiplied by the rate factor ``factor``."""

    name: str
    kind: str
    first: str
    second: str
    factor: str


@dataclass(frozen=True)
class Channel:
    """One ionic current: conductance per area times ``gating`` times (v - reversal)."""

    name: str
    conductance: str
    reversal: str
    gating: str
    gates: tuple[str, ...]


_SQUID_GATES = (
    Gate("m_Na", "ab", "1/exprel(-(vm + 40)/10)", "4*exp(-(vm + 65)/18)", "phi"),
    Gate("h_Na", "ab", "0.07*exp(-(vm + 65)/20)", "1/(1 + exp(-(vm + 35)/10))", "phi"),
    Gate("n_K", "ab", "0.1/exprel(-(vm + 55)/10)", "0.125*exp(-(vm + 65)/80)", "phi"),
)
_SQUID_CHANNELS = (
    Channel("Na", "gNa", "ENa", "m_Na**3*h_Na", ("m_Na", "h_Na")),
    Channel("K", "gK", "EK", "n_K**4", ("n_K",)),
)

_CORTICAL_GATES = (
    Gate("m_Na", "ab", "1.28/exprel((13 - vm + vt)/4)", "1.4/exprel((vm - vt - 40)/5)", "phi_Na_Kd"),
    Gate("h_Na", "ab", "0.128*exp((17 - vm + vt)/18)", "4/(1 + exp((40 - vm + vt)/5))", "phi_Na_Kd"),
    Gate("n_Kd", "ab", "0.16/exprel((15 - vm + vt)/5)", "0.5*exp((10 - vm + vt)/40)", "phi_Na_Kd"),
    Gate("p_M", "it", "1/(1 + exp(-(vm + 35)/10))",
         "taumax/(3.3*exp((vm + 35)/20) + exp(-(vm + 35)/20))", "phi_M"),
    Gate("q_L", "ab", "0.209/exprel(-(vm + 27)/3.8)", "0.94*exp(-(vm + 75)/17)", "phi_CaL"),
    Gate("r_L", "ab", "0.000457*exp(-(vm + 13)/50)", "0.0065/(exp(-(vm + 15)/28) + 1)", "phi_CaL"),
    Gate("u_T", "it", "1/(1 + exp((vm + 83)/4))",
         f"(30.8 + (211.4 + exp((vm + 115.2)/5))/(1 + exp((vm + 86)/3.2)))/{_T_CURRENT_TO_36C!r}",
         "phi_CaT"),
)
# I_T activation follows the membrane potential instantly
_CORTICAL_INSTANT = {"s_T": "1/(1 + exp(-(vm + 59)/6.2))"}
_CORTICAL_CHANNELS = (
    Channel("Na", "gNa", "ENa", "m_Na**3*h_Na", ("m_Na", "h_Na")),
    Channel("Kd", "gKd", "EK", "n_Kd**4", ("n_Kd",)),
    Channel("M", "gM", "EK", "p_M", ("p_M",)),
    Channel("CaL", "gCaL", "ECa", "q_L**2*r_L", ("q_L", "r_L")),
    Channel("CaT", "gCaT", "ECa", "s_T**2*u_T", ("u_T",)),
)

_GATES = {"hh_squid": _SQUID_GATES, "hh_cortical": _CORTICAL_GATES}
_CHANNELS = {"hh_squid": _SQUID_CHANNELS, "hh_cortical": _CORTICAL_CHANNELS}
_INSTANT = {"hh_squid": {}, "hh_cortical": _CORTICAL_INSTANT}


def _exprel(x):
    """(exp(x) - 1)/x, 1 at x = 0 (Brian2's ``exprel``), precise near 0."""
    x = np.asarray(x, dtype=float)
    small = np.abs(x) < 1e-6
    safe = np.where(small, 1.0, x)
    with np.errstate(over="ignore"):
        return np.where(small, 1.0 + x / 2.0 + x * x / 6.0, np.expm1(safe) / safe)


_NUMERIC = {"__builtins__": {}, "exp": np.exp, "exprel": _exprel}


@lru_cache(maxsize=None)
def _compiled(expression: str):
    return compile(expression, "<rate>", "eval")


def _numeric(expression: str, env: dict) -> np.ndarray:
    """Evaluate one of the constant rate texts above with numpy (never user text)."""
    with np.errstate(over="ignore"):
        return np.asarray(eval(_compiled(expression), _NUMERIC, env), dtype=float)


def _check_model(model: str) -> None:
    if model not in HH_MODELS:
        raise AssertionError(f"internal error: {model!r} is not a Hodgkin-Huxley model")


def hh_gates(model: str) -> tuple[str, ...]:
    """Names of the state variables (besides v) of a Hodgkin-Huxley model, in order."""
    _check_model(model)
    return tuple(g.name for g in _GATES[model])


def hh_channels(model: str) -> dict[str, str]:
    """Ionic currents of a Hodgkin-Huxley model (besides the leak) -> their conductance parameter."""
    _check_model(model)
    return {ch.name: ch.conductance for ch in _CHANNELS[model]}


def membrane_area(params: dict[str, np.ndarray]) -> np.ndarray:
    """Area (m^2) of the cylinder of ``diam`` and ``length``, without end caps: pi*d*L."""
    return math.pi * np.asarray(params["diam"], dtype=float) * np.asarray(params["length"], dtype=float)


def _env(model: str, params: dict, v) -> dict:
    env = {"vm": np.asarray(v, dtype=float) * 1e3}
    if model == "hh_cortical":
        env["vt"] = np.asarray(params["VT"], dtype=float) * 1e3
        env["taumax"] = np.asarray(params["tau_max"], dtype=float) * 1e3
    return env


def gate_steady_states(model: str, params: dict[str, np.ndarray], v) -> dict[str, np.ndarray]:
    """Steady-state value of every gate (and instantaneous activation) at potential ``v`` (V)."""
    _check_model(model)
    env = _env(model, params, v)
    out = {}
    for g in _GATES[model]:
        first, second = _numeric(g.first, env), _numeric(g.second, env)
        out[g.name] = first / (first + second) if g.kind == "ab" else first
    for name, text in _INSTANT[model].items():
        out[name] = _numeric(text, env)
    return out


def _gate_derivatives(model: str, params: dict, v, gates: dict) -> dict[str, np.ndarray]:
    """d(gate)/dt in 1/s with the role's rate factors applied."""
    env = _env(model, params, v)
    out = {}
    for g in _GATES[model]:
        first, second = _numeric(g.first, env), _numeric(g.second, env)
        phi = np.asarray(params[g.factor], dtype=float)
        if g.kind == "ab":
            rate = first * (1.0 - gates[g.name]) - second * gates[g.name]
        else:
            rate = (first - gates[g.name]) / second
        out[g.name] = phi * rate * 1e3
    return out


def ionic_current_density(model: str, params: dict[str, np.ndarray], v, gates: dict) -> np.ndarray:
    """Total ionic current (A/m^2, outward positive) at ``v`` (V) with gate values ``gates``."""
    _check_model(model)
    v = np.asarray(v, dtype=float)
    env = dict(gates)
    env.update(_env(model, params, v))
    for name, text in _INSTANT[model].items():
        env[name] = _numeric(text, env)
    total = np.asarray(params["g_leak"], dtype=float) * (v - np.asarray(params["EL"], dtype=float))
    for ch in _CHANNELS[model]:
        g = np.asarray(params[ch.conductance], dtype=float)
        total = total + g * _numeric(ch.gating, env) * (v - np.asarray(params[ch.reversal], dtype=float))
    return total


def steady_state_current(model: str, params: dict[str, np.ndarray], v) -> np.ndarray:
    """Constant current (A) that makes ``v`` a steady state of the model (all gates at rest there).

    This is the steady-state I-V curve: for adex ``gL(v - EL) - gL*DeltaT*exp((v - VT)/DeltaT)
    + a(v - EL)`` (w at its steady state a(v - EL)); for the Hodgkin-Huxley models the area
    times the total ionic current with every gate at its steady state at ``v``.

    Args:
        model: "adex", "hh_cortical" or "hh_squid".
        params: the role's parameters (SI), arrays of one shape.
        v: potential(s) in V, broadcast against the parameters.

    Returns:
        The current in A (positive = injected into the cell).
    """
    if model == "adex":
        gL, EL, VT, dT, a = (np.asarray(params[k], dtype=float) for k in ("gL", "EL", "VT", "DeltaT", "a"))
        return gL * (v - EL) - gL * dT * np.exp((v - VT) / dT) + a * (v - EL)
    gates = gate_steady_states(model, params, v)
    return membrane_area(params) * ionic_current_density(model, params, v, gates)


def steady_state_slope(model: str, params: dict[str, np.ndarray], v) -> np.ndarray:
    """dI_ss/dV (S) of :func:`steady_state_current` at ``v``: the steady-state input conductance.

    Closed form for adex; a central difference of 1 uV for the Hodgkin-Huxley models, whose
    gates are smooth on that scale.
    """
    if model == "adex":
        gL, VT, dT, a = (np.asarray(params[k], dtype=float) for k in ("gL", "VT", "DeltaT", "a"))
        return gL + a - gL * np.exp((v - VT) / dT)
    h = 1e-6
    return (steady_state_current(model, params, np.asarray(v) + h)
            - steady_state_current(model, params, np.asarray(v) - h)) / (2 * h)


def _state_derivatives(model: str, params: dict, state: np.ndarray, current) -> np.ndarray:
    """Right-hand side (per second) of the cell under a constant ``current``; ``state`` is
    (k, ...) with v (and w for adex) first."""
    if model == "adex":
        p = {k: np.asarray(params[k], dtype=float) for k in ("C", "gL", "EL", "VT", "DeltaT", "a", "tau_w")}
        v, w = state
        dv = (-p["gL"] * (v - p["EL"]) + p["gL"] * p["DeltaT"] * np.exp((v - p["VT"]) / p["DeltaT"])
              - w + current) / p["C"]
        dw = (p["a"] * (v - p["EL"]) - w) / p["tau_w"]
        return np.stack([dv, dw])
    names = hh_gates(model)
    v = state[0]
    gates = dict(zip(names, state[1:]))
    area = membrane_area(params)
    dv = (current / area - ionic_current_density(model, params, v, gates)) / np.asarray(params["c_m"], dtype=float)
    dg = _gate_derivatives(model, params, v, gates)
    return np.stack([dv] + [dg[n] for n in names])


def holding_is_stable(model: str, params: dict[str, np.ndarray], v) -> np.ndarray:
    """Whether a constant current can hold the cell at ``v`` as a stable steady state.

    Refuses where dI_ss/dV <= 0 (the I-V curve folds: the held state is a saddle) and where
    the Jacobian of the full system at the steady state has an eigenvalue with a real part
    >= 0 (e.g. a Hopf instability: the cell oscillates or fires instead of resting).
    Hodgkin-Huxley roles must carry their rate factors (:data:`HH_RATE_FACTORS`), since
    stability depends on temperature through them.

    Args:
        model: "adex", "hh_cortical" or "hh_squid".
        params: the role's parameters, arrays of shape (n,).
        v: potential(s) (V), scalar or shape (n,).

    Returns:
        Boolean array of shape (n,).
    """
    params = {k: np.asarray(val, dtype=float) for k, val in params.items()}
    n = params["EL"].shape
    v = np.broadcast_to(np.asarray(v, dtype=float), n).copy()
    current = steady_state_current(model, params, v)
    slope_ok = steady_state_slope(model, params, v) > 0
    if model == "adex":
        state = np.stack([v, np.asarray(params["a"]) * (v - np.asarray(params["EL"]))])
    else:
        gates = gate_steady_states(model, params, v)
        state = np.stack([v] + [np.broadcast_to(gates[g], v.shape) for g in hh_gates(model)])
    k = state.shape[0]
    jac = np.empty(v.shape + (k, k))
    for j in range(k):
        h = 1e-6 if j else 1e-7     # 0.1 uV for v, 1e-6 for gates
        up, down = state.copy(), state.copy()
        up[j] += h
        down[j] -= h
        diff = (_state_derivatives(model, params, up, current)
                - _state_derivatives(model, params, down, current)) / (2 * h)
        jac[..., :, j] = np.moveaxis(diff, 0, -1)
    finite = np.isfinite(jac).all(axis=(-2, -1))
    real = np.full(v.shape, np.inf)
    if finite.any():
        real[finite] = np.linalg.eigvals(jac[finite]).real.max(axis=-1)
    return slope_ok & finite & (real < 0)


def holdable_limit(model: str, params: dict[str, np.ndarray], low: float = -0.11,
                   high: float = 0.03, step: float = 0.25e-3) -> np.ndarray:
    """Lowest potential above ``low`` (V) at which :func:`holding_is_stable` first fails, per
    cell, on a grid of ``step``; ``high`` where it never fails on the grid."""
    params = {k: np.asarray(val, dtype=float) for k, val in params.items()}
    n = params["EL"].shape[0]
    grid = np.arange(low, high + step / 2, step)
    tiled = {k: np.repeat(val[None, :], grid.size, axis=0).ravel() for k, val in params.items()}
    ok = holding_is_stable(model, tiled, np.repeat(grid, n)).reshape(grid.size, n)
    first_bad = np.where(~ok.all(axis=0), np.argmax(~ok, axis=0), grid.size - 1)
    return np.where(~ok.all(axis=0), grid[first_bad], high)


def hh_rest(model: str, params: dict[str, np.ndarray], current) -> tuple[np.ndarray, np.ndarray]:
    """Resting potential of Hodgkin-Huxley cells under a constant current (A).

    Takes the most negative potential where the steady-state I-V curve crosses ``current``
    upwards (a 1-D stable crossing), found on a 0.25 mV grid from -120 to +40 mV and refined
    by bisection to 1e-12 V. Such a crossing always exists when the I-V curve runs from
    below to above ``current``.

    Args:
        model: "hh_cortical" or "hh_squid".
        params: the role's parameters, arrays of shape (n,).
        current: constant injected current (A), shape (n,) or scalar.

    Returns:
        (v0, found): v0 is the resting potential (EL where none was found).
    """
    _check_model(model)
    params = {k: np.asarray(val, dtype=float) for k, val in params.items()}
    n = params["EL"].shape[0]
    current = np.broadcast_to(np.asarray(current, dtype=float), (n,))
    grid = np.arange(-0.120, 0.040 + 1e-9, 0.25e-3)
    tiled = {k: np.repeat(val[None, :], grid.size, axis=0).ravel() for k, val in params.items()}
    f = (steady_state_current(model, tiled, np.repeat(grid, n)).reshape(grid.size, n)
         - current[None, :])
    up = (f[:-1] < 0) & (f[1:] >= 0)
    found = up.any(axis=0)
    k = np.argmax(up, axis=0)
    lo, hi = grid[k], grid[k + 1]
    for _ in range(40):
        mid = 0.5 * (lo + hi)
        below = steady_state_current(model, params, mid) - current < 0
        lo = np.where(below, mid, lo)
        hi = np.where(below, hi, mid)
    v0 = 0.5 * (lo + hi)
    return np.where(found, v0, params["EL"]), found


def hh_slow_time_constants(model: str, params: dict[str, np.ndarray]) -> list[tuple[float, str]]:
    """The slowest time constants (s) of a Hodgkin-Huxley role, with what they belong to:
    the passive membrane (c_m/g_leak) and, over -100 to 0 mV, the slowest gate of every current
    the role has (rate factors applied)."""
    _check_model(model)
    params = {k: np.asarray(val, dtype=float) for k, val in params.items()}
    out = [(float(np.max(params["c_m"] / params["g_leak"])), "membrane")]
    grid = np.arange(-0.100, 0.0 + 1e-9, 1e-3)[:, None]   # (potentials, cells)
    env = _env(model, params, grid)
    for ch in _CHANNELS[model]:
        if not np.any(params[ch.conductance] > 0):
            continue
        for g in (g for g in _GATES[model] if g.name in ch.gates):
            first, second = _numeric(g.first, env), _numeric(g.second, env)
            tau_ms = 1.0 / (first + second) if g.kind == "ab" else second
            slowest = np.max(tau_ms * 1e-3 / params[g.factor])
            out.append((float(slowest), f"gate {g.name} of I_{ch.name}"))
    return out


def hh_equations(model: str, channels: list[str], receptors: list[ReceptorTerm],
                 inputs: CellInputs, release_vars: list[str], exprel: str = "exprel") -> str:
    """Brian2 equations of a Hodgkin-Huxley cell (per-area currents on a membrane ``area``).

    Args:
        model: "hh_cortical" or "hh_squid".
        channels: names of the ionic currents to include (others have zero conductance).
        receptors: conductances that synapses onto this cell use. A magnesium block enters
            through ``B_<r>``, refreshed each step by :func:`hh_conductance_update`, so that
            the membrane equation stays linear in v for the exponential Euler method.
        inputs: stimulus, clamp and noise (:func:`input_equations`); every term is linear in
            v, as exponential Euler needs.
        release_vars: suffixes of per-cell release accumulators (one per recorded synapse).
        exprel: the name the rates use for (exp(x) - 1)/x (the engine passes a faster
            stand-in for Brian2's own on the numpy target).

    Returns:
        Equation text; receptor constants, the stimulus library and the sweep interval come
        from the group's namespace, as for :func:`adex_equations`.
    """
    _check_model(model)
    used = [ch for ch in _CHANNELS[model] if ch.name in channels]
    unknown = set(channels) - {ch.name for ch in used}
    if unknown:
        raise AssertionError(f"internal error: unknown channels {sorted(unknown)} for {model}")
    gate_names = [g for ch in used for g in ch.gates]
    extra_drive, extra_lines = input_equations(inputs)
    drive = ["I_hold"] + extra_drive + (["I_syn"] if receptors else [])
    lines = [
        "dv/dt = ((" + " + ".join(drive) + ")/area - i_ion)/c_m : volt",
        "i_ion = " + " + ".join(["g_leak*(v - EL)"] + [
            f"{ch.conductance}*{ch.gating}*(v - {ch.reversal})" for ch in used]) + " : amp/meter**2",
        "vm = v/mV : 1",
        "I_hold : amp (constant)",
        "area : meter**2 (constant)",
    ]
    names = {"c_m", "g_leak", "EL"} | {ch.conductance for ch in used} | {ch.reversal for ch in used}
    if model == "hh_cortical":
        lines.append("vt = VT/mV : 1")
        names.add("VT")
        if "p_M" in gate_names:
            lines.append("taumax = tau_max/ms : 1")
            names.add("tau_max")
    factors: list[str] = []
    for g in (g for g in _GATES[model] if g.name in gate_names):
        if g.factor not in factors:
            factors.append(g.factor)
        if g.kind == "ab":
            lines.append(f"d{g.name}/dt = {g.factor}*(alpha_{g.name}*(1 - {g.name}) - "
                         f"beta_{g.name}*{g.name}) : 1")
            lines.append(f"alpha_{g.name} = ({_rename(g.first, exprel)})/ms : Hz")
            lines.append(f"beta_{g.name} = ({_rename(g.second, exprel)})/ms : Hz")
        else:
            lines.append(f"d{g.name}/dt = {g.factor}*({g.name}_inf - {g.name})/tau_{g.name} : 1")
            lines.append(f"{g.name}_inf = {_rename(g.first, exprel)} : 1")
            lines.append(f"tau_{g.name} = ({_rename(g.second, exprel)})*ms : second")
    lines += [f"{f} : 1 (constant)" for f in factors]
    for name, text in _INSTANT[model].items():
        if any(name in ch.gating for ch in used):
            lines.append(f"{name} = {_rename(text, exprel)} : 1")
    for name in (p for p in MODEL_PARAMS[model] if p in names):
        lines.append(f"{name} : {_HH_UNITS[name]} (constant)")
    lines += extra_lines
    if receptors:
        terms = []
        for r in receptors:
            block = f"*B_{r.suffix}" if r.mg_block else ""
            terms.append(f"g_{r.suffix}*scale_{r.suffix}{block}*(E_{r.suffix} - v)")
        lines.append("I_syn = " + " + ".join(terms) + " : amp")
        for r in receptors:
            lines.append(f"g_{r.suffix} : siemens")
            lines.append(f"x_{r.suffix} : siemens/second")
            if r.mg_block:
                lines.append(f"B_{r.suffix} : 1")
        if any(r.mg_block for r in receptors):
            lines.append("Mg : mmolar (shared)")
    for s in release_vars:
        lines.append(f"released_{s} : 1")
        lines.append(f"deliveries_{s} : 1")
    return "\n".join(lines)


def _rename(expression: str, exprel: str) -> str:
    return re.sub(r"\bexprel\(", exprel + "(", expression)


def mg_block_update(suffix: str) -> str:
    """Code that sets ``B_<suffix>`` to the Jahr-Stevens unblocked fraction at the current v."""
    return f"B_{suffix} = 1/(1 + exp(-{MG_SLOPE_PER_MV}*v/mV)*Mg/({MG_HALF_MM}*mmolar))"


def hh_conductance_update(receptors: list[ReceptorTerm]) -> str:
    """Code that advances every conductance of a Hodgkin-Huxley cell by one exact step and
    refreshes the magnesium block factors (start of each step, before the state update)."""
    lines = []
    for r in receptors:
        s = r.suffix
        # flush subnormal leftovers to zero, as in conductance_update
        lines.append(f"g_{s} = P_gg_{s}*g_{s} + P_gx_{s}*x_{s}")
        lines.append(f"g_{s} = g_{s}*int(abs(g_{s}) > {NEGLIGIBLE_SI}*siemens)")
        lines.append(f"x_{s} = P_xx_{s}*x_{s}*int(abs(x_{s}) > {NEGLIGIBLE_SI}*siemens/second)")
        if r.mg_block:
            lines.append(mg_block_update(s))
    return "\n".join(lines)
