"""SPSA and Square: the estimator's statistics and the random search's invariants."""
import torch
from torch import nn

import jostle
from jostle.attack_free import spsa_gradient, square_fraction
from tests.conftest import random_mlp_ensemble
from tests.kernel_side.test_attack_gradient import W, affine_ensemble, class0_points


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
    torch.testing.assert_close(estimates.var(0), grad.norm() ** 2 - grad ** 2, rtol=0.05, atol=0)


def test_spsa_attack_matches_the_affine_optimum():
    # Goodfellow et al. 2015 linear view: the sign of the SPSA estimate is -sign(w).
    ens, x = affine_ensemble(), class0_points()
    adv = jostle.attack(ens, x, method="spsa", eps=0.3, steps=10, directions=16)
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
    torch.testing.assert_close((adv.x_adv - x).abs(), torch.full_like(x, 0.1), atol=1e-6, rtol=0)
    assert bool((adv.margin[1:] <= adv.margin[:-1]).all())
    assert float(adv.margin[-1].mean()) < float(adv.margin[0].mean())


def test_square_schedule_halves_on_the_published_iterations():
    # Andriushchenko et al. 2020: p halves at 10, 50, 200, 500, 1000, ... of 10,000 iterations.
    assert square_fraction(0.08, 0, 10_000) == 0.08
    assert square_fraction(0.08, 11, 10_000) == 0.04
    assert square_fraction(0.08, 51, 10_000) == 0.02
    assert square_fraction(0.08, 9_999, 10_000) == 0.08 / 2 ** 9
    assert square_fraction(0.08, 50, 100) == 0.08 / 2 ** 7
