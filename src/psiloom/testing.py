"""Property-based testing helpers for trial states and symmetries (import them in your tests).

Strategies (need the ``hypothesis`` package, imported lazily):

* :func:`configurations` — batches of ±1 spin configurations, optionally with a fixed number
  of up spins (a magnetisation sector);
* :func:`group_elements` — element indices of a :class:`~psiloom.symmetry.SymmetryGroup`.

Assertions (plain NumPy, usable with or without hypothesis):

* :func:`assert_invariant` — ``ψ(g·x) = ψ(x)``;
* :func:`assert_covariant` — ``ψ(g·x) = χ(g)* ψ(x)`` (psiloom's sector convention).

Comparison:

* :func:`trees_equal` — two pytrees with the same leaves bit for bit (NaN equal to NaN), e.g. a
  resumed run against an uninterrupted one.

Compilation counts:

* :func:`compilations` — a context manager collecting the names of the programs XLA compiles
  inside it (from JAX's compile log), to test that a loop compiles its step once.

Fault injection:

* :func:`sgd_failing_at` — plain SGD whose update turns NaN at a chosen step, to test that a
  run stops cleanly (``NonFiniteError`` naming the step, last good checkpoint kept).

Log-amplitudes are compared as complex numbers modulo ``2πi`` (the phase of ψ is defined only
modulo 2π) with a tolerance on ``|Δ log ψ|``. Configurations where ψ is negligible (``log|ψ|``
more than ``floor`` below ``scale``, by default the largest in the batch; e.g. where a sector
projection vanishes) only need a negligible image amplitude too.
"""

from __future__ import annotations

import contextlib
import logging
from typing import Any, cast

import numpy as np

from psiloom._validation import nonnegative_int, positive_int

__all__ = ["configurations", "group_elements", "assert_invariant", "assert_covariant", "log_amplitudes",
           "trees_equal", "compilations", "sgd_failing_at", "fail_at_step"]


def _hypothesis():
    try:
        import hypothesis.extra.numpy as hnp
        import hypothesis.strategies as st
    except ImportError as err:  # pragma: no cover - hypothesis is a test dependency
        raise ImportError("psiloom.testing strategies need the 'hypothesis' package") from err
    return st, hnp


def configurations(n_sites: int, batch: int | tuple[int, int] = 1, n_up: int | None = None, space=None):
    """Strategy for NumPy arrays of shape ``(batch, n_sites)`` with entries ±1 (float64).

    Args:
        n_sites: number of spins.
        batch: fixed batch size, or ``(min, max)`` to let hypothesis choose it.
        n_up: draw configurations with exactly this many up spins (a fixed-``Sᶻ`` sector).
        space: alternatively a :class:`~psiloom.spaces.SpinSpace`; its ``n_up`` is used.
    """
    st, hnp = _hypothesis()
    if space is not None:
        n_sites, n_up = space.n_sites, space.n_up
    n_sites = positive_int("n_sites", n_sites)
    if n_up is not None and not 0 <= n_up <= n_sites:
        raise ValueError(f"n_up={n_up!r} must lie in [0, {n_sites}]")
    sizes = st.just(int(cast(Any, batch))) if np.isscalar(batch) else st.integers(int(cast(Any, batch)[0]), int(cast(Any, batch)[1]))

    if n_up is None:
        return sizes.flatmap(lambda b: hnp.arrays(np.float64, (b, n_sites), elements=st.sampled_from([-1.0, 1.0])))

    base = [1.0] * n_up + [-1.0] * (n_sites - n_up)
    row = st.permutations(base)
    return sizes.flatmap(lambda b: st.lists(row, min_size=b, max_size=b).map(lambda rows: np.asarray(rows, np.float64)))


def group_elements(group, include_identity: bool = True):
    """Strategy for element indices of ``group`` (``0`` is the identity)."""
    st, _ = _hypothesis()
    low = 0 if include_identity else 1
    if len(group) <= low:
        raise ValueError(f"{group!r} has no element to draw")
    return st.integers(low, len(group) - 1)


def log_amplitudes(model, variables, x) -> np.ndarray:
    """``log ψ(x)`` as a complex NumPy array."""
    return np.asarray(model.apply(variables, np.asarray(x)), dtype=complex)


def _compare(before: np.ndarray, after: np.ndarray, expected_phase: np.ndarray, atol: float, floor: float,
             scale: float | None, what: str):
    top = np.max(np.real(before)) if scale is None else float(scale)
    small = np.real(before) < top - floor
    diff = after - before - expected_phase
    diff = diff.real + 1j * (np.mod(diff.imag + np.pi, 2.0 * np.pi) - np.pi)
    bad_big = (~small) & (np.abs(diff) > atol)
    bad_small = small & (np.real(after) > top - floor + 1.0)
    bad = bad_big | bad_small
    if np.any(bad):
        k = int(np.argmax(bad))
        raise AssertionError(
            f"{what} violated for sample {k}: log ψ(x) = {before[k]:.10g}, log ψ(g·x) = {after[k]:.10g}, "
            f"expected difference {expected_phase[k]:.6g} (mod 2πi), off by {abs(diff[k]):.3g} > atol={atol}"
        )


def assert_covariant(model, variables, group, characters, x, elements=None, atol: float = 1e-8,
                     floor: float = 25.0, scale: float | None = None) -> None:
    """Assert ``ψ(g·x) = χ(g)* ψ(x)`` for configurations ``x`` and elements ``g``.

    Args:
        model, variables: a trial state and its variables (``model.apply(variables, x)``).
        group: a :class:`~psiloom.symmetry.SymmetryGroup`.
        characters: ``χ(g)`` for every element (e.g. ``Sector.characters``).
        x: configurations ``(B, N)``.
        elements: element indices to check (int or sequence); default all elements.
        atol: tolerance on ``|log ψ(g·x) − log ψ(x) − log χ(g)*|`` (mod 2πi).
        floor: configurations with ``log|ψ|`` more than this below ``scale`` count as zeros of
            ψ (e.g. where a sector projection cancels to rounding noise, ~1e-16 of its terms);
            their images only need to be negligible as well.
        scale: reference ``log|ψ|``; default the largest in the batch. Pass it when a batch may
            consist of zeros of ψ only (e.g. hypothesis drawing only symmetric configurations).
    Raises:
        AssertionError: naming the first violating sample.
    """
    x = np.asarray(x, dtype=np.float64)
    if x.ndim != 2:
        raise ValueError(f"x must have shape (B, n_sites), got {x.shape}")
    chi = np.asarray(characters, dtype=complex).reshape(-1)
    if chi.shape != (len(group),):
        raise ValueError(f"need one character per group element ({len(group)}), got {chi.shape}")
    elements = np.arange(len(group)) if elements is None else np.atleast_1d(np.asarray(elements, dtype=np.int64))
    if np.any((elements < 0) | (elements >= len(group))):
        raise ValueError(f"element indices {elements.tolist()} outside the group of order {len(group)}")
    # one evaluation of the model on x and all its images (shape (1 + n_elements) · B)
    images = np.concatenate([x] + [group.act(x, int(g)) for g in elements])
    logs = log_amplitudes(model, variables, images).reshape(1 + len(elements), len(x))
    before = logs[0]
    for k, g in enumerate(elements):
        expected = np.full(len(x), np.log(np.conj(chi[int(g)])))
        _compare(before, logs[k + 1], expected, atol, floor, scale,
                 f"covariance ψ(g·x) = χ(g)* ψ(x) for g={int(g)}")


def assert_invariant(model, variables, group, x, elements=None, atol: float = 1e-8, floor: float = 25.0,
                     scale: float | None = None) -> None:
    """Assert ``ψ(g·x) = ψ(x)`` (see :func:`assert_covariant` for the arguments)."""
    assert_covariant(model, variables, group, np.ones(len(group)), x, elements, atol, floor, scale)


def trees_equal(a, b) -> bool:
    """Whether pytrees ``a`` and ``b`` have the same number of leaves and equal leaves, bit for
    bit; NaN equals NaN in floating leaves (a value that was not computed, such as the history's
    ``rhat`` column without ``step_rhat``)."""
    import jax

    la, lb = jax.tree_util.tree_leaves(a), jax.tree_util.tree_leaves(b)
    return len(la) == len(lb) and all(_leaf_equal(np.asarray(x), np.asarray(y)) for x, y in zip(la, lb))


def _leaf_equal(x: np.ndarray, y: np.ndarray) -> bool:
    inexact = np.issubdtype(x.dtype, np.inexact) and np.issubdtype(y.dtype, np.inexact)
    return bool(np.array_equal(x, y, equal_nan=inexact))


class _CompileNames(logging.Handler):
    PREFIX = "Finished XLA compilation of "

    def __init__(self, names: list[str]):
        super().__init__(logging.DEBUG)
        self.names = names

    def emit(self, record):
        message = record.getMessage()
        if message.startswith(self.PREFIX):
            self.names.append(message[len(self.PREFIX):].split(" in ")[0])


@contextlib.contextmanager
def compilations():
    """Collect the names of the programs XLA compiles inside the ``with`` block, in order.

    Yields a list that fills as programs compile, e.g. ``"jit(multi)"`` for a jitted function
    ``multi``; a program loaded from a persistent compilation cache counts too, one served from
    the in-memory cache adds nothing. It reads JAX's compile log (``jax.log_compiles``), so it
    counts compilations exactly, unlike the size of a jitted function's dispatch cache, which
    JAX may trim at any time. Example::

        with compilations() as names:
            search.run(9, key=key, progress=False)
        assert names.count("jit(multi)") == 1
    """
    import jax

    names: list[str] = []
    handler = _CompileNames(names)
    logger = logging.getLogger("jax")
    logger.addHandler(handler)
    try:
        with jax.log_compiles():
            yield names
    finally:
        logger.removeHandler(handler)


def sgd_failing_at(learning_rate: float = 0.05):
    """An optax transformation: SGD (update −η g) whose update is NaN at one chosen step.

    The step (1-based: the n-th call of ``update``) is data held in the optimiser state under
    ``"at"`` (0 = never), so one compiled program serves every choice; set it on a training
    state with :func:`fail_at_step`. For tests of divergence handling.
    """
    import jax
    import jax.numpy as jnp
    import optax

    from psiloom._validation import finite_real

    eta = finite_real("learning_rate", learning_rate)

    def init(params):
        return {"count": jnp.zeros((), jnp.int32), "at": jnp.zeros((), jnp.int32)}

    def update(grads, state, params=None):
        count = state["count"] + 1
        nan = jnp.where(count == state["at"], jnp.nan, 0.0)
        return jax.tree_util.tree_map(lambda g: -eta * g + nan, grads), {"count": count, "at": state["at"]}

    return optax.GradientTransformation(init, update)


def fail_at_step(state, step: int):
    """``state`` (a training state whose optimiser is :func:`sgd_failing_at`) set to fail at
    ``step`` (1-based; 0 = never)."""
    import jax.numpy as jnp

    step = nonnegative_int("step", step)
    return state._replace(opt_state={**state.opt_state, "at": jnp.asarray(step, jnp.int32)})
