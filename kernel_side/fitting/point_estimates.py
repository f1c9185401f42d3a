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
from jostle.fitting.training_loop import (
    TrainingConfig, check_config, check_device, check_module_and_data, cross_entropy_per_member,
    fit_meta, member_generators, split_validation, stacked_initial, train_members,
)
from jostle.datasets import Dataset
from jostle.posterior.ensemble import Ensemble

__all__ = ["fit_map", "fit_deep_ensemble"]


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
    epochs, batch_size, lr : int, int, float
        Passes over the training points, minibatch size, learning rate.
    weight_decay : float
        L2 penalty coefficient (a Gaussian prior on the weights, in the MAP reading).
    optimizer : {"adam", "sgd"}
    momentum : float
        SGD momentum (ignored by Adam).
    validation : float
        Share of the training points held out for early stopping (0 trains on all for
        ``epochs`` epochs). The parameters of the best validation epoch are kept.
    patience : int
        Epochs without a validation gain before stopping.
    seed : int
        Seeds the initialisation, the minibatch order and the validation split.
    progress : bool
        Show a tqdm bar with the loss.
    device : str or torch.device, optional
        Where to train (default CPU).

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
    seed = check_int("seed", seed, low=0)
    config = check_config(epochs, batch_size, lr, weight_decay, optimizer, momentum, validation, patience)
    return _fit_stacked(module, data, [seed], "map", config, seed, progress, device)


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
    each member keeps its own best epoch. Other parameters are as in :func:`fit_map`.

    Returns
    -------
    Ensemble
        ``members`` members; ``meta["method"] == "deep_ensemble"``.
    """
    members = check_int("members", members, low=1)
    seed = check_int("seed", seed, low=0)
    config = check_config(epochs, batch_size, lr, weight_decay, optimizer, momentum, validation, patience)
    seeds = [seed + m for m in range(members)]
    return _fit_stacked(module, data, seeds, "deep_ensemble", config, seed, progress, device, members=members)


def _fit_stacked(
    module: nn.Module, data: Dataset, seeds: list[int], method: str, config: TrainingConfig,
    seed: int, progress: bool, device: Any, **extra: Any,
) -> Ensemble:
    check_module_and_data(module, data)
    device = check_device(device)
    x, y = data.x_train.to(device), data.y_train.to(device)
    x_fit, y_fit, x_val, y_val = split_validation(x, y, config.validation, seed)
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
        progress=bool(progress), desc=method.replace("_", " "),
    )
    fitted = {name: value.detach() for name, value in params.items()}
    meta = fit_meta(
        method, data, module, seed, record.seconds, **extra, **config.as_meta(),
        member_seeds=seeds, epochs_run=record.epochs_run, final_loss=record.final_loss,
        best_epoch=record.best_epoch,
    )
    return Ensemble(template, fitted, meta=meta)
