"""The outer loop: run compiled steps on the device, visit the host between them, call hooks.

:func:`run_loop` advances a state to a target step count. Each *host visit* follows up to
``steps_per_visit`` steps that ran on the device in one compiled program (a ``lax.scan`` of
guarded steps, :func:`psiloom.vmc.vmc`'s ``multi_step``); their outputs come back stacked
and become history rows (1-based ``step``, see :mod:`psiloom.history`). The host syncs once
per visit, not once per step.

Hooks are small objects called at host visits (subclass :class:`Hook`, override what you
need):

* ``stops_at(step, n_steps)``: whether a visit must end when the state reaches ``step`` (the
  loop cuts visits there, so printing, checkpoints and profiling happen at exact steps);
* ``start(state, n_steps)`` / ``close()``: before the first and after the last visit (also on
  errors);
* ``before(state)``: before the device runs the next steps; may return extra history columns
  for the first row of the visit (profiling does);
* ``after(visit)``: after the rows of a visit were appended, with a :class:`Visit`.

A plain function ``f(visit)`` passed as a hook is called after every visit.

Provided: :class:`ProgressPrinter`, :class:`ProgressBar` (optional, tqdm), :class:`Checkpointer`, :class:`Profiler` and
:class:`Callback` (a user function ``f(state, output)``, called after every step: its visits
are one step long).

Non-finite values: a guarded step whose energy, gradient, new parameters or new optimiser
state is not finite does not replace the state, and the remaining steps of the visit do not
advance it. The host appends the rows of the good steps and raises :class:`NonFiniteError`
naming the (1-based) step and what went non-finite; hooks are not called for that visit, so
the last checkpoint on disk (the last good one written) stays untouched.
"""

from __future__ import annotations

import time
from typing import Any, Callable, NamedTuple

import jax
import numpy as np

from psiloom.checkpoint import CheckpointLock, save_checkpoint
from psiloom.stats import parenthesis_notation
from psiloom.history import History
from psiloom.vmc import non_finite_names


class NonFiniteError(FloatingPointError):
    """A step produced a non-finite energy, gradient, parameters or optimiser state.

    Attributes: ``step`` (1-based: the step that would have taken the state from ``step − 1``
    to ``step``), ``what`` (the first non-finite part), ``parts`` (all of them), ``state`` and
    ``history`` (the last good state and its history, when known).
    """

    def __init__(self, step: int, what: str | list[str], state: Any = None, history: History | None = None):
        parts = [what] if isinstance(what, str) else list(what)
        super().__init__(f"non-finite {', '.join(parts)} at step {step}; run stopped at the last good "
                         f"state (step {step - 1}), its update discarded, no checkpoint written after it")
        self.step = step
        self.what = parts[0]
        self.parts = parts
        self.state = state
        self.history = history


class Visit(NamedTuple):
    """What hooks see after the steps of one host visit."""

    state: Any  # the state after the visit
    step: int  # state.step after the visit
    n_steps: int  # the run's target step count
    outputs: list  # one host StepOutput (NumPy leaves) per step of the visit
    history: History


class Hook:
    """Base class of loop hooks (all methods optional; see the module docstring)."""

    def stops_at(self, step: int, n_steps: int) -> bool:
        """Whether the loop must return to the host after ``step`` (1-based) of ``n_steps``."""
        return False

    def start(self, state, n_steps: int) -> None:
        """Called once before the first visit with the starting state."""
        pass

    def before(self, state) -> dict | None:
        """Called before each visit; a returned dict is merged into that visit's extra row fields."""
        return None

    def after(self, visit: Visit) -> None:
        """Called after each visit with its rows (not after a visit that raised)."""
        pass

    def close(self) -> None:
        """Called once when the run ends, also after an error."""
        pass


def format_progress(step: int, total: int, row: dict) -> str:
    """One progress line of (1-based) step ``step`` from its history row."""
    energy = parenthesis_notation(row["energy"], row["error"], sign=True)
    return (f"step {step:>5d}/{total}  E = {energy}"
            f"  var {row['variance']:.4g}  acc {row['acceptance']:.3f}  {row['seconds'] * 1e3:.1f} ms/step")


class ProgressPrinter(Hook):
    """Prints a line after step 1, every ``every`` steps and after the last step."""

    def __init__(self, emit: Callable[[str], None] | None = None, every: int = 10):
        self.emit = emit or (lambda s: print(s, flush=True))
        self.every = every

    def stops_at(self, step, n_steps):
        return step % self.every == 0 or step == n_steps or step == 1

    def after(self, visit):
        if self.stops_at(visit.step, visit.n_steps):
            row = {k: visit.history.columns[k][-1] for k in visit.history.columns}
            self.emit(format_progress(visit.step, visit.n_steps, row))


class ProgressBar(Hook):
    """A progress bar of the run (tqdm's auto mode: text in a terminal, a widget in Jupyter)
    showing the latest energy in parenthesis notation and the Metropolis acceptance.

    It is on when ``file`` (default ``sys.stderr``) is a terminal or when running in a notebook
    kernel with widgets, and off otherwise (``enabled`` is then False and nothing is written), so
    logs and CI output stay clean. ``enabled=True``/``False`` forces it. It does not cut visits:
    the bar moves once per host visit. Needs tqdm (``pip install psiloom[progress]``).
    """

    def __init__(self, file=None, enabled: bool | None = None, description: str = "VMC"):
        try:
            from tqdm import auto as tqdm_auto
            from tqdm.notebook import tqdm_notebook
        except ImportError as err:  # pragma: no cover - tqdm is an optional dependency
            raise ImportError("the progress bar needs tqdm: pip install 'psiloom[progress]'") from err
        import sys

        self.file = sys.stderr if file is None else file
        self._tqdm = tqdm_auto.tqdm
        # tqdm's auto mode picks its widget bar only inside a notebook kernel with ipywidgets
        notebook = issubclass(tqdm_auto.tqdm, tqdm_notebook) and file is None
        if enabled is None:
            isatty = getattr(self.file, "isatty", None)
            enabled = notebook or bool(isatty is not None and isatty())
        self.enabled = bool(enabled)
        self.description = description
        self.bar = None

    def start(self, state, n_steps: int) -> None:
        """Open the bar at the state's step, with ``n_steps`` as the total."""
        if self.enabled:
            self.bar = self._tqdm(total=n_steps, initial=int(state.step), desc=self.description,
                                  unit="step", file=self.file, dynamic_ncols=True)

    def after(self, visit: Visit) -> None:
        """Advance to the visit's step and show its last row's energy and acceptance."""
        if self.bar is None:
            return
        self.bar.set_postfix_str(format_bar_postfix({k: visit.history.columns[k][-1] for k in visit.history.columns}),
                                 refresh=False)
        self.bar.update(visit.step - self.bar.n)

    def close(self) -> None:
        """Close the bar (also after an error)."""
        if self.bar is not None:
            self.bar.close()
            self.bar = None


def format_bar_postfix(row: dict) -> str:
    """The text beside the bar: energy in parenthesis notation and acceptance of a history row."""
    return f"E = {parenthesis_notation(row['energy'], row['error'])}  acc {row['acceptance']:.3f}"


class Checkpointer(Hook):
    """Writes the state and history to ``path`` every ``every`` steps and after the last step,
    holding ``path``'s :class:`~psiloom.checkpoint.CheckpointLock` during the run."""

    def __init__(self, path: str, every: int = 50, meta: dict | None = None):
        self.path, self.every, self.meta = path, every, meta
        self.lock = CheckpointLock(path)

    def stops_at(self, step, n_steps):
        return step % self.every == 0 or step == n_steps

    def start(self, state, n_steps):
        self.lock.acquire()

    def after(self, visit):
        if self.stops_at(visit.step, visit.n_steps):
            save_checkpoint(self.path, visit.state, visit.history, self.meta)

    def close(self):
        self.lock.release()


class Profiler(Hook):
    """Times the phases of the next step with ``profile(state) -> {phase: seconds}`` at the first
    visit and whenever ``state.step`` is a multiple of ``every``; the times become the columns
    ``t_<phase>`` of that step's row."""

    def __init__(self, profile: Callable[[Any], dict], every: int):
        self.profile, self.every = profile, every
        self.first = True

    def stops_at(self, step, n_steps):
        return step % self.every == 0

    def before(self, state):
        step = int(state.step)
        if self.first or step % self.every == 0:
            self.first = False
            return {f"t_{name}": seconds for name, seconds in self.profile(state).items()}
        return None


class Callback(Hook):
    """Calls ``fn(state, output)`` after every step (visits of one step)."""

    def __init__(self, fn: Callable):
        self.fn = fn

    def stops_at(self, step, n_steps):
        return True

    def after(self, visit):
        self.fn(visit.state, visit.outputs[-1])


class _AfterVisit(Hook):
    """A plain function ``f(visit)`` used as a hook: called after every visit."""

    def __init__(self, fn: Callable[[Visit], None]):
        self.fn = fn

    def after(self, visit):
        self.fn(visit)


def as_hook(hook) -> Hook:
    """``hook`` itself if it is a :class:`Hook`, a plain function ``f(visit)`` wrapped as one."""
    if isinstance(hook, Hook):
        return hook
    if callable(hook):
        return _AfterVisit(hook)
    raise TypeError(f"a loop hook must be a psiloom.loop.Hook or a function f(visit), got {hook!r}")


def _row(out, step: int, seconds: float) -> dict:
    e = out.energy
    return {"step": int(step), "energy": float(np.real(e.mean)), "error": float(e.error),
            "variance": float(e.variance), "tau": float(e.tau), "rhat": float(e.rhat),
            "acceptance": float(out.acceptance), "grad_norm": float(out.grad_norm), "seconds": float(seconds)}


def run_loop(advance: Callable, state, n_steps: int, history: History | None = None, hooks=(),
             steps_per_visit: int = 1):
    """Advance ``state`` until ``state.step == n_steps``.

    ``advance(state, n) -> (state, outputs, taken, bad, bad_step)`` runs up to ``n`` guarded
    steps on the device (``multi_step`` of :func:`psiloom.vmc.vmc`, compiled). Visits end at
    ``steps_per_visit`` steps or earlier where a hook ``stops_at`` a step; the first visit is
    one step long (its row alone carries the compilation time). Returns
    ``(state, history)``; raises :class:`NonFiniteError` (see the module docstring).
    """
    history = History() if history is None else history
    step = int(state.step)
    hooks = [as_hook(h) for h in hooks]
    started = []
    try:
        for hook in hooks:
            hook.start(state, n_steps)
            started.append(hook)
        last = time.perf_counter()
        first = True
        while step < n_steps:
            extra: dict[str, Any] = {}
            for hook in hooks:
                extra.update(hook.before(state) or {})
            if extra:
                last = time.perf_counter()  # profiling time is not step time
            # the first visit is one step: its row alone carries the compilation time
            n = 1 if first else min(steps_per_visit, n_steps - step)
            first = False
            for j in range(1, n + 1):
                if any(hook.stops_at(step + j, n_steps) for hook in hooks):
                    n = j
                    break
            new_state, outs, taken, bad, bad_step = advance(state, n)
            outs, taken, bad, bad_step = jax.device_get((outs, taken, bad, bad_step))
            now = time.perf_counter()
            n_taken = int(np.sum(taken))
            per_step = (now - last) / n
            last = now
            rows = [jax.tree_util.tree_map(lambda a, i=i: a[i], outs) for i in range(n_taken)]
            for i, out in enumerate(rows):
                row = _row(out, step + i + 1, per_step)
                if i == 0:
                    row.update(extra)
                history.append_row(row)
            state, step = new_state, step + n_taken
            if int(bad):
                raise NonFiniteError(int(bad_step), non_finite_names(int(bad)), state, history)
            visit = Visit(state, step, n_steps, rows, history)
            for hook in hooks:
                hook.after(visit)
    finally:
        for hook in reversed(started):
            hook.close()
    return state, history
