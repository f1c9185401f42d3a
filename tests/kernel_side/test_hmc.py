"""HMC sampler checked against published worked examples, closed forms and reference code."""
from __future__ import annotations

import math

import pytest
import scipy.stats
import torch

import jostle
from jostle.fitting.hmc.diagnostics import SamplingInterruptedWarning
from jostle.fitting.hmc.sampler import evaluate, hmc_transition, kinetic_energy, leapfrog

F64 = torch.float64


def gaussian(cov: torch.Tensor):
    precision = torch.linalg.inv(cov)
    return lambda q: -0.5 * torch.einsum("ci,ij,cj->c", q, precision, q)


def run_leapfrog(log_density, q0, p0, eps, steps):
    q0 = torch.as_tensor(q0, dtype=F64).reshape(1, -1)
    p0 = torch.as_tensor(p0, dtype=F64).reshape(1, -1)
    start = evaluate(log_density, q0)
    ones = torch.ones_like(q0)
    end, p = leapfrog(log_density, start, p0, torch.tensor([eps], dtype=F64), steps, ones)
    h0 = float(-start.log_density + kinetic_energy(p0, ones))
    h1 = float(-end.log_density + kinetic_energy(p, ones))
    return end, p, h0, h1


# ---------------------------------------------------------------- the integrator
def test_leapfrog_reproduces_neal_2011_worked_example():
    # Neal 2011, "MCMC using Hamiltonian dynamics", Handbook of MCMC ch. 5, sec. 5.3.3.1.
    log_density = gaussian(torch.tensor([[1.0, 0.95], [0.95, 1.0]], dtype=F64))
    _, _, h0, h1 = run_leapfrog(log_density, [-1.50, -1.55], [-1.0, 1.0], 0.25, 25)
    assert h0 == pytest.approx(2.20513, abs=1e-4)
    assert h1 == pytest.approx(2.61619, abs=1e-4)
    assert min(1.0, math.exp(h0 - h1)) == pytest.approx(0.66295, abs=1e-4)


def test_leapfrog_is_reversible_in_float64():
    # Neal 2011 sec. 5.2.3.1: L steps, negate p, L steps returns to the start.
    log_density = gaussian(torch.tensor([[1.0, 0.95], [0.95, 1.0]], dtype=F64))
    end, p, _, _ = run_leapfrog(log_density, [-1.50, -1.55], [-1.0, 1.0], 0.25, 25)
    back, p_back, _, _ = run_leapfrog(log_density, end.position, -p, 0.25, 25)
    assert torch.allclose(back.position, torch.tensor([[-1.50, -1.55]], dtype=F64), atol=1e-10, rtol=0)
    assert torch.allclose(-p_back, torch.tensor([[-1.0, 1.0]], dtype=F64), atol=1e-10, rtol=0)


def euler_energy_error(eps: float, steps: int) -> float:
    # Plain reference: Euler's method on H = (q^2 + p^2) / 2 (Neal 2011 sec. 5.2.3.3).
    q, p = 0.0, 1.0
    for _ in range(steps):
        q, p = q + eps * p, p - eps * q
    return abs((q * q + p * p) / 2 - 0.5)


def test_leapfrog_energy_error_is_second_order_and_euler_first():
    # Neal 2011 sec. 5.2.3.3: leapfrog local error O(eps^3), global O(eps^2). Trajectory length 1.

    def standard_normal(q):
        return -0.5 * (q ** 2).sum(-1)

    errors = {}
    for eps, steps in ((0.1, 10), (0.05, 20)):
        _, _, h0, h1 = run_leapfrog(standard_normal, [0.0], [1.0], eps, steps)
        errors[eps] = abs(h1 - h0)
    assert errors[0.1] / errors[0.05] == pytest.approx(4.0, abs=0.1)
    assert euler_energy_error(0.1, 10) / euler_energy_error(0.05, 20) == pytest.approx(2.0, abs=0.1)


def test_leapfrog_chains_on_their_own_step_counts_match_single_chain_runs():
    # Reference: each chain integrated alone with the same step size and count.
    cov = torch.tensor([[1.0, 0.3, 0.0], [0.3, 2.0, 0.5], [0.0, 0.5, 0.7]], dtype=F64)
    log_density = gaussian(cov)
    g = torch.Generator().manual_seed(3)
    q = torch.randn(3, 3, generator=g, dtype=F64)
    p = torch.randn(3, 3, generator=g, dtype=F64)
    inverse_mass = torch.rand(3, 3, generator=g, dtype=F64) + 0.5
    eps = torch.tensor([0.1, 0.2, 0.05], dtype=F64)
    steps = torch.tensor([5, 10, 20])
    together, p_together = leapfrog(log_density, evaluate(log_density, q), p, eps, steps, inverse_mass)
    for c in range(3):
        alone, p_alone = leapfrog(log_density, evaluate(log_density, q[c:c + 1]), p[c:c + 1], eps[c:c + 1],
                                  int(steps[c]), inverse_mass[c:c + 1])
        # float64, batched vs one chain (products may round differently): a few ulp per step
        # of O(1) values over at most 20 stable leapfrog steps stays far below 1e-12
        assert torch.allclose(together.position[c], alone.position[0], atol=1e-12)
        assert torch.allclose(p_together[c], p_alone[0], atol=1e-12)


def test_one_backward_gives_each_chains_gradient():
    # Reference: torch.autograd on each chain separately.
    weights = torch.tensor([1.0, -2.0, 0.5], dtype=F64)

    def density(q):
        return torch.sin(q @ weights) - (q ** 4).sum(-1)

    q = torch.randn(5, 3, generator=torch.Generator().manual_seed(0), dtype=F64)
    state = evaluate(density, q)
    for c in range(5):
        row = q[c].clone().requires_grad_(True)
        (grad,) = torch.autograd.grad(density(row[None])[0], row)
        assert torch.allclose(state.grad[c], grad, atol=1e-12)  # float64, batched vs one row: a few ulp


def test_exact_draws_give_unit_mean_of_exp_minus_energy_error():
    # Common practice: for (q, p) drawn exactly from the target, E[exp(-dH)] = 1
    # (volume preservation and reversibility), while E[dH] >= 0 by Jensen.
    cov = torch.tensor([[1.0, 0.95], [0.95, 1.0]], dtype=F64)
    g = torch.Generator().manual_seed(5)
    chains = 20000
    q = torch.randn(chains, 2, generator=g, dtype=F64) @ torch.linalg.cholesky(cov).T
    p = torch.randn(chains, 2, generator=g, dtype=F64)
    log_density = gaussian(cov)
    start = evaluate(log_density, q)
    ones = torch.ones_like(q)
    end, p_end = leapfrog(log_density, start, p, torch.full((chains,), 0.18, dtype=F64), 12, ones)
    energy_error = (-end.log_density + kinetic_energy(p_end, ones)) - (-start.log_density + kinetic_energy(p, ones))
    weights = torch.exp(-energy_error)
    standard_error = float(weights.std() / math.sqrt(chains))
    assert abs(float(weights.mean()) - 1.0) < 4 * standard_error
    assert float(energy_error.mean()) > 0


# ---------------------------------------------------------------- the sampler
def bayesian_linear_regression():
    # Bishop 2006, PRML sec. 3.3.1, eqs 3.53-3.54, with a quadratic basis (correlated posterior).
    g = torch.Generator().manual_seed(11)
    x = torch.rand(30, generator=g, dtype=F64) * 2 - 1
    alpha, beta = 2.0, 25.0
    t = -0.3 + 0.5 * x + 0.8 * x ** 2 + torch.randn(30, generator=g, dtype=F64) / math.sqrt(beta)
    phi = torch.stack([torch.ones_like(x), x, x ** 2], dim=1)
    covariance = torch.linalg.inv(alpha * torch.eye(3, dtype=F64) + beta * phi.T @ phi)
    mean = beta * covariance @ phi.T @ t

    def log_density(w):
        residual = t - w @ phi.T
        return -0.5 * alpha * (w ** 2).sum(-1) - 0.5 * beta * (residual ** 2).sum(-1)

    return log_density, mean, covariance


@pytest.mark.slow
def test_hmc_recovers_conjugate_linear_regression_posterior():
    log_density, mean, covariance = bayesian_linear_regression()
    draws = jostle.sample_hmc(log_density, torch.zeros(4, 3, dtype=F64), num_samples=800, warmup=200, seed=0)
    flat = draws.samples.reshape(-1, 3)
    mcse = covariance.diagonal().sqrt() / draws.ess.sqrt()
    assert bool(((flat.mean(0) - mean).abs() < 4 * mcse).all())
    estimate = torch.cov(flat.T)
    assert float(torch.linalg.norm(estimate - covariance) / torch.linalg.norm(covariance)) < 0.10
    assert torch.allclose(estimate.diagonal(), covariance.diagonal(), rtol=0.10)
    assert int(draws.divergences.sum()) == 0
    # The adapted inverse metric estimates the posterior variances (common practice): the
    # right scale, though a short warm-up window gives a rough estimate.
    ratio = draws.inverse_mass / covariance.diagonal()
    assert bool(((ratio > 1 / 4) & (ratio < 4)).all())


def scaled_gaussian(dims: int):
    sd = torch.linspace(0.1, 1.0, dims, dtype=F64)
    return lambda q: -0.5 * ((q / sd) ** 2).sum(-1), sd


@pytest.mark.parametrize("target", [0.65, 0.8])
def test_dual_averaging_reaches_the_target_acceptance(target):
    # Hoffman & Gelman 2014, Algorithm 5; targets 0.65 and 0.8 are the usual ones (common practice).
    log_density, sd = scaled_gaussian(100)
    start = torch.randn(8, 100, generator=torch.Generator().manual_seed(0), dtype=F64) * sd
    draws = jostle.sample_hmc(log_density, start, num_samples=200, warmup=600, target_accept=target,
                              diagnostics=False, seed=1)
    assert float(draws.accept_rate.mean()) == pytest.approx(target, abs=0.05)


def test_a_higher_target_acceptance_gives_a_smaller_step():
    # Hoffman & Gelman 2014 sec. 3.2: acceptance falls as the step grows.
    log_density, sd = scaled_gaussian(20)
    start = torch.zeros(4, 20, dtype=F64)
    steps = [float(jostle.sample_hmc(log_density, start, num_samples=10, warmup=250, target_accept=target,
                                     diagnostics=False, seed=2).step_size[0]) for target in (0.6, 0.8, 0.95)]
    assert steps[0] > steps[1] > steps[2]


def test_forbidden_regions_are_rejected_divergences_and_never_reach_the_draws():
    # NaN beyond q0 > 1 and -inf below q0 < -1 leave a standard normal truncated to [-1, 1];
    # reference variance from scipy.stats.truncnorm.
    def log_density(q):
        value = -0.5 * (q ** 2).sum(-1)
        value = torch.where(q[:, 0] > 1, torch.full_like(value, float("nan")), value)
        return torch.where(q[:, 0] < -1, torch.full_like(value, -float("inf")), value)

    # No step shrinks a trajectory's chance of crossing a wall, so cap the steps per iteration.
    draws = jostle.sample_hmc(log_density, torch.zeros(4, 2, dtype=F64), num_samples=600, warmup=100,
                              trajectory_length=1.0, max_steps=12, seed=0)
    assert bool(torch.isfinite(draws.samples).all())
    assert bool(torch.isfinite(draws.log_density).all())
    assert int(draws.divergences.sum()) > 0
    assert int(draws.divergences.sum()) == int(draws.divergent.sum())
    first = draws.samples[..., 0]
    assert float(first.abs().max()) <= 1.0
    expected = scipy.stats.truncnorm(-1, 1).var()
    assert float(first.var()) == pytest.approx(expected, rel=0.1)


def _walled_normal(q):
    # standard normal with a NaN wall beyond q0 > 1.5: trajectories crossing it are non-finite
    value = -0.5 * (q ** 2).sum(-1)
    return torch.where(q[:, 0] > 1.5, torch.full_like(value, float("nan")), value)


@pytest.mark.parametrize("threshold", [0.05, 1e300])
def test_a_transition_flagged_divergent_is_never_accepted(threshold):
    # A divergent transition is rejected whatever divergence_threshold is: a divergence marks a
    # failed integration (Betancourt 2017, "A conceptual introduction to Hamiltonian Monte Carlo",
    # arXiv:1701.02434; from memory). A small threshold flags finite energy errors whose
    # Metropolis probability exp(-dH) is far from 0; the huge one leaves only non-finite ones.
    chains, dims = 4000, 5
    g = torch.Generator().manual_seed(3)
    start = evaluate(_walled_normal, torch.randn(chains, dims, generator=g, dtype=F64).clamp(max=1.4))
    step = torch.full((chains,), 0.9, dtype=F64)
    move = hmc_transition(_walled_normal, start, step, torch.full((chains,), 5), torch.ones(chains, dims, dtype=F64),
                          g, divergence_threshold=threshold)
    divergent = move.divergent
    finite_divergent = divergent & torch.isfinite(move.energy_error)
    if threshold < 1:
        # the case that matters: many flagged transitions would pass a Metropolis test
        assert int((finite_divergent & (torch.exp(-move.energy_error) > 0.5)).sum()) > 100
    else:
        assert not bool(finite_divergent.any())
    assert int((~torch.isfinite(move.energy_error)).sum()) > 10
    assert not bool((move.accepted & divergent).any())
    assert bool((move.accept_prob[divergent] == 0).all())
    # a rejected chain keeps its position exactly (a copy)
    assert torch.equal(move.state.position[divergent], start.position[divergent])
    assert bool(move.accepted[~divergent].any())


def test_sampler_draws_stay_put_at_every_divergent_iteration():
    # Same rule through sample_hmc: at a divergent iteration the draw repeats the previous one.
    log_density, _ = scaled_gaussian(3)
    draws = jostle.sample_hmc(log_density, torch.zeros(4, 3, dtype=F64), num_samples=150, warmup=30,
                              divergence_threshold=0.1, diagnostics=False, seed=4)
    flagged = draws.divergent[:, 1:]
    assert int(flagged.sum()) > 20
    repeated = (draws.samples[:, 1:] == draws.samples[:, :-1]).all(-1)
    assert bool(repeated[flagged].all())
    assert bool((draws.accept_prob[draws.divergent] == 0).all())


def test_same_seed_same_draws_and_global_rng_untouched():
    log_density, _ = scaled_gaussian(3)
    start = torch.zeros(2, 3, dtype=F64)
    torch.manual_seed(123)
    before = torch.random.get_rng_state()
    a = jostle.sample_hmc(log_density, start, num_samples=30, warmup=30, seed=7, diagnostics=False)
    assert torch.equal(torch.random.get_rng_state(), before)
    b = jostle.sample_hmc(log_density, start, num_samples=30, warmup=30, seed=7, diagnostics=False)
    c = jostle.sample_hmc(log_density, start, num_samples=30, warmup=30, seed=8, diagnostics=False)
    assert torch.equal(a.samples, b.samples)  # same seed, one process: exact
    assert not torch.equal(a.samples, c.samples)


def test_draws_report_arviz_diagnostics_per_coordinate():
    # Reference: arviz.rhat / arviz.ess on the same draws (Vehtari et al. 2021).
    from jostle.fitting.hmc.diagnostics import _arviz

    az = _arviz()
    log_density, _ = scaled_gaussian(2)
    draws = jostle.sample_hmc(log_density, torch.zeros(4, 2, dtype=F64), num_samples=200, warmup=100, seed=0)
    for i in range(2):
        chains = draws.samples[..., i].numpy()
        assert float(draws.rhat[i]) == pytest.approx(float(az.rhat(chains)), rel=1e-12)
        assert float(draws.ess[i]) == pytest.approx(float(az.ess(chains, method="bulk")), rel=1e-12)
        assert float(draws.ess_tail[i]) == pytest.approx(float(az.ess(chains, method="tail")), rel=1e-12)
    assert draws.samples.shape == (4, 200, 2)
    assert draws.gradient_evaluations >= int(draws.num_steps.sum())


def test_keyboard_interrupt_returns_the_draws_so_far_with_a_warning():
    calls = {"n": 0}

    def log_density(q):
        calls["n"] += 1
        if calls["n"] > 400:
            raise KeyboardInterrupt
        return -0.5 * (q ** 2).sum(-1)

    with pytest.warns(SamplingInterruptedWarning, match=r"sampling interrupted: returning the \d+ of 500"):
        draws = jostle.sample_hmc(log_density, torch.zeros(3, 2, dtype=F64), num_samples=500, warmup=20,
                                  seed=0, trajectory_length=0.5)
    assert draws.interrupted
    assert 0 < draws.num_draws < 500
    assert bool(torch.isfinite(draws.samples).all())
    assert draws.accept_prob.shape == (3, draws.num_draws)


def test_progress_bar_shows_phase_acceptance_and_divergences(capsys):
    log_density, _ = scaled_gaussian(2)
    jostle.sample_hmc(log_density, torch.zeros(2, 2, dtype=F64), num_samples=20, warmup=20, seed=0,
                      progress=True, diagnostics=False)
    err = capsys.readouterr().err
    assert "40/40" in err and "phase=sampling" in err and "accept=" in err and "divergences=" in err


# ---------------------------------------------------------------- errors a user can trigger
def standard(q):
    return -0.5 * (q ** 2).sum(-1)


@pytest.mark.parametrize("kwargs, message", [
    (dict(initial=torch.zeros(3)), r"initial must have shape \(C, P\) with C, P >= 1; got shape \(3,\)"),
    (dict(initial=torch.zeros(2, 2, dtype=torch.long)), "initial must be a floating tensor; got dtype torch.int64"),
    (dict(initial=torch.tensor([[0.0, float("nan")]])), "initial must contain only finite values; got NaN or inf"),
    (dict(initial="abc"), "initial must be a tensor of shape"),
    (dict(num_samples=0), "num_samples must be an integer >= 1; got 0"),
    (dict(warmup=-1), "warmup must be an integer >= 0; got -1"),
    (dict(trajectory_length=0.0), "trajectory_length must be a finite float > 0; got 0"),
    (dict(max_steps=0), "max_steps must be an integer >= 1; got 0"),
    (dict(jitter=1.0), "jitter must be a finite float >= 0 and < 1; got 1"),
    (dict(target_accept=1.0), "target_accept must be a finite float > 0 and < 1; got 1"),
    (dict(step_size=-0.1), "step_size must be a finite float > 0; got -0.1"),
    (dict(divergence_threshold=0), "divergence_threshold must be a finite float > 0; got 0"),
    (dict(seed=True), "seed must be an integer; got True"),
    (dict(log_density="not callable"), "log_density must be a callable mapping"),
    (dict(log_density=lambda q: q.sum()),
     r"log_density must return a tensor of shape \(2,\) for input \(2, P\); got \(\)"),
    (dict(log_density=lambda q: torch.zeros(2)), "log_density must be differentiable in its input with torch.autograd"),
    (dict(log_density=lambda q: standard(q) + torch.log(q[:, 0])),
     r"initial must give a finite log density and gradient for every chain; chains \[0, 1\] do not"),
])
def test_sample_hmc_rejects_bad_arguments(kwargs, message):
    arguments = dict(log_density=standard, initial=torch.zeros(2, 2), num_samples=5, warmup=5)
    arguments.update(kwargs)
    with pytest.raises(ValueError, match=message):
        jostle.sample_hmc(**arguments)


def test_warmup_windows_expand_between_fast_buffers():
    # Common practice (expanding windows): 75 fast iterations, slow windows of 25, 50, 100, ...
    # the last one stretched to leave 50 fast iterations at the end.
    from jostle.fitting.hmc.adaptation import warmup_windows

    assert warmup_windows(1000) == [(75, 100), (100, 150), (150, 250), (250, 450), (450, 950)]
    assert warmup_windows(200) == [(75, 100), (100, 150)]
    assert warmup_windows(149) == []
