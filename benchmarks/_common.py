"""Shared helpers for the scripts in ``benchmarks/``.

Output contract (see ``benchmarks/README.md``): every system a script runs prints exactly one
line on stdout holding one JSON object; the last stdout line is a JSON object with
``"summary": true``.  Everything else (progress, warnings) goes to stderr.

Typical use::

    from _common import emit, progress, summary, lattice_system, Timer, parse_args

    args = parse_args("ladder", "accuracy ladder")
    records = []
    with Timer() as t:
        ...
    records.append(emit({"benchmark": "ladder", "system": lattice_system("tfim", "chain", [16],
                                                                           True, "pauli", J=1.0, h=1.0),
                         "energy": e, "seconds": t.seconds, ...}))
    summary(records, benchmark="ladder")
"""

from __future__ import annotations

import argparse
import json
import math
import os
import shlex
import sys
import time
from typing import Any, Iterable, Sequence

__all__ = [
    "emit",
    "progress",
    "summary",
    "lattice_system",
    "relative_error",
    "Timer",
    "parse_args",
]


def _plain(value: Any) -> Any:
    """Convert numpy / jax scalars and arrays to JSON-serialisable Python values.

    Non-finite floats become ``None`` (JSON has no NaN/Inf).
    """
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, (str, bool)) or value is None:
        return value
    if isinstance(value, int):
        return value
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    # numpy / jax scalars and arrays
    if hasattr(value, "tolist"):
        return _plain(value.tolist())
    if hasattr(value, "item"):
        return _plain(value.item())
    return str(value)


def emit(record: dict) -> dict:
    """Print ``record`` as one JSON line on stdout (flushed) and return the plain-Python copy."""
    plain = _plain(record)
    sys.stdout.write(json.dumps(plain) + "\n")
    sys.stdout.flush()
    _EMITTED.append(plain)
    return plain


_EMITTED: list = []  # every line emitted by this script, for --save
_SAVE: dict = {}  # --save path and the run's context, set by parse_args


def progress(msg: str) -> None:
    """Print a progress message on stderr (never on stdout), prefixed by elapsed wall time."""
    sys.stderr.write(f"[{time.perf_counter() - _T0:8.1f}s] {msg}\n")
    sys.stderr.flush()


def summary(records: Iterable[dict], **extra: Any) -> dict:
    """Print the final ``{"summary": true, ...}`` line.

    Adds ``n_systems``, ``total_seconds`` (sum of the records' ``seconds``), ``wall_seconds``
    (since the module was imported), and, where records carry ``passed``, ``n_passed``.
    """
    records = list(records)
    out: dict[str, Any] = {"summary": True}
    out.update(extra)
    out["n_systems"] = len(records)
    out["total_seconds"] = float(sum(float(r.get("seconds") or 0.0) for r in records))
    out["wall_seconds"] = time.perf_counter() - _T0
    flags = [r["passed"] for r in records if "passed" in r]
    if flags:
        out["n_passed"] = int(sum(bool(f) for f in flags))
    line = emit(out)
    if _SAVE.get("path"):
        save_results(_SAVE["path"])
    return line


def save_results(path: str) -> None:
    """Write every line emitted so far to ``path`` as one JSON object: the command that produced
    them (from the repository root), the load average before and after, and the lines. The
    README's speed table is generated from such files (``benchmarks/readme_table.py``)."""
    folder = os.path.dirname(os.path.abspath(path))
    os.makedirs(folder, exist_ok=True)
    record = {"command": _SAVE["command"], "started": _SAVE["started"],
              "loadavg_start": _SAVE["loadavg"], "loadavg_end": list(os.getloadavg()),
              "cpu_count": os.cpu_count(), "lines": _EMITTED}
    with open(path, "w") as f:
        json.dump(record, f, indent=1)
        f.write("\n")


def lattice_system(
    model: str,
    lattice: str,
    extent: Sequence[int],
    periodic: bool,
    units: str,
    **couplings: float,
) -> dict:
    """The ``system`` object for a lattice spin model.

    ``model`` in {"heisenberg", "tfim", "j1j2", "xxz"}, ``lattice`` in {"chain", "square"},
    ``units`` in {"spin", "pauli"} (spin-1/2 operators S = σ/2, or Pauli matrices).  Couplings
    (J, h, J2, Delta, ...) are passed through as floats.
    """
    if model not in ("heisenberg", "tfim", "j1j2", "xxz"):
        raise ValueError(f"unknown model {model!r}")
    if lattice not in ("chain", "square"):
        raise ValueError(f"unknown lattice {lattice!r}")
    if units not in ("spin", "pauli"):
        raise ValueError(f"units must be 'spin' or 'pauli', got {units!r}")
    system: dict[str, Any] = {
        "model": model,
        "lattice": lattice,
        "extent": [int(e) for e in extent],
        "pbc": bool(periodic),
    }
    for name, value in couplings.items():
        system[name] = float(value)
    system["units"] = units
    return system


def relative_error(energy: float, reference: float | None) -> float | None:
    """abs(energy − reference) / abs(reference), or None without a reference."""
    if reference is None:
        return None
    return abs(float(energy) - float(reference)) / abs(float(reference))


class Timer:
    """Wall-clock context manager: ``with Timer() as t: ...; t.seconds``."""

    def __enter__(self) -> "Timer":
        self._start = time.perf_counter()
        self.seconds = 0.0
        return self

    def __exit__(self, *exc: Any) -> None:
        self.seconds = time.perf_counter() - self._start

    @property
    def elapsed(self) -> float:
        """Seconds since entering (usable inside the block)."""
        return time.perf_counter() - self._start


def parse_args(name: str, description: str, argv: Sequence[str] | None = None,
               extra: Any = None) -> argparse.Namespace:
    """Standard argument parser: ``--quick`` plus whatever ``extra(parser)`` adds."""
    parser = argparse.ArgumentParser(prog=name, description=description)
    parser.add_argument("--quick", action="store_true", help="reduced run of a few minutes on a 2-core CPU (each script states its budget)")
    parser.add_argument("--save", metavar="PATH", default=None,
                        help="also write all output lines, the command and the load average to PATH (JSON)")
    if extra is not None:
        extra(parser)
    args = parser.parse_args(argv)
    script = os.path.relpath(os.path.abspath(sys.argv[0]), os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
    _SAVE.update(path=args.save, command=" ".join(["python", shlex.quote(script), *map(shlex.quote, sys.argv[1:])]),
                 started=time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()), loadavg=list(os.getloadavg()))
    return args


_T0 = time.perf_counter()
