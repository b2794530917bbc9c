"""Collector catalogue: collector name -> whether it needs a source, its options (dimension, SI default) and its tables.

The front end imports this to check collector and option names, so it imports nothing
(no numpy, pandas or Brian2); :mod:`protolang.measure.collect` reads the defaults from
here, so the language reference and the collectors cannot drift apart.

Keys of an entry: ``needs_source`` (``COLLECTOR to SOURCE``), ``needs_recording`` (the cell
must be recorded; default: as ``needs_source``), ``needs_step`` (the kind of current step
the protocol must give the cell), ``needs_engine`` (the collector simulates experiments of
its own, so it cannot run on imported recordings), ``scope`` ("network" for collectors of
``measure network:``, which read every simulated cell of an embedded run; "patch" for collectors of
``measure PATCH:``, which read every cell of a multi-cell patch; default "cell"), ``options`` (name -> (dimension, SI
default)), ``tables`` and ``description``.
"""

from __future__ import annotations

COLLECTORS: dict[str, dict] = {
    "responses": {
        "needs_source": True,
        "options": {
            # longest response window after each presynaptic spike
            "window": ("time", 0.040),
            # baseline window before each presynaptic spike
            "baseline": ("time", 0.002),
            # failure threshold floor of a membrane-potential trace (current clamp)
            "threshold": ("voltage", 0.05e-3),
            # failure threshold floor of a clamp-current trace (voltage clamp)
            "current_threshold": ("current", 2e-12),
            # failure threshold = max(noise_factor x baseline noise SD, floor)
            "noise_factor": ("number", 3.0),
        },
        "tables": ["responses", "connections", "pathways"],
        "description": "postsynaptic responses to the spikes of SOURCE: per response, per connection, per "
                       "pathway (potentials in current clamp, clamp currents in voltage clamp)",
    },
    "plasticity": {
        "needs_source": True,
        "options": {
            # resamples of the sweeps behind the confidence intervals of U, D and F
            "bootstrap": ("number", 200.0),
        },
        "tables": ["plasticity"],
        "description": "Tsodyks-Markram U, D, F and absolute efficacy fitted to the mean response to every "
                       "presynaptic spike of a train (and recovery probe) by least squares, per connection "
                       "and per pathway, with bootstrap intervals over sweeps and a synapse-class label",
    },
    "spikes": {
        "needs_source": False,
        "options": {},
        "tables": ["spikes"],
        "description": "spike count, first spike and rate of the cell in every sweep",
    },
    "passive": {
        "needs_source": False,
        "needs_recording": True,
        "needs_step": "hyperpolarising",
        "options": {},
        "tables": ["cells", "classes"],
        "description": "resting potential, input resistance, membrane time constant and sag from the "
                       "smallest hyperpolarising step",
    },
    "firing": {
        "needs_source": False,
        "needs_recording": True,
        "needs_step": "depolarising",
        "options": {},
        "tables": ["cell_sweeps", "cells", "classes"],
        "description": "spikes during each depolarising step: count, rate, latency, spike shape, "
                       "adaptation, firing-pattern label",
    },
    "fi": {
        "needs_source": False,
        "needs_recording": True,
        "needs_step": "family",
        "options": {},
        "tables": ["cell_sweeps", "cells", "classes"],
        "description": "firing rate against step current over a family of steps; F-I slope; lowest step that fires",
    },
    "rheobase": {
        "needs_source": False,
        "needs_recording": True,
        "needs_engine": True,
        "options": {
            # search bracket: the low end must not fire, the high end must
            "low": ("current", 0.0),
            "high": ("current", 1e-9),
            # largest width of the final bracket
            "tolerance": ("current", 5e-12),
            # duration of the square test step (from 100 ms into a test sweep)
            "width": ("time", 0.5),
            # search rounds after the bracket check; sets how many currents each round tests
            "rounds": ("number", 3.0),
        },
        "tables": ["cells", "classes"],
        "description": "smallest step current that makes the cell fire, found by simulated test steps "
                       "(many currents per round, all cells at once); no step needed in the protocol",
    },
    "connectivity": {
        "needs_source": False,
        "needs_recording": True,
        "scope": "patch",
        "options": {
            # width of the distance bins of the connection-probability table
            "distance_bin": ("length", 50e-6),
            # a pair is connected when its spike-triggered average response exceeds this many noise SDs
            "detection_factor": ("number", 4.0),
        },
        "tables": ["patch_pairs", "patch_connectivity", "patch_reciprocity", "patch_degrees"],
        "description": "every ordered pair of a multi-cell patch tested for a connection by its spike-triggered "
                       "average response; connection probability by distance with Wilson 95 % intervals, "
                       "reciprocity, in- and out-degrees, each beside the circuit's true values",
    },
    "activity": {
        "needs_source": False,
        "needs_recording": False,
        "scope": "network",
        "options": {
            # start of the analysed stretch of each sweep: skips the network's start-up transient
            "discard": ("time", 0.2),
            # bin of the spike counts behind the synchrony measure and the spike-count correlation
            "bin": ("time", 0.005),
        },
        "tables": ["populations", "bursts"],
        "description": "population activity of the embedded network per class: firing rate, ISI CV, "
                       "synchrony (Golomb's chi), spike-count correlation, population bursts, state label",
    },
}


def patch_collectors() -> frozenset[str]:
    """Collectors that read a whole multi-cell patch."""
    return frozenset(k for k, v in COLLECTORS.items() if v.get("scope") == "patch")


def option_defaults(collector: str) -> dict[str, float]:
    """Return ``{option: default in SI}`` for ``collector``.

    Args:
        collector: a name in :data:`COLLECTORS`.

    Returns:
        A new dict of SI defaults.

    Raises:
        KeyError: unknown collector (the front end reports user mistakes before this).
    """
    return {name: default for name, (_dim, default) in COLLECTORS[collector]["options"].items()}


# --- quantities a `reference` block may compare with published values --------------------
# name -> where the model's values come from. ``collectors``: any one of them measuring the cell
# provides it (the first listed is read first); ``table``/``column``: the per-unit table (one row per
# connection, tested pair or cell) and its column, ``{unit}`` standing for the trace unit (mV in
# current clamp, pA in voltage clamp); ``dimension``: what a published value must be ("trace": the
# recorded trace's kind, "fraction": a percentage or a plain number from 0 to 1); ``source``: the
# reference names a presynaptic cell (`reference amplitude of post from pre`).
REFERENCE_MEASURES: dict[str, dict] = {
    "amplitude": {"collectors": ("responses",), "table": "connections", "column": "amplitude_mean_{unit}",
                  "dimension": "trace", "source": True,
                  "description": "mean amplitude of the first response, failures included, per connection"},
    "cv": {"collectors": ("responses",), "table": "connections", "column": "cv", "dimension": "number",
           "source": True, "description": "coefficient of variation of the first response, per connection"},
    "failures": {"collectors": ("responses",), "table": "connections", "column": "failure_rate",
                 "dimension": "fraction", "source": True,
                 "description": "fraction of failures among first responses, per connection"},
    "latency": {"collectors": ("responses",), "table": "connections", "column": "latency_ms", "dimension": "time",
                "source": True, "description": "presynaptic spike to 10 % of the peak, per connection"},
    "rise": {"collectors": ("responses",), "table": "connections", "column": "rise_20_80_ms", "dimension": "time",
             "source": True, "description": "20-80 % rise time, per connection"},
    "decay": {"collectors": ("responses",), "table": "connections", "column": "decay_tau_ms", "dimension": "time",
              "source": True, "description": "decay time constant, per connection"},
    "ppr": {"collectors": ("responses",), "table": "connections", "column": "ppr", "dimension": "number",
            "source": True, "description": "paired-pulse ratio (second train response / first), per connection"},
    "recovery": {"collectors": ("responses",), "table": "connections", "column": "recovery_ratio",
                 "dimension": "number", "source": True,
                 "description": "recovery probe response / first response, per connection"},
    "probability": {"collectors": ("responses", "connectivity"), "table": "connections", "column": "connected",
                    "dimension": "fraction", "source": True,
                    "description": "connection probability: per tested pair, 1 if connected (`responses`: the "
                                   "circuit's connection; `connectivity` of a patch: a detected response)"},
    "U": {"collectors": ("plasticity",), "table": "plasticity", "column": "tm_U", "dimension": "number",
          "source": True, "description": "Tsodyks-Markram utilisation U, per converged connection fit"},
    "D": {"collectors": ("plasticity",), "table": "plasticity", "column": "tm_D_ms", "dimension": "time",
          "source": True, "description": "Tsodyks-Markram recovery time constant D, per converged connection fit"},
    "F": {"collectors": ("plasticity",), "table": "plasticity", "column": "tm_F_ms", "dimension": "time",
          "source": True, "description": "Tsodyks-Markram facilitation time constant F, per converged connection fit "
                         "that resolved F (depression-only refits, F = 0, are left out)"},
    "rest": {"collectors": ("passive",), "table": "cells", "column": "rest_mV", "dimension": "voltage",
             "source": False, "description": "resting potential, per cell"},
    "input_resistance": {"collectors": ("passive",), "table": "cells", "column": "input_resistance_MOhm",
                         "dimension": "resistance", "source": False, "description": "input resistance, per cell"},
    "membrane_tau": {"collectors": ("passive",), "table": "cells", "column": "tau_ms", "dimension": "time",
                     "source": False, "description": "membrane time constant, per cell"},
    "sag": {"collectors": ("passive",), "table": "cells", "column": "sag_ratio", "dimension": "number",
            "source": False, "description": "sag ratio of the hyperpolarising step, per cell"},
    "rheobase": {"collectors": ("rheobase", "fi"), "table": "cells", "column": ("rheobase_pA", "family_rheobase_pA"),
                 "dimension": "current", "source": False,
                 "description": "rheobase, per cell (the `rheobase` search, else the lowest step of `fi` that fires)"},
    "fi_slope": {"collectors": ("fi",), "table": "cells", "column": "fi_slope_Hz_per_nA", "dimension": "gain",
                 "source": False, "description": "slope of the F-I curve above rheobase, per cell"},
    "threshold": {"collectors": ("firing",), "table": "cells", "column": "threshold_mV", "dimension": "voltage",
                  "source": False, "description": "spike threshold, per cell"},
    "spike_amplitude": {"collectors": ("firing",), "table": "cells", "column": "spike_amplitude_mV",
                        "dimension": "voltage", "source": False, "description": "spike amplitude, per cell"},
    "half_width": {"collectors": ("firing",), "table": "cells", "column": "half_width_ms", "dimension": "time",
                   "source": False, "description": "spike width at half amplitude, per cell"},
    "ahp": {"collectors": ("firing",), "table": "cells", "column": "ahp_mV", "dimension": "voltage",
            "source": False, "description": "afterhyperpolarisation depth, per cell"},
    "max_rate": {"collectors": ("firing",), "table": "cells", "column": "max_rate_Hz", "dimension": "frequency",
                 "source": False, "description": "highest firing rate over the depolarising steps, per cell"},
    "adaptation": {"collectors": ("firing",), "table": "cells", "column": "adaptation_index", "dimension": "number",
                   "source": False, "description": "spike-frequency adaptation index, per cell"},
}

# Conditions a reference may state: name -> "number" (compared with the protocol's bath, given as a
# value or a range) or "text" (compared with the circuit's own statement, if it makes one).
REFERENCE_CONDITIONS: dict[str, str] = {"calcium": "number", "magnesium": "number", "temperature": "number",
                                        "species": "text", "age": "text"}
