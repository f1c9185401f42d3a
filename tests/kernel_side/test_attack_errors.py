"""Every user-facing error of the attack functions names the parameter, the rule and the value."""
import pytest
import torch

import jostle
from tests.kernel_side.test_attack_gradient import affine_ensemble, class0_points


@pytest.fixture
def ens():
    return affine_ensemble(members=2)


@pytest.fixture
def x():
    return class0_points()


@pytest.mark.parametrize("kwargs, message", [
    ({"eps": -0.1}, r"eps must be a finite float >= 0; got -0.1"),
    ({"eps": float("nan")}, r"eps must be a finite float >= 0; got nan"),
    ({"method": "boil"}, r"method must be one of 'fgsm', 'pgd', 'cw', 'spsa', 'square'; got 'boil'"),
    ({"norm": "1"}, r"norm must be one of \['inf', '2'\] for method 'pgd'; got '1'"),
    ({"objective": "hinge"},
     r"objective must be one of \['expected_loss', 'predictive', 'margin'\] for method 'pgd'; got 'hinge'"),
    ({"steps": 0}, r"steps must be an integer >= 1; got 0"),
    ({"samples": 5}, r"samples must be an integer in \[1, 2\]; got 5"),
    ({"samples": [0, 7]}, r"samples must index members in \[0, 2\)"),
    ({"resample": True}, r"resample=True needs samples=k"),
    ({"resample": True, "samples": [0]}, r"resample=True needs samples to be an int k"),
    ({"judge": "crowd"}, r"judge must be one of 'ensemble', 'attacker'; got 'crowd'"),
    ({"seed": -1}, r"seed must be an integer >= 0; got -1"),
    ({"threads": 0}, r"threads must be an integer >= 1; got 0"),
    ({"method": "cw", "norm": "inf"}, r"norm must be one of \['2'\] for method 'cw'; got 'inf'"),
    ({"method": "cw", "objective": "expected_loss"},
     r"objective must be one of \['margin'\] for method 'cw'; got 'expected_loss'"),
    ({"method": "square", "objective": "predictive"},
     r"objective must be one of \['margin'\] for method 'square'; got 'predictive'"),
    ({"method": "square", "p_init": 0.0}, r"p_init must be a finite float > 0 and <= 1; got 0"),
    ({"kappa": 1.0}, r"method 'pgd' takes options \[.*\]; got unknown \['kappa'\]"),
    ({"restarts": 3, "random_start": False}, r"restarts > 1 needs random_start=True"),
    ({"restarts": 0}, r"restarts must be an integer >= 1; got 0"),
    ({"step_size": 0.0}, r"step_size must be a finite float > 0; got 0"),
    ({"method": "cw", "norm": "2", "search_steps": 0}, r"search_steps must be an integer >= 1; got 0"),
    ({"method": "spsa", "directions": 0}, r"directions must be an integer >= 1; got 0"),
    ({"method": "spsa", "delta": -1.0}, r"delta must be a finite float > 0; got -1"),
    ({"method": "square", "p_init": 2.0}, r"p_init must be a finite float > 0 and <= 1; got 2"),
    ({"method": "square", "image_shape": (2, 2)}, r"image_shape must be \(H, W\) or \(C, H, W\) multiplying to 3"),
    ({"target": [0]}, r"target must have shape \(2,\); got shape \(1,\)"),
    ({"eps": [0.1, 0.2, 0.3]}, r"eps must be a float or hold one budget per point \(2\); got 3"),
    ({"method": "spsa", "eps": [0.1, 0.2]}, r"eps must be a finite float >= 0; got \[0.1, 0.2\]"),
])
def test_attack_refuses_bad_arguments(ens, x, kwargs, message):
    with pytest.raises(ValueError, match=message):
        jostle.attack(ens, x, **kwargs)


def test_attack_refuses_bad_inputs(ens, x):
    with pytest.raises(ValueError, match=r"x must have shape \(n_points, 3\) for this network; got shape \(2, 4\)"):
        jostle.attack(ens, torch.zeros(2, 4))
    with pytest.raises(ValueError, match=r"x must have shape \(n_points, \*input_shape\); got shape \(3,\)"):
        jostle.attack(ens, torch.zeros(3))
    with pytest.raises(ValueError, match=r"x must contain only finite values; got NaN or inf"):
        jostle.attack(ens, torch.full((2, 3), float("nan")))
    with pytest.raises(ValueError, match=r"y must have shape \(2,\); got shape \(3,\)"):
        jostle.attack(ens, x, y=[0, 1, 0])
    with pytest.raises(ValueError, match=r"y must hold labels < 2 \(the number of classes\); got 4"):
        jostle.attack(ens, x, y=[0, 4])
    with pytest.raises(TypeError, match=r"ens must be a jostle.Ensemble; got Linear"):
        jostle.attack(torch.nn.Linear(3, 2), x)


def test_attack_refuses_points_outside_the_bounds(x):
    boxed = affine_ensemble(bounds=[[-0.5] * 3, [0.5] * 3])
    with pytest.raises(ValueError, match=r'x must lie inside ens.meta\["bounds"\]; point 1, feature 0 is 1 > hi = 0.5'):
        jostle.attack(boxed, x)
    with pytest.raises(ValueError, match=r"x must lie inside bounds; point 0, feature 1 is -0.2 < lo = 0"):
        jostle.attack(affine_ensemble(), x, bounds=([0.0] * 3, [2.0] * 3))
    with pytest.raises(ValueError, match=r"bounds lo must be a scalar or hold 3 values; got 2"):
        jostle.attack(affine_ensemble(), x, bounds=([0.0] * 2, [2.0] * 2))
    with pytest.raises(ValueError, match=r"bounds must have lo <= hi in every feature"):
        jostle.attack(affine_ensemble(), x, bounds=(2.0, -2.0))
    with pytest.raises(ValueError, match=r"bounds must be a pair \(lo, hi\); got 3.0"):
        jostle.attack(affine_ensemble(), x, bounds=3.0)


def test_robustness_functions_refuse_bad_arguments(ens, x):
    with pytest.raises(ValueError, match=r"sample_counts entry must be an integer in \[1, 2\]; got 4"):
        jostle.gradient_fade(ens, x, sample_counts=(1, 4))
    with pytest.raises(ValueError, match=r"sample_counts must be a sequence of integers; got 3"):
        jostle.gradient_fade(ens, x, sample_counts=3)
    with pytest.raises(ValueError, match=r"sample_counts must hold at least one count; got an empty sequence"):
        jostle.gradient_fade(ens, x, sample_counts=())
    with pytest.raises(ValueError, match=r"repeats must be an integer >= 1; got 0"):
        jostle.gradient_fade(ens, x, repeats=0)
    with pytest.raises(ValueError, match=r"objective must be one of"):
        jostle.expected_gradient(ens, x, objective="nope")
    with pytest.raises(ValueError, match=r"iterations must be an integer >= 1; got 0"):
        jostle.minimal_budget(ens, x, iterations=0)
    with pytest.raises(ValueError, match=r"high must be a finite float > 0; got -1"):
        jostle.minimal_budget(ens, x, high=-1.0)
    with pytest.raises(ValueError, match=r"norm must be one of 'inf', '2'; got 'l1'"):
        jostle.minimal_budget(ens, x, norm="l1")
    with pytest.raises(ValueError, match=r"kind must be one of 'max', 'tv'; got 'kl'"):
        jostle.softmax_robustness(ens, x, x, kind="kl")
    with pytest.raises(ValueError, match=r"x_adv must have the shape of x \(2, 3\); got \(1, 3\)"):
        jostle.softmax_robustness(ens, x, x[:1])
    with pytest.raises(ValueError, match=r"reduce must be True or False; got 1"):
        jostle.softmax_robustness(ens, x, x, reduce=1)


def test_masking_check_refuses_bad_arguments(ens, x):
    with pytest.raises(ValueError, match=r"eps must be a finite float > 0; got 0"):
        jostle.masking_check(ens, x, eps=0.0)
    with pytest.raises(ValueError, match=r"gradient_free must be one of 'spsa', 'square' "
                                         r"\(the registered gradient-free attacks\); got 'pgd'"):
        jostle.masking_check(ens, x, gradient_free="pgd")
    with pytest.raises(ValueError, match=r"budget_scales must hold at least two distinct scales; got \[1.0\]"):
        jostle.masking_check(ens, x, budget_scales=[1.0])
    with pytest.raises(ValueError, match=r"tolerance must be a finite float >= 0 and <= 1; got 2"):
        jostle.masking_check(ens, x, tolerance=2.0)
    with pytest.raises(ValueError, match=r"few_samples must be an integer in \[1, 2\]; got 3"):
        jostle.masking_check(ens, x, few_samples=3)
    with pytest.raises(ValueError, match=r"free_steps must be an integer >= 1; got 0"):
        jostle.masking_check(ens, x, norm="2", gradient_free="square", free_steps=0)
