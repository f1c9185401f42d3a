"""Every attack returns x_adv inside the eps-ball and the data bounds, for every norm it supports.

The ball is the attack's budget (Madry et al. 2018 define the threat model as the eps-ball
intersected with the input box); softmax robustness in sweeps is scored at ``x_adv``, so a
point outside the ball would be scored as if it were within the budget. Carlini & Wagner
(2017) search for the smallest flipping perturbation at any distance; the closest flip
beyond the budget is reported in ``info``, not returned as ``x_adv``.
"""
import pytest
import torch

import jostle
from tests.conftest import random_mlp_ensemble
from tests.kernel_side.test_attack_gradient import B, W, affine_ensemble, class0_points

# Every method with every norm it supports (C&W is an L2 attack).
METHOD_NORMS = [("fgsm", "inf"), ("fgsm", "2"), ("pgd", "inf"), ("pgd", "2"), ("cw", "2"),
                ("spsa", "inf"), ("spsa", "2"), ("square", "inf"), ("square", "2")]
# The budget holds as computed: projections end with a pass that removes float32 rounding
# (eps ~1.2e-7 per coordinate); 1e-6 is the contract's stated slack.
SLACK = 1e-6


def _assert_inside(adv, x, eps, norm, lo=None, hi=None):
    delta = (adv.x_adv - x).flatten(1)
    size = delta.abs().amax(1) if norm == "inf" else delta.norm(dim=1)
    assert float(size.max()) <= eps + SLACK, f"largest |x_adv - x| is {float(size.max())} > eps {eps}"
    torch.testing.assert_close(adv.distance, size, atol=SLACK, rtol=0)
    if lo is not None:
        assert bool((adv.x_adv >= lo - SLACK).all() and (adv.x_adv <= hi + SLACK).all())


@pytest.mark.parametrize("method, norm", METHOD_NORMS)
def test_x_adv_inside_ball_and_bounds_on_random_ensembles(method, norm):
    ens, _ = random_mlp_ensemble(members=4, classes=3, hidden=(16,), seed=21)
    g = torch.Generator().manual_seed(21)
    x = torch.rand(24, 2, generator=g) * 2.0 - 1.0
    lo, hi = torch.tensor([-1.05, -1.0]), torch.tensor([1.0, 1.1])
    # A small budget, so that many closest flips lie beyond it.
    eps = 0.15
    adv = jostle.attack(ens, x, method=method, norm=norm, eps=eps, steps=30, bounds=(lo, hi), seed=3)
    _assert_inside(adv, x, eps, norm, lo, hi)
    # Success is judged at x_adv itself, on the whole ensemble (as sweeps score it).
    assert torch.equal(adv.success, ens.predict(adv.x_adv).label != adv.label)


@pytest.mark.parametrize("method, norm", METHOD_NORMS)
def test_x_adv_inside_ball_on_the_affine_closed_form(method, norm):
    # Affine score s = w'x + b; the first point needs |s| / |w|_dual > eps to flip
    # (Goodfellow et al. 2015 linear view; Moosavi-Dezfooli et al. 2016 affine case).
    ens, x = affine_ensemble(), class0_points()
    eps = 0.2
    adv = jostle.attack(ens, x, method=method, norm=norm, eps=eps, steps=60, seed=1)
    _assert_inside(adv, x, eps, norm)
    dual = 1 if norm == "inf" else 2
    needed = (x @ W + B).abs() / W.norm(p=dual)
    assert float(needed[0]) > eps
    assert not bool(adv.success[0])


def test_cw_out_of_budget_flip_goes_to_info_and_x_adv_is_the_best_point_in_the_ball():
    # Affine closed form: the closest L2 flip of point 0 lies at |s| / |w|_2 = 0.546 > eps;
    # inside the ball the score is lowest at x - eps w / |w|, where it equals |s| - eps |w|_2.
    ens, x = affine_ensemble(), class0_points()
    eps = 0.2
    adv = jostle.attack(ens, x, method="cw", norm="2", eps=eps, steps=100, search_steps=6)
    score = x @ W + B
    minimal = score.abs() / W.norm()
    assert adv.success.tolist() == [False, True]
    assert adv.info["beyond_budget"].tolist() == [True, False]
    # C&W converges to the minimal distance within its Adam tolerance (1% as in
    # test_cw_finds_the_minimal_l2_distance).
    found = torch.as_tensor(adv.info["closest_flip_distance"])
    torch.testing.assert_close(found, minimal, rtol=0.01, atol=0)
    flip = torch.as_tensor(adv.info["closest_flip"])
    assert bool(((flip @ W + B) < 0).all())  # both recorded points do flip the score's sign
    torch.testing.assert_close((flip - x).norm(dim=1), found, atol=1e-6, rtol=0)
    # Point 0: x_adv lies on the sphere |delta| = eps along -w; its score is within 1% of
    # the in-ball optimum (the C&W direction converges to -w; the projection keeps it).
    torch.testing.assert_close((adv.x_adv[0] - x[0]).norm(), torch.tensor(eps), atol=SLACK, rtol=0)
    best_inside = score[0] - eps * W.norm()
    torch.testing.assert_close(adv.x_adv[0] @ W + B, best_inside, rtol=0.01, atol=0)
    # Point 1 flips within the budget: x_adv is the closest flip itself.
    torch.testing.assert_close(adv.x_adv[1], flip[1], atol=0, rtol=0)


def test_cw_x_adv_is_the_unattacked_point_when_nothing_inside_the_ball_helps():
    # eps = 0: the ball is x itself, whatever C&W finds outside it.
    ens, x = affine_ensemble(), class0_points()
    adv = jostle.attack(ens, x, method="cw", norm="2", eps=0.0, steps=40, search_steps=3)
    assert torch.equal(adv.x_adv, x)
    assert adv.success.tolist() == [False, False]
    assert adv.info["beyond_budget"].tolist() == [True, True]
