"""A 16-run sweep in this process against a 2-worker Dask LocalCluster.

Reports both wall times, and the cluster path's overhead per run: the worker-slot time
not spent inside the run function, ``(wall * workers - sum of run times) / runs``
(submission, pickling, scheduling, result transfer, the idle tail). Target: under 10% of
the run time for runs of at least 5 s. Run lengths are set by the number of epochs; the
machine is shared, so compare the two paths only within one invocation.
"""
from __future__ import annotations

import logging
import os
import sys
import tempfile
import time
from pathlib import Path

import jostle
from jostle.sweeps.results_db import RunStore

RUNS = 16
WORKERS = 2


def sweep_spec(epochs: int) -> dict:
    return dict(
        name=f"bench-{epochs}",
        datasets=[{"name": "moons", "n_test": 200}],
        methods=[{"name": "map", "epochs": epochs}, {"name": "deep_ensemble", "members": 3, "epochs": epochs}],
        architectures=[{"depth": 2, "width": 32}],
        train_sizes=[300],
        seeds=list(range(RUNS // 2)),
        evaluation={"budgets": [0.1, 0.2], "points": 100,
                    "attacks": [{"method": "fgsm"}, {"method": "pgd", "steps": 20}]},
    )


def timed_sweep(spec: dict, folder: Path, client=None) -> tuple[float, list[float]]:
    store = folder / ("cluster.sqlite" if client else "local.sqlite")
    sweep = jostle.Sweep(**spec)  # checking the definition is not part of either path
    started = time.perf_counter()
    summary = sweep.run(store=store, client=client, progress_bar=False)
    wall = time.perf_counter() - started
    if summary.failed:
        raise RuntimeError(f"{summary.failed} benchmark runs failed: {summary.failed_keys[:3]}")
    with RunStore(store, readonly=True) as db:
        inside = [r["finished"] - r["started"] for r in db.runs()]
    return wall, inside


def main(epoch_settings: tuple[int, ...] = (5, 300)) -> None:
    from distributed import Client, LocalCluster

    started = time.perf_counter()
    cluster = LocalCluster(n_workers=WORKERS, processes=True, threads_per_worker=1,
                           dashboard_address=":0", silence_logs=logging.ERROR)
    client = Client(cluster)
    client.run(lambda: __import__("jostle") and None)  # workers import jostle before timing
    startup = time.perf_counter() - started
    print(f"LocalCluster start-up with {WORKERS} worker processes: {startup:.1f} s (not counted below)")
    header = (f"{'epochs':>6} {'run s here':>10} {'run s worker':>12} {'in-process s':>12} {'cluster s':>9} "
              f"{'speed-up':>8} {'overhead/run s':>14} {'overhead %':>10}")
    print(header)
    try:
        with tempfile.TemporaryDirectory(prefix="jostle-bench-sweep-") as tmp:
            for epochs in epoch_settings:
                folder = Path(tmp) / str(epochs)
                folder.mkdir()
                spec = sweep_spec(epochs)
                # Untimed warm-up here and on both workers: first calls import and compile lazily.
                warm_up = dict(spec, seeds=[1000], name="warm-up")
                timed_sweep(warm_up, folder / "warm-local")
                timed_sweep(warm_up, folder / "warm-cluster", client)
                local_wall, here = timed_sweep(spec, folder)
                cluster_wall, inside = timed_sweep(spec, folder, client)
                mean_here, mean_run = sum(here) / len(here), sum(inside) / len(inside)
                overhead = (cluster_wall * WORKERS - sum(inside)) / len(inside)
                print(f"{epochs:>6} {mean_here:>10.2f} {mean_run:>12.2f} {local_wall:>12.1f} {cluster_wall:>9.1f} "
                      f"{local_wall / cluster_wall:>8.2f} {overhead:>14.3f} {100 * overhead / mean_run:>9.1f}%",
                      flush=True)
    finally:
        client.close()
        cluster.close()
    print(f"({RUNS} runs per sweep; {os.cpu_count()} CPUs; overhead = (cluster wall x {WORKERS} - "
          f"sum of in-worker run times) / runs; 'overhead %' is of the mean in-worker run time)")


if __name__ == "__main__":
    main(tuple(int(a) for a in sys.argv[1:]) or (5, 300))
