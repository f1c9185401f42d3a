"""The gradient engine (Ensemble.value_and_input_grad, backward="auto") against torch.autograd.

Reference: torch.autograd.grad through the same batched forward (``ens.logits`` with an
input that requires grad), for the three attack objectives, several activations and
depths (planned stacks and those the engine sends to autograd), with and without
chunking, member subsets and resampling.
"""
import pytest
import torch
from torch import nn

import jostle
import jostle.posterior.forward as _forward
from jostle.attacks.problem import build_problem
from jostle.posterior.forward import GeneralPlan, MLPPlan
from jostle.posterior.gradients import objective_values as _objective

OBJECTIVES = ("expected_loss", "predictive", "margin")
TOLERANCE = {torch.float32: 1e-5, torch.float64: 1e-10}


def _ensemble(layers_of, members=6, seed=0, dtype=torch.float64, **kwargs):
    g = torch.Generator().manual_seed(seed)
    nets = []
    for _ in range(members):
        net = layers_of()
        with torch.no_grad():
            for p in net.parameters():
                p.copy_(torch.randn(p.shape, generator=g, dtype=p.dtype) * 0.8)
        nets.append(net.to(dtype))
    return jostle.Ensemble.from_modules(nets, **kwargs)


def _mlp(activation, hidden=(8, 8)):
    return lambda: jostle.mlp(3, 3, hidden=hidden, activation=activation)


def _points(n=7, features=3, dtype=torch.float64, seed=1):
    g = torch.Generator().manual_seed(seed)
    return (torch.randn(n, features, generator=g) * 1.5).to(dtype)


def _autograd_reference(ens, x, labels, objective, samples=None, sign=1.0):
    leaf = x.detach().clone().requires_grad_(True)
    value = sign * _objective(ens.logits(leaf, samples=samples), labels, objective)
    (grad,) = torch.autograd.grad(value.sum(), leaf)
    return value.detach(), grad


def _hand(ens, x, labels, objective, samples=None, sign=1.0):
    return ens.value_and_input_grad(x, labels, objective, members=samples, targeted=sign < 0, backward="auto")


def _assert_match(got, want, dtype):
    tol = TOLERANCE[dtype]
    for a, b in zip(got, want):
        torch.testing.assert_close(a, b, rtol=tol, atol=tol * float(b.abs().max().clamp_min(1.0)))


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
@pytest.mark.parametrize("activation", ["tanh", "relu", "sigmoid", "gelu", "silu", "elu", "softplus"])
@pytest.mark.parametrize("objective", OBJECTIVES)
def test_matches_autograd_for_each_activation(activation, objective, dtype):
    # Reference: torch.autograd on the same batched forward.
    ens = _ensemble(_mlp(activation), dtype=dtype)
    assert isinstance(ens._plan, MLPPlan)
    assert ens._engine.planned == (activation in ("tanh", "relu", "sigmoid"))
    x = _points(dtype=dtype)
    labels = torch.tensor([0, 1, 2, 0, 1, 2, 0])
    _assert_match(_hand(ens, x, labels, objective), _autograd_reference(ens, x, labels, objective), dtype)


@pytest.mark.parametrize("hidden", [(), (5,), (8, 6, 4)])
def test_matches_autograd_for_each_depth(hidden):
    # Reference: torch.autograd; () is a single affine layer (no activation at all).
    ens = _ensemble(_mlp("tanh", hidden))
    x = _points()
    labels = torch.tensor([2, 1, 0, 0, 1, 2, 1])
    for objective in OBJECTIVES:
        _assert_match(_hand(ens, x, labels, objective, sign=-1.0),
                      _autograd_reference(ens, x, labels, objective, sign=-1.0), torch.float64)


def test_uncoded_activations_and_layouts_match_autograd():
    # Mish, Hardtanh, tanh-approximated GELU fall back to autograd per activation; ELU and
    # Softplus take non-default alpha / beta / threshold (Softplus is linear past it); a
    # leading activation on the shared input, Flatten, Identity and bias-free layers
    # exercise the remaining steps. Reference: torch.autograd.
    def layers():
        return nn.Sequential(nn.Flatten(), nn.Tanh(), nn.Linear(6, 7, bias=False), nn.Mish(), nn.Identity(),
                             nn.Linear(7, 5), nn.Hardtanh(-0.5, 0.5), nn.Linear(5, 6), nn.GELU("tanh"),
                             nn.LeakyReLU(0.1), nn.Tanh(), nn.Linear(6, 5), nn.ELU(0.7), nn.Linear(5, 5),
                             nn.Softplus(beta=2.0, threshold=1.0), nn.Linear(5, 4))

    ens = _ensemble(layers)
    assert isinstance(ens._plan, MLPPlan)
    x = _points(n=5, features=6).reshape(5, 2, 3)
    labels = torch.tensor([0, 3, 1, 2, 3])
    value, grad = _hand(ens, x, labels, "predictive")
    assert grad.shape == x.shape
    _assert_match((value, grad), _autograd_reference(ens, x, labels, "predictive"), torch.float64)


@pytest.mark.parametrize("activation", ["relu", "gelu"])
@pytest.mark.parametrize("cache_bytes", [200, 2**20])
@pytest.mark.parametrize("budget", [1, 30_000, 10**9])
def test_chunking_over_points_and_members_changes_nothing(monkeypatch, budget, cache_bytes, activation):
    # Budget 1 takes one point and one member at a time, 30,000 bytes a few, 10**9 all
    # eleven; a 200-byte cache block takes one member at a time. ReLU takes the planned
    # passes, GELU autograd. Reference: autograd.
    monkeypatch.setattr(_forward, "CACHE_BYTES", cache_bytes)
    ens = _ensemble(_mlp(activation), members=9, memory_budget=budget)
    assert ens._engine.planned == (activation == "relu")
    x = _points(n=11)
    labels = torch.arange(11) % 3
    for objective in OBJECTIVES:
        _assert_match(_hand(ens, x, labels, objective),
                      _autograd_reference(ens, x, labels, objective), torch.float64)


@pytest.mark.parametrize("samples", [4, [5, 0, 2], torch.tensor([3, 3, 1])])
def test_member_subsets_match_autograd(samples):
    # Reference: torch.autograd over the same member selection.
    ens = _ensemble(_mlp("silu"))
    x = _points()
    labels = torch.tensor([1, 1, 0, 2, 2, 0, 1])
    _assert_match(_hand(ens, x, labels, "predictive", samples=samples),
                  _autograd_reference(ens, x, labels, "predictive", samples=samples), torch.float64)


@pytest.mark.parametrize("objective", OBJECTIVES)
@pytest.mark.parametrize("options", [{}, {"samples": 3, "resample": True}, {"samples": [1, 4]},
                                     {"target": [2, 0, 1, 2, 0, 1, 2]}])
def test_attack_problem_gradient_is_unchanged_by_the_hand_backward(objective, options):
    # The attack's input gradient with the planned passes equals the autograd one,
    # drawing the same members when resampling (the same seeded generator in both).
    ens = _ensemble(_mlp("tanh"), dtype=torch.float32)
    x = _points(dtype=torch.float32)
    results = []
    for backward in ("auto", "autograd"):
        problem = build_problem(ens, x, None, eps=0.1, norm="inf", objective=objective, samples=options.get("samples"),
                                resample=options.get("resample", False), target=options.get("target"),
                                bounds=None, seed=3, backward=backward)
        results.append([problem.objective_and_grad(x + 0.01 * k) for k in range(3)])
    for got, want in zip(*results):
        _assert_match(got, want, torch.float32)


def test_general_plan_ensembles_keep_autograd():
    # A module that is not a Linear + elementwise Sequential runs through vmap and autograd;
    # reference: the per-member gradient of the mean cross-entropy, summed by hand.
    class Residual(nn.Module):
        def __init__(self):
            super().__init__()
            self.inner = nn.Linear(3, 3)
            self.head = nn.Linear(3, 2)

        def forward(self, x):
            return self.head(x + torch.tanh(self.inner(x)))

    torch.manual_seed(0)
    nets = [Residual().double() for _ in range(3)]
    ens = jostle.Ensemble.from_modules(nets)
    assert isinstance(ens._plan, GeneralPlan)
    x = _points(n=4)
    labels = torch.tensor([0, 1, 1, 0])
    problem = build_problem(ens, x, labels, eps=0.1, norm="inf", objective="expected_loss", samples=None,
                            resample=False, target=None, bounds=None, seed=0)
    _, grad = problem.objective_and_grad(x)
    leaf = x.clone().requires_grad_(True)
    loss = sum(nn.functional.cross_entropy(net(leaf), labels, reduction="sum") for net in nets) / len(nets)
    (want,) = torch.autograd.grad(loss, leaf)
    # float64, vmap vs per-net autograd: a few ulp (2.2e-16) of O(1) values; 1e-10 is a wide margin
    torch.testing.assert_close(grad, want, rtol=1e-10, atol=1e-12)


def test_attacks_agree_with_and_without_the_hand_backward():
    # End to end: PGD iterates are the same whichever backward computes the gradient
    # (float64, so sign steps cannot flip on rounding).
    ens = _ensemble(_mlp("tanh"), dtype=torch.float64)
    x = _points()
    runs = [jostle.attack(ens, x, eps=0.2, steps=10, seed=4, objective="predictive", backward=backward)
            for backward in ("auto", "autograd")]
    # Sign steps: while the signs agree both paths compute the same floats; one flipped sign
    # would differ by a whole step (0.05), so 1e-12 only tells the two cases apart.
    torch.testing.assert_close(runs[0].x_adv, runs[1].x_adv, rtol=0, atol=1e-12)
    # the two paths' float64 losses round differently: a few ulp of O(1) values
    torch.testing.assert_close(runs[0].loss, runs[1].loss, rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("objective", OBJECTIVES)
def test_network_ending_in_an_activation_matches_autograd(objective):
    # Not covered by the planned passes: the engine takes autograd; reference: autograd.
    ens = _ensemble(lambda: nn.Sequential(nn.Linear(3, 5), nn.ReLU(), nn.Linear(5, 3), nn.Sigmoid()))
    x = _points()
    labels = torch.tensor([0, 2, 1, 1, 0, 2, 2])
    want = _autograd_reference(ens, x, labels, objective)
    assert not ens._engine.planned
    _assert_match(_hand(ens, x, labels, objective), want, torch.float64)
