"""Where samples live: the sample (chain / walker) axis spread over devices and processes.

psiloom keeps the sample axis leading in every batch (:mod:`psiloom.reduce`). Spreading a
calculation over D devices — several GPUs, several simulated CPU devices, or the devices of
several processes joined by :mod:`jax.distributed` — therefore only changes *placement*:

* a 1-D :class:`jax.sharding.Mesh` over all (global) devices with one named axis,
  :data:`SAMPLE_AXIS` (:func:`sample_mesh`);
* chain-axis arrays (configurations, log-amplitudes, fast-update caches: leading axis
  ``n_chains``) are sharded along their leading axis, chain c on device ⌊c·D/n_chains⌋
  (:func:`chain_sharding`, :func:`place_chains`);
* everything else — parameters, optimiser state, PRNG keys, step counters, scalar step sizes —
  is replicated (:func:`replicated_sharding`, :func:`replicate`).

Inside a compiled step XLA's partitioner (GSPMD) propagates these shardings: per-sample work
(sweeps, log ψ, local energies, log-derivatives) stays on the device that holds the sample, and
every reduction of :mod:`psiloom.reduce` (a ``jnp`` mean or sum over the leading axis) becomes a
local partial sum followed by an all-reduce. :func:`constrain_chains` and
:func:`constrain_replicated` pin the shardings of a step's outputs, so that a state that came
in placed goes out placed the same way.

Random numbers do not depend on the number of devices: JAX's threefry generator is
"partitionable" (``jax.config.jax_threefry_partitionable``, on by default since JAX 0.5), so a
draw of shape ``(n_chains, ...)`` gives the same numbers whether it is computed whole or shard by
shard. With the same seed a run on 1, 2 or 4 devices makes the same chains; only the order of
floating-point additions inside the all-reduces differs (agreement to ~1e-12 relative).

Calls to the host (:func:`jax.pure_callback`, or foreign functions such as the compiled Numba
sweeps) are not partitioned by GSPMD: under a sharded ``jit`` the partitioner gathers every
operand onto one device, runs the call there once for all chains and scatters the results back
(it warns "Involuntary full rematerialization"). The results are right but one device does all the work. :func:`per_device`
wraps such a call in :func:`jax.shard_map` over the sample axis, so each device calls the host
function on its own chains.

Several *simulated* CPU devices in one process share XLA's CPU thread pool. While the compiled
sweeps were a Python callback (:func:`jax.pure_callback`), its in-process all-reduce deadlocked
on a 2-core machine (L=16, 32 chains on 2 devices: no step finished in 300 s). As an XLA foreign
function the same run passes (2 and 4 simulated devices, L=16, 32 chains, 60-150 steps,
measured 2026-12-03). A *Python* callback in a step (e.g. a user's own) may still starve the pool:
keep such calls out of steps on simulated devices, or use one process per device
(``jax.distributed``).

Several processes (one per GPU, or several machines): call :func:`initialize` first (before any
other JAX call), then build the mesh with ``sample_mesh(processes=n)``. Every process runs the
same program; arrays that every process computed identically (the initial state from the same
key, a loaded checkpoint) are placed with :func:`place_chains` / :func:`replicate`, and chains
that each process made for itself are joined with :func:`global_chains`. :func:`to_host` gathers a
pytree to NumPy on every process (a collective: all processes must call it), so that process 0
alone writes checkpoints (:func:`is_main_process`) and a checkpoint can be read with any number
of processes or devices.

Units: none (placement only). Conventions: the mesh has exactly one axis, named ``"samples"``.
"""

from __future__ import annotations

import os
import re
from typing import Any, Callable, Mapping, Sequence, cast

import jax
import jax.numpy  # noqa: F401  (jax.numpy.asarray in _put)
import numpy as np
from jax.sharding import AxisType, Mesh, NamedSharding, PartitionSpec

#: Name of the mesh axis along which samples (chains, walkers) are split.
SAMPLE_AXIS = "samples"


# ---------------------------------------------------------------------------- the mesh
def sample_mesh(devices: Sequence | int | None = None, *, processes: int | None = None) -> Mesh:
    """A 1-D mesh with the axis :data:`SAMPLE_AXIS` over ``devices``.

    Args:
        devices: ``None`` for all global devices (``jax.devices()``: those of every process once
            :func:`initialize` ran), an integer D for the first D of them, or a sequence of devices.
        processes: the number of processes the run is meant to span (optional). If it is greater
            than one, :mod:`jax.distributed` must be initialised with that many processes;
            otherwise a ``RuntimeError`` says so (each process would silently run alone).
    """
    if processes is not None:
        if isinstance(processes, bool) or not isinstance(processes, (int, np.integer)) or processes < 1:
            raise ValueError(f"processes must be a positive integer, got {processes!r}")
        if processes > 1 and not jax.distributed.is_initialized():
            raise RuntimeError(
                f"a sample mesh over processes={processes} needs jax.distributed, which is not initialised "
                "in this process; call psiloom.parallel.initialize(...) before any other JAX call")
        if processes != jax.process_count():
            raise RuntimeError(f"processes={processes} requested, but jax.distributed joined "
                               f"{jax.process_count()} process(es)")
    all_devices = jax.devices()
    if devices is None:
        chosen = all_devices
    elif isinstance(devices, (int, np.integer)) and not isinstance(devices, bool):
        if not 1 <= devices <= len(all_devices):
            raise ValueError(f"devices={devices} requested, but {len(all_devices)} device(s) are available "
                             f"({all_devices[0].platform})")
        chosen = all_devices[: int(devices)]
    else:
        chosen = list(cast(Sequence, devices))  # a sequence of devices
        if not chosen or not all(isinstance(d, jax.Device) for d in chosen):
            raise ValueError(f"devices must be None, a positive integer or a non-empty sequence of jax devices, "
                             f"got {devices!r}")
        if len({d.id for d in chosen}) != len(chosen):
            raise ValueError(f"devices contains a device twice: {chosen!r}")
    return Mesh(np.array(chosen), (SAMPLE_AXIS,), axis_types=(AxisType.Auto,))


def check_mesh(mesh) -> Mesh:
    """``mesh`` if it is a :class:`jax.sharding.Mesh` with the axis :data:`SAMPLE_AXIS` (as
    :func:`sample_mesh` builds), else a ``TypeError``/``ValueError`` that says so."""
    if not isinstance(mesh, Mesh):
        raise TypeError(f"mesh must be a jax.sharding.Mesh such as psiloom.parallel.sample_mesh(), "
                        f"got {mesh!r} ({type(mesh).__name__})")
    if SAMPLE_AXIS not in mesh.shape:
        raise ValueError(f"mesh must have an axis named {SAMPLE_AXIS!r} (psiloom.parallel.sample_mesh() builds one), "
                         f"got axes {tuple(mesh.shape)}")
    return mesh


def n_devices(mesh: Mesh | None) -> int:
    """Number of devices along the sample axis (1 without a mesh)."""
    return 1 if mesh is None else int(mesh.shape[SAMPLE_AXIS])


def nearest_multiples(value: int, divisor: int) -> list[int]:
    """The multiples of ``divisor`` nearest to ``value`` (below, if positive, and above)."""
    below, above = (value // divisor) * divisor, -(-value // divisor) * divisor
    return sorted({v for v in (below, above) if v > 0})


def check_divisible(name: str, value: int, mesh: Mesh | int | None) -> None:
    """Raise ``ValueError`` unless ``value`` (e.g. n_chains) splits evenly over the mesh's devices."""
    d = mesh if isinstance(mesh, (int, np.integer)) else n_devices(mesh)
    if value % d:
        near = " or ".join(str(v) for v in nearest_multiples(int(value), int(d)))
        raise ValueError(f"{name}={value} is not divisible by the {d} devices of the sample mesh; "
                         f"nearest valid values: {near}")


# ---------------------------------------------------------------------------- shardings and placement
def chain_sharding(mesh: Mesh, ndim: int = 1, axis: int = 0) -> NamedSharding:
    """Sharding of an array whose dimension ``axis`` (of ``ndim``) is the sample axis (on a
    one-device mesh the replicated sharding, which is what compiled programs return there: equal
    shardings in and out keep ``jit`` from compiling a step twice)."""
    if n_devices(mesh) == 1:
        return replicated_sharding(mesh)
    if not 0 <= axis < max(ndim, 1):
        raise ValueError(f"sample axis {axis} outside an array of {ndim} dimensions")
    # no trailing None entries: compiled programs return them trimmed, and equal specs matter
    return NamedSharding(mesh, PartitionSpec(*([None] * axis), SAMPLE_AXIS))


def replicated_sharding(mesh: Mesh) -> NamedSharding:
    """Every device holds the whole array."""
    return NamedSharding(mesh, PartitionSpec())


def _put(leaf, sharding: NamedSharding):
    """``leaf`` placed with ``sharding``; with several processes the (identical) value of every
    process provides the shards its devices hold. Placed arrays are strongly typed: a weakly typed
    input (e.g. configurations built from Python scalars) whose step output is strongly typed
    would make ``jit`` compile the step a second time."""
    if isinstance(leaf, jax.Array) and getattr(leaf.aval, "weak_type", False):
        leaf = jax.numpy.asarray(leaf, dtype=leaf.dtype)
    if sharding.is_fully_addressable:
        return jax.device_put(leaf, sharding)
    if isinstance(leaf, jax.Array) and jax.dtypes.issubdtype(leaf.dtype, jax.dtypes.prng_key):
        impl = jax.random.key_impl(leaf)
        return jax.random.wrap_key_data(_put(jax.random.key_data(leaf), sharding), impl=impl)
    host = leaf if isinstance(leaf, np.ndarray) else np.asarray(to_host(leaf))
    return jax.make_array_from_callback(host.shape, sharding, lambda index: host[index])


def _is_chain_leaf(leaf, n_chains: int) -> bool:
    return np.ndim(leaf) >= 1 and np.shape(leaf)[0] == n_chains


def _chain_count(tree) -> int:
    leaves = [leaf for leaf in jax.tree_util.tree_leaves(tree) if np.ndim(leaf) >= 1]
    if not leaves:
        raise ValueError("a chain state needs at least one array with a leading chain axis")
    return int(np.shape(leaves[0])[0])


def place_chains(tree, mesh: Mesh, n_chains: int | None = None):
    """Place a chain-state pytree: leaves with leading axis ``n_chains`` sharded along it, the rest
    (e.g. a scalar step size) replicated. ``n_chains`` defaults to the leading size of the first
    array leaf; it must be divisible by the number of devices."""
    n_chains = _chain_count(tree) if n_chains is None else int(n_chains)
    check_divisible("n_chains", n_chains, mesh)
    return jax.tree_util.tree_map(
        lambda leaf: _put(leaf, chain_sharding(mesh, np.ndim(leaf)) if _is_chain_leaf(leaf, n_chains)
                          else replicated_sharding(mesh)), tree)


def replicate(tree, mesh: Mesh):
    """Place every leaf of ``tree`` whole on every device of ``mesh``."""
    return jax.tree_util.tree_map(lambda leaf: _put(leaf, replicated_sharding(mesh)), tree)


def constrain_chains(tree, mesh: Mesh | None, n_chains: int):
    """Inside ``jit``: pin the chain leaves of ``tree`` to the sample sharding (others replicated)."""
    if mesh is None:
        return tree
    return jax.tree_util.tree_map(
        lambda leaf: jax.lax.with_sharding_constraint(
            leaf, chain_sharding(mesh, leaf.ndim) if _is_chain_leaf(leaf, n_chains) else replicated_sharding(mesh)),
        tree)


def constrain_replicated(tree, mesh: Mesh | None):
    """Inside ``jit``: pin every leaf of ``tree`` to the replicated sharding."""
    if mesh is None:
        return tree
    return jax.tree_util.tree_map(lambda leaf: jax.lax.with_sharding_constraint(leaf, replicated_sharding(mesh)),
                                  tree)


def mesh_context(mesh: Mesh | None):
    """``jax.set_mesh(mesh)`` (a context manager), or a no-op without a mesh. Traces run inside it
    see the mesh, which :func:`per_device` reads when no mesh is passed to it."""
    if mesh is None:
        import contextlib

        return contextlib.nullcontext()
    return jax.set_mesh(mesh)


# ---------------------------------------------------------------------------- per-device host work
def _context_mesh():
    mesh = jax.sharding.get_abstract_mesh()
    if mesh.empty or SAMPLE_AXIS not in mesh.axis_names:
        return None
    return mesh


def per_device(fn: Callable, mesh: Mesh | None = None, in_axes: Sequence[int | None] = (0,),
               out_axes: Sequence[int | str | None] = (0,)) -> Callable:
    """Run ``fn`` once per device on that device's samples (``jax.shard_map`` over the sample axis).

    Meant for functions that call the host (``jax.pure_callback``), which GSPMD would otherwise
    run on one device for all samples. ``fn(*args)`` must return a tuple of arrays. The devices of
    one process call the host function concurrently, from one thread each: it must be thread-safe
    (Numba's parallel loops are under its ``omp`` and ``tbb`` threading layers, not ``workqueue``).

    Args:
        fn: the function to wrap; it sees each device's block of the sample axis.
        mesh: the sample mesh; ``None`` reads the mesh of the surrounding ``jax.set_mesh``
            (:func:`mesh_context`) and returns ``fn`` unchanged when there is none, or the
            mesh has a single device.
        in_axes: per positional argument, the position of its sample axis, or ``None`` for an
            argument every device receives whole.
        out_axes: per output, the position of its sample axis, ``None`` for an output that is the
            same on every device, or ``"sum"`` for a per-device partial sum (added up over the
            devices with ``psum``).
    """
    mesh = _context_mesh() if mesh is None else mesh
    if mesh is None or n_devices(mesh) == 1:
        return fn

    def spec(axis):
        if axis is None or axis == "sum":
            return PartitionSpec()
        return PartitionSpec(*([None] * int(axis) + [SAMPLE_AXIS]))

    def body(*args):
        outs = fn(*args)
        return tuple(jax.lax.psum(o, SAMPLE_AXIS) if a == "sum" else o for o, a in zip(outs, out_axes))

    return jax.shard_map(body, mesh=mesh, in_specs=tuple(spec(a) for a in in_axes),
                         out_specs=tuple(spec(a) for a in out_axes), check_vma=False)


# ---------------------------------------------------------------------------- several processes
def _first_host(nodelist: str) -> str:
    """First host name of a SLURM node list, e.g. ``"gpu[003-005,010],cpu1"`` -> ``"gpu003"``."""
    match = re.match(r"([^,\[]+)(\[([^\]]+)\])?", nodelist.strip())
    if not match:
        raise ValueError(f"cannot read a host name from the SLURM node list {nodelist!r}")
    prefix, _, ranges = match.groups()
    if ranges is None:
        return prefix
    return prefix + ranges.split(",")[0].split("-")[0]


def slurm_settings(env: Mapping[str, str] | None = None, port: int | None = None) -> dict[str, Any]:
    """``coordinator_address``, ``num_processes`` and ``process_id`` from a SLURM task's environment
    (``SLURM_NTASKS``, ``SLURM_PROCID``, ``SLURM_STEP_NODELIST`` or ``SLURM_JOB_NODELIST``); the
    coordinator is the first node, on ``port`` (default 20000 + job id mod 20000, so that two jobs
    sharing a node use different ports)."""
    env = os.environ if env is None else env
    missing = [k for k in ("SLURM_NTASKS", "SLURM_PROCID") if k not in env]
    nodelist = env.get("SLURM_STEP_NODELIST") or env.get("SLURM_JOB_NODELIST") or env.get("SLURM_NODELIST")
    if missing or not nodelist:
        raise ValueError(f"not inside a SLURM task (missing {', '.join(missing) or 'SLURM_JOB_NODELIST'}); "
                         "pass coordinator_address, num_processes and process_id explicitly")
    if port is None:
        port = 20000 + int(env.get("SLURM_JOB_ID", "0")) % 20000
    return {"coordinator_address": f"{_first_host(nodelist)}:{int(port)}",
            "num_processes": int(env["SLURM_NTASKS"]), "process_id": int(env["SLURM_PROCID"])}


def initialize(coordinator_address: str | None = None, num_processes: int | None = None,
               process_id: int | None = None, local_device_ids: int | Sequence[int] | None = None, *,
               port: int | None = None, timeout: int = 300) -> None:
    """Join this process to a multi-process run (a thin wrapper over ``jax.distributed.initialize``).

    Call it first, before any other JAX call, in every process. Either pass
    ``coordinator_address`` (``"host:port"`` of process 0), ``num_processes`` and ``process_id``,
    or pass none of them inside a SLURM task (``srun``), where they are read from the environment
    (:func:`slurm_settings`). On CPUs the cross-process collectives use gloo. ``timeout``: seconds
    to wait for the other processes.
    """
    explicit = (coordinator_address, num_processes, process_id)
    if all(v is None for v in explicit):
        settings = slurm_settings(port=port)
    elif any(v is None for v in explicit):
        raise ValueError("pass all of coordinator_address, num_processes and process_id, or none of them "
                         f"(inside SLURM); got {coordinator_address!r}, {num_processes!r}, {process_id!r}")
    else:
        assert num_processes is not None and process_id is not None  # all given (checked above)
        settings = {"coordinator_address": coordinator_address, "num_processes": int(num_processes),
                    "process_id": int(process_id)}
    if not 0 <= settings["process_id"] < settings["num_processes"]:
        raise ValueError(f"process_id={settings['process_id']} outside 0..{settings['num_processes'] - 1}")
    if jax.distributed.is_initialized():
        raise RuntimeError("jax.distributed is already initialised in this process")
    jax.config.update("jax_cpu_collectives_implementation", "gloo")
    jax.distributed.initialize(**settings, local_device_ids=local_device_ids, initialization_timeout=int(timeout))


def is_main_process() -> bool:
    """True in process 0 (the one that prints progress and writes files)."""
    return jax.process_index() == 0


def global_chains(local_tree, mesh: Mesh):
    """Join the chains each process holds (leading axis: its own chains, in process order) into
    global arrays sharded over the sample axis (``jax.make_array_from_process_local_data``).
    Leaves without a leading chain axis must be equal in all processes and come out replicated."""
    n_local = _chain_count(local_tree)
    n_chains = n_local * jax.process_count()
    check_divisible("n_chains", n_chains, mesh)

    def one(leaf):
        leaf = np.asarray(leaf)
        if _is_chain_leaf(leaf, n_local):
            sharding = chain_sharding(mesh, leaf.ndim)
            return jax.make_array_from_process_local_data(sharding, leaf, (n_chains, *leaf.shape[1:]))
        return _put(leaf, replicated_sharding(mesh))

    return jax.tree_util.tree_map(one, local_tree)


def to_host(tree):
    """Every leaf as a NumPy array holding the whole (global) value, on every process.

    With several processes this is a collective (``process_allgather``): call it in all of
    them. Typed PRNG keys come back as their raw key data."""
    def one(leaf):
        if isinstance(leaf, jax.Array) and jax.dtypes.issubdtype(leaf.dtype, jax.dtypes.prng_key):
            leaf = jax.random.key_data(leaf)
        if isinstance(leaf, jax.Array) and not leaf.is_fully_addressable:
            if leaf.is_fully_replicated:
                return np.asarray(leaf.addressable_data(0))
            from jax.experimental import multihost_utils

            return np.asarray(multihost_utils.process_allgather(leaf, tiled=True))
        return np.asarray(leaf)

    return jax.tree_util.tree_map(one, tree)


def free_local_port() -> int:
    """A TCP port on localhost that is free now (for the coordinator of local processes)."""
    import socket

    with socket.socket() as sock:
        sock.bind(("localhost", 0))
        return sock.getsockname()[1]


def run_local_processes(command: Callable[[int], Sequence[str]], n_processes: int, timeout: float,
                        env: Mapping[str, str] | None = None) -> list[tuple[str, str, int]]:
    """Start ``command(i)`` for ``i = 0 … n_processes − 1`` on this machine at once (e.g. the
    processes of one multi-process run, each passed its rank and a common :func:`free_local_port`),
    wait for all of them (``timeout`` seconds each) and kill whatever is left. Returns
    ``(stdout, stderr, returncode)`` per process, in rank order; a process killed at the timeout
    has a negative return code and whatever output it had written."""
    import subprocess

    from psiloom._validation import positive_int, positive_real

    n_processes = positive_int("n_processes", n_processes)
    timeout = positive_real("timeout", timeout)
    procs = [subprocess.Popen(list(command(i)), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                              env=None if env is None else dict(env)) for i in range(n_processes)]
    outs = []
    try:
        for proc in procs:
            try:
                outs.append(proc.communicate(timeout=timeout))
            except subprocess.TimeoutExpired:
                proc.kill()
                outs.append(proc.communicate())
    finally:
        for proc in procs:
            if proc.poll() is None:
                proc.kill()
                proc.communicate()
    return [(out, err, proc.returncode) for (out, err), proc in zip(outs, procs)]
