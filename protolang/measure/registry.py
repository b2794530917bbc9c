"""Collector catalogue: collector name -> whether it needs a source, its options (dimension, SI default) and its tables.

The front end imports this to check collector and option names, so it imports nothing
(no numpy, pandas or Brian2); :mod:`protolang.measure.collect` reads the defaults from
here, so the language reference and the collectors cannot drift apart.
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
            # failure threshold floor
            "threshold": ("voltage", 0.05e-3),
            # failure threshold = max(noise_factor x baseline noise SD, threshold)
            "noise_factor": ("number", 3.0),
        },
        "tables": ["responses", "connections", "pathways"],
        "description": "postsynaptic responses to the spikes of SOURCE: per response, per connection, per pathway",
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
}


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
