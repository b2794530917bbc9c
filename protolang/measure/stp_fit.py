"""Short-term plasticity fit: spike times (s) and per-spike response amplitudes in, Tsodyks-Markram U, D, F, A with intervals and a synapse class out.

The model is the deterministic Tsodyks-Markram synapse with facilitation (Markram, Wang and
Tsodyks 1998, PNAS 95:5323-5328) in the event form protolang's engine simulates
(``protolang.engine.models.synapse_on_pre``). At each presynaptic spike, with ``T`` the time
since the previous spike:

* the facilitation variable decays and jumps: ``u_fac <- u_fac * exp(-T/F)``, then
  ``u = u_fac + U * (1 - u_fac)``, ``u_fac <- u`` (``u_fac`` starts at 0, so ``u_1 = U``);
* the resources recover and are spent: ``R <- 1 - (1 - R) * exp(-T/D)``, release ``u * R``,
  then ``R <- R - u * R`` (``R`` starts at 1);
* the response is ``A * u * R``, with ``A`` the absolute efficacy (the response to a spike
  that releases all resources) in the unit of the amplitudes.

``F = 0`` means no facilitation (``u = U`` at every spike) and ``D = 0`` instant recovery.
This is the same sequence as the recursion ``u_{n+1} = U + u_n (1 - U) exp(-T/F)``,
``R_{n+1} = R_n (1 - u_n) exp(-T/D) + 1 - exp(-T/D)`` of the paper.

The fit (:func:`fit_tm`) is least squares on the mean response per spike. ``A`` enters the
model linearly, so for each trial (U, D, F) the best ``A`` is solved in closed form and only
(U, D, F) are searched (variable projection, Golub and Pereyra 1973, SIAM J Numer Anal
10:413-432): ``scipy.optimize.least_squares`` on log U, log D, log F inside bounds, from the
best few points of a coarse grid (multi-start). A fit is reported only when it earns it;
otherwise every parameter is NaN and ``converged`` is False, with the reason in ``message``.
protolang's acceptance rule (all must hold):

* the optimiser met its tolerances;
* the fitted efficacy ``A`` is positive (amplitudes are measured positive along the
  connection's sign, see :mod:`protolang.measure.features`);
* no fitted parameter ends within 1 % of a bound (the optimum then lies at or beyond the
  bound, and the bound's value would be reported as if it were measured);
* every parameter is resolved: moving the fit e-fold along any direction of (log U, log D,
  log F) changes the fitted responses by at least 0.1 % of their RMS (otherwise the value
  found is arbitrary, e.g. any F well below the spike interval);
* the residual RMS is at most ``max_relative_rms`` (default 0.3) of the RMS of the mean
  responses: a worse best fit means the responses follow no Tsodyks-Markram train (along
  a regular train the model's ``u`` only grows and its ``R`` only falls, each settling
  smoothly towards its steady state; alternating large and small responses are beyond
  it: the best fit of 1, 0.2, 1, 0.2, ... leaves about 0.46). 0.3 is above the misfit a
  single sweep with a response CV of 0.3 typically leaves (about 0.2).

Units are SI in and out (times and time constants in s, ``A`` in the amplitudes' unit);
:func:`summarise_fit` converts to table units (ms, mV or pA).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np
from scipy.optimize import least_squares

#: Default parameter bounds (U dimensionless, D and F in s) of :func:`fit_tm`.
DEFAULT_BOUNDS: dict[str, tuple[float, float]] = {
    "U": (1e-4, 1.0),
    "D": (1e-3, 10.0),
    "F": (1e-3, 10.0),
}
DEFAULT_MAX_RELATIVE_RMS = 0.3    # protolang's lack-of-fit limit, see the module docstring
BOUND_MARGIN = math.log(1.01)     # a fitted parameter within 1 % of a bound counts as on it
N_STARTS = 4                      # grid points polished by least squares
BOOT_STARTS = 2                   # per bootstrap resample, besides the fit of all sweeps
MIN_SENSITIVITY = 1e-3           # smallest resolved change of the fit per e-fold parameter change
# Fit tolerances: tight, because noiseless data must give the generating parameters back.
_TOL = 1e-10
# Coarse screening grid (protolang's choice): U from 0.01 to 0.95, D and F from 5 ms to 5 s,
# clipped to the bounds; geometric spacing because the model responds to ratios of T, D and F.
_GRID_U = (0.01, 0.95, 10)
_GRID_TAU = (0.005, 5.0, 12)

#: Class means of interneuron output synapses (U, D s, F s), Gupta, Wang and Markram 2000,
#: Science 287:273-278: F1 facilitating, F2 depressing, F3 pseudo-linear.
CLASS_MEANS: dict[str, tuple[float, float, float]] = {
    "facilitating": (0.16, 0.045, 0.376),
    "depressing": (0.25, 0.706, 0.021),
    "pseudo-linear": (0.32, 0.144, 0.062),
}


def _class_ratio(name: str) -> float:
    _, d, f = CLASS_MEANS[name]
    return f / d


# protolang's rule: boundaries halfway, on a log scale, between the F/D ratios of the class
# means (8.4, 0.43 and 0.030), i.e. their geometric means: about 1.90 and 0.113.
FACILITATING_MIN_RATIO = math.sqrt(_class_ratio("facilitating") * _class_ratio("pseudo-linear"))
DEPRESSING_MAX_RATIO = math.sqrt(_class_ratio("pseudo-linear") * _class_ratio("depressing"))

PARAMETERS = ("U", "D", "F", "A")


# --------------------------------------------------------------------------- model

def _times(times) -> np.ndarray:
    t = np.asarray(times, dtype=float)
    if t.ndim != 1 or t.size == 0:
        raise ValueError(f"spike times must be a non-empty 1-D sequence of seconds, got shape {t.shape}")
    if not np.all(np.isfinite(t)):
        raise ValueError("spike times must be finite numbers of seconds (found NaN or infinity)")
    if np.any(np.diff(t) <= 0):
        raise ValueError("spike times must be strictly increasing (one presynaptic spike per entry, in order)")
    return t


def _decay(intervals: np.ndarray, tau: np.ndarray) -> np.ndarray:
    """``exp(-T/tau)`` for every interval (last axis) and parameter set; tau = 0 gives 0."""
    tau = np.asarray(tau, dtype=float)[..., None]
    positive = tau > 0
    with np.errstate(divide="ignore", over="ignore"):
        return np.where(positive, np.exp(-intervals / np.where(positive, tau, 1.0)), 0.0)


def _release(intervals: np.ndarray, U: np.ndarray, D: np.ndarray, F: np.ndarray) -> np.ndarray:
    """Release ``u_n * R_n`` at every spike (A = 1); parameters already broadcast, no checks."""
    n = intervals.size + 1
    rec = _decay(intervals, D)     # (..., n - 1)
    fac = _decay(intervals, F)
    out = np.empty(U.shape + (n,))
    u_fac = np.zeros(U.shape)
    R = np.ones(U.shape)
    for k in range(n):
        if k > 0:
            u_fac = u_fac * fac[..., k - 1]
            R = 1.0 - (1.0 - R) * rec[..., k - 1]
        u = u_fac + U * (1.0 - u_fac)
        out[..., k] = u * R
        u_fac = u
        R = R - u * R
    return out


def tm_amplitudes(times, U, D, F, A=1.0) -> np.ndarray:
    """Expected response of the deterministic Tsodyks-Markram synapse at each presynaptic spike.

    Event form of the engine (module docstring): ``u_fac`` starts at 0 and ``R`` at 1, so the
    first response is ``A * U``. Spikes may have any spacing (a train, a recovery probe,
    an irregular pattern).

    Args:
        times: (n_spikes,) presynaptic spike times (s), strictly increasing.
        U: release fraction of the first spike, in (0, 1].
        D: recovery time constant (s), >= 0 (0: instant recovery).
        F: facilitation time constant (s), >= 0 (0: no facilitation).
        A: absolute efficacy (any unit; the result has the same unit).
        U, D, F and A may be arrays; they are broadcast against each other.

    Returns:
        Array of shape ``broadcast(U, D, F, A).shape + (n_spikes,)``.

    Raises:
        ValueError: on times that are not finite and strictly increasing, or parameters
            out of range.
    """
    t = _times(times)
    U, D, F, A = np.broadcast_arrays(*(np.asarray(p, dtype=float) for p in (U, D, F, A)))
    if not np.all((U > 0) & (U <= 1)):
        raise ValueError(f"U must lie in (0, 1], got {np.unique(U[~((U > 0) & (U <= 1))])[:3]!r}")
    for name, tau in (("D", D), ("F", F)):
        if not np.all(np.isfinite(tau) & (tau >= 0)):
            raise ValueError(f"{name} must be a finite time constant >= 0 s (0 switches it off), "
                             f"got {np.unique(tau[~(np.isfinite(tau) & (tau >= 0))])[:3]!r}")
    if not np.all(np.isfinite(A)):
        raise ValueError("A must be finite")
    return A[..., None] * _release(np.diff(t), U, D, F)


# --------------------------------------------------------------------------- fit

@dataclass(frozen=True)
class TMFit:
    """Result of :func:`fit_tm`; parameters are NaN unless ``converged``.

    Attributes:
        U: release fraction.
        D: recovery time constant (s).
        F: facilitation time constant (s); 0.0 when the fit was depression-only (``fit_F=False``).
        A: absolute efficacy, in the unit of the amplitudes.
        rms: residual RMS of the best attempt (amplitude unit); kept when not converged,
            it shows how far off the best attempt was. NaN when nothing could be fitted.
        relative_rms: ``rms`` over the RMS of the mean responses.
        converged: True when the fit met protolang's acceptance rule (module docstring).
        message: the reason for the outcome, in words.
        n_sweeps: sweeps averaged.
        n_spikes: spikes per sweep (measured or not).
        fit_F: whether F was a free parameter.
        at_bound: names of the parameters the best attempt left on a bound.
    """

    U: float
    D: float
    F: float
    A: float
    rms: float
    relative_rms: float
    converged: bool
    message: str
    n_sweeps: int
    n_spikes: int
    fit_F: bool = True
    at_bound: tuple[str, ...] = ()

    def params(self) -> dict[str, float]:
        """The four parameters as ``{"U": ..., "D": ..., "F": ..., "A": ...}``."""
        return {"U": self.U, "D": self.D, "F": self.F, "A": self.A}


def _amplitude_matrix(times: np.ndarray, amplitudes) -> np.ndarray:
    y = np.asarray(amplitudes, dtype=float)
    if y.ndim == 1:
        y = y[None, :]
    if y.ndim != 2 or y.shape[1] != times.size:
        raise ValueError(f"amplitudes must have shape (n_sweeps, {times.size}) or ({times.size},) to match "
                         f"the {times.size} spike times, got shape {np.shape(amplitudes)}")
    if y.shape[0] == 0:
        raise ValueError("amplitudes hold no sweeps")
    if np.any(np.isinf(y)):
        raise ValueError("amplitudes must be finite (NaN marks a response that was not measured)")
    return y


def _sweep_mean(y: np.ndarray) -> np.ndarray:
    """Mean per spike over the sweeps that measured it; NaN where no sweep did."""
    counts = np.sum(np.isfinite(y), axis=0)
    total = np.nansum(y, axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(counts > 0, total / np.where(counts > 0, counts, 1), np.nan)


def _check_bounds(bounds: Mapping[str, tuple[float, float]] | None) -> dict[str, tuple[float, float]]:
    out = dict(DEFAULT_BOUNDS)
    for name, pair in (bounds or {}).items():
        if name not in DEFAULT_BOUNDS:
            raise ValueError(f"bounds: unknown parameter {name!r}; expected some of U, D, F "
                             f"(A is only required to be positive)")
        lo, hi = (float(v) for v in pair)
        if not (0 < lo < hi and math.isfinite(hi)):
            raise ValueError(f"bounds[{name!r}] must be (low, high) with 0 < low < high, got {pair!r}")
        if name == "U" and hi > 1:
            raise ValueError(f"bounds['U'] must stay inside (0, 1], got {pair!r}")
        out[name] = (lo, hi)
    return out


def _names(fit_F: bool) -> tuple[str, ...]:
    return ("U", "D", "F") if fit_F else ("U", "D")


def _grid(bounds: dict[str, tuple[float, float]], fit_F: bool) -> np.ndarray:
    """Screening grid, (n_points, n_free) in log space."""
    def axis(name, lo, hi, k):
        b_lo, b_hi = bounds[name]
        lo, hi = max(lo, b_lo), min(hi, b_hi)
        if lo >= hi:
            lo, hi = b_lo, b_hi
        # Stay clear of the bounds so no start is already "on" one.
        lo, hi = lo * math.exp(2 * BOUND_MARGIN), hi * math.exp(-2 * BOUND_MARGIN)
        return np.linspace(math.log(lo), math.log(hi), k) if lo < hi else np.array([math.log(math.sqrt(lo * hi))])
    axes = [axis("U", *_GRID_U), axis("D", *_GRID_TAU)]
    if fit_F:
        axes.append(axis("F", *_GRID_TAU))
    mesh = np.meshgrid(*axes, indexing="ij")
    return np.stack([m.ravel() for m in mesh], axis=1)


def _release_one(intervals: list[float], U: float, D: float, F: float) -> list[float]:
    """:func:`_release` for one parameter set with D, F > 0, in plain floats.

    The fit evaluates the model a few thousand times on about ten spikes, where numpy's
    per-call overhead would dominate; the noiseless-recovery tests hold it to the same
    numbers as :func:`tm_amplitudes`.
    """
    out = [U]
    u_fac, R = U, 1.0 - U
    for T in intervals:
        u_fac *= math.exp(-T / F)
        R = 1.0 - (1.0 - R) * math.exp(-T / D)
        u = u_fac + U * (1.0 - u_fac)
        out.append(u * R)
        u_fac = u
        R -= u * R
    return out


class _Problem:
    """Residuals of one mean response vector, normalised to unit RMS, A profiled out."""

    def __init__(self, times: np.ndarray, mean: np.ndarray, fit_F: bool):
        self.intervals = np.diff(times)
        self.interval_list = [float(v) for v in self.intervals]
        self.measured = np.isfinite(mean)
        self.index = np.flatnonzero(self.measured)
        y = mean[self.measured]
        self.scale = float(np.sqrt(np.mean(y * y)))
        self.y = y / self.scale if self.scale > 0 else y
        self.fit_F = fit_F

    def shapes(self, x: np.ndarray) -> np.ndarray:
        """Model release per measured spike for each row of log parameters, vectorised."""
        p = np.exp(np.atleast_2d(x))
        F = p[:, 2] if self.fit_F else np.zeros(p.shape[0])
        return _release(self.intervals, p[:, 0], p[:, 1], F)[:, self.measured]

    def profile(self, m: np.ndarray) -> np.ndarray:
        """Best efficacy (normalised units) for each row of model shapes ``m``."""
        return (m @ self.y) / np.einsum("ij,ij->i", m, m)

    def costs(self, xs: np.ndarray) -> np.ndarray:
        """Sum of squared residuals for each row of log parameters."""
        m = self.shapes(xs)
        r = self.profile(m)[:, None] * m - self.y[None, :]
        return np.einsum("ij,ij->i", r, r)

    def residuals(self, x: np.ndarray) -> np.ndarray:
        """Residuals (model - data, units of the data RMS) at one vector of log parameters."""
        F = math.exp(x[2]) if self.fit_F else 0.0
        if F > 0:
            m = np.array(_release_one(self.interval_list, math.exp(x[0]), math.exp(x[1]), F))[self.index]
        else:
            m = self.shapes(x)[0]
        return float(m @ self.y) / float(m @ m) * m - self.y


def _failed(message: str, n_sweeps: int, n_spikes: int, fit_F: bool, rms=math.nan, relative=math.nan,
            at_bound: tuple[str, ...] = ()) -> TMFit:
    nan = math.nan
    return TMFit(U=nan, D=nan, F=nan, A=nan, rms=rms, relative_rms=relative, converged=False,
                 message=f"not converged: {message}", n_sweeps=n_sweeps, n_spikes=n_spikes, fit_F=fit_F,
                 at_bound=at_bound)


def _describe(name: str, value: float, side: str) -> str:
    shown = f"{value:g}" if name == "U" else f"{value * 1e3:g} ms"
    hint = {
        ("F", "lower"): "facilitation too fast to resolve at these intervals; for a depression-only "
                        "model refit with fit_F=False",
        ("D", "lower"): "recovery too fast to resolve at these intervals",
        ("U", "upper"): "every spike would release all resources",
    }.get((name, side), "widen the bounds or record a train that constrains it")
    return f"{name} ran to its {side} bound {shown} ({hint})"


def _unresolved(problem: _Problem, x: np.ndarray, names: tuple[str, ...]) -> str | None:
    """Say which parameter the responses do not constrain, or None when all are resolved.

    The sensitivity of the fit is the Jacobian of the residuals (in units of the data RMS,
    A re-solved) with respect to log U, log D, log F, RMS over spikes. When its smallest
    singular value is below :data:`MIN_SENSITIVITY`, changing the parameters along that
    direction by a factor e changes the fitted responses by less than 0.1 % of their RMS:
    the value found there is arbitrary (an F of 2 ms and one of 0.2 ms give the same train
    at 20 Hz). The parameter with the largest share of that direction is named.
    """
    n = problem.y.size
    steps = np.diag(np.full(x.size, 1e-6))
    base = problem.residuals(x)
    jac = np.stack([(problem.residuals(x + h) - base) / 1e-6 for h in steps], axis=1) / math.sqrt(n)
    _, sv, vt = np.linalg.svd(jac, full_matrices=False)
    if sv.size == x.size and sv[-1] >= MIN_SENSITIVITY:
        return None
    name = names[int(np.argmax(np.abs(vt[-1])))]
    hint = {"F": "; for a depression-only model refit with fit_F=False"}.get(name, "")
    return (f"{name} is not constrained by these responses (it can change e-fold with the fitted "
            f"responses moving by less than {MIN_SENSITIVITY:.1%} of their RMS){hint}")


def _fit_mean(times: np.ndarray, mean: np.ndarray, n_sweeps: int, fit_F: bool,
              bounds: dict[str, tuple[float, float]], starts: np.ndarray | None,
              max_relative_rms: float, n_grid: int = N_STARTS) -> tuple[TMFit, np.ndarray]:
    """Fit one mean response vector; never raises on data it cannot fit.

    Returns:
        The :class:`TMFit` and the best attempt's (U, D, F, A) whether accepted or not
        (NaN when there was no attempt with a positive A), for the bootstrap.
    """
    n_spikes = times.size
    names = _names(fit_F)
    no_attempt = np.full(4, np.nan)
    measured = np.isfinite(mean)
    if measured.sum() < len(names) + 1:
        return _failed(f"{int(measured.sum())} measured responses cannot fix {', '.join(names)} and A",
                       n_sweeps, n_spikes, fit_F), no_attempt
    problem = _Problem(times, mean, fit_F)
    if not problem.scale > 0:
        return _failed("all mean responses are zero, there is no response to fit",
                       n_sweeps, n_spikes, fit_F), no_attempt
    lower = np.log([bounds[n][0] for n in names])
    upper = np.log([bounds[n][1] for n in names])

    grid = _grid(bounds, fit_F)
    candidates = grid[np.argsort(problem.costs(grid), kind="stable")[:n_grid]]
    if starts is not None:
        candidates = np.concatenate([np.log(starts[:, :len(names)]), candidates])

    best = None
    for x0 in candidates:
        res = least_squares(problem.residuals, x0, bounds=(lower, upper), method="trf",
                            xtol=_TOL, ftol=_TOL, gtol=_TOL, max_nfev=2000)
        if res.status > 0 and np.all(np.isfinite(res.fun)) and (best is None or res.cost < best.cost):
            best = res
    if best is None:
        return _failed("the optimiser stopped without meeting its tolerances from any start",
                       n_sweeps, n_spikes, fit_F), no_attempt

    m = problem.shapes(best.x)
    a_norm = float(problem.profile(m)[0])
    relative = float(np.sqrt(np.mean(best.fun ** 2)))   # residuals are in units of the data RMS
    rms = relative * problem.scale
    if not a_norm > 0:
        return _failed("the best efficacy A is not positive; amplitudes must be positive along the "
                       "connection's sign", n_sweeps, n_spikes, fit_F, rms, relative), no_attempt
    values = np.exp(best.x)
    U, D, F, A = float(values[0]), float(values[1]), float(values[2]) if fit_F else 0.0, a_norm * problem.scale
    attempt = np.array([U, D, F, A])
    on_lower = best.x - lower < BOUND_MARGIN
    on_upper = upper - best.x < BOUND_MARGIN
    at_bound = tuple(n for n, lo, hi in zip(names, on_lower, on_upper) if lo or hi)
    reasons = [_describe(n, values[i], "lower" if on_lower[i] else "upper")
               for i, n in enumerate(names) if on_lower[i] or on_upper[i]]
    if relative > max_relative_rms:
        reasons.append(f"the best Tsodyks-Markram fit leaves a relative RMS of {relative:.3g} > "
                       f"{max_relative_rms:g}; the responses do not follow the model")
    if not reasons:
        weak = _unresolved(problem, best.x, names)
        if weak is not None:
            reasons.append(weak)
    if reasons:
        return _failed("; ".join(reasons), n_sweeps, n_spikes, fit_F, rms, relative, at_bound), attempt
    fit = TMFit(U=U, D=D, F=F, A=A, rms=rms, relative_rms=relative, converged=True,
                message=f"converged: relative RMS {relative:.3g}", n_sweeps=n_sweeps, n_spikes=n_spikes,
                fit_F=fit_F)
    return fit, attempt


def _starts(starts, bounds: dict[str, tuple[float, float]], fit_F: bool) -> np.ndarray | None:
    if starts is None:
        return None
    names = _names(fit_F)
    s = np.atleast_2d(np.asarray(starts, dtype=float))
    if s.ndim != 2 or s.shape[1] not in (2, 3) or s.shape[1] < len(names) or s.shape[0] == 0:
        raise ValueError(f"starts must be a sequence of ({', '.join(names)}) tuples (U, then D and F in s), "
                         f"got shape {np.shape(starts)}")
    for j, name in enumerate(names):
        lo, hi = bounds[name]
        if not np.all((s[:, j] >= lo) & (s[:, j] <= hi)):
            raise ValueError(f"starts: {name} values must lie inside the bounds [{lo:g}, {hi:g}]")
    return s


def _minimum_spikes(times: np.ndarray, fit_F: bool) -> None:
    need = len(_names(fit_F)) + 1
    if times.size < 3:
        raise ValueError(f"a short-term plasticity fit needs at least 3 presynaptic spikes per sweep, "
                         f"got {times.size}; use a train (e.g. 8 spikes at 20 Hz and a recovery probe)")
    if times.size < need:
        raise ValueError(f"fitting {', '.join(_names(fit_F))} and A needs at least {need} spikes per sweep, "
                         f"got {times.size}; record a longer train or fit a depression-only model "
                         f"(fit_F=False)")


def fit_tm(times, amplitudes, *, fit_F: bool = True,
           bounds: Mapping[str, tuple[float, float]] | None = None,
           starts: Sequence[Sequence[float]] | None = None,
           max_relative_rms: float = DEFAULT_MAX_RELATIVE_RMS) -> TMFit:
    """Least-squares fit of Tsodyks-Markram U, D, F and A to the mean response per spike.

    Sweeps are averaged per spike (a NaN response, one that was not measured, is left out
    of its spike's mean; a spike no sweep measured is left out of the fit but still shapes
    the model's history). The unweighted squared difference between the model
    (:func:`tm_amplitudes`) and the mean is minimised; A is solved in closed form for each
    trial (U, D, F). The best of several starts is kept: ``starts`` if given, then the
    4 best points of a coarse grid. The acceptance rule is in the module docstring.

    Args:
        times: (n_spikes,) presynaptic spike times (s), strictly increasing.
        amplitudes: (n_sweeps, n_spikes) or (n_spikes,) response amplitudes, positive
            along the connection's sign (any unit; A comes back in it).
        fit_F: False fits a depression-only model (F fixed at 0).
        bounds: ``{"U": (low, high), "D": ..., "F": ...}`` overriding :data:`DEFAULT_BOUNDS`
            (U in (0, 1], D and F in s). A only has to be positive.
        starts: extra starting points ``(U, D, F)`` (``(U, D)`` when ``fit_F`` is False).
        max_relative_rms: lack-of-fit limit on residual RMS / RMS of the mean responses.

    Returns:
        A :class:`TMFit`; its parameters are NaN and ``converged`` False when the data
        do not support a fit.

    Raises:
        ValueError: fewer than 3 spikes (fewer than 4 when F is fitted), shapes that do
            not match, times not strictly increasing, bad bounds or starts.
    """
    t = _times(times)
    _minimum_spikes(t, fit_F)
    y = _amplitude_matrix(t, amplitudes)
    b = _check_bounds(bounds)
    s = _starts(starts, b, fit_F)
    if not (isinstance(max_relative_rms, (int, float)) and max_relative_rms > 0):
        raise ValueError(f"max_relative_rms must be a positive number, got {max_relative_rms!r}")
    return _fit_mean(t, _sweep_mean(y), y.shape[0], fit_F, b, s, float(max_relative_rms))[0]


# --------------------------------------------------------------------------- bootstrap

@dataclass(frozen=True)
class TMBootstrap:
    """Percentile bootstrap of a Tsodyks-Markram fit over sweeps.

    Attributes:
        fit: the fit of all sweeps.
        intervals: ``{"U": (low, high), "D": ..., "F": ..., "A": ...}`` (SI, amplitude unit
            for A); NaN when the fit of all sweeps did not converge. An end equal to a
            bound means the data do not bound the parameter on that side.
        samples: (n_boot, 4) best U, D, F, A reached on each resample (F is 0 for a
            depression-only fit), NaN rows where no fit with a positive A was found.
        accepted: (n_boot,) whether each resample's fit met the acceptance rule.
        converged_fraction: fraction of resamples whose fit met the acceptance rule.
        confidence: two-sided confidence level of the intervals.
        n_boot: resamples drawn.
        seed: seed of the resampling.
    """

    fit: TMFit
    intervals: dict[str, tuple[float, float]]
    samples: np.ndarray = field(repr=False)
    accepted: np.ndarray = field(repr=False)
    converged_fraction: float
    confidence: float
    n_boot: int
    seed: int


def bootstrap_tm(times, amplitudes, *, n_boot: int = 200, seed: int = 0, confidence: float = 0.95,
                 fit_F: bool = True, bounds: Mapping[str, tuple[float, float]] | None = None,
                 max_relative_rms: float = DEFAULT_MAX_RELATIVE_RMS) -> TMBootstrap:
    """Percentile bootstrap intervals of U, D, F and A by resampling whole sweeps.

    Each resample draws ``n_sweeps`` sweeps with replacement (``numpy.random.default_rng(seed)``),
    averages them per spike and refits as :func:`fit_tm` does, starting from the fit of all
    sweeps (when it converged) and the 2 best grid points. The interval is the
    ``(1 - confidence)/2`` and ``(1 + confidence)/2`` percentiles of the resamples' best
    fits (the percentile bootstrap: Efron and Tibshirani 1993, An Introduction to the
    Bootstrap, chapter 13).

    protolang's rules: a resample whose best fit ends on a bound, leaves a parameter
    unresolved or fits poorly still counts, at the values it reached, because dropping it
    would cut off exactly the side the data do not bound (in protolang's checks, intervals
    from the accepted resamples alone missed the true F of depressing synapses far more
    often than 5 % of the time); ``converged_fraction`` says how many were accepted. The
    intervals are NaN when the fit of all sweeps did not converge: there is then no
    estimate for them to qualify.

    Args:
        times: (n_spikes,) presynaptic spike times (s).
        amplitudes: (n_sweeps, n_spikes) response amplitudes, at least 2 sweeps.
        n_boot: number of resamples (>= 1).
        seed: seed of the resampling.
        confidence: two-sided level in (0, 1).
        fit_F, bounds, max_relative_rms: as in :func:`fit_tm`.

    Returns:
        A :class:`TMBootstrap`.

    Raises:
        ValueError: as :func:`fit_tm`; fewer than 2 sweeps; bad ``n_boot`` or ``confidence``.
    """
    t = _times(times)
    _minimum_spikes(t, fit_F)
    y = _amplitude_matrix(t, amplitudes)
    if y.shape[0] < 2 or np.ndim(amplitudes) != 2:
        raise ValueError(f"a bootstrap over sweeps needs amplitudes of shape (n_sweeps, n_spikes) with at least "
                         f"2 sweeps, got shape {np.shape(amplitudes)}")
    if not (isinstance(n_boot, (int, np.integer)) and n_boot >= 1):
        raise ValueError(f"n_boot must be a whole number >= 1, got {n_boot!r}")
    if not (isinstance(confidence, (int, float)) and 0 < confidence < 1):
        raise ValueError(f"confidence must be a number strictly between 0 and 1 (e.g. 0.95), got {confidence!r}")
    b = _check_bounds(bounds)
    full = fit_tm(t, y, fit_F=fit_F, bounds=b, max_relative_rms=max_relative_rms)
    starts = np.array([[full.U, full.D, full.F]]) if full.converged else None

    rng = np.random.default_rng(seed)
    n_sweeps = y.shape[0]
    samples = np.full((n_boot, 4), np.nan)
    accepted = np.zeros(n_boot, dtype=bool)
    for i in range(n_boot):
        pick = rng.integers(0, n_sweeps, size=n_sweeps)
        fit, attempt = _fit_mean(t, _sweep_mean(y[pick]), n_sweeps, fit_F, b, starts, float(max_relative_rms),
                                 n_grid=BOOT_STARTS)
        samples[i] = attempt
        accepted[i] = fit.converged
    alpha = 0.5 * (1.0 - float(confidence))
    attempted = np.all(np.isfinite(samples), axis=1)
    intervals = {}
    for j, name in enumerate(PARAMETERS):
        if full.converged and attempted.any():
            lo, hi = np.percentile(samples[attempted, j], [100 * alpha, 100 * (1 - alpha)])
            intervals[name] = (float(lo), float(hi))
        else:
            intervals[name] = (math.nan, math.nan)
    return TMBootstrap(fit=full, intervals=intervals, samples=samples, accepted=accepted,
                       converged_fraction=float(accepted.mean()),
                       confidence=float(confidence), n_boot=int(n_boot), seed=int(seed))


# --------------------------------------------------------------------------- class and table row

def classify_tm(U: float, D: float, F: float) -> str:
    """Synapse class of Gupta, Wang and Markram 2000 (Science 287:273-278) from fitted U, D, F.

    The paper's three classes of interneuron output synapses: F1 "facilitating" (F
    dominates D), F2 "depressing" (D dominates F), F3 "pseudo-linear" (both comparable).
    The boundary is protolang's rule, not the paper's: the ratio F/D against two
    thresholds halfway, on a log scale, between the ratios of the class means (F1 0.16,
    45 ms, 376 ms: F/D 8.4; F3 0.32, 144 ms, 62 ms: 0.43; F2 0.25, 706 ms, 21 ms: 0.030):

    * F/D >= :data:`FACILITATING_MIN_RATIO` (about 1.90): "facilitating";
    * F/D <= :data:`DEPRESSING_MAX_RATIO` (about 0.113): "depressing";
    * otherwise "pseudo-linear".

    U does not enter: the class means differ far less in U than in F/D. A depression-only
    fit (F = 0) is "depressing".

    Args:
        U: release fraction (checked for range only).
        D: recovery time constant (s), > 0.
        F: facilitation time constant (s), >= 0.

    Returns:
        "facilitating", "depressing" or "pseudo-linear"; "unclassified" when any
        parameter is NaN (a fit that did not converge).

    Raises:
        ValueError: U outside (0, 1], D <= 0 or F < 0.
    """
    U, D, F = float(U), float(D), float(F)
    if math.isnan(U) or math.isnan(D) or math.isnan(F):
        return "unclassified"
    if not 0 < U <= 1:
        raise ValueError(f"U must lie in (0, 1], got {U!r}")
    if not (D > 0 and math.isfinite(D)):
        raise ValueError(f"D must be a positive time constant (s), got {D!r}")
    if not (F >= 0 and math.isfinite(F)):
        raise ValueError(f"F must be a time constant >= 0 s, got {F!r}")
    ratio = F / D
    if ratio >= FACILITATING_MIN_RATIO:
        return "facilitating"
    if ratio <= DEPRESSING_MAX_RATIO:
        return "depressing"
    return "pseudo-linear"


def _same_fit(a: TMFit, b: TMFit) -> bool:
    """Field-by-field equality in which NaN equals NaN (a rejected fit equals its own copy)."""
    def same(x, y):
        return x == y or (isinstance(x, float) and isinstance(y, float) and math.isnan(x) and math.isnan(y))
    return a is b or all(same(getattr(a, f), getattr(b, f)) for f in a.__dataclass_fields__)


def summary_columns(label: str = "mV") -> list[str]:
    """Columns of :func:`summarise_fit`'s row for amplitudes shown in ``label`` ("mV" or "pA")."""
    cols = []
    for name, unit in (("U", ""), ("D", "_ms"), ("F", "_ms"), ("A", f"_{label}")):
        cols += [f"tm_{name}{unit}", f"tm_{name}_low{unit}", f"tm_{name}_high{unit}"]
    return cols + ["tm_converged", "tm_relative_rms", "tm_boot_converged_fraction", "tm_confidence",
                   "n_sweeps", "n_spikes", "tm_class", "tm_message"]


def summarise_fit(fit: TMFit, boot: TMBootstrap | None = None, *, label: str = "mV",
                  scale: float = 1e3) -> dict:
    """One table row of a short-term plasticity fit, in table units.

    Columns (:func:`summary_columns`): ``tm_U``, ``tm_D_ms``, ``tm_F_ms``, ``tm_A_<label>``,
    each with ``_low`` / ``_high`` bootstrap bounds (NaN without a bootstrap), then
    ``tm_converged``, ``tm_relative_rms``, ``tm_boot_converged_fraction``, ``tm_confidence``,
    ``n_sweeps``, ``n_spikes``, ``tm_class`` (:func:`classify_tm`) and ``tm_message``.

    Args:
        fit: the fit of all sweeps.
        boot: its bootstrap, or None.
        label: unit of A in the column name; pass
            ``protolang.measure.collect.TRACE_UNITS[si].label`` for recorded traces.
        scale: factor from the amplitudes' unit to ``label`` (1e3 for V -> mV, 1e12 for A -> pA).

    Returns:
        A dict with the columns in order.

    Raises:
        ValueError: when ``boot`` belongs to a different fit.
    """
    if boot is not None and not _same_fit(boot.fit, fit):
        raise ValueError("summarise_fit: the bootstrap was computed for a different fit")
    nan = math.nan
    factors = {"U": 1.0, "D": 1e3, "F": 1e3, "A": float(scale)}
    units = {"U": "", "D": "_ms", "F": "_ms", "A": f"_{label}"}
    row: dict = {}
    for name in PARAMETERS:
        value = getattr(fit, name)
        lo, hi = boot.intervals[name] if boot is not None else (nan, nan)
        k, u = factors[name], units[name]
        row[f"tm_{name}{u}"] = value * k
        row[f"tm_{name}_low{u}"] = lo * k
        row[f"tm_{name}_high{u}"] = hi * k
    row.update({
        "tm_converged": bool(fit.converged),
        "tm_relative_rms": fit.relative_rms,
        "tm_boot_converged_fraction": boot.converged_fraction if boot is not None else nan,
        "tm_confidence": boot.confidence if boot is not None else nan,
        "n_sweeps": fit.n_sweeps,
        "n_spikes": fit.n_spikes,
        "tm_class": classify_tm(fit.U, fit.D, fit.F),
        "tm_message": fit.message,
    })
    return row
