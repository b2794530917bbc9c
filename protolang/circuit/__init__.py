"""Circuit files: YAML -> validated Circuit (with spans); instantiate(circuit, seed) -> cells and connections."""

from .build import Instance as Instance
from .build import instantiate as instantiate
from .schema import Circuit as Circuit
from .schema import load_circuit as load_circuit

__all__ = ["Circuit", "Instance", "instantiate", "load_circuit"]
