"""MC dropout as an ordinary ensemble: sampled masks folded into the weights.

Inverted dropout multiplies a layer's input h by m / (1 - p) with m ~ Bernoulli(1 - p).
When that layer is ``Linear``, W (m * h) / (1 - p) = (W diag(m) / (1 - p)) h, so one mask
is the same as a network whose next weight matrix has the dropped columns zeroed and
the kept ones scaled by 1 / (1 - p) (Gal & Ghahramani 2016 read MC dropout as an
approximate posterior over exactly these masked weights). S masks give S ordinary
members, and predicting needs no randomness. Where a mask cannot be folded (dropout after
a convolution or before any layer but a Linear, channel dropout, modules that are not a
Sequential), the masks are kept as a per-member input of the forward pass instead
(:mod:`jostle.fitting.dropout_masks`).
"""
from __future__ import annotations

import copy
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import torch
from torch import Tensor, nn
from torch.func import functional_call

from jostle.common.checks import check_float, check_int, show_value
from jostle.datasets import Dataset
from jostle.fitting.dropout_masks import (
    DROPOUT_LAYERS,
    check_site_masks,
    draw_site_masks,
    mask_sites,
    masked_ensemble,
)
from jostle.fitting.training_loop import (
    check_module_and_data,
    cross_entropy_per_member,
    fit_meta,
    member_generators,
    split_validation,
    stacked_initial,
    stream_seed,
    train_members,
)
from jostle.fitting.training_options import TrainingOptions, training_fit
from jostle.posterior.activations import ELEMENTWISE
from jostle.posterior.architectures import ImageView, architecture_of, build_architecture
from jostle.posterior.ensemble import Ensemble

__all__ = ["fit_dropout", "fold_dropout_masks", "sample_dropout"]

_DEFAULT_P = 0.1


@training_fit()
def fit_dropout(
    module: nn.Module,
    data: Dataset,
    p: float | None = None,
    samples: int = 100,
    *,
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
    """Train with dropout, then fold ``samples`` sampled masks into an ensemble (MC dropout).

    The validation loss uses the network without dropout; ``seed`` also seeds the
    training masks and the folded masks.

    Parameters
    ----------
    module : nn.Module
        Any network with Dropout (or Dropout2d) layers, e.g. ``jostle.mlp(2, 2, dropout=0.1)``
        or ``jostle.cnn((1, 28, 28), 10, dropout=0.1)``. Masks of a Dropout directly followed
        by a Linear in an ``nn.Sequential`` of Linear layers and activations are folded into
        that Linear's weights; any other network keeps its masks as a per-member input of
        the forward pass. Without Dropout layers: a ``jostle.mlp`` or ``jostle.cnn`` is
        rebuilt with dropout, and an ``nn.Sequential`` gets Dropout(p) before every Linear
        but the first.
    data : jostle.Dataset
    p : float in [0, 1), optional
        Dropout rate. None keeps the module's own rates (0.1 where dropout is inserted);
        a number sets every Dropout layer to it.
    samples : int
        Masks drawn after training; each becomes one member.
    {training_options}

    Returns
    -------
    Ensemble
        ``samples`` members of the dropout-free network; ``meta["method"] == "dropout"``.
    """
    options = TrainingOptions(
        epochs=epochs, batch_size=batch_size, lr=lr, weight_decay=weight_decay, optimizer=optimizer,
        momentum=momentum, validation=validation, patience=patience, seed=seed, progress=progress, device=device,
    ).checked()
    samples = check_int("samples", samples, low=1)
    if p is not None:
        p = check_float("p", p, low=0.0, high=1.0, high_open=True)
    check_module_and_data(module, data)
    config, seed, device = options, options.seed, options.device
    dropped = _with_dropout(module, p)
    layout = _layout(dropped) if _foldable(dropped) else None
    x, y = data.x_train.to(device), data.y_train.to(device)
    x_fit, y_fit, x_val, y_val = split_validation(x, y, config.validation, seed)
    generators = member_generators([seed])
    noise = torch.Generator(device=device).manual_seed(stream_seed(seed, 1))
    trainee = _seeded_copy(dropped, noise).to(device)
    params = stacked_initial(trainee, generators, device)
    record = train_members(
        params, _dropout_loss(trainee, train=True), x_fit, y_fit, generators, config,
        validation_loss=_validation(trainee, x_val, y_val) if x_val is not None else None,
        progress=options.progress, desc="dropout",
    )
    state = {name: value[0].detach() for name, value in params.items()}
    mask_generator = torch.Generator().manual_seed(stream_seed(seed, 2))
    if layout is not None:
        ensemble = _fold(layout, state, _draw_masks(layout, samples, mask_generator, device))
        rates = [site.rate for site in layout.sites]
    else:
        sites = mask_sites(dropped, x[:1])
        ensemble = masked_ensemble(dropped, state, sites, draw_site_masks(sites, samples, mask_generator, device))
        rates = [site["p"] for site in sites]
    ensemble.meta = fit_meta(
        "dropout", data, ensemble.template, seed, record.seconds, **config.as_meta(), samples=samples,
        p=rates, masks="folded into weights" if layout is not None else "forward input", epochs_run=record.epochs_run,
        final_loss=record.final_loss, best_epoch=record.best_epoch,
    )
    return ensemble


def fold_dropout_masks(module: nn.Module, masks: Sequence[Tensor], probe: Tensor | None = None) -> Ensemble:
    """Fold given keep-masks into a trained dropout network's weights.

    Parameters
    ----------
    module : nn.Module
        A trained network with Dropout layers (see :func:`fit_dropout` for which masks
        fold into weights and which are kept as a forward input).
    masks : sequence of Tensor of shape (S, *shape)
        One per Dropout layer with p > 0, in module order; 1 keeps a unit, 0 drops it.
        ``shape`` is ``(width,)`` for a folded site; otherwise that layer's input shape
        for one point (``(C, 1, 1)`` for Dropout2d).
    probe : Tensor of shape (1, *input_shape), optional
        One input, to read the mask shapes where masks are not folded (default: zeros of
        the first layer's input, when the network names it).

    Returns
    -------
    Ensemble
        S members; member s computes exactly what ``module`` computes in training mode
        when its dropout layers draw masks ``masks[k][s]`` (the same for every point).
    """
    if not _foldable(module):
        sites = mask_sites(module, _probe(module, probe))
        checked = check_site_masks(sites, masks)
        state = {**dict(module.named_parameters()), **dict(module.named_buffers())}
        return masked_ensemble(module, {k: v.detach() for k, v in state.items()}, sites, checked)
    layout = _layout(module)
    masks = list(masks)
    if len(masks) != len(layout.sites):
        raise ValueError(f"masks must hold one tensor per Dropout layer with p > 0 ({len(layout.sites)}); "
                         f"got {len(masks)}")
    checked = []
    for k, (site, mask) in enumerate(zip(layout.sites, masks)):
        mask = torch.as_tensor(mask)
        if mask.ndim != 2 or mask.shape[1] != site.width or mask.shape[0] != torch.as_tensor(masks[0]).shape[0]:
            raise ValueError(f"masks[{k}] must have shape (S, {site.width}) with S shared by all masks; "
                             f"got {tuple(mask.shape)}")
        if not bool(((mask == 0) | (mask == 1)).all()):
            raise ValueError(f"masks[{k}] must hold only 0 (drop) and 1 (keep); got {show_value(mask.unique())}")
        checked.append(mask)
    state = {**dict(module.named_parameters()), **dict(module.named_buffers())}
    return _fold(layout, {k: v.detach() for k, v in state.items()}, checked)


def sample_dropout(module: nn.Module, samples: int = 100, seed: int = 0, probe: Tensor | None = None) -> Ensemble:
    """Draw ``samples`` dropout masks for a trained dropout network and fold them in.

    Parameters
    ----------
    module : nn.Module
        A trained network with Dropout layers (as in :func:`fold_dropout_masks`).
    samples : int
    seed : int
        Seeds the masks (m ~ Bernoulli(1 - p) per unit and member).
    probe : Tensor of shape (1, *input_shape), optional
        As in :func:`fold_dropout_masks`.

    Returns
    -------
    Ensemble
        ``samples`` members of the dropout-free network (see :func:`fold_dropout_masks`).
    """
    samples = check_int("samples", samples, low=1)
    seed = check_int("seed", seed, low=0)
    device = next(iter(module.parameters())).device
    generator = torch.Generator().manual_seed(seed)
    if not _foldable(module):
        masks = draw_site_masks(mask_sites(module, _probe(module, probe)), samples, generator, device)
    else:
        masks = _draw_masks(_layout(module), samples, generator, device)
    return fold_dropout_masks(module, masks, probe)


@dataclass(frozen=True)
class _Site:
    """A Dropout layer and the Linear weight (name in the clean template) it folds into."""

    rate: float
    weight: str
    width: int


@dataclass(frozen=True)
class _Layout:
    clean: nn.Module
    names: dict[str, str]  # clean parameter name -> name in the dropout network
    sites: list[_Site]


def _with_dropout(module: nn.Module, p: float | None) -> nn.Module:
    if any(isinstance(layer, DROPOUT_LAYERS) for layer in module.modules()):
        dropped = copy.deepcopy(module)
        if p is not None:
            for layer in dropped.modules():
                if isinstance(layer, DROPOUT_LAYERS):
                    layer.p = p
        return dropped
    rate = _DEFAULT_P if p is None else p
    arch = architecture_of(module)
    if arch is not None and arch["builder"] in ("mlp", "cnn"):
        return build_architecture(arch["builder"], **{**arch["kwargs"], "dropout": rate})
    if not isinstance(module, nn.Sequential):
        raise ValueError(f"module must hold Dropout layers, or be a jostle.mlp, jostle.cnn or nn.Sequential that "
                         f"dropout can be inserted into; got a {type(module).__name__} without Dropout layers")
    layers, seen_linear = [], False
    for layer in module:
        if isinstance(layer, nn.Linear):
            if seen_linear:
                layers.append(nn.Dropout(rate))
            seen_linear = True
        layers.append(copy.deepcopy(layer))
    return nn.Sequential(*layers)


def _foldable(dropped: nn.Module) -> bool:
    """Whether every mask folds into weights: a Sequential of Linear layers, activations and
    plain Dropout layers, each Dropout with p > 0 directly followed by a Linear."""
    if not isinstance(dropped, nn.Sequential) or not all(
            isinstance(layer, (nn.Linear, *ELEMENTWISE)) for layer in dropped):
        return False
    children = list(dropped)
    return all(isinstance(children[i + 1] if i + 1 < len(children) else None, nn.Linear)
               for i, layer in enumerate(children) if type(layer) is nn.Dropout and layer.p > 0)


def _probe(module: nn.Module, probe: Tensor | None) -> Tensor:
    """One input for reading mask shapes: ``probe``, or zeros shaped for the first layer."""
    if probe is not None:
        return torch.as_tensor(probe, dtype=torch.float32)
    for layer in module.modules():
        if isinstance(layer, ImageView):
            return torch.zeros(1, *layer.shape)
        if isinstance(layer, nn.Linear):
            return torch.zeros(1, layer.in_features)
        if isinstance(layer, nn.Conv2d):
            break
    raise ValueError("probe must be given (one input of shape (1, *input_shape)) to read the dropout masks' "
                     "shapes of this network; its first layer does not name its input size")


def _layout(dropped: nn.Module) -> _Layout:
    if not isinstance(dropped, nn.Sequential):
        raise ValueError(f"module must be an nn.Sequential with Dropout layers; got {type(dropped).__name__}")
    children = list(dropped)
    kept = [i for i, layer in enumerate(children) if not isinstance(layer, nn.Dropout)]
    position = {old: new for new, old in enumerate(kept)}
    sites = []
    for i, layer in enumerate(children):
        if not isinstance(layer, nn.Dropout) or layer.p == 0:
            continue
        follower = children[i + 1] if i + 1 < len(children) else None
        if not isinstance(follower, nn.Linear):
            raise ValueError(f"module[{i}] is a Dropout followed by {type(follower).__name__}; masks fold only "
                             f"into a Linear layer that directly follows a Dropout")
        sites.append(_Site(float(layer.p), f"{position[i + 1]}.weight", follower.in_features))
    if not sites:
        raise ValueError("module must hold at least one Dropout layer with p > 0 to fold masks from")
    arch = architecture_of(dropped)
    if arch is not None and arch["builder"] == "mlp":
        clean = build_architecture("mlp", **{**arch["kwargs"], "dropout": 0.0})
    else:
        clean = nn.Sequential(*[copy.deepcopy(children[i]) for i in kept])
    names = {}
    for name in list(dict(clean.named_parameters())) + list(dict(clean.named_buffers())):
        index, rest = name.split(".", 1)
        names[name] = f"{kept[int(index)]}.{rest}"
    return _Layout(clean.eval(), names, sites)


def _fold(layout: _Layout, state: dict[str, Tensor], masks: Sequence[Tensor]) -> Ensemble:
    count = int(masks[0].shape[0])
    params = {name: state[source].unsqueeze(0).expand(count, *state[source].shape).clone()
              for name, source in layout.names.items()}
    for site, mask in zip(layout.sites, masks):
        weight = params[site.weight]
        scale = mask.to(device=weight.device, dtype=weight.dtype) / (1.0 - site.rate)
        params[site.weight] = weight * scale.unsqueeze(1)
    template = copy.deepcopy(layout.clean).to(next(iter(params.values())).device)
    return Ensemble(template, params)


def _draw_masks(layout: _Layout, samples: int, generator: torch.Generator, device) -> list[Tensor]:
    return [(torch.rand(samples, site.width, generator=generator) >= site.rate).to(device=device, dtype=torch.float32)
            for site in layout.sites]


class _SeededDropout(nn.Module):
    """Inverted dropout drawing from its own generator, never the global RNG."""

    def __init__(self, p: float, generator: torch.Generator, channels: bool = False):
        super().__init__()
        self.p = p
        self.generator = generator
        self.channels = channels  # Dropout2d: one draw per (point, channel)

    def forward(self, h: Tensor) -> Tensor:
        if not self.training or self.p == 0:
            return h
        shape = h.shape[:2] + (1,) * (h.dim() - 2) if self.channels else h.shape
        keep = torch.rand(shape, generator=self.generator, device=h.device, dtype=h.dtype) >= self.p
        return h * keep / (1.0 - self.p)


def _seeded_copy(dropped: nn.Module, generator: torch.Generator) -> nn.Module:
    trainee = copy.deepcopy(dropped)
    for path, layer in list(trainee.named_modules()):
        if isinstance(layer, DROPOUT_LAYERS):
            parent_path, _, child = path.rpartition(".")
            parent = trainee.get_submodule(parent_path) if parent_path else trainee
            setattr(parent, child, _SeededDropout(layer.p, generator, channels=isinstance(layer, nn.Dropout2d)))
    return trainee.train()


def _dropout_loss(trainee: nn.Module, train: bool):
    def member_loss(params, xb, yb):
        trainee.train(train)
        logits = functional_call(trainee, {k: v[0] for k, v in params.items()}, (xb[0],))
        return cross_entropy_per_member(logits.unsqueeze(0), yb)

    return member_loss


def _validation(trainee: nn.Module, x_val: Tensor, y_val: Tensor):
    evaluate = _dropout_loss(trainee, train=False)

    def validation_loss(params):
        loss = evaluate(params, x_val.unsqueeze(0), y_val.unsqueeze(0))
        trainee.train()
        return loss

    return validation_loss
