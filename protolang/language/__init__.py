"""The protolang language front end: protocol text in, checked AST out, and back to canonical text."""

from .ast import dump as dump
from .errors import ProtocolError as ProtocolError
from .errors import Span as Span
from .format import format_protocol as format_protocol
from .parser import parse as parse
from .parser import parse_file as parse_file

__all__ = ["parse", "parse_file", "format_protocol", "ProtocolError", "Span", "dump"]
