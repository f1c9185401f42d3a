"""PGD on the posterior predictive: jostle's batched attack against a per-member loop.

Case: 40 steps of L-inf PGD, 100 points of a 2-D input, S = 100 members of a 2-64-64-2
tanh MLP. The baseline evaluates each member as its own nn.Module and takes the gradient
with plain autograd. FLOP rate: forward FLOPs = 2 * S * N * sum(in * out) per step,
forward + backward counted as 3x forward, set against the same run's 1024 x 1024 fp32
matmul rate. jostle runs twice: with its gradient engine's planned hand-written passes (the default
for Linear + tanh/ReLU/sigmoid stacks) and with autograd through the batched forward (the
baseline, ``backward="autograd"``). Also the single-point latency that bounds a live
widget update, and every member's own input gradient (what the fading-gradient read-outs
start from) by the planned backward and by ``vmap(grad)``.
"""
from __future__ import annotations

import torch
from _timing import interleaved, matmul_gflops, median
from torch import nn

import jostle
from jostle.attacks.readouts import member_gradients

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
    # against the loop and the matmul rate measured at the same thread count. The
    # candidates run interleaved, round after round, so load swings hit all alike.
    for threads in (1, default_threads):
        times = _with_threads(threads, lambda: interleaved({
            "hand": lambda: jostle.attack(ens, x, y, eps=EPS, steps=STEPS, record_path=True,
                                          threads=None, backward="auto"),
            "autograd": lambda: jostle.attack(ens, x, y, eps=EPS, steps=STEPS, record_path=True,
                                              threads=None, backward="autograd"),
            "loop": lambda: _loop_pgd(nets, x, y, EPS, STEPS),
        }, repeats=5, warmup=1))
        ms = {name: median(values) * 1e3 for name, values in times.items()}
        matmul = _with_threads(threads, matmul_gflops)
        tag = f"[{threads} thread(s)]"
        rows += [
            (f"{tag} PGD 40 steps, N=100, S=100: jostle, hand backward (ms)", f"{ms['hand']:.1f}"),
            (f"{tag} same, autograd backward (baseline) (ms)", f"{ms['autograd']:.1f}"),
            (f"{tag} same with a per-member loop (ms)", f"{ms['loop']:.1f}"),
            (f"{tag} hand backward over autograd backward", f"{ms['autograd'] / ms['hand']:.2f}x"),
        ]
        for name in ("hand", "autograd"):
            rate = flops / (ms[name] / 1e3) / 1e9
            rows += [
                (f"{tag} {name}: speed-up over the loop (target >= 3x)", f"{ms['loop'] / ms[name]:.1f}x"),
                (f"{tag} {name}: FLOP rate / matmul rate (GFLOP/s; target >= 30%)",
                 f"{rate:.1f} / {matmul:.1f} = {rate / matmul:.0%}"),
            ]
        if threads == default_threads:
            break
    one = x[:1]
    times = interleaved({
        "hand": lambda: jostle.attack(ens, one, eps=EPS, steps=STEPS, backward="auto"),
        "autograd": lambda: jostle.attack(ens, one, eps=EPS, steps=STEPS, backward="autograd"),
        "default": lambda: jostle.attack(ens, one, eps=EPS, steps=STEPS, threads=None, backward="auto"),
        "fgsm": lambda: jostle.attack(ens, one, eps=EPS, method="fgsm", backward="auto"),
    }, repeats=21)
    ms = {name: median(values) * 1e3 for name, values in times.items()}
    rows += [
        ("PGD 40 steps, N=1, S=100: median, threads='auto', hand backward (ms)", f"{ms['hand']:.1f}"),
        ("PGD 40 steps, N=1, S=100: median, threads='auto', autograd backward (ms)", f"{ms['autograd']:.1f}"),
        (f"PGD 40 steps, N=1, S=100: median, {default_threads} threads, hand backward (ms)", f"{ms['default']:.1f}"),
        ("FGSM, N=1, S=100: median, hand backward (ms)", f"{ms['fgsm']:.1f}"),
    ]
    # Objectives that are not a mean of member terms: planned passes, autograd on the logits.
    times = interleaved({
        name: lambda backward=backward: jostle.attack(ens, x, y, eps=EPS, steps=STEPS, objective="predictive",
                                                      backward=backward)
        for name, backward in (("hand", "auto"), ("autograd", "autograd"))
    }, repeats=5, warmup=1)
    ms = {name: median(values) * 1e3 for name, values in times.items()}
    rows += [
        ("PGD 40 steps, N=100, S=100, objective 'predictive', threads='auto': hand backward (ms)",
         f"{ms['hand']:.1f}"),
        ("same, autograd backward (ms)", f"{ms['autograd']:.1f}"),
    ]
    # The fading-gradient read-outs start from every member's own input gradient.
    times = interleaved({
        "hand": lambda: member_gradients(ens, x, y, backward="auto"),
        "vmap": lambda: member_gradients(ens, x, y, backward="autograd"),
    }, repeats=9)
    ms = {name: median(values) * 1e3 for name, values in times.items()}
    rows += [
        ("member gradients, N=100, S=100: planned hand backward (ms)", f"{ms['hand']:.1f}"),
        ("member gradients, N=100, S=100: vmap(grad) (ms)", f"{ms['vmap']:.1f}"),
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


if __name__ == "__main__":
    main()
