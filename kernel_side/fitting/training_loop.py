"""The pieces every ``fit_*`` shares: argument checks, the stacked training loop, metadata.

The shared training keywords themselves are :class:`TrainingOptions`
(:mod:`jostle.fitting.training_options`), importable from here too.

Members are trained together as stacked parameters ``[S, ...]`` under one optimiser.
Adam and SGD update every element on its own, so one optimiser over the stacks is
exactly S separate optimisers, as long as each member's loss depends only on its own
slice: the loop minimises the *sum* of per-member mean losses, so member s receives
exactly the gradient of its own loss.
"""
from __future__ import annotations

import copy
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import torch
from torch import Tensor, nn

from jostle.common.progress import progress_bar
from jostle.common.threads import threads_for, torch_threads
from jostle.datasets import Dataset
from jostle.fitting.training_options import (  # noqa: F401 (check_device is shared from here too)
    OPTIMIZERS,
    TrainingOptions,
    check_device,
)
from jostle.posterior.architectures import architecture_of, init_parameters

MemberLoss = Callable[[dict, Tensor, Tensor], Tensor]


@dataclass
class TrainingRecord:
    """What happened during training: epochs run, final losses, per-member best epochs."""

    epochs_run: int
    final_loss: list[float]
    best_epoch: list[int] | None = None
    seconds: float = 0.0
    history: list[float] = field(default_factory=list)


def check_module_and_data(module: Any, data: Any) -> None:
    """Refuse anything but an nn.Module whose logits fit the data's features and classes."""
    if not isinstance(module, nn.Module):
        raise TypeError(f"module must be a torch.nn.Module; got {type(module).__name__}")
    if not isinstance(data, Dataset):
        raise TypeError(f"data must be a jostle.Dataset (see jostle.datasets); got {type(data).__name__}")
    probe = copy.deepcopy(module).eval().to("cpu", torch.float32)
    try:
        with torch.no_grad():
            out = probe(data.x_train[:2].to(torch.float32))
    except (RuntimeError, ValueError) as err:
        raise ValueError(
            f"module must accept inputs of shape (n_points, {data.n_features}) from data {data.name!r}; "
            f"calling it failed: {err}"
        ) from None
    if out.ndim != 2 or out.shape[1] != data.n_classes:
        raise ValueError(
            f"module must output logits of shape (n_points, {data.n_classes}), one per class of data "
            f"{data.name!r}; got shape {tuple(out.shape)}"
        )


def stream_seed(seed: int, stream: int) -> int:
    """A second seed derived from ``seed``, so noise streams (dropout masks, weight draws)
    never replay the initialisation stream that ``seed`` itself drives."""
    return (int(seed) * 0x9E3779B1 + 0x632BE5AB * (int(stream) + 1)) % (2**63 - 1)


def member_generators(seeds: list[int]) -> list[torch.Generator]:
    return [torch.Generator().manual_seed(s) for s in seeds]


def stacked_initial(module: nn.Module, generators: list[torch.Generator], device: torch.device) -> dict[str, Tensor]:
    """Parameters [S, ...]: member s initialised by ``init_parameters`` from generator s."""
    states = []
    for generator in generators:
        member = init_parameters(copy.deepcopy(module).to("cpu", torch.float32), generator)
        states.append({**dict(member.named_parameters()), **dict(member.named_buffers())})
    names = list(states[0])
    trainable = set(dict(module.named_parameters()))
    params = {}
    for name in names:
        value = torch.stack([state[name].detach() for state in states]).to(device)
        params[name] = value.requires_grad_(name in trainable and value.is_floating_point())
    return params


def split_validation(x: Tensor, y: Tensor, fraction: float, seed: int):
    """Hold out ``fraction`` of the training points (seeded): (x_fit, y_fit, x_val, y_val)."""
    if fraction == 0.0:
        return x, y, None, None
    n = int(x.shape[0])
    held = int(round(fraction * n))
    if held < 1 or held >= n:
        raise ValueError(
            f"validation must leave at least one point on each side of the split; "
            f"{fraction:g} of {n} training points holds out {held}"
        )
    order = torch.randperm(n, generator=torch.Generator().manual_seed(seed)).to(x.device)
    return x[order[held:]], y[order[held:]], x[order[:held]], y[order[:held]]


def cross_entropy_per_member(logits: Tensor, y: Tensor) -> Tensor:
    """Mean cross-entropy of each member: logits [S, B, C], y [S, B] or [B] -> [S]."""
    s, b, _ = logits.shape
    y = y.expand(s, b) if y.ndim == 1 else y
    # logsumexp - picked logit equals F.cross_entropy; on a busy 2-core CPU the fused
    # cross-entropy kernel stalls in its thread pool at minibatch sizes, this does not.
    picked = logits.gather(-1, y.unsqueeze(-1)).squeeze(-1)
    return (logits.logsumexp(-1) - picked).mean(1)


def train_members(
    params: dict[str, Tensor],
    member_loss: MemberLoss,
    x: Tensor,
    y: Tensor,
    generators: list[torch.Generator],
    config: TrainingOptions,
    *,
    validation_loss: Callable[[dict], Tensor] | None = None,
    progress: bool = True,
    desc: str = "training",
) -> TrainingRecord:
    """Minimise ``sum_s member_loss(params, x[idx_s], y[idx_s])[s]`` with one optimiser.

    Every member draws its own minibatch order from its own generator, so member s sees
    exactly the batches a lone run with that generator would. With ``validation_loss``
    (params -> [S]) each member keeps its best epoch, and training stops once no member
    has improved for ``config.patience`` epochs.
    """
    started = time.perf_counter()
    trainable = [p for p in params.values() if p.requires_grad]
    with training_threads(sum(p.numel() for p in trainable), x.device):
        return _train_loop(params, trainable, member_loss, x, y, generators, config, validation_loss,
                           progress, desc, started)


def _train_loop(params, trainable, member_loss, x, y, generators, config, validation_loss, progress, desc,
                started) -> TrainingRecord:
    optimiser = _optimiser(trainable, config)
    n = int(x.shape[0])
    tracker = _BestTracker(params, validation_loss, config.patience) if validation_loss else None
    bar = progress_bar(bool(progress), config.epochs, desc, unit="epoch")
    history: list[float] = []
    epoch_loss = torch.zeros(len(generators))
    epochs_run = 0
    for epoch in range(config.epochs):
        orders = torch.stack([torch.randperm(n, generator=g) for g in generators]).to(x.device)
        total = torch.zeros(len(generators), device=x.device)
        for start in range(0, n, config.batch_size):
            index = orders[:, start:start + config.batch_size]
            losses = member_loss(params, x[index], y[index])
            optimiser.zero_grad(set_to_none=True)
            losses.sum().backward()
            optimiser.step()
            total += losses.detach() * index.shape[1]
        epoch_loss = (total / n).cpu()
        history.append(float(epoch_loss.mean()))
        if not bool(torch.isfinite(epoch_loss).all()):
            bar.close()
            raise ValueError(f"training diverged: the loss became {history[-1]} in epoch {len(history)}; "
                             f"lr = {config.lr:g} is probably too large")
        epochs_run = epoch + 1
        bar.update(1)
        bar.set_postfix(loss=f"{history[-1]:.4f}")
        if tracker is not None and tracker.update(epoch):
            break
    bar.close()
    best = tracker.restore() if tracker is not None else None
    return TrainingRecord(epochs_run, epoch_loss.tolist(), best, time.perf_counter() - started, history)


def fit_meta(method: str, data: Dataset, module: nn.Module, seed: int, seconds: float, **extra: Any) -> dict:
    """The metadata record every fitted posterior carries (JSON-serialisable)."""
    meta = {
        "method": method,
        "classes": list(data.classes),
        "bounds": [data.bounds[0].tolist(), data.bounds[1].tolist()],
        "data": data.describe(),
        "seed": int(seed),
        "seconds": round(float(seconds), 4),
        "architecture": architecture_of(module),
    }
    meta.update(extra)
    return meta


# Up to this many trainable elements every op of a step is tiny, and a second thread
# only adds pool hand-offs: on a shared 2-core CPU under load, measured 5-40 ms per
# minibatch cross-entropy with 2 threads against 0.1 ms with one.
_SMALL_TRAINING = 2**20


def training_threads(elements: int, device: torch.device):
    """Train small CPU problems on one intra-op thread (the rule of :func:`threads_for`)."""
    return torch_threads(threads_for("auto", elements, device, small=_SMALL_TRAINING))


def _optimiser(trainable: list[Tensor], config: TrainingOptions) -> torch.optim.Optimizer:
    if config.optimizer == "adam":
        return torch.optim.Adam(trainable, lr=config.lr, weight_decay=config.weight_decay)
    return torch.optim.SGD(trainable, lr=config.lr, momentum=config.momentum, weight_decay=config.weight_decay)


class _BestTracker:
    """Per-member early stopping: keep each member's best parameters by validation loss."""

    def __init__(self, params: dict[str, Tensor], validation_loss: Callable[[dict], Tensor], patience: int):
        self.params = params
        self.validation_loss = validation_loss
        self.patience = patience
        self.best_params = {k: v.detach().clone() for k, v in params.items()}
        members = int(next(iter(params.values())).shape[0])
        self.best_loss = torch.full((members,), float("inf"))
        self.best_epoch = torch.full((members,), -1, dtype=torch.long)

    def update(self, epoch: int) -> bool:
        """Record this epoch; True once every member has gone ``patience`` epochs without gain."""
        with torch.no_grad():
            loss = self.validation_loss(self.params).detach().cpu()
            better = loss < self.best_loss
            self.best_loss = torch.where(better, loss, self.best_loss)
            self.best_epoch = torch.where(better, torch.tensor(epoch), self.best_epoch)
            for name, value in self.params.items():
                mask = better.to(value.device).view(-1, *([1] * (value.ndim - 1)))
                self.best_params[name] = torch.where(mask, value.detach(), self.best_params[name])
        return bool(((epoch - self.best_epoch) >= self.patience).all())

    def restore(self) -> list[int]:
        with torch.no_grad():
            for name, value in self.params.items():
                value.copy_(self.best_params[name])
        return self.best_epoch.tolist()
