"""Rheobase collector: a run's Plan and an engine runner in, one rheobase row per measured cell out.

The ``rheobase`` collector cannot read the recordings of the protocol's own sweeps: it asks
questions of its own ("does this cell fire at 237.5 pA?") and answers them by simulation.
Every round of the search is one derived Plan run by the engine:

* only the cells with a ``rheobase`` measure, with no synapses, no activation and no other
  stimulus (rheobase is an intrinsic property; a lab blocks synaptic input for it), each
  keeping its holding current, so the rheobase is measured from the potential the protocol
  holds the cell at;
* one unit square step from :data:`STEP_ONSET` (100 ms) lasting ``width``, scaled per cell
  and sweep by ``RolePlan.amplitude_scale`` (n_repeat, n_currents) to the round's currents;
* the ``replicas`` layout with one sweep per current, so every test step starts from rest
  and one round of all cells is one network and one run;
* sweeps of ``100 ms + width + 50 ms``; only spikes are recorded.

A test step *fires* when the cell spikes at least once in ``[onset, onset + width)``. The
search is :func:`protolang.measure.cell.rheobase_search` (vectorised multi-section over
per-cell brackets). ``rounds`` (default 3) sets the number of rounds after the bracket
check; each round tests ``k - 1`` currents per cell with the smallest ``k`` such that
``k ** rounds`` shrinks the widest bracket to the tolerance, so the user trades the number
of sequential runs against the size of each batch.

Brian2 is never imported here: the caller passes the engine's ``run_plan``.
"""

from __future__ import annotations

import dataclasses
import math
from typing import TYPE_CHECKING, Callable

import numpy as np
import pandas as pd

from ..language.errors import Collector, Span
from . import cell as cf
from .registry import option_defaults

if TYPE_CHECKING:   # the engine package may import Brian2; the collectors must not
    from ..engine.recordings import Recordings
    from ..plan.model import MeasurePlan, Plan

STEP_ONSET = 0.100      # s, start of the test step in every test sweep
STEP_TAIL = 0.050       # s, simulated after the step ends
MAX_EXTRA_ROUNDS = 2    # rounds allowed beyond ``rounds`` before a search is stopped (float safety)
PA = 1e12               # A -> pA

Runner = Callable[..., "Recordings"]


@dataclasses.dataclass(frozen=True)
class RheobaseRequest:
    """The rheobase measures that share one search (same width, tolerance and rounds).

    Attributes:
        roles: role names, in plan order.
        low, high: (n_roles * n_repeat,) bracket ends (A), role after role.
        tolerance: final bracket width (A).
        width: test step duration (s).
        rounds: search rounds after the bracket check.
    """

    roles: tuple[str, ...]
    low: np.ndarray
    high: np.ndarray
    tolerance: float
    width: float
    rounds: int

    @property
    def parallel(self) -> int:
        """Currents tested per cell per round: ``k - 1`` for the smallest ``k`` with ``k ** rounds >= span / tolerance``."""
        ratio = float(np.max(self.high - self.low)) / self.tolerance
        if ratio <= 1.0:
            return 1
        k = max(2, math.ceil(ratio ** (1.0 / self.rounds) - 1e-9))
        # a bracket exactly k**rounds tolerances wide must not miss by a rounding error
        while k ** self.rounds < ratio * (1.0 + 1e-9):
            k += 1
        return k - 1


def _span(measure: "MeasurePlan") -> Span | None:
    parts = str(measure.span).rsplit(":", 2)
    if len(parts) == 3 and parts[1].isdigit() and parts[2].isdigit():
        return Span(parts[0], int(parts[1]), int(parts[2]))
    return None


def _measures(plan: "Plan") -> list["MeasurePlan"]:
    return [m for m in plan.measures if m.collector == "rheobase"]


def _options(measure: "MeasurePlan") -> dict[str, float]:
    opts = option_defaults("rheobase")
    unknown = set(measure.options) - set(opts)
    if unknown:
        raise AssertionError(f"internal error: collector 'rheobase' got unknown options {sorted(unknown)}")
    opts.update({k: float(v) for k, v in measure.options.items()})
    return opts


def check_rheobase(plan: "Plan") -> None:
    """Refuse rheobase measures the search cannot run, before anything is simulated.

    Args:
        plan: a resolved plan.

    Raises:
        ProtocolError: a rheobase measure on a voltage-clamped cell or a spike source, two
            rheobase lines on one cell, ``low`` not below ``high``, a ``rounds`` that is not
            a whole number, or a step too short to fit one sample.
    """
    out = Collector()
    seen: set[str] = set()
    for m in _measures(plan):
        span = _span(m)
        opts = _options(m)
        try:
            role = plan.role(m.cell)
        except KeyError:
            raise AssertionError(f"internal error: rheobase measure names role {m.cell!r}, which the plan lacks") \
                from None
        if m.cell in seen:
            out.fail(f"cell {m.cell!r} has two `rheobase` lines", span, hint="keep one `rheobase` line per cell")
        seen.add(m.cell)
        if role.mode == "voltage clamp":
            out.fail(f"`rheobase` injects current steps; {m.cell!r} is in voltage clamp", span,
                     expected="a cell in current clamp",
                     hint=f"use `record {m.cell}: current clamp` (a holding potential is kept by a bias current)")
        if role.spike_times is not None:
            out.fail(f"`rheobase` needs a cell with a membrane; {m.cell!r} fires at given times", span)
        if not opts["low"] < opts["high"]:
            out.fail(f"`rheobase` bracket is empty: low {opts['low'] * PA:g} pA is not below high "
                     f"{opts['high'] * PA:g} pA", span, expected="low < high",
                     hint="e.g. `rheobase, low 0 pA, high 800 pA`")
        rounds = opts["rounds"]
        if not (rounds >= 1 and float(rounds).is_integer()):
            out.fail(f"`rheobase` option rounds must be a whole number of rounds, got {rounds:g}", span,
                     expected="a whole number, 1 or more", hint="e.g. `rounds 3`")
        if not opts["tolerance"] > 0:
            out.fail("`rheobase` option tolerance must be a current above 0", span, expected="e.g. `tolerance 5 pA`")
        if not opts["width"] >= 2 * plan.dt:
            out.fail(f"`rheobase` test step of {opts['width'] * 1e3:g} ms is shorter than two time steps", span,
                     expected=f"a width of at least {2 * plan.dt * 1e3:g} ms", hint="e.g. `width 500 ms`")
    out.raise_if_any()


def requests(plan: "Plan") -> list[RheobaseRequest]:
    """Group the plan's rheobase measures into searches that can share their runs.

    Cells whose measures agree on width, tolerance and rounds are searched together (one
    batch per round for all of them); each keeps its own bracket.

    Args:
        plan: a resolved plan that passed :func:`check_rheobase`.

    Returns:
        One :class:`RheobaseRequest` per distinct (width, tolerance, rounds), in plan order.
    """
    groups: dict[tuple[float, float, int], list[tuple[str, dict]]] = {}
    for m in _measures(plan):
        opts = _options(m)
        key = (opts["width"], opts["tolerance"], int(opts["rounds"]))
        groups.setdefault(key, []).append((m.cell, opts))
    out = []
    n = plan.n_repeat
    for (width, tolerance, rounds), members in groups.items():
        out.append(RheobaseRequest(
            roles=tuple(name for name, _ in members),
            low=np.concatenate([np.full(n, o["low"]) for _, o in members]),
            high=np.concatenate([np.full(n, o["high"]) for _, o in members]),
            tolerance=tolerance, width=width, rounds=rounds))
    return out


def search_plan(plan: "Plan", currents: dict[str, np.ndarray], width: float) -> "Plan":
    """The derived Plan of one search round: unit test steps scaled to ``currents``.

    Args:
        plan: the run's plan (cells, parameters, holding currents, time step, seed).
        currents: role -> (n_repeat, n_currents) step currents (A); every role the same
            ``n_currents``.
        width: test step duration (s).

    Returns:
        A new Plan with only these roles, no synapses, activations or measures, one sweep
        per current in the replicas layout, sweeps of ``STEP_ONSET + width + STEP_TAIL``.

    Raises:
        AssertionError: the current arrays disagree in shape or name unknown roles.
    """
    from ..plan.model import WaveSegment

    shapes = {np.shape(c) for c in currents.values()}
    if len(shapes) != 1 or len(next(iter(shapes))) != 2 or next(iter(shapes))[0] != plan.n_repeat:
        raise AssertionError(f"internal error: rheobase currents must all be (n_repeat, n_currents), got {shapes}")
    n_currents = next(iter(shapes))[1]
    length = STEP_ONSET + width + STEP_TAIL
    roles = []
    for role in plan.roles:
        if role.name not in currents:
            continue
        step = WaveSegment("square", STEP_ONSET, STEP_ONSET + width, amplitude=1.0)
        roles.append(dataclasses.replace(
            role, recorded=False, noise_sd=0.0, pulses=[], events=[], segments=[step], noise=[], poisson=[],
            amplitude_scale=np.array(currents[role.name], dtype=float)))
    missing = set(currents) - {r.name for r in roles}
    if missing:
        raise AssertionError(f"internal error: rheobase currents for roles the plan lacks: {sorted(missing)}")
    return dataclasses.replace(
        plan, title=f"{plan.title} (rheobase search)", sweep_length=length, n_sweeps=int(n_currents),
        interval=length, layout="replicas",
        layout_reason="rheobase search: every test step starts from rest, one sweep per tested current",
        roles=roles, synapses=[], activations=[], measures=[], notes=[])


def fired(recordings: "Recordings", roles: tuple[str, ...], n_repeat: int, n_currents: int,
          width: float) -> np.ndarray:
    """Whether each cell spiked during each test step.

    Args:
        recordings: the recordings of a :func:`search_plan` run.
        roles: the searched roles, in the order of the rows.
        n_repeat, n_currents: repeats per role and currents per cell.
        width: test step duration (s).

    Returns:
        (len(roles) * n_repeat, n_currents) bool: a spike in ``[STEP_ONSET, STEP_ONSET + width)``.
    """
    out = np.zeros((len(roles) * n_repeat, n_currents), dtype=bool)
    # a spike time rounded to the time grid may sit a hair off the step edges
    lo, hi = STEP_ONSET - 1e-9, STEP_ONSET + width - 1e-9
    for k, name in enumerate(roles):
        spikes = recordings.spikes[name]
        for r in range(n_repeat):
            for s in range(n_currents):
                t = np.asarray(spikes[r][s], dtype=float)
                out[k * n_repeat + r, s] = bool(np.any((t >= lo) & (t < hi)))
    return out


def measure_rheobase(plan: "Plan", run: Runner, *, target: str = "numpy",
                     progress: Callable[[str], None] | None = None) -> pd.DataFrame:
    """Search the rheobase of every cell with a ``rheobase`` measure.

    Args:
        plan: the run's resolved plan.
        run: the engine's runner, called as ``run(plan, target=target)`` and returning
            Recordings (:func:`protolang.engine.run_plan`).
        target: Brian2 code-generation target passed to ``run``.
        progress: optional callable receiving one line per round.

    Returns:
        One row per role and repeat: ``role``, ``repeat``, ``rheobase_pA`` (the smallest
        current seen to fire; NaN when refused), ``rheobase_rounds`` (simulated batches of
        its search, the bracket check included), ``rheobase_note`` ('' or why not / a
        warning), ``rheobase_low_pA`` and ``rheobase_high_pA`` (the final bracket).

    Raises:
        ProtocolError: see :func:`check_rheobase`, and failures of the engine.
    """
    say = progress or (lambda _msg: None)
    check_rheobase(plan)
    n = plan.n_repeat
    rows = []
    for req in requests(plan):
        parallel = req.parallel
        state = {"round": 0}

        def fire(currents: np.ndarray, req=req, state=state) -> np.ndarray:
            state["round"] += 1
            m = currents.shape[1]
            say(f"rheobase round {state['round']}: {len(req.roles) * n} cells x {m} currents "
                f"({', '.join(req.roles)})")
            per_role = {name: currents[k * n:(k + 1) * n] for k, name in enumerate(req.roles)}
            recordings = run(search_plan(plan, per_role, req.width), target=target)
            return fired(recordings, req.roles, n, m, req.width)

        res = cf.rheobase_search(fire, req.low, req.high, tolerance=req.tolerance, parallel=parallel,
                                 max_rounds=1 + req.rounds + MAX_EXTRA_ROUNDS)
        for k, name in enumerate(req.roles):
            for r in range(n):
                c = k * n + r
                rows.append({"role": name, "repeat": r, "rheobase_pA": float(res.rheobase[c]) * PA,
                             "rheobase_rounds": int(res.rounds), "rheobase_note": res.reasons[c],
                             "rheobase_low_pA": float(res.low[c]) * PA,
                             "rheobase_high_pA": float(res.high[c]) * PA})
    return pd.DataFrame(rows, columns=["role", "repeat", "rheobase_pA", "rheobase_rounds", "rheobase_note",
                                       "rheobase_low_pA", "rheobase_high_pA"])


__all__ = ["RheobaseRequest", "STEP_ONSET", "STEP_TAIL", "check_rheobase", "fired", "measure_rheobase",
           "requests", "search_plan"]
