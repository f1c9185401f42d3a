"""Last-layer Laplace for networks, with its evidence and prior-precision search.

Around a mode theta* the posterior is approximated by N(theta*, (-grad^2 log p)^-1)
(MacKay 1992; Bishop 2006, sec. 4.4). For a network, only the last Linear layer is
treated this way: with features phi_n of the layer below, logits are linear in the
last layer's parameters, so the cross-entropy Hessian is exactly the generalised
Gauss-Newton matrix sum_n (diag(p_n) - p_n p_n') kron phi_n phi_n'. The prior precision
is chosen by maximising the Laplace approximation to the marginal likelihood.
"""
from __future__ import annotations

import copy
import math
from typing import Any

import torch
from torch import Tensor, nn

from jostle.common.checks import check_float, check_int
from jostle.datasets import Dataset
from jostle.fitting.point_estimates import fit_map
from jostle.fitting.training_loop import stream_seed
from jostle.fitting.training_options import TrainingOptions, training_fit
from jostle.posterior.ensemble import Ensemble

__all__ = [
    "fit_laplace", "LastLayerLaplace", "softmax_hessian", "log_marginal_likelihood", "optimise_prior_precision",
    "last_layer_features",
]


@training_fit()
def fit_laplace(
    module: nn.Module,
    data: Dataset,
    samples: int = 100,
    *,
    prior_precision: float | None = None,
    epochs: int = 100,
    batch_size: int = 32,
    lr: float = 1e-2,
    weight_decay: float = 1e-4,
    optimizer: str = "adam",
    momentum: float = 0.9,
    validation: float = 0.0,
    patience: int = 10,
    seed: int = 0,
    progress: bool = True,
    device: Any = None,
) -> Ensemble:
    """Last-layer Laplace around the MAP network, ``samples`` draws folded into an ensemble.

    The training options are those of the MAP fit (:func:`jostle.fit_map`); ``seed``
    seeds it and the draws.

    Parameters
    ----------
    module : nn.Module
        Any network whose output is its last ``nn.Linear`` layer's output (``jostle.mlp``,
        ``jostle.cnn``, a Sequential ending in Linear); only that layer varies. Its input
        (the penultimate features) is read with a forward hook. Every member carries its
        own copy of the shared body (S x the network's parameters).
    data : jostle.Dataset
    samples : int
        Draws of the last layer; every member shares the MAP body.
    prior_precision : float, optional
        Precision of the N(0, 1/prior_precision I) prior on the last layer. None picks
        the value maximising the Laplace marginal likelihood (a log grid, then Brent).
    {training_options}

    Returns
    -------
    Ensemble
        ``meta["method"] == "laplace"``; its ``posterior`` attribute is the
        :class:`LastLayerLaplace` (mean, precision; ``.draw(samples, seed)``).
    """
    options = TrainingOptions(
        epochs=epochs, batch_size=batch_size, lr=lr, weight_decay=weight_decay, optimizer=optimizer,
        momentum=momentum, validation=validation, patience=patience, seed=seed, progress=progress, device=device,
    ).checked()
    samples = check_int("samples", samples, low=1)
    if prior_precision is not None:
        prior_precision = check_float("prior_precision", prior_precision, low=0.0, low_open=True)
    _last_linear(module)
    point = fit_map(module, data, **options.keywords())
    seed = options.seed
    posterior = LastLayerLaplace.around(point, data.x_train.to(point.device), data.y_train.to(point.device),
                                        prior_precision)
    ensemble = posterior.draw(samples, seed=stream_seed(seed, 3) % 2**31)
    ensemble.meta.update(
        method="laplace", map_seconds=point.meta["seconds"], samples=samples,
        prior_precision=posterior.prior_precision, prior_precision_chosen=prior_precision is None,
        log_marginal_likelihood=posterior.log_marginal_likelihood, hessian="exact last-layer (GGN)",
        seconds=round(point.meta["seconds"] + posterior.seconds, 4),
    )
    posterior.meta = dict(ensemble.meta)
    return ensemble


class LastLayerLaplace:
    """N(mean, precision^-1) over the last Linear layer's flattened [weight | bias] rows.

    Attributes
    ----------
    point : Ensemble
        The MAP network (S = 1).
    mean : Tensor of shape (P,)
    precision : Tensor of shape (P, P)
        Hessian of the negative log-likelihood plus ``prior_precision`` * I (float64).
    prior_precision, log_marginal_likelihood, seconds : float
    """

    def __init__(self, point: Ensemble, mean: Tensor, hessian: Tensor, prior_precision: float,
                 log_marginal_likelihood: float, seconds: float = 0.0):
        self.point = point
        self.mean = mean
        self.hessian = hessian
        self.prior_precision = float(prior_precision)
        self.precision = hessian + self.prior_precision * torch.eye(len(mean), dtype=hessian.dtype)
        self.log_marginal_likelihood = float(log_marginal_likelihood)
        self.seconds = seconds
        self.meta = dict(point.meta)

    @classmethod
    def around(cls, point: Ensemble, x: Tensor, y: Tensor, prior_precision: float | None) -> LastLayerLaplace:
        """Build the approximation at the MAP ensemble ``point`` from training data."""
        import time

        started = time.perf_counter()
        _, weight_name, bias_name = _split(point)
        # The curvature algebra is small and runs in float64 on the CPU whatever the device.
        with torch.no_grad():
            features = last_layer_features(point, x).double().cpu()
            mean = _flat_last_layer(point, weight_name, bias_name).cpu()
            logits = point.logits(x)[0].double().cpu()
        y = y.cpu()
        probs = torch.softmax(logits, -1)
        hessian = softmax_hessian(features, probs, bias=bias_name is not None)
        log_lik = float(torch.log_softmax(logits, -1).gather(1, y.view(-1, 1)).sum())
        eigenvalues = torch.linalg.eigvalsh(hessian).clamp_min(0.0)
        if prior_precision is None:
            prior_precision = optimise_prior_precision(log_lik, mean, eigenvalues)
        evidence = log_marginal_likelihood(log_lik, mean, eigenvalues, prior_precision)
        return cls(point, mean, hessian, prior_precision, evidence, time.perf_counter() - started)

    @property
    def covariance(self) -> Tensor:
        return torch.cholesky_inverse(torch.linalg.cholesky(self.precision))

    def draw(self, samples: int = 100, seed: int = 0) -> Ensemble:
        """``samples`` draws of the last layer, the rest fixed at the MAP (seeded)."""
        samples = check_int("samples", samples, low=1)
        generator = torch.Generator().manual_seed(check_int("seed", seed, low=0))
        noise = torch.randn(len(self.mean), samples, generator=generator, dtype=torch.float64)
        upper = torch.linalg.cholesky(self.precision).T
        draws = (self.mean.unsqueeze(1) + torch.linalg.solve_triangular(upper, noise, upper=True)).T
        _, weight_name, bias_name = _split(self.point)
        params = {k: v.expand(samples, *v.shape[1:]).clone() for k, v in self.point.params.items()}
        weight = params[weight_name]
        classes, width = weight.shape[1], weight.shape[2]
        rows = draws.reshape(samples, classes, -1).to(device=weight.device, dtype=weight.dtype)
        params[weight_name] = rows[:, :, :width].contiguous()
        if bias_name is not None:
            params[bias_name] = rows[:, :, width].contiguous()
        meta = {**copy.deepcopy(self.meta), "samples": samples, "draw_seed": int(seed)}
        return Ensemble(copy.deepcopy(self.point.template), params, meta=meta, posterior=self)

    def to(self, device: Any = None, dtype: torch.dtype | None = None) -> LastLayerLaplace:
        """A copy whose MAP network (and so every draw) sits on another device or dtype; the
        curvature stays in float64 on the CPU, where the draws are made."""
        moved = copy.copy(self)
        moved.point = self.point.to(device=device, dtype=dtype)
        moved.meta = copy.deepcopy(self.meta)
        return moved


def softmax_hessian(features: Tensor, probs: Tensor, bias: bool = True, chunk: int = 1024) -> Tensor:
    """Hessian of the summed softmax cross-entropy w.r.t. a last Linear layer.

    Parameters
    ----------
    features : Tensor of shape (N, H)
        Inputs of the last layer.
    probs : Tensor of shape (N, C)
        Softmax outputs at the current parameters.
    bias : bool
        Append a constant 1 feature for the bias.

    Returns
    -------
    Tensor of shape (C * H', C * H'), H' = H + bias
        Ordered like ``torch.cat([weight, bias[:, None]], 1).flatten()`` (class-major):
        sum_n (diag(p_n) - p_n p_n') kron phi_n phi_n'.
    """
    if bias:
        features = torch.cat([features, features.new_ones(features.shape[0], 1)], 1)
    n, width = features.shape
    classes = probs.shape[1]
    hessian = features.new_zeros(classes, width, classes, width)
    for start in range(0, n, chunk):
        phi, p = features[start:start + chunk], probs[start:start + chunk].to(features.dtype)
        curvature = torch.diag_embed(p) - p.unsqueeze(2) * p.unsqueeze(1)  # [n, C, C]
        weighted = curvature.unsqueeze(-1) * phi[:, None, None, :]  # [n, C, C, H']
        hessian += torch.einsum("nijl,nk->ikjl", weighted, phi)
    return hessian.reshape(classes * width, classes * width)


def log_marginal_likelihood(log_likelihood: float, mode: Tensor, hessian_eigenvalues: Tensor,
                            prior_precision: float) -> float:
    """Laplace evidence with prior N(0, I / prior_precision):

    log p(D | theta*) - prior_precision |theta*|^2 / 2 + P/2 log prior_precision
    - 1/2 sum_i log(e_i + prior_precision), e_i the likelihood Hessian's eigenvalues.
    """
    size = mode.numel()
    return float(
        log_likelihood - 0.5 * prior_precision * float((mode.double() ** 2).sum())
        + 0.5 * size * math.log(prior_precision) - 0.5 * float(torch.log(hessian_eigenvalues + prior_precision).sum())
    )


def optimise_prior_precision(log_likelihood: float, mode: Tensor, hessian_eigenvalues: Tensor,
                             low: float = 1e-6, high: float = 1e6) -> float:
    """The prior precision maximising :func:`log_marginal_likelihood` (log grid, then Brent)."""
    from scipy.optimize import minimize_scalar

    def loss(log10_precision: float) -> float:
        return -log_marginal_likelihood(log_likelihood, mode, hessian_eigenvalues, 10.0**log10_precision)

    grid = torch.linspace(math.log10(low), math.log10(high), 121).tolist()
    values = [loss(g) for g in grid]
    best = min(range(len(grid)), key=values.__getitem__)
    lo, hi = grid[max(best - 1, 0)], grid[min(best + 1, len(grid) - 1)]
    result = minimize_scalar(loss, bounds=(lo, hi), method="bounded", options={"xatol": 1e-6})
    return float(10.0 ** (result.x if result.fun <= values[best] else grid[best]))


def last_layer_features(point: Ensemble, x: Tensor, chunk: int = 1024) -> Tensor:
    """The last Linear layer's input [N, H] for member 0 of ``point`` at ``x`` (a forward hook),
    in chunks of ``chunk`` points; refuses a network whose output is not that layer's output."""
    path = _last_linear(point.template)
    member = point.module(0).eval()
    seen: dict[str, Tensor] = {}
    hook = member.get_submodule(path).register_forward_hook(
        lambda layer, inputs, output: seen.update(features=inputs[0], output=output))
    pieces = []
    try:
        for start in range(0, int(x.shape[0]), chunk):
            out = member(x[start:start + chunk])
            if "output" not in seen or out is not seen["output"]:
                raise ValueError(f"module must output its last nn.Linear layer's ({path!r}) output for last-layer "
                                 f"Laplace; its output is computed after that layer")
            pieces.append(seen.pop("features").reshape(out.shape[0], -1))
            seen.clear()
    finally:
        hook.remove()
    return torch.cat(pieces)


def _last_linear(module: nn.Module) -> str:
    """The path of the module's last ``nn.Linear`` (module order), which must come last."""
    children = list(module.named_modules())
    linear = [name for name, layer in children if isinstance(layer, nn.Linear)]
    last = children[-1][1] if len(children) > 1 else module
    if isinstance(module, nn.Sequential) and len(module) and not isinstance(module[-1], nn.Linear):
        linear = []
        last = module[-1]
    if not linear:
        raise ValueError(f"module must end in an nn.Linear layer for last-layer Laplace; got {type(module).__name__}"
                         f" ending in {type(last).__name__}")
    return linear[-1]


def _split(point: Ensemble):
    path = _last_linear(point.template)
    bias = f"{path}.bias" if point.template.get_submodule(path).bias is not None else None
    return None, f"{path}.weight", bias


def _flat_last_layer(point: Ensemble, weight_name: str, bias_name: str | None) -> Tensor:
    weight = point.params[weight_name][0].double()
    if bias_name is None:
        return weight.flatten()
    return torch.cat([weight, point.params[bias_name][0].double().unsqueeze(1)], 1).flatten()
