"""The unit table: unit symbols -> (dimension, factor to SI); quantities with dimension checks.

Values are kept in SI internally (seconds, volts, amperes, siemens, ohms, farads,
hertz, mol/m^3 (= mM), metres, kelvin, S/m^2 and F/m^2 per membrane area) and a
fraction for percent.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field

from .errors import Span, error, suggest

# dimension name -> human wording used in messages
DIMENSIONS = {
    "time": "a time (e.g. 2 ms, 10 s)",
    "voltage": "a voltage (e.g. -70 mV)",
    "current": "a current (e.g. 150 pA, 2 nA)",
    "conductance": "a conductance (e.g. 0.5 nS)",
    "resistance": "a resistance (e.g. 10 MOhm)",
    "capacitance": "a capacitance (e.g. 200 pF)",
    "frequency": "a frequency (e.g. 20 Hz)",
    "concentration": "a concentration (e.g. 2.0 mM)",
    "length": "a length (e.g. 150 um)",
    "temperature": "a temperature (e.g. 34 degC)",
    "percent": "a percentage (e.g. 50 %)",
    "velocity": "a velocity (e.g. 0.3 m/s)",
    "specific_conductance": "a conductance per membrane area (e.g. 0.1 mS/cm2)",
    "specific_capacitance": "a capacitance per membrane area (e.g. 1 uF/cm2)",
    "memory": "an amount of memory (e.g. 4 GB)",
    "gain": "a firing-rate gain (e.g. 50 Hz/nA)",
    "number": "a plain number",
}

# symbol -> (dimension, factor to SI). Temperatures: see to_si().
UNITS: dict[str, tuple[str, float]] = {
    "s": ("time", 1.0), "ms": ("time", 1e-3), "us": ("time", 1e-6),
    "min": ("time", 60.0),
    "V": ("voltage", 1.0), "mV": ("voltage", 1e-3), "uV": ("voltage", 1e-6),
    "A": ("current", 1.0), "mA": ("current", 1e-3), "uA": ("current", 1e-6),
    "nA": ("current", 1e-9), "pA": ("current", 1e-12),
    "S": ("conductance", 1.0), "mS": ("conductance", 1e-3), "uS": ("conductance", 1e-6),
    "nS": ("conductance", 1e-9), "pS": ("conductance", 1e-12),
    "Ohm": ("resistance", 1.0), "kOhm": ("resistance", 1e3), "MOhm": ("resistance", 1e6),
    "GOhm": ("resistance", 1e9),
    "F": ("capacitance", 1.0), "uF": ("capacitance", 1e-6), "nF": ("capacitance", 1e-9),
    "pF": ("capacitance", 1e-12),
    "Hz": ("frequency", 1.0), "kHz": ("frequency", 1e3),
    "M": ("concentration", 1e3), "mM": ("concentration", 1.0), "uM": ("concentration", 1e-3),
    "nM": ("concentration", 1e-6),
    "m": ("length", 1.0), "mm": ("length", 1e-3), "um": ("length", 1e-6),
    "degC": ("temperature", 1.0), "K": ("temperature", 1.0),
    "%": ("percent", 0.01),
    "m/s": ("velocity", 1.0), "mm/ms": ("velocity", 1.0), "um/ms": ("velocity", 1e-3),
    # per membrane area, SI S/m^2 and F/m^2 (1 S/cm2 = 1e4 S/m^2)
    "S/cm2": ("specific_conductance", 1e4), "mS/cm2": ("specific_conductance", 10.0),
    "uS/cm2": ("specific_conductance", 1e-2), "S/m2": ("specific_conductance", 1.0),
    "uF/cm2": ("specific_capacitance", 1e-2), "F/m2": ("specific_capacitance", 1.0),
    # bytes (decimal prefixes)
    "kB": ("memory", 1e3), "MB": ("memory", 1e6), "GB": ("memory", 1e9),
    # firing-rate gain of an F-I curve, SI Hz/A
    "Hz/nA": ("gain", 1e9), "Hz/pA": ("gain", 1e12),
}

# Display units used when writing tables and plans back out.
DISPLAY = {
    "time": "ms", "voltage": "mV", "current": "pA", "conductance": "nS",
    "resistance": "MOhm", "capacitance": "pF", "frequency": "Hz", "concentration": "mM",
    "length": "um", "temperature": "degC", "percent": "%", "velocity": "m/s",
    "specific_conductance": "mS/cm2", "specific_capacitance": "uF/cm2", "memory": "GB", "gain": "Hz/nA",
}


@dataclass(frozen=True, slots=True)
class Quantity:
    """A number with a unit as written by the user; ``si`` is the value in SI."""

    value: float
    unit: str
    span: Span | None = field(default=None, compare=False)

    @property
    def dimension(self) -> str:
        if not self.unit:
            return "number"
        return UNITS[self.unit][0]

    @property
    def si(self) -> float:
        return to_si(self.value, self.unit)

    def __str__(self) -> str:
        value = f"{self.value:g}"
        return f"{value} {self.unit}".strip() if self.unit != "%" else f"{value} %"


def to_si(value: float, unit: str) -> float:
    if not unit:
        return float(value)
    dim, factor = UNITS[unit]
    if unit == "degC":
        return float(value) + 273.15
    return float(value) * factor


def check_unit(unit: str, span: Span | None) -> None:
    """Raise a ProtocolError naming the unit if it is not in the table."""
    if unit and unit not in UNITS:
        raise error(f"unknown unit {unit!r}", span, expected="one of " + ", ".join(sorted(UNITS)),
                    hint=suggest(unit, UNITS))


def expect(q: Quantity, dimension: str, what: str) -> float:
    """Return ``q`` in SI if it has ``dimension``, else raise a ProtocolError about ``what``."""
    if q.dimension != dimension:
        got = "a plain number" if not q.unit else f"{q.unit!r} ({q.dimension})"
        hint = None
        if not q.unit:
            hint = f"add a unit, e.g. {q.value:g} {DISPLAY.get(dimension, '')}".rstrip()
        raise error(f"{what} needs {DIMENSIONS[dimension]}, got {got}", q.span,
                    expected=DIMENSIONS[dimension], hint=hint)
    return q.si


# a unit may end in one digit: the per-area units "S/cm2", "uF/cm2"
_QTY = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*([A-Za-z%/]*\d?)\s*$")


def parse_quantity(text: str, span: Span | None = None) -> Quantity:
    """Parse ``"2.5 mM"`` (used for circuit files); raise ProtocolError if malformed."""
    m = _QTY.match(str(text))
    if not m:
        raise error(f"cannot read {text!r} as a number with a unit", span,
                    expected="a number followed by a unit, e.g. '2 ms'")
    value, unit = float(m.group(1)), m.group(2)
    check_unit(unit, span)
    return Quantity(value, unit, span)


def display(value_si: float, dimension: str) -> str:
    """Format an SI value in the display unit of its dimension."""
    unit = DISPLAY[dimension]
    if dimension == "temperature":
        return f"{value_si - 273.15:g} degC"
    return f"{value_si / UNITS[unit][1]:g} {unit}"
