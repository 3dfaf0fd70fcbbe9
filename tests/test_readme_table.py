"""The README's speed table is what benchmarks/readme_table.py generates from the stored outputs."""

import importlib.util
import os

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def _module():
    spec = importlib.util.spec_from_file_location("readme_table", os.path.join(ROOT, "benchmarks", "readme_table.py"))
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_readme_speed_table_matches_the_stored_benchmark_outputs():
    table = _module()
    assert table.readme_block() == table.table().strip(), "run: python benchmarks/readme_table.py --write"


def test_rows_carry_median_spread_and_command():
    table = _module()
    saved = {"command": "python benchmarks/throughput.py", "started": "2026-01-01T00:00:00Z",
             "loadavg_start": [0.1, 0, 0], "loadavg_end": [0.2, 0, 0], "cpu_count": 2,
             "lines": [{"metric": "metropolis_sweep_seconds", "method": {"n_chains": 64, "order": "random"},
                        "ratio": 12.0, "ratio_min": 11.0, "ratio_max": 13.5, "runs": 3,
                        "roofline": {"ratio_bound": 40.0}},
                       {"summary": True, "quick": False}]}
    (row,) = table.rows(saved)
    assert "12× (11–14)" in row and "64 chains" in row and "`python benchmarks/throughput.py`" in row
    assert "| 3 |" in row and "load 0.1→0.2" in row and "40× if both paths ran at this CPU's roofline" in row


def test_laplacian_rows_compare_with_folx_on_the_same_system():
    table = _module()
    system = {"name": "Be"}
    line = lambda m, v, **kw: {"metric": "local_energy_throughput", "system": system, "value": v,
                               "method": {"laplacian": m, "trial_state": "neural n_det=4"}, **kw}
    saved = {"command": "python benchmarks/molecules.py --case laplacian", "started": "2026-01-01T00:00:00Z",
             "loadavg_start": [0.5, 0, 0], "loadavg_end": [1.5, 0, 0], "cpu_count": 2,
             "lines": [line("hessian", 100.0, ratio_to_folx=0.5), line("forward", 300.0, ratio_to_folx=1.5, repeats=7),
                       line("folx", 200.0, ratio_to_folx=1.0), {"summary": True, "quick": False}]}
    (row,) = table.rows(saved)  # one row: the forward line, with folx's rate beside it
    assert "300 vs 200 configurations/s" in row and "1.50× folx's rate" in row and "Be" in row
