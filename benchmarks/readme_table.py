"""The README's speed table, generated from stored benchmark outputs, so figures and code cannot drift.

Reads ``benchmarks/results/*.json`` (written by a benchmark run with ``--save PATH``: the command,
the load average before and after, and every JSON line it printed) and renders one table row per
measured comparison, each with the command that produced it, the median of its runs and their
spread (min–max). ``python benchmarks/readme_table.py`` prints the table; ``--write`` replaces the
block between the README's ``<!-- speed-table -->`` markers with it; ``--check`` exits with 1
when the README's block differs (``tests/test_readme_table.py`` checks the same).

To refresh the figures on an idle machine::

    python benchmarks/time_to_accuracy.py --save benchmarks/results/time_to_accuracy.json
    python benchmarks/throughput.py --save benchmarks/results/throughput.json
    python benchmarks/readme_table.py --write
"""

from __future__ import annotations

import glob
import json
import os
import sys

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
RESULTS = os.path.join(ROOT, "benchmarks", "results")
README = os.path.join(ROOT, "README.md")
START, END = "<!-- speed-table:start -->", "<!-- speed-table:end -->"


def _num(x: float, digits: int = 2) -> str:
    return f"{x:.{digits}g}" if abs(x) < 10 ** digits else f"{x:.0f}"


def _spread(median: float, low: float, high: float, unit: str = "", digits: int = 2) -> str:
    return f"{_num(median, digits)}{unit} ({_num(low, digits)}–{_num(high, digits)})"


def _context(saved: dict, quick: bool) -> str:
    load = saved["loadavg_start"][0], saved["loadavg_end"][0]
    return f"`{saved['command']}`, {saved['started'][:10]}, load {load[0]:.1f}→{load[1]:.1f} on {saved['cpu_count']} cores" + (
        ", quick mode" if quick else "")


def rows(saved: dict) -> list[str]:
    """Table rows (markdown) of one saved run."""
    lines = saved["lines"]
    summary = next((l for l in lines if l.get("summary")), {})
    quick = bool(summary.get("quick"))
    out = []
    for line in lines:
        if line.get("benchmark") == "time_to_accuracy" and not line.get("summary"):
            n = line["system"]["extent"][0]
            wall, rel = line["wall_seconds"], line["rel_error"]
            runs = len(wall["yardstick"]["runs"])
            for name, label in (("psiloom_cold", "README demo (translation-invariant RBM), first run (empty caches)"),
                                ("psiloom_warm", "README demo (translation-invariant RBM), later runs (caches filled)"),
                                ("psiloom_dense_warm", "demo with the yardstick's dense RBM, later runs")):
                if name not in wall:  # runs saved before the dense line existed
                    continue
                if "dense" not in name and "psiloom_dense_warm" not in wall:
                    label = label.replace("README demo (translation-invariant RBM)", "README demo (dense RBM)")
                ratio = wall[name]["median"] / wall["yardstick"]["median"]
                out.append(
                    f"| Heisenberg ring L={n}: wall time of the whole process to a relative error ≤ 2e-4, "
                    f"{label}, vs a plain JAX script | "
                    f"{_spread(wall[name]['median'], wall[name]['min'], wall[name]['max'], ' s', 3)} vs "
                    f"{_spread(wall['yardstick']['median'], wall['yardstick']['min'], wall['yardstick']['max'], ' s', 3)}"
                    f"; relative error {rel[name]['median']:.1e} vs {rel['yardstick']['median']:.1e} | "
                    f"{ratio:.2f}× the time | {runs} | {_context(saved, quick)} |")
        elif line.get("metric") == "metropolis_sweep_seconds" and "ratio_min" in line:
            m = line["method"]
            bound = (line.get("roofline") or {}).get("ratio_bound")
            out.append(
                f"| Metropolis sweep, RBM α=2, ring L=100, {m['n_chains']} chains, {m['order']} order: fast "
                f"updates (compiled sweeps) vs full re-evaluation | "
                f"{_spread(line['ratio'], line['ratio_min'], line['ratio_max'], '×')} faster"
                + (f"; {bound:.0f}× if both paths ran at this CPU's roofline" if bound else "") + f" | target ≥ 10× | {line['runs']} | "
                f"{_context(saved, quick)} |")
        elif (line.get("metric") == "local_energy_throughput" and line["method"]["laplacian"] == "forward"
              and line.get("ratio_to_folx") is not None):
            folx = next(l for l in lines if l.get("metric") == "local_energy_throughput"
                        and l["method"]["laplacian"] == "folx" and l["system"] == line["system"])
            out.append(
                f"| Local energy of {line['system']['name']} ({line['method']['trial_state']}, "
                f"{line.get('walkers', 256)} configurations per call): own forward Laplacian vs the optional folx | "
                f"best of {line.get('repeats', 7)} interleaved rounds: {line['value']:.0f} vs {folx['value']:.0f} "
                f"configurations/s | {line['ratio_to_folx']:.2f}× folx's rate (target ≥ 1) | {line.get('repeats', 7)} | "
                f"{_context(saved, quick)} |")
    return out


def table(results: str = RESULTS) -> str:
    """The whole table (markdown) from every saved run under ``results``."""
    body = []
    for path in sorted(glob.glob(os.path.join(results, "*.json"))):
        with open(path) as f:
            body.extend(rows(json.load(f)))
    head = ["| measurement | median (min–max) | ratio or target | runs | command, date, machine load |",
            "|---|---|---|---|---|"]
    note = (f"Generated by `python benchmarks/readme_table.py --write` from the JSON files in "
            f"`benchmarks/results/`; rerun the commands to refresh.")
    return "\n".join([note, "", *head, *body])


def readme_block(readme: str = README) -> str:
    with open(readme) as f:
        text = f.read()
    if START not in text or END not in text:
        raise ValueError(f"{readme} has no {START} ... {END} block")
    return text.split(START, 1)[1].split(END, 1)[0].strip()


def write(readme: str = README) -> None:
    with open(readme) as f:
        text = f.read()
    before, rest = text.split(START, 1)
    after = rest.split(END, 1)[1]
    with open(readme, "w") as f:
        f.write(f"{before}{START}\n{table()}\n{END}{after}")


def main(argv: list[str]) -> int:
    if "--write" in argv:
        write()
        return 0
    if "--check" in argv or "--quick" in argv:
        # --quick: the check, with one JSON line last like every script in benchmarks/
        same = readme_block() == table().strip()
        print("README speed table is up to date" if same else "README speed table differs: run "
              "python benchmarks/readme_table.py --write", file=sys.stderr)
        if "--quick" in argv:
            rows = sum(1 for line in table().splitlines() if line.startswith("| ") and "---" not in line) - 1
            print(json.dumps({"summary": True, "benchmark": "readme_table", "quick": True, "up_to_date": same,
                              "rows": rows}))
        return 0 if same else 1
    print(table())
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
