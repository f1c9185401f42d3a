"""MC dropout where masks cannot be folded into weights: masks as a sampled input.

A dropout mask folds into the next layer's weights only when that layer is a Linear
directly after the Dropout (:mod:`jostle.fitting.dropout`). Elsewhere (after a
convolution, before a norm or a pooling, channel dropout) each member is the trained
network with every Dropout replaced by a :class:`jostle.posterior.architectures.DropoutMask`
holding one drawn keep-mask, shared by every point: the masks are a per-member buffer,
stacked over members like any parameter, and the forward pass multiplies them in
(Gal & Ghahramani 2016: one member per mask of the approximate posterior). Every member
carries its own copy of the trained weights (S x the network's parameters; 100 members of
the default ``jostle.cnn`` on 28x28 images hold 2.3 M floats, 9 MB).
"""
from __future__ import annotations

from collections.abc import Sequence

import torch
from torch import Tensor, nn

from jostle.posterior.architectures import with_dropout_masks
from jostle.posterior.ensemble import Ensemble

__all__ = ["DROPOUT_LAYERS", "mask_sites", "draw_site_masks", "masked_ensemble", "check_site_masks"]

#: dropout layers whose masks are drawn: elementwise, and whole channels of an image
DROPOUT_LAYERS = (nn.Dropout, nn.Dropout2d)


def mask_sites(module: nn.Module, probe: Tensor) -> list[dict]:
    """Every Dropout layer with p > 0 of ``module``, in module order: ``{"path", "shape", "p"}``,
    the mask's shape read from one probe point's input at that layer."""
    shapes: dict[str, tuple[int, ...]] = {}
    hooks = []
    for path, layer in module.named_modules():
        if isinstance(layer, DROPOUT_LAYERS) and layer.p > 0:
            def record(layer, inputs, output, path=path):
                shape = tuple(inputs[0].shape[1:])
                shapes[path] = (shape[0],) + (1,) * (len(shape) - 1) if isinstance(layer, nn.Dropout2d) else shape
            hooks.append(layer.register_forward_hook(record))
    weight = next(iter(module.parameters()), None)  # the probe goes where the module lives
    probe = probe[:1] if weight is None else probe[:1].to(weight.device)
    was_training = module.training
    try:
        with torch.no_grad():
            module.eval()(probe)
    finally:
        module.train(was_training)
        for hook in hooks:
            hook.remove()
    return [{"path": path, "shape": list(shapes[path]), "p": float(module.get_submodule(path).p)}
            for path, layer in module.named_modules() if path in shapes]


def draw_site_masks(sites: list[dict], samples: int, generator: torch.Generator, device) -> list[Tensor]:
    """Keep-masks [samples, *shape] per site: 1 with probability 1 - p (seeded)."""
    return [(torch.rand(samples, *site["shape"], generator=generator) >= site["p"]).to(device=device,
                                                                                   dtype=torch.float32)
            for site in sites]


def check_site_masks(sites: list[dict], masks: Sequence[Tensor]) -> list[Tensor]:
    """The masks as tensors, or a clear error naming the one that does not fit its site."""
    masks = [torch.as_tensor(mask) for mask in masks]
    if len(masks) != len(sites):
        raise ValueError(f"masks must hold one tensor per Dropout layer with p > 0 ({len(sites)}); got {len(masks)}")
    for k, (site, mask) in enumerate(zip(sites, masks)):
        if tuple(mask.shape[1:]) != tuple(site["shape"]) or mask.ndim < 1 or mask.shape[0] != masks[0].shape[0]:
            raise ValueError(f"masks[{k}] must have shape (S, {', '.join(map(str, site['shape']))}) with S shared "
                             f"by all masks; got {tuple(mask.shape)}")
        if not bool(((mask == 0) | (mask == 1)).all()):
            raise ValueError(f"masks[{k}] must hold only 0 (drop) and 1 (keep); got values {mask.unique().tolist()}")
    return masks


def masked_ensemble(module: nn.Module, state: dict[str, Tensor], sites: list[dict],
                    masks: Sequence[Tensor]) -> Ensemble:
    """S members: ``module``'s trained ``state`` with mask s at every site."""
    count = int(masks[0].shape[0])
    template = with_dropout_masks(module, sites).to(next(iter(state.values())).device).eval()
    params = {name: value.detach().unsqueeze(0).expand(count, *value.shape).clone() for name, value in state.items()}
    for site, mask in zip(sites, masks):
        keep = template.get_submodule(site["path"]).keep
        params[f"{site['path']}.keep"] = mask.to(device=keep.device, dtype=keep.dtype)
    return Ensemble(template, params)
