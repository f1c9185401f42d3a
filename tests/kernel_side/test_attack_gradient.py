"""FGSM, PGD and C&W against closed forms on affine classifiers, plus budget invariants.

For an affine two-class score s(x) = w'x + b (class 0 minus class 1), the worst L-inf
perturbation is along -sign(w), the worst L2 one along -w/|w|, and the smallest flipping
budget is |s(x)| / |w|_dual with the dual norm L1 for L-inf and L2 for L2 (Goodfellow
et al. 2015, linear view; Moosavi-Dezfooli et al. 2016, affine case).
"""
import pytest
import torch
from torch import nn

import jostle
from tests.conftest import random_mlp_ensemble

W = torch.tensor([1.0, -2.0, 0.5])
B = 0.3


def affine_ensemble(members: int = 1, bounds=None) -> jostle.Ensemble:
    layer = nn.Linear(3, 2)
    with torch.no_grad():
        layer.weight.copy_(torch.stack([W, torch.zeros(3)]))
        layer.bias.copy_(torch.tensor([B, 0.0]))
    meta = {} if bounds is None else {"bounds": bounds}
    return jostle.Ensemble.from_modules([nn.Sequential(layer)] * members, meta=meta)


def class0_points() -> torch.Tensor:
    # Scores 1.25 and 0.35: both predicted class 0.
    return torch.tensor([[0.5, -0.2, 0.1], [1.0, 0.4, -0.3]])


@pytest.mark.parametrize("method", ["fgsm", "pgd"])
def test_linf_worst_case_is_minus_sign_w(method):
    # Goodfellow et al. 2015: the L-inf optimum for a linear score is eps * -sign(w).
    ens, x = affine_ensemble(), class0_points()
    adv = jostle.attack(ens, x, method=method, eps=0.3, norm="inf")
    expected = (-0.3 * W.sign()).expand_as(x)
    torch.testing.assert_close(adv.x_adv - x, expected, atol=1e-6, rtol=0)


def test_l2_worst_case_is_minus_w_direction():
    # Moosavi-Dezfooli et al. 2016 affine case: the L2 optimum is eps * -w / |w|.
    ens, x = affine_ensemble(), class0_points()
    expected = (-0.3 * W / W.norm()).expand_as(x)
    fgsm = jostle.attack(ens, x, method="fgsm", eps=0.3, norm="2")
    torch.testing.assert_close(fgsm.x_adv - x, expected, atol=1e-6, rtol=0)
    pgd = jostle.attack(ens, x, method="pgd", eps=0.3, norm="2", random_start=False)
    torch.testing.assert_close(pgd.x_adv - x, expected, atol=1e-6, rtol=0)
    # From a random start, the projected steps still turn towards -w (cosine > 0.98).
    started = jostle.attack(ens, x, method="pgd", eps=0.3, norm="2", steps=100)
    cosine = torch.nn.functional.cosine_similarity(started.x_adv - x, expected, dim=1)
    assert bool((cosine > 0.98).all())


@pytest.mark.parametrize("norm, dual", [("inf", 1), ("2", 2)])
def test_success_exactly_beyond_the_flipping_budget(norm, dual):
    # Smallest flipping budget |w'x + b| / |w|_dual (affine closed form above).
    ens, x = affine_ensemble(), class0_points()
    budget = (x @ W + B).abs() / W.norm(p=dual)
    for scale, flips in ((0.97, False), (1.03, True)):
        adv = jostle.attack(ens, x, method="pgd", eps=budget * scale, norm=norm, random_start=False)
        assert adv.success.tolist() == [flips, flips]


def test_cw_finds_the_minimal_l2_distance():
    # Carlini & Wagner 2017 L2 on an affine score: the closest flip lies at |s| / |w|_2.
    ens, x = affine_ensemble(bounds=[[-3.0] * 3, [3.0] * 3]), class0_points()
    minimal = (x @ W + B).abs() / W.norm()
    adv = jostle.attack(ens, x, method="cw", norm="2", eps=1.0, steps=150, search_steps=8)
    assert bool(adv.success.all())
    assert bool((adv.distance >= minimal - 1e-5).all())
    torch.testing.assert_close(adv.distance, minimal, rtol=0.01, atol=0)
    assert bool((adv.x_adv.abs() <= 3.0).all())


def test_cw_counts_success_only_within_eps():
    ens, x = affine_ensemble(), class0_points()
    adv = jostle.attack(ens, x, method="cw", norm="2", eps=0.2, steps=100, search_steps=6)
    # The first point needs 0.546 (> eps): flipped, but not within the budget.
    assert adv.info["flipped"].tolist() == [True, True]
    assert adv.success.tolist() == [False, True]


@pytest.mark.parametrize("norm", ["inf", "2"])
def test_every_pgd_iterate_inside_ball_and_bounds(norm):
    # Madry et al. 2018: every iterate lies in the eps-ball (+1e-7) and the input box.
    ens, _ = random_mlp_ensemble(members=4, classes=2, hidden=(16,), seed=3)
    g = torch.Generator().manual_seed(0)
    x = torch.rand(30, 2, generator=g) * 3.0 - 1.5
    lo, hi = torch.tensor([-1.6, -1.5]), torch.tensor([1.5, 1.55])
    eps = 0.4
    adv = jostle.attack(ens, x, method="pgd", eps=eps, norm=norm, steps=25, bounds=(lo, hi), restarts=2)
    delta = adv.path - x
    size = delta.abs().amax(-1) if norm == "inf" else delta.norm(dim=-1)
    assert float(size.max()) <= eps + 1e-7
    assert bool((adv.path >= lo).all() and (adv.path <= hi).all())
    assert adv.path.shape == (26, 30, 2) and adv.loss.shape == (26, 30)


def test_pgd_is_deterministic_under_a_seed():
    ens, _ = random_mlp_ensemble(members=4, classes=2, seed=1)
    x = torch.randn(10, 2, generator=torch.Generator().manual_seed(2))
    first = jostle.attack(ens, x, eps=0.3, seed=7, samples=2, resample=True)
    again = jostle.attack(ens, x, eps=0.3, seed=7, samples=2, resample=True)
    other = jostle.attack(ens, x, eps=0.3, seed=8, samples=2, resample=True)
    # same call, same seed, one process: exact
    assert torch.equal(first.path, again.path) and torch.equal(first.loss, again.loss)
    assert not torch.equal(first.path, other.path)


def test_pgd_ascends_the_objective_and_fgsm_takes_one_step():
    ens, _ = random_mlp_ensemble(members=5, classes=2, hidden=(16,), seed=4)
    x = torch.randn(40, 2, generator=torch.Generator().manual_seed(5))
    pgd = jostle.attack(ens, x, eps=0.3, random_start=False)
    fgsm = jostle.attack(ens, x, method="fgsm", eps=0.3)
    assert fgsm.path.shape == (2, 40, 2)
    # Iterative ascent reaches at least FGSM's objective (common practice, small slack).
    assert float((pgd.loss[-1] - fgsm.loss[-1]).min()) > -1e-3
    assert float((pgd.loss[-1] - pgd.loss[0]).min()) >= 0.0


def test_targeted_attack_reaches_the_target():
    ens, _ = random_mlp_ensemble(members=3, classes=3, hidden=(16,), seed=6)
    x = torch.randn(20, 2, generator=torch.Generator().manual_seed(6))
    clean = ens.predict(x).label
    target = (clean + 1) % 3
    adv = jostle.attack(ens, x, eps=3.0, steps=60, target=target)
    assert torch.equal(adv.success, adv.adv_label == target)
    assert adv.success_rate > 0.5


@pytest.mark.parametrize("threads", ["auto", 1, None])
def test_thread_setting_is_restored(threads):
    ens, x = affine_ensemble(), class0_points()
    before = torch.get_num_threads()
    plain = jostle.attack(ens, x, eps=0.2, threads=None)
    limited = jostle.attack(ens, x, eps=0.2, threads=threads)
    assert torch.get_num_threads() == before
    # An affine model's gradient is w whatever the thread count, so the L-inf sign steps
    # (and the whole path) are the same floats: exact.
    assert torch.equal(plain.path, limited.path)


def test_int_samples_attack_with_the_first_members_and_judge_on_all():
    ens, _ = random_mlp_ensemble(members=6, classes=2, hidden=(16,), seed=8)
    x = torch.randn(30, 2, generator=torch.Generator().manual_seed(8))
    partial = jostle.attack(ens, x, eps=0.5, samples=2)
    first_two = jostle.attack(ens[:2], x, partial.label, eps=0.5)
    torch.testing.assert_close(partial.path, first_two.path)
    # Success is judged on the whole ensemble unless the call says otherwise.
    assert torch.equal(partial.success, ens.predict(partial.x_adv).label != partial.label)
    own = jostle.attack(ens, x, partial.label, eps=0.5, samples=2, judge="attacker")
    assert torch.equal(own.success, first_two.success)


def test_small_memory_budget_changes_nothing():
    # map_logits chunks over points; the attack must not depend on the chunking.
    ens, _ = random_mlp_ensemble(members=5, classes=3, hidden=(16, 16), seed=10)
    tight = jostle.Ensemble(ens.template, ens.params, memory_budget=4096)
    x = torch.randn(50, 2, generator=torch.Generator().manual_seed(10))
    wide, narrow = jostle.attack(ens, x, eps=0.3, steps=10), jostle.attack(tight, x, eps=0.3, steps=10)
    # Chunked and whole products may round differently (float32), but sign steps take the
    # same floats unless a sign flips, which would move a point by a whole step (0.075).
    torch.testing.assert_close(wide.path, narrow.path, atol=1e-6, rtol=0)


def test_l2_fgsm_follows_each_objective_gradient():
    # FGSM-L2 moves along grad / |grad|; the two objectives' gradients differ (derived in
    # test_attack_robustness), and so do the steps they take.
    ens, _ = random_mlp_ensemble(members=4, classes=3, hidden=(16,), seed=11)
    x = torch.randn(8, 2, generator=torch.Generator().manual_seed(11))
    for objective in ("expected_loss", "predictive", "margin"):
        g = jostle.expected_gradient(ens, x, objective=objective)
        adv = jostle.attack(ens, x, method="fgsm", norm="2", eps=0.2, objective=objective)
        # float32: the normalised step of size 0.2 and x + delta round to a few ulp of |x| <= 4
        torch.testing.assert_close(adv.x_adv - x, 0.2 * g / g.norm(dim=1, keepdim=True), atol=1e-6, rtol=0)
    expected = jostle.attack(ens, x, method="fgsm", norm="2", eps=0.2).x_adv
    predictive = jostle.attack(ens, x, method="fgsm", norm="2", eps=0.2, objective="predictive").x_adv
    assert float((expected - predictive).abs().max()) > 1e-3


@pytest.mark.parametrize("method, norm", [("fgsm", "2"), ("cw", "2"), ("spsa", "inf"), ("square", "inf"),
                                         ("square", "2")])
def test_every_method_is_deterministic_under_a_seed(method, norm):
    ens, _ = random_mlp_ensemble(members=3, classes=2, hidden=(8,), seed=12)
    x = torch.randn(6, 2, generator=torch.Generator().manual_seed(12))
    runs = [jostle.attack(ens, x, method=method, norm=norm, eps=0.3, steps=8, seed=4) for _ in range(2)]
    # same call, same seed, one process: exact
    assert torch.equal(runs[0].x_adv, runs[1].x_adv) and torch.equal(runs[0].loss, runs[1].loss)
    assert runs[0].to_dict()["x_adv"].shape == (6, 2)
