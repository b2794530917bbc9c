"""Reads a circuit file (YAML text) and hands out a checked :class:`Circuit` with SI values and spans.

The file is composed into PyYAML nodes (never constructed into Python objects by
PyYAML, never executed), so every key and value keeps its line and column. Every
physical value is a string with a unit (``"2 ms"``, ``"0.3 m/s"``); counts are
integers; probabilities and other ratios are plain numbers. Errors name
``file:line:col``, the key path (``pathways[2].release.U``, list indices from 0), what
was expected and, for misspelt names, a suggestion. All errors of a file are
collected and raised together as one :class:`ProtocolError`.

Layout (keys in the order the reader checks them)::

    name: slab_demo
    note: free text
    species: rat                     # optional: what the circuit stands for (compared with the
    age: P14-P21                     #   conditions of published references); free text
    space:
      x: 400 um                      # slab extent along x and y
      y: 400 um
      layers:                        # depth measured down from the slab's top face
        upper: {top: 0 um, bottom: 500 um}
    bath: {calcium: 2.0 mM, magnesium: 1.0 mM}   # optional temperature, default 34 degC
    release_law:                     # Hill law of release against calcium
      reference_calcium: 2.0 mM      # the calcium at which pathway U values hold
      half_activation: 1.2 mM
      hill_coefficient: 4            # optional, default 4
    receptors:
      AMPA: {rise: 0.3 ms, decay: 3 ms, reversal: 0 mV}
      NMDA: {rise: 3 ms, decay: 80 ms, reversal: 0 mV, magnesium_block: true}
      GABA_A: {rise: 0.5 ms, decay: 8 ms, reversal: -75 mV,
               temperature: {reference: 34 degC, q10: 2.5}}   # optional, see below
    classes:
      pyramidal_upper:
        layer: upper
        count: 800                   # or density_per_mm3: 12000
        model: adex
        parameters:                  # each a value or a distribution
          C: {mean: 85 pF, sd: 3.4 pF}
          refractory: 2 ms
      regular_hh:
        layer: upper
        count: 40
        model: hh_cortical             # or hh_squid; parameters per membrane area
        parameters:
          diameter: 96 um
          g_leak: {mean: 0.1 mS/cm2, sd: 0.005 mS/cm2}
        temperature: {reference: 36 degC, q10_Na_Kd: 3, q10_M: 2.3}   # optional
    pathways:
      - pre: pyramidal_upper
        post: pyramidal_upper
        connection: {peak_probability: 0.18, length_constant: 130 um, max_distance: 450 um}
        sites: {mean: 4.5, sd: 1.0}  # release sites per connection (integers, min 1)
        site_conductance: {median: 0.155 nS, sigma: 0.3, distribution: lognormal}
        receptors: {AMPA: 1.0, NMDA: 0.5}   # peak conductance relative to site_conductance
        release: {U: {mean: 0.45, sd: 0.05}, D: 500 ms, F: 15 ms}   # Tsodyks-Markram
        conduction: {latency: 0.8 ms, velocity: 0.3 m/s}

A distribution is ``{mean, sd}`` (normal; ``distribution: normal`` may be written) or
``{median, sigma, distribution: lognormal}`` (sigma in natural-log units). Normal draws
are truncated (redrawn) so that a value keeps the sign of its mean and stays inside the
range its key allows (U in [0, 1], times positive...).

Cell models: ``adex`` (adaptive exponential integrate-and-fire, absolute values such as
``C: 85 pF``), ``hh_cortical`` (single-compartment Hodgkin-Huxley-type model after
Pospischil et al. 2008, Biol Cybern 99:427) and ``hh_squid`` (Hodgkin and Huxley 1952,
J Physiol 117:500, modern sign convention, rest near -65 mV). The two Hodgkin-Huxley
models take values per membrane area (``mS/cm2``, ``uF/cm2``) on a cylinder of
``diameter`` and ``length`` (area pi*d*L, no end caps); see :data:`HH_CORTICAL_PARAMETERS`
and :data:`HH_SQUID_PARAMETERS` for the keys and :data:`HH_DEFAULTS` for the optional ones.

Temperature: the bath temperature (``bath.temperature``, default 34 degC) scales rate
constants by ``q10 ** ((T - reference) / 10)``. A Hodgkin-Huxley class and a receptor may
carry ``temperature: {reference: ..., q10...: ...}``; a Q10 without its ``reference`` is an
error, since the factor means nothing without the temperature it is counted from.
Defaults (see :data:`TEMPERATURE_DEFAULTS`): hh_cortical reference 36 degC with Q10 3 for
the Na/K gates, 2.3 for I_M (the values in the model authors' public code), 3 for I_T
inactivation and 1 (no scaling) for I_L; hh_squid reference 6.3 degC with Q10 3 (Hodgkin
and Huxley 1952); receptors: their kinetics hold at the circuit's bath temperature, Q10
2.5 for rise and decay (common practice puts receptor kinetics at 2-3, no single source).
AdEx classes take no temperature section: their fitted parameters hold as given.
"""

from __future__ import annotations

import hashlib
import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import yaml

from ..language.errors import Collector, Diagnostic, ProtocolError, Span, error, remember_source, suggest
from ..language.units import DIMENSIONS, DISPLAY, UNITS, Quantity, parse_quantity

__all__ = [
    "ADEX_PARAMETERS",
    "HH_CORTICAL_PARAMETERS",
    "HH_DEFAULTS",
    "HH_SQUID_PARAMETERS",
    "MODEL_PARAMETERS",
    "TEMPERATURE_DEFAULTS",
    "Bath",
    "CellClass",
    "Circuit",
    "Dist",
    "IntDist",
    "Layer",
    "Pathway",
    "ReleaseLaw",
    "Receptor",
    "Temperature",
    "load_circuit",
]

# YAML key -> (engine name, dimension, rule). Order is the draw order in build.py.
# Rules: "positive" (> 0), "nonnegative" (>= 0), "signed" (keeps the sign of its centre).
ADEX_PARAMETERS: dict[str, tuple[str, str, str]] = {
    "C": ("C", "capacitance", "positive"),
    "g_leak": ("gL", "conductance", "positive"),
    "E_leak": ("EL", "voltage", "signed"),
    "V_T": ("VT", "voltage", "signed"),
    "delta_T": ("DeltaT", "voltage", "positive"),
    "a": ("a", "conductance", "signed"),
    "tau_w": ("tau_w", "time", "positive"),
    "b": ("b", "current", "nonnegative"),
    "V_reset": ("Vr", "voltage", "signed"),
    "V_cut": ("Vcut", "voltage", "signed"),
    "refractory": ("t_ref", "time", "nonnegative"),
}

# Hodgkin-Huxley-type models: values per membrane area on a cylinder (area pi*d*L).
# hh_cortical after Pospischil et al. 2008 (Biol Cybern 99:427): I_Na, I_Kd (Traub-Miles form
# with threshold shift V_T), I_M (slow K+, peak time constant tau_max), I_L (high-threshold
# Ca2+, IB cells), I_T (low-threshold Ca2+, LTS cells) and a leak. Calcium currents use a fixed
# E_Ca; intracellular calcium is not tracked (see HH_DEFAULTS).
HH_CORTICAL_PARAMETERS: dict[str, tuple[str, str, str]] = {
    "diameter": ("diam", "length", "positive"),
    "length": ("length", "length", "positive"),
    "c_m": ("c_m", "specific_capacitance", "positive"),
    "g_leak": ("g_leak", "specific_conductance", "positive"),
    "E_leak": ("EL", "voltage", "signed"),
    "g_Na": ("gNa", "specific_conductance", "nonnegative"),
    "g_Kd": ("gKd", "specific_conductance", "nonnegative"),
    "g_M": ("gM", "specific_conductance", "nonnegative"),
    "tau_max": ("tau_max", "time", "positive"),
    "g_CaL": ("gCaL", "specific_conductance", "nonnegative"),
    "g_CaT": ("gCaT", "specific_conductance", "nonnegative"),
    "V_T": ("VT", "voltage", "signed"),
    "E_Na": ("ENa", "voltage", "signed"),
    "E_K": ("EK", "voltage", "signed"),
    "E_Ca": ("ECa", "voltage", "signed"),
}

# hh_squid: Hodgkin and Huxley 1952 (J Physiol 117:500), V measured from the outside as usual
# today (rest near -65 mV rather than 0).
HH_SQUID_PARAMETERS: dict[str, tuple[str, str, str]] = {
    "diameter": ("diam", "length", "positive"),
    "length": ("length", "length", "positive"),
    "c_m": ("c_m", "specific_capacitance", "positive"),
    "g_leak": ("g_leak", "specific_conductance", "positive"),
    "E_leak": ("EL", "voltage", "signed"),
    "g_Na": ("gNa", "specific_conductance", "nonnegative"),
    "g_K": ("gK", "specific_conductance", "nonnegative"),
    "E_Na": ("ENa", "voltage", "signed"),
    "E_K": ("EK", "voltage", "signed"),
}

# Optional keys and their values when left out (SI). E_Ca = 120 mV is the Nernst potential of 2 mM
# outside and 240 nM inside at 36 degC, the resting values of the authors' code; with a fixed
# E_Ca the calcium currents do not feel calcium accumulation during bursts.
HH_DEFAULTS: dict[str, dict[str, float]] = {
    "hh_cortical": {"c_m": 1e-2, "g_M": 0.0, "tau_max": 1.0, "g_CaL": 0.0, "g_CaT": 0.0,
                    "E_Ca": 0.120},
    "hh_squid": {"c_m": 1e-2},
}

MODEL_PARAMETERS: dict[str, dict[str, tuple[str, str, str]]] = {
    "adex": ADEX_PARAMETERS,
    "hh_cortical": HH_CORTICAL_PARAMETERS,
    "hh_squid": HH_SQUID_PARAMETERS,
}
MODELS = tuple(MODEL_PARAMETERS)
_MODEL_WORDS = {
    "adex": "adaptive exponential integrate-and-fire",
    "hh_cortical": "Hodgkin-Huxley-type cortical cell after Pospischil et al. 2008",
    "hh_squid": "Hodgkin and Huxley 1952 squid axon",
}

# Reference temperature (K) and Q10 values per rate group when a class says nothing.
# hh_cortical: the model authors' code scales Na/K rates by 3^((T - 36)/10) and I_M by
# 2.3^((T - 36)/10); I_T inactivation has Q10 3 (its kinetics, measured at 24 degC, are
# written here at 36 degC); I_L is not scaled there. hh_squid: phi = 3^((T - 6.3)/10).
TEMPERATURE_DEFAULTS: dict[str, tuple[float, dict[str, float]]] = {
    "hh_cortical": (309.15, {"q10_Na_Kd": 3.0, "q10_M": 2.3, "q10_CaT": 3.0, "q10_CaL": 1.0}),
    "hh_squid": (279.45, {"q10": 3.0}),
}
# Receptor rise and decay: common practice, no single source (Q10 of 2-3 are usual).
RECEPTOR_Q10 = 2.5
DEFAULT_BATH_TEMPERATURE = 307.15   # K, 34 degC: near-physiological slice recordings
# bath and reference temperatures a slice protocol can mean (0 to 45 degC)
_TEMPERATURE_RANGE = (273.15, 318.15)
DEFAULT_HILL = 4.0  # cooperativity of calcium in release: Dodge and Rahamimoff 1967 J Physiol
# the shape of "2.5 mM" (as units.parse_quantity reads it), to name unknown units early
_QUANTITY = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*([A-Za-z%/]*)\s*$")
_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")
_STANDARD_TAGS = {
    "tag:yaml.org,2002:" + t for t in ("str", "int", "float", "bool", "null", "map", "seq")
}
# implicit resolutions that we read as the text written rather than refuse
_TEXT_TAGS = {"tag:yaml.org,2002:timestamp", "tag:yaml.org,2002:merge"}
_RULE_WORDS = {
    "positive": "greater than 0",
    "nonnegative": "0 or more",
    "probability": "between 0 and 1",
    "signed": "",
}


# --- data classes -------------------------------------------------------------------
@dataclass(frozen=True, slots=True)
class Dist:
    """A per-cell or per-connection value: fixed, normal or lognormal (SI units).

    ``center`` is the value, the mean or the median; ``spread`` is 0, the SD (SI) or
    the lognormal sigma. Draws outside ``[low, high]`` are redrawn (a truncated law);
    an open end (``low_open``/``high_open``) excludes the bound itself.
    """

    kind: str
    center: float
    spread: float = 0.0
    low: float = -math.inf
    high: float = math.inf
    low_open: bool = False
    high_open: bool = False
    span: Span | None = field(default=None, compare=False, repr=False)

    @property
    def mean(self) -> float:
        """Expected value of the untruncated law."""
        if self.kind == "lognormal":
            return self.center * math.exp(self.spread ** 2 / 2)
        return self.center

    def inside(self, values: np.ndarray) -> np.ndarray:
        """Boolean mask of values that the truncation keeps."""
        lo_ok = values > self.low if self.low_open else values >= self.low
        hi_ok = values < self.high if self.high_open else values <= self.high
        return lo_ok & hi_ok


@dataclass(frozen=True, slots=True)
class IntDist:
    """A count per connection: fixed, or a rounded normal truncated to ``[minimum, maximum]``."""

    kind: str              # "fixed" | "normal"
    center: float
    spread: float = 0.0
    minimum: int = 1
    maximum: int | None = None
    span: Span | None = field(default=None, compare=False, repr=False)


@dataclass(frozen=True, slots=True)
class Layer:
    """A depth band of the slab, in metres below its top face."""

    name: str
    top: float
    bottom: float
    span: Span | None = field(default=None, compare=False, repr=False)


@dataclass(frozen=True, slots=True)
class Bath:
    """Default extracellular concentrations (mol/m^3 = mM) and bath temperature (K)."""

    calcium: float
    magnesium: float
    span: Span | None = field(default=None, compare=False, repr=False)
    temperature: float = DEFAULT_BATH_TEMPERATURE


@dataclass(frozen=True, slots=True)
class Temperature:
    """How rate constants follow temperature: each group's rates are multiplied by
    ``q10[group] ** ((T - reference) / 10)`` (reference and T in kelvin).

    ``given`` is False when the defaults apply because the file says nothing.
    """

    reference: float
    q10: dict[str, float]
    given: bool = True
    span: Span | None = field(default=None, compare=False, repr=False)

    def factor(self, group: str, temperature: float) -> float:
        """Rate factor of ``group`` (a q10 key) at ``temperature`` (K)."""
        return float(self.q10[group] ** ((temperature - self.reference) / 10.0))


@dataclass(frozen=True, slots=True)
class ReleaseLaw:
    """Hill law of release against calcium: H(c) = c^n / (c^n + K^n).

    Pathway U values hold at ``calcium_reference`` (file key ``reference_calcium``); at
    another calcium c the release probability is scaled by ``relative_release(c)`` =
    H(c) / H(reference). ``hill`` is the Hill coefficient n (file key
    ``hill_coefficient``), K the half-activation concentration.
    """

    calcium_reference: float
    half_activation: float
    hill: float = DEFAULT_HILL
    span: Span | None = field(default=None, compare=False, repr=False)

    def activation(self, calcium: float | np.ndarray) -> float | np.ndarray:
        """H(calcium): fraction of maximal release at ``calcium`` (mM)."""
        c = np.asarray(calcium, dtype=float) ** self.hill
        return c / (c + self.half_activation ** self.hill)

    def relative_release(self, calcium: float | np.ndarray) -> float | np.ndarray:
        """H(calcium) / H(calcium_reference): the factor applied to pathway U values."""
        return self.activation(calcium) / self.activation(self.calcium_reference)


@dataclass(frozen=True, slots=True)
class Receptor:
    """Kinetics of one receptor type: difference of exponentials, SI units."""

    name: str
    rise: float
    decay: float
    reversal: float
    mg_block: bool = False   # Jahr-Stevens magnesium block (file key magnesium_block)
    span: Span | None = field(default=None, compare=False, repr=False)
    temperature: Temperature | None = None   # None only for receptors built by hand: no scaling


@dataclass(frozen=True, slots=True)
class CellClass:
    """A cell class: where its cells sit, how many, and the model parameter laws.

    ``parameters`` maps the engine's names to :class:`Dist` in SI units: for adex C, gL,
    EL, VT, DeltaT, a, tau_w, b, Vr, Vcut, t_ref; for the Hodgkin-Huxley models the
    engine names of :data:`HH_CORTICAL_PARAMETERS` / :data:`HH_SQUID_PARAMETERS` (every
    optional key filled in). ``temperature`` is None for adex and the class's (or the
    model's default) :class:`Temperature` for the Hodgkin-Huxley models.
    """

    name: str
    layer: str
    count: int
    model: str
    parameters: dict[str, Dist]
    density_per_mm3: float | None = None
    span: Span | None = field(default=None, compare=False, repr=False)
    temperature: Temperature | None = None


@dataclass(frozen=True, slots=True)
class Pathway:
    """Connections from one class to another: wiring rule, sites, receptors, dynamics.

    Connection probability at soma distance d: ``peak_probability * exp(-d /
    length_constant)`` for d <= ``max_distance``, else 0. Each released site adds a peak
    conductance ``site_conductance * receptors[name]`` per receptor.
    """

    index: int
    pre: str
    post: str
    peak_probability: float
    length_constant: float
    max_distance: float
    sites: IntDist
    site_conductance: Dist
    receptors: dict[str, float]
    U: Dist
    D: Dist
    F: Dist
    latency: float
    velocity: float
    span: Span | None = field(default=None, compare=False, repr=False)

    @property
    def name(self) -> str:
        return f"{self.pre}->{self.post}"

    def probability(self, distance: float | np.ndarray) -> np.ndarray:
        """The analytic connection probability at soma distance ``distance`` (m)."""
        d = np.asarray(distance, dtype=float)
        p = self.peak_probability * np.exp(-d / self.length_constant)
        return np.where(d <= self.max_distance, p, 0.0)


@dataclass(frozen=True, slots=True)
class Circuit:
    """A checked circuit file. All values SI.

    ``pathways`` maps ``"pre->post"`` names to pathways, in file order. ``spans`` maps
    key paths (``classes.basket_fast.parameters.C``, ``pathways[0].release.U``) to the
    span of the value for plain values, of the key for mappings, and of the item for
    list items (``pathways[0]``).
    """

    path: str
    sha256: str
    name: str
    note: str
    extent: tuple[float, float]
    layers: dict[str, Layer]
    bath: Bath
    release: ReleaseLaw
    receptors: dict[str, Receptor]
    classes: dict[str, CellClass]
    pathways: dict[str, Pathway]
    spans: dict[str, Span] = field(default_factory=dict, compare=False, repr=False)
    # what the circuit stands for, compared with the conditions of published references (optional)
    species: str | None = None
    age: str | None = None

    @property
    def class_names(self) -> list[str]:
        return list(self.classes)

    @property
    def n_cells(self) -> int:
        return sum(c.count for c in self.classes.values())

    def pathway(self, pre: str, post: str) -> Pathway | None:
        """The pathway from class ``pre`` to class ``post``, or None."""
        return self.pathways.get(f"{pre}->{post}")

    def span_of(self, key_path: str) -> Span | None:
        """Span of a key path such as ``pathways[0].release.U`` (None if absent)."""
        return self.spans.get(key_path)


# --- loading ------------------------------------------------------------------------
def load_circuit(path: str | Path, referenced_from: Span | None = None) -> Circuit:
    """Read and check a circuit file.

    Args:
        path: the circuit file (YAML). Its text is kept for error quotes.
        referenced_from: where the file was named (e.g. a protocol's ``circuit`` line);
            a file that cannot be read is reported there as well as at the file.

    Returns:
        The checked :class:`Circuit`.

    Raises:
        ProtocolError: the file is missing, is not UTF-8, is not well-formed YAML, or
            breaks the schema; every problem found is listed with ``file:line:col``.
    """
    file = str(path)
    try:
        raw = Path(path).read_bytes()
    except OSError as exc:
        reason = exc.strerror or str(exc)
        where = referenced_from or Span(file, 1, 1)
        raise error(f"cannot read circuit file {file!r}: {reason}", where,
                    expected="a readable YAML circuit file",
                    hint="paths in a protocol are relative to the protocol file") from None
    digest = hashlib.sha256(raw).hexdigest()
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line, col = _line_col(raw[: exc.start].decode("utf-8", "replace"))
        remember_source(file, raw.decode("utf-8", "replace"))  # so the quote can show the line
        raise error(f"circuit file is not UTF-8 text (byte {exc.start})", Span(file, line, col),
                    expected="a UTF-8 text file") from None
    remember_source(file, text)
    root = _compose(text, file)
    collector = Collector()
    reader = _Reader(file, collector)
    parts = reader.read(root)
    collector.raise_if_any()
    assert parts is not None, "internal error: circuit reader returned nothing without errors"
    return Circuit(path=file, sha256=digest, spans=reader.spans, **parts)


def _line_col(prefix: str) -> tuple[int, int]:
    line = prefix.count("\n") + 1
    col = len(prefix) - (prefix.rfind("\n") + 1) + 1
    return line, col


def _compose(text: str, file: str) -> yaml.Node:
    try:
        root = yaml.compose(text, Loader=yaml.SafeLoader)
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line, col = (mark.line + 1, mark.column + 1) if mark is not None else (1, 1)
        problem = exc.problem or exc.context or "malformed YAML"
        context = f" ({exc.context})" if exc.context and exc.problem else ""
        raise error(f"malformed YAML: {problem}{context}", Span(file, line, col),
                    expected="YAML mappings of 'key: value' lines",
                    hint="check brackets, indentation (spaces, not tabs) and quotes around "
                         "values that contain ':' or '#'"
                    ) from None
    except RecursionError:
        raise error("malformed YAML: lists or mappings nested too deeply", Span(file, 1, 1),
                    expected="a circuit file a few levels deep") from None
    except yaml.YAMLError as exc:  # reader errors (control characters) carry a position only
        pos = getattr(exc, "position", 0) or 0
        line, col = _line_col(text[:pos])
        char = getattr(exc, "character", None)
        what = f" (character code {ord(char) if isinstance(char, str) else char})" if char else ""
        raise error(f"malformed YAML: {getattr(exc, 'reason', None) or exc}{what}",
                    Span(file, line, col), expected="printable UTF-8 text") from None
    if root is None:
        raise error("circuit file is empty", Span(file, 1, 1),
                    expected="a YAML mapping with name, space, bath, release_law, receptors, "
                             "classes and pathways")
    return root


def _is_scalar(node: yaml.Node) -> bool:
    return isinstance(node, yaml.ScalarNode)


class _Reader:
    """Walks the node tree; every ``read_*`` returns None after recording an error."""

    def __init__(self, file: str, collector: Collector) -> None:
        self.file = file
        self.c = collector
        self.spans: dict[str, Span] = {}
        self.layer_names: list[str] = []   # every layer named in the file, even a broken one

    # -- plumbing --------------------------------------------------------------------
    def span(self, node: yaml.Node) -> Span:
        s, e = node.start_mark, node.end_mark
        if e.line > s.line and e.column == 0:  # block nodes end at the start of the next line
            return Span(self.file, s.line + 1, s.column + 1)
        return Span(self.file, s.line + 1, s.column + 1, e.line + 1, e.column + 1)

    def fail(self, path: str, message: str, node: yaml.Node | None, expected: str | None = None,
             hint: str | None = None) -> None:
        text = f"{path}: {message}" if path else message
        self.c.fail(text, self.span(node) if node is not None else None, expected, hint)

    def absorb(self, path: str, exc: ProtocolError) -> None:
        for d in exc.diagnostics:
            self.c.diagnostics.append(Diagnostic(f"{path}: {d.message}", d.span, d.expected,
                                                 d.hint, d.severity))

    def check_tags(self, root: yaml.Node) -> None:
        """Refuse explicit YAML tags: a circuit file is data, nothing in it is constructed."""
        seen: set[int] = set()
        stack = [root]
        while stack:  # iterative: aliases may share nodes, nesting may be deep
            node = stack.pop()
            if id(node) in seen:
                continue
            seen.add(id(node))
            if node.tag not in _STANDARD_TAGS and node.tag not in _TEXT_TAGS:
                self.fail("", f"YAML tag {node.tag!r} is not accepted in a circuit file", node,
                          expected="plain values, mappings and lists",
                          hint="remove the '!' tag; circuit files are data, never code")
            elif isinstance(node, yaml.MappingNode):
                stack.extend(n for pair in reversed(node.value) for n in reversed(pair))
            elif isinstance(node, yaml.SequenceNode):
                stack.extend(reversed(node.value))
        self.c.diagnostics.sort(key=lambda d: (d.span.line, d.span.column) if d.span else (0, 0))

    def value(self, node: yaml.Node) -> Any:
        if node.tag in _TEXT_TAGS:  # e.g. an unquoted date: keep it as the text written
            return node.value
        return yaml.constructor.SafeConstructor().construct_object(node, deep=True)

    def mapping(self, node: yaml.Node, path: str, required: tuple[str, ...],
                optional: tuple[str, ...] = (), what: str = "a mapping") -> dict | None:
        """Check a mapping with a fixed key set; return key -> (key node, value node)."""
        if not isinstance(node, yaml.MappingNode):
            self.fail(path or "circuit", f"expected {what}, got {_kind(node)}", node,
                      expected=f"{what} with keys: {', '.join(required + optional)}")
            return None
        allowed = required + optional
        out: dict[str, tuple[yaml.Node, yaml.Node]] = {}
        guessed: set[str] = set()
        for k, v in node.value:
            key = self.key_name(k, path)
            if key is None:
                continue
            sub = _join(path, key)
            if key in out:
                first = out[key][0].start_mark.line + 1
                self.fail(sub, f"duplicate key {key!r} (first given on line {first})", k,
                          expected="each key once")
                continue
            if key not in allowed:
                hint = suggest(key, allowed)
                self.fail(sub, f"unknown key {key!r}", k, expected="one of " + ", ".join(allowed),
                          hint=hint)
                guessed.update(a for a in allowed if hint and repr(a) in hint)
                continue
            out[key] = (k, v)
        for key in required:
            if key not in out and key not in guessed:  # a misspelling was already reported
                self.fail(path or "circuit", f"missing required key {key!r}", node,
                          expected="keys: " + ", ".join(required))
        return out

    def named_entries(self, node: yaml.Node, path: str, what: str) -> list | None:
        """A mapping whose keys are user-chosen names; return [(name, key node, value node)]."""
        if not isinstance(node, yaml.MappingNode):
            self.fail(path, f"expected a mapping of {what} names, got {_kind(node)}", node,
                      expected=f"'name:' entries, one per {what}")
            return None
        out, seen = [], {}
        for k, v in node.value:
            key = self.key_name(k, path)
            if key is None:
                continue
            sub = _join(path, key)
            if not _NAME.match(key):
                self.fail(sub, f"{what} name {key!r} is not a plain name", k,
                          expected="letters, digits and '_', starting with a letter or '_'")
                continue
            if key in seen:
                self.fail(sub, f"duplicate {what} {key!r} (first given on line {seen[key]})", k,
                          expected=f"each {what} once")
                continue
            seen[key] = k.start_mark.line + 1
            out.append((key, k, v))
        if not out and not node.value:
            self.fail(path, f"no {what} given", node, expected=f"at least one {what}")
        return out

    def key_name(self, k: yaml.Node, path: str) -> str | None:
        if not _is_scalar(k) or not isinstance(k.value, str) or k.value == "":
            self.fail(path, "keys must be plain names", k, expected="a name followed by ':'")
            return None
        return k.value

    def record(self, path: str, key: yaml.Node | None, node: yaml.Node) -> None:
        self.spans[path] = self.span(node if (_is_scalar(node) or key is None) else key)

    # -- scalars ---------------------------------------------------------------------
    def scalar(self, node: yaml.Node, path: str, expected: str) -> Any:
        if not _is_scalar(node):
            self.fail(path, f"expected {expected}, got {_kind(node)}", node, expected=expected)
            return None
        value = self.value(node)
        if value is None:
            self.fail(path, "no value given", node, expected=expected)
            return None
        return value

    def text(self, node: yaml.Node, path: str) -> str | None:
        value = self.scalar(node, path, "text")
        if value is None:
            return None
        if not isinstance(value, str):
            self.fail(path, f"expected text, got {value!r}", node, expected="text",
                      hint="quote the value")
            return None
        return value

    def flag(self, node: yaml.Node, path: str) -> bool | None:
        value = self.scalar(node, path, "true or false")
        if value is None:
            return None
        if not isinstance(value, bool):
            self.fail(path, f"expected true or false, got {node.value!r}", node,
                      expected="true or false")
            return None
        return value

    def integer(self, node: yaml.Node, path: str) -> int | None:
        value = self.scalar(node, path, "a whole number")
        if value is None:
            return None
        if isinstance(value, bool) or not isinstance(value, int):
            hint = "counts carry no unit" if isinstance(value, str) else None
            self.fail(path, f"expected a whole number, got {node.value!r}", node,
                      expected="a whole number, e.g. 800", hint=hint)
            return None
        return value

    def quantity(self, node: yaml.Node, path: str, dimension: str) -> float | None:
        """A physical value in SI (``dimension`` from units.DIMENSIONS; "number" = plain)."""
        value = self.scalar(node, path, DIMENSIONS[dimension])
        if value is None:
            return None
        span = self.span(node)
        if isinstance(value, bool):
            self.fail(path, f"expected {DIMENSIONS[dimension]}, got {node.value!r}", node,
                      expected=DIMENSIONS[dimension])
            return None
        if isinstance(value, (int, float)):
            q = Quantity(float(value), "", span)
        elif isinstance(value, str):
            m = _QUANTITY.match(value)
            if m and m.group(2) and m.group(2) not in UNITS and dimension != "number":
                units = [u for u, (d, _) in UNITS.items() if d == dimension]
                lowered = [u for u in units if u.lower() == m.group(2).lower()]
                hint = f"did you mean {lowered[0]!r}?" if lowered else suggest(m.group(2), units)
                self.fail(path, f"unknown unit {m.group(2)!r}", node,
                          expected=f"{DIMENSIONS[dimension]}: one of " + ", ".join(units),
                          hint=hint)
                return None
            try:
                q = parse_quantity(value, span)
            except ProtocolError as exc:
                self.absorb(path, exc)
                return None
        else:
            self.fail(path, f"expected {DIMENSIONS[dimension]}, got {node.value!r}", node,
                      expected=DIMENSIONS[dimension])
            return None
        if not math.isfinite(q.value):
            self.fail(path, f"expected a finite number, got {node.value!r}", node,
                      expected=DIMENSIONS[dimension])
            return None
        if dimension == "number":
            if q.unit == "%":
                return q.si
            if q.unit:
                self.fail(path, f"expected a plain number, got {q.unit!r} ({q.dimension})", node,
                          expected="a plain number (a ratio, probability or count)",
                          hint="remove the unit")
                return None
            return q.value
        if q.dimension != dimension:
            if not q.unit:
                self.fail(path, f"needs {DIMENSIONS[dimension]}, got a plain number", node,
                          expected=DIMENSIONS[dimension],
                          hint=f"add a unit, e.g. '{q.value:g} {DISPLAY[dimension]}'")
            else:
                units = [u for u, (d, _) in UNITS.items() if d == dimension]
                self.fail(path, f"needs {DIMENSIONS[dimension]}, got {q.unit!r} ({q.dimension})",
                          node, expected=DIMENSIONS[dimension],
                          hint="use one of " + ", ".join(units))
            return None
        return q.si

    def bounded(self, node: yaml.Node, path: str, dimension: str, rule: str) -> float | None:
        value = self.quantity(node, path, dimension)
        if value is None:
            return None
        if not _rule_ok(value, rule):
            self.fail(path, f"must be {_RULE_WORDS[rule]}, got {_show(value, dimension)}", node,
                      expected=f"{DIMENSIONS[dimension]} {_RULE_WORDS[rule]}")
            return None
        return value

    # -- distributions ---------------------------------------------------------------
    def dist(self, key: yaml.Node | None, node: yaml.Node, path: str, dimension: str,
             rule: str) -> Dist | None:
        """A fixed value or a {mean, sd} / {median, sigma, distribution: lognormal} law."""
        self.record(path, key, node)
        span = self.span(node)
        low, high, low_open, high_open = _rule_bounds(rule)
        if not isinstance(node, yaml.MappingNode):
            if not _is_scalar(node):
                self.fail(path, f"expected a value or a distribution, got {_kind(node)}", node,
                          expected=f"{DIMENSIONS[dimension]} or {{mean: ..., sd: ...}}")
                return None
            v = self.bounded(node, path, dimension, rule)
            if v is None:
                return None
            return Dist("fixed", v, 0.0, low, high, low_open, high_open, span)
        kind = "normal"
        dnode = None
        given = [k.value for k, _ in node.value if _is_scalar(k)]
        for k, v in node.value:
            if _is_scalar(k) and k.value == "distribution":
                dnode = v
        if dnode is None and ("median" in given or "sigma" in given):
            self.fail(path, "median and sigma describe a lognormal law", node,
                      expected="{median: ..., sigma: ..., distribution: lognormal}",
                      hint="add 'distribution: lognormal'")
            return None
        if dnode is not None:
            name = self.text(dnode, _join(path, "distribution"))
            if name is None:
                return None
            if name not in ("normal", "lognormal"):
                self.fail(_join(path, "distribution"), f"unknown distribution {name!r}", dnode,
                          expected="normal or lognormal", hint=suggest(name, ("normal", "lognormal")))
                return None
            kind = name
        if kind == "normal":
            keys = self.mapping(node, path, ("mean", "sd"), ("distribution",), "a distribution")
            if keys is None:
                return None
            center = self.bounded(keys["mean"][1], _join(path, "mean"), dimension, rule) \
                if "mean" in keys else None
            sd = self.bounded(keys["sd"][1], _join(path, "sd"), dimension, "nonnegative") \
                if "sd" in keys else None
            if center is None or sd is None:
                return None
        else:
            keys = self.mapping(node, path, ("median", "sigma", "distribution"), (),
                                "a lognormal distribution")
            if keys is None:
                return None
            center = self.bounded(keys["median"][1], _join(path, "median"), dimension, rule) \
                if "median" in keys else None
            sd = self.bounded(keys["sigma"][1], _join(path, "sigma"), "number", "nonnegative") \
                if "sigma" in keys else None
            if center is None or sd is None:
                return None
            if center == 0:
                self.fail(_join(path, "median"), "the median of a lognormal law cannot be 0",
                          keys["median"][1], expected="a median other than 0")
                return None
        if rule in ("signed", "nonnegative"):
            # keep the sign of the centre, so that a spread never flips a value over 0
            if center > 0:
                low, low_open = max(low, 0.0), True
            elif center < 0:
                high, high_open = min(high, 0.0), True
        return Dist(kind, center, sd, low, high, low_open, high_open, span)

    def int_dist(self, key: yaml.Node | None, node: yaml.Node, path: str) -> IntDist | None:
        """A count: a whole number, or {mean, sd, min, max} (a rounded, truncated normal)."""
        self.record(path, key, node)
        span = self.span(node)
        if not isinstance(node, yaml.MappingNode):
            n = self.integer(node, path)
            if n is None:
                return None
            if n < 1:
                self.fail(path, f"must be at least 1, got {n}", node, expected="a whole number >= 1")
                return None
            return IntDist("fixed", float(n), 0.0, n, n, span)
        keys = self.mapping(node, path, ("mean", "sd"), ("min", "max"), "a count distribution")
        if keys is None:
            return None
        mean = self.bounded(keys["mean"][1], _join(path, "mean"), "number", "positive") \
            if "mean" in keys else None
        sd = self.bounded(keys["sd"][1], _join(path, "sd"), "number", "nonnegative") \
            if "sd" in keys else None
        lo = self.integer(keys["min"][1], _join(path, "min")) if "min" in keys else 1
        hi = self.integer(keys["max"][1], _join(path, "max")) if "max" in keys else None
        if mean is None or sd is None or lo is None or ("max" in keys and hi is None):
            return None
        if lo < 1:
            self.fail(_join(path, "min"), f"must be at least 1, got {lo}", keys["min"][1],
                      expected="a whole number >= 1")
            return None
        if hi is not None and hi < lo:
            self.fail(_join(path, "max"), f"max {hi} is below min {lo}", keys["max"][1],
                      expected=f"a whole number >= {lo}")
            return None
        if mean < lo - 0.5 or (hi is not None and mean > hi + 0.5):
            top = "" if hi is None else f" and {hi}"
            self.fail(_join(path, "mean"), f"mean {mean:g} lies outside min {lo}{top}",
                      keys["mean"][1], expected="a mean between min and max")
            return None
        return IntDist("normal", mean, sd, lo, hi, span)

    # -- sections --------------------------------------------------------------------
    def read(self, root: yaml.Node) -> dict | None:
        self.check_tags(root)
        if self.c.errors:
            return None
        top = self.mapping(root, "", ("name", "space", "bath", "release_law", "receptors",
                                      "classes", "pathways"), ("note", "species", "age"), "a circuit mapping")
        if top is None:
            return None
        for key, (k, v) in top.items():
            self.record(key, k, v)
        name = self.text(top["name"][1], "name") if "name" in top else None
        note = self.text(top["note"][1], "note") if "note" in top else ""
        species = self.text(top["species"][1], "species") if "species" in top else None
        age = self.text(top["age"][1], "age") if "age" in top else None
        space = self.read_space(top["space"][1]) if "space" in top else None
        bath = self.read_bath(top["bath"][1]) if "bath" in top else None
        release = self.read_release_law(top["release_law"][1]) if "release_law" in top else None
        bath_temperature = bath.temperature if bath is not None else DEFAULT_BATH_TEMPERATURE
        receptors, receptor_names = self.read_receptors(top["receptors"][1], bath_temperature) \
            if "receptors" in top else ({}, [])
        classes, class_names = self.read_classes(top["classes"][1], space) \
            if "classes" in top else ({}, [])
        pathways = self.read_pathways(top["pathways"][1], class_names, receptor_names) \
            if "pathways" in top else []
        if self.c.errors or None in (name, note, space, bath, release):
            return None
        return dict(name=name, note=note, extent=space[0], layers=space[1], bath=bath,
                    release=release, receptors=receptors, classes=classes,
                    pathways={p.name: p for p in pathways}, species=species, age=age)

    def read_space(self, node: yaml.Node) -> tuple | None:
        keys = self.mapping(node, "space", ("x", "y", "layers"))
        if keys is None:
            return None
        extent = []
        for axis in ("x", "y"):
            if axis in keys:
                self.record(f"space.{axis}", *keys[axis])
                extent.append(self.bounded(keys[axis][1], f"space.{axis}", "length", "positive"))
        layers: dict[str, Layer] = {}
        ok = True
        if "layers" in keys:
            entries = self.named_entries(keys["layers"][1], "space.layers", "layer")
            self.layer_names = [e[0] for e in entries or []]
            for name, k, v in entries or []:
                path = f"space.layers.{name}"
                self.record(path, k, v)
                lk = self.mapping(v, path, ("top", "bottom"))
                if lk is None or len(lk) < 2:
                    ok = False
                    continue
                self.record(path + ".top", *lk["top"])
                self.record(path + ".bottom", *lk["bottom"])
                top = self.bounded(lk["top"][1], path + ".top", "length", "nonnegative")
                bottom = self.bounded(lk["bottom"][1], path + ".bottom", "length", "positive")
                if top is None or bottom is None:
                    ok = False
                    continue
                if bottom <= top:
                    self.fail(path + ".bottom", f"bottom ({_show(bottom, 'length')}) must lie "
                              f"below top ({_show(top, 'length')})", lk["bottom"][1],
                              expected="depth measured downwards: bottom > top")
                    ok = False
                    continue
                for other in layers.values():
                    if top < other.bottom and other.top < bottom:
                        self.fail(path, f"layer {name!r} overlaps layer {other.name!r}", k,
                                  expected="layers that do not overlap in depth")
                        ok = False
                layers[name] = Layer(name, top, bottom, self.span(k))
            if entries is None:
                ok = False
        if len(extent) < 2 or None in extent or not ok or "layers" not in keys:
            return (None, layers) if layers else None
        return (extent[0], extent[1]), layers

    def read_bath(self, node: yaml.Node) -> Bath | None:
        keys = self.mapping(node, "bath", ("calcium", "magnesium"), ("temperature",))
        if keys is None:
            return None
        vals = {}
        for ion in ("calcium", "magnesium"):
            if ion in keys:
                self.record(f"bath.{ion}", *keys[ion])
                vals[ion] = self.bounded(keys[ion][1], f"bath.{ion}", "concentration",
                                         "nonnegative")
        temperature = DEFAULT_BATH_TEMPERATURE
        if "temperature" in keys:
            self.record("bath.temperature", *keys["temperature"])
            temperature = self.temperature_value(keys["temperature"][1], "bath.temperature")
        if len(vals) < 2 or None in vals.values() or temperature is None:
            return None
        return Bath(vals["calcium"], vals["magnesium"], self.span(node), temperature)

    def temperature_value(self, node: yaml.Node, path: str) -> float | None:
        """A temperature in kelvin, within the range a slice protocol can mean (0-45 degC)."""
        value = self.quantity(node, path, "temperature")
        if value is None:
            return None
        low, high = _TEMPERATURE_RANGE
        if not low <= value <= high:
            self.fail(path, f"temperature {_show(value, 'temperature')} is outside 0 to 45 degC",
                      node, expected="a temperature such as 34 degC",
                      hint="write temperatures in degC, e.g. '34 degC'")
            return None
        return value

    def read_temperature(self, node: yaml.Node, path: str, reference: float,
                         q10_defaults: dict[str, float]) -> Temperature | None:
        """A ``temperature`` mapping: ``reference`` and Q10 values (defaults where left out).

        A Q10 without ``reference`` is refused: it would silently be counted from the
        default reference temperature.
        """
        keys = self.mapping(node, path, (), ("reference",) + tuple(q10_defaults),
                            "a temperature mapping")
        if keys is None:
            return None
        for key, (kn, vn) in keys.items():
            self.record(f"{path}.{key}", kn, vn)
        q10 = dict(q10_defaults)
        ok = True
        for key in q10_defaults:
            if key in keys:
                value = self.bounded(keys[key][1], f"{path}.{key}", "number", "positive")
                if value is None:
                    ok = False
                else:
                    q10[key] = value
        given = [k for k in q10_defaults if k in keys]
        if "reference" in keys:
            value = self.temperature_value(keys["reference"][1], f"{path}.reference")
            if value is None:
                return None
            reference = value
        elif given:
            first = keys[given[0]][0]
            self.fail(f"{path}.{given[0]}", f"{given[0]} is given without the reference "
                      f"temperature it is counted from", first,
                      expected="a 'reference' temperature beside every Q10, e.g. "
                               "{reference: 36 degC, " + f"{given[0]}: 3" + "}",
                      hint=f"add 'reference: {_show(reference, 'temperature')}' if the rates "
                           f"hold at that temperature")
            return None
        if not ok:
            return None
        return Temperature(reference, q10, True, self.span(node))

    def read_release_law(self, node: yaml.Node) -> ReleaseLaw | None:
        keys = self.mapping(node, "release_law", ("reference_calcium", "half_activation"),
                            ("hill_coefficient",))
        if keys is None:
            return None
        vals = {}
        for key, dim in (("reference_calcium", "concentration"),
                         ("half_activation", "concentration"), ("hill_coefficient", "number")):
            if key in keys:
                self.record(f"release_law.{key}", *keys[key])
                vals[key] = self.bounded(keys[key][1], f"release_law.{key}", dim, "positive")
        vals.setdefault("hill_coefficient", DEFAULT_HILL)
        if len(vals) < 3 or None in vals.values():
            return None
        return ReleaseLaw(vals["reference_calcium"], vals["half_activation"],
                          vals["hill_coefficient"], self.span(node))

    def read_receptors(self, node: yaml.Node,
                       bath_temperature: float) -> tuple[dict[str, Receptor], list[str]]:
        entries = self.named_entries(node, "receptors", "receptor")
        out: dict[str, Receptor] = {}
        names = [e[0] for e in entries or []]
        for name, k, v in entries or []:
            path = f"receptors.{name}"
            self.record(path, k, v)
            keys = self.mapping(v, path, ("rise", "decay", "reversal"),
                                ("magnesium_block", "temperature"))
            if keys is None:
                continue
            # without a temperature section the kinetics hold at the circuit's own bath
            temperature: Temperature | None = Temperature(bath_temperature, {"q10": RECEPTOR_Q10},
                                                          False)
            if "temperature" in keys:
                self.record(f"{path}.temperature", *keys["temperature"])
                temperature = self.read_temperature(keys["temperature"][1], f"{path}.temperature",
                                                    bath_temperature, {"q10": RECEPTOR_Q10})
            vals: dict[str, Any] = {}
            for key, dim, rule in (("rise", "time", "positive"), ("decay", "time", "positive"),
                                   ("reversal", "voltage", "signed")):
                if key in keys:
                    self.record(f"{path}.{key}", *keys[key])
                    vals[key] = self.bounded(keys[key][1], f"{path}.{key}", dim, rule)
            block = False
            if "magnesium_block" in keys:
                self.record(f"{path}.magnesium_block", *keys["magnesium_block"])
                block = self.flag(keys["magnesium_block"][1], f"{path}.magnesium_block")
            if len(vals) < 3 or None in vals.values() or block is None or temperature is None:
                continue
            if vals["decay"] <= vals["rise"]:
                self.fail(f"{path}.decay", f"decay ({_show(vals['decay'], 'time')}) must be "
                          f"longer than rise ({_show(vals['rise'], 'time')})", keys["decay"][1],
                          expected="decay > rise (difference of exponentials)")
                continue
            out[name] = Receptor(name, vals["rise"], vals["decay"], vals["reversal"], block,
                                 self.span(k), temperature)
        return out, names

    def read_classes(self, node: yaml.Node, space: tuple | None) -> tuple[dict, list[str]]:
        entries = self.named_entries(node, "classes", "cell class")
        layers = space[1] if space else {}
        out: dict[str, CellClass] = {}
        names = [e[0] for e in entries or []]
        for name, k, v in entries or []:
            cls = self.read_class(name, k, v, layers, space)
            if cls is not None:
                out[name] = cls
        return out, names

    def read_class(self, name: str, k: yaml.Node, v: yaml.Node, layers: dict[str, Layer],
                   space: tuple | None) -> CellClass | None:
        path = f"classes.{name}"
        self.record(path, k, v)
        keys = self.mapping(v, path, ("layer", "model", "parameters"),
                            ("count", "density_per_mm3", "note", "temperature"))
        if keys is None:
            return None
        for key, (kn, vn) in keys.items():
            self.record(f"{path}.{key}", kn, vn)
        layer = self.text(keys["layer"][1], f"{path}.layer") if "layer" in keys else None
        if layer is not None and layer not in self.layer_names and "space" in self.spans:
            self.fail(f"{path}.layer", f"unknown layer {layer!r}", keys["layer"][1],
                      expected="a layer of space.layers: " + ", ".join(self.layer_names),
                      hint=suggest(layer, self.layer_names))
            layer = None
        elif layer not in layers:
            layer = None   # the layer itself is broken and already reported
        if "note" in keys:
            self.text(keys["note"][1], f"{path}.note")
        count = self.read_count(path, keys, layers.get(layer) if layer else None, space, v)
        model = self.text(keys["model"][1], f"{path}.model") if "model" in keys else None
        if model is not None and model not in MODELS:
            self.fail(f"{path}.model", f"unknown cell model {model!r}", keys["model"][1],
                      expected="one of " + "; ".join(f"{m} ({_MODEL_WORDS[m]})" for m in MODELS),
                      hint=suggest(model, MODELS))
            model = None
        params = None
        if "parameters" in keys and model == "adex":
            params = self.read_adex(keys["parameters"], f"{path}.parameters")
        elif "parameters" in keys and model is not None:
            params = self.read_hh(keys["parameters"], f"{path}.parameters", model)
        temperature: Temperature | None = None
        temperature_ok = True
        if model is not None and model != "adex":
            reference, q10 = TEMPERATURE_DEFAULTS[model]
            temperature = Temperature(reference, dict(q10), False)
            if "temperature" in keys:
                temperature = self.read_temperature(keys["temperature"][1], f"{path}.temperature",
                                                    reference, q10)
                temperature_ok = temperature is not None
        elif model == "adex" and "temperature" in keys:
            self.fail(f"{path}.temperature", "adex cells take no temperature section",
                      keys["temperature"][0],
                      expected="a temperature section only for hh_cortical and hh_squid classes",
                      hint="remove it: the fitted AdEx parameters hold at the temperature they "
                           "were fitted at")
            temperature_ok = False
        density = None
        if "density_per_mm3" in keys and count is not None:
            density = count[1]
        if None in (layer, model, params, count) or not temperature_ok:
            return None
        return CellClass(name, layer, count[0], model, params, density, self.span(k), temperature)

    def read_count(self, path: str, keys: dict, layer: Layer | None, space: tuple | None,
                   node: yaml.Node) -> tuple[int, float | None] | None:
        if ("count" in keys) == ("density_per_mm3" in keys):
            where = keys["density_per_mm3"][0] if "count" in keys else node
            self.fail(path, "give exactly one of 'count' and 'density_per_mm3'", where,
                      expected="count: N (cells) or density_per_mm3: D (cells per mm^3)")
            return None
        if "count" in keys:
            n = self.integer(keys["count"][1], f"{path}.count")
            if n is None:
                return None
            if n < 1:
                self.fail(f"{path}.count", f"must be at least 1, got {n}", keys["count"][1],
                          expected="a whole number of cells >= 1")
                return None
            return n, None
        dnode = keys["density_per_mm3"][1]
        density = self.bounded(dnode, f"{path}.density_per_mm3", "number", "positive")
        if density is None or layer is None or space is None or space[0] is None:
            return None
        volume_mm3 = space[0][0] * space[0][1] * (layer.bottom - layer.top) * 1e9
        n = int(round(density * volume_mm3))
        if n < 1:
            self.fail(f"{path}.density_per_mm3", f"density {density:g} per mm^3 gives no cell in "
                      f"layer {layer.name!r} ({volume_mm3:.4g} mm^3)", dnode,
                      expected="a density that gives at least 1 cell")
            return None
        return n, density

    def read_adex(self, entry: tuple, path: str) -> dict[str, Dist] | None:
        keys = self.mapping(entry[1], path, tuple(ADEX_PARAMETERS), (), "a mapping of parameters")
        if keys is None:
            return None
        out: dict[str, Dist] = {}
        for key, (engine, dim, rule) in ADEX_PARAMETERS.items():
            if key in keys:
                d = self.dist(keys[key][0], keys[key][1], f"{path}.{key}", dim, rule)
                if d is not None:
                    out[engine] = d
        if len(out) < len(ADEX_PARAMETERS):
            return None
        # central values must describe a cell that rests, spikes and resets below the cut
        vcut = out["Vcut"]
        for engine, word in (("VT", "V_T"), ("Vr", "V_reset"), ("EL", "E_leak")):
            if out[engine].center >= vcut.center:
                self.fail(f"{path}.{word}", f"{word} ({_show(out[engine].center, 'voltage')}) "
                          f"must lie below V_cut ({_show(vcut.center, 'voltage')})",
                          keys[word][1], expected="V_T, V_reset, E_leak < V_cut")
                return None
        if out["EL"].center >= out["VT"].center:
            self.fail(f"{path}.E_leak", f"E_leak ({_show(out['EL'].center, 'voltage')}) must lie "
                      f"below V_T ({_show(out['VT'].center, 'voltage')})", keys["E_leak"][1],
                      expected="a resting potential below the spike threshold")
            return None
        return out

    def read_hh(self, entry: tuple, path: str, model: str) -> dict[str, Dist] | None:
        """Parameters of a Hodgkin-Huxley class; optional keys take :data:`HH_DEFAULTS`."""
        table = MODEL_PARAMETERS[model]
        defaults = HH_DEFAULTS[model]
        required = tuple(k for k in table if k not in defaults)
        optional = tuple(k for k in table if k in defaults)
        keys = self.mapping(entry[1], path, required, optional, "a mapping of parameters")
        if keys is None:
            return None
        out: dict[str, Dist] = {}
        for key, (engine, dim, rule) in table.items():
            if key in keys:
                d = self.dist(keys[key][0], keys[key][1], f"{path}.{key}", dim, rule)
                if d is not None:
                    out[engine] = d
            elif key in defaults:
                low, high, low_open, high_open = _rule_bounds(rule)
                out[engine] = Dist("fixed", defaults[key], 0.0, low, high, low_open, high_open)
        if len(out) < len(table):
            return None
        # the sodium reversal must lie above the potassium one, or no spike can form
        if out["ENa"].center <= out["EK"].center:
            self.fail(f"{path}.E_Na", f"E_Na ({_show(out['ENa'].center, 'voltage')}) must lie "
                      f"above E_K ({_show(out['EK'].center, 'voltage')})", keys["E_Na"][1],
                      expected="E_Na > E_K (e.g. 50 mV and -100 mV)")
            return None
        return out

    def read_pathways(self, node: yaml.Node, class_names: list[str],
                      receptor_names: list[str]) -> list[Pathway]:
        if not isinstance(node, yaml.SequenceNode):
            self.fail("pathways", f"expected a list of pathways, got {_kind(node)}", node,
                      expected="'- pre: ...' entries")
            return []
        out: list[Pathway] = []
        first: dict[tuple[str, str], int] = {}
        for i, item in enumerate(node.value):
            path = f"pathways[{i}]"
            self.record(path, None, item)
            p = self.read_pathway(i, item, path, class_names, receptor_names)
            if p is None:
                continue
            pair = (p.pre, p.post)
            if pair in first:
                self.fail(path, f"a second pathway {p.name!r} (first given on line {first[pair]})",
                          item, expected="one pathway per pair of classes",
                          hint="merge the two entries")
                continue
            first[pair] = item.start_mark.line + 1
            out.append(p)
        return out

    def read_pathway(self, index: int, node: yaml.Node, path: str, class_names: list[str],
                     receptor_names: list[str]) -> Pathway | None:
        keys = self.mapping(node, path, ("pre", "post", "connection", "sites", "site_conductance",
                                         "receptors", "release", "conduction"), ("note",),
                            "a pathway mapping")
        if keys is None:
            return None
        for key, (kn, vn) in keys.items():
            self.record(f"{path}.{key}", kn, vn)
        ends = {}
        for end in ("pre", "post"):
            if end not in keys:
                continue
            name = self.text(keys[end][1], f"{path}.{end}")
            if name is not None and name not in class_names:
                self.fail(f"{path}.{end}", f"unknown cell class {name!r}", keys[end][1],
                          expected="a class of this file: " + ", ".join(class_names),
                          hint=suggest(name, class_names))
                name = None
            ends[end] = name
        if "note" in keys:
            self.text(keys["note"][1], f"{path}.note")
        conn = self.read_connection(keys["connection"], f"{path}.connection") \
            if "connection" in keys else None
        sites = self.int_dist(*keys["sites"], f"{path}.sites") if "sites" in keys else None
        g = self.dist(*keys["site_conductance"], f"{path}.site_conductance", "conductance",
                      "positive") if "site_conductance" in keys else None
        receptors = self.read_weights(keys["receptors"][1], f"{path}.receptors", receptor_names) \
            if "receptors" in keys else None
        dyn = self.read_dynamics(keys["release"][1], f"{path}.release") \
            if "release" in keys else None
        cond = self.read_conduction(keys["conduction"][1], f"{path}.conduction") \
            if "conduction" in keys else None
        if None in (ends.get("pre"), ends.get("post"), conn, sites, g, receptors, dyn, cond):
            return None
        return Pathway(index, ends["pre"], ends["post"], conn[0], conn[1], conn[2], sites, g,
                       receptors, dyn["U"], dyn["D"], dyn["F"], cond[0], cond[1], self.span(node))

    def read_connection(self, entry: tuple, path: str) -> tuple | None:
        keys = self.mapping(entry[1], path, ("peak_probability", "length_constant",
                                             "max_distance"))
        if keys is None:
            return None
        vals = {}
        for key, dim, rule in (("peak_probability", "number", "probability"),
                               ("length_constant", "length", "positive"),
                               ("max_distance", "length", "positive")):
            if key in keys:
                self.record(f"{path}.{key}", *keys[key])
                vals[key] = self.bounded(keys[key][1], f"{path}.{key}", dim, rule)
        if len(vals) < 3 or None in vals.values():
            return None
        return vals["peak_probability"], vals["length_constant"], vals["max_distance"]

    def read_weights(self, node: yaml.Node, path: str, receptor_names: list[str]) -> dict | None:
        entries = self.named_entries(node, path, "receptor")
        if entries is None:
            return None
        out: dict[str, float] = {}
        ok = True
        for name, k, v in entries:
            sub = f"{path}.{name}"
            self.record(sub, k, v)
            if name not in receptor_names:
                self.fail(sub, f"unknown receptor {name!r}", k,
                          expected="a receptor of this file: " + ", ".join(receptor_names),
                          hint=suggest(name, receptor_names))
                ok = False
                continue
            w = self.bounded(v, sub, "number", "nonnegative")
            if w is None:
                ok = False
                continue
            out[name] = w
        if ok and out and not any(out.values()):
            self.fail(path, "every receptor weight is 0", node,
                      expected="at least one receptor with a weight above 0")
            return None
        return out if ok and out else None

    def read_dynamics(self, node: yaml.Node, path: str) -> dict | None:
        keys = self.mapping(node, path, ("U", "D", "F"), (), "a mapping of U, D, F")
        if keys is None:
            return None
        out = {}
        for key, dim, rule in (("U", "number", "probability"), ("D", "time", "positive"),
                               ("F", "time", "nonnegative")):
            if key in keys:
                out[key] = self.dist(keys[key][0], keys[key][1], f"{path}.{key}", dim, rule)
        if len(out) < 3 or None in out.values():
            return None
        return out

    def read_conduction(self, node: yaml.Node, path: str) -> tuple | None:
        keys = self.mapping(node, path, ("latency", "velocity"))
        if keys is None:
            return None
        vals = {}
        for key, dim, rule in (("latency", "time", "nonnegative"),
                               ("velocity", "velocity", "positive")):
            if key in keys:
                self.record(f"{path}.{key}", *keys[key])
                vals[key] = self.bounded(keys[key][1], f"{path}.{key}", dim, rule)
        if len(vals) < 2 or None in vals.values():
            return None
        return vals["latency"], vals["velocity"]


# --- helpers ------------------------------------------------------------------------
def _join(path: str, key: str) -> str:
    return f"{path}.{key}" if path else key


def _kind(node: yaml.Node) -> str:
    if isinstance(node, yaml.MappingNode):
        return "a mapping"
    if isinstance(node, yaml.SequenceNode):
        return "a list"
    if node.tag.endswith(":null"):
        return "nothing"
    return f"the value {node.value!r}"


def _rule_bounds(rule: str) -> tuple[float, float, bool, bool]:
    if rule == "positive":
        return 0.0, math.inf, True, False
    if rule == "nonnegative":
        return 0.0, math.inf, False, False
    if rule == "probability":
        return 0.0, 1.0, False, False
    return -math.inf, math.inf, False, False


def _rule_ok(value: float, rule: str) -> bool:
    low, high, low_open, high_open = _rule_bounds(rule)
    return (value > low if low_open else value >= low) and \
        (value < high if high_open else value <= high)


def _show(value_si: float, dimension: str) -> str:
    if dimension == "number":
        return f"{value_si:g}"
    if dimension == "temperature":   # kelvin inside, degC for people
        return f"{value_si - 273.15:.4g} degC"
    unit = DISPLAY[dimension]
    return f"{value_si / UNITS[unit][1]:g} {unit}"
