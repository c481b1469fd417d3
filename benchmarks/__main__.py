"""Run every benchmark module ``benchmarks/bench_*.py``; each prints JSON lines.

Usage: ``python -m benchmarks [NAME ...]`` where NAME filters modules by substring.
Each module defines ``run() -> Iterable[dict]``; every dict is printed as one JSON line.
"""

from __future__ import annotations

import importlib
import json
import pkgutil
import sys

import benchmarks


def main(argv: list[str]) -> int:
    names = sorted(
        m.name for m in pkgutil.iter_modules(benchmarks.__path__) if m.name.startswith("bench_")
    )
    wanted = [n for n in names if not argv or any(a in n for a in argv)]
    for name in wanted:
        module = importlib.import_module(f"benchmarks.{name}")
        for record in module.run():
            print(json.dumps(record), flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
