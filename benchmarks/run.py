"""Run every registered benchmark and print its table (`make bench`).

Each module in BENCHMARKS exposes ``main()``. Figures are ratios measured side by side
in one process, because this machine's absolute speed swings 2-3x with its load.
"""
from __future__ import annotations

import importlib
import sys
import time
from pathlib import Path

BENCHMARKS = [
    "bench_attacks",
    "bench_ensemble",
    "bench_hmc",
    "bench_posteriors",
    "bench_sweep",
    "bench_widgets",
    "bench_browser",
    "bench_image_browser",
    "bench_gradient_readout",
    "bench_sgmcmc",
    "bench_certify",
    "bench_cnn",
]


def main(selected: list[str]) -> int:
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    names = [n for n in BENCHMARKS if not selected or n in selected]
    for name in names:
        print(f"\n=== {name} ===", flush=True)
        started = time.perf_counter()
        importlib.import_module(name).main()
        print(f"({name}: {time.perf_counter() - started:.1f} s)", flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
