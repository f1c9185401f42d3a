"""Convolutional ensembles through every kernel path, against per-member torch loops and torch.autograd.

Data: the 28x28 meter cards, greyscale and colour (jostle.datasets.meter_cards). The
references evaluate each member as its own nn.Module (eval mode) and differentiate with
plain torch.autograd; jostle's ConvPlan runs members side by side as channel blocks, so
the two differ only in float32 summation order.
"""
import copy

import pytest
import torch
from torch import nn
from torch.nn import functional as F

import jostle
from jostle.attacks.readouts import member_gradients
from jostle.posterior import forward
from jostle.posterior.architectures import architecture_of

# float32 eps (1.2e-7) times the longest reduction (the head's 1,568 products, 16 x 9 per
# convolution output), for logits and gradients of order 1: ~2e-4 worst case.
ATOL = 2e-4
NORMS = [None, "layer", "group", "batch"]


@pytest.fixture(scope="module", params=[False, True], ids=["grey", "rgb"])
def cards(request):
    return jostle.datasets.meter_cards(resolution=28, colour=request.param)


def _members(shape, count=4, seed=0, **kwargs):
    g = torch.Generator().manual_seed(seed)
    nets = []
    for _ in range(count):
        net = jostle.init_parameters(jostle.cnn(shape, 10, **kwargs), g)
        with torch.no_grad():  # non-trivial norm weights and running statistics, seeded
            for name, value in net.named_parameters():
                if "." in name and not isinstance(net.get_submodule(name.rsplit(".", 1)[0]), (nn.Conv2d, nn.Linear)):
                    value.uniform_(0.5, 1.5, generator=g) if name.endswith("weight") else value.uniform_(
                        -0.2, 0.2, generator=g)
            for name, value in net.named_buffers():
                if name.endswith("running_var"):
                    value.uniform_(0.5, 1.5, generator=g)
                elif name.endswith("running_mean"):
                    value.uniform_(-0.2, 0.2, generator=g)
        nets.append(net.eval())
    return jostle.Ensemble.from_modules(nets), nets


def test_cnn_builder_is_the_issue_network_and_checks_its_arguments():
    net = jostle.cnn((1, 28, 28), 10)
    kinds = [type(layer).__name__ for layer in net]
    assert kinds == ["ImageView", "Conv2d", "ReLU", "MaxPool2d", "Conv2d", "ReLU", "MaxPool2d", "Flatten", "Linear"]
    assert net[8].in_features == 32 * 7 * 7 and net[1].kernel_size == (3, 3)
    assert architecture_of(net) == {"builder": "cnn", "kwargs": {
        "in_shape": [1, 28, 28], "classes": 10, "channels": [16, 32], "kernel": 3, "pool": "max", "norm": None,
        "hidden": [], "dropout": 0.0, "activation": "relu"}}
    with pytest.raises(ValueError, match=r"in_shape must be \(channels, height, width\) of positive integers"):
        jostle.cnn((28, 28), 10)
    with pytest.raises(ValueError, match="kernel must be an odd integer >= 1"):
        jostle.cnn((1, 28, 28), 10, kernel=4)
    with pytest.raises(ValueError, match=r"norm must be one of \[None, 'layer', 'group', 'batch'\]; got 'instance'"):
        jostle.cnn((1, 28, 28), 10, norm="instance")
    with pytest.raises(ValueError, match=r"in_shape \(1, 3, 3\) is too small for 2 2x2 poolings"):
        jostle.cnn((1, 3, 3), 10)
    with pytest.raises(ValueError, match=r"channels must be a sequence of positive integers \(at least one\)"):
        jostle.cnn((1, 28, 28), 10, channels=())


@pytest.mark.parametrize("norm", NORMS)
@pytest.mark.parametrize("points", [3, 40])  # 3: every member in one block; 40: blocks of members x points
def test_logits_and_predict_match_a_member_loop(cards, norm, points):
    ens, nets = _members(cards.image_shape, norm=norm, hidden=(12,), pool="avg" if norm == "group" else "max")
    assert type(ens._plan).__name__ == "ConvPlan"
    x = cards.x_test[:points]
    with torch.no_grad():
        reference = torch.stack([net(x) for net in nets])
    torch.testing.assert_close(ens.logits(x), reference, atol=ATOL, rtol=0)  # ATOL: module docstring
    images = x.reshape(points, *cards.image_shape)
    torch.testing.assert_close(ens.logits(images), reference, atol=ATOL, rtol=0)
    torch.testing.assert_close(ens.predict(x).probs, torch.softmax(reference, -1).mean(0), atol=ATOL, rtol=0)


def test_any_height_and_width_and_a_plain_sequential_without_image_view():
    g = torch.Generator().manual_seed(3)
    nets = [jostle.init_parameters(nn.Sequential(
        nn.Conv2d(3, 5, 3, padding=1, stride=(1, 2)), nn.GroupNorm(1, 5), nn.Tanh(), nn.MaxPool2d(2),
        nn.Conv2d(5, 4, 3, padding=1), nn.LayerNorm([4, 5, 2]), nn.ReLU(), nn.Flatten(),
        nn.Linear(40, 6), nn.LayerNorm(6), nn.ReLU(), nn.Linear(6, 3)), g).eval() for _ in range(3)]
    ens = jostle.Ensemble.from_modules(nets)
    x = torch.rand(20, 3, 10, 7, generator=g)
    with torch.no_grad():
        reference = torch.stack([net(x) for net in nets])
    torch.testing.assert_close(ens.logits(x), reference, atol=ATOL, rtol=0)
    with pytest.raises(ValueError, match=r"x must have shape \(n_points, channels, height, width\)"):
        ens.logits(torch.rand(2, 210))


def test_save_and_load_need_no_module(cards, tmp_path):
    ens, _ = _members(cards.image_shape, norm="batch")
    ens.save(tmp_path / "cnn.safetensors")
    loaded = jostle.load(tmp_path / "cnn.safetensors")
    assert loaded.meta["architecture"]["builder"] == "cnn"
    x = cards.x_test[:5]
    assert torch.equal(loaded.logits(x), ens.logits(x))  # same kernels, same inputs, same process: exact


def _loop_gradients(nets, x, y):
    grads = []
    for net in nets:
        leaf = x.detach().clone().requires_grad_(True)
        (g,) = torch.autograd.grad(F.cross_entropy(net(leaf), y, reduction="sum"), leaf)
        grads.append(g)
    return torch.stack(grads)


# ReLU, tanh and sigmoid never decrease, so the pass pools before them; the cards' blank
# background gives every pooling window there four equal values (each convolution output is
# its bias), so these cases also check that ties route the gradient as nn.MaxPool2d does.
@pytest.mark.parametrize("norm,activation", [(None, "relu"), ("batch", "relu"), (None, "tanh"), (None, "sigmoid")])
def test_input_gradients_match_autograd_per_member(cards, norm, activation):
    ens, nets = _members(cards.image_shape, norm=norm, activation=activation)
    x, y = cards.x_test[:6], cards.y_test[:6]
    per_member = _loop_gradients(nets, x, y)
    torch.testing.assert_close(member_gradients(ens, x, y), per_member, atol=ATOL, rtol=0)
    torch.testing.assert_close(member_gradients(ens, x, y, backward="autograd"), per_member, atol=ATOL, rtol=0)
    # Athalye et al. 2018: the expected-loss gradient is the mean of the members' gradients
    torch.testing.assert_close(jostle.expected_gradient(ens, x, y), per_member.mean(0), atol=ATOL, rtol=0)


def test_fgsm_steps_along_the_loop_gradient_sign(cards):
    ens, nets = _members(cards.image_shape)
    x, y, eps = cards.x_test[:4], cards.y_test[:4], 0.05
    result = jostle.attack(ens, x, y, method="fgsm", eps=eps, bounds=(0.0, 1.0))
    gradient = _loop_gradients(nets, x, y).mean(0)
    expected = (x + eps * gradient.sign()).clamp(0.0, 1.0)
    # where the gradient is far from 0 its sign is unambiguous under float32 rounding (ATOL)
    clear = gradient.abs() > ATOL
    assert bool(clear.any())
    torch.testing.assert_close(result.x_adv[clear], expected[clear], atol=1e-6, rtol=0)  # one add, one clamp


@pytest.mark.parametrize("method", ["fgsm", "pgd", "cw", "spsa", "square"])
def test_every_attack_stays_in_the_ball_and_judges_by_the_predictive(cards, method):
    ens, nets = _members(cards.image_shape, count=3, norm="group")
    x = cards.x_test[:3]
    norm = "2" if method == "cw" else "inf"
    eps = 1.0 if norm == "2" else 0.1
    result = jostle.attack(ens, x, method=method, eps=eps, norm=norm, steps=6, bounds=(0.0, 1.0), seed=1)
    assert result.x_adv.shape == x.shape
    assert float(result.x_adv.min()) >= 0.0 and float(result.x_adv.max()) <= 1.0
    delta = (result.x_adv - x).flatten(1)
    reach = delta.abs().amax(1) if norm == "inf" else delta.norm(dim=1)
    assert bool((reach <= eps * (1 + 1e-5) + 1e-6).all())  # projection rounding in float32
    with torch.no_grad():
        loop_probs = torch.stack([torch.softmax(net(result.x_adv), -1) for net in nets]).mean(0)
    torch.testing.assert_close(result.adv_probs, loop_probs, atol=ATOL, rtol=0)
    assert torch.equal(result.success, loop_probs.argmax(1) != result.label)


def test_readouts_run_on_images(cards):
    ens, nets = _members(cards.image_shape, count=4)
    x, y = cards.x_test[:3], cards.y_test[:3]
    fade = jostle.gradient_fade(ens, x, y, repeats=4, seed=0)
    assert fade.rows()[-1]["samples"] == 4
    budget = jostle.minimal_budget(ens, x, steps=5, iterations=4, bounds=(0.0, 1.0))
    assert budget.eps.shape == (3,) and bool((budget.eps > 0).all())
    with torch.no_grad():
        flipped = torch.stack([torch.softmax(net(budget.x_adv), -1) for net in nets]).mean(0).argmax(1)
        clean = torch.stack([torch.softmax(net(x), -1) for net in nets]).mean(0).argmax(1)
    found = budget.success
    assert bool(found.any()) and bool((flipped[found] != clean[found]).all())
    report = jostle.masking_check(ens, x, y, eps=0.1, steps=5, free_steps=5, bounds=(0.0, 1.0))
    assert len(report.budget_rates) == 5 and all(0.0 <= rate <= 1.0 for rate in report.rates.values())
    x_adv = (x + 0.05).clamp(0, 1)
    with torch.no_grad():
        p = torch.stack([torch.softmax(net(x), -1) for net in nets]).mean(0)
        q = torch.stack([torch.softmax(net(x_adv), -1) for net in nets]).mean(0)
    expected = 1 - float((p - q).abs().amax(1).mean())
    assert jostle.softmax_robustness(ens, x, x_adv) == pytest.approx(expected, abs=ATOL)


def test_member_blocks_follow_the_size_rule(cards):
    ens, _ = _members(cards.image_shape)
    plan = ens._plan
    plan._measure(cards.image_shape)
    budget = jostle.DEFAULT_MEMORY_BUDGET
    assert plan.chunk_sizes(100, 1, budget, 4) == (forward.GROUPED_MEMBERS, 1)
    assert plan.chunk_sizes(100, 1000, budget, 4) == (forward.BLOCK_MEMBERS, forward.BLOCK_POINTS)
    # off the CPU, as large as the budget allows: all 100 members for one image, and for
    # 1,000 images as many members as fit (no device is touched; the rule reads its type)
    assert plan.chunk_sizes(100, 1, budget, 4, "cuda") == (100, 1)
    with torch.no_grad():  # a forward pass holds floats_per_pair float32 values per (member, point)
        members, points = plan.chunk_sizes(100, 1000, budget, 4, torch.device("cuda"))
    pair = plan.floats_per_pair * 4
    assert points == min(1000, budget // pair) and members == max(1, min(100, budget // (pair * points)))
    # a small budget shrinks blocks below the rule: at most budget / bytes per (member, point)
    small = 4 * plan.floats_per_pair * 3
    members, points = plan.chunk_sizes(100, 1000, small, 4)
    assert members * points * plan.floats_per_pair * 4 <= small
    tight = copy.copy(ens)
    tight.memory_budget = small
    with torch.no_grad():
        torch.testing.assert_close(tight.logits(cards.x_test[:20]), ens.logits(cards.x_test[:20]), atol=ATOL, rtol=0)


def test_per_member_inputs_as_training_feeds_them_match_a_loop(cards):
    # fit_deep_ensemble trains through plan.forward(params, x [S, n, ...], per_member=True)
    ens, nets = _members(cards.image_shape, count=3, norm="layer")
    x = cards.x_train[:30].reshape(3, 10, -1)
    params = {k: v.clone().requires_grad_(v.is_floating_point()) for k, v in ens.params.items()}
    logits = ens._plan.forward(params, x, per_member=True)
    with torch.no_grad():
        reference = torch.stack([net(x[s]) for s, net in enumerate(nets)])
    torch.testing.assert_close(logits.detach(), reference, atol=ATOL, rtol=0)
    y = cards.y_train[:30].reshape(3, 10)
    loss = sum(F.cross_entropy(logits[s], y[s]) for s in range(3))
    (grad,) = torch.autograd.grad(loss, params["1.weight"])
    for s, net in enumerate(nets):
        (own,) = torch.autograd.grad(F.cross_entropy(net(x[s]), y[s]), net[1].weight)
        torch.testing.assert_close(grad[s], own, atol=ATOL, rtol=0)
