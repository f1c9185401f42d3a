"""Stochastic-gradient MCMC for a classifier network: minibatch posterior draws as an :class:`Ensemble`.

For data too large for full-batch HMC: each step sees one minibatch (drawn without
replacement within an epoch, the same batch for every chain), its log-likelihood scaled
by N / batch plus the Gaussian log prior. The chains' flat parameter vectors, a (C, P)
tensor, go through the ensemble's batched forward pass together, as in ``fit_hmc``, and
convergence is judged by the same function-space diagnostics.
"""
from __future__ import annotations

import copy
import math
import time
import warnings
from typing import Any

import torch
from torch import Tensor, nn

from jostle.common.checks import check_float, check_int
from jostle.common.threads import threads_for, torch_threads
from jostle.fitting.hmc.diagnostics import ConvergenceWarning
from jostle.fitting.hmc.network_density import (
    NetworkPosterior,
    convergence_checks,
    function_space_diagnostics,
    map_start,
)
from jostle.fitting.sgmcmc.kernel import SGMCMCDraws, check_settings, sample_sgmcmc
from jostle.fitting.training_loop import stream_seed
from jostle.fitting.training_options import check_device, check_module_and_data, training_fit
from jostle.posterior.architectures import architecture_of
from jostle.posterior.ensemble import Ensemble

__all__ = ["fit_sgmcmc", "MinibatchDensity"]

# As in fit_hmc: below this many floats per evaluation one intra-op thread is faster on a shared CPU.
_SMALL_WORK = 2**23


class MinibatchDensity:
    """``N / B * sum_batch log p(y | x, theta) + log p(theta)`` for rows of a (C, P) tensor.

    Each call takes the next minibatch of a fresh seeded permutation per epoch (without
    replacement within an epoch; a short last batch is scaled by N over its own size).
    """

    def __init__(self, posterior: NetworkPosterior, batch_size: int, seed: int):
        self.posterior = posterior
        self.batch_size = min(batch_size, posterior.x.shape[0])
        self.generator = torch.Generator().manual_seed(seed)
        self.order = torch.zeros(0, dtype=torch.long)

    def next_batch(self) -> Tensor:
        if self.order.numel() == 0:
            self.order = torch.randperm(self.posterior.x.shape[0], generator=self.generator)
        batch, self.order = self.order[:self.batch_size], self.order[self.batch_size:]
        return batch.to(self.posterior.device)

    def __call__(self, flat: Tensor) -> Tensor:
        batch = self.next_batch()
        x, y = self.posterior.x[batch], self.posterior.y[batch]
        log_probs = torch.log_softmax(self.posterior.logits(flat, x), dim=-1)
        labels = y.expand(flat.shape[0], -1).unsqueeze(-1)
        loglik = log_probs.gather(-1, labels).squeeze(-1).sum(-1)
        return loglik * (self.posterior.x.shape[0] / batch.numel()) + self.posterior.log_prior(flat)


@training_fit(("batch_size", "seed", "device", "progress"))
def fit_sgmcmc(
    module: nn.Module,
    data,
    samples: int = 100,
    chains: int = 4,
    method: str = "sghmc",
    cycles: int = 4,
    epochs_per_cycle: int = 50,
    batch_size: int = 32,
    step_size: float = 0.1,
    friction: float = 0.1,
    exploration: float = 0.5,
    prior_std: float = 1.0,
    temperature: float = 1.0,
    draws_per_cycle: int | None = None,
    seed: int = 0,
    device: torch.device | str | None = None,
    progress: bool = True,
    threads: Any = "auto",
) -> Ensemble:
    """Sample a network's posterior with cyclical SGHMC or SGLD and keep ``samples`` draws.

    The target is the posterior of ``fit_hmc`` (softmax likelihood of the training set,
    isotropic Gaussian prior), reached through minibatch gradients scaled by N / batch
    (Welling & Teh 2011; Chen, Fox & Guestrin 2014) under the cyclical cosine step size of
    Zhang et al. (2020): each cycle explores without noise for its first ``exploration``
    share, then samples. See :func:`jostle.fitting.sgmcmc.kernel.sample_sgmcmc`.

    Parameters
    ----------
    module : nn.Module
        The network; each chain starts from its own seeded default initialisation.
    data : jostle.Dataset
    samples : int
        Draws kept in the ensemble, thinned evenly from all draws and interleaved in member
        order (member j comes from chain j mod C).
    chains : int
        Chains, advanced together in one batched forward / backward pass.
    method : {"sghmc", "sgld"}
    cycles : int
        Cycles of the step-size schedule (each can visit a new mode).
    epochs_per_cycle : int
        Passes over the training set per cycle.
    batch_size : int
        Training points per step (at most N_train).
    step_size : float
        Peak learning rate on the mean per-point loss: the update's ``eta_0`` is
        ``step_size / N_train``.
    friction : float in (0, 1]
        SGHMC's momentum decay per step (0.1 is momentum 0.9); unused by SGLD.
    exploration : float in [0, 1)
        Share of each cycle without noise.
    prior_std : float
        Standard deviation of the Gaussian prior on each weight and bias.
    temperature : float
        1 samples the posterior; below 1 a sharpened ("cold") posterior.
    draws_per_cycle : int, optional
        Draws per chain per cycle, spread over the sampling stage; the diagnostics use them
        all. Default ``max(10, ceil(samples / (chains * cycles)))``.
    seed : int
        Seeds the initialisation; minibatches and noise come from streams derived from it.
    device : torch device, optional
        Where to compute (default: the CPU).
    progress : bool
        Show a progress bar.
    threads : "auto", int or None
        Torch intra-op threads while fitting, as in ``fit_hmc``.

    Returns
    -------
    Ensemble
        ``meta["method"] == "sgmcmc (sghmc, cyclical)"`` (or ``sgld``) with ``hyperparameters``,
        ``seed``, ``seconds``, ``classes``, ``bounds``, ``data``, ``architecture`` and
        ``diagnostics``: R-hat and ESS of the function-space quantities as in ``fit_hmc``,
        the steps undone for a non-finite density (``rejected_steps``), ``checks`` and
        ``problems``.

    Raises
    ------
    ValueError
        On a malformed argument.

    Warns
    -----
    ConvergenceWarning
        When a function-space check of ``fit_hmc`` fails or a step was undone.
    """
    started = time.perf_counter()
    settings = _check_arguments(module, data, samples, chains, method, cycles, epochs_per_cycle, batch_size,
                                step_size, friction, exploration, prior_std, temperature, draws_per_cycle, seed)
    device = check_device(device)
    template = copy.deepcopy(module).to(device)
    posterior = NetworkPosterior(template, data, settings["prior_std"], device)
    work = chains * min(batch_size, posterior.x.shape[0]) * posterior.floats_per_pair
    with torch_threads(threads_for(threads, work, device, small=_SMALL_WORK)):
        ens = _fit(posterior, data, settings, started, bool(progress))
    problems = ens.meta["diagnostics"]["problems"]
    if problems:
        warnings.warn("SG-MCMC convergence checks failed: " + "; ".join(problems) + " (see ens.info())",
                      ConvergenceWarning, stacklevel=2)
    return ens


def _fit(posterior: NetworkPosterior, data, settings: dict, started: float, progress: bool) -> Ensemble:
    initial = map_start(posterior, settings["chains"], 0, 1.0, settings["seed"])
    density = MinibatchDensity(posterior, settings["batch_size"], stream_seed(settings["seed"], 2))
    n_train = posterior.x.shape[0]
    draws = sample_sgmcmc(
        density, initial, cycles=settings["cycles"],
        steps_per_cycle=settings["epochs_per_cycle"] * math.ceil(n_train / density.batch_size),
        draws_per_cycle=settings["draws_per_cycle"], method=settings["method"],
        step_size=settings["step_size"] / n_train, friction=settings["friction"],
        exploration=settings["exploration"], temperature=settings["temperature"],
        seed=stream_seed(settings["seed"], 1), progress=progress,
    )
    if draws.num_draws == 0:
        raise KeyboardInterrupt("sampling was interrupted before the first draw")
    diagnostics = _diagnostics(posterior, draws, data, settings)
    keep = min(settings["samples"], draws.num_chains * draws.num_draws)
    kept = posterior.stacked(thin_interleaved(draws.samples, keep))
    meta = {
        "method": f"sgmcmc ({settings['method']}, cyclical)",
        "classes": list(data.classes),
        "bounds": [data.bounds[0].tolist(), data.bounds[1].tolist()],
        "data": data.describe(),
        "architecture": architecture_of(posterior.template),
        "seed": settings["seed"],
        "hyperparameters": settings,
        "diagnostics": diagnostics,
        "seconds": time.perf_counter() - started,
    }
    return Ensemble(posterior.template, {k: v.contiguous() for k, v in kept.items()}, meta=meta)


def _diagnostics(posterior: NetworkPosterior, draws: SGMCMCDraws, data, settings: dict) -> dict:
    found = function_space_diagnostics(posterior, draws.samples, data.x_test)
    problems = list(found.pop("problems"))
    rejected = int(draws.rejected.sum())
    total = draws.steps * draws.num_chains
    if rejected:
        problems.append(f"{rejected} of {total} steps had a non-finite log density or gradient and were undone")
    if draws.interrupted:
        wanted = settings["cycles"] * settings["draws_per_cycle"]
        problems.append(f"sampling was interrupted after {draws.num_draws} of {wanted} draws per chain")
    return {
        "rejected_steps": rejected,
        "steps": total,
        "draws_per_chain": draws.num_draws,
        "sampling_seconds": draws.seconds,
        **found,
        "checks": convergence_checks(draws.num_chains) + ["no step with a non-finite log density or gradient"],
        "problems": problems,
    }


def thin_interleaved(samples: Tensor, keep: int) -> Tensor:
    """``keep`` draws spread evenly over each chain's run, ordered chain 0, 1, ..., C-1, 0, ..."""
    chains, draws, _ = samples.shape
    counts = [keep // chains + (1 if c < keep % chains else 0) for c in range(chains)]
    index = [torch.linspace(0, draws - 1, n).round().long().to(samples.device) for n in counts]
    picked = [samples[c, index[c]] for c in range(chains)]
    order = sorted((j, c) for c, n in enumerate(counts) for j in range(n))
    return torch.stack([picked[c][j] for j, c in order])


def _check_arguments(module, data, samples, chains, method, cycles, epochs_per_cycle, batch_size, step_size,
                     friction, exploration, prior_std, temperature, draws_per_cycle, seed) -> dict:
    check_module_and_data(module, data)
    samples = check_int("samples", samples, low=1)
    chains = check_int("chains", chains, low=1)
    cycles = check_int("cycles", cycles, low=1)
    if draws_per_cycle is None:
        draws_per_cycle = max(10, -(-samples // (chains * cycles)))
    batch_size = check_int("batch_size", batch_size, low=1)
    epochs_per_cycle = check_int("epochs_per_cycle", epochs_per_cycle, low=1)
    steps = epochs_per_cycle * math.ceil(len(data.y_train) / min(batch_size, len(data.y_train)))
    kernel = check_settings(torch.zeros(1, 1), cycles, max(steps, 2), draws_per_cycle, method, step_size, friction,
                            exploration, temperature, seed)
    kernel.pop("initial")
    kernel.pop("steps_per_cycle")
    if samples > chains * cycles * kernel["draws_per_cycle"]:
        raise ValueError(f"samples must be <= chains * cycles * draws_per_cycle = "
                         f"{chains * cycles * kernel['draws_per_cycle']}; got {samples}")
    return {"samples": samples, "chains": chains, "epochs_per_cycle": epochs_per_cycle, "batch_size": batch_size,
            "prior_std": check_float("prior_std", prior_std, low=0.0, low_open=True), **kernel}
