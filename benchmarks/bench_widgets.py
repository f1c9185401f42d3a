"""Kernel-side latency of the live explorer (the front end's share is measured in the browser).

S = 100 members of a 2-64-64-2 tanh MLP, PGD with 40 steps, a 64x64 background grid. For
each kind of change the live engine's view computation is timed with a warm cache, so
only what the change touches is recomputed:

- point change: every point-dependent panel (predictive at the input, attack, fading gradient);
- budget change: the attack path only (background and point panels come from the cache);
- sample-count change: the background layer on the grid, member boundaries and the attack.

Rounds are interleaved so load swings hit every kind alike; a cold full view (empty cache)
is the side-by-side baseline. Last, the same changes through an Explorer widget: set the
trait, wait until the worker has applied the view (trait updates included, no front end).
Targets: point / budget median <= 150 ms including the front end; sample count <= 400 ms.
"""
from __future__ import annotations

import itertools
from dataclasses import replace

import torch
from _timing import interleaved, matmul_gflops, median, percentile

import jostle
import jostle.live.engine as live

MEMBERS = 100
HIDDEN = (64, 64)
REPEATS = 9


def _ensemble() -> jostle.Ensemble:
    generator = torch.Generator().manual_seed(0)
    nets = [jostle.init_parameters(jostle.mlp(2, 2, hidden=HIDDEN), generator) for _ in range(MEMBERS)]
    return jostle.Ensemble.from_modules(nets)


def engine_rows(ens: jostle.Ensemble, data: jostle.Dataset) -> list[dict]:
    bounds = data.bounds
    base = live.ExplorerState(point=tuple(data.x_test[0].tolist()), budget=0.1, samples=MEMBERS, method="pgd",
                              steps=40, grid=64, boundaries=6)
    cache = live.ViewCache()
    live.compute_view(ens, base, bounds=bounds, cache=cache)
    counter = itertools.count(1)
    grid_seconds: list[float] = []

    def point_change():
        k = next(counter)
        x = data.x_test[k % data.x_test.shape[0]].tolist()
        live.compute_view(ens, replace(base, point=(x[0] + 1e-6 * k, x[1])), bounds=bounds, cache=cache)

    def budget_change():
        live.compute_view(ens, replace(base, budget=0.1 + 1e-4 * next(counter)), bounds=bounds, cache=cache)

    def samples_change():
        # 60..99 cycles through more sample counts than the cache holds, so every call misses
        view = live.compute_view(ens, replace(base, samples=60 + next(counter) % 40), bounds=bounds, cache=cache)
        grid_seconds.append(view.timings.get("grid_prediction", 0.0) + view.timings.get("grid", 0.0))

    def cold_full_view():
        live.compute_view(ens, replace(base, budget=0.1 + 1e-4 * next(counter)), bounds=bounds)

    times = interleaved({"point change": point_change, "budget change": budget_change,
                         "sample-count change": samples_change, "cold full view (baseline)": cold_full_view},
                        repeats=REPEATS, warmup=1)
    rows = [{"change": name, "median_ms": 1e3 * median(t), "p95_ms": 1e3 * percentile(t, 95),
             "vs_cold": median(t) / median(times["cold full view (baseline)"])} for name, t in times.items()]
    rows.append({"change": "  of which background grid", "median_ms": 1e3 * median(grid_seconds),
                 "p95_ms": 1e3 * percentile(grid_seconds, 95), "vs_cold": float("nan")})
    return rows


def widget_rows(ens: jostle.Ensemble, data: jostle.Dataset) -> list[dict]:
    from jostle.widgets import Explorer

    explorer = Explorer(ens, data, steps=40, grid=64)
    explorer.wait(120)
    counter = itertools.count(1)

    def settle(**change):
        explorer.set_state(change)
        if not explorer.wait(60):
            raise RuntimeError("the explorer did not settle within 60 s")

    def point_change():
        k = next(counter)
        x = data.x_test[k % data.x_test.shape[0]].tolist()
        settle(point=[x[0] + 1e-6 * k, x[1]])

    try:
        times = interleaved({
            "widget: point change": point_change,
            "widget: budget change": lambda: settle(budget=0.1 + 1e-4 * next(counter)),
            "widget: sample-count change": lambda: settle(samples=60 + next(counter) % 40),
        }, repeats=REPEATS, warmup=1)
    finally:
        explorer.close()
    return [{"change": name, "median_ms": 1e3 * median(t), "p95_ms": 1e3 * percentile(t, 95),
             "vs_cold": float("nan")} for name, t in times.items()]


def main() -> None:
    default_threads = torch.get_num_threads()
    ens = _ensemble()
    data = jostle.datasets.moons(n_train=300, n_test=300, seed=0)
    print(f"S = {MEMBERS} members 2-64-64-2 tanh, PGD 40 steps, 64x64 grid; "
          f"fp32 matmul now {matmul_gflops():.0f} GFLOP/s")
    missing = [name for name in ("attack", "gradient_fade") if not hasattr(jostle, name)]
    if missing:
        print(f"note: jostle.{' and jostle.'.join(missing)} missing from this tree; those panels are not timed")
    # Small networks on a busy 2-core machine: a second intra-op thread can cost far more than
    # it gains, so the engine is timed at the default thread count and at one thread.
    rows = []
    for threads in sorted({default_threads, 1}, reverse=True):
        torch.set_num_threads(threads)
        rows += [dict(row, change=f"[{threads} thr] {row['change']}") for row in engine_rows(ens, data)]
        rows += [dict(row, change=f"[{threads} thr] {row['change']}") for row in widget_rows(ens, data)]
    torch.set_num_threads(default_threads)
    print(f"fp32 matmul after: {matmul_gflops():.0f} GFLOP/s")
    print(f"{'change':40s} {'median ms':>10s} {'p95 ms':>9s} {'/ cold':>7s}")
    for row in rows:
        ratio = "" if row["vs_cold"] != row["vs_cold"] else f"{row['vs_cold']:.2f}"
        print(f"{row['change']:40s} {row['median_ms']:10.1f} {row['p95_ms']:9.1f} {ratio:>7s}")


if __name__ == "__main__":
    main()
