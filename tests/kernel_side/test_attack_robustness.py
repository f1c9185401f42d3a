"""Expected gradients, their fading with the sample count, minimal budgets, predictive
shift, and the gradient-masking check."""
import numpy as np
import pytest
import scipy.stats
import torch
from torch import nn

import jostle
from jostle.attacks.readouts import member_gradients
from tests.conftest import random_mlp_ensemble
from tests.kernel_side.test_attack_gradient import B, W, affine_ensemble, class0_points


def _loop_member_gradients(nets, x, y):
    # Plain reference: each member's own torch.autograd gradient (common practice).
    grads = []
    for net in nets:
        leaf = x.clone().requires_grad_(True)
        loss = nn.functional.cross_entropy(net.eval()(leaf), y, reduction="sum")
        grads.append(torch.autograd.grad(loss, leaf)[0])
    return torch.stack(grads)


def test_gradient_of_mean_loss_is_mean_of_member_gradients():
    # Athalye et al. 2018 (expectation over transformation), torch.autograd, 1e-6.
    ens, nets = random_mlp_ensemble(members=7, classes=3, hidden=(16, 8), seed=2)
    x = torch.randn(25, 2, generator=torch.Generator().manual_seed(2))
    y = torch.arange(25) % 3
    reference = _loop_member_gradients(nets, x, y)
    torch.testing.assert_close(member_gradients(ens, x, y), reference, atol=1e-6, rtol=1e-5)
    torch.testing.assert_close(jostle.expected_gradient(ens, x, y), reference.mean(0), atol=1e-6, rtol=1e-5)
    torch.testing.assert_close(jostle.expected_gradient(ens, x, y, samples=3), reference[:3].mean(0),
                               atol=1e-6, rtol=1e-5)


def test_expected_loss_and_predictive_gradients_differ_as_derived():
    # Two affine members with class-0 scores s_k = w_k'x, sigma_k = sigmoid(s_k):
    # expected loss  -mean_k log sigma_k      has gradient -mean_k (1 - sigma_k) w_k;
    # predictive     -log mean_k sigma_k      has gradient -sum_k sigma_k (1 - sigma_k) w_k / sum_k sigma_k.
    # The predictive weights members by their own probability, so the two differ (derived here).
    w = torch.tensor([[3.0, 0.0], [0.0, 1.0]])
    layers = []
    for row in w:
        layer = nn.Linear(2, 2)
        with torch.no_grad():
            layer.weight.copy_(torch.stack([row, torch.zeros(2)]))
            layer.bias.zero_()
        layers.append(layer)
    ens = jostle.Ensemble.from_modules(layers)
    x = torch.tensor([[0.4, -0.6]])
    y = torch.tensor([0])
    sigma = torch.sigmoid(w @ x[0])
    expected = -((1 - sigma)[:, None] * w).mean(0)
    predictive = -((sigma * (1 - sigma))[:, None] * w).sum(0) / sigma.sum()
    got_expected = jostle.expected_gradient(ens, x, y)[0]
    got_predictive = jostle.expected_gradient(ens, x, y, objective="predictive")[0]
    torch.testing.assert_close(got_expected, expected, atol=1e-6, rtol=1e-6)
    torch.testing.assert_close(got_predictive, predictive, atol=1e-6, rtol=1e-6)
    assert float(torch.nn.functional.cosine_similarity(got_expected, got_predictive, dim=0)) < 0.99


def test_gradient_fade_follows_the_chi_law_for_zero_mean_members():
    # Zero-mean linear scores with w ~ N(0, I_d): at x = 0 each member's gradient is -w/2,
    # so E|g_S|_2 = 0.5 * chi_d mean / sqrt(S) (scipy.stats.chi; standard Monte Carlo rate).
    d, members = 16, 4096
    weights = torch.randn(members, d, generator=torch.Generator().manual_seed(0))
    params = {"weight": torch.stack([weights / 2, -weights / 2], dim=1), "bias": torch.zeros(members, 2)}
    ens = jostle.Ensemble(nn.Linear(d, 2), params)
    fade = jostle.gradient_fade(ens, torch.zeros(1, d), torch.tensor([0]), sample_counts=(1, 4, 16, 64),
                                repeats=400, seed=1)
    counts = fade.sample_counts
    theory = 0.5 * scipy.stats.chi(d).mean() / np.sqrt(counts)
    # Sampling without replacement from a finite pool: finite-population correction.
    theory = theory * np.sqrt((members - counts) / (members - 1))
    np.testing.assert_allclose(fade.norm_mean["l2"], theory, rtol=0.04)
    np.testing.assert_allclose(fade.norm_mean["l2"], fade.reference["l2"], rtol=0.06)
    assert bool(np.all(np.diff(fade.norm_mean["l1"]) < 0) and np.all(np.diff(fade.norm_mean["linf"]) < 0))
    rows = fade.rows()
    assert [r["samples"] for r in rows] == [1, 4, 16, 64]
    assert fade.norms["l2"].shape == (4, 400, 1)
    assert set(fade.to_dict()) >= {"sample_counts", "norm_mean", "reference", "component_quantiles"}


def test_gradient_fade_error_shrinks_like_one_over_root_s():
    # Standard Monte Carlo theory: the error of the S-sample mean shrinks like 1/sqrt(S).
    ens, _ = random_mlp_ensemble(members=512, classes=2, hidden=(8,), seed=9)
    x = torch.randn(5, 2, generator=torch.Generator().manual_seed(9))
    fade = jostle.gradient_fade(ens, x, sample_counts=(2, 8, 32), repeats=200)
    ratios = fade.error_mean[:-1] / fade.error_mean[1:]
    np.testing.assert_allclose(ratios, 2.0 * np.sqrt([(512 - 2) / (512 - 8), (512 - 8) / (512 - 32)]), rtol=0.12)


@pytest.mark.parametrize("norm, dual", [("inf", 1), ("2", 2)])
def test_minimal_budget_matches_the_dual_norm_formula(norm, dual):
    # |w'x + b| / |w|_dual (Goodfellow et al. 2015; Moosavi-Dezfooli et al. 2016).
    ens = affine_ensemble()
    x = torch.cat([class0_points(), torch.tensor([[4.0, -2.0, 1.0]])])
    found = jostle.minimal_budget(ens, x, norm=norm, iterations=20)
    closed = (x @ W + B).abs() / W.norm(p=dual)
    torch.testing.assert_close(found.eps, closed, rtol=1e-4, atol=0)
    assert bool((found.lower < found.eps).all()) and bool(found.success.all())
    assert bool((found.adv_probs.argmax(-1) != found.label).all())


def test_minimal_budget_inside_bounds_reports_unreachable_points():
    # On the box [0, 1] x [-1, 0] x [0, 1] the score w'x + b is at least 0.3 > 0, so no
    # point of the box is classified 1: eps = inf, and the bracket never closes.
    ens = affine_ensemble(bounds=[[0.0, -1.0, 0.0], [1.0, 0.0, 1.0]])
    x = torch.tensor([[0.5, -0.2, 0.1], [0.2, -0.5, 0.4]])
    found = jostle.minimal_budget(ens, x, iterations=8)
    assert found.success.tolist() == [False, False]
    assert bool(torch.isinf(found.eps).all())
    torch.testing.assert_close(found.x_adv, x)


def test_softmax_robustness_against_an_explicit_formula():
    ens, _ = random_mlp_ensemble(members=4, classes=3, seed=3)
    x = torch.randn(12, 2, generator=torch.Generator().manual_seed(3))
    assert jostle.softmax_robustness(ens, x, x.clone()) == 1.0
    assert jostle.softmax_robustness(ens, x, x.clone(), kind="tv") == 1.0
    moved = x + 0.7
    p, q = ens.predict(x).probs.numpy(), ens.predict(moved).probs.numpy()
    np.testing.assert_allclose(jostle.softmax_robustness(ens, x, moved), 1 - np.abs(p - q).max(1).mean(), rtol=1e-6)
    np.testing.assert_allclose(jostle.softmax_robustness(ens, x, moved, kind="tv"),
                               1 - 0.5 * np.abs(p - q).sum(1).mean(), rtol=1e-6)
    assert jostle.softmax_robustness(ens, x, moved, reduce=False).shape == (12,)


def _trained_moons_ensemble(members=5, steps=250):
    data = jostle.datasets.moons(n_train=200, n_test=100, seed=0)
    g = torch.Generator().manual_seed(0)
    nets = [jostle.init_parameters(jostle.mlp(2, 2, hidden=(16, 16)), g) for _ in range(members)]
    ens = jostle.Ensemble.from_modules(nets, meta={"bounds": [data.bounds[0].tolist(), data.bounds[1].tolist()]})
    params = [p.requires_grad_(True) for p in ens.params.values()]
    optimiser = torch.optim.Adam(params, lr=0.02)
    threads = torch.get_num_threads()
    # One thread: small kernels on a shared 2-core machine stall at thread barriers.
    torch.set_num_threads(1)
    try:
        for _ in range(steps):
            optimiser.zero_grad()
            logits = ens.logits(data.x_train)
            nn.functional.cross_entropy(logits.flatten(0, 1), data.y_train.repeat(members)).backward()
            optimiser.step()
    finally:
        torch.set_num_threads(threads)
    for p in params:
        p.requires_grad_(False)
    return ens, data


@pytest.fixture(scope="module")
def moons_ensemble():
    return _trained_moons_ensemble()


def test_trained_moons_success_grows_with_the_budget(moons_ensemble):
    # Common practice: attack success must not fall as eps grows.
    ens, data = moons_ensemble
    assert float((ens.predict(data.x_test).label == data.y_test).float().mean()) > 0.85
    x, y = data.x_test[:80], data.y_test[:80]
    rates = [jostle.attack(ens, x, y, eps=eps, random_start=False).success_rate for eps in (0.05, 0.1, 0.2, 0.4, 0.8)]
    assert rates == sorted(rates) and rates[-1] > rates[0]
    found = jostle.minimal_budget(ens, x[:20], y[:20], iterations=10)
    # the reported budget is an upper bound because it comes with a witness: x_adv lies within
    # eps of x (the same float32 norm that produced eps) and the ensemble's label there differs
    assert bool(found.success.all())
    assert bool((ens.predict(found.x_adv).label != y[:20]).all())
    assert bool(((found.x_adv - x[:20]).abs().amax(1) <= found.eps).all())


class _Quantised(nn.Module):
    """A net whose input is rounded to a grid: its input gradient is exactly zero."""

    def __init__(self):
        super().__init__()
        self.linear = nn.Linear(2, 2)

    def forward(self, x):
        return self.linear(torch.round(x * 2) / 2)


def test_masking_check_flags_a_quantised_input():
    g = torch.Generator().manual_seed(0)
    nets = []
    for _ in range(3):
        net = _Quantised()
        with torch.no_grad():
            net.linear.weight.copy_(torch.tensor([[1.0, 1.0], [0.0, 0.0]]) + 0.1 * torch.randn(2, 2, generator=g))
            net.linear.bias.zero_()
        nets.append(net)
    ens = jostle.Ensemble.from_modules(nets)
    report = jostle.masking_check(ens, torch.rand(60, 2, generator=g) * 2 - 1, eps=0.3)
    assert report.masked and report.flags["gradient_free_beats_pgd"]
    assert "gradients look masked" in report.verdict and "not certificates" in report.verdict


def test_masking_check_flags_a_saturated_net():
    # Logits scaled by 1e4: cross-entropy gradients underflow to exactly zero.
    layer = nn.Linear(2, 2)
    with torch.no_grad():
        layer.weight.copy_(torch.tensor([[1e4, 1e4], [0.0, 0.0]]))
        layer.bias.zero_()
    x = torch.rand(60, 2, generator=torch.Generator().manual_seed(1)) * 2 - 1
    report = jostle.masking_check(jostle.Ensemble.from_modules([layer]), x, eps=0.3)
    assert report.masked and report.rates["square"] > report.rates["pgd"] + 0.2


def test_masking_check_passes_an_ordinary_trained_ensemble(moons_ensemble):
    ens, data = moons_ensemble
    report = jostle.masking_check(ens, data.x_test[:60], data.y_test[:60], eps=0.3)
    assert not report.masked, report.verdict
    assert report.verdict.startswith("No sign of gradient masking") and "not certificates" in report.verdict
    assert report.budget_rates.shape == (5,) and report.rates["pgd"] >= report.rates["fgsm"]
