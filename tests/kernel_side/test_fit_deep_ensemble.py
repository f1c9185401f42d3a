"""fit_map and fit_deep_ensemble: stacked training against plain one-by-one torch loops."""
import copy

import pytest
import torch
from torch import nn
from torch.nn import functional as F

import jostle
from jostle import Ensemble
from jostle.fitting.point_estimates import fit_deep_ensemble, fit_map


@pytest.fixture(scope="module")
def moons():
    return jostle.datasets.moons(n_train=64, n_test=32, noise=0.2, seed=0)


def _plain_adam_run(module, x, y, seed, epochs, batch_size, lr, weight_decay):
    # The reference: one network, torch's own Adam and cross-entropy, the same seeded
    # initialisation and shuffles (common practice for checking a vectorised trainer).
    generator = torch.Generator().manual_seed(seed)
    net = jostle.init_parameters(copy.deepcopy(module), generator)
    optimiser = torch.optim.Adam(net.parameters(), lr=lr, weight_decay=weight_decay)
    for _ in range(epochs):
        order = torch.randperm(x.shape[0], generator=generator)
        for start in range(0, x.shape[0], batch_size):
            index = order[start:start + batch_size]
            optimiser.zero_grad()
            F.cross_entropy(net(x[index]), y[index]).backward()
            optimiser.step()
    return net


def test_stacked_training_equals_members_trained_one_by_one(moons):
    net = jostle.mlp(2, 2, hidden=(16, 16))
    settings = dict(epochs=3, batch_size=10, lr=0.01, weight_decay=1e-3)
    ens = fit_deep_ensemble(net, moons, members=4, seed=7, progress=False, **settings)
    for m in range(4):
        reference = _plain_adam_run(net, moons.x_train, moons.y_train, 7 + m, **settings)
        for name, value in reference.state_dict().items():
            torch.testing.assert_close(ens.params[name][m], value, atol=1e-5, rtol=1e-5)
        alone = fit_map(net, moons, seed=7 + m, progress=False, **settings)
        for name, value in alone.params.items():
            torch.testing.assert_close(ens.params[name][m], value[0], atol=1e-5, rtol=1e-5)


def test_sgd_stacked_equals_lone_runs(moons):
    net = jostle.mlp(2, 2, hidden=(8,))
    settings = dict(epochs=2, batch_size=16, lr=0.05, optimizer="sgd", momentum=0.5)
    ens = fit_deep_ensemble(net, moons, members=3, seed=1, progress=False, **settings)
    for m in range(3):
        alone = fit_map(net, moons, seed=1 + m, progress=False, **settings)
        torch.testing.assert_close(ens.params["0.weight"][m], alone.params["0.weight"][0], atol=1e-6, rtol=1e-6)


def test_members_differ_and_meta_is_complete(moons, tmp_path):
    net = jostle.mlp(2, 2, hidden=(8,))
    ens = fit_deep_ensemble(net, moons, members=3, epochs=2, seed=0, progress=False)
    assert len(ens) == 3
    assert not torch.allclose(ens.params["0.weight"][0], ens.params["0.weight"][1])
    meta = ens.meta
    assert meta["method"] == "deep_ensemble" and meta["members"] == 3 and meta["seed"] == 0
    assert meta["classes"] == moons.classes
    assert meta["bounds"] == [moons.bounds[0].tolist(), moons.bounds[1].tolist()]
    assert meta["data"] == moons.describe()
    assert meta["architecture"] == jostle.posterior.architectures.architecture_of(net)
    assert meta["epochs"] == 2 and meta["member_seeds"] == [0, 1, 2] and meta["seconds"] >= 0
    assert not any(p.requires_grad for p in ens.params.values())
    ens.save(tmp_path / "de.safetensors")
    back = jostle.load(tmp_path / "de.safetensors")
    torch.testing.assert_close(back.logits(moons.x_test), ens.logits(moons.x_test))


def test_fit_is_seeded_and_leaves_global_rng_alone(moons):
    net = jostle.mlp(2, 2, hidden=(8,))
    state = torch.random.get_rng_state()
    a = fit_map(net, moons, epochs=2, seed=3, progress=False)
    assert torch.equal(state, torch.random.get_rng_state())
    b = fit_map(net, moons, epochs=2, seed=3, progress=False)
    c = fit_map(net, moons, epochs=2, seed=4, progress=False)
    assert torch.equal(a.params["2.weight"], b.params["2.weight"])
    assert not torch.equal(a.params["2.weight"], c.params["2.weight"])
    assert a.meta["method"] == "map" and len(a) == 1


def test_small_fits_restore_the_thread_setting_and_honour_device(moons):
    before = torch.get_num_threads()
    ens = fit_map(jostle.mlp(2, 2, hidden=(4,)), moons, epochs=1, progress=False, device=torch.device("cpu"))
    assert torch.get_num_threads() == before
    assert ens.device.type == "cpu" and ens.params["0.weight"].device.type == "cpu"


def test_early_stopping_keeps_each_members_best_epoch(moons):
    net = jostle.mlp(2, 2, hidden=(8,))
    ens = fit_deep_ensemble(net, moons, members=2, epochs=200, lr=0.05, validation=0.25, patience=3,
                            seed=0, progress=False)
    assert ens.meta["epochs_run"] < 200
    assert all(0 <= b < ens.meta["epochs_run"] for b in ens.meta["best_epoch"])


def test_progress_bar_shows_loss(moons, capsys):
    fit_map(jostle.mlp(2, 2, hidden=(4,)), moons, epochs=2, progress=True)
    assert "loss=" in capsys.readouterr().err
    fit_map(jostle.mlp(2, 2, hidden=(4,)), moons, epochs=2, progress=False)
    assert capsys.readouterr().err == ""


def test_dropout_layers_are_off_in_map_training(moons, tmp_path):
    with_dropout = jostle.mlp(2, 2, hidden=(8,), dropout=0.5)
    a = fit_map(with_dropout, moons, epochs=2, seed=0, progress=False)
    b = fit_map(jostle.mlp(2, 2, hidden=(8,)), moons, epochs=2, seed=0, progress=False)
    torch.testing.assert_close(a.params["3.weight"], b.params["2.weight"])
    a.save(tmp_path / "map.safetensors")  # the rebuilt dropout layer must come back switched off
    torch.testing.assert_close(jostle.load(tmp_path / "map.safetensors").logits(moons.x_test), a.logits(moons.x_test))


class _Wide(nn.Module):
    def __init__(self):
        super().__init__()
        self.a = nn.Linear(2, 6)
        self.b = nn.Linear(6, 2)

    def forward(self, x):
        return self.b(torch.sin(self.a(x)))


@pytest.mark.parametrize("make", [lambda: jostle.mlp(2, 3, hidden=(5, 4)), _Wide])
def test_per_member_forward_equals_member_loop(make):
    # Per-member inputs [S, n, D]: each member on its own block, against a plain loop.
    g = torch.Generator().manual_seed(0)
    nets = [jostle.init_parameters(make(), g) for _ in range(4)]
    ens = Ensemble.from_modules(nets)
    x = torch.randn(4, 7, 2, generator=g)
    expected = torch.stack([net(x[i]) for i, net in enumerate(nets)])
    torch.testing.assert_close(ens._plan.forward(ens.params, x, per_member=True), expected)


def test_user_errors_are_clear(moons):
    net = jostle.mlp(2, 2, hidden=(4,))
    with pytest.raises(ValueError, match="members must be an integer >= 1; got 0"):
        fit_deep_ensemble(net, moons, members=0)
    with pytest.raises(ValueError, match="epochs must be an integer >= 1; got 0"):
        fit_map(net, moons, epochs=0)
    with pytest.raises(ValueError, match="batch_size must be an integer >= 1; got 2.5"):
        fit_map(net, moons, batch_size=2.5)
    with pytest.raises(ValueError, match="lr must be a finite float > 0; got -1"):
        fit_map(net, moons, lr=-1.0)
    with pytest.raises(ValueError, match="weight_decay must be a finite float >= 0; got -0.1"):
        fit_map(net, moons, weight_decay=-0.1)
    with pytest.raises(ValueError, match="optimizer must be one of 'adam', 'sgd'; got 'rmsprop'"):
        fit_map(net, moons, optimizer="rmsprop")
    with pytest.raises(ValueError, match="momentum must be a finite float >= 0 and < 1; got 1"):
        fit_map(net, moons, optimizer="sgd", momentum=1.0)
    with pytest.raises(ValueError, match=r"validation must be a finite float >= 0 and < 1; got 1.5"):
        fit_map(net, moons, validation=1.5)
    with pytest.raises(ValueError, match="patience must be an integer >= 1; got 0"):
        fit_map(net, moons, patience=0)
    with pytest.raises(ValueError, match="seed must be an integer >= 0; got -1"):
        fit_map(net, moons, seed=-1)
    with pytest.raises(ValueError, match="device must name a torch device"):
        fit_map(net, moons, device="nowhere")
    with pytest.raises(TypeError, match="data must be a jostle.Dataset"):
        fit_map(net, (moons.x_train, moons.y_train))
    with pytest.raises(TypeError, match="module must be a torch.nn.Module; got str"):
        fit_map("mlp", moons)
    with pytest.raises(ValueError, match=r"module must output logits of shape \(n_points, 2\)"):
        fit_map(jostle.mlp(2, 3), moons)
    with pytest.raises(ValueError, match=r"module must accept inputs of shape \(n_points, 2\)"):
        fit_map(jostle.mlp(5, 2), moons)
    tiny = jostle.datasets.from_arrays([[0.0, 0.0], [1.0, 1.0]], [0, 1], [[0.5, 0.5]], [0])
    with pytest.raises(ValueError, match="validation must leave at least one point on each side"):
        fit_map(net, tiny, validation=0.1)
