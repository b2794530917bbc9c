"""Hand-written Brian2 baseline of an embedded network: takes a network plan's arrays, hands out a timed run.

``export_arrays`` runs in the benchmark's parent process and reads protolang's Plan (no Brian2).
``run_handwritten`` runs in a worker process that imports neither protolang nor its engine:
its equations are written here by hand, as a modeller would write them for this circuit
(adaptive exponential cells in one NeuronGroup, dual-exponential AMPA / NMDA / GABA_A
conductances summed per cell, stochastic Tsodyks-Markram release with one Brian2 synapse per
release site, one Synapses object per receptor set, Poisson background through PoissonInput).
"""

from __future__ import annotations

import json
import time

import numpy as np

ADEX_KEYS = ("C", "gL", "EL", "VT", "DeltaT", "a", "tau_w", "b", "Vr", "Vcut", "t_ref")
RECEPTOR_SETS = {"AMPA+NMDA": ("AMPA", "NMDA"), "GABA_A": ("GABA_A",)}
BINS = 0.2    # s, bin of the population spike counts handed back for the rate's standard error


def export_arrays(plan, path: str) -> dict:
    """Save what the hand-written script needs from an embedded plan to an ``.npz`` file.

    Cells are the plan's population followed by the selected cells (role by role, repeat by
    repeat); connections are grouped by receptor set, one row per connection (the script
    expands them to release sites itself).

    Args:
        plan: a protolang Plan with a ``network`` (stochastic release, Poisson background only,
            selected AdEx cells without stimuli or holding current).
        path: the ``.npz`` file to write.

    Returns:
        Counts: cells, connections and release sites per receptor set.

    Raises:
        ValueError: a plan feature this baseline does not model.
    """
    net = plan.network
    pop = net.population
    n_pop, n_rep = pop.size, plan.n_repeat
    roles = list(plan.roles)
    for r in roles:
        if r.model != "adex" or r.pulses or r.segments or r.noise or r.spike_times is not None \
                or np.any(np.asarray(r.holding_current) != 0) or r.mode != "current clamp":
            raise ValueError(f"role {r.name!r}: the baseline models free, unstimulated AdEx cells only")
    if pop.silenced.any() or any(bg.kind != "poisson" for bg in net.background):
        raise ValueError("the baseline models no silenced cells and Poisson background only")
    offset = {r.name: n_pop + k * n_rep for k, r in enumerate(roles)}
    cell_class = np.concatenate([pop.class_index] + [np.full(n_rep, pop.class_names.index(r.cell_class))
                                                     for r in roles])
    arrays: dict[str, np.ndarray] = {"cell_class": cell_class}
    for key in ADEX_KEYS:
        arrays[f"cell_{key}"] = np.concatenate([pop.params[key]] + [np.asarray(r.params[key], dtype=float)
                                                                    for r in roles])
    recorded = np.concatenate([offset[r.name] + np.arange(n_rep) for r in roles if r.recorded]
                              or [np.zeros(0, dtype=np.int64)])
    arrays["recorded"] = recorded

    def to_global(name: str, index: np.ndarray) -> np.ndarray:
        return np.asarray(index, dtype=np.int64) + (0 if name == "network" else offset[name])

    counts: dict[str, dict[str, int]] = {}
    groups: dict[str, list] = {}
    for e in net.edges:
        if not e.stochastic:
            raise ValueError("the baseline models stochastic release only")
        key = "+".join(r for r in plan.receptors if r in e.weights)
        if key not in RECEPTOR_SETS:
            raise ValueError(f"receptor set {key!r} is not one the baseline writes")
        groups.setdefault(key, []).append(e)
    for key, edges in groups.items():
        tag = key.replace("+", "_")

        def cat(get) -> np.ndarray:
            return np.concatenate([np.asarray(get(e)) for e in edges])

        arrays[f"{tag}_pre"] = cat(lambda e: to_global(e.pre, e.pre_index))
        arrays[f"{tag}_post"] = cat(lambda e: to_global(e.post, e.post_index))
        arrays[f"{tag}_sites"] = cat(lambda e: np.round(e.n_sites)).astype(np.int64)
        for field in ("site_conductance", "U", "D", "F", "delay"):
            arrays[f"{tag}_{field}"] = cat(lambda e, f=field: getattr(e, f)).astype(float)
        for rec in RECEPTOR_SETS[key]:
            arrays[f"{tag}_w_{rec}"] = cat(lambda e, r=rec: e.weights[r]).astype(float)
        counts[key] = {"connections": int(arrays[f"{tag}_pre"].size),
                       "sites": int(arrays[f"{tag}_sites"].sum())}
    background = []
    for bg in net.background:
        reach = np.isin(cell_class, [pop.class_names.index(c) for c in bg.classes])
        background.append({"rate": bg.rate, "conductance": bg.conductance, "receptor": bg.receptor,
                           "all_cells": bool(reach.all())})
    meta = {
        "seed": int(plan.seed), "dt": plan.dt, "sample_dt": plan.sample_dt,
        "duration": plan.n_sweeps * plan.interval, "n_population": int(n_pop),
        "magnesium_mM": float(plan.conditions["magnesium"]),
        "receptors": {name: {"rise": r.rise, "decay": r.decay, "reversal": r.reversal, "scale": r.scale,
                             "mg_block": r.mg_block, "peak_factor": r.peak_factor}
                      for name, r in plan.receptors.items()},
        "sets": sorted(groups), "background": background,
    }
    arrays["meta"] = np.array(json.dumps(meta))
    np.savez(path, **arrays)
    return {"cells": int(cell_class.size), "sets": counts}


# --------------------------------------------------------------------------- the script itself

CELLS = """
dv/dt = (gL*(EL - v) + gL*DeltaT*exp((v - VT)/DeltaT) - w + I_syn)/C : volt (unless refractory)
dw/dt = (a*(v - EL) - w)/tau_w : amp
I_syn = g_ampa*(E_ampa - v) + g_nmda*(E_nmda - v)/(1 + exp(-0.062*v/mV)*Mg/(3.57*mmolar)) + g_gaba*(E_gaba - v) : amp
dg_ampa/dt = -g_ampa/td_ampa + x_ampa : siemens
dx_ampa/dt = -x_ampa/tr_ampa : siemens/second
dg_nmda/dt = -g_nmda/td_nmda + x_nmda : siemens
dx_nmda/dt = -x_nmda/tr_nmda : siemens/second
dg_gaba/dt = -g_gaba/td_gaba + x_gaba : siemens
dx_gaba/dt = -x_gaba/tr_gaba : siemens/second
C : farad (constant)
gL : siemens (constant)
EL : volt (constant)
VT : volt (constant)
DeltaT : volt (constant)
a : siemens (constant)
tau_w : second (constant)
b : amp (constant)
Vr : volt (constant)
Vcut : volt (constant)
t_ref : second (constant)
"""

# one synapse per release site: facilitation state, site occupancy, time of the last spike
SITE = """
U : 1 (constant)
invD : hertz (constant)
invF : hertz (constant)
uf : 1
avail : 1
tlast : second
"""

RELEASE = """
uf = uf*exp(-(t - tlast)*invF)
u_now = uf + U*(1 - uf)
uf = u_now
avail += (1 - avail)*int(rand() < 1 - exp(-(t - tlast)*invD))
rel = avail*int(rand() < u_now)
avail -= rel
tlast = t
"""

EXCITATORY = (SITE + "q_ampa : siemens/second (constant)\nq_nmda : siemens/second (constant)\n",
              RELEASE + "x_ampa_post += rel*q_ampa\nx_nmda_post += rel*q_nmda\n")
INHIBITORY = (SITE + "q_gaba : siemens/second (constant)\n", RELEASE + "x_gaba_post += rel*q_gaba\n")
VARIABLE = {"AMPA": "ampa", "NMDA": "nmda", "GABA_A": "gaba"}


def _vm_kb(field: str) -> int:
    with open("/proc/self/status", encoding="ascii") as fh:
        for line in fh:
            if line.startswith(field + ":"):
                return int(line.split()[1])
    return -1


def run_handwritten(path: str, *, target: str = "cython", duration: float | None = None,
                    discard: float = 0.2, profile: bool = False) -> dict:
    """Build and run the hand-written network of ``path`` (from :func:`export_arrays`).

    Args:
        path: the ``.npz`` file.
        target: Brian2 code-generation target.
        duration: simulated time (s); the plan's when None.
        discard: start of the run left out of the spike counts (s).
        profile: run with Brian2's profiling and hand back the time per code object.

    Returns:
        Timings (s: import, load, build, run), memory (kB: VmRSS after build and run, VmHWM),
        synapse counts, spike counts per cell after ``discard`` and population counts per
        :data:`BINS` bin, and the profile (name, seconds) when asked.
    """
    t0 = time.perf_counter()
    import brian2 as b2

    t_import = time.perf_counter()
    b2.prefs.codegen.target = target
    data = np.load(path)
    meta = json.loads(str(data["meta"]))
    cell_class = data["cell_class"]
    n = cell_class.size
    t_load = time.perf_counter()

    b2.start_scope()
    b2.defaultclock.dt = meta["dt"] * b2.second
    b2.seed(meta["seed"])
    rec = meta["receptors"]
    ns = {"Mg": meta["magnesium_mM"] * b2.mmolar}
    for name, var in VARIABLE.items():
        ns[f"E_{var}"] = rec[name]["reversal"] * b2.volt
        ns[f"tr_{var}"] = rec[name]["rise"] * b2.second
        ns[f"td_{var}"] = rec[name]["decay"] * b2.second
    if not rec["NMDA"]["mg_block"] or rec["AMPA"]["mg_block"] or rec["GABA_A"]["mg_block"]:
        raise ValueError("the hand-written cells put the magnesium block on NMDA only")

    G = b2.NeuronGroup(n, CELLS, threshold="v > Vcut", reset="v = Vr\nw += b", refractory="t_ref",
                       method="euler", namespace=ns, name="cells")
    units = {"C": b2.farad, "gL": b2.siemens, "EL": b2.volt, "VT": b2.volt, "DeltaT": b2.volt,
             "a": b2.siemens, "tau_w": b2.second, "b": b2.amp, "Vr": b2.volt, "Vcut": b2.volt,
             "t_ref": b2.second}
    for key, unit in units.items():
        setattr(G, key, data[f"cell_{key}"] * unit)
    G.v = data["cell_EL"] * b2.volt
    objects = [G]
    n_sites = {}
    for key in meta["sets"]:
        tag = key.replace("+", "_")
        model, on_pre = EXCITATORY if key == "AMPA+NMDA" else INHIBITORY
        sites = data[f"{tag}_sites"]
        S = b2.Synapses(G, G, model, on_pre=on_pre, namespace=ns, name=f"sites_{tag}")
        S.connect(i=np.repeat(data[f"{tag}_pre"], sites), j=np.repeat(data[f"{tag}_post"], sites))
        S.U = np.repeat(data[f"{tag}_U"], sites)
        # a time constant of 0 means instantaneous: a rate so large that exp(-elapsed*rate) is 0
        D, F = data[f"{tag}_D"], data[f"{tag}_F"]
        S.invD = np.repeat(np.where(D > 0, 1.0 / np.where(D > 0, D, 1.0), 1e12), sites) * b2.hertz
        S.invF = np.repeat(np.where(F > 0, 1.0 / np.where(F > 0, F, 1.0), 1e12), sites) * b2.hertz
        S.avail = 1
        g_site = data[f"{tag}_site_conductance"]
        for rname in key.split("+"):
            r = rec[rname]
            # jump of x that gives a peak conductance of g_site*weight (times the block's scale)
            q = g_site * data[f"{tag}_w_{rname}"] * r["peak_factor"] * r["scale"]
            setattr(S, f"q_{VARIABLE[rname]}", np.repeat(q, sites) * b2.siemens / b2.second)
        S.delay = np.repeat(data[f"{tag}_delay"], sites) * b2.second
        n_sites[key] = int(sites.sum())
        objects.append(S)
    for k, bg in enumerate(meta["background"]):
        if not bg["all_cells"]:
            raise ValueError("the hand-written script drives every cell with the background")
        r = rec[bg["receptor"]]
        jump = bg["conductance"] * r["peak_factor"] * r["scale"] * b2.siemens / b2.second
        objects.append(b2.PoissonInput(G, f"x_{VARIABLE[bg['receptor']]}", N=1, rate=bg["rate"] * b2.Hz,
                                       weight=jump))
    spikes = b2.SpikeMonitor(G, name="spikes")
    objects.append(spikes)
    if data["recorded"].size:
        # the protocol records the selected cell at the sampling rate: the same work here
        objects.append(b2.StateMonitor(G, "v", record=data["recorded"], dt=meta["sample_dt"] * b2.second,
                                       name="trace"))
    net = b2.Network(*objects)
    t_build = time.perf_counter()
    rss_build = _vm_kb("VmRSS")
    T = meta["duration"] if duration is None else duration
    net.run(T * b2.second, profile=profile)
    t_run = time.perf_counter()

    i, t = np.asarray(spikes.i[:]), np.asarray(spikes.t_[:])
    keep = t >= discard
    out = {
        "import_s": t_import - t0, "load_s": t_load - t_import, "build_s": t_build - t_load,
        "run_s": t_run - t_build, "rss_build_kb": rss_build, "rss_run_kb": _vm_kb("VmRSS"),
        "hwm_kb": _vm_kb("VmHWM"), "n_cells": int(n), "n_population": meta["n_population"],
        "n_sites": n_sites, "duration": T, "discard": discard,
        "counts": np.bincount(i[keep], minlength=n).tolist(),
        "binned": np.bincount(((t[keep] - discard) / BINS).astype(int),
                              minlength=max(int(round((T - discard) / BINS)), 1)).tolist(),
    }
    if profile:
        out["profile"] = [(name, float(sec)) for name, sec in net.profiling_info]
    return out
