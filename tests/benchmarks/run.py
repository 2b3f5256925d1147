"""Benchmark command: ``python -m tests.benchmarks.run [NAME ...]`` from the repository root.

Runs every ``tests/benchmarks/bench_*.py`` module (or those named), each exposing
``run() -> list[Row]``, and prints each figure beside its peer with the ratio and whether the
target is met.
"""

from __future__ import annotations

import importlib
import pkgutil
import sys
from pathlib import Path


def main(argv: list[str] | None = None) -> int:
    wanted = set(argv if argv is not None else sys.argv[1:])
    here = Path(__file__).parent
    names = sorted(m.name for m in pkgutil.iter_modules([str(here)]) if m.name.startswith("bench_"))
    rows = []
    for name in names:
        if wanted and name.removeprefix("bench_") not in wanted and name not in wanted:
            continue
        module = importlib.import_module(f"tests.benchmarks.{name}")
        print(f"== {name.removeprefix('bench_')}", flush=True)
        for row in module.run():
            rows.append(row)
            print(
                f"  {row.benchmark}: {row.ours:.4g} {row.unit}  |  {row.peer}: "
                f"{row.peer_value:.4g} {row.unit}  |  ratio {row.ratio:.3g}x  |  "
                f"target {row.target}: {'met' if row.met else 'NOT MET'}",
                flush=True,
            )
    return 0 if all(r.met for r in rows) else 1


if __name__ == "__main__":
    sys.exit(main())
