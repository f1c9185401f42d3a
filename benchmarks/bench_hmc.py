"""HMC: vectorised chains, sampling efficiency against random-walk Metropolis, a BNN fit.

1. Chain-gradient evaluations per second for 8 chains of a 2-32-32-2 tanh BNN on 500
   moons points: one batched call for all chains versus the chains one after another.
   Target >= 3x.
2. Bulk ESS per second (worst coordinate) on a 100-d Gaussian with standard deviations
   0.01, 0.02, ..., 1.00 (Neal 2011, sec. 5.3.3.4): jostle.sample_hmc versus random-walk
   Metropolis written here, with an isotropic proposal (Neal's comparison) and with one
   scaled by the true standard deviations (an oracle preconditioner, the stricter
   baseline since HMC adapts a diagonal metric). Target >= 10x against the former.
3. Wall time of fit_hmc on moons with 4 chains and 100 kept draws.
"""
from __future__ import annotations

import statistics
import time
import warnings

import torch

import jostle
from jostle.fitting.hmc.diagnostics import ConvergenceWarning, chain_diagnostics
from jostle.fitting.hmc.network_density import NetworkPosterior
from jostle.fitting.hmc.sampler import evaluate

CHAINS = 8
REPEATS = 5


def main() -> None:
    print(f"torch threads: {torch.get_num_threads()}")
    vectorised_gradients()
    gaussian_efficiency()
    bnn_fit()


def vectorised_gradients() -> None:
    data = jostle.datasets.moons(n_train=500, n_test=10, noise=0.2, seed=0)
    posterior = NetworkPosterior(jostle.mlp(2, 2, hidden=(32, 32)), data, 1.0, torch.device("cpu"))
    flat = torch.randn(CHAINS, posterior.dimension, generator=torch.Generator().manual_seed(0)) * 0.3
    rounds = 30

    def together():
        for _ in range(rounds):
            evaluate(posterior, flat)

    def one_by_one():
        for _ in range(rounds):
            for c in range(CHAINS):
                evaluate(posterior, flat[c:c + 1])

    evaluations = rounds * CHAINS
    default = torch.get_num_threads()
    print("\nchain-gradient evaluations per second, 2-32-32-2 BNN, 500 points, 8 chains")
    print(f"  {'threads':>7s} {'vectorised /s':>14s} {'one at a time /s':>17s} {'ratio':>7s}")
    # fit_hmc runs this size on one thread (threads="auto"); torch's default is shown too.
    for threads in sorted({1, default}):
        torch.set_num_threads(threads)
        try:
            fast, slow = _side_by_side(together, one_by_one)
        finally:
            torch.set_num_threads(default)
        print(f"  {threads:7d} {evaluations / fast:14.0f} {evaluations / slow:17.0f} {slow / fast:6.1f}x")
    print("  (target >= 3x)")


def gaussian_efficiency() -> None:
    sd = torch.linspace(0.01, 1.0, 100, dtype=torch.float64)

    def log_density(q):
        return -0.5 * ((q / sd) ** 2).sum(-1)

    start = torch.zeros(4, 100, dtype=torch.float64)
    began = time.perf_counter()
    draws = jostle.sample_hmc(log_density, start, num_samples=1000, warmup=1000, seed=0, diagnostics=False)
    hmc_seconds = time.perf_counter() - began
    hmc_ess = float(chain_diagnostics(draws.samples.numpy())["ess_bulk"].min())
    print("\nworst-coordinate bulk ESS per second, 100-d Gaussian, sd 0.01..1.00, 4 chains")
    print(f"  {'sampler':34s} {'seconds':>8s} {'min ESS':>9s} {'ESS/s':>9s}")
    print(f"  {'HMC (adapted diagonal metric)':34s} {hmc_seconds:8.1f} {hmc_ess:9.0f} {hmc_ess / hmc_seconds:9.1f}")
    for label, scales in (("RWM, isotropic proposal", torch.ones_like(sd)), ("RWM, proposal scaled by true sd", sd)):
        seconds, ess = _random_walk(log_density, start, scales)
        print(f"  {label:34s} {seconds:8.1f} {ess:9.1f} {ess / seconds:9.1f}"
              f"   HMC is {hmc_ess / hmc_seconds / (ess / seconds):6.0f}x")
    print("  (target >= 10x against the isotropic random walk)")


def bnn_fit() -> None:
    data = jostle.datasets.moons(noise=0.2, seed=0)
    net = jostle.mlp(2, 2, hidden=(32, 32))
    began, cpu = time.perf_counter(), time.process_time()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", ConvergenceWarning)
        ens = jostle.fit_hmc(net, data, samples=100, chains=4, seed=0, progress=False)
    wall, cpu = time.perf_counter() - began, time.process_time() - cpu
    d = ens.meta["diagnostics"]
    accuracy = float((ens.predict(data.x_test).label == data.y_test).double().mean())
    print("\nfit_hmc on moons (300 points), 2-32-32-2, 4 chains, 100 kept draws, defaults")
    print(f"  wall time {wall:.1f} s, CPU time {cpu:.1f} s, sampling {d['sampling_seconds']:.1f} s, "
          f"{d['gradient_evaluations']} chain-gradient evaluations")
    print(f"  test accuracy {accuracy:.3f}, acceptance {statistics.mean(d['accept_rate']):.2f}, "
          f"divergences {d['divergences']}, median test-probability R-hat {d['test_probs']['rhat_median']:.3f}, "
          f"train log-lik R-hat {d['train_log_likelihood']['rhat']:.3f}, "
          f"bulk ESS {d['train_log_likelihood']['ess_bulk']:.0f}")
    print(f"  convergence warnings: {len(caught)}")


def _side_by_side(first, second) -> tuple[float, float]:
    """Median seconds of each, run alternately so both see the same machine load."""
    first(), second()
    times = ([], [])
    for _ in range(REPEATS):
        for slot, fn in enumerate((first, second)):
            began = time.perf_counter()
            fn()
            times[slot].append(time.perf_counter() - began)
    return statistics.median(times[0]), statistics.median(times[1])


def _random_walk(log_density, start: torch.Tensor, scales: torch.Tensor,
                 iterations: int = 200_000, keep_every: int = 10) -> tuple[float, float]:
    """Vectorised random-walk Metropolis; the step is tuned in a warm-up towards the
    0.234 acceptance rate that is optimal for high-dimensional targets (Roberts, Gelman &
    Gilks 1997)."""
    generator = torch.Generator().manual_seed(1)
    chains, dims = start.shape
    began = time.perf_counter()
    scale = 2.38 / dims ** 0.5 * scales
    q, value = start.clone(), log_density(start)
    for i in range(20_000):
        q, value, accepted = _metropolis(log_density, q, value, scale, generator)
        scale = scale * torch.exp(torch.tensor((float(accepted.double().mean()) - 0.234) / (1 + i) ** 0.6))
    kept = torch.empty(chains, iterations // keep_every, dims, dtype=start.dtype)
    for i in range(iterations):
        q, value, _ = _metropolis(log_density, q, value, scale, generator)
        if i % keep_every == 0:
            kept[:, i // keep_every] = q
    seconds = time.perf_counter() - began
    return seconds, float(chain_diagnostics(kept.numpy())["ess_bulk"].min())


def _metropolis(log_density, q, value, scale, generator):
    proposal = q + scale * torch.randn(q.shape, generator=generator, dtype=q.dtype)
    proposed = log_density(proposal)
    accepted = torch.rand(q.shape[0], generator=generator, dtype=q.dtype).log() < proposed - value
    q = torch.where(accepted[:, None], proposal, q)
    return q, torch.where(accepted, proposed, value), accepted


if __name__ == "__main__":
    main()
