"""The default CNN on 28x28 images: jostle's batched passes against a per-member loop.

Network: ``jostle.cnn((1, 28, 28), 10)`` (two 3x3 convolutions of 16 and 32 channels,
ReLU, 2x2 max pooling, one Linear head), S members seeded by ``init_parameters``. The
loop evaluates each member as its own ``nn.Module`` on the whole batch (what a user
writes); PGD's loop differentiates each member with plain autograd. Every ratio is
measured side by side in one process, candidates interleaved round after round, medians
taken (the machine's speed swings with its load). Also the strategies the forward
engine chooses between (members side by side as channel blocks, one member at a time
through the same pass, ``vmap``), and the peak extra memory of predict at S = 100,
N = 10,000 in a fresh process (the high-water mark of its resident size during the call,
above the resident size before it).

``python benchmarks/bench_cnn.py --device cuda`` runs the same comparisons on a GPU (each
timed call ends with ``torch.cuda.synchronize``; the memory row is then the peak of
``torch.cuda.max_memory_allocated`` above the memory held before the call).
"""
from __future__ import annotations

import argparse
import copy
import subprocess
import sys

import torch
from _timing import interleaved, median
from torch import nn

import jostle
import jostle.posterior.forward as forward
from jostle.posterior.forward import GeneralPlan

SHAPE, CLASSES, STEPS, EPS = (1, 28, 28), 10, 40, 0.1


def main(device: str = "cpu") -> None:
    device = torch.device(device)
    for members in (20, 100):
        ens, nets = _ensemble(members, device)
        for points in (1, 100, 1000):
            _show(_predict_rows(ens, nets, points, device))
    ens, nets = _ensemble(100, device)
    x = torch.rand(1, 784, generator=torch.Generator().manual_seed(7)).to(device)
    y = ens.predict(x).label
    times = interleaved(_synced({
        "jostle": lambda: jostle.attack(ens, x, y, eps=EPS, steps=STEPS, record_path=False),
        "loop": lambda: _loop_pgd(nets, x, y),
    }, device), repeats=5, warmup=1)
    ms = {name: median(values) * 1e3 for name, values in times.items()}
    _show([("PGD-40, N=1, S=100: jostle / per-member autograd loop (ms)",
            f"{ms['jostle']:.1f} / {ms['loop']:.1f} = {ms['loop'] / ms['jostle']:.1f}x (target >= 10x)")])
    peak = _peak_extra_mib() if device.type == "cpu" else _device_peak_mib(ens, device)
    _show([("predict S=100, N=10,000: peak extra memory (MiB; target < 2048)", f"{peak:.0f}")])


def _synced(candidates: dict, device: torch.device) -> dict:
    """Each call waits for the device's queued work, so its time is the work's, not the launch's."""
    if device.type != "cuda":
        return candidates
    return {name: (lambda fn=fn: (fn(), torch.cuda.synchronize(device))) for name, fn in candidates.items()}


def _show(rows: list[tuple[str, str]]) -> None:
    """Print as measured (the whole run takes minutes on a loaded machine)."""
    for name, value in rows:
        print(f"{name:<62}  {value}", flush=True)


def _predict_rows(ens, nets, points: int, device: torch.device) -> list[tuple[str, str]]:
    members = len(ens)
    x = torch.rand(points, 784, generator=torch.Generator().manual_seed(points)).to(device)
    candidates = {"jostle": lambda: ens.predict(x), "loop": lambda: _loop_predict(nets, x)}
    if members == 20 and points <= 100:
        candidates["one member per block"] = lambda: _rule(ens, x, 1)
        candidates["vmap"] = lambda: _vmap_predict(ens, x)
    if device.type != "cpu" and points == 1000:  # what an accelerator's rule could change
        roomy = copy.copy(ens)
        roomy.memory_budget = 4 * 2**30
        candidates["channels-first"] = lambda: _channels_first(ens, x)
        candidates["memory budget 4 GiB"] = lambda: roomy.predict(x)
    times = interleaved(_synced(candidates, device), repeats=3 if members * points >= 100_000 else 7, warmup=1)
    ms = {name: median(values) * 1e3 for name, values in times.items()}
    tag = f"predict S={members}, N={points}"
    rows = [(f"{tag}: jostle / loop (ms)", f"{ms['jostle']:.1f} / {ms['loop']:.1f}"
             f" = {ms['loop'] / ms['jostle']:.2f}x (never slower; 1.5x at S=100, N=1000)")]
    rows += [(f"{tag}: strategy '{name}' (ms)", f"{ms[name]:.1f}") for name in ms if name not in ("jostle", "loop")]
    return rows


def _ensemble(members: int, device: torch.device):
    g = torch.Generator().manual_seed(0)
    nets = [jostle.init_parameters(jostle.cnn(SHAPE, CLASSES), g).eval().to(device) for _ in range(members)]
    return jostle.Ensemble.from_modules(nets), nets


def _loop_predict(nets, x):
    with torch.no_grad():
        return torch.stack([torch.softmax(net(x), -1) for net in nets]).mean(0)


def _rule(ens, x, members_per_block):
    kept = forward.GROUPED_MEMBERS, forward.BLOCK_MEMBERS
    forward.GROUPED_MEMBERS = forward.BLOCK_MEMBERS = members_per_block
    try:
        return ens.predict(x)
    finally:
        forward.GROUPED_MEMBERS, forward.BLOCK_MEMBERS = kept


def _channels_first(ens, x):
    kept = forward.CHANNELS_LAST
    forward.CHANNELS_LAST = False
    try:
        return ens.predict(x)
    finally:
        forward.CHANNELS_LAST = kept


def _vmap_predict(ens, x):
    plan = GeneralPlan(ens.template)
    with torch.no_grad():
        return torch.softmax(plan.run(ens.params, x, ens.memory_budget), -1).mean(0)


def _loop_pgd(nets, x, y):
    step = 2.5 * EPS / STEPS
    x_adv = x.clone()
    for _ in range(STEPS):
        leaf = x_adv.detach().requires_grad_(True)
        loss = sum(nn.functional.cross_entropy(net(leaf), y, reduction="sum") for net in nets) / len(nets)
        (grad,) = torch.autograd.grad(loss, leaf)
        x_adv = torch.min(torch.max(leaf.detach() + step * grad.sign(), x - EPS), x + EPS)
    return x_adv


_MEMORY_PROBE = """
import os, torch, jostle
g = torch.Generator().manual_seed(0)
nets = [jostle.init_parameters(jostle.cnn((1, 28, 28), 10), g).eval() for _ in range(100)]
ens = jostle.Ensemble.from_modules(nets)
x = torch.rand(10_000, 784, generator=g)
ens.predict(x[:100])
def status(key):  # kB in /proc/self/status
    return next(int(line.split()[1]) for line in open("/proc/self/status") if line.startswith(key))
# Reset this address space's resident high-water mark (VmHWM) to the resident size now, so
# the peak read after the call is the call's own (Linux proc(5), /proc/pid/clear_refs "5");
# getrusage's ru_maxrss is unfit here: Linux carries it across fork and exec, so a child
# of a large benchmark process reported its parent's peak.
open("/proc/self/clear_refs", "w").write("5")
before = status("VmRSS")
ens.predict(x)
print((status("VmHWM") - before) / 1024)
"""


def _peak_extra_mib() -> float:
    out = subprocess.run([sys.executable, "-c", _MEMORY_PROBE], capture_output=True, text=True, check=True)
    return float(out.stdout.strip().splitlines()[-1])


def _device_peak_mib(ens, device: torch.device) -> float:
    x = torch.rand(10_000, 784, generator=torch.Generator().manual_seed(0)).to(device)
    torch.cuda.synchronize(device)
    before = torch.cuda.memory_allocated(device)
    torch.cuda.reset_peak_memory_stats(device)
    ens.predict(x)
    torch.cuda.synchronize(device)
    return (torch.cuda.max_memory_allocated(device) - before) / 2**20


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--device", default="cpu", help="torch device to measure on (default: cpu)")
    main(parser.parse_args().device)
