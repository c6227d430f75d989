"""Process-wide configuration: the one place where global JAX settings are made.

* float64 everywhere, switched by :func:`use_jax`, which every function that makes JAX arrays
  calls first (importing stateworth switches nothing). Value functions of chains with beta close to 1 lose digits quickly in
  float32 (the condition number of I - beta P is about 1 / (1 - beta), 126 for 10 % a year
  monthly), so values, residuals and the Krylov basis are float64; only the preconditioner
  (an approximate inverse by design) runs in float32 (`solver/preconditioner.py`).
* JAX's persistent compilation cache, on by default in a per-user folder
  (``~/.cache/stateworth/jax``); ``STATEWORTH_COMPILE_CACHE`` moves it (a folder) or switches
  it off (``off``). See :func:`use_jax`.
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
from pathlib import Path

DEFAULT_MEMORY_LIMIT_GB = 12.0


#: ``STATEWORTH_COMPILE_CACHE``: unset = the default folder, a path = that folder, ``off`` = none
CACHE_ENV = "STATEWORTH_COMPILE_CACHE"
_OFF = ("off", "0", "false", "no", "none")
_state: dict[str, str | None] = {}


def default_cache_dir() -> Path:
    """``$XDG_CACHE_HOME/stateworth/jax`` (``~/.cache/stateworth/jax`` when unset): per user."""
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "stateworth" / "jax"


def compile_cache_dir() -> tuple[Path | None, str]:
    """Where JAX's persistent compilation cache goes, and why: ``(folder, note)``; the folder is
    None when the cache is off (switched off by the environment, or the folder is not writable:
    then the note says so and solves still run, compiling afresh)."""
    raw = os.environ.get(CACHE_ENV, "").strip()
    if raw.lower() in _OFF:
        return None, f"compile cache off ({CACHE_ENV}={raw})"
    path = Path(raw).expanduser() if raw else default_cache_dir()
    try:
        path.mkdir(parents=True, exist_ok=True)
        probe = path / f".probe-{os.getpid()}"
        probe.write_bytes(b"")
        probe.unlink()
    except OSError as e:
        return None, (f"compile cache off: cannot write to {path} ({e.strerror or e.__class__.__name__}); "
                      f"set {CACHE_ENV} to a writable folder, or to 'off'")
    return path, f"compile cache {path}"


def use_jax() -> None:
    """Set up JAX for stateworth (idempotent; imports JAX). Called by every numerical entry point
    (compiling an operator, solving, fitting) before it makes arrays; a caller using JAX directly
    on stateworth's operators calls it too. Two process-wide settings:

    * 64-bit floats (see the module doc);
    * the persistent compilation cache (:func:`compile_cache_dir`): compiled solver code is
      written to a per-user folder and read back by later processes, so a command pays a
      compile once per shape and version of the code instead of on every call. Every compile is
      cached (no minimum time or size)."""
    from stateworth.extras import need

    jax = need("jax", "solve", "solving on the structured operator (large grids)")
    if not jax.config.jax_enable_x64:
        jax.config.update("jax_enable_x64", True)
    if "cache" not in _state:
        folder, note = compile_cache_dir()
        _state["cache"] = None if folder is None else str(folder)
        _state["note"] = note
        if folder is not None:
            jax.config.update("jax_compilation_cache_dir", str(folder))
            jax.config.update("jax_persistent_cache_min_compile_time_secs", 0.0)
            jax.config.update("jax_persistent_cache_min_entry_size_bytes", -1)


def device(x, dtype=None):
    """Host data as a JAX array without compiling anything: numpy conversion, then
    ``jax.device_put``. (``jnp.asarray`` of a numpy array compiles a conversion kernel per shape:
    0.07-0.25 s each on a cold start, and a solve made a dozen of them.) JAX arrays and tracers
    pass through (cast when ``dtype`` differs)."""
    import jax
    import numpy as np

    if isinstance(x, (jax.Array, jax.core.Tracer)):
        return x if dtype is None or x.dtype == np.dtype(dtype) else x.astype(dtype)
    return jax.device_put(np.asarray(x, dtype=None if dtype is None else np.dtype(dtype)))


def compile_cache_note() -> str | None:
    """What :func:`use_jax` did about the compile cache (None before it ran): the folder in use,
    or why the cache is off."""
    return _state.get("note")


def memory_limit_bytes() -> int:
    """The configured memory limit in bytes (``STATEWORTH_MEMORY_LIMIT_GB``, default 12)."""
    raw = os.environ.get("STATEWORTH_MEMORY_LIMIT_GB", "")
    try:
        gb = float(raw) if raw else DEFAULT_MEMORY_LIMIT_GB
    except ValueError:
        gb = DEFAULT_MEMORY_LIMIT_GB
    return int(gb * 1024**3)

