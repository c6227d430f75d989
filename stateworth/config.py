"""Process-wide configuration: the one place where global JAX settings are made.

* float64 everywhere, switched by :func:`float64`, which every function that makes JAX arrays
  calls first (importing stateworth switches nothing). Value functions of chains with beta close to 1 lose digits quickly in
  float32 (the condition number of I - beta P is about 1 / (1 - beta), 126 for 10 % a year
  monthly), so values, residuals and the Krylov basis are float64; only the preconditioner
  (an approximate inverse by design) runs in float32 (`solver/preconditioner.py`).
* ``STATEWORTH_MEMORY_LIMIT_GB`` caps the memory a compile or solve may plan to use; grids whose
  estimate exceeds it are refused before anything is allocated. Default 12 GB.
* Huge pages for large buffers (Linux, glibc 2.35 or later): XLA allocates a solve's Krylov basis
  afresh on every call, and first touching that memory in 4 KiB pages was a quarter of a solve
  at 3.6 x 10^5 states (0.09 s of page faults for 230 MB). The glibc tunable
  ``glibc.malloc.hugetlb=1`` makes malloc ask for transparent huge pages on large blocks. glibc
  reads it at process start, so it is an environment variable, not a setting here: ``make``
  exports ``GLIBC_TUNABLES=glibc.malloc.hugetlb=1`` for tests, demo and benchmarks; set it the
  same way for ``stateworth`` commands that solve large grids. Results do not depend on it.
"""

from __future__ import annotations

import os

DEFAULT_MEMORY_LIMIT_GB = 12.0


def float64() -> None:
    """Switch JAX to 64-bit floats (idempotent; imports JAX). Called by the numerical entry points
    (compiling a model, solving, fitting) before they make arrays; a caller using JAX directly
    on stateworth's operators calls it too."""
    import jax

    if not jax.config.jax_enable_x64:
        jax.config.update("jax_enable_x64", True)


def memory_limit_bytes() -> int:
    """The configured memory limit in bytes (``STATEWORTH_MEMORY_LIMIT_GB``, default 12)."""
    raw = os.environ.get("STATEWORTH_MEMORY_LIMIT_GB", "")
    try:
        gb = float(raw) if raw else DEFAULT_MEMORY_LIMIT_GB
    except ValueError:
        gb = DEFAULT_MEMORY_LIMIT_GB
    return int(gb * 1024**3)

