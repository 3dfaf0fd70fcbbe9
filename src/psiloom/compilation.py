"""Persistent compilation caches: compile a program once per machine, not once per process.

JAX compiles every jitted function the first time it meets a new shape; for a VMC step that is
seconds of CPU time that a second run of the same script repeats. XLA can keep compiled
executables on disk, keyed by the program, the JAX/XLA versions and the device, and reuse them
in later processes. Numba keeps its compiled kernels (the compiled Metropolis sweeps) likewise.

:func:`enable_compilation_cache` is the one call that turns both on; the test suite calls it, a
user calls it at the top of a script or notebook. Nothing is cached unless it is called.
"""

from __future__ import annotations

import os

import math
import sys

import jax


def default_cache_dir() -> str:
    """``$XDG_CACHE_HOME/psiloom`` (or ``~/.cache/psiloom``): the user's cache folder for psiloom."""
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return os.path.join(base, "psiloom")


def enable_compilation_cache(directory: str | None = None, min_compile_seconds: float = 0.0) -> str:
    """Keep XLA executables that took at least ``min_compile_seconds`` to compile in
    ``directory/jax`` (default :func:`default_cache_dir`), and point Numba's kernel cache at
    ``directory/numba`` unless ``NUMBA_CACHE_DIR`` is already set. Returns the directory.

    The default keeps every program: a 16-site ring search compiles ~30 small programs (initial
    values, random keys, the evaluation pass) of well under 0.5 s each, which together took
    seconds of a short run when only the slow ones were kept.

    Safe to call more than once. Programs are looked up by a hash of the program, the compile
    options, the JAX/XLA versions and the device, so a stale entry is never reused for another
    program; delete the folder to reclaim disk space.
    """
    if directory is None:
        directory = default_cache_dir()
    if not isinstance(directory, (str, os.PathLike)) or not str(directory):
        raise ValueError(f"directory must be a non-empty path, got {directory!r}")
    if isinstance(min_compile_seconds, bool) or not isinstance(min_compile_seconds, (int, float)):
        raise ValueError(f"min_compile_seconds must be a finite number >= 0, got {min_compile_seconds!r}")
    seconds = float(min_compile_seconds)
    if not math.isfinite(seconds) or seconds < 0:
        raise ValueError(f"min_compile_seconds must be a finite number >= 0, got {min_compile_seconds!r}")
    directory = os.path.abspath(os.fspath(directory))
    if os.path.exists(directory) and not os.path.isdir(directory):
        raise ValueError(f"directory {directory!r} exists and is not a folder")
    os.makedirs(os.path.join(directory, "jax"), exist_ok=True)
    jax.config.update("jax_compilation_cache_dir", os.path.join(directory, "jax"))
    jax.config.update("jax_persistent_cache_min_compile_time_secs", seconds)
    jax.config.update("jax_persistent_cache_min_entry_size_bytes", 0)
    if not os.environ.get("NUMBA_CACHE_DIR"):
        os.environ["NUMBA_CACHE_DIR"] = os.path.join(directory, "numba")
        numba_config = sys.modules.get("numba.core.config")
        if numba_config is not None:  # Numba reads the variable at import: tell it directly
            setattr(numba_config, "CACHE_DIR", os.environ["NUMBA_CACHE_DIR"])
    return directory
