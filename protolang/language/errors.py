"""Source spans and user-facing diagnostics: every user error is rendered here, one way.

A diagnostic reads::

    demo/pair.protocol:12:19: error: unknown cell class 'pyramidal_dep'
        pre is pyramidal_dep
               ^^^^^^^^^^^^^
      expected: a cell class of circuit 'demo/slab.circuit.yaml'
      hint: did you mean 'pyramidal_deep'?

User mistakes raise :class:`ProtocolError` (a list of diagnostics); broken
invariants inside protolang are plain ``AssertionError`` ("internal error").
"""

from __future__ import annotations

import difflib
from dataclasses import dataclass, field
from typing import Iterable, Sequence

MAX_SHOWN = 10


@dataclass(frozen=True, slots=True)
class Span:
    """A region of a source file: 1-based line and column, end column exclusive."""

    file: str
    line: int
    column: int
    end_line: int | None = None
    end_column: int | None = None

    def __str__(self) -> str:
        return f"{self.file}:{self.line}:{self.column}"


@dataclass(frozen=True, slots=True)
class Diagnostic:
    """One problem found in a user's file."""

    message: str
    span: Span | None
    expected: str | None = None
    hint: str | None = None
    severity: str = "error"


def suggest(word: str, choices: Iterable[str]) -> str | None:
    """Return "did you mean 'x'?" for the closest of ``choices``, or None."""
    choices = list(choices)
    close = difflib.get_close_matches(word, choices, n=1, cutoff=0.6)
    if not close:
        lowered = {c.lower(): c for c in choices}
        if word.lower() in lowered:
            close = [lowered[word.lower()]]
    return f"did you mean {close[0]!r}?" if close else None


_source_cache: dict[str, str] = {}


def remember_source(file: str, text: str) -> None:
    """Keep a file's text so that diagnostics can quote its lines."""
    _source_cache[file] = text


def _source_line(span: Span) -> str | None:
    text = _source_cache.get(span.file)
    if text is None:
        try:
            with open(span.file, encoding="utf-8") as fh:
                text = fh.read()
        except OSError:
            return None
        _source_cache[span.file] = text
    lines = text.splitlines()
    if 1 <= span.line <= len(lines):
        return lines[span.line - 1]
    return None


def render(diag: Diagnostic) -> str:
    """Render one diagnostic as ``file:line:col: error: message`` plus context."""
    where = f"{diag.span}: " if diag.span else ""
    out = [f"{where}{diag.severity}: {diag.message}"]
    if diag.span is not None:
        line = _source_line(diag.span)
        if line is not None:
            col = max(diag.span.column, 1)
            width = 1
            if diag.span.end_column and (diag.span.end_line in (None, diag.span.line)):
                width = max(diag.span.end_column - col, 1)
            width = min(width, max(len(line) - col + 1, 1))
            out.append("    " + line.expandtabs(1))
            out.append("    " + " " * (col - 1) + "^" * width)
    if diag.expected:
        out.append(f"  expected: {diag.expected}")
    if diag.hint:
        out.append(f"  hint: {diag.hint}")
    return "\n".join(out)


@dataclass
class ProtocolError(Exception):
    """One or more user errors; ``str()`` renders all of them (at most MAX_SHOWN)."""

    diagnostics: list[Diagnostic] = field(default_factory=list)

    def __post_init__(self) -> None:
        Exception.__init__(self, self.diagnostics)

    def __str__(self) -> str:
        shown = [render(d) for d in self.diagnostics[:MAX_SHOWN]]
        more = len(self.diagnostics) - MAX_SHOWN
        if more > 0:
            shown.append(f"... and {more} more")
        return "\n".join(shown)

    def __reduce__(self):  # survive pickling across worker processes
        return (ProtocolError, (self.diagnostics,))


class Collector:
    """Gathers diagnostics during a stage and raises them once at the end."""

    def __init__(self) -> None:
        self.diagnostics: list[Diagnostic] = []

    def fail(self, message: str, span: Span | None, expected: str | None = None,
             hint: str | None = None) -> None:
        self.diagnostics.append(Diagnostic(message, span, expected, hint))

    def warn(self, message: str, span: Span | None, hint: str | None = None) -> None:
        self.diagnostics.append(Diagnostic(message, span, None, hint, severity="warning"))

    @property
    def errors(self) -> list[Diagnostic]:
        return [d for d in self.diagnostics if d.severity == "error"]

    @property
    def warnings(self) -> list[Diagnostic]:
        return [d for d in self.diagnostics if d.severity == "warning"]

    def raise_if_any(self) -> None:
        if self.errors:
            raise ProtocolError(self.errors)


def error(message: str, span: Span | None, expected: str | None = None,
          hint: str | None = None) -> ProtocolError:
    """Build a single-diagnostic ProtocolError (the stage's ``fail`` choke point)."""
    return ProtocolError([Diagnostic(message, span, expected, hint)])


def join_errors(errors: Sequence[ProtocolError]) -> ProtocolError:
    return ProtocolError([d for e in errors for d in e.diagnostics])
