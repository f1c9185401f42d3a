"""fit_hmc: a network's posterior by HMC, judged in function space."""
from __future__ import annotations

import json
import warnings

import pytest
import torch

import jostle
from jostle import ConvergenceWarning
from jostle.fitting.hmc.network_density import NetworkPosterior
from jostle.posterior.architectures import architecture_of


@pytest.fixture(scope="module")
def moons():
    return jostle.datasets.moons(n_train=300, n_test=300, noise=0.2, seed=0)


def test_log_posterior_matches_a_plain_module_loop(moons):
    # Reference: torch's own cross-entropy on each member as an ordinary module, plus the
    # Gaussian log prior written out.
    net = jostle.mlp(2, 2, hidden=(5,))
    posterior = NetworkPosterior(net, moons, prior_std=0.7, device=torch.device("cpu"))
    flat = torch.randn(3, posterior.dimension, generator=torch.Generator().manual_seed(0))
    with torch.no_grad():
        values = posterior(flat)
    for c in range(3):
        member = jostle.mlp(2, 2, hidden=(5,))
        torch.nn.utils.vector_to_parameters(flat[c], member.parameters())
        with torch.no_grad():
            loglik = -torch.nn.functional.cross_entropy(member(moons.x_train), moons.y_train, reduction="sum")
        prior = -0.5 * (flat[c] ** 2).sum() / 0.7 ** 2
        assert float(values[c]) == pytest.approx(float(loglik + prior), rel=1e-5)


def test_short_fit_records_diagnostics_and_warns_about_too_few_draws(moons, capsys):
    net = jostle.mlp(2, 2, hidden=(4,))
    with pytest.warns(ConvergenceWarning, match="bulk ESS .* < 200 \\(100 per chain\\)"):
        ens = jostle.fit_hmc(net, moons, samples=6, chains=2, warmup=20, draws_per_chain=12,
                             map_steps=50, trajectory_length=0.2, max_steps=8, seed=3)
    assert len(ens) == 6
    meta = ens.meta
    json.dumps(meta)  # JSON-serialisable
    assert meta["method"] == "hmc"
    assert meta["classes"] == ["0", "1"]
    assert meta["bounds"] == [moons.bounds[0].tolist(), moons.bounds[1].tolist()]
    assert meta["architecture"] == architecture_of(net)
    assert meta["data"]["name"] == "moons" and meta["seed"] == 3 and meta["seconds"] > 0
    assert meta["hyperparameters"]["chains"] == 2 and meta["hyperparameters"]["draws_per_chain"] == 12
    diagnostics = meta["diagnostics"]
    assert len(diagnostics["accept_rate"]) == 2 and diagnostics["transitions"] == 24
    assert set(diagnostics["train_log_likelihood"]) >= {"mean", "rhat", "ess_bulk", "ess_tail"}
    assert diagnostics["test_probs"]["points"] == 300
    assert any("bulk ESS" in p for p in diagnostics["problems"])
    assert "95th percentile of test-probability R-hat <= 1.01" in diagnostics["checks"]
    assert diagnostics["test_probs"]["rhat_q95"] >= diagnostics["test_probs"]["rhat_median"]
    ens.info()
    shown = capsys.readouterr().out
    for phrase in ("hmc posterior: 6 members", "acceptance (per chain)", "divergences after warm-up",
                   "step size", "train log-likelihood", "test-set probabilities", "time taken", "WARNING"):
        assert phrase in shown


def test_same_seed_same_posterior(moons):
    net = jostle.mlp(2, 2, hidden=(3,))
    kwargs = dict(samples=4, chains=2, warmup=10, draws_per_chain=6, map_steps=10, max_steps=4, seed=1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        a = jostle.fit_hmc(net, moons, **kwargs)
        b = jostle.fit_hmc(net, moons, **kwargs)
        c = jostle.fit_hmc(net, moons, init="prior", **kwargs)
    for name in a.params:
        assert torch.equal(a.params[name], b.params[name])  # same seed, one process: exact
        assert not torch.equal(a.params[name], c.params[name])


def test_first_momentum_is_not_a_replay_of_the_prior_start(moons, monkeypatch):
    # The chains' initialisation and the sampler's momenta come from different streams: with one
    # seed for both, the first momentum drawn (identity metric) equalled theta0 / prior_std.
    import jostle.fitting.hmc.chains as loop
    import jostle.fitting.hmc.fit as hmc_fit

    seen = {}
    start, kinetic = hmc_fit.prior_start, loop.kinetic_energy

    def recording_start(*args, **kwargs):
        seen["initial"] = start(*args, **kwargs)
        return seen["initial"]

    def recording_kinetic(momentum, inverse_mass):
        seen.setdefault("momentum", momentum.clone())
        return kinetic(momentum, inverse_mass)

    monkeypatch.setattr(hmc_fit, "prior_start", recording_start)
    monkeypatch.setattr(loop, "kinetic_energy", recording_kinetic)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        jostle.fit_hmc(jostle.mlp(2, 2, hidden=(3,)), moons, samples=2, chains=3, warmup=0, draws_per_chain=2,
                       init="prior", prior_std=0.5, max_steps=2, seed=5, progress=False)
    initial, momentum = seen["initial"], seen["momentum"]
    assert momentum.shape == initial.shape
    scaled = initial / 0.5
    assert not torch.allclose(momentum, scaled, rtol=1e-3, atol=1e-3)
    # independent standard normals: their correlation is small (|r| < 4 / sqrt(n), n = 3 * 17)
    r = float(torch.corrcoef(torch.stack([momentum.flatten(), scaled.flatten()]))[0, 1])
    assert abs(r) < 4 / initial.numel() ** 0.5


@pytest.mark.slow
def test_moons_posterior_is_accurate_and_mixes_in_function_space(moons, tmp_path):
    # Acceptance bar for the product: test accuracy >= 0.94 and median R-hat of the
    # test-set predicted probabilities < 1.05 (R-hat per Vehtari et al. 2021).
    net = jostle.mlp(2, 2, hidden=(32, 32))
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        ens = jostle.fit_hmc(net, moons, samples=100, chains=4, seed=0)
    accuracy = float((ens.predict(moons.x_test).label == moons.y_test).double().mean())
    assert accuracy >= 0.94
    diagnostics = ens.meta["diagnostics"]
    assert diagnostics["test_probs"]["rhat_median"] < 1.05
    assert len(ens) == 100
    # The warning is raised exactly when a check failed, and names every failure.
    raised = [str(w.message) for w in caught if issubclass(w.category, ConvergenceWarning)]
    assert bool(raised) == bool(diagnostics["problems"])
    for problem in diagnostics["problems"]:
        assert problem in raised[0]
    ens.save(tmp_path / "hmc.safetensors")
    assert jostle.load(tmp_path / "hmc.safetensors").meta["diagnostics"] == json.loads(json.dumps(diagnostics))


@pytest.mark.parametrize("kwargs, message", [
    (dict(module="net"), "module must be a torch.nn.Module; got 'net'"),
    (dict(data=[1, 2]), "data must be a jostle.Dataset; got \\[1, 2\\]"),
    (dict(samples=0), "samples must be an integer >= 1; got 0"),
    (dict(chains=0), "chains must be an integer >= 1; got 0"),
    (dict(warmup=-2), "warmup must be an integer >= 0; got -2"),
    (dict(draws_per_chain=0), "draws_per_chain must be an integer >= 1; got 0"),
    (dict(samples=50, chains=2, draws_per_chain=10), "samples must be <= chains \\* draws_per_chain = 20; got 50"),
    (dict(prior_std=0.0), "prior_std must be a finite float > 0; got 0"),
    (dict(trajectory_length=-1.0), "trajectory_length must be a finite float > 0; got -1"),
    (dict(max_steps=0), "max_steps must be an integer >= 1; got 0"),
    (dict(target_accept=1.5), "target_accept must be a finite float > 0 and < 1; got 1.5"),
    (dict(init="zeros"), "init must be one of 'map', 'prior'; got 'zeros'"),
    (dict(map_steps=-1), "map_steps must be an integer >= 0; got -1"),
    (dict(map_lr=0.0), "map_lr must be a finite float > 0; got 0"),
    (dict(seed=1.5), "seed must be an integer; got 1.5"),
    (dict(threads=0, map_steps=0, warmup=0, draws_per_chain=1, samples=1), "threads must be an integer >= 1; got 0"),
])
def test_fit_hmc_rejects_bad_arguments(moons, kwargs, message):
    arguments = dict(module=jostle.mlp(2, 2, hidden=(3,)), data=moons)
    arguments.update(kwargs)
    with pytest.raises(ValueError, match=message):
        jostle.fit_hmc(**arguments)


def test_fit_hmc_refuses_a_module_with_nothing_to_sample(moons):
    net = jostle.mlp(2, 2, hidden=(3,)).requires_grad_(False)
    with pytest.raises(ValueError, match="module must have at least one parameter with requires_grad=True; got none"):
        jostle.fit_hmc(net, moons)


def test_interrupt_before_the_first_draw_is_passed_on(moons, monkeypatch):
    calls = {"n": 0}
    original = NetworkPosterior.__call__

    def interrupted_after_three(self, flat):
        calls["n"] += 1
        if calls["n"] > 3:
            raise KeyboardInterrupt
        return original(self, flat)

    monkeypatch.setattr(NetworkPosterior, "__call__", interrupted_after_three)
    with pytest.warns(jostle.SamplingInterruptedWarning, match="returning the 0 of 5 draws"):
        with pytest.raises(KeyboardInterrupt, match="sampling was interrupted before the first draw"):
            jostle.fit_hmc(jostle.mlp(2, 2, hidden=(3,)), moons, samples=2, chains=2, warmup=10,
                           draws_per_chain=5, map_steps=0)
