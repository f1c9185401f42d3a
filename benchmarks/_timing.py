"""Side-by-side timing helpers shared by the benchmarks."""
from __future__ import annotations

import time
from collections.abc import Callable

import torch


def interleaved(
    candidates: dict[str, Callable[[], object]], repeats: int = 15, warmup: int = 2
) -> dict[str, list[float]]:
    """Run each candidate once per round, round after round, so load swings hit all alike.

    Returns seconds per call for every round, by candidate name.
    """
    for _ in range(warmup):
        for fn in candidates.values():
            fn()
    times: dict[str, list[float]] = {name: [] for name in candidates}
    for _ in range(repeats):
        for name, fn in candidates.items():
            started = time.perf_counter()
            fn()
            times[name].append(time.perf_counter() - started)
    return times


def median(values: list[float]) -> float:
    ordered = sorted(values)
    mid = len(ordered) // 2
    return ordered[mid] if len(ordered) % 2 else 0.5 * (ordered[mid - 1] + ordered[mid])


def percentile(values: list[float], q: float) -> float:
    ordered = sorted(values)
    return ordered[min(len(ordered) - 1, int(round(q / 100 * (len(ordered) - 1))))]


def matmul_gflops(size: int = 1024, repeats: int = 10) -> float:
    """fp32 square matmul rate of this process right now, GFLOP/s."""
    a = torch.randn(size, size)
    b = torch.randn(size, size)
    for _ in range(3):
        a @ b
    best = float("inf")
    for _ in range(repeats):
        started = time.perf_counter()
        a @ b
        best = min(best, time.perf_counter() - started)
    return 2 * size**3 / best / 1e9
