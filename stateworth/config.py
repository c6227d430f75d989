"""Process-wide configuration: the one place where global JAX settings are made.

* float64 everywhere. Value functions of chains with beta close to 1 lose digits quickly in
  float32 (the condition number of I - beta P is about 1 / (1 - beta), 126 for 10 % a year
  monthly), so every array in stateworth is float64.
* ``STATEWORTH_MEMORY_LIMIT_GB`` caps the memory a compile or solve may plan to use; grids whose
  estimate exceeds it are refused before anything is allocated. Default 12 GB.
"""

from __future__ import annotations

import os

import jax

jax.config.update("jax_enable_x64", True)

DEFAULT_MEMORY_LIMIT_GB = 12.0


def memory_limit_bytes() -> int:
    """The configured memory limit in bytes (``STATEWORTH_MEMORY_LIMIT_GB``, default 12)."""
    raw = os.environ.get("STATEWORTH_MEMORY_LIMIT_GB", "")
    try:
        gb = float(raw) if raw else DEFAULT_MEMORY_LIMIT_GB
    except ValueError:
        gb = DEFAULT_MEMORY_LIMIT_GB
    return int(gb * 1024**3)
