"""State that survives slicing: an ensemble's posterior, and attack problems and their subsets.

No outside reference here: these are invariants of jostle's own containers (a slice of
draws still comes from the posterior that drew them; a subset of points is the problem
those points would have made on their own).
"""
import dataclasses

import pytest
import torch

import jostle
from jostle.attacks.gradient_methods import pgd
from jostle.attacks.problem import build_problem
from jostle.fitting.laplace import LastLayerLaplace
from jostle.fitting.variational import VariationalPosterior
from tests.conftest import random_mlp_ensemble


@pytest.fixture(scope="module")
def moons():
    return jostle.datasets.moons(n_train=64, n_test=16, noise=0.2, seed=0)


@pytest.fixture(scope="module")
def fitted(moons):
    net = jostle.mlp(2, 2, hidden=(8,))
    return {
        "vi": jostle.fit_vi(net, moons, samples=10, epochs=2, seed=0, progress=False),
        "laplace": jostle.fit_laplace(net, moons, samples=10, epochs=2, seed=0, progress=False),
    }


@pytest.mark.parametrize("method, kind", [("vi", VariationalPosterior), ("laplace", LastLayerLaplace)])
def test_slices_and_subsets_keep_the_posterior(fitted, method, kind):
    ens = fitted[method]
    assert isinstance(ens.posterior, kind)
    for part in (ens[:3], ens[2], ens[[0, 4]], ens.subset(4, seed=1)):
        assert part.posterior is ens.posterior
    assert len(ens[:3].posterior.draw(7, seed=0)) == 7


@pytest.mark.parametrize("method", ["vi", "laplace"])
def test_to_moves_the_posterior_with_the_members(fitted, method):
    ens = fitted[method]
    moved = ens.to(dtype=torch.float64)
    assert moved.posterior is not None and moved.posterior is not ens.posterior
    redrawn = moved.posterior.draw(5, seed=0)
    assert redrawn.dtype == torch.float64 and redrawn.posterior is moved.posterior
    # The original stays where it was.
    assert ens.posterior.draw(5, seed=0).dtype == torch.float32


def test_vi_posterior_to_copies_means_and_rhos_exactly(fitted):
    posterior = fitted["vi"].posterior
    moved = posterior.to(dtype=torch.float64)
    for name, mean in posterior.mean.items():
        # float32 -> float64 is exact, so the copy is bit-equal after casting back.
        assert torch.equal(moved.mean[name].float(), mean)
    for name, rho in posterior.rho.items():
        assert torch.equal(moved.rho[name].float(), rho)


def test_ensembles_without_a_posterior_say_none():
    ens, _ = random_mlp_ensemble(members=3)
    assert ens.posterior is None and ens[:2].posterior is None and ens.to(dtype=torch.float64).posterior is None


def test_a_posterior_must_draw_and_move():
    ens, _ = random_mlp_ensemble(members=3)
    with pytest.raises(TypeError, match=r"posterior must be None or have draw\(samples, seed\) and "
                                        r"to\(device, dtype\) methods; got object"):
        ens.posterior = object()
    with pytest.raises(TypeError, match=r"posterior must be None or have draw"):
        jostle.Ensemble(ens.template, ens.params, posterior="vi")


def test_save_does_not_store_the_posterior(fitted, tmp_path):
    # Only the draws are saved (safetensors + JSON); a loaded ensemble has no posterior.
    path = tmp_path / "vi.safetensors"
    fitted["vi"].save(path)
    loaded = jostle.load(path)
    assert loaded.posterior is None
    assert torch.equal(loaded.params["0.weight"], fitted["vi"].params["0.weight"])


# ------------------------------------------------------------------ attack problems
def _problem(ens, x, **options):
    settings = dict(eps=0.3, norm="inf", objective="expected_loss", samples=None, resample=False, target=None,
                    bounds=None, seed=5)
    settings.update(options)
    return build_problem(ens, x, None, **settings)


def test_attack_problem_is_immutable():
    ens, _ = random_mlp_ensemble(members=3, classes=2, hidden=(8,), seed=2)
    problem = _problem(ens, torch.zeros(4, 2))
    with pytest.raises(dataclasses.FrozenInstanceError):
        problem.x = torch.ones(4, 2)


def test_a_subset_after_a_gradient_is_the_problem_of_its_points():
    # Computing a gradient on the whole problem must leave nothing behind that a subset
    # picks up: PGD on the subset equals PGD on a problem built from those points alone
    # (same kernels, same inputs, same seed in one process: bit-equal).
    ens, _ = random_mlp_ensemble(members=4, classes=3, hidden=(16,), seed=3)
    x = torch.randn(12, 2, generator=torch.Generator().manual_seed(3))
    problem = _problem(ens, x)
    problem.objective_and_grad(problem.x)
    index = torch.tensor([1, 4, 5, 10])
    sub = problem.subset(index)
    alone = build_problem(ens, x[index], problem.label[index], eps=0.3, norm="inf", objective="expected_loss",
                          samples=None, resample=False, target=None, bounds=None, seed=5)
    ran, reference = pgd(sub, 10), pgd(alone, 10)
    assert torch.equal(ran.path, reference.path) and torch.equal(ran.success, reference.success)
    assert problem.points == 12  # the whole problem is unchanged


def test_subset_takes_new_budgets_and_a_mask():
    ens, _ = random_mlp_ensemble(members=2, classes=2, hidden=(8,), seed=4)
    x = torch.randn(5, 2, generator=torch.Generator().manual_seed(4))
    problem = _problem(ens, x)
    mask = torch.tensor([True, False, True, False, False])
    sub = problem.subset(mask, eps=torch.tensor([0.1, 0.2]))
    assert sub.points == 2 and torch.equal(sub.x, x[mask]) and sub.eps.tolist() == pytest.approx([0.1, 0.2])
    assert tuple(sub.eps_b.shape) == (2, 1)
    with pytest.raises(ValueError, match=r"eps must hold one budget per chosen point \(2\); got 3"):
        problem.subset(mask, eps=torch.tensor([0.1, 0.2, 0.3]))
