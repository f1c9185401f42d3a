"""PGD on the posterior predictive: jostle's batched attack against a per-member loop.

Case: 40 steps of L-inf PGD, 100 points of a 2-D input, S = 100 members of a 2-64-64-2
tanh MLP. The baseline evaluates each member as its own nn.Module and takes the gradient
with plain autograd. FLOP rate: forward FLOPs = 2 * S * N * sum(in * out) per step,
forward + backward counted as 3x forward, set against the same run's 1024 x 1024 fp32
matmul rate. Also the single-point latency that bounds a live widget update.
"""
from __future__ import annotations

import statistics
import time

import torch
from torch import nn

import jostle

MEMBERS, POINTS, STEPS, EPS = 100, 100, 40, 0.1
WIDTHS = [(2, 64), (64, 64), (64, 2)]


def main() -> None:
    ens, nets = _ensemble()
    g = torch.Generator().manual_seed(1)
    x = torch.rand(POINTS, 2, generator=g) * 4 - 2
    y = ens.predict(x).label

    default_threads = torch.get_num_threads()
    flops = (3 * STEPS + 1) * 2 * MEMBERS * POINTS * sum(i * o for i, o in WIDTHS)
    rows = []
    # "auto" picks one thread for this size; the torch default is shown beside it, each
    # against the loop and the matmul rate measured at the same thread count.
    for threads in (1, default_threads):
        jostle_ms = _with_threads(threads, lambda: _median_ms(
            lambda: jostle.attack(ens, x, y, eps=EPS, steps=STEPS, record_path=True, threads=None), repeats=5))
        loop_ms = _with_threads(threads, lambda: _median_ms(lambda: _loop_pgd(nets, x, y, EPS, STEPS), repeats=3))
        matmul = _with_threads(threads, _matmul_gflops)
        rate = flops / (jostle_ms / 1e3) / 1e9
        rows += [
            (f"[{threads} thread(s)] PGD 40 steps, N=100, S=100: jostle (ms)", f"{jostle_ms:.1f}"),
            (f"[{threads} thread(s)] same with a per-member loop (ms)", f"{loop_ms:.1f}"),
            (f"[{threads} thread(s)] speed-up over the loop (target >= 3x)", f"{loop_ms / jostle_ms:.1f}x"),
            (f"[{threads} thread(s)] attack FLOP rate / matmul rate (GFLOP/s)", f"{rate:.1f} / {matmul:.1f}"),
            (f"[{threads} thread(s)] share of matmul rate (target >= 30%)", f"{rate / matmul:.0%}"),
        ]
        if threads == default_threads:
            break
    one = x[:1]
    single_ms = _median_ms(lambda: jostle.attack(ens, one, eps=EPS, steps=STEPS), repeats=21)
    single_default_ms = _median_ms(lambda: jostle.attack(ens, one, eps=EPS, steps=STEPS, threads=None), repeats=21)
    fgsm_ms = _median_ms(lambda: jostle.attack(ens, one, eps=EPS, method="fgsm"), repeats=21)
    rows += [
        ("PGD 40 steps, N=1, S=100: median, threads='auto' (ms)", f"{single_ms:.1f}"),
        (f"PGD 40 steps, N=1, S=100: median, {default_threads} threads (ms)", f"{single_default_ms:.1f}"),
        ("FGSM, N=1, S=100: median (ms)", f"{fgsm_ms:.1f}"),
    ]
    width = max(len(name) for name, _ in rows)
    for name, value in rows:
        print(f"{name:<{width}}  {value}")


def _ensemble():
    g = torch.Generator().manual_seed(0)
    nets = [jostle.init_parameters(jostle.mlp(2, 2, hidden=(64, 64), activation="tanh"), g) for _ in range(MEMBERS)]
    return jostle.Ensemble.from_modules(nets), [net.eval() for net in nets]


def _loop_pgd(nets, x, y, eps, steps):
    """The plain reference: random start, then signed steps, every member on its own."""
    g = torch.Generator().manual_seed(0)
    step = 2.5 * eps / steps
    x_adv = x + (torch.rand(x.shape, generator=g) * 2 - 1) * eps
    for _ in range(steps):
        leaf = x_adv.detach().requires_grad_(True)
        loss = sum(nn.functional.cross_entropy(net(leaf), y, reduction="sum") for net in nets) / len(nets)
        (grad,) = torch.autograd.grad(loss, leaf)
        x_adv = torch.min(torch.max(leaf.detach() + step * grad.sign(), x - eps), x + eps)
    with torch.no_grad():
        sum(nn.functional.cross_entropy(net(x_adv), y, reduction="none") for net in nets)
    return x_adv


def _with_threads(threads: int, fn):
    before = torch.get_num_threads()
    torch.set_num_threads(threads)
    try:
        return fn()
    finally:
        torch.set_num_threads(before)


def _median_ms(fn, repeats: int) -> float:
    fn()
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        times.append((time.perf_counter() - start) * 1e3)
    return statistics.median(times)


def _matmul_gflops() -> float:
    g = torch.Generator().manual_seed(2)
    a, b = torch.randn(1024, 1024, generator=g), torch.randn(1024, 1024, generator=g)
    ms = _median_ms(lambda: a @ b, repeats=11)
    return 2 * 1024 ** 3 / (ms / 1e3) / 1e9


if __name__ == "__main__":
    main()
