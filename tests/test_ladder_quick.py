"""One rung of the accuracy ladder (benchmarks/ladder.py) at a small size, with its bound.

Heisenberg ring L=12 (H = Σ S_i·S_{i+1}, S = σ/2, periodic), RBM α=1 trained by stochastic
reconfiguration; reference: the Bethe ansatz ground-state energy (Bethe 1931), solved
numerically by psiloom.reference and cross-checked against exact diagonalisation in
tests/test_exact_solutions.py. Target: relative error ≤ 2e-3 (Carleo & Troyer, Science 355,
602 (2017) report ~1e-4–1e-3 for RBMs on Heisenberg chains at α=1, from memory; a short run
is looser). The variational principle bounds the estimate from below up to its error bar.
"""

from __future__ import annotations

import importlib.util
import json
import math
import pathlib
import sys

import pytest

BENCH = pathlib.Path(__file__).resolve().parents[1] / "benchmarks"


@pytest.fixture(scope="module")
def ladder():
    sys.path.insert(0, str(BENCH))
    try:
        spec = importlib.util.spec_from_file_location("ladder_under_test", BENCH / "ladder.py")
        module = importlib.util.module_from_spec(spec)
        sys.modules[spec.name] = module  # dataclasses look their module up by name
        spec.loader.exec_module(module)
        yield module
    finally:
        sys.modules.pop("ladder_under_test", None)
        sys.path.remove(str(BENCH))


def test_heisenberg_ring_12_rung(ladder):
    rung = ladder.Rung("heisenberg_chain_12", "heisenberg", (12,), 2e-3, alpha=1, n_samples=256,
                       steps=100, lr=(0.03, 0.05), warmup=10, shift=(1e-2, 1e-4), shift_decay_steps=50, n_chains=32,
                       eval_samples=4096)
    record = ladder.run_rung(rung)
    json.dumps(record)  # JSON-serialisable, as the benchmark contract requires
    # reference: Bethe ansatz, L = 12 (E0 = −5.387390917 from memory; computed by psiloom.reference here)
    assert record["reference"] == pytest.approx(-5.387390917, abs=1e-8)
    assert record["rel_error"] <= rung.target, record
    # variational principle: E ≥ E0, up to the (autocorrelation-corrected) error bar
    assert record["energy"] >= record["reference"] - 4.0 * record["error_bar"]
    assert 0 < record["error_bar"] < 1e-2
    assert math.isfinite(record["seconds"]) and record["steps"] == 100 and record["n_params"] == 168
    assert record["passed"] is True
