"""Checkpoints as data: a checked JSON header and a msgpack payload, never pickle.

File layout (all lengths in bytes)::

    psiloom-checkpoint <header length> <SHA-256 of the header, hex>\\n
    <header: UTF-8 JSON>
    <payload: msgpack (flax.serialization.msgpack_serialize)>

The header holds the format version, the psiloom version, the x64 setting, the chain count,
a description of the configuration space (type, ``n_sites``, magnetisation sector), the tree
structure of every part of the state (``params``, ``opt_state``, ``chains``, ...) with each
leaf's path, shape and dtype, and the payload's length and SHA-256. The payload holds only
arrays (NumPy, gathered to the host, so a checkpoint loads on any device count) and the history
as JSON text. Loading never executes anything from the file: msgpack decodes to arrays,
strings and numbers, and the arrays are placed into the structure of a *template* state
built by the caller (``GroundStateSearch.init`` builds it). A truncated file, any flipped
byte, a different structure, shape, dtype, chain count, space or x64 setting raises
:class:`CheckpointError` naming the file and every difference.

Writes are atomic (temporary file in the same folder, fsync, rename); temporary files left by
interrupted writes of the same path are removed by the next write. :class:`CheckpointLock`
(``<path>.lock`` holding the owner's pid) keeps two runs from writing one path; a lock whose
pid is no longer alive is taken over.
"""

from __future__ import annotations

import glob
import hashlib
import json
import os
import tempfile
from typing import Any

import jax
import numpy as np
from flax import serialization

from psiloom import parallel
from psiloom.history import History

FORMAT_VERSION = 2
MAGIC = b"psiloom-checkpoint"


class CheckpointError(ValueError):
    """A checkpoint file that cannot be read, is damaged, or does not fit the run."""


# --------------------------------------------------------------------------- files

def _temp_prefix(path: str) -> str:
    return f".{os.path.basename(path)}.tmp-"


def _pid_alive(pid: int) -> bool:
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _remove_stray_temps(path: str) -> None:
    """Remove temporary files of interrupted writes of ``path`` (their writer is gone)."""
    directory = os.path.dirname(os.path.abspath(path))
    for tmp in glob.glob(os.path.join(glob.escape(directory), glob.escape(_temp_prefix(path)) + "*")):
        try:
            pid = int(os.path.basename(tmp)[len(_temp_prefix(path)):].split("-")[0])
        except ValueError:
            pid = -1
        if pid == os.getpid() or not _pid_alive(pid):
            try:
                os.unlink(tmp)
            except FileNotFoundError:
                pass


def atomic_write(path: str, payload: bytes) -> None:
    """Write ``payload`` to ``path`` atomically (a crash mid-write leaves the old file intact)."""
    directory = os.path.dirname(os.path.abspath(path))
    os.makedirs(directory, exist_ok=True)
    _remove_stray_temps(path)
    fd, tmp = tempfile.mkstemp(dir=directory, prefix=f"{_temp_prefix(path)}{os.getpid()}-")
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(payload)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


class CheckpointLock:
    """``<path>.lock`` holding this process's pid while a run writes ``path``.

    Acquiring raises :class:`CheckpointError` when another live process (or another run in
    this process) holds the lock; a lock left by a process that no longer exists is taken over.
    Use as a context manager or call :meth:`acquire` / :meth:`release`. With several processes
    (:mod:`psiloom.parallel`) only process 0 writes files, so only process 0 takes the lock.
    """

    def __init__(self, path: str):
        self.path = os.path.abspath(path) + ".lock"
        self.held = False

    def acquire(self) -> "CheckpointLock":
        """Take the lock (write ``<path>.lock`` with this pid); refuse when a live process holds it."""
        if self.held or not parallel.is_main_process():
            return self
        os.makedirs(os.path.dirname(self.path), exist_ok=True)
        for _ in range(3):
            try:
                fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                try:
                    with open(self.path) as f:
                        text = f.read().strip()
                    owner = int(text)
                except (OSError, ValueError):
                    owner = -1  # unreadable or half-written lock: treat as stale
                if owner != -1 and _pid_alive(owner):
                    who = "another run in this process" if owner == os.getpid() else f"process {owner}"
                    raise CheckpointError(
                        f"checkpoint {self.path[:-5]!r} is being written by {who} (lock file {self.path!r}); "
                        f"use another checkpoint path or stop that run") from None
                try:
                    os.unlink(self.path)  # stale: its owner is gone
                except FileNotFoundError:
                    pass
                continue
            with os.fdopen(fd, "w") as f:
                f.write(str(os.getpid()))
            self.held = True
            return self
        raise CheckpointError(f"could not take the lock {self.path!r} (another process keeps recreating it)")

    def release(self) -> None:
        """Remove the lock file if this object holds it (idempotent)."""
        if self.held:
            self.held = False
            try:
                os.unlink(self.path)
            except FileNotFoundError:
                pass

    def __enter__(self):
        return self.acquire()

    def __exit__(self, *exc):
        self.release()


# --------------------------------------------------------------------------- descriptions

def _dtype_name(leaf) -> str:
    return np.dtype(leaf.dtype).name


def describe_part(tree) -> dict:
    """Structure and leaves (path, shape, dtype) of one part of a state (works on arrays and on
    ``jax.ShapeDtypeStruct`` templates)."""
    with_path, treedef = jax.tree_util.tree_flatten_with_path(tree)
    return {"structure": str(treedef),
            "leaves": [[jax.tree_util.keystr(p), list(np.shape(l)), _dtype_name(l)] for p, l in with_path]}


def describe_state(state) -> dict:
    """:func:`describe_part` of every field of a state NamedTuple."""
    return {name: describe_part(getattr(state, name)) for name in state._fields}


def describe_space(space) -> dict:
    """Type, ``n_sites`` and magnetisation sector (``magnetisation``) of a configuration space."""
    out: dict[str, Any] = {"type": type(space).__name__}
    for attr in ("n_sites", "magnetisation", "n_electrons"):
        value = getattr(space, attr, None)
        if isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, bool):
            out[attr] = value.item() if hasattr(value, "item") else value
    return out


_PART_WORDS = {"params": "model parameter", "opt_state": "optimiser state", "chains": "chain state",
               "step": "step counter", "key": "random key"}


def _kind(dtype: str) -> str:
    return "complex" if dtype.startswith("complex") else "real"


def compare_descriptions(found: dict, expected: dict, found_name: str = "the checkpoint",
                         expected_name: str = "this run") -> list[str]:
    """Every difference between two :func:`describe_state` results, in plain words."""
    problems = []
    for part in expected:
        words = _PART_WORDS.get(part, part)
        if part not in found:
            problems.append(f"{words}: missing in {found_name}")
            continue
        f, e = found[part], expected[part]
        f_leaves = {p: (tuple(s), d) for p, s, d in f["leaves"]}
        e_leaves = {p: (tuple(s), d) for p, s, d in e["leaves"]}
        if f["structure"] != e["structure"] or f_leaves.keys() != e_leaves.keys():
            only_f = sorted(set(f_leaves) - set(e_leaves))
            only_e = sorted(set(e_leaves) - set(f_leaves))
            detail = ""
            if only_f or only_e:
                detail = f" (only in {found_name}: {only_f or 'none'}; only in {expected_name}: {only_e or 'none'})"
            problems.append(f"{words} structure differs{detail}")
            continue
        kinds_f = {_kind(d) for _, d in f_leaves.values() if d.startswith(("float", "complex"))}
        kinds_e = {_kind(d) for _, d in e_leaves.values() if d.startswith(("float", "complex"))}
        if part == "params" and kinds_f != kinds_e:
            problems.append(f"parameters are {'/'.join(sorted(kinds_f))} in {found_name} but "
                            f"{'/'.join(sorted(kinds_e))} in {expected_name}")
        for p in e_leaves:
            (fs, fd), (es, ed) = f_leaves[p], e_leaves[p]
            if part == "chains" and p.endswith(".x") and len(fs) >= 2 and len(es) >= 2:
                if fs[0] != es[0]:
                    problems.append(f"chain count: {fs[0]} in {found_name}, {es[0]} in {expected_name}")
                if fs[1:] != es[1:]:
                    problems.append(f"configuration shape (n_sites): {list(fs[1:])} in {found_name}, "
                                    f"{list(es[1:])} in {expected_name}")
                if fs[0] != es[0] or fs[1:] != es[1:]:
                    continue
            if fs != es:
                problems.append(f"{words} {p or 'leaf'} has shape {list(fs)} in {found_name}, {list(es)} in {expected_name}")
            elif fd != ed and not (part == "params" and _kind(fd) != _kind(ed)):
                hint = " (x64 setting?)" if {fd, ed} <= {"float32", "float64", "complex64", "complex128",
                                                        "int32", "int64"} else ""
                problems.append(f"{words} {p or 'leaf'} has dtype {fd} in {found_name}, {ed} in {expected_name}{hint}")
    return list(dict.fromkeys(problems))


def compare_meta(found: dict, expected: dict, found_name: str = "the checkpoint",
                 expected_name: str = "this run") -> list[str]:
    """Differences of chain count, space (type, n_sites, magnetisation sector) and x64 setting."""
    problems = []
    if "x64" in found and "x64" in expected and found["x64"] != expected["x64"]:
        on = lambda v: "enabled" if v else "disabled"
        problems.append(f"x64 setting: {on(found['x64'])} in {found_name}, {on(expected['x64'])} in {expected_name}")
    if found.get("n_chains") is not None and expected.get("n_chains") is not None \
            and found["n_chains"] != expected["n_chains"]:
        problems.append(f"chain count: {found['n_chains']} in {found_name}, {expected['n_chains']} in {expected_name}")
    fs, es = found.get("space") or {}, expected.get("space") or {}
    for attr, words in (("type", "space type"), ("n_sites", "n_sites"), ("magnetisation", "magnetisation sector magnetisation"),
                        ("n_electrons", "number of electrons")):
        if fs.get(attr) != es.get(attr) and (attr in fs or attr in es):
            show = lambda v: f"{v:g}" if isinstance(v, float) else ("none" if v is None else str(v))
            problems.append(f"{words}: {show(fs.get(attr))} in {found_name}, {show(es.get(attr))} in {expected_name}")
    return problems


def run_meta(sampler=None, n_chains: int | None = None) -> dict:
    """The run description stored in a checkpoint header and checked on load."""
    meta: dict[str, Any] = {"x64": bool(jax.config.read("jax_enable_x64"))}
    if sampler is not None:
        meta["n_chains"] = int(sampler.n_chains)
        space = getattr(sampler, "space", None)
        if space is not None:
            meta["space"] = describe_space(space)
    elif n_chains is not None:
        meta["n_chains"] = int(n_chains)
    return meta


# --------------------------------------------------------------------------- save / load

def save_checkpoint(path: str, state, history: History | None = None, meta: dict | None = None) -> None:
    """Write ``state`` (a state NamedTuple, e.g. :class:`psiloom.vmc.VMCState`) and ``history``.

    Leaves are gathered to host NumPy arrays first (a sharded state saves like an unsharded
    one, so it loads with any device or process count). ``meta`` (see :func:`run_meta`) is stored
    in the header and checked on load. With several processes call it in all of them: gathering
    is a collective (:func:`psiloom.parallel.to_host`), and process 0 alone writes.
    """
    from psiloom import __version__

    host = parallel.to_host(state)
    if not parallel.is_main_process():
        return
    leaves = jax.tree_util.tree_leaves(host)
    body = {"leaves": {str(i): leaf for i, leaf in enumerate(leaves)},
            "history": None if history is None else history.to_json()}
    payload = serialization.msgpack_serialize(body)
    info = dict(run_meta() if meta is None else meta)
    header = {
        "format": FORMAT_VERSION,
        "psiloom_version": __version__,
        **info,
        "state": describe_state(host),
        "payload_bytes": len(payload),
        "payload_sha256": hashlib.sha256(payload).hexdigest(),
    }
    head = json.dumps(header, sort_keys=True).encode()
    first = MAGIC + b" %d %s\n" % (len(head), hashlib.sha256(head).hexdigest().encode())
    atomic_write(path, first + head + payload)


def read_header(path: str) -> tuple[dict, bytes]:
    """The verified header and payload bytes of a checkpoint file (CheckpointError if damaged)."""
    where = f"checkpoint {path!r}"
    if os.path.isdir(path):
        raise CheckpointError(f"{where} is a directory")
    try:
        with open(path, "rb") as f:
            data = f.read()
    except OSError as err:
        raise CheckpointError(f"{where} cannot be read: {err}") from err
    newline = data.find(b"\n", 0, 200)
    first = data[:newline].split(b" ") if newline > 0 else []
    if len(first) != 3 or first[0] != MAGIC:
        raise CheckpointError(f"{where} is not a psiloom checkpoint (or its first line is damaged)")
    try:
        n_head = int(first[1])
        head_sha = first[2].decode("ascii")
    except (ValueError, UnicodeDecodeError):
        raise CheckpointError(f"{where}: damaged first line") from None
    head = data[newline + 1: newline + 1 + n_head]
    if len(head) != n_head or hashlib.sha256(head).hexdigest() != head_sha:
        raise CheckpointError(f"{where}: header checksum mismatch (file truncated or damaged)")
    try:
        header = json.loads(head.decode("utf-8"))
    except ValueError:
        raise CheckpointError(f"{where}: header is not valid JSON") from None
    if not isinstance(header, dict) or header.get("format") != FORMAT_VERSION:
        raise CheckpointError(f"{where} has format {header.get('format') if isinstance(header, dict) else None!r}, "
                              f"this psiloom reads format {FORMAT_VERSION}")
    payload = data[newline + 1 + n_head:]
    if len(payload) != header.get("payload_bytes"):
        raise CheckpointError(f"{where}: payload has {len(payload)} bytes, the header says "
                              f"{header.get('payload_bytes')} (file truncated or damaged)")
    if hashlib.sha256(payload).hexdigest() != header.get("payload_sha256"):
        raise CheckpointError(f"{where}: payload checksum mismatch (file damaged)")
    return header, payload


def load_checkpoint(path: str, template, meta: dict | None = None) -> tuple[Any, History]:
    """Read a checkpoint written by :func:`save_checkpoint` into the structure of ``template``.

    ``template``: a state of the run to continue (arrays or ``jax.ShapeDtypeStruct`` leaves,
    e.g. ``jax.eval_shape(search.init, key)``); the file must match its structure, shapes and
    dtypes. ``meta`` (see :func:`run_meta`): chain count, space and x64 setting to check; the
    x64 setting is always checked. Returns ``(state, history)`` with plain (unsharded) arrays.
    Raises :class:`CheckpointError` naming the file and every difference.
    """
    header, payload = read_header(path)
    expected_meta = run_meta() if meta is None else meta
    problems = compare_meta(header, expected_meta)
    problems += compare_descriptions(header.get("state", {}), describe_state(template))
    if problems:
        raise CheckpointError(f"checkpoint {path!r} does not fit this run: " + "; ".join(problems))
    try:
        body = serialization.msgpack_restore(payload)
    except Exception as err:  # checksummed, so only a file written by something else gets here
        raise CheckpointError(f"checkpoint {path!r}: payload cannot be decoded ({err})") from None
    t_leaves, treedef = jax.tree_util.tree_flatten(template)
    stored = body.get("leaves") if isinstance(body, dict) else None
    if not isinstance(stored, dict) or len(stored) != len(t_leaves):
        raise CheckpointError(f"checkpoint {path!r}: payload does not hold {len(t_leaves)} arrays")
    leaves = []
    for i, t in enumerate(t_leaves):
        leaf = stored.get(str(i))
        if not isinstance(leaf, np.ndarray) or leaf.shape != tuple(np.shape(t)) or leaf.dtype != np.dtype(t.dtype):
            raise CheckpointError(f"checkpoint {path!r}: array {i} does not match its header description")
        leaves.append(jax.numpy.asarray(leaf))
    history_json = body.get("history")
    try:
        history = History() if history_json is None else History.from_json(history_json)
    except (TypeError, ValueError) as err:
        raise CheckpointError(f"checkpoint {path!r}: history cannot be read ({err})") from None
    return jax.tree_util.tree_unflatten(treedef, leaves), history
