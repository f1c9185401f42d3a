"""SPSA and Square: the estimator's statistics and the random search's invariants.

Sources: Spall 1992 (SPSA), Andriushchenko et al. 2020 (Square Attack, L-inf and L2),
and the closed-form distance from a point to a hyperplane, |w.x + b| / |w|_2.
"""
import pytest
import torch
from torch import nn

import jostle
from jostle.attacks.gradient_free import _bump, _propose_sphere, spsa_gradient, square_fraction
from tests.conftest import random_mlp_ensemble
from tests.kernel_side.test_attack_gradient import B, W, affine_ensemble, class0_points


def test_spsa_is_unbiased_on_a_quadratic_with_the_rademacher_variance():
    # Spall 1992: on a quadratic the central difference is exact, so the estimate
    # v (v'g) is unbiased, with per-coordinate variance |g|^2 - g_i^2 for Rademacher v.
    g = torch.Generator().manual_seed(0)
    d = 5
    a = torch.randn(d, d, generator=g, dtype=torch.float64)
    a = a @ a.T
    b = torch.randn(d, generator=g, dtype=torch.float64)
    x0 = torch.randn(d, generator=g, dtype=torch.float64)
    grad = a @ x0 + b

    def quadratic(z):
        return 0.5 * ((z @ a) * z).sum(-1) + z @ b

    draws = 40_000
    estimates = spsa_gradient(quadratic, x0.expand(draws, d), delta=0.3, directions=1, generator=g)
    # Exact central difference: every coordinate of one estimate has the same size |v'g|.
    assert float((estimates.abs() - estimates.abs()[:, :1]).abs().max()) < 1e-9
    standard_error = (grad.norm() ** 2 - grad ** 2).sqrt() / draws ** 0.5
    assert bool(((estimates.mean(0) - grad).abs() <= 4 * standard_error).all())
    # Coordinate i is g_i + Z with Z = sum_{j != i} g_j u_j, u Rademacher: Var Z = s2 and
    # E Z^4 = 3 s2^2 - 2 s4 (s_k = sum_{j != i} g_j^k), so the sample variance has standard
    # error sqrt((E Z^4 - s2^2) / n); allow 5 of them.
    s2, s4 = grad.norm() ** 2 - grad ** 2, (grad ** 4).sum() - grad ** 4
    variance_error = ((2 * s2 ** 2 - 2 * s4) / draws).sqrt()
    assert bool(((estimates.var(0) - s2).abs() <= 5 * variance_error).all())


def test_spsa_attack_matches_the_affine_optimum():
    # Goodfellow et al. 2015 linear view: the sign of the SPSA estimate is -sign(w).
    ens, x = affine_ensemble(), class0_points()
    adv = jostle.attack(ens, x, method="spsa", eps=0.3, steps=10, directions=16)
    # float32: x + delta and back round to an ulp of |x| <= 4 (~5e-7)
    torch.testing.assert_close(adv.x_adv - x, (-0.3 * W.sign()).expand_as(x), atol=1e-6, rtol=0)
    assert adv.success.tolist() == [False, True]
    assert adv.queries.tolist() == [10 * 33 + 1] * 2


def test_square_stays_on_corners_and_its_margin_never_rises():
    # Andriushchenko et al. 2020: every coordinate of delta is +-eps; proposals are kept
    # only if the margin falls; one query per iteration while a point is not yet flipped.
    ens, _ = random_mlp_ensemble(members=4, classes=3, hidden=(16,), seed=5)
    x = torch.randn(40, 2, generator=torch.Generator().manual_seed(5))
    adv = jostle.attack(ens, x, method="square", eps=0.4, steps=60)
    delta = adv.path - x
    # float32: x + delta and back round to an ulp of |x| <= 4 (~5e-7)
    torch.testing.assert_close(delta.abs(), torch.full_like(delta, 0.4), atol=1e-6, rtol=0)
    assert bool((adv.margin[1:] <= adv.margin[:-1]).all())
    active_iterations = (adv.margin[:-1] >= 0).sum(0)
    assert torch.equal(adv.queries, 1 + active_iterations)
    torch.testing.assert_close(adv.loss, -adv.margin)
    assert torch.equal(adv.success, adv.adv_label != adv.label)


def test_square_windows_on_images_keep_the_corners():
    g = torch.Generator().manual_seed(1)
    head = nn.Linear(64, 10)
    with torch.no_grad():
        head.weight.copy_(torch.randn(10, 64, generator=g))
    ens = jostle.Ensemble.from_modules([head], meta={"bounds": [[0.0] * 64, [1.0] * 64], "image_shape": [8, 8]})
    x = 0.3 + 0.4 * torch.rand(6, 64, generator=g)
    adv = jostle.attack(ens, x, method="square", eps=0.1, steps=80)
    # float32: x + delta and back round to an ulp of |x| <= 1 (6e-8), clamping is exact
    torch.testing.assert_close((adv.x_adv - x).abs(), torch.full_like(x, 0.1), atol=1e-6, rtol=0)
    assert bool((adv.margin[1:] <= adv.margin[:-1]).all())
    assert float(adv.margin[-1].mean()) < float(adv.margin[0].mean())


def test_square_schedule_halves_on_the_published_iterations():
    # Andriushchenko et al. 2020: p halves at 10, 50, 200, 500, 1000, ... of 10,000 iterations.
    # halving by powers of two is exact in binary floats
    assert square_fraction(0.08, 0, 10_000) == 0.08
    assert square_fraction(0.08, 11, 10_000) == 0.04
    assert square_fraction(0.08, 51, 10_000) == 0.02
    assert square_fraction(0.08, 9_999, 10_000) == 0.08 / 2 ** 9
    assert square_fraction(0.08, 50, 100) == 0.08 / 2 ** 7


# ---------------------------------------------------------------- L2 square search
def test_square_l2_stays_on_the_sphere_and_its_margin_never_rises():
    # Every iterate keeps |delta|_2 = eps (no bounds here, so nothing is clipped); greedy
    # acceptance (Andriushchenko et al. 2020) means the margin never increases.
    ens, _ = random_mlp_ensemble(members=4, in_features=5, classes=3, hidden=(16,), seed=6)
    x = torch.randn(30, 5, generator=torch.Generator().manual_seed(6))
    adv = jostle.attack(ens, x, method="square", norm="2", eps=0.5, steps=80)
    sizes = (adv.path - x).flatten(2).norm(dim=2)
    # float32: rescaling onto the sphere and x + delta round to a few ulp of |x| <= 4
    torch.testing.assert_close(sizes, torch.full_like(sizes, 0.5), atol=1e-6, rtol=0)
    assert bool((adv.margin[1:] <= adv.margin[:-1]).all())
    assert float(adv.margin[-1].mean()) < float(adv.margin[0].mean())
    active_iterations = (adv.margin[:-1] >= 0).sum(0)
    assert torch.equal(adv.queries, 1 + active_iterations)
    torch.testing.assert_close(adv.distance, torch.full_like(adv.distance, 0.5), atol=1e-6, rtol=0)  # as above


@pytest.mark.parametrize("point", [0, 1])
def test_square_l2_flips_an_affine_score_only_beyond_the_minimal_distance(point):
    # Closed form: a linear score w.x + b > 0 is flipped by an L2 perturbation of size
    # eps iff eps > (w.x + b) / |w|_2 (the distance to the hyperplane).
    ens, x = affine_ensemble(), class0_points()[point:point + 1]
    distance = float((x @ W + B) / W.norm())
    below = jostle.attack(ens, x, method="square", norm="2", eps=0.95 * distance, steps=200)
    beyond = jostle.attack(ens, x, method="square", norm="2", eps=1.3 * distance, steps=200)
    assert not bool(below.success.any())
    assert bool(beyond.success.all())
    assert float(beyond.distance.max()) <= 1.3 * distance * (1 + 1e-6)


def test_square_l2_on_images_keeps_the_budget_inside_the_box():
    # Bounds [0, 1]: clipping can only shorten the perturbation, never lengthen it.
    g = torch.Generator().manual_seed(2)
    head = nn.Linear(64, 10)
    with torch.no_grad():
        head.weight.copy_(torch.randn(10, 64, generator=g))
    ens = jostle.Ensemble.from_modules([head], meta={"bounds": [[0.0] * 64, [1.0] * 64], "image_shape": [8, 8]})
    x = torch.rand(6, 64, generator=g)
    adv = jostle.attack(ens, x, method="square", norm="2", eps=1.0, steps=100)
    sizes = (adv.path - x).flatten(2).norm(dim=2)
    assert float(sizes.max()) <= 1.0 + 1e-6
    assert float(adv.path.min()) >= 0.0 and float(adv.path.max()) <= 1.0
    assert bool((adv.margin[1:] <= adv.margin[:-1]).all())
    assert float(adv.margin[-1].mean()) < float(adv.margin[0].mean())


def test_square_l2_bump_is_unit_and_falls_off_ring_by_ring():
    for side in (1, 2, 3, 4, 5, 8):
        bump = _bump(side, torch.float64)
        assert bump.shape == (side, side)
        torch.testing.assert_close(bump.norm(), torch.tensor(1.0, dtype=torch.float64))
        centre = (side - 1) / 2
        ring = torch.maximum((torch.arange(side) - centre).abs()[:, None], (torch.arange(side) - centre).abs()[None, :])
        order = ring.flatten().argsort()
        values = bump.flatten()[order]
        assert bool((values[1:] <= values[:-1] + 1e-12).all())  # never larger further out
        torch.testing.assert_close(bump, bump.T)  # symmetric


def test_square_l2_proposal_moves_energy_inside_two_windows():
    # One proposal on an image whose perturbation has energy everywhere: the norm is kept,
    # and at most two h x h windows per channel change.
    from jostle.attacks.problem import build_problem

    channels, height, width = 2, 6, 6
    ens = jostle.Ensemble.from_modules([nn.Sequential(nn.Flatten(), nn.Linear(72, 3))])
    x = torch.zeros(5, channels, height, width)
    problem = build_problem(ens, x, None, eps=2.0, norm="2", objective="margin", samples=None, resample=False,
                            target=None, bounds=None, seed=3)
    delta = torch.rand(5, channels, height, width, generator=torch.Generator().manual_seed(3)) + 0.1
    delta = delta / delta.flatten(1).norm(dim=1).view(-1, 1, 1, 1) * 2.0
    for fraction in (0.05, 0.2, 0.5):
        side = max(1, min(height - 1, int(round((fraction * height * width) ** 0.5))))
        moved = _propose_sphere(problem, delta, torch.arange(5), (channels, height, width), fraction, 0.05)
        torch.testing.assert_close(moved.flatten(1).norm(dim=1), torch.full((5,), 2.0), atol=1e-5, rtol=0)
        changed = (moved != delta).flatten(2).sum(2)  # per point and channel
        assert bool((changed <= 2 * side * side).all()) and bool((changed > 0).all())
        emptied = ((moved == 0) & (delta != 0)).flatten(2).sum(2)
        assert bool((emptied <= side * side).all())


def test_square_l2_in_the_masking_check():
    ens, _ = random_mlp_ensemble(members=4, classes=2, hidden=(8,), seed=3)
    x = torch.randn(10, 2, generator=torch.Generator().manual_seed(3))
    report = jostle.masking_check(ens, x, eps=0.5, norm="2", gradient_free="square", steps=5, free_steps=20)
    assert "square" in report.rates


@pytest.mark.parametrize("norm", ["inf", "2"])
def test_square_finds_the_image_shape_a_fit_recorded(norm):
    # Fits record the data set's description under meta["data"]; Square reads its image
    # shape from there when the ensemble itself does not carry one.
    head = nn.Sequential(nn.Linear(16, 3))
    ens = jostle.Ensemble.from_modules([head], meta={"data": {"name": "tiles", "image_shape": [4, 4]},
                                                     "bounds": [[0.0] * 16, [1.0] * 16]})
    x = torch.full((2, 16), 0.5)
    adv = jostle.attack(ens, x, method="square", norm=norm, eps=0.1, steps=3)
    assert adv.info["image_shape"] == [1, 4, 4]
    plain = jostle.Ensemble.from_modules([head])
    assert jostle.attack(plain, x, method="square", norm=norm, eps=0.1, steps=3).info["image_shape"] is None
