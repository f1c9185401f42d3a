"""certified radius <= exact radius <= radius an attack finds, on small ReLU networks.

The exact L-inf radius comes from a mixed-integer program (Tjeng et al. 2019, big-M ReLU
encoding, solved by HiGHS through scipy.optimize.milp; tests/kernel_side/references/milp_radius.py)
and, for these 2-D inputs, from a dense grid search; the attack radius from jostle.minimal_budget
(PGD bisection; Madry et al. 2018). The certified radius must never exceed either.
"""
import numpy as np
import pytest
import torch

import jostle
from tests.kernel_side.references.milp_radius import milp_radius

BOX = (-2.0, 2.0)
# HiGHS' primal feasibility tolerance is 1e-7 on constraints of size ~1; 1e-5 leaves room for it
# and for float32 evaluation of the network in jostle.
MILP_TOL = 1e-5


def _relu_ensemble(members: int, hidden: tuple[int, ...], seed: int) -> jostle.Ensemble:
    g = torch.Generator().manual_seed(seed)
    nets = [jostle.init_parameters(jostle.mlp(2, 2, hidden=hidden, activation="relu"), g) for _ in range(members)]
    return jostle.Ensemble.from_modules(nets, meta={"bounds": [[BOX[0]] * 2, [BOX[1]] * 2]})


def _layers(ens: jostle.Ensemble, member: int) -> list[tuple[np.ndarray, np.ndarray]]:
    linear = [m for m in ens.template if isinstance(m, torch.nn.Linear)]
    names = [name for name, m in ens.template.named_children() if isinstance(m, torch.nn.Linear)]
    assert len(linear) == len(names)
    return [(ens.params[f"{n}.weight"][member].double().numpy(), ens.params[f"{n}.bias"][member].double().numpy())
            for n in names]


def _grid_radius(ens: jostle.Ensemble, member: int, x: torch.Tensor, label: int, reach: float, steps: int = 801):
    """Smallest L-inf distance to a grid point of [x - reach, x + reach]^2 (in the box) whose label differs."""
    axis = torch.linspace(-reach, reach, steps)
    grid = torch.stack(torch.meshgrid(axis, axis, indexing="ij"), -1).reshape(-1, 2) + x
    grid = grid[((grid >= BOX[0]) & (grid <= BOX[1])).all(1)]
    flipped = ens[member].logits(grid)[0].argmax(-1) != label
    if not bool(flipped.any()):
        return float("inf"), 2 * reach / (steps - 1)
    return float((grid[flipped] - x).abs().amax(1).min()), 2 * reach / (steps - 1)


@pytest.mark.parametrize("hidden, seed", [((8, 8), 0), ((16, 16), 1)])
@pytest.mark.parametrize("method", ["ibp", "crown"])
def test_certified_radius_below_milp_radius_below_attack_radius(hidden, seed, method):
    ens = _relu_ensemble(members=2, hidden=hidden, seed=seed)
    g = torch.Generator().manual_seed(seed + 10)
    x = torch.rand(4, 2, generator=g) * 2 - 1
    certified = jostle.certified_radius(ens, x, norm="inf", method=method, iterations=24)
    labels = ens.logits(x).argmax(-1)
    for member in range(len(ens)):
        found = jostle.minimal_budget(ens[member], x, norm="inf", iterations=20, seed=0)
        for n in range(x.shape[0]):
            reach = min(float(found.eps[n]), BOX[1] - BOX[0]) + 1e-3
            exact = milp_radius(_layers(ens, member), x[n].double().numpy(), int(labels[member, n]), reach, BOX)
            assert float(certified.members[member, n]) <= exact + MILP_TOL, (member, n)
            assert exact <= float(found.eps[n]) + MILP_TOL, (member, n)


def test_milp_radius_agrees_with_a_dense_grid_search_and_bounds_the_certificate():
    # Every grid flip is a flip, so exact <= grid radius; the grid's spacing h bounds the gap
    # from above for these networks (their flip regions are polyhedra wider than h near x').
    ens = _relu_ensemble(members=1, hidden=(8, 8), seed=4)
    g = torch.Generator().manual_seed(14)
    x = torch.rand(5, 2, generator=g) * 2 - 1
    labels = ens.logits(x).argmax(-1)[0]
    certified = jostle.certified_radius(ens, x, norm="inf", method="crown", iterations=24)
    for n in range(x.shape[0]):
        exact = milp_radius(_layers(ens, 0), x[n].double().numpy(), int(labels[n]), 1.5, BOX)
        grid, spacing = _grid_radius(ens, 0, x[n], int(labels[n]), 1.5)
        if np.isinf(exact):
            assert np.isinf(grid)
            continue
        assert exact <= grid + MILP_TOL and grid <= exact + 2 * spacing
        assert float(certified.eps[n]) <= exact + MILP_TOL
        # a two-class single-member predictive is certified exactly when the member is
        assert float(certified.eps[n]) == pytest.approx(float(certified.members[0, n]), abs=1.5 * 4.0 / 2**24)


@pytest.mark.parametrize("norm", ["inf", "2"])
def test_no_attack_flips_a_certified_prediction(norm):
    base = _relu_ensemble(members=4, hidden=(16, 16), seed=2)
    # steeper weights than PyTorch's initial ones, so that small budgets flip some points
    ens = jostle.Ensemble(base.template, {k: 2.0 * v for k, v in base.params.items()}, meta=base.meta)
    g = torch.Generator().manual_seed(2)
    x = torch.rand(40, 2, generator=g) * 2 - 1
    flipped = 0
    for eps in (0.2, 0.3):
        cert = jostle.certify(ens, x, eps=eps, norm=norm)
        assert 0 < int(cert.predictive.sum()) < 40, "the budget should certify some points and not others"
        for method in ("pgd", "square"):
            adv = jostle.attack(ens, x, eps=eps, norm=norm, method=method, steps=60, seed=0)
            assert not bool((adv.success & cert.predictive).any()), (method, eps)
            flipped += int(adv.success.sum())
    assert flipped > 0, "the attacks should flip some uncertified points"
