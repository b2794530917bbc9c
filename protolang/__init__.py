"""protolang: a declarative language for in-silico paired-recording experiments, compiled to Brian2.

``protolang.load(path)`` parses a protocol; ``.check()``, ``.plan()`` and ``.run(out=...)`` take it
through the pipeline. Importing this package loads only the front end (lark); Brian2, pandas
and matplotlib are imported by the stages that need them.
"""

from .api import Experiment as Experiment
from .api import Result as Result
from .api import __version__ as __version__
from .api import load as load
from .api import loads as loads
from .language.errors import ProtocolError as ProtocolError

__all__ = ["Experiment", "Result", "ProtocolError", "load", "loads", "__version__"]
