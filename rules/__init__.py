"""Rules: the spec, the state grid, factors and move rules, and compilation to an operator.

Lowest layer of stateworth: knows nothing of solvers, valuation or gRPC. The names below load
on first use, so ``from stateworth.rules.spec import load_spec`` does not import JAX.
"""

from __future__ import annotations

import importlib
from typing import Any

_NAMES = {
    "load_model": "artifact", "read_manifest": "artifact", "save_model": "artifact", "model_files": "artifact",
    "clean_leftovers": "artifact",
    "CompiledModel": "compiled", "compile_model": "compiled", "estimate_bytes": "compiled",
    "Grid": "grid",
    "Spec": "spec", "load_spec": "spec", "parse_spec": "spec",
}

__all__ = sorted(_NAMES)


def __getattr__(name: str) -> Any:
    module = _NAMES.get(name)
    if module is None:
        raise AttributeError(f"module 'stateworth.rules' has no attribute '{name}'")
    return getattr(importlib.import_module(f"stateworth.rules.{module}"), name)
