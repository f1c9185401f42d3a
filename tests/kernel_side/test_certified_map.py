"""The certified-radius map layer against jostle.certified_radius called point by point."""
from __future__ import annotations

import numpy as np
import pytest
import torch

import jostle
from jostle.live.certified_map import MAP_ITERATIONS, map_levels, radius_map, radius_map_levels


def _ensemble(activation: str) -> jostle.Ensemble:
    generator = torch.Generator().manual_seed(3)
    nets = [jostle.init_parameters(jostle.mlp(2, 2, hidden=(8, 8), activation=activation), generator)
            for _ in range(4)]
    return jostle.Ensemble.from_modules(nets)


@pytest.mark.parametrize("method, norm, activation", [("ibp", "inf", "relu"), ("crown", "2", "tanh")])
def test_each_cell_equals_certified_radius_at_that_point(method, norm, activation):
    ens = _ensemble(activation)
    lo, hi = (-1.5, -1.0), (2.0, 1.5)
    found = radius_map(ens, 3, 5, lo, hi, norm=norm, method=method)
    box = (torch.tensor(lo, dtype=ens.dtype), torch.tensor(hi, dtype=ens.dtype))
    for j, y in enumerate(np.linspace(lo[1], hi[1], 5)):
        for i, x in enumerate(np.linspace(lo[0], hi[0], 5)):
            alone = jostle.certified_radius(ens[:3], torch.tensor([[x, y]], dtype=ens.dtype), norm=norm,
                                            method=method, bounds=box, iterations=MAP_ITERATIONS)
            # One point against 25 in a batch changes float reduction order; a verdict flipped by rounding
            # at a midpoint moves the end by at most the final bracket (top / 2**MAP_ITERATIONS): two of them.
            assert found.radius[j, i] == pytest.approx(float(alone.eps[0]), abs=2 * found.resolution)
    assert found.resolution == pytest.approx(found.top / 2**MAP_ITERATIONS)
    assert (found.radius >= 0).all() and (found.radius <= found.top).all()


def test_levels_go_coarse_to_fine_and_stop_when_told():
    ens = _ensemble("relu")
    assert map_levels(64) == (16, 32, 64) and map_levels(3) == (3,)
    shapes = [level.radius.shape for level in radius_map_levels(ens, 4, 8, (-1, -1), (1, 1), method="ibp")]
    assert shapes == [(4, 4), (8, 8)]
    calls = []
    stopped = list(radius_map_levels(ens, 4, 8, (-1, -1), (1, 1), method="ibp",
                                     keep_going=lambda: not calls.append(1) and len(calls) < 2))
    assert [level.radius.shape for level in stopped] == [(4, 4)]


def test_bad_grid_is_refused():
    with pytest.raises(ValueError, match="grid must be an integer >= 2; got 1"):
        map_levels(1)


@pytest.mark.parametrize("norm", ["inf", "2"])
def test_a_level_started_from_a_coarser_one_matches_a_cold_start(norm, monkeypatch):
    # IBP bounds grow with the ball, so each cell has one threshold radius and both brackets
    # (each at most top / 2**MAP_ITERATIONS wide) hold it: the ends differ by at most one bracket.
    ens = _ensemble("relu")
    lo, hi = (-1.5, -1.0), (2.0, 1.5)
    import importlib

    layer = importlib.import_module("jostle.live.certified_map")
    bounded, bound = [], layer.pair_bounds

    def counting(ens, x, *args):
        bounded.append(x.shape[0])
        return bound(ens, x, *args)

    monkeypatch.setattr(layer, "pair_bounds", counting)
    coarse = radius_map(ens, 4, 6, lo, hi, norm=norm, method="ibp")
    bounded.clear()
    cold = radius_map(ens, 4, 12, lo, hi, norm=norm, method="ibp")
    cold_cells, bounded[:] = sum(bounded), []
    warm = radius_map(ens, 4, 12, lo, hi, norm=norm, method="ibp", start=coarse)
    assert sum(bounded) < 0.8 * cold_cells, (sum(bounded), cold_cells)  # the point of the warm start
    np.testing.assert_allclose(warm.radius, cold.radius, atol=cold.resolution * (1 + 1e-5), rtol=0)
    assert (cold.radius > 0).any() and (cold.radius == 0).any(), "the grid should cross a decision boundary"
    box = (torch.tensor(lo, dtype=ens.dtype), torch.tensor(hi, dtype=ens.dtype))
    points = torch.tensor(np.stack(np.meshgrid(warm.xs, warm.ys), -1).reshape(-1, 2), dtype=ens.dtype)
    held = jostle.certify(ens, points, eps=torch.as_tensor(warm.radius.ravel(), dtype=ens.dtype), norm=norm,
                          method="ibp", bounds=box).predictive
    positive = torch.as_tensor(warm.radius.ravel() > 0)
    assert bool(held[positive].all()), "every positive radius drawn is a certified budget"
