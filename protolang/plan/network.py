"""Embedded mode: the `network:` block + selection + lesions -> a NetworkPlan (population, connections, drive).

Each repeat gets its own copy of the region around its selected cells, so repeats stay
independent experiments. The population holds every region cell that is not selected and not
removed; the selected cells keep their roles (clamps, stimuli, recordings) and are wired to the
population through the circuit's own connections. Connection parameters are the instance's,
with release probability scaled by the calcium law and conductances by any pathway lesion.
The memory the build would need is estimated here, before anything is built, and a network
that would not fit is refused. No Brian2 here.
"""

from __future__ import annotations


import numpy as np

from ..language import ast
from ..language.errors import error
from ..language.format import place_text
from .model import BackgroundPlan, EdgeSet, NetworkPlan, NoiseSpec, PoissonSpec, PopulationPlan

# Bytes per simulated object: one release site (a Brian2 synapse with its Tsodyks-Markram
# state, indices and queue share), one cell (state, parameters, conductances), plus the
# interpreter and Brian2 themselves. bench/embedded_network.py measured 166-173 B per site and
# a 264-267 MB base (cython target, peak RSS over three network sizes, least squares); these
# are those figures with about 15 % margin; the per-cell share was too small to resolve and is
# counted from the per-cell arrays (about 0.5 kB) with margin.
BYTES_PER_SITE = 200.0
BYTES_PER_CELL = 1000.0
BYTES_BASE = 300e6
# Spikes kept by the monitor: at most this rate over the whole run (16 bytes per spike).
MONITOR_RATE_BOUND = 50.0
DEFAULT_MEMORY_FRACTION = 0.8


def available_memory() -> float:
    """Bytes of memory available to a new network (MemAvailable of /proc/meminfo; 4 GB if unknown)."""
    try:
        with open("/proc/meminfo", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return float(line.split()[1]) * 1024.0
    except OSError:
        pass
    return 4e9


def memory_estimate(n_cells: int, n_sites: int, duration: float) -> float:
    """Estimated peak memory (bytes) of an embedded network of ``n_cells`` cells and ``n_sites``
    simulated release sites (synapse objects) run for ``duration`` seconds."""
    return BYTES_BASE + n_cells * BYTES_PER_CELL + n_sites * BYTES_PER_SITE \
        + n_cells * MONITOR_RATE_BOUND * duration * 16.0


def _describe(net: ast.Network) -> str:
    parts = []
    for region in net.regions:
        parts.append("all" if region.everything else " ".join(place_text(p) for p in region.places))
    return "; ".join(parts)


def _region_mask(net: ast.Network, instance, selection, repeat: int) -> np.ndarray:
    mask = np.ones(instance.n_cells, dtype=bool)
    layers = np.array([instance.circuit.classes[c].layer for c in instance.class_names])[instance.class_index]
    for region in net.regions:
        for place in region.places:
            if isinstance(place, ast.InLayer):
                mask &= layers == place.layer
            else:
                centre = int(selection.ids[place.of][repeat])
                mask &= instance.distance(np.full(instance.n_cells, centre),
                                          np.arange(instance.n_cells)) <= place.distance.si
    return mask


def resolve_network(protocol: ast.Protocol, instance, selection, lesions, cond: dict, *,
                    stochastic: bool, duration: float, memory_limit: float | None,
                    memory_span=None) -> NetworkPlan:
    """Build the NetworkPlan of an embedded protocol.

    Args:
        protocol: the protocol (with a ``network`` block).
        instance: the instantiated circuit.
        selection: the selected cells (``names``, ``ids``).
        lesions: the :class:`~protolang.plan.lesions.LesionState`.
        cond: the bath conditions (``release_factor``, ``blocks``).
        stochastic: release per site (else deterministic).
        duration: simulated time (s), for the spike-monitor share of the memory estimate.
        memory_limit: bytes; None uses 80 % of the memory available now.
        memory_span: where the protocol set the limit (for the error).

    Returns:
        The :class:`NetworkPlan`.

    Raises:
        ProtocolError: a region with no cells besides the selected ones, or a network too large
            for the memory limit (with the estimate and the limit).
    """
    net = protocol.network
    n_repeat = protocol.cells.repeat
    circuit = instance.circuit
    roles = list(selection.names)
    role_ids = np.stack([selection.ids[name] for name in roles], axis=1)     # (n_repeat, n_roles)

    members: list[np.ndarray] = []
    for r in range(n_repeat):
        mask = _region_mask(net, instance, selection, r) & ~lesions.gone(r)
        mask[role_ids[r]] = False
        if not mask.any():
            raise error(f"the network region holds no cell besides the selected ones (repeat {r + 1})",
                        net.regions[0].span if net.regions else net.span,
                        expected="a region that contains circuit cells around the recorded ones",
                        hint="widen the region (a larger distance, another layer, or `region all`)")
        members.append(np.flatnonzero(mask))
    rep = np.concatenate([np.full(m.size, r) for r, m in enumerate(members)])
    ids = np.concatenate(members)
    order = np.lexsort((ids, rep, instance.class_index[ids]))
    rep, ids = rep[order], ids[order]
    pop_index = np.full((n_repeat, instance.n_cells), -1, dtype=np.int64)
    pop_index[rep, ids] = np.arange(ids.size)
    params = instance.params_of(ids)
    silenced = np.isin(instance.class_index[ids],
                       [instance.class_names.index(c) for c in lesions.silenced])
    population = PopulationPlan(model="adex", class_names=list(instance.class_names),
                                class_index=instance.class_index[ids].copy(), repeat=rep, cell_ids=ids,
                                positions=instance.positions[ids], params=params, silenced=silenced)

    # circuit connections inside each repeat's subcircuit (selected cell to selected cell excepted:
    # those are the protocol's own synapses)
    pathways = list(circuit.pathways)
    cut = np.array([name in lesions.cut for name in pathways])
    factor = np.array([lesions.conductance_factor(name) for name in pathways])
    receptor_sets = ["+".join(r for r, w in circuit.pathways[name].receptors.items() if w > 0) for name in pathways]
    parts: dict[tuple[str, str, str], list] = {}
    for r in range(n_repeat):
        inside = pop_index[r] >= 0
        role_of = np.full(instance.n_cells, -1, dtype=np.int64)
        role_of[role_ids[r]] = np.arange(len(roles))
        node = inside | (role_of >= 0)
        keep = node[instance.pre] & node[instance.post] & ~cut[instance.pathway_index]
        keep &= ~((role_of[instance.pre] >= 0) & (role_of[instance.post] >= 0))
        where = np.flatnonzero(keep)
        pre_role, post_role = role_of[instance.pre[where]], role_of[instance.post[where]]
        for pre_key in range(-1, len(roles)):
            for post_key in range(-1, len(roles)):
                if pre_key >= 0 and post_key >= 0:
                    continue
                sel = where[(pre_role == pre_key) & (post_role == post_key)]
                if sel.size == 0:
                    continue
                pre_name = "network" if pre_key < 0 else roles[pre_key]
                post_name = "network" if post_key < 0 else roles[post_key]
                pre_idx = pop_index[r, instance.pre[sel]] if pre_key < 0 else np.full(sel.size, r)
                post_idx = pop_index[r, instance.post[sel]] if post_key < 0 else np.full(sel.size, r)
                for rs in sorted({receptor_sets[k] for k in np.unique(instance.pathway_index[sel])}):
                    ks = [k for k, s in enumerate(receptor_sets) if s == rs]
                    m = np.isin(instance.pathway_index[sel], ks)
                    parts.setdefault((pre_name, post_name, rs), []).append((sel[m], pre_idx[m], post_idx[m]))
    edges: list[EdgeSet] = []
    for (pre_name, post_name, rs), chunks in parts.items():
        sel = np.concatenate([c[0] for c in chunks])
        pre_idx = np.concatenate([c[1] for c in chunks])
        post_idx = np.concatenate([c[2] for c in chunks])
        pw = instance.pathway_index[sel]
        f = instance.connections_at(sel)
        weights = {rec: np.array([circuit.pathways[pathways[k]].receptors.get(rec, 0.0) for k in range(len(pathways))])[pw]
                   for rec in rs.split("+") if rec}
        edges.append(EdgeSet(
            name=f"{pre_name}_to_{post_name}_{rs.replace('+', '_')}", pre=pre_name, post=post_name,
            pre_index=pre_idx, post_index=post_idx, pathway=pw, n_sites=f["n_sites"],
            site_conductance=f["site_conductance"] * factor[pw],
            U=np.clip(f["U"] * cond["release_factor"], 0.0, 1.0), U_reference=f["U"], D=f["D"], F=f["F"],
            delay=f["delay"], weights=weights, stochastic=stochastic))

    background = background_plans(net)

    n_sites = int(sum(int(np.sum(e.n_sites)) if stochastic else e.size for e in edges))
    estimate = memory_estimate(population.size + n_repeat * len(roles), n_sites, duration)
    limit = memory_limit if memory_limit is not None else DEFAULT_MEMORY_FRACTION * available_memory()
    if estimate > limit:
        raise error(f"the embedded network would need about {estimate / 1e9:.2f} GB "
                    f"({population.size} cells, {n_sites} synapses), more than the limit of {limit / 1e9:.2f} GB",
                    memory_span or net.span,
                    expected="a network that fits in memory",
                    hint="narrow the region, lower `repeat`, or raise the limit with `simulate memory 8 GB` "
                         "if the machine has it")
    counts = {
        "cells_per_class": {name: int(np.sum(population.class_index == k)) for k, name in enumerate(population.class_names)
                            if np.any(population.class_index == k)},
        "connections_per_pathway": {pathways[k]: int(n) for k, n in enumerate(np.bincount(
            np.concatenate([e.pathway for e in edges]) if edges else np.zeros(0, dtype=int),
            minlength=len(pathways))) if n},
        "release_sites": n_sites,
        "repeats": n_repeat,
    }
    return NetworkPlan(region=_describe(net), population=population, edges=edges, background=background,
                       pathways=pathways, counts=counts, memory_estimate=estimate, memory_limit=limit)


def background_plans(net: ast.Network) -> list[BackgroundPlan]:
    """The `background` lines of a network block in SI."""
    def si(q):
        return q.si if q is not None else 0.0
    return [BackgroundPlan(kind=bg.kind, classes=list(bg.classes), rate=si(bg.rate), conductance=si(bg.conductance),
                           receptor=bg.receptor or "", mean=si(bg.mean), sd=si(bg.sd), tau=si(bg.tau),
                           reversal=bg.reversal.si if bg.reversal is not None else None)
            for bg in net.background]


def role_background(background: list[BackgroundPlan], cell_class: str, interval: float
                    ) -> tuple[list[NoiseSpec], list[PoissonSpec]]:
    """The background drive a selected cell of ``cell_class`` gets, as its own stimulus specs
    (on for the whole sweep cycle)."""
    noise, poisson = [], []
    for bg in background:
        if cell_class not in bg.classes:
            continue
        if bg.kind == "noise":
            noise.append(NoiseSpec(mean=bg.mean, sd=bg.sd, tau=bg.tau, start=0.0, stop=interval,
                                   reversal=bg.reversal, background=True))
        else:
            poisson.append(PoissonSpec(rate=bg.rate, conductance=bg.conductance, receptor=bg.receptor,
                                       start=0.0, stop=interval, background=True))
    return noise, poisson


__all__ = ["available_memory", "background_plans", "memory_estimate", "resolve_network", "role_background"]
