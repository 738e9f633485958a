"""Run every benchmark and print ratios against plain references.

Usage: ``python bench/run.py [name ...]`` with names from BENCHMARKS
(default: all). Each benchmark measures lensview and a plain reference
implementation in the same run.
"""

import importlib
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

BENCHMARKS = ["bench_curves", "bench_measure", "bench_counterparts", "bench_app", "bench_ensemble", "bench_convergence"]


def main(names=None):
    for name in names or BENCHMARKS:
        try:
            module = importlib.import_module(name)
        except ModuleNotFoundError as error:
            print(f"{name}: not available ({error})")
            continue
        print(f"== {name}")
        module.main()


if __name__ == "__main__":
    main(sys.argv[1:])
