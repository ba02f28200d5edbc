"""Run every ``benchmarks/bench_*.py`` (or those named on the command line) and update
benchmarks/RESULTS.md. Usage: ``python -m benchmarks.run [name ...]``."""

from __future__ import annotations

import importlib
import os
import sys
from pathlib import Path

# Benchmarks time cold starts: no persistent compilation cache unless a benchmark sets one up
# itself for a run it labels as such (bench_fit's fresh processes). Set before stopwise loads.
os.environ["STOPWISE_CACHE_DIR"] = "off"

from benchmarks._common import write_section


def main(names: list[str]) -> int:
    here = Path(__file__).parent
    modules = sorted(p.stem for p in here.glob("bench_*.py"))
    if names:
        modules = [m for m in modules if any(n in m for n in names)]
    for name in modules:
        print(f"== {name}", flush=True)
        module = importlib.import_module(f"benchmarks.{name}")
        section = module.main()
        write_section(name, section)
        print(section, flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
