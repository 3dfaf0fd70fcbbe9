"""The per-step record of a run: one row per optimisation step, columns of equal length.

``step`` is 1-based: the row of the n-th update holds ``step = n``, the value of the state's
step counter *after* that update — the number the progress line of that step prints. A run
resumed from a state at step s continues with row s + 1.

Columns: ``energy`` (real part of the mean local energy), ``error`` (its autocorrelation-
corrected standard error), ``variance``, ``tau``, ``rhat`` (NaN unless the search was built with
``step_rhat=True``), ``acceptance``, ``grad_norm`` and
``seconds`` (wall time of the step; steps run together on the device share their visit's
time equally), plus optional extra columns (e.g. ``t_sampling`` from profiling) that hold NaN
in rows without them. ``save`` writes strict JSON: NaN and ±inf become ``null`` and load back
as NaN.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field

import numpy as np

COLUMNS = ("step", "energy", "error", "variance", "tau", "rhat", "acceptance", "grad_norm", "seconds")


@dataclass
class History:
    """Per-step record of a run (see the module docstring)."""

    columns: dict[str, list] = field(default_factory=lambda: {k: [] for k in COLUMNS})

    def append_row(self, row: dict) -> None:
        """Add one row given as a mapping column -> value; unknown columns are created with NaN
        in earlier rows, missing ones get NaN."""
        n = len(self)
        for k in row:
            if k not in self.columns:
                self.columns[k] = [float("nan")] * n
        for k, column in self.columns.items():
            column.append(row.get(k, float("nan")))

    def append(self, step: int, out, seconds: float, extra: dict[str, float] | None = None) -> None:
        """Add the row of step ``step`` (1-based, see the module docstring) from a
        :class:`~psiloom.vmc.StepOutput` ``out`` with host (Python or NumPy) values."""
        e = out.energy
        row = {
            "step": int(step), "energy": float(np.real(e.mean)), "error": float(e.error),
            "variance": float(e.variance), "tau": float(e.tau), "rhat": float(e.rhat),
            "acceptance": float(out.acceptance), "grad_norm": float(out.grad_norm), "seconds": float(seconds),
        }
        row.update(extra or {})
        self.append_row(row)

    def __len__(self) -> int:
        return len(self.columns["step"])

    def __getitem__(self, name: str) -> np.ndarray:
        return np.asarray(self.columns[name])

    def truncate(self, n_steps: int) -> None:
        """Keep the rows of steps ``≤ n_steps`` (the rows a state at step ``n_steps`` has seen)."""
        keep = [i for i, s in enumerate(self.columns["step"]) if s <= n_steps]
        self.columns = {k: [v[i] for i in keep] for k, v in self.columns.items()}

    def to_json(self) -> str:
        """Strict JSON (NaN and ±inf as ``null``)."""
        clean = {k: [None if isinstance(v, float) and not math.isfinite(v) else v for v in column]
                 for k, column in self.columns.items()}
        return json.dumps(clean, allow_nan=False)

    @classmethod
    def from_json(cls, text: str) -> "History":
        """A history from the JSON text :meth:`to_json` wrote."""
        columns = json.loads(text)
        if not isinstance(columns, dict) or "step" not in columns:
            raise ValueError("a history must be a JSON object of columns with a 'step' column")
        lengths = {k: len(v) for k, v in columns.items()}
        if len(set(lengths.values())) > 1:
            raise ValueError(f"history columns differ in length: {lengths}")
        return cls({k: [float("nan") if v is None else v for v in column] for k, column in columns.items()})

    def save(self, path: str) -> None:
        """Write the history as JSON to ``path`` (atomically)."""
        from psiloom.checkpoint import atomic_write

        atomic_write(path, self.to_json().encode())

    @classmethod
    def load(cls, path: str) -> "History":
        """Read a history that :meth:`save` wrote."""
        with open(path) as f:
            return cls.from_json(f.read())
