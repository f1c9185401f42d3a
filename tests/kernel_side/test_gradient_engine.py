"""The public gradient engine: Ensemble.value_and_input_grad and Ensemble.member_input_grads.

References: torch.autograd.grad of ``torch.nn.functional.cross_entropy`` through each
member's own nn.Module (the expected loss is the mean of the members' losses), and the
engine's own ``backward="autograd"`` path.
"""
import pytest
import torch
from torch import nn

import jostle
from jostle.posterior.planned_gradient import ExpectedLossGradient


def _ensemble(activation="tanh", members=5, seed=0):
    g = torch.Generator().manual_seed(seed)
    nets = [jostle.init_parameters(jostle.mlp(2, 3, hidden=(8, 8), activation=activation), g).double()
            for _ in range(members)]
    return jostle.Ensemble.from_modules(nets), nets


def _points(n=6, seed=1):
    return torch.randn(n, 2, generator=torch.Generator().manual_seed(seed), dtype=torch.float64)


@pytest.mark.parametrize("activation", ["tanh", "gelu"])
def test_expected_loss_and_member_grads_match_per_module_autograd(activation):
    ens, nets = _ensemble(activation)
    x, y = _points(), torch.tensor([0, 1, 2, 2, 1, 0])
    grads, losses = [], []
    for net in nets:
        leaf = x.clone().requires_grad_(True)
        loss = nn.functional.cross_entropy(net(leaf), y, reduction="none")
        grads.append(torch.autograd.grad(loss.sum(), leaf)[0])
        losses.append(loss.detach())
    value, grad = ens.value_and_input_grad(x, y)
    # float64, two code paths over 5 members of an 8-8 network: a few ulp of O(1) values
    torch.testing.assert_close(value, torch.stack(losses).mean(0), rtol=1e-10, atol=1e-12)
    torch.testing.assert_close(grad, torch.stack(grads).mean(0), rtol=1e-10, atol=1e-12)
    torch.testing.assert_close(ens.member_input_grads(x, y), torch.stack(grads), rtol=1e-10, atol=1e-12)
    value_t, grad_t = ens.value_and_input_grad(x, y, targeted=True)
    # the targeted value is the negative: exact sign flips of the same arithmetic
    torch.testing.assert_close(value_t, -value, rtol=0, atol=0)
    torch.testing.assert_close(grad_t, -grad, rtol=0, atol=0)


def test_labels_default_to_the_prediction_and_members_select():
    ens, _ = _ensemble()
    x = _points()
    label = ens.predict(x).label
    for objective in ("expected_loss", "predictive", "margin"):
        got = ens.value_and_input_grad(x, None, objective=objective, members=[0, 3])
        want = ens[[0, 3]].value_and_input_grad(x, label, objective=objective, backward="autograd")
        for a, b in zip(got, want):
            # float64, planned passes vs autograd on two members: a few ulp
            torch.testing.assert_close(a, b, rtol=1e-10, atol=1e-12)


def test_a_fixed_selection_reuses_one_planned_kernel_until_the_parameters_change(monkeypatch):
    built = []
    original = ExpectedLossGradient.try_build.__func__

    def counting(cls, *args, **kwargs):
        built.append(1)
        return original(cls, *args, **kwargs)

    monkeypatch.setattr(ExpectedLossGradient, "try_build", classmethod(counting))
    ens, _ = _ensemble()
    x, y = _points(), torch.tensor([0, 1, 2, 2, 1, 0])
    first = ens.value_and_input_grad(x, y)
    ens.value_and_input_grad(x + 0.1, y)
    assert len(built) == 1
    with torch.no_grad():
        ens.params["0.weight"].mul_(2.0)  # in place: the kept kernel is stale
    after = ens.value_and_input_grad(x, y)
    assert len(built) == 2
    want = ens.value_and_input_grad(x, y, backward="autograd")
    assert not torch.allclose(after[1], first[1])
    # float64, planned passes vs autograd: a few ulp of O(1) values
    torch.testing.assert_close(after[1], want[1], rtol=1e-10, atol=1e-12)


def test_bad_switches_are_named():
    ens, _ = _ensemble()
    x, y = _points(), torch.tensor([0, 1, 2, 2, 1, 0])
    with pytest.raises(ValueError, match="backward must be one of"):
        ens.value_and_input_grad(x, y, backward="hand")
    with pytest.raises(ValueError, match="backward must be one of"):
        ens.member_input_grads(x, y, backward=None)
    with pytest.raises(ValueError, match="objective must be one of"):
        ens.value_and_input_grad(x, y, objective="loss")
    with pytest.raises(ValueError, match="targeted must be True or False; got 1"):
        ens.value_and_input_grad(x, y, targeted=1)
    with pytest.raises(ValueError, match=r"y must have shape \(6,\)"):
        ens.value_and_input_grad(x, [0, 1])
    with pytest.raises(ValueError, match="backward must be one of"):
        jostle.attack(ens, x, steps=2, backward="fast")
