"""Protocol text -> checked Protocol AST: a lark LALR parse, then a lowering pass over the tree.

The lowering pass checks units, dimensions, counts, required statements and cell names.
Every user mistake becomes a :class:`~protolang.language.errors.ProtocolError` whose
diagnostics name ``file:line:col``; lark's own exceptions never leave this module.
Syntax errors stop at the first one (the parser cannot go on sensibly), lowering
errors are collected and raised together.
"""

from __future__ import annotations

import importlib.resources
import math
import re
import threading
from dataclasses import replace
from functools import lru_cache
from pathlib import Path
from typing import Iterator, NamedTuple

from lark import Lark, Token, Transformer, v_args
from lark.exceptions import (LarkError, UnexpectedCharacters, UnexpectedInput, UnexpectedToken,
                             VisitError)
from lark.indenter import Indenter
from lark.lexer import PatternStr

from . import ast
from .errors import Collector, Diagnostic, ProtocolError, Span, remember_source, suggest
from .units import DIMENSIONS, DISPLAY, UNITS, Quantity, check_unit, expect, to_si
from ..measure.registry import COLLECTORS, REFERENCE_CONDITIONS, REFERENCE_MEASURES

__all__ = ["parse", "parse_file"]


# --- the lark parser ----------------------------------------------------------------------
class _IndentSlip(LarkError):
    """A line dedents to a column that no enclosing block uses."""

    def __init__(self, line: int, column: int, levels: list[int]) -> None:
        super().__init__(f"dedent to column {column}")
        self.line, self.column, self.levels = line, column, levels


class _GluedKeyword(LarkError):
    """A keyword the lexer matched as the start of a longer word ('stimulates', 'seed7')."""

    def __init__(self, keyword: Token, rest: Token) -> None:
        super().__init__(f"{keyword}{rest}")
        self.keyword, self.rest = keyword, rest


_WORD_CHAR = re.compile(r"[A-Za-z0-9_]")


class _Indentation(Indenter):
    NL_type = "_NL"
    OPEN_PAREN_types: list[str] = []
    CLOSE_PAREN_types: list[str] = []
    INDENT_type = "_INDENT"
    DEDENT_type = "_DEDENT"
    tab_len = 8  # only matters for pure-tab files; mixing tabs and spaces is rejected up front

    def process(self, stream):
        return super().process(self._separated(stream))

    @staticmethod
    def _separated(stream: Iterator[Token]) -> Iterator[Token]:
        # In a state that accepts only keywords the lexer has no NAME pattern to compete
        # with, so 'stimulates' would lex as 'stimulate' + 's'. Words must stand apart.
        previous = None
        for tok in stream:
            if (previous is not None and previous.type == str(previous).upper()
                    and previous.type not in _VALUE_TOKENS and tok.start_pos == previous.end_pos
                    and _WORD_CHAR.match(str(tok))):
                raise _GluedKeyword(previous, tok)
            yield tok
            previous = tok

    def handle_NL(self, token: Token) -> Iterator[Token]:
        # lark's version raises a DedentError without a position; ours keeps the line.
        yield token
        indent_str = token.rsplit("\n", 1)[1]
        indent = indent_str.count(" ") + indent_str.count("\t") * self.tab_len
        if indent > self.indent_level[-1]:
            self.indent_level.append(indent)
            yield Token.new_borrow_pos(self.INDENT_type, indent_str, token)
            return
        open_levels = list(self.indent_level)
        while indent < self.indent_level[-1]:
            self.indent_level.pop()
            yield Token.new_borrow_pos(self.DEDENT_type, indent_str, token)
        if indent != self.indent_level[-1]:
            raise _IndentSlip(token.end_line, token.end_column, open_levels)


_LAYOUT_TOKENS = frozenset({"_NL", "_INDENT", "_DEDENT"})
_VALUE_TOKENS = frozenset({"NAME", "UNIT", "NUMBER", "STRING"})


def _counts_for_position(child) -> bool:
    # Spans end at the last visible token, not at the line break or dedent after it.
    return not (isinstance(child, Token) and child.type in _LAYOUT_TOKENS)


# The cached parser's indentation post-lexer keeps per-parse state.
_PARSE_LOCK = threading.Lock()


@lru_cache(maxsize=1)
def _parser() -> Lark:
    grammar = (importlib.resources.files("protolang") / "grammar" / "protolang.lark")
    return Lark(grammar.read_text(encoding="utf-8"), parser="lalr", lexer="contextual",
                postlex=_Indentation(), propagate_positions=_counts_for_position,
                maybe_placeholders=True)


@lru_cache(maxsize=1)
def _keywords() -> dict[str, str]:
    """Terminal name -> literal text for every keyword and punctuation mark of the grammar."""
    return {t.name: t.pattern.value for t in _parser().terminals
            if isinstance(t.pattern, PatternStr)}


# --- entry points ---------------------------------------------------------------------------
def parse(text: str, file: str = "<string>") -> ast.Protocol:
    """Parse protocol text into a checked AST.

    Args:
        text: The protocol source.
        file: Name used in spans and diagnostics (the path, for a file on disk).

    Returns:
        The :class:`~protolang.language.ast.Protocol`, every node carrying its span.

    Raises:
        ProtocolError: On any syntax error (the first one) or lowering error (all of them).
    """
    remember_source(file, text)
    collector = Collector()
    _check_layout(text, file, collector)
    collector.raise_if_any()
    source = text if text.endswith("\n") else text + "\n"
    # Errors are raised outside the except blocks so that they carry no __context__: lark's
    # exceptions hold parser state that cannot be pickled (a pickler that keeps exception chains,
    # as Dask's does, would fail on them).
    syntax = None
    try:
        with _PARSE_LOCK:
            tree = _parser().parse(source)
    except UnexpectedInput as exc:
        syntax = _syntax_diagnostic(exc, text, file)
    except _IndentSlip as exc:
        syntax = _dedent_diagnostic(exc, text, file)
    except _GluedKeyword as exc:
        syntax = _glued_diagnostic(exc, file)
    if syntax is not None:
        raise ProtocolError([syntax])
    lowering = _Lowering(file, collector)
    failure = None
    try:
        protocol = lowering.transform(tree)
    except VisitError as exc:
        failure = exc.orig_exc
    if isinstance(failure, ProtocolError):
        # a user error must not show lark's frames
        failure.__context__ = None
        raise failure.with_traceback(None)
    if failure is not None:
        raise failure   # our own bug: keeps its traceback
    collector.diagnostics.sort(key=_position)
    collector.raise_if_any()
    assert isinstance(protocol, ast.Protocol), "internal error: lowering returned no protocol"
    if protocol.scans:
        protocol = replace(protocol, points=_lower_points(tree, protocol, file))
    return protocol


def _lower_points(tree, template: ast.Protocol, file: str) -> tuple[ast.ScanPoint, ...]:
    """Lower the tree once per point of the scan grid; every point is checked in full."""
    import itertools

    points = []
    errors: list = []
    seen: set = set()
    for combo in itertools.product(*(x.values for x in template.scans)):
        values = {x.name: q for x, q in zip(template.scans, combo)}
        collector = Collector()
        lowering = _Lowering(file, collector, point=values)
        try:
            protocol = lowering.transform(tree)
        except VisitError as exc:
            if isinstance(exc.orig_exc, ProtocolError):
                raise exc.orig_exc.with_traceback(None) from None
            raise exc.orig_exc from None
        where = ", ".join(f"@{k} = {q}" for k, q in values.items())
        for d in collector.errors:
            key = (d.span, d.message)
            if key not in seen:
                seen.add(key)
                errors.append(replace(d, message=f"{d.message} (at scan point {where})"))
        if not collector.errors:
            points.append(ast.ScanPoint(values=tuple(values.items()), protocol=replace(protocol, scans=())))
    if errors:
        errors.sort(key=_position)
        raise ProtocolError(errors)
    return tuple(points)


def parse_file(path: str | Path) -> ast.Protocol:
    """Read and parse a ``.protocol`` file.

    Args:
        path: Path of the file; diagnostics name it as given.

    Returns:
        The checked :class:`~protolang.language.ast.Protocol` (``file`` set to ``path``).

    Raises:
        ProtocolError: If the file cannot be read or does not parse and check.
    """
    name = str(path)
    try:
        text = Path(path).read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        reason = exc.strerror if isinstance(exc, OSError) and exc.strerror else str(exc)
        raise ProtocolError([Diagnostic(f"cannot read protocol file {name!r}: {reason}", None,
                                        expected="a readable UTF-8 text file")]) from None
    return parse(text, name)


def _position(diag: Diagnostic) -> tuple[int, int]:
    return (diag.span.line, diag.span.column) if diag.span else (0, 0)


# --- layout checks before lexing ------------------------------------------------------
def _check_layout(text: str, file: str, collector: Collector) -> None:
    """Reject indentation that the indentation post-lexer would misread."""
    used = None  # the indentation character of the first indented line
    seen_statement = False
    for number, line in enumerate(text.split("\n"), start=1):
        body = line.lstrip(" \t")
        if not body.strip() or body.startswith("#"):
            continue
        lead = line[: len(line) - len(body)]
        if not seen_statement and lead:
            collector.fail("unexpected indentation before the first statement",
                           Span(file, number, 1, number, len(lead) + 1),
                           expected="a statement starting in column 1",
                           hint="remove the leading whitespace")
        seen_statement = True
        if not lead:
            continue
        used = used or lead[0]
        bad = next((i for i, ch in enumerate(lead) if ch != used), None)
        if bad is not None:
            kinds = "spaces" if used == " " else "tabs"
            collector.fail("indentation mixes tabs and spaces",
                           Span(file, number, bad + 1, number, len(lead) + 1),
                           expected=f"indentation made of {kinds} only, as on the first "
                                    "indented line",
                           hint="indent with spaces only, 4 per level")


# --- syntax errors -------------------------------------------------------------------------
_TERMINAL_WORDS = {
    "NUMBER": "a number",
    "UNIT": "a unit",
    "NAME": "a name",
    "STRING": "a quoted string",
    "_NL": "end of line",
    "_INDENT": "an indented line",
    "_DEDENT": "the end of the block",
    "$END": "end of file",
}


def _expected_names(exc: UnexpectedInput) -> set[str]:
    # The parser state knows what it can shift; the lexer's `allowed` set also lists
    # terminals it always accepts (line breaks), which would make the message lie.
    parser = getattr(exc, "interactive_parser", None)
    if parser is not None:
        return {n for n in parser.accepts() if not n.startswith("__")}
    state = getattr(exc, "state", None)
    try:
        names = {n for n in state.parse_conf.states[state.position] if n.isupper()}
    except (AttributeError, KeyError, TypeError):
        names = set(getattr(exc, "expected", None) or getattr(exc, "allowed", None) or ())
    return {n for n in names if not n.startswith("__")}


# Keywords that start a stimulus line, by what they deliver: a line that may begin with any
# of them lists them in these groups rather than as one long run of words.
_KEYWORD_GROUPS = (
    ("a presynaptic event", ("pulse", "spikes", "train")),
    ("a waveform", ("chirp", "noise", "ramp", "sine", "step", "steps")),
    ("a synaptic input", ("activate", "poisson")),
)


def _or_list(words: list[str]) -> str:
    if len(words) == 1:
        return words[0]
    return ", ".join(words[:-1]) + " or " + words[-1]


def _describe_expected(names: set[str]) -> str:
    keywords = _keywords()
    order = list(_TERMINAL_WORDS)
    words = [_TERMINAL_WORDS[n] for n in sorted((n for n in names if n in _TERMINAL_WORDS),
                                                 key=order.index)]
    literals = {keywords[n] for n in names if n in keywords}
    for label, group in _KEYWORD_GROUPS:
        if literals.issuperset(group):
            words.append(f"{label} (" + _or_list([f"'{w}'" for w in group]) + ")")
            literals -= set(group)
    words += sorted(f"'{w}'" for w in literals)
    words += sorted(n.lower() for n in names if n not in keywords and n not in _TERMINAL_WORDS)
    if not words:
        return "nothing more on this line"
    return _or_list(words)


def _describe_token(tok: Token) -> str:
    kind = tok.type
    if kind == "_NL":
        return "end of line"
    if kind == "$END":
        return "end of file"
    if kind == "_INDENT":
        return "indentation"
    if kind == "_DEDENT":
        return "end of an indented block"
    if kind == "NUMBER":
        return f"number {str(tok)!r}"
    if kind == "STRING":
        return f"string {str(tok)}"
    if kind in ("NAME", "UNIT"):
        return f"word {str(tok)!r}"
    return repr(str(tok))


def _lines(text: str) -> list[str]:
    return text.split("\n")


def _clamp(text: str, line: int, column: int) -> tuple[int, int]:
    """Keep a location on an existing line so the diagnostic can quote it."""
    lines = _lines(text.rstrip("\n")) or [""]
    if line > len(lines):
        line = len(lines)
        column = len(lines[-1].rstrip()) + 1
    return max(line, 1), max(column, 1)


def _syntax_diagnostic(exc: UnexpectedInput, text: str, file: str) -> Diagnostic:
    if isinstance(exc, UnexpectedCharacters):
        return _bad_character(exc, text, file)
    if isinstance(exc, UnexpectedToken):
        glued = _glued_in_lexer(exc)
        if glued is not None:
            return _glued_diagnostic(glued, file)
        return _bad_token(exc, text, file)
    line, column = _clamp(text, exc.line, exc.column)
    return Diagnostic("unexpected end of file", Span(file, line, column, line, column + 1),
                      expected=_describe_expected(_expected_names(exc)))


def _missing_quotes(before: str, rest: str, span: Span, got: str) -> Diagnostic:
    """The title or the circuit path written without double quotes."""
    keyword = before.split()[-1] if before else ""
    what = "the circuit path" if keyword == "circuit" else "the title"
    if rest:
        words = re.split(r"\s+seed\s+", rest.strip("'"), maxsplit=1)
        fix = f'{keyword} "{words[0]}"' + (f" seed {words[1]}" if len(words) > 1 else "")
        hint = f"put {what} in double quotes: {fix}"
    else:
        hint = f'give {what} in double quotes, e.g. {keyword} "..."'
    return Diagnostic(f"expected {what} in double quotes, got {got}", span,
                      expected="a quoted string", hint=hint)


def _bad_character(exc: UnexpectedCharacters, text: str, file: str) -> Diagnostic:
    line, column = exc.line, exc.column
    source = _lines(text)[line - 1]
    names = _expected_names(exc)
    if exc.char == '"':
        return Diagnostic("unterminated string",
                          Span(file, line, column, line, len(source.rstrip()) + 1),
                          expected="a closing '\"' on the same line",
                          hint="a quoted string must end on the line where it starts")
    span = Span(file, line, column, line, column + 1)
    if "STRING" in names:
        rest = source[column - 1:].split("#", 1)[0].strip()
        return _missing_quotes(source[: column - 1].rstrip(), rest, span,
                               f"character {exc.char!r}")
    hint = None
    if exc.char in "\u00b5\u03bc":
        hint = "write the micro prefix as 'u': us, um, uM, uV"
    elif exc.char == "=" and "IS" in names:
        hint = "select a cell with 'is': 'pre is pyramidal_deep'"
    return Diagnostic(f"unexpected character {exc.char!r}", span,
                      expected=_describe_expected(names), hint=hint)


def _bad_token(exc: UnexpectedToken, text: str, file: str) -> Diagnostic:
    tok = exc.token
    names = _expected_names(exc)
    lines = _lines(text)
    if tok.type in ("_INDENT", "_DEDENT"):
        # A layout token borrows the line break's start; the slip is where the next line begins.
        line, column = tok.end_line, tok.end_column
    elif tok.type == "$END":
        line, column = len(lines) + 1, 1
    else:
        line, column = tok.line, tok.column
    line, column = _clamp(text, line, column)
    source = lines[line - 1]
    before = source[: column - 1].rstrip()
    rest = source[column - 1:].split("#", 1)[0].strip()
    visible = tok.type not in _LAYOUT_TOKENS and tok.type != "$END"
    span = Span(file, line, column, line, column + (max(len(str(tok)), 1) if visible else 1))
    unexpected = _describe_token(tok)

    if "COLON" in names and tok.type in ("_NL", "NAME", "UNIT"):
        last = before.split()[-1] if before else ""
        return Diagnostic(f"missing ':' after {last!r}", span, expected="':'",
                          hint=f"write {before + ':'!r}: a block heading, and the cell of a "
                               "'record' line, end with a colon")
    if "STRING" in names and tok.type != "STRING":
        if rest:
            span = Span(file, line, column, line, column + len(rest))
        return _missing_quotes(before, rest, span, unexpected)
    if tok.type == "_INDENT":
        return Diagnostic("unexpected indentation", span, expected=_describe_expected(names),
                          hint="only the items of a block (the lines after a heading ending "
                               "in ':') are indented")
    if "_INDENT" in names:
        heading = _heading_above(lines, line)
        if heading is not None:
            number, start, end = heading
            span = Span(file, number, start, number, end)
            shown = lines[number - 1][start - 1: end - 1]
            message = f"the block {shown!r} has no items"
        else:
            message = "expected an indented block"
        return Diagnostic(message, span,
                          expected="the items of the block on the following lines, indented",
                          hint="indent each item of the block, e.g. by 4 spaces")
    hint = None
    if tok.type in ("NAME", "UNIT"):
        keywords = _keywords()
        literal = [keywords[n] for n in names if n in keywords and keywords[n].isalpha()]
        hint = suggest(str(tok), literal)
        if hint is None and "COMMA" in names:
            hint = "separate the items of one line with commas"
    elif tok.type == "COLON":
        hint = ("remove the ':'; only block headings (bath:, cells:, stimulate CELL:, "
                "measure CELL:) and the cell of a 'record' line take a colon")
    return Diagnostic(f"unexpected {unexpected}", span, expected=_describe_expected(names),
                      hint=hint)


def _glued_in_lexer(exc: UnexpectedToken) -> _GluedKeyword | None:
    """A keyword run into the next word that the lexer, not the post-lexer, tripped over.

    After a keyword that must be followed by a number ('step' in 'stepp 10 pA') the rest of
    the word fits no terminal of that state, so lark re-lexes it and raises before the
    post-lexer's own check sees it.
    """
    history = getattr(exc, "token_history", None) or ()
    tok = exc.token
    previous = history[-1] if history else None
    if (previous is None or not isinstance(previous, Token) or tok.type not in ("NAME", "UNIT")
            or previous.type != str(previous).upper() or previous.type in _VALUE_TOKENS
            or previous.end_pos != tok.start_pos or not _WORD_CHAR.match(str(tok))):
        return None
    return _GluedKeyword(previous, tok)


def _glued_diagnostic(exc: _GluedKeyword, file: str) -> Diagnostic:
    keyword, rest = str(exc.keyword), str(exc.rest)
    word = keyword + rest
    line, column = exc.keyword.line, exc.keyword.column
    # A short alphabetic tail is a misspelt keyword ('stimulates'); a longer one, a lost space.
    fix = keyword if rest.isalpha() and len(rest) <= 2 else f"{keyword} {rest}"
    return Diagnostic(f"unexpected word {word!r}",
                      Span(file, line, column, line, column + len(word)),
                      expected=f"the keyword '{keyword}' as a word of its own",
                      hint=f"did you mean {fix!r}?")


def _heading_above(lines: list[str], line: int) -> tuple[int, int, int] | None:
    """Line, start and end column of the nearest block heading at or above ``line``."""
    for number in range(min(line, len(lines)), 0, -1):
        code = lines[number - 1].split("#", 1)[0].rstrip()
        if code.endswith(":"):
            start = len(code) - len(code.lstrip()) + 1
            return number, start, len(code) + 1
        if code.strip() and number < line:
            return None
    return None


def _dedent_diagnostic(exc: _IndentSlip, text: str, file: str) -> Diagnostic:
    columns = " or ".join(str(level + 1) for level in exc.levels)
    line, column = _clamp(text, exc.line, exc.column)
    return Diagnostic("indentation does not match any enclosing block",
                      Span(file, line, column, line, column + 1),
                      expected=f"a line starting at column {columns}",
                      hint="line up the item with the other items of its block")


# --- lowering: parse tree -> AST with checks ---------------------------------------------
class _Title(NamedTuple):
    text: str
    span: Span


class _Circuit(NamedTuple):
    path: str
    seed: int
    span: Span
    path_span: Span


class _Count(NamedTuple):
    text: str
    unit: str
    span: Span


class _Repeat(NamedTuple):
    count: int
    span: Span


class _Bath(NamedTuple):
    items: tuple
    span: Span


class _Simulate(NamedTuple):
    settings: tuple
    span: Span


class _Mode(NamedTuple):
    text: str
    span: Span


class _Constraint(NamedTuple):
    node: object  # ast.Within | ast.ReceivingFrom
    name_span: Span


class _Pick(NamedTuple):
    node: ast.CellPick
    name_span: Span
    constraints: tuple


class _Lesions(NamedTuple):
    items: tuple
    span: Span


class _RefLine(NamedTuple):
    """One line of a ``reference`` block: its kind ("value", "range", "source", ...) and payload."""
    kind: str
    payload: object
    span: Span


class _Reference(NamedTuple):
    """A cell name used outside ``cells:``, checked once every selected name is known."""
    name: str
    span: Span
    where: str


# Bath setting -> (dimension, example).
_BATH_SETTINGS = {"calcium": ("concentration", "2.0 mM"), "magnesium": ("concentration", "1.0 mM"),
                  "temperature": ("temperature", "34 degC")}
# Bath temperatures a slice survives, in kelvin (0 to 45 degC).
_TEMPERATURE_RANGE = (273.15, 318.15)
_SETTINGS = {"isolated": None, "embedded": None, "deterministic": None, "timestep": "time",
             "sampling": "frequency", "memory": "memory"}
_RECORD_MODES = ("current clamp", "voltage clamp", "off")
_RECORD_OPTIONS = ("holding", "noise", "series")
# Option name -> (dimension, smallest allowed value, whether the smallest is allowed).
_MEASURE_OPTIONS = {
    "window": ("time", 0.0, False),
    "baseline": ("time", 0.0, False),
    "threshold": ("voltage", 0.0, True),
    "noise_factor": ("number", 0.0, False),
    "current_threshold": ("current", 0.0, True),
    "low": ("current", None, True),
    "high": ("current", None, True),
    "tolerance": ("current", 0.0, False),
    "width": ("time", 0.0, False),
    "rounds": ("number", 0.0, False),
    "step": ("current", None, True),
    "bin": ("time", 0.0, False),
    "discard": ("time", 0.0, True),
    "distance_bin": ("length", 0.0, False),
    "detection_factor": ("number", 0.0, False),
    "bootstrap": ("number", 0.0, True),
}
# Most cells a multi-cell patch holds (rigs hold up to about a dozen pipettes).
MAX_PATCH_CELLS = 12
# The name a `measure` block uses for the whole embedded network.
NETWORK_TARGET = "network"
# Most amplitudes a step family may list (it needs one sweep per amplitude).
_MAX_FAMILY_VALUES = 1000
# Dimension -> its name in a message ("needs a current or a voltage").
_KIND = {dim: text.split(" (")[0] for dim, text in DIMENSIONS.items()}
# Stimulus node -> how messages name it.
_STIMULUS_WORDS = {
    ast.Pulse: "current pulses", ast.Train: "current pulses", ast.SpikeTimes: "spike times",
    ast.Step: "a step", ast.StepFamily: "a step family", ast.Ramp: "a ramp", ast.Sine: "a sine",
    ast.Chirp: "a chirp", ast.Noise: "noise", ast.PoissonInput: "Poisson input",
    ast.Activate: "extracellular activation",
}
# Statement -> (what it gives, an example of it).
_REQUIRED = {
    "protocol": ("the title of the experiment", 'a line like: protocol "deep pyramid pair"'),
    "circuit": ("the circuit file and its seed", 'a line like: circuit "slab.circuit.yaml" seed 1'),
    "cells": ("the block selecting the recorded cells",
              "a block like: cells:  followed by indented lines such as 'pre is pyramidal_deep'"),
    "sweeps": ("the number of sweeps and their interval", "a line like: sweeps 30 every 10 s"),
}


_MAX_SCAN_VALUES = 1000
_MAX_SCAN_POINTS = 10000


def _tidy(value: float) -> float:
    """Round away float noise from range arithmetic (0.30000000000000004 -> 0.3)."""
    return float(f"{value:.12g}")


def _unquote(tok: Token) -> str:
    return re.sub(r"\\(.)", r"\1", str(tok)[1:-1])


def _number(value: float) -> str:
    return f"{value:g}"


def _shown(q) -> str:
    """A quantity or scan reference as the user would write it."""
    return f"@{q.name}" if isinstance(q, ast.ScanRef) else str(q)


def _drive_of(item) -> tuple[str, Quantity] | None:
    """The kind of drive a stimulus delivers and the amplitude that shows it, if known yet.

    Returns ("current" | "voltage" | "conductance", quantity) or None for synaptic input,
    spike times, and amplitudes that are still scan references.
    """
    if isinstance(item, (ast.Pulse, ast.Train)):
        return ("current", item.amplitude) if isinstance(item.amplitude, Quantity) else None
    slots = {
        ast.Step: ("amplitude",), ast.StepFamily: ("start", "stop", "step"),
        ast.Ramp: ("start_amplitude", "stop_amplitude"), ast.Sine: ("amplitude", "offset"),
        ast.Chirp: ("amplitude",), ast.Noise: ("mean", "sd"),
    }.get(type(item), ())
    for slot in slots:
        q = getattr(item, slot)
        if isinstance(q, Quantity):
            return q.dimension, q
    return None


@v_args(meta=True)
class _Lowering(Transformer):
    """Turns the lark parse tree into AST nodes; collects every lowering error."""

    def __init__(self, file: str, collector: Collector,
                 point: dict[str, Quantity] | None = None) -> None:
        super().__init__(visit_tokens=False)
        self.file = file
        self.c = collector
        self.references: list[_Reference] = []
        # None: lower the template (``@name`` stays a ScanRef); else the values of one point.
        self.point = point
        self.scan_uses: list[ast.ScanRef] = []
        self.failed_scans: set[str] = set()  # scans with their own error: uses are not "unscanned"
        # Cells whose record line has its own error: their stimuli are not checked against a mode.
        self.failed_records: set[str] = set()
        self.sweep_count_ok = True

    # --- helpers ---------------------------------------------------------------------
    def _span(self, meta) -> Span:
        return Span(self.file, meta.line, meta.column, meta.end_line, meta.end_column)

    def _tspan(self, tok: Token) -> Span:
        return Span(self.file, tok.line, tok.column, tok.end_line, tok.end_column)

    def _quantity(self, q: Quantity | None, dimension: str, what: str, *,
                  minimum: float | None = None, inclusive: bool = True) -> float | None:
        """SI value of ``q`` if its unit is known and has ``dimension`` (and is in range)."""
        if q is None:
            return None
        if isinstance(q, ast.ScanRef):
            return math.nan  # checked per point, with the point's value in this slot
        if not self._known_unit(q, (dimension,)):
            return None
        try:
            value = expect(q, dimension, what)
        except ProtocolError as exc:
            self.c.diagnostics.extend(exc.diagnostics)
            return None
        if minimum is not None and (value < minimum or (value == minimum and not inclusive)):
            bound = "at least" if inclusive else "greater than"
            shown = "0" if minimum == 0 else _number(minimum)
            self.c.fail(f"{what} must be {bound} {shown}, got {q}", q.span,
                        expected=f"{DIMENSIONS[dimension]}, {bound} {shown}")
            return None
        return value

    def _known_unit(self, q: Quantity, dimensions: tuple[str, ...]) -> bool:
        """True if ``q``'s unit is in the table; otherwise record why, with the likeliest fix."""
        try:
            check_unit(q.unit, q.span)
            return True
        except ProtocolError as exc:
            diag = exc.diagnostics[0]
        fitting = [u for u, (dim, _) in UNITS.items() if dim in dimensions]
        # Case slips ('mv', 'khz') are the common ones; difflib alone would offer 'm' for 'mv'.
        same = [u for u in UNITS if u.lower() == q.unit.lower()]
        same.sort(key=lambda u: u not in fitting)
        if same:
            hint = "did you mean " + " or ".join(repr(u) for u in same) + "?"
        else:
            hint = suggest(q.unit, fitting) or suggest(q.unit, UNITS)
        wanted = " or ".join(DIMENSIONS[d] for d in dimensions)
        expected = (f"{wanted}, in " + ", ".join(fitting)) if fitting else wanted
        self.c.diagnostics.append(replace(diag, expected=expected, hint=hint))
        return False

    def _count(self, count: _Count, what: str, *, minimum: int = 1) -> int | None:
        """The integer of a count slot, or None after recording why it is not one."""
        kind = "a positive whole number" if minimum >= 1 else "a whole number, 0 or more"
        if count.unit:
            self.c.fail(f"{what} is a plain count, got '{count.text} {count.unit}'", count.span,
                        expected=kind, hint=f"drop the unit: {count.text}")
            return None
        if not re.fullmatch(r"[-+]?\d+", count.text):
            value = float(count.text)
            if value.is_integer() and value >= minimum:
                hint = f"write it as plain digits: {int(value)}"
            elif value >= minimum:
                low = max(int(value), minimum)
                hint = f"counts are whole numbers, e.g. {low} or {low + 1}"
            else:
                hint = f"use {minimum} or more"
            self.c.fail(f"{what} must be a whole number, got {count.text}", count.span,
                        expected=kind, hint=hint)
            return None
        value = int(count.text)
        if value < minimum:
            self.c.fail(f"{what} must be at least {minimum}, got {count.text}", count.span,
                        expected=kind, hint=f"use {minimum} or more")
            return None
        return value

    def _once(self, seen: dict, key, span: Span, what: str, hint: str | None = None) -> bool:
        """True the first time ``key`` is seen; a later one is an error at its own span."""
        if key in seen:
            self.c.fail(f"duplicate {what}", span, expected=f"one {what}",
                        hint=hint or f"the first one is at line {seen[key].line}")
            return False
        seen[key] = span
        return True

    # --- numbers -----------------------------------------------------------------------
    def quantity(self, meta, children) -> Quantity | ast.ScanRef:
        if len(children) == 1 or (isinstance(children[0], Token) and children[0].type == "VARIABLE"):
            tok = children[0]
            ref = ast.ScanRef(name=str(tok)[1:], span=self._tspan(tok))
            self.scan_uses.append(ref)
            if self.point is not None and ref.name in self.point:
                value = self.point[ref.name]
                # the point's value, placed where the user wrote @name
                return Quantity(value.value, value.unit, ref.span)
            return ref
        number, unit = children
        return Quantity(float(number), str(unit) if unit is not None else "", self._span(meta))

    # --- scans -------------------------------------------------------------------------------
    def _scan_values_ok(self, values, span: Span) -> bool:
        ok = True
        for q in values:
            if isinstance(q, ast.ScanRef):
                self.c.fail(f"a scan value cannot be another scan (@{q.name})", q.span,
                            expected="a number with its unit", hint="write the values out")
                ok = False
            elif not self._known_unit(q, tuple(DIMENSIONS)):
                ok = False
        if ok:
            dims = {q.dimension for q in values}
            if len(dims) > 1:
                self.c.fail("the values of one scan must share a dimension, got "
                            + " and ".join(sorted(dims)), span,
                            expected="values of one kind, e.g. all currents")
                ok = False
        return ok

    def scan_range(self, meta, children):
        start, stop, count = children
        span = self._span(meta)
        n = self._count(count, "the number of scan steps")
        if not self._scan_values_ok((start, stop), span) or n is None:
            return None
        if n < 2:
            self.c.fail(f"a scan range needs at least 2 steps, got {n}", count.span,
                        expected="2 or more steps", hint="use a list for a single value: scan @x: 1 mM")
            return None
        if start.si == stop.si:
            self.c.fail(f"a scan range from {start} to {stop} is empty", span,
                        expected="two different ends", hint="use a list for a single value")
            return None
        unit = start.unit
        lo, hi = start.si, stop.si
        factor = to_si(1.0, unit) if unit else 1.0
        values = tuple(Quantity(_tidy((lo + (hi - lo) * k / (n - 1)) / factor), unit, span) for k in range(n))
        return ("range", values, dict(start=start, stop=stop, steps=n))

    def scan_step(self, meta, children):
        start, stop, step = children
        span = self._span(meta)
        if not self._scan_values_ok((start, stop, step), span):
            return None
        lo, hi, d = start.si, stop.si, step.si
        if d == 0:
            self.c.fail("a scan step of zero never reaches the end", step.span,
                        expected=f"a non-zero step, e.g. {_number((stop.value - start.value) / 4 or 1)} {start.unit}",
                        hint="give a step, or use 'in N steps'")
            return None
        if (hi - lo) * d < 0:
            self.c.fail(f"a step of {step} goes away from {stop}", step.span,
                        expected="a step with the sign of (end - start)", hint="flip the sign of the step")
            return None
        n = int(math.floor((hi - lo) / d + 1e-9)) + 1
        if n > _MAX_SCAN_VALUES:
            self.c.fail(f"this scan has {n} values, more than {_MAX_SCAN_VALUES}", span,
                        expected=f"at most {_MAX_SCAN_VALUES} values", hint="use a larger step")
            return None
        unit = start.unit
        factor = to_si(1.0, unit) if unit else 1.0
        values = tuple(Quantity(_tidy((lo + d * k) / factor), unit, span) for k in range(n))
        return ("step", values, dict(start=start, stop=stop, step=step))

    def scan_list(self, meta, children):
        if not self._scan_values_ok(children, self._span(meta)):
            return None
        return ("list", tuple(children), {})

    def scan(self, meta, children) -> ast.Scan | None:
        var, body = children
        if body is None:
            self.failed_scans.add(str(var)[1:])
            return None
        form, values, extra = body
        return ast.Scan(name=str(var)[1:], form=form, values=values, span=self._span(meta), **extra)

    def count(self, meta, children) -> _Count:
        number, unit = children
        return _Count(str(number), str(unit) if unit is not None else "", self._span(meta))

    # --- head statements -----------------------------------------------------------------
    def title(self, meta, children) -> _Title:
        return _Title(_unquote(children[0]), self._span(meta))

    def circuit(self, meta, children) -> _Circuit:
        path_tok, seed_count = children
        path = _unquote(path_tok)
        if not path.strip():
            self.c.fail("empty circuit path", self._tspan(path_tok),
                        expected="the path of a circuit file, relative to the protocol file",
                        hint='e.g. circuit "slab.circuit.yaml"')
        seed = 1
        if seed_count is not None:
            seed = self._count(seed_count, "the seed", minimum=0)
        return _Circuit(path, seed if seed is not None else 1, self._span(meta),
                        self._tspan(path_tok))

    # --- bath ------------------------------------------------------------------------------
    def bath_item(self, meta, children):
        name_tok, word_tok, q = children
        name, span = str(name_tok), self._span(meta)
        if name in _BATH_SETTINGS:
            dimension, example = _BATH_SETTINGS[name]
            if word_tok is not None:
                self.c.fail(f"unexpected word {str(word_tok)!r} after {name!r}",
                            self._tspan(word_tok),
                            expected=DIMENSIONS[dimension], hint=f"e.g. '{name} {example}'")
                return None
            if q is None:
                self.c.fail(f"{name} needs a value", self._tspan(name_tok),
                            expected=DIMENSIONS[dimension], hint=f"e.g. '{name} {example}'")
                return None
            if dimension == "temperature":
                ok = self._quantity(q, dimension, name)
                low, high = _TEMPERATURE_RANGE
                if ok is not None and not low <= ok <= high:
                    self.c.fail(f"bath temperature {q} is outside 0 to 45 degC", q.span,
                                expected="a bath temperature such as 22 degC (room) or 34 degC",
                                hint="write the temperature in degC")
                    return None
            else:
                ok = self._quantity(q, dimension, name, minimum=0.0)
            return ast.BathSetting(name=name, value=q, span=span) if ok is not None else None
        if name == "block":
            if word_tok is None:
                self.c.fail("'block' needs a receptor name", self._tspan(name_tok),
                            expected="a receptor type of the circuit, e.g. AMPA, NMDA, GABA_A",
                            hint="e.g. 'block NMDA' or 'block GABA_A 60 %'")
                return None
            if q is not None:
                fraction = self._quantity(q, "percent", "a block fraction", minimum=0.0)
                if fraction is None:
                    return None
                if fraction > 1.0:
                    self.c.fail(f"a block fraction cannot exceed 100 %, got {q}", q.span,
                                expected="a percentage from 0 to 100",
                                hint=f"for a complete block write 'block {word_tok}' "
                                     "without a number")
                    return None
            return ast.ReceptorBlock(receptor=str(word_tok), fraction=q, span=span)
        choices = (*_BATH_SETTINGS, "block")
        self.c.fail(f"unknown bath item {name!r}", self._tspan(name_tok),
                    expected="calcium Q, magnesium Q, temperature Q or block RECEPTOR [Q %]",
                    hint=suggest(name, choices))
        return None

    def bath(self, meta, children) -> _Bath:
        seen: dict = {}
        items = []
        for item in children:
            if item is None:
                continue
            if isinstance(item, ast.BathSetting):
                fresh = self._once(seen, item.name, item.span, f"'{item.name}' setting")
            else:
                fresh = self._once(seen, ("block", item.receptor), item.span,
                                   f"block of {item.receptor}")
            if fresh:
                items.append(item)
        return _Bath(tuple(items), self._span(meta))

    # --- cells -------------------------------------------------------------------------------
    def within(self, meta, children) -> _Constraint:
        q, other = children
        self._quantity(q, "length", "the 'within' distance", minimum=0.0, inclusive=False)
        node = ast.Within(distance=q, of=str(other), span=self._span(meta))
        return _Constraint(node, self._tspan(other))

    def receiving_from(self, meta, children) -> _Constraint:
        (source,) = children
        node = ast.ReceivingFrom(source=str(source), span=self._span(meta))
        return _Constraint(node, self._tspan(source))

    def cell_pick(self, meta, children) -> _Pick:
        name, cell_class, *constraints = children
        pick = ast.CellPick(name=str(name), cell_class=str(cell_class),
                            constraints=tuple(c.node for c in constraints),
                            span=self._span(meta), class_span=self._tspan(cell_class))
        return _Pick(pick, self._tspan(name), tuple(constraints))

    def patch_pick(self, meta, children) -> _Pick | None:
        name, count, cell_class, radius = children
        n = self._count(count, "the number of patched cells", minimum=2)
        ok = n is not None
        if n is not None and n > MAX_PATCH_CELLS:
            self.c.fail(f"a patch holds at most {MAX_PATCH_CELLS} cells, got {n}", count.span,
                        expected=f"2 to {MAX_PATCH_CELLS} cells",
                        hint=f"patch {MAX_PATCH_CELLS} cells and `repeat` the patch for more pairs")
            ok = False
        ok = self._quantity(radius, "length", "the patch radius", minimum=0.0, inclusive=False) is not None and ok
        if not ok:
            return None
        node = ast.PatchPick(name=str(name), count=n, cell_class=str(cell_class), radius=radius,
                             span=self._span(meta), class_span=self._tspan(cell_class))
        return _Pick(node, self._tspan(name), ())

    def in_turn(self, meta, children):
        (q,) = children
        self._quantity(q, "time", "the time between turns", minimum=0.0, inclusive=False)
        return q

    def repeat(self, meta, children) -> _Repeat:
        n = self._count(children[0], "the repeat count")
        return _Repeat(n if n is not None else 1, self._span(meta))

    def cells(self, meta, children) -> ast.Cells:
        picks: list[_Pick] = []
        repeat: _Repeat | None = None
        names: dict[str, Span] = {}
        for line in children:
            if line is None:
                continue
            if isinstance(line, _Repeat):
                if repeat is not None:
                    self.c.fail("duplicate 'repeat' line", line.span, expected="one 'repeat N'",
                                hint=f"the first one is at line {repeat.span.line}")
                    continue
                repeat = line
                continue
            if line.node.name in names:
                self.c.fail(f"cell name {line.node.name!r} is already selected", line.name_span,
                            expected="a new name for each selected cell",
                            hint=f"the first {line.node.name!r} is at line "
                                 f"{names[line.node.name].line}; choose another name")
                continue
            names[line.node.name] = line.name_span
            picks.append(line)
        order = [p.node.name for p in picks]
        for index, pick in enumerate(picks):
            earlier = order[:index]
            wanted = "a cell selected on an earlier line" + (": " + ", ".join(earlier)
                                                             if earlier else "")
            for constraint in pick.constraints:
                node = constraint.node
                ref = node.of if isinstance(node, ast.Within) else node.source
                if ref in earlier and isinstance(next(p.node for p in picks if p.node.name == ref), ast.PatchPick):
                    singles = [n for n in earlier
                               if not isinstance(next(p.node for p in picks if p.node.name == n), ast.PatchPick)]
                    self.c.fail(f"{ref!r} is a patch of several cells", constraint.name_span,
                                expected=("one selected cell: " + ", ".join(singles)) if singles
                                else "a single selected cell",
                                hint=f"name one of its cells, e.g. {ref}_1, by selecting it on its own line")
                    continue
                if ref in earlier:
                    continue
                if ref == pick.node.name:
                    self.c.fail(f"cell {ref!r} cannot be constrained by itself",
                                constraint.name_span, expected=wanted,
                                hint="name another cell, selected above this line")
                elif ref in order:
                    self.c.fail(f"cell {ref!r} is selected later (line {names[ref].line})",
                                constraint.name_span, expected=wanted,
                                hint=f"move the line selecting {ref!r} above this one")
                else:
                    self.c.fail(f"unknown cell {ref!r}", constraint.name_span, expected=wanted,
                                hint=suggest(ref, order))
        span = self._span(meta)
        if not picks:
            self.c.fail("'cells:' selects no cell", span,
                        expected="a line 'NAME is CLASS'", hint="e.g. 'pre is pyramidal_deep'")
        return ast.Cells(picks=tuple(p.node for p in picks),
                         repeat=repeat.count if repeat else 1,
                         repeat_span=repeat.span if repeat else None, span=span)

    # --- lesions ---------------------------------------------------------------------------
    def in_layer(self, meta, children) -> ast.InLayer:
        return ast.InLayer(layer=str(children[0]), span=self._span(meta))

    def _places(self, places, span: Span) -> tuple:
        layers = [p for p in places if isinstance(p, ast.InLayer)]
        withins = [p for p in places if isinstance(p, _Constraint)]
        for extra in layers[1:]:
            self.c.fail("a second 'in layer' on one line", extra.span, expected="at most one layer per line",
                        hint="write one line per layer")
        for extra in withins[1:]:
            self.c.fail("a second 'within' on one line", extra.node.span, expected="at most one distance per line",
                        hint="keep the tighter distance")
        for w in withins[:1]:
            self.references.append(_Reference(w.node.of, w.name_span, "within ... of"))
        return tuple(layers[:1]) + tuple(w.node for w in withins[:1])

    def remove(self, meta, children):
        fraction, name, *places = children
        span = self._span(meta)
        ok = True
        if fraction is not None:
            f = self._quantity(fraction, "percent", "the removed fraction", minimum=0.0, inclusive=False)
            ok = f is not None
            if f is not None and f > 1.0:
                self.c.fail(f"the removed fraction cannot exceed 100 %, got {fraction}", fraction.span,
                            expected="a percentage above 0 and at most 100",
                            hint=f"'remove {name}' without a fraction removes every cell")
                ok = False
        places = self._places(places, span)
        if not ok:
            return None
        return ast.Remove(cell_class=str(name), fraction=fraction, places=places, span=span,
                          class_span=self._tspan(name))

    def cut(self, meta, children):
        pre, post = children
        return ast.Cut(pre=str(pre), post=str(post), span=self._span(meta))

    def silence(self, meta, children):
        return ast.Silence(cell_class=str(children[0]), span=self._span(meta))

    def scale_pathway(self, meta, children):
        pre, post, factor = children
        if isinstance(factor, Quantity) and factor.dimension not in ("percent", "number") \
                and factor.unit in UNITS:
            self.c.fail(f"a pathway scale factor is a percentage or a plain number, got {factor}", factor.span,
                        expected="a percentage (e.g. 50 %) or a factor (e.g. 0.5)",
                        hint=f"e.g. 'scale {pre} -> {post} by 50 %'")
            return None
        if isinstance(factor, Quantity) and not self._known_unit(factor, ("percent", "number")):
            return None
        if isinstance(factor, Quantity) and factor.si < 0:
            self.c.fail(f"a pathway scale factor cannot be negative, got {factor}", factor.span,
                        expected="a percentage, 0 % or more", hint="use 0 % to silence the pathway, or 'cut'")
            return None
        return ast.ScalePathway(pre=str(pre), post=str(post), factor=factor, span=self._span(meta))

    def lesions(self, meta, children) -> _Lesions:
        return _Lesions(tuple(c for c in children if c is not None), self._span(meta))

    # --- network (embedded mode) -----------------------------------------------------------
    def region(self, meta, children):
        span = self._span(meta)
        if len(children) == 1 and isinstance(children[0], Token) and children[0].type == "REGION_ALL":
            return ast.Region(everything=True, span=span)
        return ast.Region(places=self._places(children, span), span=span)

    def background_poisson(self, meta, children):
        rate, conductance, receptor = children
        ok = self._quantity(rate, "frequency", "the background rate", minimum=0.0, inclusive=False) is not None
        if receptor is None:
            self.c.fail("background Poisson input needs a receptor after its conductance", conductance.span,
                        expected="a receptor type of the circuit, e.g. AMPA",
                        hint=f"e.g. 'background poisson {_shown(rate)} of 0.3 nS AMPA onto pyramidal_deep'")
            return None
        ok = self._quantity(conductance, "conductance", "the peak conductance per input spike",
                            minimum=0.0, inclusive=False) is not None and ok
        if not ok:
            return None
        return dict(kind="poisson", rate=rate, conductance=conductance, receptor=str(receptor),
                    receptor_span=self._tspan(receptor))

    def background_noise(self, meta, children):
        mean, sd, tau, reversal = children
        kinds = ("current", "conductance")
        m = self._drive(mean, "the noise mean", kinds)
        s = self._drive(sd, "the noise SD", kinds)
        ok = m is not None and s is not None and self._same_kind("the noise", (mean, sd))
        if s is not None and not self._not_negative(sd, s, "the noise SD"):
            ok = False
        ok = self._quantity(tau, "time", "the noise time constant", minimum=0.0,
                            inclusive=False) is not None and ok
        kind = mean.dimension if ok and isinstance(mean, Quantity) else None
        if reversal is not None:
            if self._quantity(reversal, "voltage", "the reversal potential") is None:
                ok = False
            elif kind == "current":
                self.c.fail("a reversal potential applies only to conductance noise", reversal.span,
                            expected="end of the noise part (current noise has no reversal potential)",
                            hint="drop 'reversal ...', or give the mean and SD in nS")
                ok = False
        elif kind == "conductance":
            self.c.fail("conductance noise needs a reversal potential", mean.span,
                        expected="'reversal E' after the time constant, E a voltage",
                        hint="e.g. '... tau 5 ms reversal 0 mV onto ...'")
            ok = False
        if not ok:
            return None
        return dict(kind="noise", mean=mean, sd=sd, tau=tau, reversal=reversal)

    def background(self, meta, children):
        drive, *classes = children
        if drive is None:
            return None
        names, spans = [], []
        for tok in classes:
            if str(tok) in names:
                self.c.fail(f"class {str(tok)!r} is listed twice", self._tspan(tok),
                            expected="each class once", hint="drop the repeat")
                continue
            names.append(str(tok))
            spans.append(self._tspan(tok))
        return ast.Background(classes=tuple(names), span=self._span(meta), class_spans=tuple(spans), **drive)

    def network(self, meta, children) -> ast.Network:
        regions = tuple(c for c in children if isinstance(c, ast.Region))
        background = tuple(c for c in children if isinstance(c, ast.Background))
        span = self._span(meta)
        if not regions and not any(c is None for c in children):
            self.c.fail("'network:' gives no region", span,
                        expected="a line 'region within Q of CELL', 'region in layer L' or 'region all'",
                        hint="e.g. 'region within 300 um of post'")
        everything = [r for r in regions if r.everything]
        if everything and len(regions) > 1:
            self.c.fail("'region all' together with another region line", everything[0].span,
                        expected="either 'region all' or region lines that narrow it",
                        hint="drop 'region all': the other lines already define the region")
        return ast.Network(regions=regions, background=background, span=span)

    # --- timing ------------------------------------------------------------------------------
    def sweeps(self, meta, children) -> ast.Sweeps | None:
        count, interval, length = children
        n = self._count(count, "the sweep count")
        self.sweep_count_ok = n is not None
        self._quantity(interval, "time", "the sweep interval", minimum=0.0, inclusive=False)
        self._quantity(length, "time", "the sweep length", minimum=0.0, inclusive=False)
        return ast.Sweeps(count=n if n is not None else 1, interval=interval, length=length,
                          span=self._span(meta))

    def setting(self, meta, children) -> ast.Setting | None:
        name_tok, q = children
        name, span = str(name_tok), self._span(meta)
        if name not in _SETTINGS:
            self.c.fail(f"unknown simulate option {name!r}", self._tspan(name_tok),
                        expected="one of " + ", ".join(_SETTINGS), hint=suggest(name, _SETTINGS))
            return None
        dimension = _SETTINGS[name]
        if dimension is None and q is not None:
            self.c.fail(f"'{name}' takes no value, got {q}", q.span,
                        expected="a comma or end of line",
                        hint=f"write just '{name}'")
            return None
        if dimension is not None:
            if q is None:
                self.c.fail(f"'{name}' needs {DIMENSIONS[dimension]}", self._tspan(name_tok),
                            expected=DIMENSIONS[dimension],
                            hint="e.g. 'timestep 0.025 ms'" if name == "timestep"
                            else "e.g. 'sampling 10 kHz'")
                return None
            if self._quantity(q, dimension, f"the {name}", minimum=0.0, inclusive=False) is None:
                return None
        return ast.Setting(name=name, value=q, span=span)

    def simulate(self, meta, children) -> _Simulate:
        seen: dict = {}
        settings = tuple(s for s in children
                         if s is not None and self._once(seen, s.name, s.span,
                                                         f"simulate option '{s.name}'"))
        return _Simulate(settings, self._span(meta))

    # --- recording ---------------------------------------------------------------------------
    def record_mode(self, meta, children) -> _Mode:
        return _Mode(" ".join(str(w) for w in children), self._span(meta))

    def option(self, meta, children) -> ast.Option:
        name, q = children
        return ast.Option(name=str(name), value=q, span=self._span(meta))

    def recording(self, meta, children) -> ast.Recording | None:
        cell, mode, *options = children
        self.references.append(_Reference(str(cell), self._tspan(cell), "record"))
        ok = True
        known_mode = mode.text in _RECORD_MODES
        if not known_mode:
            self.c.fail(f"unknown recording mode {mode.text!r}", mode.span,
                        expected="'current clamp', 'voltage clamp' or 'off'",
                        hint=suggest(mode.text, _RECORD_MODES)
                        or "record in 'current clamp' or 'voltage clamp'; 'off' simulates the "
                           "cell unrecorded")
            ok = False
        values: dict[str, Quantity] = {}
        spans: dict[str, Span] = {}
        seen: dict = {}
        for opt in options:
            if opt.name not in _RECORD_OPTIONS:
                self.c.fail(f"unknown record option {opt.name!r}", opt.span,
                            expected="holding Q, noise Q or series Q",
                            hint=suggest(opt.name, _RECORD_OPTIONS))
                ok = False
                continue
            if not self._once(seen, opt.name, opt.span, f"record option '{opt.name}'"):
                ok = False
                continue
            values[opt.name] = opt.value
            spans[opt.name] = opt.span
        holding, noise, series = (values.get(k) for k in ("holding", "noise", "series"))
        if not known_mode:
            # Which dimensions fit depends on the mode; report only what is wrong either way.
            for q in values.values():
                if not isinstance(q, ast.ScanRef):
                    self._known_unit(q, tuple(DIMENSIONS))
        elif mode.text == "voltage clamp":
            ok = self._clamp_options(str(cell), mode, holding, noise, series) and ok
        else:
            if holding is not None:
                ok = self._holding(holding) and ok
            if noise is not None:
                noise_sd = self._quantity(noise, "voltage", "the recording noise", minimum=0.0)
                ok = noise_sd is not None and ok
            if series is not None:
                self.c.fail("a series resistance applies only in voltage clamp", spans["series"],
                            expected=f"holding Q or noise Q in {mode.text!r}",
                            hint=f"drop it, or write 'record {cell}: voltage clamp, holding "
                                 f"-70 mV, series {_shown(series)}'")
                ok = False
        if not ok:
            self.failed_records.add(str(cell))
            return None
        return ast.Recording(cell=str(cell), mode=mode.text, holding=holding, noise=noise,
                             series=series, span=self._span(meta))

    def _clamp_options(self, cell: str, mode: _Mode, holding, noise, series) -> bool:
        """Check the options of a voltage-clamp recording; True if they all fit."""
        ok = True
        if holding is None:
            self.c.fail("voltage clamp needs a holding potential", mode.span,
                        expected="'holding V', the command potential (a voltage)",
                        hint=f"e.g. 'record {cell}: voltage clamp, holding -70 mV'")
            ok = False
        elif not isinstance(holding, ast.ScanRef):
            if not self._known_unit(holding, ("voltage",)):
                ok = False
            elif holding.dimension != "voltage":
                got = "a plain number" if not holding.unit else \
                    f"{holding.unit!r} ({holding.dimension})"
                self.c.fail(f"in voltage clamp, holding is the command potential and needs a "
                            f"voltage, got {got}", holding.span,
                            expected=DIMENSIONS["voltage"],
                            hint="a clamped cell is held at a potential, e.g. 'holding -70 mV'; "
                                 "a holding current belongs to 'current clamp'")
                ok = False
        if noise is not None:
            ok = self._quantity(noise, "current", "the current noise of a voltage clamp",
                                minimum=0.0) is not None and ok
        if series is not None:
            ok = self._quantity(series, "resistance", "the series resistance", minimum=0.0,
                                inclusive=False) is not None and ok
        return ok

    def _holding(self, q: Quantity) -> bool:
        if isinstance(q, ast.ScanRef):
            return True
        if not self._known_unit(q, ("current", "voltage")):
            return False
        if q.dimension in ("current", "voltage"):
            return True
        got = "a plain number" if not q.unit else f"{q.unit!r} ({q.dimension})"
        self.c.fail(f"holding needs a current or a voltage, got {got}", q.span,
                    expected=f"{DIMENSIONS['current']} or {DIMENSIONS['voltage']}",
                    hint=f"e.g. 'holding {_number(q.value)} pA' (injected current) or "
                         "'holding -70 mV' (held potential)")
        return False

    # --- stimuli -----------------------------------------------------------------------------
    def _width_and_start(self, width, at, what: str, width_word: str) -> bool:
        """Check a positive width and a start at or after 0; both are always checked."""
        ok = self._quantity(width, "time", f"the {what} {width_word}", minimum=0.0, inclusive=False) is not None
        return self._quantity(at, "time", f"the {what} start", minimum=0.0) is not None and ok

    def pulse(self, meta, children) -> ast.Pulse | None:
        amplitude, width, at = children
        ok = self._quantity(amplitude, "current", "the pulse amplitude") is not None
        if not self._width_and_start(width, at, "pulse", "width") or not ok:
            return None
        return ast.Pulse(amplitude=amplitude, duration=width, at=at, span=self._span(meta))

    def train(self, meta, children) -> ast.Train | None:
        count, amplitude, width, rate, start = children
        n = self._count(count, "the number of pulses")
        ok = self._quantity(amplitude, "current", "the pulse amplitude") is not None
        width_s = self._quantity(width, "time", "the pulse width", minimum=0.0, inclusive=False)
        rate_hz = self._quantity(rate, "frequency", "the train frequency", minimum=0.0,
                                 inclusive=False)
        ok = self._quantity(start, "time", "the train start", minimum=0.0) is not None and ok
        if width_s is not None and rate_hz is not None and width_s * rate_hz >= 1.0:
            top = 1.0 / width_s
            self.c.fail(f"frequency too high for the pulse width: {rate} with {width} pulses "
                        "leaves no gap between pulses", rate.span,
                        expected=f"a frequency below {top:g} Hz for {width} pulses",
                        hint=f"lower the frequency below {top:g} Hz or shorten the pulses")
            ok = False
        if n is None or width_s is None or rate_hz is None or not ok:
            return None
        return ast.Train(count=n, amplitude=amplitude, duration=width, rate=rate, start=start,
                         span=self._span(meta))

    def spike_times(self, meta, children) -> ast.SpikeTimes | None:
        if not self._times(children, "a spike time", "spike times"):
            return None
        return ast.SpikeTimes(times=tuple(children), span=self._span(meta))

    def _times(self, times, what: str, plural: str) -> bool:
        """Check a list of event times: each a time >= 0, strictly increasing."""
        ok = True
        previous: tuple[float, Quantity] | None = None
        for q in times:
            t = self._quantity(q, "time", what, minimum=0.0)
            if t is None:
                ok = False
                continue
            if previous is not None and t <= previous[0]:
                self.c.fail(f"{plural} must increase: {_shown(q)} comes after "
                            f"{_shown(previous[1])}", q.span,
                            expected=f"a time later than {_shown(previous[1])}",
                            hint=f"list the {plural} in increasing order, each once")
                ok = False
            if not math.isnan(t):
                previous = (t, q)
        return ok

    def _drive(self, q, what: str, kinds: tuple[str, ...] = ("current", "voltage")) -> float | None:
        """SI value of a slot that takes one of several dimensions (NaN for a scan reference).

        Amplitude slots take a current (current clamp) or a voltage (a command step from the
        holding potential, voltage clamp); which one fits the cell is checked once the whole
        file is read.
        """
        if q is None:
            return None
        if isinstance(q, ast.ScanRef):
            return math.nan
        if not self._known_unit(q, kinds):
            return None
        if q.dimension in kinds:
            return q.si
        got = "a plain number" if not q.unit else f"{q.unit!r} ({q.dimension})"
        if not q.unit:
            hint = "add a unit, e.g. " + " or ".join(f"{_number(q.value)} {DISPLAY[k]}"
                                                     for k in kinds)
        elif kinds == ("current", "voltage"):
            hint = ("a current (pA, nA) for a current-clamped cell, a voltage (mV) for a "
                    "voltage-clamped one")
        else:
            hint = "a current (pA, nA) for current noise, a conductance (nS) for conductance noise"
        self.c.fail(f"{what} needs " + " or ".join(_KIND[k] for k in kinds) + f", got {got}",
                    q.span, expected=" or ".join(DIMENSIONS[k] for k in kinds), hint=hint)
        return None

    def _same_kind(self, stimulus: str, quantities) -> bool:
        """True if the valid, known quantities of one stimulus share one dimension."""
        known = [q for q in quantities if q is not None and not isinstance(q, ast.ScanRef)]
        for q in known[1:]:
            if q.dimension != known[0].dimension:
                first = known[0]
                self.c.fail(f"{stimulus} mixes {_KIND[first.dimension]} and {_KIND[q.dimension]}: "
                            f"{first} and {q}", q.span,
                            expected=f"{DIMENSIONS[first.dimension]}, like {first}",
                            hint="give every amplitude of one stimulus in the same kind of unit")
                return False
        return True

    def _window(self, start, stop, what: str) -> bool:
        """Check ``from T1 to T2``: T1 a time >= 0, T2 a time after T1."""
        t1 = self._quantity(start, "time", f"the {what} start", minimum=0.0)
        t2 = self._quantity(stop, "time", f"the {what} end")
        if t1 is None or t2 is None:
            return False
        if t2 <= t1:
            hint = (f"did you mean 'from {_shown(stop)} to {_shown(start)}'?" if t2 < t1 else
                    "the window reads 'from START to END', with END later than START")
            self.c.fail(f"{what} ends before it starts: {_shown(stop)} is not later than "
                        f"{_shown(start)}", stop.span,
                        expected=f"a time later than {_shown(start)}", hint=hint)
            return False
        return True

    def _not_negative(self, q, value: float | None, what: str) -> bool:
        """For slots with a choice of dimension, where ``_quantity`` cannot check the bound."""
        if value is not None and value < 0:
            self.c.fail(f"{what} must be at least 0, got {q}", q.span,
                        expected=f"{_KIND[q.dimension]}, 0 or more",
                        hint=f"write it as {_number(-q.value)} {q.unit}")
            return False
        return value is not None

    def step(self, meta, children) -> ast.Step | None:
        amplitude, width, at = children
        ok = self._drive(amplitude, "the step amplitude") is not None
        if not self._width_and_start(width, at, "step", "duration") or not ok:
            return None
        return ast.Step(amplitude=amplitude, duration=width, at=at, span=self._span(meta))

    def step_family(self, meta, children) -> ast.StepFamily | None:
        start, stop, spacing, width, at = children
        span = self._span(meta)
        by = not isinstance(spacing, _Count)
        ends = [(start, "the first amplitude of the family"),
                (stop, "the last amplitude of the family")]
        if by:
            ends.append((spacing, "the family's step"))
        good = [q for q, what in ends if self._drive(q, what) is not None]
        ok = len(good) == len(ends)
        ok = self._same_kind("the step family", good) and ok
        count = None
        if not by:
            count = self._count(spacing, "the number of amplitudes in the family")
            ok = count is not None and ok
        ok = self._quantity(width, "time", "the step duration", minimum=0.0, inclusive=False) \
            is not None and ok
        ok = self._quantity(at, "time", "the step start", minimum=0.0) is not None and ok
        if not ok:
            return None
        values = self._family_values(start, stop, spacing if by else None, count,
                                     None if by else spacing, span)
        if values is None:
            return None
        return ast.StepFamily(start=start, stop=stop, step=spacing if by else None, count=count,
                              duration=width, at=at, values=values, span=span)

    def _family_values(self, start, stop, step, count: int | None, count_slot: _Count | None,
                       span: Span) -> tuple[Quantity, ...] | None:
        """The amplitudes of a step family, () while a bound is a scan reference, None on error."""
        if count is not None and count < 2:
            self.c.fail(f"a step family needs at least 2 amplitudes, got {count}",
                        count_slot.span, expected="2 or more amplitudes",
                        hint="for one amplitude write 'step A for W at T'")
            return None
        if any(isinstance(q, ast.ScanRef) for q in (start, stop, step)):
            return ()
        lo, hi = start.si, stop.si
        if step is not None:
            d = step.si
            if d == 0:
                self.c.fail("a step family with a zero step never reaches its end", step.span,
                            expected=f"a non-zero step towards {stop}",
                            hint="give a step, or use 'in N steps' for N evenly spaced amplitudes")
                return None
            if (hi - lo) * d < 0:
                self.c.fail(f"a step of {step} goes away from {stop}", step.span,
                            expected=f"a step with the sign of {stop} minus {start}",
                            hint=f"flip the sign: 'by {_number(-step.value)} {step.unit}'")
                return None
            n = int(math.floor((hi - lo) / d + 1e-9)) + 1
            spaced = [lo + d * k for k in range(min(n, _MAX_FAMILY_VALUES + 1))]
        else:
            if hi == lo:
                self.c.fail(f"a step family from {start} to {stop} has a zero step", stop.span,
                            expected=f"a last amplitude other than {start}",
                            hint="for one amplitude write 'step A for W at T'")
                return None
            n = count
            spaced = [lo + (hi - lo) * k / (n - 1) for k in range(min(n, _MAX_FAMILY_VALUES + 1))]
        if n > _MAX_FAMILY_VALUES:
            self.c.fail(f"this step family has {n} amplitudes, more than {_MAX_FAMILY_VALUES}",
                        span, expected=f"at most {_MAX_FAMILY_VALUES} amplitudes (one per sweep)",
                        hint="use a larger step or fewer steps")
            return None
        if n < 2:
            self.c.fail(f"a step family needs at least 2 amplitudes, got {n}", step.span,
                        expected="a step no larger than the distance from the first to the "
                                 "last amplitude",
                        hint="use a smaller step, or write one 'step A for W at T'")
            return None
        factor = to_si(1.0, start.unit)
        return tuple(Quantity(_tidy(v / factor), start.unit, span) for v in spaced)

    def ramp(self, meta, children) -> ast.Ramp | None:
        first, last, start, stop = children
        ends = ((first, "the ramp's first amplitude"), (last, "the ramp's last amplitude"))
        good = [q for q, what in ends if self._drive(q, what) is not None]
        ok = len(good) == 2 and self._same_kind("the ramp", good)
        ok = self._window(start, stop, "ramp") and ok
        if not ok:
            return None
        return ast.Ramp(start_amplitude=first, stop_amplitude=last, start=start, stop=stop,
                        span=self._span(meta))

    def sine(self, meta, children) -> ast.Sine | None:
        amplitude, frequency, start, stop, offset = children
        ok = self._not_negative(amplitude, self._drive(amplitude, "the sine amplitude"),
                                "the sine amplitude")
        if offset is not None:
            ok = self._drive(offset, "the sine offset") is not None and ok
            ok = ok and self._same_kind("the sine", (amplitude, offset))
        ok = self._quantity(frequency, "frequency", "the sine frequency", minimum=0.0,
                            inclusive=False) is not None and ok
        ok = self._window(start, stop, "sine") and ok
        if not ok:
            return None
        return ast.Sine(amplitude=amplitude, frequency=frequency, start=start, stop=stop,
                        offset=offset, span=self._span(meta))

    def chirp(self, meta, children) -> ast.Chirp | None:
        amplitude, f_start, f_stop, start, stop = children
        ok = self._not_negative(amplitude, self._drive(amplitude, "the chirp amplitude"),
                                "the chirp amplitude")
        low = self._quantity(f_start, "frequency", "the chirp's first frequency", minimum=0.0)
        high = self._quantity(f_stop, "frequency", "the chirp's last frequency")
        if low is not None and high is not None and high <= low:
            hint = (f"swap them: 'sweeping {_shown(f_stop)} to {_shown(f_start)}'" if high < low
                    else "for one fixed frequency write 'sine A at F from T1 to T2'")
            self.c.fail(f"chirp frequencies reversed: a chirp rises from {_shown(f_start)}, "
                        f"so it cannot end at {_shown(f_stop)}", f_stop.span,
                        expected=f"a frequency above {_shown(f_start)}", hint=hint)
            ok = False
        ok = low is not None and high is not None and ok
        ok = self._window(start, stop, "chirp") and ok
        if not ok:
            return None
        return ast.Chirp(amplitude=amplitude, f_start=f_start, f_stop=f_stop, start=start,
                         stop=stop, span=self._span(meta))

    def noise(self, meta, children) -> ast.Noise | None:
        mean, sd, tau, start, stop, reversal = children
        span = self._span(meta)
        kinds = ("current", "conductance")
        m = self._drive(mean, "the noise mean", kinds)
        s = self._drive(sd, "the noise SD", kinds)
        ok = m is not None and s is not None
        ok = ok and self._same_kind("the noise", (mean, sd))
        known = [q for q in (mean, sd) if isinstance(q, Quantity) and q.dimension in kinds]
        kind = known[0].dimension if ok and known else None
        if s is not None and not self._not_negative(sd, s, "the noise SD"):
            ok = False
        if kind == "conductance" and not self._not_negative(mean, m, "a conductance noise mean"):
            ok = False
        ok = self._quantity(tau, "time", "the noise time constant", minimum=0.0,
                            inclusive=False) is not None and ok
        ok = self._window(start, stop, "noise") and ok
        if reversal is not None:
            if self._quantity(reversal, "voltage", "the reversal potential") is None:
                ok = False
            elif kind == "current":
                self.c.fail("a reversal potential applies only to conductance noise",
                            reversal.span, expected="end of line (current noise drives no "
                                                    "reversal potential)",
                            hint="drop ', reversal ...', or give the mean and SD in nS")
                ok = False
        elif kind == "conductance":
            self.c.fail("conductance noise needs a reversal potential", span,
                        expected="', reversal E' at the end of the line, E a voltage",
                        hint="e.g. add ', reversal 0 mV' (excitatory) or ', reversal -75 mV' "
                             "(inhibitory)")
            ok = False
        if not ok:
            return None
        return ast.Noise(mean=mean, sd=sd, tau=tau, start=start, stop=stop, reversal=reversal,
                         span=span)

    def poisson(self, meta, children) -> ast.PoissonInput | None:
        rate, conductance, receptor, start, stop = children
        r = self._quantity(rate, "frequency", "the Poisson rate")
        ok = r is not None
        if r is not None and r < 0:
            self.c.fail(f"Poisson rate cannot be negative, got {rate}", rate.span,
                        expected="a frequency, 0 Hz or more",
                        hint=f"write it as {_number(-rate.value)} {rate.unit}")
            ok = False
        if receptor is None:
            ok = False
            if isinstance(conductance, Quantity) and conductance.unit \
                    and conductance.unit not in UNITS:
                # `of 1 AMPA`: the receptor was read as the conductance's unit.
                self.c.fail("Poisson input needs a conductance with its unit, then a receptor, "
                            f"got '{_number(conductance.value)} {conductance.unit}'",
                            conductance.span, expected="a conductance and a receptor, "
                                                       "e.g. '0.5 nS AMPA'",
                            hint=f"did you mean '{_number(conductance.value)} nS "
                                 f"{conductance.unit}'?")
            else:
                self.c.fail("Poisson input needs a receptor after its conductance",
                            conductance.span,
                            expected="a receptor type of the circuit, e.g. AMPA, NMDA, GABA_A",
                            hint=f"e.g. 'poisson {_shown(rate)} of {_shown(conductance)} AMPA "
                                 f"from {_shown(start)} to {_shown(stop)}'")
        else:
            ok = self._quantity(conductance, "conductance", "the peak conductance per input spike",
                                minimum=0.0) is not None and ok
        ok = self._window(start, stop, "Poisson input") and ok
        if not ok:
            return None
        return ast.PoissonInput(rate=rate, conductance=conductance, receptor=str(receptor),
                                start=start, stop=stop, span=self._span(meta),
                                receptor_span=self._tspan(receptor))

    def activate(self, meta, children) -> ast.Activate | None:
        fraction, cell_class, *times = children
        f = self._quantity(fraction, "percent", "the activated fraction", minimum=0.0,
                           inclusive=False)
        ok = f is not None
        if f is not None and f > 1.0:
            self.c.fail(f"the activated fraction cannot exceed 100 %, got {fraction}",
                        fraction.span, expected="a percentage above 0 and at most 100",
                        hint=f"'activate 100 % of {cell_class} ...' fires every projecting cell")
            ok = False
        ok = self._times(times, "an activation time", "activation times") and ok
        if not ok:
            return None
        return ast.Activate(fraction=fraction, cell_class=str(cell_class), times=tuple(times),
                            span=self._span(meta), class_span=self._tspan(cell_class))

    def stimulate(self, meta, children) -> ast.Stimulate:
        cell, turn, *items = children
        self.references.append(_Reference(str(cell), self._tspan(cell), "stimulate"))
        items = [i for i in items if i is not None]
        spikes = [i for i in items if isinstance(i, ast.SpikeTimes)]
        others = [i for i in items if not isinstance(i, ast.SpikeTimes)]
        for extra in spikes[1:]:
            self.c.fail("a second 'spikes at' line for the same cell", extra.span,
                        expected="all spike times of a cell on one line",
                        hint=f"merge it into the line {spikes[0].span.line}")
        if spikes and others:
            what = _STIMULUS_WORDS[type(others[0])]
            self.c.fail(f"cell {str(cell)!r} gets both spike times and {what}", others[0].span,
                        expected="either 'spikes at ...' alone or other stimuli",
                        hint=f"explicit spike times replace the cell's membrane, so {what} "
                             "would have no effect; drop one of them")
        return ast.Stimulate(cell=str(cell), items=tuple(items), span=self._span(meta), turn=turn)

    # --- result collectors ---------------------------------------------------------------
    def measure_item(self, meta, children) -> ast.MeasureItem:
        collector, source, *options = children
        seen: dict = {}
        kept = []
        for opt in options:
            if not self._once(seen, opt.name, opt.span, f"option '{opt.name}'"):
                continue
            rule = _MEASURE_OPTIONS.get(opt.name)
            # Unknown option names are left to the plan stage, which knows each collector's options.
            if rule is not None:
                dimension, minimum, inclusive = rule
                self._quantity(opt.value, dimension, f"the {opt.name} option", minimum=minimum,
                               inclusive=inclusive)
            kept.append(opt)
        source_span = None
        if source is not None:
            source_span = self._tspan(source)
            self.references.append(_Reference(str(source), source_span, f"{collector} to"))
        return ast.MeasureItem(collector=str(collector),
                               source=str(source) if source is not None else None,
                               options=tuple(kept), span=self._span(meta), source_span=source_span)

    def measure(self, meta, children) -> ast.Measure:
        cell, *items = children
        # `measure network:` reads the whole embedded network, not a selected cell
        if str(cell) != NETWORK_TARGET:
            self.references.append(_Reference(str(cell), self._tspan(cell), "measure"))
        return ast.Measure(cell=str(cell), items=tuple(items), span=self._span(meta))

    # --- references: published values ------------------------------------------------------
    def ref_field(self, meta, children):
        name, q = children
        return (str(name), q, self._tspan(name))

    def ref_value(self, meta, children):
        value, *fields = children
        return _RefLine("value", (value, fields), self._span(meta))

    def ref_range(self, meta, children):
        low, high, *fields = children
        return _RefLine("range", (low, high, fields), self._span(meta))

    def ref_source(self, meta, children):
        authors, year, journal = children
        return _RefLine("source", (_unquote(authors), year, _unquote(journal), self._tspan(authors)),
                        self._span(meta))

    def ref_condition(self, meta, children):
        name, first, second = (list(children) + [None])[:3]
        return _RefLine("condition", (name, first, second), self._span(meta))

    def agree_sd(self, meta, children):
        (number,) = children
        return _RefLine("agree", ("sd", Quantity(float(number), "", self._tspan(number))), self._span(meta))

    def agree_within(self, meta, children):
        (q,) = children
        if isinstance(q, Quantity) and q.unit in ("SD", "Sd", "sD"):
            return _RefLine("agree", ("sd", replace(q, unit="")), self._span(meta))
        return _RefLine("agree", ("within", q), self._span(meta))

    def agree_range(self, meta, children):
        return _RefLine("agree", ("range", None), self._span(meta))

    def ref_accept(self, meta, children):
        return _RefLine("accept", [(str(t), self._tspan(t)) for t in children], self._span(meta))

    def ref_memory(self, meta, children):
        return _RefLine("memory", True, self._span(meta))

    def ref_note(self, meta, children):
        (text,) = children
        return _RefLine("note", _unquote(text), self._span(meta))

    def _ref_number(self, q, dimension: str, what: str) -> bool:
        """A published number: no scan reference, and the measure's kind ("trace" is checked later)."""
        if isinstance(q, ast.ScanRef):
            self.c.fail(f"{what} cannot be scanned (@{q.name})", q.span,
                        expected="a published number with its unit", hint="write the number out")
            return False
        if dimension is None:
            return True   # an unknown measure has its own error; its numbers cannot be judged
        if dimension == "trace":
            if not self._known_unit(q, ("voltage", "current")):
                return False
            if q.dimension not in ("voltage", "current"):
                got = "a plain number" if not q.unit else f"{q.unit!r} ({q.dimension})"
                self.c.fail(f"{what} needs a voltage (current clamp) or a current (voltage clamp), got {got}",
                            q.span, expected="a voltage such as 1.3 mV, or a current such as 25 pA",
                            hint="give the unit of the recorded trace")
                return False
            return True
        if dimension == "fraction":
            if q.unit not in ("", "%"):
                self.c.fail(f"{what} is a fraction, got {q}", q.span,
                            expected="a percentage (e.g. 14 %) or a plain number from 0 to 1",
                            hint=f"drop the unit {q.unit!r}")
                return False
            if not 0.0 <= q.si <= 1.0:
                self.c.fail(f"{what} must lie between 0 and 1 (0 % and 100 %), got {q}", q.span,
                            expected="a percentage (e.g. 14 %) or a plain number from 0 to 1")
                return False
            return True
        return self._quantity(q, dimension, what) is not None

    def reference(self, meta, children):
        measure_tok, cell_tok, source_tok, *lines = children
        span = self._span(meta)
        measure = str(measure_tok)
        entry = REFERENCE_MEASURES.get(measure)
        ok = True
        if entry is None:
            self.c.fail(f"unknown measure {measure!r} in a reference", self._tspan(measure_tok),
                        expected="one of " + ", ".join(REFERENCE_MEASURES),
                        hint=suggest(measure, REFERENCE_MEASURES) or "see docs/language.md, 'reference'")
            ok = False
        dimension = entry["dimension"] if entry else None
        what = f"the published {measure}"
        self.references.append(_Reference(str(cell_tok), self._tspan(cell_tok), "reference"))
        if source_tok is not None:
            self.references.append(_Reference(str(source_tok), self._tspan(source_tok), "reference ... from"))
        seen: dict = {}
        got: dict = {"conditions": [], "accepted": [], "from_memory": False, "note": None}
        for line in lines:
            if line.kind == "condition":
                name_tok, first, second = line.payload
                key = ("condition", str(name_tok))
            else:
                key = line.kind
            label = f"'{key[1]}' condition" if isinstance(key, tuple) else f"'{line.kind}' line"
            if line.kind != "accept" and not self._once(seen, key, line.span, label + " in one reference"):
                ok = False
                continue
            if line.kind in ("value", "range"):
                numbers = line.payload[:-1]
                for q in numbers:
                    ok &= self._ref_number(q, dimension, what)
                if line.kind == "value":
                    got["value"] = numbers[0]
                else:
                    got["low"], got["high"] = numbers
                for name, q, fspan in line.payload[-1]:
                    if name not in ("sd", "n"):
                        self.c.fail(f"unknown field {name!r} of a published value", fspan,
                                    expected="'sd Q' (the published standard deviation) or 'n N' (cells or pairs)",
                                    hint=suggest(name, ("sd", "n")))
                        ok = False
                    elif not self._once(seen, ("field", name), fspan, f"'{name}' of the published value"):
                        ok = False
                    elif name == "sd":
                        if not self._ref_number(q, "number" if dimension == "fraction" and not q.unit else dimension,
                                                "the published SD"):
                            got["sd"] = None   # given, if wrongly: no second error about a missing SD
                            ok = False
                        elif isinstance(q, Quantity) and q.value < 0:
                            self.c.fail(f"a standard deviation cannot be negative, got {q}", q.span,
                                        expected="an SD of 0 or more")
                            ok = False
                        else:
                            got["sd"] = q
                    else:
                        n = None
                        if isinstance(q, ast.ScanRef):
                            self.c.fail("the published n cannot be scanned", q.span, expected="a whole number")
                        else:
                            n = self._count(_Count(f"{q.value:g}", q.unit, q.span), "the published n")
                        ok &= n is not None
                        got["n"] = n
            elif line.kind == "source":
                authors, year, journal, aspan = line.payload
                y = self._count(year, "the year of the source")
                if not authors.strip() or not journal.strip():
                    self.c.fail("a source needs its authors and its journal", aspan,
                                expected='source "AUTHORS" YEAR "JOURNAL VOLUME:PAGES"',
                                hint='e.g. source "Smith and Jones" 2001 "J Physiol 530:1-12"')
                    ok = False
                elif y is not None and not 1800 <= y <= 2100:
                    self.c.fail(f"{y} is not a publication year", year.span, expected="a year such as 1997")
                    ok = False
                got["source"] = (authors, y, journal)
            elif line.kind == "condition":
                ok &= self._ref_condition(name_tok, first, second, got)
            elif line.kind == "agree":
                if not self._ref_rule(line.payload, dimension, measure, got, line.span):
                    got["agree"] = ("failed", None, line.span)   # its error is out; no "missing rule" too
                    ok = False
            elif line.kind == "accept":
                got["accepted"].extend(line.payload)
            elif line.kind == "memory":
                got["from_memory"] = True
            elif line.kind == "note":
                got["note"] = line.payload
        example = ('source "AUTHORS" YEAR "JOURNAL VOLUME:PAGES", e.g. '
                   'source "Smith and Jones" 2001 "J Physiol 530:1-12"')
        if "source" not in got:
            self.c.fail(f"the reference for {measure} of {cell_tok} has no source", span,
                        expected="a 'source' line: " + example,
                        hint="say where the published value comes from; add 'from memory' if it is recalled")
            ok = False
        if "value" not in got and "low" not in got:
            self.c.fail(f"the reference for {measure} of {cell_tok} gives no published value", span,
                        expected="a 'value Q, sd Q, n N' line or a 'range Q to Q' line",
                        hint="e.g. 'value 1.3 mV, sd 1.1 mV, n 138'")
            ok = False
        if "agree" not in got:
            self.c.fail(f"the reference for {measure} of {cell_tok} has no agreement rule", span,
                        expected="'agree within K sd', 'agree within P %', 'agree within Q' (in the measure's "
                                 "unit) or 'agree inside range'",
                        hint="e.g. 'agree within 2 sd'")
            ok = False
        else:
            rule, tol, rspan = got["agree"]
            if rule == "sd" and "sd" not in got:
                self.c.fail("'agree within ... sd' needs the published SD", rspan,
                            expected="an 'sd Q' field on the value line, e.g. 'value 1.3 mV, sd 1.1 mV'",
                            hint="give the SD, or use 'agree within 30 %'")
                ok = False
            if rule in ("sd", "relative", "absolute") and "value" not in got:
                self.c.fail("this rule compares with the published mean, and the reference gives none", rspan,
                            expected="a 'value Q' line", hint="give the mean, or use 'agree inside range'")
                ok = False
            if rule == "range" and "low" not in got:
                self.c.fail("'agree inside range' needs the published range", rspan,
                            expected="a 'range Q to Q' line", hint="e.g. 'range 0.15 mV to 5.5 mV'")
                ok = False
        if "low" in got and ok and got["low"].si > got["high"].si:
            self.c.fail(f"the range runs backwards: {got['low']} to {got['high']}", got["low"].span,
                        expected="the low end first")
            ok = False
        declared = {c.name for c in got["conditions"]}
        accepted = []
        for name, aspan in got["accepted"]:
            if name not in REFERENCE_CONDITIONS:
                self.c.fail(f"unknown condition {name!r} in 'accept different'", aspan,
                            expected="one of " + ", ".join(REFERENCE_CONDITIONS),
                            hint=suggest(name, REFERENCE_CONDITIONS))
                ok = False
            elif name not in declared:
                self.c.fail(f"'accept different {name}', but the reference states no {name}", aspan,
                            expected=f"a '{name} ...' line in this reference",
                            hint=f"state the {name} of the published data, or drop it from 'accept different'")
                ok = False
            elif name not in accepted:
                accepted.append(name)
        if not ok:
            return None
        authors, year, journal = got["source"]
        rule, tol, _ = got["agree"]
        return ast.Reference(measure=measure, cell=str(cell_tok),
                             source_cell=str(source_tok) if source_tok is not None else None,
                             value=got.get("value"), sd=got.get("sd"), low=got.get("low"), high=got.get("high"),
                             n=got.get("n"), authors=authors, year=year, journal=journal, rule=rule, tolerance=tol,
                             conditions=tuple(got["conditions"]), accepted=tuple(accepted),
                             from_memory=got["from_memory"], note=got["note"], span=span,
                             measure_span=self._tspan(measure_tok), cell_span=self._tspan(cell_tok),
                             source_span=self._tspan(source_tok) if source_tok is not None else None)

    def _ref_condition(self, name_tok: Token, first, second, got: dict) -> bool:
        name = str(name_tok)
        kind = REFERENCE_CONDITIONS.get(name)
        if kind is None:
            words = {"value": "value Q, sd Q, n N", "range": "range Q to Q", "source": 'source "A" YEAR "J"',
                     "agree": "agree within K sd", "accept": "accept different NAME", "note": 'note "TEXT"'}
            self.c.fail(f"unknown line {name!r} in a reference", self._tspan(name_tok),
                        expected="a condition (" + ", ".join(REFERENCE_CONDITIONS) + ") or one of: "
                                 + "; ".join(words.values()),
                        hint=suggest(name, [*REFERENCE_CONDITIONS, *words]))
            return False
        span = self._tspan(name_tok)
        if kind == "text":
            if isinstance(first, Token):
                text = _unquote(first) if first.type == "STRING" else str(first)
                got["conditions"].append(ast.ReferenceCondition(name=name, low=text, span=span))
                return True
            self.c.fail(f"the {name} of the published data is a word or a quoted text", span,
                        expected=f'e.g. {name} rat' if name == "species" else f'e.g. {name} "P14-16"',
                        hint="quote text that has spaces or dashes")
            return False
        if not isinstance(first, (Quantity, ast.ScanRef)):
            example = {"calcium": "2 mM", "magnesium": "1 mM", "temperature": "32 degC to 34 degC"}[name]
            self.c.fail(f"the {name} of the published data is a number with its unit", span,
                        expected=f"e.g. {name} {example}")
            return False
        dimension = "temperature" if name == "temperature" else "concentration"
        ok = all(self._ref_number(q, dimension, f"the published {name}") for q in (first, second) if q is not None)
        if ok and second is not None and first.si > second.si:
            self.c.fail(f"the {name} range runs backwards: {first} to {second}", first.span,
                        expected="the low end first")
            ok = False
        if ok:
            got["conditions"].append(ast.ReferenceCondition(name=name, low=first, high=second, span=span))
        return ok

    def _ref_rule(self, payload, dimension: str | None, measure: str, got: dict, line_span: Span) -> bool:
        rule, q = payload
        if rule == "sd":
            if q.value <= 0:
                self.c.fail(f"the tolerance must be more than 0 SD, got {q.value:g}", q.span,
                            expected="a positive number of published SDs, e.g. 2 sd")
                return False
            got["agree"] = ("sd", q, q.span)
            return True
        if rule == "range":
            got["agree"] = ("range", None, line_span)
            return True
        if dimension is None:
            got["agree"] = ("failed", None, line_span)   # unknown measure: reported already
            return True
        if isinstance(q, ast.ScanRef):
            self.c.fail(f"a tolerance cannot be scanned (@{q.name})", q.span, expected="a number with its unit")
            return False
        kinds = {"trace": "a voltage or a current (the recorded trace's unit)",
                 "fraction": "a plain number (absolute, e.g. 0.05)"}
        absolute = kinds[dimension] if dimension in kinds else DIMENSIONS[dimension]
        expected = f"'K sd' (published SDs), a percentage (relative to the published mean) or {absolute}"
        if q.unit and q.unit not in UNITS:
            self._known_unit(q, ("percent", "voltage", "current") if dimension == "trace"
                             else ("percent", dimension if dimension != "fraction" else "number"))
            return False
        if q.unit == "%":
            kind = "relative"
        else:
            wanted = {"trace": ("voltage", "current"), "fraction": ("number",)}.get(dimension, (dimension,))
            if q.dimension not in wanted:
                got_text = "a plain number" if not q.unit else f"{q.unit!r} ({q.dimension})"
                self.c.fail(f"a tolerance in the wrong unit for {measure}: got {got_text}", q.span,
                            expected=expected,
                            hint=f"e.g. 'agree within 2 sd' or 'agree within 25 %'")
                return False
            kind = "absolute"
        if q.value <= 0:
            self.c.fail(f"the tolerance must be more than 0, got {q}", q.span, expected=expected)
            return False
        got["agree"] = (kind, q, q.span)
        return True

    # --- the whole file -------------------------------------------------------------------
    def start(self, meta, children) -> ast.Protocol | None:
        found: dict[str, object] = {}
        seen: dict = {}
        recordings, stimuli, measures = [], [], []
        scans: list[ast.Scan] = []
        references: list[ast.Reference] = []
        for statement in children:
            if isinstance(statement, ast.Reference):
                references.append(statement)
                continue
            if isinstance(statement, ast.Scan):
                if any(x.name == statement.name for x in scans):
                    first = next(x for x in scans if x.name == statement.name)
                    self.c.fail(f"duplicate scan @{statement.name}", statement.span,
                                expected="one scan per name", hint=f"the first one is at line {first.span.line}")
                else:
                    scans.append(statement)
                continue
            kind, cell, span = self._statement_key(statement)
            if statement is None or kind is None:
                continue
            key = (kind, cell)
            what = f"'{kind}' statement" if cell is None else f"'{kind} {cell}' statement"
            hint = None
            if cell is not None and key in seen:
                hint = (f"the first one is at line {seen[key].line}; put everything for "
                        f"{cell!r} in one '{kind}' statement")
            if not self._once(seen, key, span, what, hint):
                continue
            if kind == "record":
                recordings.append(statement)
            elif kind == "stimulate":
                stimuli.append(statement)
            elif kind == "measure":
                measures.append(statement)
            else:
                found[kind] = statement
        for kind, (meaning, example) in _REQUIRED.items():
            if kind not in found:
                self.c.fail(f"missing '{kind}' statement ({meaning})",
                            Span(self.file, 1, 1, 1, 2), expected=example,
                            hint=f"every protocol needs exactly one '{kind}' statement")
        cells = found.get("cells")
        if cells is not None:
            selected = [p.name for p in cells.picks]
            selected += [m for p in cells.picks if isinstance(p, ast.PatchPick) for m in p.members]
            for ref in self.references:
                if ref.name not in selected:
                    self.c.fail(f"unknown cell {ref.name!r} in '{ref.where}'", ref.span,
                                expected=("a cell selected in 'cells:': " + ", ".join(selected))
                                if selected else "a cell selected in 'cells:'",
                                hint=suggest(ref.name, selected))
        self._check_drives(recordings, stimuli)
        if cells is not None:
            self._check_turns(cells, stimuli)
            references = self._check_references(references, cells, recordings, measures)
        sweeps = found.get("sweeps")
        if sweeps is not None and self.sweep_count_ok:
            self._check_families(sweeps, stimuli)
        names = [x.name for x in scans]
        used = {ref.name for ref in self.scan_uses}
        for ref in self.scan_uses:
            if ref.name not in names and ref.name not in self.failed_scans:
                self.c.fail(f"@{ref.name} is not scanned", ref.span,
                            expected="a name defined by a 'scan @name: ...' line"
                            + (": " + ", ".join("@" + n for n in names) if names else ""),
                            hint=(lambda h: h.replace("'", "'@", 1) if h else
                                  f"add a line such as 'scan @{ref.name}: 1, 2, 3' with units")(
                                      suggest(ref.name, names)))
        for x in scans:
            if x.name not in used:
                self.c.fail(f"scan @{x.name} is never used", x.span,
                            expected=f"@{x.name} in a quantity slot, e.g. 'pulse @{x.name} for 2 ms at 100 ms'",
                            hint="use it or delete the scan line")
        n_points = math.prod(len(x.values) for x in scans) if scans else 1
        if n_points > _MAX_SCAN_POINTS:
            self.c.fail(f"the scans make {n_points} run points, more than {_MAX_SCAN_POINTS}", scans[0].span,
                        expected=f"at most {_MAX_SCAN_POINTS} points in all", hint="scan fewer values")
        if any(kind not in found for kind in _REQUIRED):
            return None
        title, circuit = found["protocol"], found["circuit"]
        bath = found.get("bath")
        simulate = found.get("simulate")
        lesions = found.get("lesions")
        network = found.get("network")
        self._check_mode(simulate, network)
        return ast.Protocol(title=title.text, circuit=circuit.path, seed=circuit.seed,
                            sweeps=found["sweeps"], cells=cells,
                            bath=bath.items if bath else (),
                            settings=simulate.settings if simulate else (),
                            recordings=tuple(recordings), stimuli=tuple(stimuli),
                            measures=tuple(measures), scans=tuple(scans),
                            lesions=lesions.items if lesions else (), network=network,
                            references=tuple(references), file=self.file, span=title.span,
                            circuit_span=circuit.path_span)

    def _check_references(self, references: list[ast.Reference], cells: ast.Cells,
                          recordings: list[ast.Recording], measures: list[ast.Measure]) -> list[ast.Reference]:
        """A reference names a measure the protocol collects, of the kind the cell's recording gives."""
        patches = {p.name for p in cells.picks if isinstance(p, ast.PatchPick)}
        picks = {p.name: p for p in cells.picks}
        modes = {r.cell: r.mode for r in recordings}
        blocks = {m.cell: m for m in measures}
        kept, seen = [], {}
        for ref in references:
            entry = REFERENCE_MEASURES[ref.measure]
            what = f"reference {ref.measure} of {ref.cell}" + (f" from {ref.source_cell}" if ref.source_cell else "")
            if not self._once(seen, (ref.measure, ref.cell, ref.source_cell), ref.span, f"'{what}'"):
                continue
            on_patch = ref.cell in patches
            wants_source = entry["source"] and not on_patch
            if wants_source and ref.source_cell is None:
                self.c.fail(f"'{what}' needs the presynaptic cell", ref.cell_span,
                            expected=f"'reference {ref.measure} of {ref.cell} from PRE'",
                            hint="name the stimulated cell, e.g. 'from pre'")
                continue
            if not wants_source and ref.source_cell is not None:
                why = "a patch is tested pair by pair" if on_patch else "it is a property of one cell"
                self.c.fail(f"'{ref.measure}' takes no 'from' cell: {why}", ref.source_span,
                            expected=f"'reference {ref.measure} of {ref.cell}'", hint=f"drop 'from {ref.source_cell}'")
                continue
            usable = [c for c in entry["collectors"] if (COLLECTORS[c].get("scope") == "patch") == on_patch]
            block = blocks.get(ref.cell)
            items = block.items if block else ()
            found = [i for i in items if i.collector in usable and i.source == (ref.source_cell if wants_source else None)]
            if not found:
                collector = usable[0] if usable else entry["collectors"][0]
                item = f"{collector} to {ref.source_cell}" if wants_source else collector
                self.c.fail(f"'{what}' compares a measure the protocol does not collect", ref.measure_span,
                            expected=f"'{item}' in a 'measure {ref.cell}:' block",
                            hint=f"add '{item}' under 'measure {ref.cell}:'" if block else
                                 f"add a block 'measure {ref.cell}:' with the line '{item}'")
                continue
            if ref.measure == "probability" and not on_patch:
                pick = picks.get(ref.cell)
                linked = [c for c in getattr(pick, "constraints", ()) if isinstance(c, ast.ReceivingFrom)
                          and c.source == ref.source_cell]
                if linked:
                    self.c.fail(f"'{what}': {ref.cell!r} is selected 'receiving from {ref.source_cell}', so every "
                                "tested pair is connected", linked[0].span,
                                expected="pairs selected by distance only",
                                hint=f"drop 'receiving from {ref.source_cell}' (a separate protocol can measure the "
                                     "connected pairs' responses)")
                    continue
            if entry["dimension"] == "trace":
                trace = "current" if modes.get(ref.cell) == "voltage clamp" else "voltage"
                mode = "voltage clamp" if trace == "current" else "current clamp"
                # the published numbers are voltages or currents already (lowering); the tolerance only
                # when it is absolute (a relative one is in %, an SD-rule one a plain count of SDs)
                candidates = [ref.value, ref.sd, ref.low, ref.high] + ([ref.tolerance] if ref.rule == "absolute" else [])
                bad = [q for q in candidates if isinstance(q, Quantity) and q.dimension != trace]
                if bad:
                    self.c.fail(f"{ref.cell!r} is recorded in {mode}, so its {ref.measure} is a {trace}, got {bad[0]}",
                                bad[0].span, expected=DIMENSIONS[trace],
                                hint=f"give the published value in {DISPLAY[trace]}, or record {ref.cell!r} in the "
                                     "mode the paper used")
                    continue
            kept.append(ref)
        return kept

    def _check_turns(self, cells: ast.Cells, stimuli: list[ast.Stimulate]) -> None:
        """A patch is stimulated one cell at a time (`in turn every T`); a single cell is not."""
        patches = {p.name for p in cells.picks if isinstance(p, ast.PatchPick)}
        for block in stimuli:
            if block.cell in patches and block.turn is None:
                self.c.fail(f"stimulating every cell of the patch {block.cell!r} at once cannot tell which one "
                            "evoked a response", block.span,
                            expected=f"'stimulate {block.cell} in turn every T:'",
                            hint="give a time between turns longer than one cell's stimuli and its responses, "
                                 "e.g. 'in turn every 300 ms'")
            elif block.cell not in patches and block.turn is not None:
                self.c.fail(f"'in turn' applies to a patch, and {block.cell!r} is a single cell", block.turn.span,
                            expected=f"'stimulate {block.cell}:'", hint="drop 'in turn every ...'")

    def _check_mode(self, simulate, network) -> None:
        """``simulate embedded`` needs a ``network:`` block; ``simulate isolated`` excludes one."""
        names = {s.name: s for s in simulate.settings} if simulate else {}
        if "isolated" in names and "embedded" in names:
            self.c.fail("'isolated' and 'embedded' together", names["embedded"].span,
                        expected="one simulation mode", hint="keep one of them")
        elif "embedded" in names and network is None:
            self.c.fail("'simulate embedded' without a 'network:' block", names["embedded"].span,
                        expected="a 'network:' block giving the simulated region",
                        hint="add 'network:' with a line such as 'region within 300 um of post'")
        elif "isolated" in names and network is not None:
            self.c.fail("a 'network:' block in an isolated simulation", network.span,
                        expected="'simulate embedded' (or no mode: the network block implies it)",
                        hint="drop 'isolated' from the simulate line, or drop the network block")

    def _check_drives(self, recordings: list[ast.Recording], stimuli: list[ast.Stimulate]) -> None:
        """Amplitudes must fit the recording mode: currents in current clamp (and on cells
        without a record line), voltages in voltage clamp; a spike source cannot be clamped."""
        modes = {r.cell: r for r in recordings}
        for block in stimuli:
            if block.cell in self.failed_records:
                continue
            rec = modes.get(block.cell)
            clamped = rec is not None and rec.mode == "voltage clamp"
            for item in block.items:
                if clamped and isinstance(item, ast.SpikeTimes):
                    self.c.fail(f"cell {block.cell!r} is voltage-clamped (line {rec.span.line}), "
                                "but 'spikes at' makes it a spike source with no membrane",
                                item.span, expected="stimuli that act on a membrane",
                                hint=f"drop 'spikes at', or use 'record {block.cell}: off'")
                    break
                drive = _drive_of(item)
                if drive is None:
                    continue
                dimension, q = drive
                if clamped and dimension == "current":
                    if isinstance(item, (ast.Pulse, ast.Train)):
                        hint = (f"'{type(item).__name__.lower()}' injects current; for a command "
                                "step write 'step A for W at T' with A in mV, or record "
                                f"{block.cell!r} in current clamp")
                    else:
                        hint = (f"give the amplitude in mV (a step from the holding potential), "
                                f"or record {block.cell!r} in current clamp")
                    self.c.fail("voltage clamp on a cell that is also current-injected: "
                                f"{block.cell!r} is clamped at line {rec.span.line} and gets "
                                f"{_STIMULUS_WORDS[type(item)]} of {q}", q.span,
                                expected="a voltage: on a voltage-clamped cell an amplitude is "
                                         "a command step from the holding potential",
                                hint=hint)
                    break
                if not clamped and dimension == "voltage":
                    kind = _STIMULUS_WORDS[type(item)].removeprefix("a ")
                    if rec is None:
                        where = f"{block.cell!r} has no record line, so it is current-clamped"
                        hint = f"add 'record {block.cell}: voltage clamp, holding -70 mV'"
                    else:
                        where = f"{block.cell!r} is recorded {rec.mode!r} (line {rec.span.line})"
                        hint = (f"change line {rec.span.line} to 'record {block.cell}: voltage "
                                "clamp, holding -70 mV', or give the amplitude as a current")
                    self.c.fail(f"a voltage {kind} needs 'record {block.cell}: voltage clamp'",
                                q.span, expected=f"a current, as {where}", hint=hint)
                    break

    def _check_families(self, sweeps: ast.Sweeps, stimuli: list[ast.Stimulate]) -> None:
        """A step family gives one amplitude per sweep, so it needs exactly that many sweeps."""
        for block in stimuli:
            for item in block.items:
                if not isinstance(item, ast.StepFamily):
                    continue
                n = len(item.values) or item.count
                if n is None or n == sweeps.count:
                    continue
                self.c.fail(f"the step family has {n} amplitudes but the protocol runs "
                            f"{sweeps.count} sweeps", item.span,
                            expected=f"{sweeps.count} amplitudes, one per sweep",
                            hint=f"set 'sweeps {n} every {_shown(sweeps.interval)}' (line "
                                 f"{sweeps.span.line}), or change the family")

    @staticmethod
    def _statement_key(statement) -> tuple[str | None, str | None, Span | None]:
        if isinstance(statement, _Title):
            return "protocol", None, statement.span
        if isinstance(statement, _Circuit):
            return "circuit", None, statement.span
        if isinstance(statement, _Bath):
            return "bath", None, statement.span
        if isinstance(statement, ast.Cells):
            return "cells", None, statement.span
        if isinstance(statement, ast.Sweeps):
            return "sweeps", None, statement.span
        if isinstance(statement, _Simulate):
            return "simulate", None, statement.span
        if isinstance(statement, _Lesions):
            return "lesions", None, statement.span
        if isinstance(statement, ast.Network):
            return "network", None, statement.span
        if isinstance(statement, ast.Recording):
            return "record", statement.cell, statement.span
        if isinstance(statement, ast.Stimulate):
            return "stimulate", statement.cell, statement.span
        if isinstance(statement, ast.Measure):
            return "measure", statement.cell, statement.span
        return None, None, None
