"""MC dropout folded into weights: against torch's own nn.Dropout and the one-layer closed form."""
import pytest
import torch
from torch import nn

import jostle
from jostle.fitting.dropout import fit_dropout, fold_dropout_masks, sample_dropout


@pytest.fixture(scope="module")
def moons():
    return jostle.datasets.moons(n_train=64, n_test=32, noise=0.2, seed=0)


def _record_torch_dropout(net, x, draws):
    """Run torch's nn.Dropout in training mode one draw at a time, capturing its keep-masks."""
    captured = []
    hooks = [layer.register_forward_hook(lambda mod, inp, out: captured.append((out[0] != 0) | (inp[0][0] == 0)))
             for layer in net if isinstance(layer, nn.Dropout)]
    outputs, masks = [], []
    net.train()
    with torch.random.fork_rng():  # torch's dropout draws from the global RNG; restore it after
        for s in range(draws):
            torch.manual_seed(s)
            captured.clear()
            with torch.no_grad():
                outputs.append(net(x)[0])
            masks.append([m.float() for m in captured])
    for hook in hooks:
        hook.remove()
    per_layer = [torch.stack([draw[k] for draw in masks]) for k in range(len(masks[0]))]
    return torch.stack(outputs), per_layer


def test_folded_masks_reproduce_torch_dropout_exactly():
    # Inverted dropout (torch.nn.Dropout semantics): drop with prob p, scale kept units by 1/(1-p).
    net = jostle.init_parameters(jostle.mlp(3, 4, hidden=(7, 5), dropout=0.3), torch.Generator().manual_seed(0))
    x = torch.tensor([[0.3, -1.2, 0.8]])
    expected, masks = _record_torch_dropout(net, x, draws=12)
    assert any(bool((m == 0).any()) for m in masks)
    ens = fold_dropout_masks(net, masks)
    assert len(ens) == 12
    torch.testing.assert_close(ens.logits(x)[:, 0], expected, atol=1e-6, rtol=1e-6)


def test_one_linear_layer_mean_and_variance():
    # Gal & Ghahramani 2016 (from memory): y = w'(m * x)/(1-p) has E[y] = w'x and
    # Var[y] = p/(1-p) * sum(w_i^2 x_i^2).
    p = 0.25
    net = nn.Sequential(nn.Dropout(p), nn.Linear(6, 2))
    g = torch.Generator().manual_seed(1)
    with torch.no_grad():
        net[1].weight.copy_(torch.randn(2, 6, generator=g))
        net[1].bias.zero_()
    x = torch.randn(1, 6, generator=g)
    samples = 100_000
    y = sample_dropout(net, samples=samples, seed=3).logits(x)[:, 0, 0].double()
    w = net[1].weight[0].detach().double()
    mean = float(w @ x[0].double())
    variance = float(p / (1 - p) * (w ** 2 * x[0].double() ** 2).sum())
    assert abs(float(y.mean()) - mean) < 5 * (variance / samples) ** 0.5
    assert float(y.var()) == pytest.approx(variance, rel=0.03)


def test_fit_dropout_gives_a_fixed_ensemble(moons, tmp_path):
    ens = fit_dropout(jostle.mlp(2, 2, hidden=(8, 8), dropout=0.2), moons, samples=20, epochs=3, seed=0,
                      progress=False)
    assert len(ens) == 20 and ens.meta["method"] == "dropout" and ens.meta["p"] == [0.2, 0.2]
    assert ens.meta["architecture"]["kwargs"]["dropout"] == 0.0
    assert ens.meta["classes"] == moons.classes and ens.meta["data"] == moons.describe()
    assert not any(isinstance(layer, nn.Dropout) for layer in ens.template)
    first, second = ens.logits(moons.x_test), ens.logits(moons.x_test)
    torch.testing.assert_close(first, second, atol=0, rtol=0)  # same kernel, same input: exact
    assert float(first.std(0).mean()) > 0  # the masks really differ between members
    ens.save(tmp_path / "mc.safetensors")
    torch.testing.assert_close(jostle.load(tmp_path / "mc.safetensors").logits(moons.x_test), first)
    again = fit_dropout(jostle.mlp(2, 2, hidden=(8, 8), dropout=0.2), moons, samples=20, epochs=3, seed=0,
                        progress=False)
    torch.testing.assert_close(again.logits(moons.x_test), first, atol=0, rtol=0)  # same seed, one process


def test_dropout_is_inserted_or_overridden(moons):
    plain = fit_dropout(jostle.mlp(2, 2, hidden=(8,)), moons, samples=5, epochs=1, progress=False)
    assert plain.meta["p"] == [0.1]
    custom = nn.Sequential(nn.Linear(2, 6), nn.ReLU(), nn.Linear(6, 4), nn.ReLU(), nn.Linear(4, 2))
    ens = fit_dropout(custom, moons, p=0.4, samples=5, epochs=1, progress=False)
    assert ens.meta["p"] == [0.4, 0.4] and ens.meta["architecture"] is None
    assert [n for n, _ in ens.template.named_parameters()] == [n for n, _ in custom.named_parameters()]
    overridden = fit_dropout(jostle.mlp(2, 2, hidden=(8,), dropout=0.3), moons, p=0.05, samples=5, epochs=1,
                             progress=False)
    assert overridden.meta["p"] == [0.05]


def test_validation_uses_the_network_without_dropout(moons):
    ens = fit_dropout(jostle.mlp(2, 2, hidden=(8,)), moons, samples=4, epochs=50, lr=0.05, validation=0.25,
                      patience=2, progress=False)
    assert ens.meta["epochs_run"] < 50


def test_dropout_errors_are_clear(moons):
    net = jostle.mlp(2, 2, hidden=(4,), dropout=0.1)
    with pytest.raises(ValueError, match="p must be a finite float >= 0 and < 1; got 1"):
        fit_dropout(net, moons, p=1.0)
    with pytest.raises(ValueError, match="samples must be an integer >= 1; got 0"):
        fit_dropout(net, moons, samples=0)

    class NotSequential(nn.Module):
        def __init__(self):
            super().__init__()
            self.a = nn.Linear(2, 2)

        def forward(self, x):
            return self.a(x)

    with pytest.raises(ValueError, match="module must hold Dropout layers, or be a jostle.mlp, jostle.cnn or "
                                         "nn.Sequential that dropout can be inserted into; got a NotSequential"):
        fit_dropout(NotSequential(), moons, epochs=1)
    with pytest.raises(ValueError, match="at least one Dropout layer with p > 0"):
        fold_dropout_masks(jostle.mlp(2, 2, hidden=(4,)), [])
    with pytest.raises(ValueError, match=r"masks must hold one tensor per Dropout layer with p > 0 \(1\); got 2"):
        fold_dropout_masks(net, [torch.ones(3, 4), torch.ones(3, 4)])
    with pytest.raises(ValueError, match=r"masks\[0\] must have shape \(S, 4\)"):
        fold_dropout_masks(net, [torch.ones(3, 5)])
    with pytest.raises(ValueError, match=r"masks\[0\] must hold only 0 \(drop\) and 1 \(keep\)"):
        fold_dropout_masks(net, [torch.full((3, 4), 0.5)])
    with pytest.raises(ValueError, match="samples must be an integer >= 1; got -2"):
        sample_dropout(net, samples=-2)
