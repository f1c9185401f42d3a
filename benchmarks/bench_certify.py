"""Certified bounds: one point's certificate and the certified-radius map layer, against per-member loops.

1. One point, S = 100 members of a 2-64-64-2 MLP (ReLU and tanh), ``jostle.certify`` at eps 0.1
   over all members at once against a loop of one-member certificates. Target: <= 20 ms.
2. The certified-radius map layer (``jostle.live.certified_map``) for a 64 x 64 grid at S = 100,
   coarse to fine (16, 32, then 64 cells per axis), on 2 threads. Target: <= 2 s. The per-member
   loop is timed on the 16 x 16 level only (it is S times the calls).
Rounds alternate so load swings hit every candidate alike.
"""
from __future__ import annotations

import time

import torch
from _timing import interleaved, median

import jostle
from jostle.common.threads import torch_threads
from jostle.live.certified_map import MAP_ITERATIONS, radius_map, radius_map_levels

MEMBERS = 100
POINT_TARGET_MS = 20.0
MAP_TARGET_S = 2.0
LO, HI = (-3.0, -3.0), (3.0, 3.0)


def _ensemble(activation: str) -> jostle.Ensemble:
    generator = torch.Generator().manual_seed(0)
    nets = [jostle.init_parameters(jostle.mlp(2, 2, hidden=(64, 64), activation=activation), generator)
            for _ in range(MEMBERS)]
    return jostle.Ensemble.from_modules(nets, meta={"bounds": [list(LO), list(HI)]})


def point_table() -> None:
    x = torch.tensor([[0.3, -0.2]])
    print(f"one point, S = {MEMBERS}, 2-64-64-2, eps 0.1 (L-inf), threads {torch.get_num_threads()}")
    print(f"{'net':<6} {'method':<6} {'together ms':>12} {'per member ms':>14} {'ratio':>6}  "
          f"target <= {POINT_TARGET_MS:.0f} ms")
    for activation in ("relu", "tanh"):
        ens = _ensemble(activation)
        singles = [ens[m] for m in range(MEMBERS)]
        for method in ("ibp", "crown"):
            times = interleaved({
                "together": lambda e=ens, m=method: jostle.certify(e, x, 0.1, method=m, threads=None),
                "loop": lambda s=singles, m=method: [jostle.certify(one, x, 0.1, method=m, threads=None) for one in s],
            }, repeats=5, warmup=1)
            together, loop = 1000 * median(times["together"]), 1000 * median(times["loop"])
            verdict = "met" if together <= POINT_TARGET_MS else "MISSED"
            print(f"{activation:<6} {method:<6} {together:>12.1f} {loop:>14.1f} {loop / together:>5.1f}x  {verdict}")


def map_table() -> None:
    print(f"\ncertified-radius map layer, S = {MEMBERS}, 2-64-64-2, L-inf, {MAP_ITERATIONS} bisection steps, "
          f"threads {torch.get_num_threads()}")
    print(f"{'net':<6} {'method':<6} {'16x16 s':>8} {'all levels s':>13} {'16x16 loop s':>13}  "
          f"target <= {MAP_TARGET_S:.0f} s")
    for activation, method in (("relu", "ibp"), ("tanh", "ibp"), ("relu", "crown")):
        ens = _ensemble(activation)
        singles = [ens[m] for m in range(MEMBERS)]
        times = interleaved({
            "map": lambda e=ens, m=method: radius_map(e, MEMBERS, 16, LO, HI, method=m),
            "loop": lambda s=singles, m=method: [radius_map(one, 1, 16, LO, HI, method=m) for one in s],
        }, repeats=1, warmup=0)
        coarse, loop = median(times["map"]), median(times["loop"])
        if method == "crown" and coarse * 21 > 120:  # 64x64 is 16x the cells of 16x16, plus the 32x32 level
            print(f"{activation:<6} {method:<6} {coarse:>8.2f} {'(skipped)':>13} {loop:>13.2f}  MISSED "
                  f"(estimated {coarse * 21:.0f} s)")
            continue
        started = time.perf_counter()
        for _ in radius_map_levels(ens, MEMBERS, 64, LO, HI, method=method):
            pass
        total = time.perf_counter() - started
        verdict = "met" if total <= MAP_TARGET_S else "MISSED"
        print(f"{activation:<6} {method:<6} {coarse:>8.2f} {total:>13.2f} {loop:>13.2f}  {verdict}")


def main() -> None:
    with torch_threads(2):
        point_table()
        map_table()


if __name__ == "__main__":
    main()
