"""Resolution: protocol AST + circuit -> Plan (SI numbers, concrete cells, waveforms, sweep layout).

The steps run in pipeline order: settings, bath, selection, recording, stimuli, synapses,
measures, layout. Every number handed to the engine is SI. No Brian2 here.

Temperature is applied here, once: Hodgkin-Huxley roles get their rate factors
``q10 ** ((T - reference) / 10)`` as parameters (``phi...``), receptor rise and decay time
constants are divided by their factor, and ``conditions["q10_factors"]`` records every
factor applied. The engine does no temperature scaling of its own.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field

import numpy as np

from ..language import ast
from ..language.errors import Collector, error
from ..language.units import display, expect
from ..engine.models import (HH_MODELS, membrane_area, hh_slow_time_constants, holdable_limit, holding_is_stable,
                             peak_factor, rate_factor_name, steady_state_current)
from ..language.patch import expand_patches
from ..measure.registry import COLLECTORS, patch_collectors
from .check import find_pathway, run_checks
from .references import reference_plans
from .model import (ActivationPlan, CurrentPulse, MeasurePlan, NoiseSpec, PatchPlan, Plan, PoissonSpec, ReceptorPlan,
                    RolePlan, StimulusEvent, SynapsePlan, WaveSegment)
from .lesions import check_pools, repeat_lesions, whole_circuit_lesions
from .network import background_plans, resolve_network, role_background
from .select import select_cells

DEFAULT_DT = 0.025e-3          # s; a common choice for conductance-based point neurons
DEFAULT_SAMPLING = 10e3        # Hz
DEFAULT_TAIL = 0.3             # s after the last stimulus when `lasting` is not given
RECOVERY_FACTOR = 5.0          # independent sweeps need a gap of 5 slowest time constants


def hill(calcium: float, half: float, n: float) -> float:
    """Hill law of release vs extracellular calcium: c^n / (c^n + K^n) (Dodge and Rahamimoff 1967)."""
    return calcium ** n / (calcium ** n + half ** n)


def release_factor(calcium: float, release) -> float:
    """Factor applied to U at ``calcium`` relative to the circuit's reference calcium."""
    return hill(calcium, release.half_activation, release.hill) / hill(
        release.calcium_reference, release.half_activation, release.hill)


def adex_bias(params: dict[str, np.ndarray], v: float) -> np.ndarray:
    """Constant current that makes ``v`` the adaptive exponential model's rest (w at steady state)."""
    return steady_state_current("adex", params, v)


def adex_holdable_limit(params: dict[str, np.ndarray]) -> np.ndarray:
    """Highest potential a constant current can hold (fold of the I-V curve)."""
    gL, VT, dT, a = (params[k] for k in ("gL", "VT", "DeltaT", "a"))
    return VT + dT * np.log((gL + a) / gL)


# --- settings -----------------------------------------------------------------------
def _settings(p: ast.Protocol) -> dict:
    out = {"dt": DEFAULT_DT, "sample_dt": 1.0 / DEFAULT_SAMPLING,
           "mode": "embedded" if p.network is not None else "isolated",
           "deterministic": False, "memory": None, "memory_span": None}
    for s in p.settings:
        if s.name == "timestep":
            out["dt"] = expect(s.value, "time", "timestep")
            if not 0 < out["dt"] <= 0.2e-3:
                raise error("timestep must lie between 0 and 0.2 ms for these cell models", s.value.span,
                            expected="a time step such as 0.025 ms")
        elif s.name == "sampling":
            rate = expect(s.value, "frequency", "sampling")
            if rate <= 0:
                raise error("sampling rate must be positive", s.value.span, expected="e.g. 10 kHz")
            out["sample_dt"] = 1.0 / rate
        elif s.name == "deterministic":
            out["deterministic"] = True
        elif s.name == "memory":
            out["memory"] = expect(s.value, "memory", "memory limit")
            out["memory_span"] = s.value.span
    if out["sample_dt"] < out["dt"] * (1 - 1e-9):
        span = next((s.span for s in p.settings if s.name == "sampling"), None)
        raise error("sampling is faster than the simulation time step", span,
                    expected=f"at most {1 / out['dt'] / 1e3:g} kHz for a {out['dt'] * 1e3:g} ms time step")
    # round the sampling interval to a whole number of steps
    out["sample_dt"] = out["dt"] * max(1, round(out["sample_dt"] / out["dt"]))
    return out


def _bath(p: ast.Protocol, circuit) -> dict:
    cond = {"calcium": circuit.bath.calcium, "magnesium": circuit.bath.magnesium,
            "temperature": circuit.bath.temperature, "blocks": {}}
    for item in p.bath:
        if isinstance(item, ast.BathSetting):
            cond[item.name] = item.value.si
        else:
            frac = 1.0 if item.fraction is None else item.fraction.si
            cond["blocks"][item.receptor] = frac
    if not isinstance(cond["temperature"], float) or not 0.0 < cond["temperature"]:
        raise AssertionError(f"internal error: bath temperature {cond['temperature']!r} is not in kelvin")
    rel = circuit.release
    cond["release_factor"] = release_factor(cond["calcium"], rel)
    cond["release_law"] = {"calcium_reference": rel.calcium_reference,
                           "half_activation": rel.half_activation, "hill": rel.hill}
    return cond


# --- temperature --------------------------------------------------------------------
def cell_rate_factors(cell_class, temperature: float) -> dict[str, float]:
    """Rate factors of a class at ``temperature`` (K): ``phi...`` name -> Q10^((T - T_ref)/10).

    Empty for models without temperature dependence (adex).
    """
    law = cell_class.temperature
    if law is None:
        return {}
    return {rate_factor_name(key): law.factor(key, temperature) for key in law.q10}


def _class_record(cell_class, temperature: float) -> dict:
    law = cell_class.temperature
    if law is None:
        return {"model": cell_class.model, "factors": {},
                "note": "not temperature-scaled (parameters hold as fitted)"}
    return {"model": cell_class.model, "reference": law.reference, "q10": dict(law.q10),
            "defaults": not law.given, "factors": cell_rate_factors(cell_class, temperature)}


def _hold(model: str, params: dict[str, np.ndarray], pick, holding) -> np.ndarray:
    """Holding current that makes ``holding`` (a potential) a steady state; refuse unstable ones."""
    v = holding.si
    stable = holding_is_stable(model, params, v)
    if not stable.all():
        limit = holdable_limit(model, params)
        if model == "adex":   # the fold of the I-V curve, exact
            limit = np.minimum(limit, adex_holdable_limit(params))
        if v >= limit.min():
            expected = (f"a potential below {limit.min() * 1e3:.1f} mV (the cell model fires above "
                        f"it instead of settling)")
        else:
            expected = "a potential at which the held cell settles (a stable steady state)"
        raise error(f"{pick.cell_class} cells cannot be held at {holding} by a constant current",
                    holding.span, expected=expected, hint="hold at a more negative potential")
    return steady_state_current(model, params, v)


# --- stimuli ------------------------------------------------------------------------
DEFAULT_SERIES_RESISTANCE = 10e6   # Ohm, a typical whole-cell access resistance (common practice)


@dataclass
class _Stim:
    pulses: list = field(default_factory=list)
    spikes: np.ndarray | None = None
    events: list = field(default_factory=list)
    segments: list = field(default_factory=list)
    noise: list = field(default_factory=list)
    poisson: list = field(default_factory=list)
    activations: list = field(default_factory=list)   # ast.Activate nodes, resolved later
    end: float = 0.0


def _stimuli(block: ast.Stimulate | None) -> _Stim:
    out = _Stim()
    if block is None:
        return out
    raw: list[tuple[float, int, str]] = []
    ends = [0.0]
    for k, item in enumerate(block.items):
        if isinstance(item, ast.Pulse):
            out.pulses.append(CurrentPulse(item.at.si, item.duration.si, item.amplitude.si))
            raw.append((item.at.si, k, "pulse"))
        elif isinstance(item, ast.Train):
            period = 1.0 / item.rate.si
            for n in range(item.count):
                t0 = item.start.si + n * period
                out.pulses.append(CurrentPulse(t0, item.duration.si, item.amplitude.si))
                raw.append((t0, k, "train"))
        elif isinstance(item, ast.SpikeTimes):
            out.spikes = np.array([t.si for t in item.times])
            raw.extend((t, k, "spike") for t in out.spikes)
        elif isinstance(item, ast.Step):
            out.segments.append(WaveSegment("square", item.at.si, item.at.si + item.duration.si,
                                            amplitude=item.amplitude.si))
        elif isinstance(item, ast.StepFamily):
            out.segments.append(WaveSegment("square", item.at.si, item.at.si + item.duration.si,
                                            per_sweep=np.array([q.si for q in item.values])))
        elif isinstance(item, ast.Ramp):
            out.segments.append(WaveSegment("ramp", item.start.si, item.stop.si, amplitude=item.start_amplitude.si,
                                            amplitude_end=item.stop_amplitude.si))
        elif isinstance(item, ast.Sine):
            out.segments.append(WaveSegment("sine", item.start.si, item.stop.si, amplitude=item.amplitude.si,
                                            frequency=item.frequency.si,
                                            offset=item.offset.si if item.offset is not None else 0.0))
        elif isinstance(item, ast.Chirp):
            out.segments.append(WaveSegment("chirp", item.start.si, item.stop.si, amplitude=item.amplitude.si,
                                            frequency=item.f_start.si, frequency_end=item.f_stop.si))
        elif isinstance(item, ast.Noise):
            out.noise.append(NoiseSpec(mean=item.mean.si, sd=item.sd.si, tau=item.tau.si, start=item.start.si,
                                       stop=item.stop.si,
                                       reversal=item.reversal.si if item.reversal is not None else None))
        elif isinstance(item, ast.PoissonInput):
            out.poisson.append(PoissonSpec(rate=item.rate.si, conductance=item.conductance.si,
                                           receptor=item.receptor, start=item.start.si, stop=item.stop.si))
        elif isinstance(item, ast.Activate):
            out.activations.append(item)
            ends.append(max(t.si for t in item.times))
        else:  # pragma: no cover - the parser builds only these
            raise AssertionError(f"internal error: unknown stimulus {type(item).__name__}")
    raw.sort()
    out.events = [StimulusEvent(time=t, index=i + 1, item=k, kind=kind) for i, (t, k, kind) in enumerate(raw)]
    # A lone pulse that follows a train is the recovery probe.
    trains_end = [max(e.time for e in out.events if e.item == k)
                  for k in {e.item for e in out.events if e.kind == "train"}]
    for e in out.events:
        if e.kind == "pulse" and any(e.time > t for t in trains_end):
            e.probe = True
    # pulses and steps on one cell must not overlap
    spans = sorted([(q.start, q.start + q.duration) for q in out.pulses]
                   + [(g.start, g.stop) for g in out.segments if g.kind == "square"])
    for (a0, a1), (b0, _) in zip(spans, spans[1:]):
        if b0 < a1 - 1e-12:
            raise error(f"two current pulses or steps on {block.cell!r} overlap at {b0 * 1e3:g} ms", block.span,
                        expected="pulses and steps that end before the next one starts",
                        hint="shift one of them or shorten it")
    ends += [q.start + q.duration for q in out.pulses] + [g.stop for g in out.segments]
    ends += [n.stop for n in out.noise] + [q.stop for q in out.poisson]
    if out.spikes is not None and len(out.spikes):
        ends.append(float(out.spikes[-1]))
    out.end = max(ends)
    return out


def _clamp_check(params: dict, model: str, rs: float, dt: float, name: str, span) -> str:
    """Describe the clamp's time constant Rs*C/(1 + Rs*gL) and how the engine integrates it.

    Forward Euler diverges when that time constant is shorter than about two steps; the engine
    then integrates the clamped cell with exponential Euler, which stays stable (the plan says so).
    """
    if model == "adex":
        C, gL = params["C"], params["gL"]
    else:
        area = membrane_area(params)
        C, gL = params["c_m"] * area, params["g_leak"] * area
    tau = float(np.min(rs * C / (1.0 + rs * gL)))
    text = f"voltage clamp of {name}: time constant {tau * 1e3:.3g} ms with {rs / 1e6:g} MOhm series resistance"
    if model == "adex" and tau < 4.0 * dt:
        text += (f"; shorter than 4 time steps ({4 * dt * 1e3:g} ms), so the clamped cell is integrated with "
                 f"exponential Euler (forward Euler would diverge)")
    if tau < 0.5 * dt:
        text = f"{span}: warning: " + text + (
            "; the clamp settles within one step, so the first sample of each command step is not resolved")
    return text


def _activation(act: ast.Activate, target: str, target_ids: np.ndarray, circuit, instance, rng,
                release_factor: float, stochastic: bool, index: int, lesions):
    pw = find_pathway(circuit, act.cell_class, circuit_class_of(instance, target_ids[0]))
    pool = instance.ids_of(act.cell_class)
    if act.cell_class in lesions.silenced or pw.name in lesions.cut:
        pool = pool[:0]    # silenced cells cannot fire; a cut pathway carries nothing
    reps, ids = [], []
    for rep, tid in enumerate(target_ids):
        alive = pool[~lesions.gone(rep)[pool]]
        sources = alive[instance.connected(alive, np.full(alive.shape, tid))]
        n = int(round(act.fraction.si * len(sources)))
        if n:
            chosen = np.sort(rng.choice(sources, size=n, replace=False))
            reps.extend([rep] * n)
            ids.extend(chosen.tolist())
    reps, ids = np.array(reps, dtype=int), np.array(ids, dtype=int)
    tgt = target_ids[reps] if len(reps) else np.zeros(0, dtype=int)
    cp = instance.connection_params(ids, tgt)
    cp["site_conductance"] = cp["site_conductance"] * lesions.conductance_factor(pw.name)
    return ActivationPlan(
        name=f"activate_{target}_{index}", target=target, cell_class=act.cell_class, pathway=pw.name,
        fraction=act.fraction.si, times=np.array([t.si for t in act.times]), source_repeat=reps, source_ids=ids,
        n_sites=np.asarray(cp["n_sites"], dtype=int), site_conductance=np.asarray(cp["site_conductance"]),
        U=np.clip(np.asarray(cp["U"]) * release_factor, 0.0, 1.0), U_reference=np.asarray(cp["U"]),
        D=np.asarray(cp["D"]), F=np.asarray(cp["F"]), delay=np.asarray(cp["delay"]),
        receptors=dict(pw.receptors), stochastic=stochastic)


def circuit_class_of(instance, cell_id: int) -> str:
    return instance.class_names[int(instance.class_index[cell_id])]


# --- the whole plan ------------------------------------------------------------------
def resolve(protocol: ast.Protocol, circuit, instance=None, *, source_text: str | None = None) -> Plan:
    """Resolve ``protocol`` against ``circuit`` into a Plan.

    Args:
        protocol: the parsed protocol.
        circuit: the loaded circuit (``protolang.circuit.load_circuit``).
        instance: an instantiated circuit; built from ``protocol.seed`` when omitted.
        source_text: the protocol text, for the plan's hash.

    Returns:
        The Plan.

    Raises:
        ProtocolError: every semantic problem found, at once where possible.
    """
    from ..circuit import instantiate

    original_stimuli = protocol.stimuli
    protocol = expand_patches(protocol, patch_collectors())
    warnings = run_checks(protocol, circuit)
    if instance is None:
        instance = instantiate(circuit, protocol.seed)
    settings = _settings(protocol)
    cond = _bath(protocol, circuit)
    lesions = whole_circuit_lesions(protocol, instance)
    check_pools(protocol, instance, lesions)
    sel_rng = np.random.default_rng(np.random.SeedSequence([protocol.seed, 0x5E1EC7]))
    selection = select_cells(protocol.cells, instance, sel_rng, excluded=lesions.removed)
    repeat_lesions(lesions, protocol, instance, selection)
    n_repeat = protocol.cells.repeat

    stim_blocks = {s.cell: s for s in protocol.stimuli}
    rec_lines = {r.cell: r for r in protocol.recordings}
    picks = {p.name: p for p in protocol.cells.picks}
    roles_stim = {name: _stimuli(stim_blocks.get(name)) for name in selection.names}

    # sweeps
    sw = protocol.sweeps
    interval = expect(sw.interval, "time", "sweep interval")
    stim_end = max(st.end for st in roles_stim.values())
    if sw.length is not None:
        length = expect(sw.length, "time", "sweep length")
        if length < stim_end:
            raise error(f"sweeps last {length * 1e3:g} ms but the stimuli run until {stim_end * 1e3:g} ms",
                        sw.length.span, expected=f"a length of at least {stim_end * 1e3:g} ms")
    else:
        length = stim_end + DEFAULT_TAIL
    if interval < length - 1e-12:
        raise error(f"sweeps every {display(interval, 'time')} are shorter than one sweep ({display(length, 'time')})",
                    sw.interval.span, expected=f"an interval of at least {display(length, 'time')}",
                    hint="lengthen the interval or shorten the sweep with `lasting`")

    out = Collector()
    notes_extra: list[str] = []
    out.diagnostics.extend(warnings.warnings)
    roles: list[RolePlan] = []
    spans: dict[str, str] = {}
    temperature = cond["temperature"]
    q10_record: dict[str, dict] = {"cells": {}, "receptors": {}}
    for name in selection.names:
        ids = selection.ids[name]
        pick = picks[name]
        cell_class = circuit.classes[pick.cell_class]
        params = instance.params_of(ids)
        factors = cell_rate_factors(cell_class, temperature)
        params.update({k: np.full(n_repeat, f) for k, f in factors.items()})
        q10_record["cells"].setdefault(pick.cell_class, _class_record(cell_class, temperature))
        rec = rec_lines.get(name)
        st = roles_stim[name]
        holding = np.zeros(n_repeat)
        hold_v = None
        noise = 0.0
        series = None
        if rec is not None and rec.mode == "voltage clamp":
            hold_v = rec.holding.si
            series = rec.series.si if rec.series is not None else DEFAULT_SERIES_RESISTANCE
            notes_extra.append(_clamp_check(params, cell_class.model, series, settings["dt"], name, rec.span))
            if rec.noise is not None:
                noise = expect(rec.noise, "current", "recording noise in voltage clamp")
        elif rec is not None:
            if rec.holding is not None:
                if rec.holding.dimension == "voltage":
                    hold_v = rec.holding.si
                    holding = _hold(cell_class.model, params, pick, rec.holding)
                else:
                    holding = np.full(n_repeat, rec.holding.si)
            if rec.noise is not None:
                noise = expect(rec.noise, "voltage", "recording noise")
        role_noise, role_poisson = list(st.noise), list(st.poisson)
        if protocol.network is not None and st.spikes is None:
            bg_noise, bg_poisson = role_background(background_plans(protocol.network), pick.cell_class, interval)
            role_noise += bg_noise
            role_poisson += bg_poisson
        silenced = pick.cell_class in lesions.silenced
        if silenced and cell_class.model in HH_MODELS:
            # a Hodgkin-Huxley cell without sodium conductance cannot fire (the AdEx engine gates instead)
            params["gNa"] = np.zeros(n_repeat)
        if silenced and st.spikes is not None:
            notes_extra.append(f"{name} fires at explicit times although its class {pick.cell_class} is silenced: "
                               f"a spike source has no membrane to silence")
            silenced = False
        roles.append(RolePlan(
            name=name, cell_class=pick.cell_class, model=cell_class.model,
            cell_ids=ids, positions=instance.positions[ids], params=params,
            recorded=rec is not None and rec.mode != "off", mode=rec.mode if rec else "current clamp",
            holding_current=holding, holding_potential=hold_v, noise_sd=noise,
            pulses=st.pulses, spike_times=st.spikes, events=st.events, segments=st.segments,
            noise=role_noise, poisson=role_poisson, series_resistance=series, silenced=silenced))
        spans[f"cell_{name}"] = str(pick.span)

    # receptors and blocks; kinetics at the bath temperature (rise and decay / Q10 factor)
    receptors = {}
    for rname, r in circuit.receptors.items():
        law = r.temperature
        factor = law.factor("q10", temperature) if law is not None else 1.0
        rise, decay = r.rise / factor, r.decay / factor
        receptors[rname] = ReceptorPlan(name=rname, rise=rise, decay=decay, reversal=r.reversal,
                                        scale=1.0 - cond["blocks"].get(rname, 0.0), mg_block=r.mg_block,
                                        peak_factor=peak_factor(rise, decay))
        q10_record["receptors"][rname] = (
            {"reference": law.reference, "q10": law.q10["q10"], "defaults": not law.given,
             "factor": factor} if law is not None else {"factor": 1.0})
    cond["q10_factors"] = q10_record

    # synapses between every ordered pair of selected cells the circuit connects
    synapses: list[SynapsePlan] = []
    for pre in selection.names:
        for post in selection.names:
            if pre == post:
                continue
            pw = find_pathway(circuit, picks[pre].cell_class, picks[post].cell_class)
            if pw is None:
                continue
            if roles_stim[post].spikes is not None:
                notes_extra.append(f"{pre} -> {post} left out: {post} fires at explicit times and has no membrane")
                continue
            measured = any(m.source == pre and b.cell == post for b in protocol.measures for m in b.items)
            live = [r for r, w in pw.receptors.items() if w > 0 and cond["blocks"].get(r, 0.0) < 1.0]
            if not live and not measured:
                # every receptor of the pathway is fully blocked: the synapse carries no current
                notes_extra.append(f"{pre} -> {post} left out: all its receptors are blocked")
                continue
            pre_ids, post_ids = selection.ids[pre], selection.ids[post]
            connected = instance.connected(pre_ids, post_ids)
            cp = instance.connection_params(pre_ids, post_ids)
            if pw.name in lesions.cut:
                notes_extra.append(f"{pre} -> {post}: pathway {pw.name} is cut by a lesion; "
                                   f"{int(connected.sum())} anatomical connection(s) carry nothing")
                connected = np.zeros_like(connected)
            cp["site_conductance"] = cp["site_conductance"] * lesions.conductance_factor(pw.name)
            U_ref = np.where(connected, cp["U"], 0.0)
            distance = np.linalg.norm(instance.positions[pre_ids] - instance.positions[post_ids], axis=1)
            synapses.append(SynapsePlan(
                name=f"{pre}_to_{post}", pre=pre, post=post, pathway=pw.name, connected=connected,
                n_sites=np.where(connected, cp["n_sites"], 0).astype(int),
                site_conductance=np.where(connected, cp["site_conductance"], 0.0),
                U=np.clip(U_ref * cond["release_factor"], 0.0, 1.0), U_reference=U_ref,
                D=np.where(connected, cp["D"], 1.0), F=np.where(connected, cp["F"], 0.0),
                delay=np.where(connected, cp["delay"], 0.0), receptors=dict(pw.receptors),
                stochastic=not settings["deterministic"], distance=distance,
                rule_probability=np.asarray(pw.probability(distance), dtype=float)))
            span = next((c.span for c in picks[post].constraints
                         if isinstance(c, ast.ReceivingFrom) and c.source == pre), picks[post].span)
            spans[f"syn_{pre}_to_{post}"] = str(span)

    # extracellular activation: a fraction of the class's cells that project to the target
    activations: list[ActivationPlan] = []
    act_rng = np.random.default_rng(np.random.SeedSequence([protocol.seed, 0xAC7]))
    for name in selection.names:
        for k, act in enumerate(roles_stim[name].activations):
            plan_act = _activation(act, name, selection.ids[name], circuit, instance, act_rng,
                                   cond["release_factor"], not settings["deterministic"], k, lesions)
            if len(plan_act.source_ids) == 0:
                notes_extra.append(f"{act.span}: warning: activating {act.fraction} of {act.cell_class} reaches no "
                                   f"cell projecting to {name!r} in any repeat")
            activations.append(plan_act)
            spans[plan_act.name] = str(act.span)

    measures: list[MeasurePlan] = []
    for block in protocol.measures:
        for item in block.items:
            spec = COLLECTORS[item.collector]
            opts = {k: v[1] for k, v in spec["options"].items()}
            for o in item.options:
                opts[o.name] = o.value.si
                if item.collector == "activity" and o.name == "discard" and o.value.si >= length:
                    raise error(f"discarding {o.value} leaves nothing of a {display(length, 'time')} sweep",
                                o.span, expected=f"a time shorter than the sweep ({display(length, 'time')})",
                                hint="discard less, or lengthen the sweeps with `lasting`")
            measures.append(MeasurePlan(cell=block.cell, collector=item.collector, source=item.source,
                                        options=opts, span=str(item.span)))
            if item.source is not None and not any(s.pre == item.source and s.post == block.cell for s in synapses):
                raise AssertionError("internal error: measured pathway has no synapse plan")

    network = None
    if protocol.network is not None:
        network = resolve_network(protocol, instance, selection, lesions, cond,
                                  stochastic=not settings["deterministic"], duration=sw.count * interval,
                                  memory_limit=settings["memory"], memory_span=settings["memory_span"])
        for role in roles:
            role.silenced = role.silenced and role.spike_times is None
    patches = []
    for patch in protocol.cells.patches:
        block = next((b for b in original_stimuli if b.cell == patch.name), None)
        pw = find_pathway(circuit, patch.cell_class, patch.cell_class)
        patches.append(PatchPlan(name=patch.name, cell_class=patch.cell_class, members=list(patch.members),
                                 radius=patch.radius.si, turn=block.turn.si if block is not None else 0.0,
                                 pathway=pw.name if pw is not None else None))
    layout, reason = _layout(settings, interval, length, roles, receptors, synapses)
    text_hash = hashlib.sha256((source_text or "").encode()).hexdigest() if source_text else ""
    notes = [f"{d.span}: warning: {d.message}" for d in out.warnings] + notes_extra
    return Plan(
        title=protocol.title, protocol_file=protocol.file, protocol_hash=text_hash,
        circuit_file=circuit.path, circuit_hash=circuit.sha256, seed=protocol.seed,
        dt=settings["dt"], sample_dt=settings["sample_dt"], sweep_length=length,
        n_sweeps=sw.count, interval=interval, n_repeat=n_repeat, layout=layout, layout_reason=reason,
        mode=settings["mode"], conditions=cond, roles=roles, receptors=receptors, synapses=synapses,
        measures=measures, spans=spans, notes=notes, activations=activations,
        lesions=lesions.records, network=network, patches=patches,
        references=reference_plans(protocol, circuit, {r.cell: r.mode for r in protocol.recordings}))


def _layout(settings, interval, length, roles, receptors, synapses) -> tuple[str, str]:
    """Replicas when every sweep starts from a fully recovered state; else continuous time."""
    slow: list[tuple[float, str]] = []
    for r in roles:
        if r.model == "adex" and r.spike_times is None:
            slow.append((float(np.max(r.params["tau_w"])), f"adaptation of {r.name}"))
            slow.append((float(np.max(r.params["C"] / r.params["gL"])), f"membrane of {r.name}"))
        elif r.model in HH_MODELS and r.spike_times is None:
            slow += [(tau, f"{what} of {r.name}") for tau, what in hh_slow_time_constants(r.model, r.params)]
    for s in synapses:
        if s.connected.any():
            slow.append((float(np.max(s.D[s.connected])), f"recovery D of {s.name}"))
            slow.append((float(np.max(s.F[s.connected])), f"facilitation F of {s.name}"))
    for rc in receptors.values():
        slow.append((rc.decay, f"{rc.name} decay"))
    tau, what = max(slow) if slow else (0.0, "nothing")
    gap = interval - length
    if settings["mode"] == "embedded":
        return "sequential", ("embedded: the network's ongoing activity carries from one sweep into the next, so "
                              "sweeps run one after another in continuous time")
    if settings["mode"] == "isolated" and gap >= RECOVERY_FACTOR * tau:
        return "replicas", (f"isolated cells and a {gap * 1e3:g} ms gap between sweeps >= {RECOVERY_FACTOR:g} x the "
                            f"slowest time constant ({what}, {tau * 1e3:g} ms): sweeps are independent, so all "
                            f"repeats x sweeps run as replicas of one network in one run")
    return "sequential", (f"the {gap * 1e3:g} ms gap between sweeps is shorter than {RECOVERY_FACTOR:g} x the slowest "
                          f"time constant ({what}, {tau * 1e3:g} ms): a sweep still feels the previous one, so "
                          f"sweeps run one after another in continuous time")
