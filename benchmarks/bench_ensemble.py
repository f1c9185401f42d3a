"""Posterior predictive of S members: jostle vs a per-member loop vs vmap(functional_call).

S = 100 members of a 2-64-64-2 tanh MLP over N = 1, 100 and 2,500 points (2,500 = a 50x50
grid), measured interleaved in one process beside the fp32 1024x1024 matmul rate; then how
time grows when S or N grows 4x; then the peak extra memory of S = 1,000, N = 10,000
(measured in a fresh subprocess from its peak resident set size).
"""
from __future__ import annotations

import json
import subprocess
import sys
import textwrap

import torch
from _timing import interleaved, matmul_gflops, median
from torch.func import functional_call, stack_module_state, vmap

import jostle

HIDDEN = (64, 64)


def _members(count: int, seed: int = 0):
    generator = torch.Generator().manual_seed(seed)
    return [jostle.init_parameters(jostle.mlp(2, 2, hidden=HIDDEN), generator).eval() for _ in range(count)]


def _flops(members: int, points: int) -> float:
    widths = [2, *HIDDEN, 2]
    return 2.0 * members * points * sum(a * b for a, b in zip(widths[:-1], widths[1:]))


def compare(points_list=(1, 100, 2500), members: int = 100) -> list[dict]:
    nets = _members(members)
    ens = jostle.Ensemble.from_modules(nets)
    stacked, buffers = stack_module_state(nets)
    template = nets[0]

    def one(params, x):
        return functional_call(template, params, (x,))

    vmapped = vmap(one, in_dims=(0, None))
    rows = []
    for points in points_list:
        x = torch.randn(points, 2, generator=torch.Generator().manual_seed(points))
        with torch.no_grad():
            times = interleaved({
                "jostle": lambda x=x: ens.logits(x),
                "loop": lambda x=x: torch.stack([net(x) for net in nets]),
                "vmap": lambda x=x: vmapped(stacked, x),
            }, repeats=21 if points < 1000 else 11)
        medians = {name: median(values) for name, values in times.items()}
        rows.append({"points": points, **{f"{k}_ms": v * 1e3 for k, v in medians.items()},
                     "flop_rate": _flops(members, points) / medians["jostle"] / 1e9})
    return rows


def growth() -> dict:
    base_members, base_points = 100, 2500
    ens_small = jostle.Ensemble.from_modules(_members(base_members))
    ens_big = jostle.Ensemble.from_modules(_members(4 * base_members, seed=1))
    x = torch.randn(base_points, 2)
    x_big = torch.randn(4 * base_points, 2)
    with torch.no_grad():
        times = interleaved({
            "base": lambda: ens_small.logits(x),
            "members_x4": lambda: ens_big.logits(x),
            "points_x4": lambda: ens_small.logits(x_big),
        }, repeats=7)
    base = median(times["base"])
    return {"members_x4": median(times["members_x4"]) / base, "points_x4": median(times["points_x4"]) / base}


_MEMORY_PROBE = textwrap.dedent("""
    import json, os, threading, time, torch, jostle
    page = os.sysconf("SC_PAGE_SIZE")

    def resident():
        with open("/proc/self/statm") as handle:
            return int(handle.read().split()[1]) * page

    g = torch.Generator().manual_seed(0)
    template = jostle.mlp(2, 2, hidden=(64, 64))
    # Stacked parameters drawn directly rather than from 1,000 separate modules.
    params = {k: torch.randn((1000, *v.shape), generator=g) * 0.3 for k, v in template.state_dict().items()}
    ens = jostle.Ensemble(template, params)
    x = torch.randn(10000, 2)
    ens.predict(x[:10], samples=2)
    before = resident()
    peak = [before]
    done = threading.Event()

    def watch():
        # ru_maxrss is a lifetime peak; sampling the current resident size isolates this call.
        while not done.is_set():
            peak[0] = max(peak[0], resident())
            time.sleep(0.0005)

    watcher = threading.Thread(target=watch)
    watcher.start()
    pred = ens.predict(x)
    _ = (pred.probs, pred.epistemic)
    done.set()
    watcher.join()
    peak[0] = max(peak[0], resident())
    print(json.dumps({"extra_mib": (peak[0] - before) / 2**20, "output_mib": pred.member_probs.numel() * 4 / 2**20}))
""")



def peak_memory() -> dict:
    done = subprocess.run([sys.executable, "-c", _MEMORY_PROBE], capture_output=True, text=True, timeout=600)
    if done.returncode != 0:
        raise RuntimeError(done.stderr)
    return json.loads(done.stdout.strip().splitlines()[-1])


def main() -> None:
    gflops = matmul_gflops()
    rows = compare()
    after = matmul_gflops()
    print(f"fp32 1024x1024 matmul: {gflops:.0f} GFLOP/s before, {after:.0f} after")
    print(f"{'N':>6} {'jostle ms':>10} {'loop ms':>9} {'vmap ms':>9} "
          f"{'vs loop':>8} {'vs vmap':>8} {'share of matmul rate':>21}")
    for r in rows:
        share = r["flop_rate"] / max(gflops, after)
        print(f"{r['points']:>6} {r['jostle_ms']:>10.3f} {r['loop_ms']:>9.3f} {r['vmap_ms']:>9.3f} "
              f"{r['loop_ms'] / r['jostle_ms']:>7.1f}x {r['vmap_ms'] / r['jostle_ms']:>7.1f}x {share:>20.0%}")
    g = growth()
    print(f"time growth, S=100 N=2500 base: 4x members -> {g['members_x4']:.2f}x, 4x points -> {g['points_x4']:.2f}x "
          f"(target 3x-5x)")
    m = peak_memory()
    print(f"S=1000, N=10000 predict: peak extra memory {m['extra_mib']:.0f} MiB "
          f"(of which member_probs output {m['output_mib']:.0f} MiB; target < 1024 MiB)")


if __name__ == "__main__":
    main()
