"""The attack registry: one registration makes a method available everywhere it is offered.

The test attack ``random_sign`` (tests/conftest.py) puts every coordinate of the
perturbation at +-eps, the corner property of the L-inf ball that Square Attack's
iterates also have (Andriushchenko et al. 2020); with no bounds the projection leaves
it there, so |x_adv - x| = eps coordinate by coordinate.
"""
import pytest
import torch

import jostle
import jostle.live.engine as live
from jostle.attacks.run import (
    attack_choices,
    attack_names,
    attack_spec,
    registered_norms,
)
from jostle.sweeps.spec import SweepConfigError, check_evaluation
from tests.conftest import random_mlp_ensemble


@pytest.fixture(scope="module")
def ens():
    return random_mlp_ensemble(members=3, in_features=2, classes=3)[0]


def test_the_built_in_attacks_are_registered_with_their_norms_and_objectives():
    assert attack_names() == ("fgsm", "pgd", "cw", "spsa", "square")
    assert attack_spec("cw").norms == ("2",) and attack_spec("cw").objectives == ("margin",)
    assert attack_spec("square").objectives == ("margin",) and attack_spec("square").gradient_free
    assert not attack_spec("pgd").gradient_free and attack_spec("pgd").norms[0] == "inf"
    assert [n for n, c in attack_choices().items() if c["gradient_free"]] == ["spsa", "square"]


def test_norm_and_objective_default_to_the_methods_own(ens):
    x = torch.zeros(2, 2)
    adv = jostle.attack(ens, x, method="cw", eps=0.5, steps=3, search_steps=2)
    assert (adv.norm, adv.objective) == ("2", "margin")
    adv = jostle.attack(ens, x, method="pgd", eps=0.1, steps=2)
    assert (adv.norm, adv.objective) == ("inf", "expected_loss")


def test_a_registered_attack_runs_through_attack(ens, random_sign_attack):
    x = torch.tensor([[0.2, -0.4], [1.0, 0.5], [-0.3, 0.0]])
    adv = jostle.attack(ens, x, method=random_sign_attack, eps=0.25)
    assert adv.method == "random_sign" and (adv.norm, adv.objective) == ("inf", "margin")
    # |(x + 0.25 s) - x| = 0.25 up to one float32 rounding of each sum (ulp(1) = 1.2e-7)
    torch.testing.assert_close((adv.x_adv - x).abs(), torch.full_like(x, 0.25), rtol=0, atol=2.4e-7)
    same = jostle.attack(ens, x, method=random_sign_attack, eps=0.25)
    assert torch.equal(adv.x_adv, same.x_adv)  # same seed, same draws
    with pytest.raises(ValueError, match=r"norm must be one of \['inf'\] for method 'random_sign'; got '2'"):
        jostle.attack(ens, x, method=random_sign_attack, norm="2")
    with pytest.raises(ValueError, match=r"method 'random_sign' takes options \['record_path'\]; got unknown"):
        jostle.attack(ens, x, method=random_sign_attack, kappa=1.0)


def test_a_registered_attack_reaches_the_live_engine_and_the_sweep(ens, random_sign_attack):
    assert live.check_field(ens, "method", random_sign_attack) == "random_sign"
    view = live.compute_view(ens, live.ExplorerState(point=(0.1, 0.2), budget=0.3, method=random_sign_attack,
                                                     objective="margin", grid=0, fade_repeats=1))
    assert view.errors == [] and view.attack is not None
    assert view.attack.distance == pytest.approx(0.3, abs=2.4e-7)  # L-inf norm of a corner step
    evaluation = check_evaluation({"attacks": [{"method": random_sign_attack}]}, "sweep.evaluation")
    assert evaluation["attacks"] == [{"method": "random_sign", "norm": "inf", "steps": 1, "samples": None,
                                      "objective": "margin", "label": "random_sign-inf"}]
    with pytest.raises(SweepConfigError, match=r"^sweep\.evaluation\.attacks\[0\]\.objective: objective must be "
                                               r"one of \['margin', 'expected_loss'\] for method 'random_sign'"):
        check_evaluation({"attacks": [{"method": random_sign_attack, "objective": "predictive"}]}, "sweep.evaluation")


def test_masking_check_offers_a_registered_gradient_free_attack(ens, random_sign_attack):
    x = torch.tensor([[0.2, -0.4], [1.0, 0.5]])
    report = jostle.masking_check(ens, x, eps=0.3, steps=3, gradient_free=random_sign_attack)
    assert set(report.rates) == {"pgd", "pgd_few_samples", "fgsm", "random_sign"}
    with pytest.raises(ValueError, match=r"norm must be one of \['inf'\] for method 'random_sign'; got '2'"):
        jostle.masking_check(ens, x, norm="2", gradient_free=random_sign_attack)


def test_an_unregistered_attack_is_gone_everywhere(ens, random_sign_attack):
    jostle.unregister_attack(random_sign_attack)
    try:
        with pytest.raises(ValueError, match=r"method must be one of 'fgsm', 'pgd', 'cw', 'spsa', 'square'; "
                                             r"got 'random_sign'"):
            jostle.attack(ens, torch.zeros(1, 2), method="random_sign")
        with pytest.raises(ValueError, match=r"method must be one of .*; got 'random_sign'"):
            live.check_field(ens, "method", "random_sign")
        with pytest.raises(SweepConfigError, match=r"unknown attack 'random_sign'"):
            check_evaluation({"attacks": ["random_sign"]}, "sweep.evaluation")
        assert "random_sign" not in attack_choices() and registered_norms() == ("inf", "2")
    finally:  # the fixture unregisters it again on the way out
        from tests.conftest import random_sign
        jostle.register_attack("random_sign", norms=("inf",), objectives=("margin",), gradient_free=True,
                               description="restored for the fixture", function=random_sign)


@pytest.mark.parametrize("kwargs, message", [
    ({"name": "pgd"}, r"name must not be registered already; got 'pgd'"),
    ({"name": "two words"}, r"name must be a Python identifier; got 'two words'"),
    ({"norms": ()}, r"norms must be a non-empty sequence drawn from \['inf', '2'\]; got \(\)"),
    ({"norms": ("1",)}, r"norms must be distinct values drawn from \['inf', '2'\]; got \('1',\)"),
    ({"objectives": "margin"}, r"objectives must be a non-empty sequence drawn from"),
    ({"gradient_free": 1}, r"gradient_free must be True or False; got 1"),
    ({"description": "two\nlines"}, r"description must be one non-empty line"),
    ({"function": 3}, r"function must be callable; got 3"),
])
def test_register_attack_refuses_bad_records(kwargs, message):
    record = dict(name="fresh", norms=("inf",), objectives=("margin",), gradient_free=True,
                  description="a test record", function=lambda problem, steps: None)
    record.update(kwargs)
    with pytest.raises(ValueError, match=message):
        jostle.register_attack(**record)
    assert "fresh" not in attack_names()


def test_a_method_with_one_norm_uses_it_when_norm_is_not_given(ens):
    # The default comes from the method's record, not from a special case for cw: an attack
    # registered with L2 alone runs in L2 without norm=, and refuses L-inf by name.
    from tests.conftest import random_sign
    jostle.register_attack("sphere_only", norms=("2",), objectives=("margin",), gradient_free=True,
                           description="a random corner projected onto the L2 ball", function=random_sign)
    try:
        x = torch.tensor([[0.2, -0.4], [1.0, 0.5]])
        adv = jostle.attack(ens, x, method="sphere_only", eps=0.3)
        assert adv.norm == "2"
        # L2 projection: |delta|_2 <= eps up to the projection's own rounding guard (problem._tighten)
        assert bool(((adv.x_adv - x).norm(dim=1) <= 0.3).all())
        with pytest.raises(ValueError, match=r"norm must be one of \['2'\] for method 'sphere_only'; got 'inf'"):
            jostle.attack(ens, x, method="sphere_only", norm="inf")
    finally:
        jostle.unregister_attack("sphere_only")
    cw = jostle.attack(ens, x, method="cw", eps=0.5, steps=3, search_steps=2)
    assert cw.norm == "2" and bool((cw.distance <= 0.5).all())
