"""Point-estimate posteriors: a MAP network (S = 1) and a deep ensemble.

A deep ensemble is S networks from independent initialisations and data orders
(Lakshminarayanan et al. 2017). Here all S train at once as stacked parameters: member
``m`` sees exactly the initialisation and minibatches that ``fit_map(seed=seed + m)``
would, so the ensemble equals S separate runs, only faster.
"""
from __future__ import annotations

import copy
from typing import Any

from torch import nn

from jostle.common.checks import check_int
from jostle.datasets import Dataset
from jostle.fitting.training_loop import (
    check_module_and_data,
    cross_entropy_per_member,
    fit_meta,
    member_generators,
    split_validation,
    stacked_initial,
    train_members,
)
from jostle.fitting.training_options import TrainingOptions, training_fit
from jostle.posterior.ensemble import Ensemble

__all__ = ["fit_map", "fit_deep_ensemble"]


@training_fit()
def fit_map(
    module: nn.Module,
    data: Dataset,
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
    """Train one network by penalised maximum likelihood: the deterministic baseline (S = 1).

    Parameters
    ----------
    module : nn.Module
        The architecture, e.g. ``jostle.mlp(2, 2)``; it is copied and re-initialised from ``seed``
        (its own weights are not used). Dropout layers are switched off.
    data : jostle.Dataset
        Trained on ``data.x_train`` of shape (n_train, n_features) and ``data.y_train``.
    {training_options}

    Returns
    -------
    Ensemble
        One member; ``meta["method"] == "map"`` with the settings, seed and time taken.

    Examples
    --------
    >>> import jostle
    >>> data = jostle.datasets.moons(n_train=60, n_test=20)
    >>> ens = fit_map(jostle.mlp(2, 2, hidden=(8,)), data, epochs=2, progress=False)
    >>> len(ens)
    1
    """
    options = TrainingOptions(
        epochs=epochs, batch_size=batch_size, lr=lr, weight_decay=weight_decay, optimizer=optimizer,
        momentum=momentum, validation=validation, patience=patience, seed=seed, progress=progress, device=device,
    ).checked()
    return _fit_stacked(module, data, [options.seed], "map", options)


@training_fit()
def fit_deep_ensemble(
    module: nn.Module,
    data: Dataset,
    members: int = 10,
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
    """Train ``members`` networks from independent initialisations and data orders, together.

    Member ``m`` is initialised and shuffled from seed ``seed + m``, exactly as
    ``fit_map(module, data, seed=seed + m)`` would be; all members share one optimiser
    over stacked parameters (Adam and SGD act elementwise, so this is the same as
    separate optimisers). With ``validation > 0`` one split (from ``seed``) is shared and
    each member keeps its own best epoch.

    Parameters
    ----------
    module : nn.Module
        The architecture, copied and re-initialised per member.
    data : jostle.Dataset
    members : int
        Networks in the ensemble.
    {training_options}

    Returns
    -------
    Ensemble
        ``members`` members; ``meta["method"] == "deep_ensemble"``.
    """
    members = check_int("members", members, low=1)
    options = TrainingOptions(
        epochs=epochs, batch_size=batch_size, lr=lr, weight_decay=weight_decay, optimizer=optimizer,
        momentum=momentum, validation=validation, patience=patience, seed=seed, progress=progress, device=device,
    ).checked()
    seeds = [options.seed + m for m in range(members)]
    return _fit_stacked(module, data, seeds, "deep_ensemble", options, members=members)


def _fit_stacked(
    module: nn.Module, data: Dataset, seeds: list[int], method: str, config: TrainingOptions, **extra: Any,
) -> Ensemble:
    check_module_and_data(module, data)
    device = config.device
    x, y = data.x_train.to(device), data.y_train.to(device)
    x_fit, y_fit, x_val, y_val = split_validation(x, y, config.validation, config.seed)
    generators = member_generators(seeds)
    params = stacked_initial(module, generators, device)
    template = copy.deepcopy(module).eval().to(device)
    trainee = Ensemble(template, params)

    def member_loss(p, xb, yb):
        return cross_entropy_per_member(trainee._plan.forward(p, xb, per_member=True), yb)

    def validation_loss(p):
        return cross_entropy_per_member(trainee._plan.run(p, x_val, trainee.memory_budget), y_val)

    record = train_members(
        params, member_loss, x_fit, y_fit, generators, config,
        validation_loss=validation_loss if x_val is not None else None,
        progress=config.progress, desc=method.replace("_", " "),
    )
    fitted = {name: value.detach() for name, value in params.items()}
    meta = fit_meta(
        method, data, module, config.seed, record.seconds, **extra, **config.as_meta(),
        member_seeds=seeds, epochs_run=record.epochs_run, final_loss=record.final_loss,
        best_epoch=record.best_epoch,
    )
    return Ensemble(template, fitted, meta=meta)
