"""The ladder's Heisenberg ring L=100 rung on an accelerator (GPU/TPU), when one is present.

Runs the ``heisenberg_chain_100`` rung of ``benchmarks/ladder.py`` (weight-shared RBM α=2,
Bethe-ansatz reference, target 1e-4 relative in 10 min) with its chains spread over every
accelerator device (``GroundStateSearch(mesh=psiloom.parallel.sample_mesh())``). Without an
accelerator it prints one JSON summary line saying so and exits with status 0, so that it can
sit in a CPU-only benchmark run. ``--quick``: the same rung cut to 100 steps, an 8192-sample
evaluation and a 3-minute limit (a smoke test of the accelerator path, not of the accuracy).

Output per the benchmark contract (DEVELOPERS.md, "Benchmarks"): one JSON line for the rung,
then the summary line (``"summary": true``); progress on stderr.
"""

from __future__ import annotations

import os
import sys
from dataclasses import replace

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

import jax  # noqa: E402

jax.config.update("jax_enable_x64", True)

from _common import emit, parse_args, progress, summary  # noqa: E402

RUNG = "heisenberg_chain_100"


def main(argv=None) -> None:
    args = parse_args("accelerator_ladder", "the ladder's L=100 rung on an accelerator", argv)
    devices = [d for d in jax.devices() if d.platform != "cpu"]
    if not devices:
        progress("no accelerator present (JAX sees only CPU devices); nothing to run")
        summary([], benchmark="accelerator_ladder", accelerator=None, quick=bool(args.quick),
                note="no accelerator present; the rung was not run")
        return
    import ladder
    from psiloom import parallel

    mesh = parallel.sample_mesh(devices)
    rung = next(r for r in ladder.FULL if r.name == RUNG)
    d = len(devices)
    if rung.n_chains % d:  # whole chains per device
        rung = replace(rung, n_chains=-(-rung.n_chains // d) * d)
    if rung.n_samples % rung.n_chains:
        rung = replace(rung, n_samples=-(-rung.n_samples // rung.n_chains) * rung.n_chains)
    if args.quick:
        rung = replace(rung, steps=100, eval_samples=8192, time_limit=180.0)
    progress(f"{RUNG} on {d} {devices[0].platform} device(s): {devices[0].device_kind}")
    record = ladder.run_rung(rung, mesh=mesh)
    record["benchmark"] = "accelerator_ladder"
    record["method"]["devices"] = d
    record["method"]["device_kind"] = devices[0].device_kind
    summary([emit(record)], benchmark="accelerator_ladder", accelerator=devices[0].device_kind, devices=d,
            quick=bool(args.quick))


if __name__ == "__main__":
    main()
