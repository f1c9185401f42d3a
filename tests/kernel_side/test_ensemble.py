"""Vectorised logits against a plain per-member loop, chunking, autograd, and refusals."""
import pytest
import torch
from torch import nn

import jostle
from jostle import Ensemble
from tests.conftest import random_mlp_ensemble


class SmallConvNet(nn.Module):
    """A module the MLP fast path cannot take: exercises the vmap path."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(1, 3, 3)
        self.head = nn.Linear(3 * 6 * 6, 4)
        self.register_buffer("scale", torch.tensor(0.5))

    def forward(self, x):
        h = torch.relu(self.conv(x.view(-1, 1, 8, 8)))
        return self.head(h.flatten(1)) * self.scale


def _loop_logits(nets, x):
    # The plain reference: every member evaluated on its own (common practice).
    with torch.no_grad():
        return torch.stack([net.eval()(x) for net in nets])


@pytest.mark.parametrize("activation", ["tanh", "relu", "gelu", "softplus"])
@pytest.mark.parametrize("hidden", [(), (8,), (16, 8, 4)])
def test_mlp_path_equals_member_loop(activation, hidden):
    ens, nets = random_mlp_ensemble(members=6, hidden=hidden, activation=activation)
    x = torch.randn(37, 2, generator=torch.Generator().manual_seed(1))
    torch.testing.assert_close(ens.logits(x), _loop_logits(nets, x), atol=1e-5, rtol=1e-5)


def test_general_path_equals_member_loop():
    g = torch.Generator().manual_seed(2)
    nets = []
    for _ in range(4):
        net = SmallConvNet()
        with torch.no_grad():
            for p in net.parameters():
                p.copy_(torch.randn(p.shape, generator=g) * 0.3)
        nets.append(net)
    ens = Ensemble.from_modules(nets)
    assert type(ens._plan).__name__ == "GeneralPlan"
    x = torch.rand(9, 64, generator=g)
    torch.testing.assert_close(ens.logits(x), _loop_logits(nets, x), atol=1e-5, rtol=1e-5)
    tiny = Ensemble(ens.template, ens.params, memory_budget=4096)
    torch.testing.assert_close(tiny.logits(x), _loop_logits(nets, x), atol=1e-5, rtol=1e-5)


@pytest.mark.parametrize("budget", [64, 4096, 10**6])
def test_chunking_changes_nothing(budget):
    ens, nets = random_mlp_ensemble(members=9, hidden=(16, 16))
    chunked = Ensemble(ens.template, ens.params, memory_budget=budget)
    x = torch.randn(101, 2, generator=torch.Generator().manual_seed(3))
    torch.testing.assert_close(chunked.logits(x), _loop_logits(nets, x), atol=1e-5, rtol=1e-5)
    torch.testing.assert_close(chunked.predict(x).probs, ens.predict(x).probs, atol=1e-6, rtol=1e-6)


@pytest.mark.parametrize("budget", [64, 10**7])
def test_input_gradients_match_autograd_through_the_loop(budget):
    # d/dx of the summed member log-probabilities: jostle's batched graph against
    # torch.autograd through each member separately (reference library).
    ens, nets = random_mlp_ensemble(members=5, hidden=(8, 8))
    ens = Ensemble(ens.template, ens.params, memory_budget=budget)
    x = torch.randn(13, 2, generator=torch.Generator().manual_seed(4))
    xa = x.clone().requires_grad_(True)
    torch.log_softmax(ens.logits(xa), -1)[..., 0].sum().backward()
    xb = x.clone().requires_grad_(True)
    sum(torch.log_softmax(net(xb), -1)[:, 0].sum() for net in nets).backward()
    torch.testing.assert_close(xa.grad, xb.grad, atol=1e-5, rtol=1e-5)


def test_map_logits_chunks_points_and_keeps_gradients():
    ens, nets = random_mlp_ensemble(members=4, hidden=(8,))
    ens = Ensemble(ens.template, ens.params, memory_budget=256)
    x = torch.randn(20, 2, generator=torch.Generator().manual_seed(5)).requires_grad_(True)
    seen = []

    def mean_first_logit(logits, where):
        seen.append(where)
        return logits.mean(0)[:, 0]

    out = ens.map_logits(x, mean_first_logit)
    assert len(seen) > 1 and out.shape == (20,)
    out.sum().backward()
    reference = torch.stack([net(x) for net in nets]).mean(0)[:, 0]
    torch.testing.assert_close(out, reference.detach(), atol=1e-5, rtol=1e-5)
    assert x.grad is not None and bool(torch.isfinite(x.grad).all())


def test_container_protocol():
    ens, nets = random_mlp_ensemble(members=8)
    x = torch.randn(5, 2)
    assert len(ens) == 8 and len(ens[:3]) == 3 and len(ens[2]) == 1
    torch.testing.assert_close(ens[:3].logits(x), ens.logits(x)[:3])
    torch.testing.assert_close(ens[[6, 1]].logits(x), ens.logits(x)[[6, 1]])
    torch.testing.assert_close(ens.logits(x, samples=3), ens.logits(x)[:3])
    torch.testing.assert_close(ens.logits(x, samples=[7, 0]), ens.logits(x)[[7, 0]])
    sub = ens.subset(4, seed=1)
    assert len(sub) == 4
    torch.testing.assert_close(sub.logits(x), ens.subset(4, seed=1).logits(x))
    member = ens.module(5)
    torch.testing.assert_close(member(x), nets[5](x))
    assert ens.to("cpu", dtype=torch.float64).logits(x).dtype == torch.float64
    assert "S=8" in repr(ens)


def test_predict_carries_no_graph():
    ens, _ = random_mlp_ensemble(members=3)
    x = torch.randn(4, 2, requires_grad=True)
    pred = ens.predict(x)
    assert not pred.member_probs.requires_grad
    assert pred.member_probs.shape == (3, 4, 3)


def test_large_ensemble_runs_inside_its_memory_budget():
    ens, _ = random_mlp_ensemble(members=200, hidden=(64, 64), classes=2)
    x = torch.randn(3000, 2)
    with torch.no_grad():
        big = ens.logits(x)
    assert big.shape == (200, 3000, 2)


def test_refuses_batchnorm_and_dropout_in_training_mode():
    bn = nn.Sequential(nn.Linear(2, 4), nn.BatchNorm1d(4), nn.Linear(4, 2))
    with pytest.raises(ValueError, match=r"modules\[0\]\.1 is a BatchNorm1d in training mode.*call \.eval\(\)"):
        Ensemble.from_modules([bn])
    drop = jostle.mlp(2, 2, hidden=(4,), dropout=0.2)
    with pytest.raises(ValueError, match=r"Dropout in training mode.*jostle.fit_dropout"):
        Ensemble.from_modules([drop])
    ens = Ensemble.from_modules([bn.eval(), bn])  # eval mode: running statistics are fixed
    assert len(ens) == 2


def test_user_errors_name_the_parameter_and_value():
    ens, _ = random_mlp_ensemble(members=3)
    with pytest.raises(ValueError, match="modules must be a non-empty list"):
        Ensemble.from_modules([])
    with pytest.raises(TypeError, match=r"modules\[1\] must be a torch.nn.Module; got str"):
        Ensemble.from_modules([jostle.mlp(2, 2), "net"])
    with pytest.raises(ValueError, match=r"state_dicts\[1\] does not fit the template"):
        Ensemble.from_modules([jostle.mlp(2, 2), jostle.mlp(2, 2, hidden=(4,))])
    with pytest.raises(ValueError, match=r"x must have shape \(n_points, \*input_shape\); got shape \(2,\)"):
        ens.logits(torch.zeros(2))
    with pytest.raises(ValueError, match=r"x must have shape \(n_points, 2\) for this network; got shape \(4, 3\)"):
        ens.logits(torch.zeros(4, 3))
    with pytest.raises(ValueError, match=r"samples must be an integer in \[1, 3\]; got 4"):
        ens.logits(torch.zeros(1, 2), samples=4)
    with pytest.raises(ValueError, match=r"samples must be an integer in \[1, 3\]; got 0"):
        ens.predict(torch.zeros(1, 2), samples=0)
    with pytest.raises(ValueError, match=r"samples must index members in \[0, 3\)"):
        ens.logits(torch.zeros(1, 2), samples=[0, 5])
    with pytest.raises(ValueError, match=r"k must be an integer in \[1, 3\]; got 9"):
        ens.subset(9)
    with pytest.raises(ValueError, match="index must select at least one member"):
        ens[5:]
    with pytest.raises(ValueError, match="memory_budget must be an integer >= 1; got 0"):
        Ensemble(ens.template, ens.params, memory_budget=0)
    with pytest.raises(ValueError, match=r"params must hold exactly the template's parameters.*missing \['0.bias'\]"):
        Ensemble(ens.template, {k: v for k, v in ens.params.items() if k != "0.bias"})


@pytest.mark.parametrize("points", [1, 16, 17, 40])
@pytest.mark.parametrize("shape", [
    dict(in_features=2, classes=2, hidden=(12, 12)),     # 2-D input, two-class head (W @ h^T)
    dict(in_features=30, classes=12, hidden=(9,)),       # wide input (addmm bias at few points), wide head
    dict(in_features=3, classes=5, hidden=(7, 6, 5)),
])
def test_inference_layouts_equal_the_member_loop(points, shape):
    # Without a graph the first layer is one GEMM over all members side by side and
    # narrow heads come out classes-first; reference: each member's own nn.Module.
    ens, nets = random_mlp_ensemble(members=5, **shape)
    x = torch.randn(points, shape["in_features"], generator=torch.Generator().manual_seed(points))
    with torch.no_grad():
        logits = ens.logits(x)
        probs = ens.predict(x).member_probs
    want = _loop_logits(nets, x)
    assert logits.is_contiguous() and probs.is_contiguous()
    torch.testing.assert_close(logits, want, atol=1e-5, rtol=1e-5)
    torch.testing.assert_close(probs, torch.softmax(want, -1), atol=1e-6, rtol=1e-5)


def test_inference_chunks_over_members_equal_the_member_loop(monkeypatch):
    import jostle.posterior.forward as _forward

    monkeypatch.setattr(_forward, "CACHE_BYTES", 3 * 40 * 12 * 4)  # three members per chunk
    ens, nets = random_mlp_ensemble(members=8, hidden=(12, 12))
    x = torch.randn(40, 2, generator=torch.Generator().manual_seed(5))
    torch.testing.assert_close(ens.predict(x).member_probs, torch.softmax(_loop_logits(nets, x), -1),
                               atol=1e-6, rtol=1e-5)


def test_training_forward_keeps_its_products_bit_for_bit():
    # With a graph recorded (fits, autograd attacks) the forward keeps the batched
    # baddbmm products, so that seeded fits reproduce exactly; reference: those products
    # written out here.
    ens, _ = random_mlp_ensemble(members=4, hidden=(8,))
    params = {k: v.detach().clone().requires_grad_(True) for k, v in ens.params.items()}
    x = torch.randn(4, 25, 2, generator=torch.Generator().manual_seed(6))  # one block per member
    got = ens._plan.forward(params, x, per_member=True)
    h = torch.tanh(torch.baddbmm(params["0.bias"].unsqueeze(1), x, params["0.weight"].transpose(1, 2)))
    want = torch.baddbmm(params["2.bias"].unsqueeze(1), h, params["2.weight"].transpose(1, 2))
    assert torch.equal(got, want)  # the same baddbmm on the same tensors: exact by construction
