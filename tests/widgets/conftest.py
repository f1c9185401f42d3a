"""Tiny seeded ensembles and data for the widget tests (no fitting: seeded random nets)."""
from __future__ import annotations

import pytest
import torch

import jostle


def tiny_ensemble(members: int = 6, in_features: int = 2, classes: int = 2, hidden=(12,), seed: int = 0,
                  class_names=None) -> jostle.Ensemble:
    generator = torch.Generator().manual_seed(seed)
    nets = [jostle.init_parameters(jostle.mlp(in_features, classes, hidden=hidden), generator)
            for _ in range(members)]
    meta = {"classes": list(class_names)} if class_names is not None else None
    return jostle.Ensemble.from_modules(nets, meta=meta)


@pytest.fixture(scope="module")
def moons():
    return jostle.datasets.moons(n_train=40, n_test=10, noise=0.2, seed=0)


@pytest.fixture(scope="module")
def ens():
    return tiny_ensemble()


