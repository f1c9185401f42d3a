"""A network's log posterior over flat parameter vectors of C chains, and its diagnostics."""
from __future__ import annotations

import copy

import numpy as np
import torch
from torch import Tensor, nn

from jostle.fitting.hmc.diagnostics import ESS_PER_CHAIN, RHAT_LIMIT, chain_diagnostics
from jostle.posterior.architectures import init_parameters
from jostle.posterior.ensemble import DEFAULT_MEMORY_BUDGET
from jostle.posterior.forward import make_plan

# Draws evaluated together when computing function-space quantities after sampling.
_MEMBER_BLOCK = 256
# Test points used for the test-set R-hat (bounds the cost on large test sets).
_DIAGNOSTIC_POINTS = 500
# The test-point R-hat check looks at a high quantile, not the median: a median under the
# limit still lets up to half the points exceed it.
RHAT_QUANTILE = 0.95
RHAT_QUANTILE_KEY = "rhat_q95"
RHAT_QUANTILE_NAME = "95th percentile"


class NetworkPosterior:
    """``log p(theta | data)`` up to a constant for rows of a (C, P) tensor of parameters.

    Log-likelihood: sum over training points of log softmax(logits)[label]. Prior:
    independent N(0, prior_std^2) on every trainable parameter.
    """

    def __init__(self, template: nn.Module, data, prior_std: float, device: torch.device):
        self.template = template.eval()
        self.prior_std = prior_std
        self.device = device
        named = dict(template.named_parameters())
        self.free = [name for name, p in named.items() if p.requires_grad]
        self.fixed = {name: p.detach() for name, p in named.items() if not p.requires_grad}
        self.fixed.update({name: b.detach() for name, b in template.named_buffers()})
        self.shapes = {name: tuple(named[name].shape) for name in self.free}
        self.sizes = [int(np.prod(self.shapes[name])) for name in self.free]
        self.dtype = named[self.free[0]].dtype
        for p in template.parameters():
            p.requires_grad_(False)
        self.x = data.x_train.to(device=device, dtype=self.dtype)
        self.y = data.y_train.to(device)
        self._plan = make_plan(template, self.stacked(torch.zeros(1, self.dimension, dtype=self.dtype, device=device)))

    @property
    def floats_per_pair(self) -> int:
        """Floats one (chain, point) pair holds during a forward pass."""
        return self._plan.floats_per_pair

    @property
    def dimension(self) -> int:
        return sum(self.sizes)

    def stacked(self, flat: Tensor) -> dict[str, Tensor]:
        """View (S, P) flat vectors as the template's parameter dict with a leading S axis."""
        members = flat.shape[0]
        params = {}
        for name, piece in zip(self.free, flat.split(self.sizes, dim=1)):
            params[name] = piece.reshape(members, *self.shapes[name])
        for name, value in self.fixed.items():
            params[name] = value.expand(members, *value.shape)
        return params

    def flatten(self, module: nn.Module) -> Tensor:
        named = dict(module.named_parameters())
        return torch.cat([named[name].detach().reshape(-1) for name in self.free]).to(self.device, self.dtype)

    def logits(self, flat: Tensor, x: Tensor) -> Tensor:
        return self._plan.run(self.stacked(flat), x, DEFAULT_MEMORY_BUDGET)

    def log_likelihood(self, flat: Tensor) -> Tensor:
        log_probs = torch.log_softmax(self.logits(flat, self.x), dim=-1)
        labels = self.y.expand(flat.shape[0], -1).unsqueeze(-1)
        return log_probs.gather(-1, labels).squeeze(-1).sum(-1)

    def log_prior(self, flat: Tensor) -> Tensor:
        return -0.5 * (flat * flat).sum(-1) / self.prior_std ** 2

    def __call__(self, flat: Tensor) -> Tensor:
        return self.log_likelihood(flat) + self.log_prior(flat)


def map_start(posterior: NetworkPosterior, chains: int, steps: int, lr: float, seed: int) -> Tensor:
    """Each chain's own short MAP run, all chains optimised together with Adam.

    Adam's updates are elementwise, so one optimiser over the (C, P) tensor runs C
    independent optimisations.
    """
    generator = torch.Generator().manual_seed(seed)
    starts = []
    for _ in range(chains):
        module = init_parameters(copy.deepcopy(posterior.template).cpu(), generator)
        starts.append(posterior.flatten(module))
    flat = torch.stack(starts).requires_grad_(True)
    optimiser = torch.optim.Adam([flat], lr=lr)
    scale = 1.0 / posterior.x.shape[0]
    with torch.enable_grad():
        for _ in range(steps):
            optimiser.zero_grad(set_to_none=True)
            loss = -(posterior(flat).sum() * scale)
            loss.backward()
            optimiser.step()
    return flat.detach()


def prior_start(posterior: NetworkPosterior, chains: int, seed: int) -> Tensor:
    """Independent draws from the Gaussian prior, one per chain."""
    generator = torch.Generator().manual_seed(seed)
    draws = torch.randn(chains, posterior.dimension, generator=generator, dtype=posterior.dtype)
    return (draws * posterior.prior_std).to(posterior.device)


def function_space_diagnostics(posterior: NetworkPosterior, samples: Tensor, x_test: Tensor) -> dict:
    """R-hat and ESS of the train log-likelihood and of test-set predicted probabilities.

    Returns JSON-ready numbers plus ``problems``: those of :func:`convergence_checks` that
    failed (the test-point R-hat check uses the 95th percentile over points).
    """
    chains, draws, _ = samples.shape
    x_test = x_test[:_DIAGNOSTIC_POINTS].to(device=posterior.device, dtype=posterior.dtype)
    flat = samples.reshape(chains * draws, -1)
    loglik, probs = [], []
    with torch.no_grad():
        for start in range(0, flat.shape[0], _MEMBER_BLOCK):
            block = flat[start:start + _MEMBER_BLOCK]
            loglik.append(posterior.log_likelihood(block).double().cpu())
            p = torch.softmax(posterior.logits(block, x_test), dim=-1)[..., :-1]
            probs.append(p.reshape(block.shape[0], -1).double().cpu())
    loglik = torch.cat(loglik).reshape(chains, draws)
    probs = torch.cat(probs).reshape(chains, draws, -1)
    record = {"train_log_likelihood": {"mean": float(loglik.mean())}, "test_probs": {}}
    problems: list[str] = []
    if draws < 4:
        problems.append(f"only {draws} draws per chain: too few for R-hat and ESS")
        return {**record, "problems": problems}
    ll = chain_diagnostics(loglik.numpy())
    record["train_log_likelihood"].update(rhat=float(ll["rhat"]), ess_bulk=float(ll["ess_bulk"]),
                                          ess_tail=float(ll["ess_tail"]))
    tp = chain_diagnostics(probs.numpy())
    record["test_probs"] = {"points": int(x_test.shape[0]), **point_rhat_summary(tp["rhat"], tp["ess_bulk"])}
    problems += failed_checks(record, chains)
    return {**record, "problems": problems}


def point_rhat_summary(rhat: np.ndarray, ess_bulk: np.ndarray) -> dict:
    """Median, 95th percentile and maximum of the test points' R-hat (finite ones), the share
    above the limit, and the median and minimum bulk ESS: JSON-ready floats (NaN if none)."""
    rhat = np.asarray(rhat, dtype=np.float64)
    ess = np.asarray(ess_bulk, dtype=np.float64)
    rhat, ess = rhat[np.isfinite(rhat)], ess[np.isfinite(ess)]

    def stat(values: np.ndarray, reduce) -> float:
        return float(reduce(values)) if values.size else float("nan")

    return {
        "rhat_median": stat(rhat, np.median),
        RHAT_QUANTILE_KEY: stat(rhat, lambda v: np.quantile(v, RHAT_QUANTILE)),
        "rhat_max": stat(rhat, np.max),
        "share_rhat_over_1.01": stat(rhat, lambda v: (v > RHAT_LIMIT).mean()),
        "ess_bulk_median": stat(ess, np.median),
        "ess_bulk_min": stat(ess, np.min),
    }


def convergence_checks(chains: int) -> list[str]:
    """The checks :func:`failed_checks` applies, in words (recorded as ``diagnostics["checks"]``)."""
    need = ESS_PER_CHAIN * chains
    return [
        f"train log-likelihood R-hat <= {RHAT_LIMIT}",
        f"train log-likelihood bulk ESS >= {need} ({ESS_PER_CHAIN} per chain)",
        f"{RHAT_QUANTILE_NAME} of test-probability R-hat <= {RHAT_LIMIT}",
        f"median test-probability bulk ESS >= {need} ({ESS_PER_CHAIN} per chain)",
    ]


def failed_checks(record: dict, chains: int) -> list[str]:
    """Each of :func:`convergence_checks` that ``record`` fails (NaN fails), in words."""
    ll, tp = record["train_log_likelihood"], record["test_probs"]
    need = ESS_PER_CHAIN * chains
    failed = []
    if not ll["rhat"] <= RHAT_LIMIT:
        failed.append(f"train log-likelihood R-hat {ll['rhat']:.3f} > {RHAT_LIMIT}")
    if not ll["ess_bulk"] >= need:
        failed.append(f"train log-likelihood bulk ESS {ll['ess_bulk']:.0f} < {need} ({ESS_PER_CHAIN} per chain)")
    if not tp[RHAT_QUANTILE_KEY] <= RHAT_LIMIT:
        failed.append(f"{RHAT_QUANTILE_NAME} of test-probability R-hat {tp[RHAT_QUANTILE_KEY]:.3f} > {RHAT_LIMIT} "
                      f"({tp['share_rhat_over_1.01']:.0%} of test points above)")
    if not tp["ess_bulk_median"] >= need:
        failed.append(f"median test-probability bulk ESS {tp['ess_bulk_median']:.0f} < {need} "
                      f"({ESS_PER_CHAIN} per chain)")
    return failed
