"""Embedded networks in Brian2: takes a Plan's NetworkPlan and the built role groups, adds the population.

The population is one NeuronGroup (adaptive exponential cells, per-cell parameters) holding
every simulated cell that is not a selected role, in every repeat's copy of the region. Its
connections, and those between it and the role groups, become one Synapses object per edge set
(endpoint pair and receptor set) with the release model of the role-to-role synapses. The
background drive is per-cell Ornstein-Uhlenbeck input (updated with the conductances) and
Poisson input through ``PoissonInput`` with a per-cell jump (zero for cells a line does not
reach). A silenced cell keeps its membrane and inputs but loses its spike current and cannot
cross threshold.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from . import models
from ..language.errors import Collector
from ..plan.model import EdgeSet, NetworkPlan, Plan

POPULATION_NAME = "network"
_BACKGROUND_STREAM = 0xB6


@dataclass
class PopulationHandles:
    """What the run needs to read the population back."""

    group: Any
    spikes: Any
    n_synapses: dict[str, int]


def _receptors_on_population(plan: Plan) -> list[str]:
    net = plan.network
    needed: set[str] = set()
    for e in net.edges:
        if e.post == POPULATION_NAME:
            needed.update(e.weights)
    needed.update(bg.receptor for bg in net.background if bg.kind == "poisson")
    return [r for r in plan.receptors if r in needed]


def _class_mask(net: NetworkPlan, classes: list[str], class_index: np.ndarray) -> np.ndarray:
    wanted = [net.population.class_names.index(c) for c in classes if c in net.population.class_names]
    return np.isin(class_index, wanted)


def build_population(b2: Any, plan: Plan, suffix_of: dict[str, str], dt: float,
                     guests: list[tuple[dict[str, np.ndarray], str, bool, list[str]]] = ()) -> tuple[Any, list[Any]]:
    """The population NeuronGroup and its Poisson background inputs.

    Args:
        guests: selected cells that live in the population's group after its own cells, as
            (per-cell starting values and parameters of the role, its class, silenced, the
            receptors its own synapses use), one entry per role, in block order.

    Returns:
        (group, extra objects to add to the network).
    """
    net = plan.network
    pop = net.population
    extra_receptors = {r for _, _, _, recs in guests for r in recs}
    rnames = [r for r in plan.receptors if r in set(_receptors_on_population(plan)) | extra_receptors]
    class_index = np.concatenate([pop.class_index] + [np.full(values["v"].size, pop.class_names.index(cls))
                                                      for values, cls, _, _ in guests])
    silenced = np.concatenate([pop.silenced] + [np.full(values["v"].size, gone) for values, _, gone, _ in guests])
    n = class_index.size
    terms = [models.ReceptorTerm(suffix_of[r], plan.receptors[r].mg_block) for r in rnames]
    noise_lines = [bg for bg in net.background if bg.kind == "noise"]
    bg_terms = tuple(models.NoiseTerm(k, bg.reversal is not None) for k, bg in enumerate(noise_lines))
    inputs = models.CellInputs(background=bg_terms)
    gated = bool(silenced.any())
    eqs = models.adex_equations(terms, inputs, [], gated=gated)
    poisson_lines = [bg for bg in net.background if bg.kind == "poisson"]
    # per-cell jump of each Poisson background line (zero for cells it does not reach)
    eqs += "".join(f"\nbg_jump_{k} : siemens/second (constant)" for k in range(len(poisson_lines)))
    namespace: dict[str, Any] = {}
    for term, rname in zip(terms, rnames):
        rec = plan.receptors[rname]
        pgg, pgx, pxx = models.propagator(rec.rise, rec.decay, dt)
        namespace.update({f"E_{term.suffix}": rec.reversal * b2.volt, f"scale_{term.suffix}": float(rec.scale),
                          f"P_gg_{term.suffix}": pgg, f"P_gx_{term.suffix}": pgx * b2.second,
                          f"P_xx_{term.suffix}": pxx})
    for term, bg in zip(bg_terms, noise_lines):
        namespace[f"bg_decay_{term.index}"] = math.exp(-dt / bg.tau)
        if bg.reversal is not None:
            namespace[f"bg_E_{term.index}"] = bg.reversal * b2.volt
    threshold = models.ADEX_GATED_THRESHOLD if gated else "v > Vcut"
    group = b2.NeuronGroup(n, eqs, threshold=threshold, reset="v = Vr\nw += b", refractory="t_ref",
                           method="euler", namespace=namespace, name=f"cells_{POPULATION_NAME}")
    params = pop.params
    # the population starts at rest (no holding current), adaptation at its steady state; a
    # guest role brings its own values (at rest under its holding current)
    v0, _ = models.adex_rest(params, np.zeros(pop.size))
    own = {key: np.asarray(params[key], dtype=float) for key in models.ADEX_PARAMS}
    own.update(v=v0, w=params["a"] * (v0 - params["EL"]), I_hold=np.zeros(pop.size))
    for key, values in own.items():
        setattr(group, key + "_", np.concatenate([values] + [np.asarray(g[0][key], dtype=float) for g in guests]))
    if gated:
        group.spike_gate_ = np.where(silenced, 0.0, 1.0)
    rng = np.random.default_rng([int(plan.seed), _BACKGROUND_STREAM])
    for term, bg in zip(bg_terms, noise_lines):
        on = _class_mask(net, bg.classes, class_index)
        kick = bg.sd * math.sqrt(-math.expm1(-2.0 * dt / bg.tau))
        setattr(group, f"bg_mean_{term.index}_", np.where(on, bg.mean, 0.0))
        setattr(group, f"bg_kick_{term.index}_", np.where(on, kick, 0.0))
        # start each process in its stationary distribution
        setattr(group, f"bg_{term.index}_", np.where(on, bg.mean + bg.sd * rng.standard_normal(n), 0.0))
    if any(t.mg_block for t in terms):
        group.Mg_ = float(plan.conditions["magnesium"])
    update = []
    extras = models.load_conductances(inputs)
    if terms or extras:
        update.append(models.conductance_update(terms, extras))
    if bg_terms:
        update.append(models.background_update(bg_terms))
    if update:
        group.run_regularly("\n".join(update), when="start", name=f"cells_{POPULATION_NAME}_conductance")
    objects: list[Any] = []
    for k, bg in enumerate(poisson_lines):
        rec = plan.receptors[bg.receptor]
        jump = bg.conductance * models.peak_factor(rec.rise, rec.decay)
        var = f"bg_jump_{k}"
        setattr(group, var + "_", np.where(_class_mask(net, bg.classes, class_index), jump, 0.0))
        objects.append(b2.PoissonInput(group, f"x_{suffix_of[bg.receptor]}", N=1, rate=bg.rate * b2.Hz,
                                       weight=var))
    return group, objects


def edge_values(edge: EdgeSet) -> dict[str, np.ndarray]:
    """An edge set's connection parameters in the form the release-synapse builder reads."""
    return {"n_sites": edge.n_sites, "site_conductance": edge.site_conductance, "U": edge.U,
            "D": edge.D, "F": edge.F, "delay": edge.delay}


def check_population(plan: Plan, group: Any, fail: Collector) -> None:
    """After the run: forward Euler must have followed the population's conductances."""
    if "euler_load" not in group.variables:
        return
    load = np.asarray(group.euler_load_)
    if load.size and float(load.max()) >= 1.0:
        k = int(np.argmax(load))
        pop = plan.network.population
        fail.fail(f"numerical blow-up in the embedded network: cell {int(pop.cell_ids[k])} "
                  f"({pop.class_names[int(pop.class_index[k])]}, repeat {int(pop.repeat[k]) + 1}) had a total "
                  f"conductance the time step cannot follow (dt*g/C = {float(load.max()):.2f})",
                  None, expected="conductances the time step can follow",
                  hint="lower the background conductance or the time step")
