"""The training driver: maximise the likelihood of a measurement record with an optax optimiser.

One epoch shuffles the training shots (a fresh permutation from the key), cuts them into
``n_train // batch_size`` mini-batches (the remainder of a permutation waits for a later one)
and takes one optimiser step per batch, with the gradient of
:mod:`psiloom.tomography.likelihood` (exact, normalised, CD-k or persistent CD). The whole epoch
is one compiled ``lax.scan``; Python only loops over epochs.

After each epoch the history (:class:`psiloom.history.History`, ``step`` = epoch, 1-based)
receives ``train_nll`` and ``validation_nll`` (the exact NLL per shot, where log Z is known:
enumerable or normalised states; NaN otherwise), ``fidelity`` with a known target vector (when
given) and ``seconds``. CD-k chains start at the first ``n_chains`` shots of each batch
(outcomes of rotated shots are not σᶻ configurations, but any start is valid for a Markov
chain); persistent chains start at the first training shots. With held-out shots, the returned variables are those of the epoch with
the lowest validation NLL; ``patience`` stops the run after that many epochs without an
improvement larger than ``min_improvement`` (early stopping, common practice).
"""

from __future__ import annotations

import time
from typing import Any, Callable, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np
import optax

from psiloom._validation import ArgumentTypeError, finite_real, one_of, positive_int
from psiloom.history import History
from psiloom.spaces import SpinSpace
from psiloom.states.autoregressive import ChainRuleState
from psiloom.states.base import TrialState
from psiloom.states.bound import BoundState
from psiloom.sampling.gibbs import rbm_weights
from psiloom.tomography import likelihood as lk
from psiloom.tomography.records import MeasurementRecord
from psiloom.tomography.rotations import shot_tables

#: Largest number of sites for which log Z (and fidelities) are computed by enumeration.
ENUMERATION_LIMIT = 20
#: ``normaliser="auto"`` enumerates up to this many sites.
AUTO_EXACT_SITES = 16
#: Shots per evaluation chunk (bounds the memory of NLL passes over large records).
EVALUATION_CHUNK = 2048

LEARNING_COLUMNS = ("step", "train_nll", "validation_nll", "fidelity", "seconds")

__all__ = ["LearnedState", "learn_from_shots", "resolve_normaliser", "record_nll", "ENUMERATION_LIMIT",
           "LEARNING_COLUMNS"]


class LearnedState(NamedTuple):
    """What :func:`learn_from_shots` returns."""

    model: Any
    variables: Any
    history: History
    best_epoch: int  # the epoch whose variables were returned (1-based)
    normaliser: str

    def log_amplitude(self, x):
        """``log ψ(x)`` of the learned state (batched)."""
        return self.model.apply(self.variables, x)

    def bound(self) -> BoundState:
        return BoundState(self.model, self.variables)


def resolve_normaliser(model, n_sites: int, normaliser: str = "auto") -> str:
    """The model term to use (see :mod:`psiloom.tomography.likelihood`), checked against the model.

    ``"auto"``: ``"normalised"`` for a :class:`ChainRuleState`, ``"exact"`` up to
    ``AUTO_EXACT_SITES`` sites, ``"persistent"`` for larger real RBMs; anything else raises.
    """
    normaliser = one_of("normaliser", normaliser, ("auto",) + lk.NORMALISERS)
    if normaliser == "auto":
        if isinstance(model, ChainRuleState):
            return "normalised"
        if n_sites <= AUTO_EXACT_SITES:
            return "exact"
        normaliser = "persistent"
    if normaliser == "normalised" and not isinstance(model, ChainRuleState):
        raise ValueError(f"normaliser='normalised' needs a trial state normalised by construction "
                         f"(ChainRuleState), got {type(model).__name__}")
    if normaliser == "exact" and n_sites > ENUMERATION_LIMIT:
        raise ValueError(f"normaliser='exact' enumerates 2^{n_sites} configurations; at most "
                         f"{ENUMERATION_LIMIT} sites are allowed")
    return normaliser


def _configurations(n_sites: int):
    if n_sites > ENUMERATION_LIMIT:
        raise ValueError(f"the trial state on {n_sites} sites cannot be enumerated (limit {ENUMERATION_LIMIT} "
                         "sites): exact normalisers and fidelities are not available")
    return jnp.asarray(SpinSpace(n_sites).configurations())


def _chunks(tables, chunk: int):
    """The shots of ``tables`` as device arrays in chunks of ``chunk`` (the last padded, masked)."""
    s = tables.outcomes.shape[0]
    out = []
    for start in range(0, s, chunk):
        stop = min(start + chunk, s)
        pad = chunk - (stop - start)
        parts = []
        for a in tables:
            part = a[start:stop]
            if pad:
                part = np.concatenate([part, np.broadcast_to(a[:1], (pad,) + a.shape[1:])])
            parts.append(jnp.asarray(part))
        mask = jnp.asarray(np.arange(chunk) < stop - start)
        out.append((*parts, mask))
    return out


class _Evaluator:
    """Exact NLL per shot over chunked records: one compiled program per chunk shape."""

    def __init__(self, model, configurations):
        self.configurations = configurations

        @jax.jit
        def chunk_sum(variables, outcomes, sites, factors, mask):
            lp = lk.shot_log_probabilities(model, variables, outcomes, sites, factors)
            return jnp.sum(jnp.where(mask, lp, 0.0))

        self.chunk_sum = chunk_sum
        self.log_z = (jax.jit(lambda v: lk.log_normaliser(model, v, configurations))
                      if configurations is not None else (lambda v: 0.0))

    def __call__(self, variables, chunks, n_shots: int) -> float:
        total = sum(float(self.chunk_sum(variables, *c)) for c in chunks)
        return -total / n_shots + float(self.log_z(variables))


def record_nll(model, variables, record: MeasurementRecord, normaliser: str = "exact",
               n_rotated: int | None = None) -> float:
    """The exact NLL per shot of ``record`` under a trial state: ``normaliser`` is ``"exact"``
    (enumerate log Z; at most ``ENUMERATION_LIMIT`` sites) or ``"normalised"`` (log Z = 0)."""
    normaliser = one_of("normaliser", normaliser, ("exact", "normalised"))
    if not isinstance(record, MeasurementRecord):
        raise ArgumentTypeError(f"record must be a MeasurementRecord, got {type(record).__name__}")
    configurations = _configurations(record.n_sites) if normaliser == "exact" else None
    chunks = _chunks(shot_tables(record, n_rotated), min(EVALUATION_CHUNK, record.n_shots))
    return _Evaluator(model, configurations)(variables, chunks, record.n_shots)


def _check_target(target, n_sites: int):
    if target is None:
        return None
    v = np.asarray(target)
    if v.shape != (2**n_sites,) or not np.all(np.isfinite(v)) or np.linalg.norm(v) == 0:
        raise ValueError(f"target must be a finite non-zero vector over all 2^{n_sites} configurations, "
                         f"got shape {v.shape}")
    return jnp.asarray(v / np.linalg.norm(v))


def _fidelity(model, variables, configurations, target):
    logs = model.apply(variables, configurations)
    top = jnp.max(jnp.real(logs))
    v = jnp.exp(logs - top)
    overlap = jnp.vdot(target, v)
    return jnp.abs(overlap) ** 2 / jnp.real(jnp.vdot(v, v))


def learn_from_shots(model, record: MeasurementRecord, optimizer: optax.GradientTransformation,
                     key: jax.Array, *, epochs: int = 50, batch_size: int = 256,
                     held_out_fraction: float | None = 0.1, patience: int | None = None,
                     min_improvement: float = 0.0, normaliser: str = "auto", gibbs_updates: int = 1,
                     n_chains: int | None = None, variables=None, target=None,
                     progress: Callable[[str], None] | None = None) -> LearnedState:
    """Learn a trial state from shots by minimising the negative log-likelihood.

    Args:
        model: a trial state (Flax module); ``variables`` (optional) its starting variables.
        record: the :class:`MeasurementRecord`.
        optimizer: an optax transformation (e.g. ``optax.adam(1e-2)``).
        key: PRNG key for the split, the initialisation, the shuffles and the Gibbs chains.
        epochs: passes over the training shots.
        batch_size: shots per optimiser step (at most the number of training shots).
        held_out_fraction: fraction of shots held out for validation, in (0, 1), or None.
        patience: stop after this many epochs without a validation improvement (needs held-out
            shots and a computable NLL); None runs all epochs.
        min_improvement: the decrease of the validation NLL that counts as an improvement.
        normaliser: ``"auto"``, ``"exact"``, ``"normalised"``, ``"contrastive"`` (CD-k) or
            ``"persistent"`` (PCD); see :mod:`psiloom.tomography.likelihood`.
        gibbs_updates: k, the block Gibbs updates per step of CD-k / PCD.
        n_chains: chains of CD-k (the first of each batch's shots; default: the whole batch) or PCD
            (default: min(batch_size, 256)).
        target: a state vector over all 2^N configurations (configuration order) whose fidelity
            with the learned state is recorded after each epoch.
        progress: called with one line per epoch.

    Returns:
        :class:`LearnedState` with the history of the run.
    """
    if not isinstance(model, TrialState):
        raise ArgumentTypeError(f"model must be a psiloom TrialState, got {type(model).__name__}")
    if not isinstance(record, MeasurementRecord):
        raise ArgumentTypeError(f"record must be a MeasurementRecord, got {type(record).__name__}")
    epochs = positive_int("epochs", epochs)
    batch_size = positive_int("batch_size", batch_size)
    gibbs_updates = positive_int("gibbs_updates", gibbs_updates)
    min_improvement = finite_real("min_improvement", min_improvement, minimum=0.0)
    if patience is not None:
        patience = positive_int("patience", patience)
    n = record.n_sites
    mode = resolve_normaliser(model, n, normaliser)
    target = _check_target(target, n)
    k_split, k_init, k_run = jax.random.split(key, 3)
    if held_out_fraction is None:
        train, held = record, None
    else:
        train, held = record.split(held_out_fraction, k_split)
    if patience is not None and held is None:
        raise ValueError("patience (early stopping) needs held-out shots: set held_out_fraction")
    k_rot = record.max_rotated_sites()
    tables = shot_tables(train, k_rot)
    n_train = train.n_shots
    batch_size = min(batch_size, n_train)
    n_batches = n_train // batch_size

    if variables is None:
        variables = model.init(k_init, jnp.asarray(tables.outcomes[:1]))
    if mode in ("contrastive", "persistent"):
        rbm_weights(BoundState(model, variables, fast=False))  # a clear error for other states
        default_chains = batch_size if mode == "contrastive" else min(batch_size, 256)
        n_chains = default_chains if n_chains is None else positive_int("n_chains", n_chains)
        if mode == "contrastive" and n_chains > batch_size:
            raise ValueError(f"CD-k starts its chains at the batch's shots: n_chains={n_chains} exceeds "
                             f"batch_size={batch_size}")
        if mode == "persistent" and n_chains > n_train:
            n_chains = n_train
    else:
        n_chains = 1
    exact_eval = mode == "exact" or (mode != "normalised" and n <= AUTO_EXACT_SITES)
    configurations = _configurations(n) if (exact_eval or target is not None) else None
    chains = jnp.asarray(tables.outcomes[:n_chains])
    opt_state = optimizer.init(variables)
    outcomes, sites, factors = (jnp.asarray(a) for a in tables)

    def epoch(variables, opt_state, chains, key, outcomes, sites, factors):
        k_perm, k_steps = jax.random.split(key)
        perm = jax.random.permutation(k_perm, n_train)[: n_batches * batch_size].reshape(n_batches, batch_size)

        def step(carry, inp):
            variables, opt_state, chains = carry
            idx, k = inp
            o, s, f = outcomes[idx], sites[idx], factors[idx]
            if mode == "exact":
                _, g = lk.nll_and_gradient(model, variables, o, s, f, configurations)
            elif mode == "normalised":
                _, g = lk.nll_and_gradient(model, variables, o, s, f, None)
            else:
                start = o[:n_chains] if mode == "contrastive" else chains
                chains = lk.gibbs_chains(k, model, variables, start, gibbs_updates)
                g = lk.surrogate_gradient(model, variables, o, s, f, chains)
            updates, opt_state = optimizer.update(g, opt_state, variables)
            return (optax.apply_updates(variables, updates), opt_state, chains), None

        carry, _ = jax.lax.scan(step, (variables, opt_state, chains), (perm, jax.random.split(k_steps, n_batches)))
        return carry

    epoch = jax.jit(epoch)

    train_nll = held_nll = None
    if exact_eval or mode == "normalised":
        evaluator = _Evaluator(model, configurations if exact_eval else None)
        chunk = min(EVALUATION_CHUNK, n_train)
        train_chunks = _chunks(tables, chunk)
        train_nll = lambda v: evaluator(v, train_chunks, n_train)  # noqa: E731
        if held is not None:
            held_chunks = _chunks(shot_tables(held, k_rot), chunk)
            held_nll = lambda v: evaluator(v, held_chunks, held.n_shots)  # noqa: E731
    if patience is not None and held_nll is None:
        raise ValueError(f"early stopping needs the exact validation NLL, which normaliser={mode!r} on "
                         f"{n} sites cannot provide (enumerate up to {AUTO_EXACT_SITES} sites or use ChainRuleState)")
    fid = jax.jit(lambda v: _fidelity(model, v, configurations, target)) if target is not None else None

    history = History({k: [] for k in LEARNING_COLUMNS})
    best = (np.inf, variables, 0)
    since = 0
    keys = jax.random.split(k_run, epochs)
    for e in range(epochs):
        t0 = time.perf_counter()
        variables, opt_state, chains = epoch(variables, opt_state, chains, keys[e], outcomes, sites, factors)
        row = {"step": e + 1}
        row["train_nll"] = float(train_nll(variables)) if train_nll else float("nan")
        row["validation_nll"] = float(held_nll(variables)) if held_nll else float("nan")
        row["fidelity"] = float(fid(variables)) if fid else float("nan")
        if not all(np.isfinite(np.asarray(leaf)).all() for leaf in jax.tree_util.tree_leaves(variables)):
            raise FloatingPointError(f"the parameters became non-finite in epoch {e + 1}: lower the learning rate")
        row["seconds"] = time.perf_counter() - t0
        history.append_row(row)
        if progress is not None:
            progress(" ".join(f"{k}={v:.6g}" if isinstance(v, float) else f"{k}={v}" for k, v in row.items()))
        if held_nll is not None:
            if row["validation_nll"] < best[0] - min_improvement:
                best, since = (row["validation_nll"], variables, e + 1), 0
            else:
                since += 1
            if patience is not None and since >= patience:
                break
        else:
            best = (np.nan, variables, e + 1)
    if best[2] == 0:  # no finite validation NLL: keep the last epoch
        best = (np.nan, variables, len(history))
    return LearnedState(model, best[1], history, int(best[2]), mode)
