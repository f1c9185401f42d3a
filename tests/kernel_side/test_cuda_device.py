"""The CNN paths on a CUDA device give the CPU's numbers (skipped where no GPU is present).

jostle's code is device-agnostic: an ensemble moved with ``Ensemble.to(device=...)`` runs
every kernel where its parameters live. The exactness checks compare float64 ensembles, so
that the only difference between the devices is the order of float64 sums (unit roundoff
1.1e-16; the longest reduction is the head's 1,568 products of order 1, so logits agree to
~1e-12; 1e-9 leaves room for the convolution algorithms cuDNN picks). float64 also keeps
TF32, on by default for cuDNN convolutions in float32, out of the comparison. Random draws
of the attacks come from CPU generators (moved to the device), so seeded attacks take the
same steps on both devices. SG-MCMC draws its noise on the device itself, so that check is
against the closed-form posterior of Bayesian linear regression (Bishop 2006, section 3.3),
not against the CPU's draws.
"""
from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
import torch

import jostle
from jostle.fitting.hmc.diagnostics import ConvergenceWarning
from tests.kernel_side.references.bayesian_regression import per_chain_moments, regression_problem
from tests.kernel_side.references.sghmc_stationary import stationary_covariance

pytestmark = pytest.mark.skipif(not torch.cuda.is_available(), reason="no CUDA device on this machine")

F64 = torch.float64
ATOL = 1e-9  # float64 on both devices: module docstring


@pytest.fixture(scope="module", params=[False, True], ids=["grey", "rgb"])
def pair(request):
    """A seeded 6-member CNN ensemble (float64) on the CPU and its copy on the GPU, and test images."""
    cards = jostle.datasets.meter_cards(resolution=28, colour=request.param)
    g = torch.Generator().manual_seed(0)
    nets = [jostle.init_parameters(jostle.cnn(cards.image_shape, 10, hidden=(12,)), g).eval() for _ in range(6)]
    cpu = jostle.Ensemble.from_modules(nets).to(dtype=F64)
    return cpu, cpu.to(device="cuda"), cards.x_test[:7].to(F64)


def test_predict_and_logits_match_the_cpu(pair):
    cpu, gpu, x = pair
    assert gpu.device.type == "cuda"
    got = gpu.predict(x.cuda())
    want = cpu.predict(x)
    assert got.probs.device.type == "cuda"
    torch.testing.assert_close(gpu.logits(x.cuda()).cpu(), cpu.logits(x), atol=ATOL, rtol=0)
    torch.testing.assert_close(got.probs.cpu(), want.probs, atol=ATOL, rtol=0)
    assert torch.equal(got.label.cpu(), want.label)


def test_expected_gradient_matches_the_cpu(pair):
    cpu, gpu, x = pair
    y = cpu.predict(x).label
    got = jostle.expected_gradient(gpu, x.cuda(), y.cuda())
    torch.testing.assert_close(got.cpu(), jostle.expected_gradient(cpu, x, y), atol=ATOL, rtol=0)


@pytest.mark.parametrize("method, norm, options", [
    ("fgsm", "inf", {}), ("pgd", "inf", {}), ("pgd", "2", {}), ("cw", None, {}),
    ("spsa", "inf", {}), ("square", "inf", {}),
])
def test_every_attack_takes_the_cpu_steps(pair, method, norm, options):
    cpu, gpu, x = pair
    eps = 1.0 if norm == "2" else 0.05
    kwargs = dict(method=method, eps=eps, norm=norm, steps=8, samples=4, seed=3, **options)
    want = jostle.attack(cpu, x, **kwargs)
    got = jostle.attack(gpu, x.cuda(), **kwargs)
    assert got.x_adv.device.type == "cuda"
    # An L-inf step moves by a sign, which float64 rounding cannot change unless the component
    # is itself ~0 (then 0 on both). An L2 or C&W step follows the gradient's direction: at a
    # confident point p_y is within ~1e-10 of 1, so the cross-entropy gradient p - onehot
    # keeps only ~6 of float64's 16 digits, ~1e-6 relative error times the step (0.31 for
    # L2 here); 1e-5 (1.5e-7 was seen on an H200 for L2 PGD).
    atol = 1e-7 if norm == "inf" else 1e-5
    torch.testing.assert_close(got.x_adv.cpu(), want.x_adv, atol=atol, rtol=0)
    assert torch.equal(got.success.cpu(), want.success)
    # the judging, at the CPU's adversarial points: exact to float64 sums
    torch.testing.assert_close(gpu.predict(want.x_adv.cuda()).probs.cpu(), want.adv_probs, atol=ATOL, rtol=0)


def test_interval_bounds_match_the_cpu(pair):
    cpu, gpu, x = pair
    want = jostle.certify(cpu, x[:2], eps=0.01, method="ibp")
    got = jostle.certify(gpu, x[:2].cuda(), eps=0.01, method="ibp")
    torch.testing.assert_close(got.margin_lower.cpu(), want.margin_lower, atol=1e-8, rtol=0)
    assert torch.equal(got.predictive.cpu(), want.predictive)


def test_linear_bounds_match_the_cpu():
    # CROWN's back-substitution holds a matrix per neuron, so a small CNN (8x8 colour input)
    # keeps the CPU side of the comparison short.
    g = torch.Generator().manual_seed(1)
    nets = [jostle.init_parameters(jostle.cnn((3, 8, 8), 4, channels=(4, 4)), g).eval() for _ in range(3)]
    cpu = jostle.Ensemble.from_modules(nets).to(dtype=F64)
    x = torch.rand(2, 3 * 8 * 8, generator=g, dtype=F64)
    want = jostle.certify(cpu, x, eps=0.02, method="crown")
    got = jostle.certify(cpu.to(device="cuda"), x.cuda(), eps=0.02, method="crown")
    torch.testing.assert_close(got.margin_lower.cpu(), want.margin_lower, atol=1e-8, rtol=0)
    assert torch.equal(got.predictive.cpu(), want.predictive)


def test_save_on_the_gpu_and_load_on_the_cpu(pair, tmp_path):
    cpu, gpu, x = pair
    path = tmp_path / "cnn.safetensors"
    gpu.save(str(path))
    back = jostle.load(path, device="cpu")
    assert back.device.type == "cpu"
    torch.testing.assert_close(back.predict(x).probs, cpu.predict(x).probs, atol=0, rtol=0)  # same bits saved


def test_fits_train_on_the_gpu():
    # Every fit takes device=; the posterior it returns lives there and predicts above chance
    # (10 classes: 0.1) after a few epochs on 400 meter cards (common practice: a smoke check).
    cards = jostle.datasets.meter_cards(resolution=28)
    small = jostle.datasets.from_arrays(cards.x_train[:400], cards.y_train[:400], cards.x_test[:200],
                                        cards.y_test[:200], classes=cards.classes, bounds=cards.bounds,
                                        image_shape=cards.image_shape)
    net = jostle.cnn(cards.image_shape, 10, channels=(8, 16), dropout=0.2)
    common = dict(epochs=15, seed=0, progress=False, device="cuda")
    fits = {
        "ensemble": jostle.fit_deep_ensemble(net, small, members=3, **common),
        "dropout": jostle.fit_dropout(net, small, samples=8, **common),
        "laplace": jostle.fit_laplace(net, small, samples=8, **common),
    }
    with warnings.catch_warnings():  # so short a run is meant to fail the convergence checks; not checked here
        warnings.simplefilter("ignore", ConvergenceWarning)
        fits["sgmcmc"] = jostle.fit_sgmcmc(net, small, samples=8, chains=2, cycles=2, epochs_per_cycle=8, seed=0,
                                           step_size=0.05, progress=False, device="cuda")
    for name, ens in fits.items():
        assert ens.device.type == "cuda", name
        accuracy = float((ens.predict(small.x_test.cuda()).label.cpu() == small.y_test).float().mean())
        assert accuracy > 0.3, (name, accuracy)


def test_sgmcmc_on_the_gpu_matches_the_closed_form_posterior():
    # Bishop (2006) 3.3 (references/bayesian_regression.py), 2,000 chains on the GPU, as in
    # test_sgmcmc's CPU check.
    log_density, mean, precision = regression_problem(device="cuda")
    lam_max = float(torch.linalg.eigvalsh(precision).max())
    eta = 0.2 / lam_max
    # Over-dispersed start (10x the spread), as in test_sgmcmc, so a sampler that did not move would fail.
    start = torch.randn(2000, 2, generator=torch.Generator().manual_seed(1), dtype=F64).cuda() * 10 / math.sqrt(lam_max)
    draws = jostle.sample_sgmcmc(log_density, start, cycles=2, steps_per_cycle=400, draws_per_cycle=40,
                                 step_size=eta, friction=0.5, exploration=0.0, seed=0)
    assert draws.samples.device.type == "cuda"
    samples = draws.samples[:, 10:].cpu()  # the first 10 draws: the start's memory (test_sgmcmc's BURN)
    chains = samples.shape[0]
    chain_means, seconds = per_chain_moments(samples, mean)
    assert torch.all((chain_means.mean(0) - mean).abs() <= 4 * chain_means.std(0) / math.sqrt(chains))  # 4 s.e.
    exact = torch.linalg.inv(precision).numpy()
    # 4 standard errors plus the O(eta) bias of the largest step (Lyapunov reference).
    bias = np.abs(stationary_covariance(precision.numpy(), eta, 0.5) - exact)
    se = (seconds.std(0) / math.sqrt(chains)).numpy()
    assert np.all(np.abs(seconds.mean(0).numpy() - exact) <= 4 * se + bias)


def _same_view(got, want):
    """Two live views agree to float64 sums (module docstring), part by part."""
    for part in ("before", "after"):
        for name in ("probs", "lower", "upper", "member_probs"):
            np.testing.assert_allclose(getattr(getattr(got, part), name), getattr(getattr(want, part), name),
                                       atol=1e-6, rtol=0)  # member_probs are sent as float32: 6e-8 of 1
    assert got.label == want.label and got.errors == want.errors == []
    np.testing.assert_allclose(got.attack.x_adv, want.attack.x_adv, atol=1e-7, rtol=0)  # L-inf sign steps
    np.testing.assert_allclose(got.fade.norm_mean, want.fade.norm_mean, rtol=1e-9)


def test_live_views_are_computed_where_the_members_live():
    # The widgets' engine (jostle.live) on a GPU ensemble: every part of a 2-D view (map,
    # member boundaries, attack, fade, certified radius and flip budget, the certified map)
    # and of an image view (the certificate at the budget) equals the CPU's.
    import jostle.live.engine as live
    from jostle.live.certified_map import radius_map

    g = torch.Generator().manual_seed(2)
    nets = [jostle.init_parameters(jostle.mlp(2, 2, hidden=(16, 16)), g) for _ in range(6)]
    cpu = jostle.Ensemble.from_modules(nets).to(dtype=F64)
    gpu = cpu.to(device="cuda")
    box = ([-2.0, -1.5], [2.5, 2.0])
    state = live.ExplorerState(point=(0.3, -0.2), budget=0.2, samples=4, steps=10, grid=16, boundaries=3,
                               certificate="crown")
    got, want = live.compute_view(gpu, state, bounds=box), live.compute_view(cpu, state, bounds=box)
    _same_view(got, want)
    np.testing.assert_allclose(got.grid.probs, want.grid.probs, atol=1e-6, rtol=0)  # float32 on the wire
    # A member's boundary is traced by interpolating its tie between grid cells: the same
    # crossings up to the float32 grid's rounding.
    assert got.grid.segments.shape == want.grid.segments.shape
    np.testing.assert_allclose(got.grid.segments, want.grid.segments, atol=1e-4, rtol=0)
    # Bisection brackets compare bounds against each other; float64 sums of 16-wide layers
    # cannot move a comparison except at an exact tie, so the radii match to one bracket.
    assert abs(got.radius.radius - want.radius.radius) <= want.radius.resolution
    assert got.radius.flip == pytest.approx(want.radius.flip, abs=want.radius.resolution + 1e-6)
    cells_gpu = radius_map(gpu, 4, 8, *box, method="ibp")
    cells_cpu = radius_map(cpu, 4, 8, *box, method="ibp")
    np.testing.assert_allclose(cells_gpu.radius, cells_cpu.radius, atol=cells_cpu.resolution, rtol=0)

    cards = jostle.datasets.meter_cards(resolution=28, colour=True)
    g = torch.Generator().manual_seed(3)
    nets = [jostle.init_parameters(jostle.cnn(cards.image_shape, 10, channels=(4, 8)), g).eval() for _ in range(4)]
    cpu = jostle.Ensemble.from_modules(nets).to(dtype=F64)
    image = live.ExplorerState(point=tuple(cards.x_test[0].double().tolist()), budget=0.05, steps=5, grid=0,
                               boundaries=0, certificate="ibp", radius=False, path_probs=False)
    image_box = tuple(np.asarray(b, dtype=float) for b in cards.bounds)
    got = live.compute_view(cpu.to(device="cuda"), image, bounds=image_box)
    want = live.compute_view(cpu, image, bounds=image_box)
    _same_view(got, want)
    assert got.budget_certificate.certified == want.budget_certificate.certified
    assert got.budget_certificate.share_lower == pytest.approx(want.budget_certificate.share_lower, abs=1e-12)
