"""SG-MCMC: one epoch of SGHMC over 4 chains, vectorised versus one chain after another.

The data are 500 of the 28x28 meter cards (``jostle.datasets.meter_cards``), the network a
784-32-10 tanh MLP, minibatches of 32 (16 steps per epoch). "vectorised" advances the 4
chains together through the ensemble's batched forward pass (what ``fit_sgmcmc`` does);
"per chain" runs the same kernel on each chain alone, one after another. Target: > 1x.
"""
from __future__ import annotations

import dataclasses

import torch
from _timing import interleaved, median

import jostle
from jostle.fitting.hmc.network_density import NetworkPosterior, map_start
from jostle.fitting.sgmcmc.fit import MinibatchDensity
from jostle.fitting.sgmcmc.kernel import sample_sgmcmc

CHAINS = 4
TRAIN = 500
BATCH = 32


def main() -> None:
    data = jostle.datasets.meter_cards(seed=0)
    data = dataclasses.replace(data, x_train=data.x_train[:TRAIN], y_train=data.y_train[:TRAIN])
    posterior = NetworkPosterior(jostle.mlp(784, 10, hidden=(32,)), data, 1.0, torch.device("cpu"))
    initial = map_start(posterior, CHAINS, 0, 1.0, 0)
    steps = -(-TRAIN // BATCH)

    def epoch(start):
        density = MinibatchDensity(posterior, BATCH, seed=1)
        sample_sgmcmc(density, start, cycles=1, steps_per_cycle=steps, draws_per_cycle=1,
                      step_size=0.1 / TRAIN, exploration=0.0, seed=2)

    candidates = {
        "vectorised": lambda: epoch(initial),
        "per chain": lambda: [epoch(initial[c:c + 1]) for c in range(CHAINS)],
    }
    print(f"torch threads: {torch.get_num_threads()}")
    print(f"one SGHMC epoch: {CHAINS} chains, {TRAIN} 28x28 cards, 784-32-10 MLP, batch {BATCH} ({steps} steps)")
    default = torch.get_num_threads()
    for threads in sorted({1, default}):
        torch.set_num_threads(threads)
        try:
            times = interleaved(candidates, repeats=9)
        finally:
            torch.set_num_threads(default)
        fast, slow = median(times["vectorised"]), median(times["per chain"])
        print(f"  threads {threads}: vectorised {fast * 1e3:7.1f} ms, per chain {slow * 1e3:7.1f} ms, "
              f"ratio {slow / fast:4.2f}x")


if __name__ == "__main__":
    main()
