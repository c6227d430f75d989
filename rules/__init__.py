"""Rules: the spec, the state grid, factors and move rules, and compilation to an operator.

Lowest layer of stateworth: knows nothing of solvers, valuation or gRPC.
"""

from stateworth.rules.artifact import load_model, read_manifest, save_model
from stateworth.rules.compiled import CompiledModel, compile_model, estimate_bytes
from stateworth.rules.grid import Grid
from stateworth.rules.spec import Spec, load_spec, parse_spec

__all__ = ["CompiledModel", "Grid", "Spec", "compile_model", "estimate_bytes", "load_model",
           "load_spec", "parse_spec", "read_manifest", "save_model"]
