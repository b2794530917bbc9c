"""Protocol AST: frozen node classes built by the parser, each with a source span.

Numbers stay as :class:`~protolang.language.units.Quantity` (value + unit as written);
dimension checks happen in the lowering step (``parser.py``) and name checks against the
circuit happen in ``protolang.plan.check``. Spans are excluded from equality so two
protocols that differ only in layout compare equal.
"""

from __future__ import annotations

from dataclasses import dataclass, field

from .errors import Span
from .units import Quantity


def _span():
    # A fresh Field per use: one shared Field object would be renamed by every class
    # that uses it, leaving each node with a single field called "circuit_span".
    return field(default=None, compare=False, repr=False)


def node(cls):
    return dataclass(frozen=True, slots=True, kw_only=True)(cls)


# --- bath ---------------------------------------------------------------------------
@node
class BathSetting:
    """``calcium 2.0 mM`` / ``magnesium 1 mM``."""
    name: str
    value: Quantity
    span: Span | None = _span()


@node
class ReceptorBlock:
    """``block NMDA`` (complete) or ``block GABA_A 60 %`` (fraction of conductance removed)."""
    receptor: str
    fraction: Quantity | None = None
    span: Span | None = _span()


# --- cells --------------------------------------------------------------------------
@node
class Within:
    """``within 150 um of pre``: soma-to-soma distance bound."""
    distance: Quantity
    of: str
    span: Span | None = _span()


@node
class ReceivingFrom:
    """``receiving from pre``: the circuit has a connection pre -> this cell."""
    source: str
    span: Span | None = _span()


@node
class CellPick:
    """``post is pyramidal_deep within 150 um of pre, receiving from pre``."""
    name: str
    cell_class: str
    constraints: tuple = ()
    span: Span | None = _span()
    class_span: Span | None = _span()


@node
class PatchPick:
    """``patch is 8 of pyramidal_deep within 100 um``: a multi-cell patch of ``count`` cells of one
    class, each within ``radius`` of the first; its cells are ``<name>_1`` ... ``<name>_<count>``
    (:func:`protolang.language.patch.expand_patches`)."""
    name: str
    count: int
    cell_class: str
    radius: Quantity
    span: Span | None = _span()
    class_span: Span | None = _span()

    @property
    def members(self) -> tuple[str, ...]:
        return tuple(f"{self.name}_{k}" for k in range(1, self.count + 1))


@node
class Cells:
    picks: tuple[CellPick, ...]
    repeat: int = 1
    # the patches a protocol had before its patches were expanded into single cells
    patches: tuple[PatchPick, ...] = field(default=(), compare=False, repr=False)
    repeat_span: Span | None = _span()
    span: Span | None = _span()


# --- lesions ------------------------------------------------------------------------
@node
class InLayer:
    """``in layer deep``: cells whose soma lies in a layer of the circuit."""
    layer: str
    span: Span | None = _span()


@node
class Remove:
    """``remove [F of] CLASS [in layer L] [within D of CELL]``: cells taken out of the circuit.

    ``cell_class`` is a class name or ``"all"`` (every class); ``fraction`` None removes every
    matching cell.
    """
    cell_class: str
    fraction: Quantity | None = None
    places: tuple = ()          # InLayer / Within, all must hold
    span: Span | None = _span()
    class_span: Span | None = _span()


@node
class Cut:
    """``cut PRE -> POST``: every connection of the pathway removed."""
    pre: str
    post: str
    span: Span | None = _span()


@node
class Silence:
    """``silence CLASS``: the class's cells stay in the circuit and receive input but cannot fire."""
    cell_class: str
    span: Span | None = _span()


@node
class ScalePathway:
    """``scale PRE -> POST by 50 %``: every connection's conductance multiplied."""
    pre: str
    post: str
    factor: Quantity
    span: Span | None = _span()


# --- network (embedded mode) ------------------------------------------------------------
@node
class Region:
    """One ``region`` line: ``all`` or places (InLayer / Within) that must all hold."""
    everything: bool = False
    places: tuple = ()
    span: Span | None = _span()


@node
class Background:
    """``background poisson R of G RECEPTOR onto ...`` or ``background noise mean M sd S tau T
    [reversal E] onto ...``: ongoing drive of every simulated cell of the listed classes."""
    kind: str                                  # "poisson" | "noise"
    classes: tuple[str, ...]
    rate: Quantity | None = None
    conductance: Quantity | None = None
    receptor: str | None = None
    mean: Quantity | None = None
    sd: Quantity | None = None
    tau: Quantity | None = None
    reversal: Quantity | None = None
    span: Span | None = _span()
    class_spans: tuple = field(default=(), compare=False, repr=False)
    receptor_span: Span | None = _span()


@node
class Network:
    """The ``network:`` block: the recorded cells are simulated inside this subcircuit."""
    regions: tuple[Region, ...]
    background: tuple[Background, ...] = ()
    span: Span | None = _span()


# --- sweeps and simulation settings -------------------------------------------------
@node
class Sweeps:
    """``sweeps 30 every 10 s`` with optional ``lasting 1.2 s``."""
    count: int
    interval: Quantity
    length: Quantity | None = None
    span: Span | None = _span()


@node
class Setting:
    """One option of ``simulate``: ``isolated``, ``timestep 0.025 ms``, ``sampling 10 kHz``."""
    name: str
    value: Quantity | str | None = None
    span: Span | None = _span()


# --- recording ------------------------------------------------------------------------
@node
class Recording:
    """``record post: current clamp, holding -70 mV, noise 0.1 mV``.

    ``mode`` is ``"current clamp"``, ``"voltage clamp"`` or ``"off"``. In current clamp
    ``holding`` is a current (injected) or a voltage (reached by a bias current computed
    from the cell model) and ``noise`` a voltage; in voltage clamp ``holding`` is the
    command potential (required), ``noise`` a current and ``series`` the series
    resistance (None: the documented default).
    """
    cell: str
    mode: str
    holding: Quantity | None = None
    noise: Quantity | None = None
    series: Quantity | None = None
    span: Span | None = _span()


# --- stimuli --------------------------------------------------------------------------
@node
class Pulse:
    """``pulse 1.5 nA for 2 ms at 100 ms``."""
    amplitude: Quantity
    duration: Quantity
    at: Quantity
    span: Span | None = _span()


@node
class Train:
    """``train 8 pulses of 1.5 nA for 2 ms at 20 Hz from 100 ms``."""
    count: int
    amplitude: Quantity
    duration: Quantity
    rate: Quantity
    start: Quantity
    span: Span | None = _span()


@node
class SpikeTimes:
    """``spikes at 100 ms, 150 ms, 600 ms``: the cell is made to fire at these times."""
    times: tuple[Quantity, ...]
    span: Span | None = _span()


@node
class Step:
    """``step 200 pA for 500 ms at 100 ms``: one square step of current (or of command
    voltage, relative to the holding potential, on a voltage-clamped cell)."""
    amplitude: Quantity
    duration: Quantity
    at: Quantity
    span: Span | None = _span()


@node
class StepFamily:
    """``steps of -100 pA to 300 pA by 50 pA for 500 ms at 100 ms`` (``step`` set) or
    ``... in 9 steps ...`` (``count`` set): sweep k gets ``values[k]``.

    ``values`` are the amplitudes in sweep order, in the unit of ``start``; empty while a
    bound is still a scan reference (each scan point fills them in).
    """
    start: Quantity
    stop: Quantity
    step: Quantity | None = None
    count: int | None = None
    duration: Quantity
    at: Quantity
    values: tuple[Quantity, ...] = ()
    span: Span | None = _span()


@node
class Ramp:
    """``ramp 0 pA to 300 pA from 100 ms to 1100 ms``: a linear ramp between two times."""
    start_amplitude: Quantity
    stop_amplitude: Quantity
    start: Quantity
    stop: Quantity
    span: Span | None = _span()


@node
class Sine:
    """``sine 50 pA at 5 Hz from 0 s to 2 s, offset 20 pA``."""
    amplitude: Quantity
    frequency: Quantity
    start: Quantity
    stop: Quantity
    offset: Quantity | None = None
    span: Span | None = _span()


@node
class Chirp:
    """``chirp 50 pA sweeping 0.5 Hz to 20 Hz from 0 s to 10 s``: a sine whose frequency
    rises linearly from ``f_start`` at ``start`` to ``f_stop`` at ``stop``."""
    amplitude: Quantity
    f_start: Quantity
    f_stop: Quantity
    start: Quantity
    stop: Quantity
    span: Span | None = _span()


@node
class Noise:
    """``noise mean 0 pA sd 50 pA tau 5 ms from 0 s to 2 s``: an Ornstein-Uhlenbeck current,
    or a conductance (``mean``/``sd`` in siemens) driving towards ``reversal``."""
    mean: Quantity
    sd: Quantity
    tau: Quantity
    start: Quantity
    stop: Quantity
    reversal: Quantity | None = None
    span: Span | None = _span()


@node
class PoissonInput:
    """``poisson 500 Hz of 0.5 nS AMPA from 0 s to 2 s``: Poisson spikes at total ``rate``,
    each opening ``receptor`` with peak conductance ``conductance``."""
    rate: Quantity
    conductance: Quantity
    receptor: str
    start: Quantity
    stop: Quantity
    span: Span | None = _span()
    receptor_span: Span | None = _span()


@node
class Activate:
    """``activate 30 % of basket_fast at 100 ms, 150 ms``: extracellular stimulation that
    makes ``fraction`` of the ``cell_class`` cells projecting to this cell fire at ``times``."""
    fraction: Quantity
    cell_class: str
    times: tuple[Quantity, ...]
    span: Span | None = _span()
    class_span: Span | None = _span()


@node
class Stimulate:
    """``stimulate CELL:`` with its stimuli; on a patch, ``turn`` spaces its cells' turns."""
    cell: str
    items: tuple
    span: Span | None = _span()
    turn: Quantity | None = None


# --- measures -------------------------------------------------------------------------
@node
class Option:
    """``window 40 ms`` inside a measure line."""
    name: str
    value: Quantity
    span: Span | None = _span()


@node
class MeasureItem:
    """``responses to pre, window 40 ms``: a collector, an optional source cell, options."""
    collector: str
    source: str | None = None
    options: tuple[Option, ...] = ()
    span: Span | None = _span()
    source_span: Span | None = _span()


@node
class Measure:
    cell: str
    items: tuple[MeasureItem, ...]
    span: Span | None = _span()


# --- references: published values -----------------------------------------------------
@node
class ReferenceCondition:
    """``temperature 32 degC to 34 degC``, ``calcium 2 mM``, ``species rat``, ``age "P14-16"``."""
    name: str
    low: Quantity | str            # a quantity for bath conditions, text for species and age
    high: Quantity | None = None   # the top of a range (numbers only)
    span: Span | None = _span()


@node
class Reference:
    """``reference amplitude of post from pre:``: a published value of one measure, its conditions,
    its source and the rule by which the model agrees with it.

    ``rule`` is "sd" (``tolerance`` = k, a plain number of published SDs), "relative" (``tolerance``
    in %), "absolute" (``tolerance`` in the measure's unit) or "range" (inside ``low``..``high``).
    """
    measure: str
    cell: str
    source_cell: str | None
    value: Quantity | None
    sd: Quantity | None
    low: Quantity | None
    high: Quantity | None
    n: int | None
    authors: str
    year: int
    journal: str
    rule: str
    tolerance: Quantity | None
    conditions: tuple[ReferenceCondition, ...] = ()
    accepted: tuple[str, ...] = ()
    from_memory: bool = False
    note: str | None = None
    span: Span | None = _span()
    measure_span: Span | None = _span()
    cell_span: Span | None = _span()
    source_span: Span | None = _span()


# --- scans ----------------------------------------------------------------------------
@node
class ScanRef:
    """``@amp`` in a quantity slot: the value of a scan, one per run point."""
    name: str
    span: Span | None = _span()


@node
class Scan:
    """``scan @amp: 50 pA to 500 pA in 10 steps`` (form "range"), ``... by 50 pA`` ("step")
    or ``1 mM, 1.5 mM, 2 mM`` ("list"). ``values`` are the points, in order."""
    name: str
    form: str
    values: tuple[Quantity, ...]
    start: Quantity | None = None
    stop: Quantity | None = None
    steps: int | None = None
    step: Quantity | None = None
    span: Span | None = _span()


@node
class ScanPoint:
    """One point of the scan grid: the values taken and the protocol with them filled in."""
    values: tuple  # ((name, Quantity), ...) in scan order
    protocol: "Protocol"


# --- the whole protocol ---------------------------------------------------------------
@node
class Protocol:
    title: str
    circuit: str
    seed: int
    sweeps: Sweeps
    cells: Cells
    bath: tuple = ()
    settings: tuple[Setting, ...] = ()
    recordings: tuple[Recording, ...] = ()
    stimuli: tuple[Stimulate, ...] = ()
    measures: tuple[Measure, ...] = ()
    scans: tuple[Scan, ...] = ()
    lesions: tuple = ()
    network: Network | None = None
    references: tuple[Reference, ...] = ()
    points: tuple[ScanPoint, ...] = field(default=(), compare=False, repr=False)
    file: str = field(default="<string>", compare=False)
    span: Span | None = _span()
    circuit_span: Span | None = _span()


def dump(obj, indent: int = 0) -> str:
    """A stable, readable dump of an AST (``protolang parse --dump``)."""
    pad = "  " * indent
    if isinstance(obj, tuple):
        if not obj:
            return "()"
        return "\n".join(f"{pad}- " + dump(x, indent + 1).lstrip() for x in obj)
    if isinstance(obj, Quantity):
        return str(obj)
    if hasattr(obj, "__dataclass_fields__"):
        lines = [type(obj).__name__]
        for name, f in obj.__dataclass_fields__.items():
            if not f.compare or name == "file":
                continue
            value = getattr(obj, name)
            text = dump(value, indent + 2)
            if "\n" in text or (isinstance(value, tuple) and value):
                lines.append(f"{pad}  {name}:\n{text}")
            else:
                lines.append(f"{pad}  {name}: {text.strip()}")
        return "\n".join(lines)
    return repr(obj)
