"""SG-MCMC (SGHMC, SGLD; cyclical step size) against closed-form posteriors, and the network fit."""
from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
import torch
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import jostle
from jostle.fitting.hmc.diagnostics import ConvergenceWarning
from jostle.fitting.hmc.network_density import NetworkPosterior, map_start
from jostle.fitting.sgmcmc.fit import MinibatchDensity
from jostle.fitting.sgmcmc.kernel import cyclical_step_size, sampling_steps
from tests.kernel_side.references.bayesian_regression import per_chain_moments, regression_problem
from tests.kernel_side.references.sghmc_stationary import stationary_covariance, stationary_variance

F64 = torch.float64


def _whitened_excess(samples, mean, precision):
    """tr(S_N^-1 C) / d - 1 per chain: the relative excess of the draws' variance (0 when exact)."""
    _, seconds = per_chain_moments(samples, mean)
    per_chain = torch.einsum("ij,cji->c", precision, seconds) / precision.shape[0] - 1.0
    return float(per_chain.mean()), float(per_chain.std() / math.sqrt(per_chain.numel()))


# Draws of cycle 1 dropped: its first 100 steps, several relaxation times a / (eta lam_min) of the
# smaller step, forget the over-dispersed start.
BURN = 10


def _regression_draws(eta_lam: float, seed: int = 0):
    log_density, mean, precision = regression_problem()
    lam_max = float(torch.linalg.eigvalsh(precision).max())
    # Start over-dispersed (10x the posterior spread around 0) so a sampler that did not move would fail.
    start = torch.randn(2000, 2, generator=torch.Generator().manual_seed(1), dtype=F64) * 10 / math.sqrt(lam_max)
    draws = jostle.sample_sgmcmc(log_density, start, cycles=2, steps_per_cycle=400, draws_per_cycle=40,
                                 step_size=eta_lam / lam_max, friction=0.5, exploration=0.0, seed=seed)
    return draws, mean, precision, eta_lam / lam_max


def test_bayesian_linear_regression_matches_the_closed_form_posterior():
    draws, mean, precision, eta = _regression_draws(0.2)
    samples = draws.samples[:, BURN:]
    means, seconds = per_chain_moments(samples, mean)
    chains = samples.shape[0]
    # The mean of the affine update's stationary law is m_N exactly; 4 standard errors.
    se_mean = means.std(0) / math.sqrt(chains)
    assert torch.all((means.mean(0) - mean).abs() <= 4 * se_mean)
    # Covariance: 4 standard errors plus the O(eta) bias of the largest step (Lyapunov reference).
    exact = torch.linalg.inv(precision).numpy()
    bias = np.abs(stationary_covariance(precision.numpy(), eta, 0.5) - exact)
    se_cov = (seconds.std(0) / math.sqrt(chains)).numpy()
    assert np.all(np.abs(seconds.mean(0).numpy() - exact) <= 4 * se_cov + bias)


def test_the_step_size_bias_shrinks_with_the_step():
    # The bias of the draws' variance is O(eta) (Lyapunov reference: ~15% at eta * lam_max = 0.4,
    # ~3% at 0.1); the smaller step must be closer to S_N by more than 3 standard errors.
    big, mean, precision, _ = _regression_draws(0.4)
    small, _, _, _ = _regression_draws(0.1)
    excess_big, se_big = _whitened_excess(big.samples[:, BURN:], mean, precision)
    excess_small, se_small = _whitened_excess(small.samples[:, BURN:], mean, precision)
    assert abs(excess_small) + 3 * math.hypot(se_big, se_small) < abs(excess_big)
    assert excess_big <= stationary_variance(1.0, 0.4, 0.5) - 1.0 + 3 * se_big  # never above the largest step's bias


def test_sgld_matches_the_closed_form_posterior():
    # SGLD (Welling & Teh 2011) is the update with friction 1.
    log_density, mean, precision = regression_problem()
    lam_max = float(torch.linalg.eigvalsh(precision).max())
    start = torch.zeros(500, 2, dtype=F64)
    draws = jostle.sample_sgmcmc(log_density, start, cycles=1, steps_per_cycle=800, draws_per_cycle=40,
                                 method="sgld", step_size=0.1 / lam_max, exploration=0.0, seed=3)
    samples = draws.samples[:, 2:]
    means, seconds = per_chain_moments(samples, mean)
    se_mean = means.std(0) / math.sqrt(samples.shape[0])
    assert torch.all((means.mean(0) - mean).abs() <= 4 * se_mean)
    bias = np.abs(stationary_covariance(precision.numpy(), 0.1 / lam_max, 1.0) - torch.linalg.inv(precision).numpy())
    se_cov = (seconds.std(0) / math.sqrt(samples.shape[0])).numpy()
    assert np.all(np.abs(seconds.mean(0).numpy() - torch.linalg.inv(precision).numpy()) <= 4 * se_cov + bias)


def test_neal_100d_gaussian_marginal_variances():
    """Neal (2011), "MCMC using Hamiltonian dynamics", section 5.4.4: 100 independent coordinates
    with standard deviations 0.01, 0.02, ..., 1.00. No preconditioner: the peak step is adapted to
    the smallest scale (eta / 0.01^2 = 0.04) and the friction to the largest (a = 2 sqrt(eta / 1^2),
    critical damping there); the Lyapunov reference gives the bias at the peak step (1% at most)."""
    sd = torch.arange(1, 101, dtype=F64) / 100
    eta, friction = 0.04 * 0.01 ** 2, 2 * math.sqrt(0.04 * 0.01 ** 2)
    # Start over-dispersed (twice each standard deviation) so a sampler that did not move would fail.
    start = 2 * sd * torch.randn(200, 100, generator=torch.Generator().manual_seed(2), dtype=F64)
    draws = jostle.sample_sgmcmc(lambda q: -0.5 * ((q / sd) ** 2).sum(-1), start, cycles=2, steps_per_cycle=10000,
                                 draws_per_cycle=50, step_size=eta, friction=friction, exploration=0.0, seed=0)
    samples = draws.samples[:, 10:]  # after 2000 steps, four relaxation times 2 / a
    per_chain = (samples ** 2).mean(1) / sd ** 2  # the mean is 0 exactly
    ratio, se = per_chain.mean(0), per_chain.std(0) / math.sqrt(samples.shape[0])
    bias = torch.tensor([stationary_variance(1 / s ** 2, eta, friction) / s ** 2 - 1 for s in sd.tolist()], dtype=F64)
    # 4.5 standard errors: 100 coordinates, a per-coordinate miss chance of ~7e-6.
    assert torch.all((ratio - 1).abs() <= 4.5 * se + bias), (ratio - 1).abs().max()


def test_schedule_is_zhang_eq_1_and_draws_come_from_the_sampling_stage():
    # Zhang et al. (2020), eq. 1: alpha_k = alpha_0 / 2 (cos(pi mod(k - 1, L) / L) + 1), k from 1.
    assert cyclical_step_size(0, 100, 2.0) == 2.0
    assert cyclical_step_size(50, 100, 2.0) == pytest.approx(1.0, abs=1e-15)  # cos(pi/2) rounds to 6e-17
    assert cyclical_step_size(100, 100, 2.0) == 2.0  # a new cycle restarts at the peak
    assert sampling_steps(100, 0.5, 5) == [59, 69, 79, 89, 99]
    draws = jostle.sample_sgmcmc(lambda q: -0.5 * (q ** 2).sum(-1), torch.zeros(3, 2), cycles=2,
                                 steps_per_cycle=100, draws_per_cycle=5, step_size=0.1)
    expected = [cyclical_step_size(k, 100, 0.1) for k in [59, 69, 79, 89, 99]] * 2
    assert draws.step_sizes.tolist() == expected  # the same float64 arithmetic


def test_exploration_stage_adds_no_noise():
    # From the mode with no noise the gradient is 0: the chain cannot move before sampling starts.
    draws = jostle.sample_sgmcmc(lambda q: -0.5 * (q ** 2).sum(-1), torch.zeros(2, 3), cycles=1,
                                 steps_per_cycle=100, draws_per_cycle=1, exploration=0.99, step_size=0.1)
    assert draws.samples.abs().max() > 0  # the last step samples
    quiet = jostle.sample_sgmcmc(lambda q: -0.5 * (q ** 2).sum(-1), torch.zeros(2, 3, dtype=F64), cycles=1,
                                 steps_per_cycle=100,
                                 draws_per_cycle=1, exploration=0.99, step_size=0.1, temperature=1e-300)
    # Noise scale of the one sampling step sqrt(2 a eta T) ~ 2e-153 (float64 holds it); any noise
    # in the 99 exploration steps, at eta up to 0.1, would be larger.
    assert 0 < quiet.samples.abs().max() < 1e-140


def test_non_finite_log_density_is_undone_and_counted():
    def log_density(q):
        value = -0.5 * (q ** 2).sum(-1)
        return torch.where(q[:, 0] > 1.0, torch.full_like(value, float("nan")), value)

    draws = jostle.sample_sgmcmc(log_density, torch.zeros(8, 2, dtype=F64), cycles=2, steps_per_cycle=500,
                                 draws_per_cycle=50, step_size=0.2, exploration=0.0)
    assert int(draws.rejected.sum()) > 0
    assert bool(torch.isfinite(draws.samples).all())
    assert float(draws.samples[..., 0].max()) <= 1.0  # never kept a position in the forbidden region


@pytest.fixture(scope="module")
def leak():
    return jostle.datasets.leak_alarm(seed=0)


def _fit(data, hidden=(16,), **options):
    options = {"samples": 20, "chains": 2, "cycles": 2, "epochs_per_cycle": 10, "progress": False, **options}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)  # short test chains fail the R-hat checks
        return jostle.fit_sgmcmc(jostle.mlp(2, 2, hidden=hidden), data, **options)


def test_seeded_fits_are_reproducible(leak):
    first, again, other = _fit(leak, seed=3), _fit(leak, seed=3), _fit(leak, seed=4)
    for name, value in first.params.items():
        assert torch.equal(value, again.params[name])  # same seed, same kernels, same process
    assert not all(torch.equal(v, other.params[k]) for k, v in first.params.items())


def test_fit_records_method_settings_and_diagnostics(leak):
    ens = _fit(leak, method="sgld")
    assert next(iter(ens.params.values())).shape[0] == 20
    assert ens.meta["method"] == "sgmcmc (sgld, cyclical)"
    assert ens.meta["hyperparameters"]["cycles"] == 2
    found = ens.meta["diagnostics"]
    assert {"train_log_likelihood", "test_probs", "rejected_steps", "checks", "problems"} <= set(found)
    assert math.isfinite(found["train_log_likelihood"]["rhat"])


def test_a_diverging_fit_is_reported_not_propagated(leak):
    with pytest.warns(ConvergenceWarning, match="non-finite log density or gradient and were undone"):
        ens = jostle.fit_sgmcmc(jostle.mlp(2, 2, hidden=(8,)), leak, samples=4, chains=2, cycles=1,
                                epochs_per_cycle=3, step_size=1e30, progress=False)
    assert ens.meta["diagnostics"]["rejected_steps"] > 0
    assert all(bool(torch.isfinite(v).all()) for v in ens.params.values())


def test_leak_alarm_accuracy_is_comparable_to_a_deep_ensemble(leak):
    # Measured (seed 0, 2-32-32-2 tanh MLP, 200 test points): fit_sgmcmc 0.985, a 5-member deep
    # ensemble (100 epochs) 0.970. Common practice for noise-0.2 moons: >= 0.93 for any MLP fit.
    ens = _fit(leak, samples=40, chains=4, cycles=4, epochs_per_cycle=20, hidden=(32, 32))
    deep = jostle.fit_deep_ensemble(jostle.mlp(2, 2, hidden=(32, 32)), leak, members=5, epochs=100, progress=False)
    acc = jostle.metrics.accuracy(ens.predict(leak.x_test).probs, leak.y_test)
    acc_deep = jostle.metrics.accuracy(deep.predict(leak.x_test).probs, leak.y_test)
    assert acc >= 0.93
    assert acc >= acc_deep - 0.03  # 0.03 is 6 of 200 test points


BAD_KERNEL = [
    ("step_size", st.sampled_from([0.0, -1.0, math.nan, math.inf]), r"step_size must be a finite float > 0"),
    ("friction", st.sampled_from([0.0, 1.5, -0.1, math.nan]), r"friction must be a finite float > 0 and <= 1"),
    ("exploration", st.sampled_from([1.0, -0.1, 2.0, math.nan]), r"exploration must be a finite float >= 0 and < 1"),
    ("temperature", st.sampled_from([0.0, -2.0, math.inf]), r"temperature must be a finite float > 0"),
    ("cycles", st.integers(-5, 0), "cycles must be an integer >= 1"),
    ("method", st.sampled_from(["hmc", "SGHMC", ""]), r"method must be one of 'sghmc', 'sgld'"),
]


@settings(max_examples=20, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(case=st.sampled_from(BAD_KERNEL), data=st.data())
def test_bad_arguments_name_parameter_rule_and_value(case, data, leak):
    name, values, message = case
    value = data.draw(values)
    with pytest.raises(ValueError, match=rf"^{message}; got "):
        jostle.sample_sgmcmc(lambda q: -(q ** 2).sum(-1), torch.zeros(2, 2), **{name: value})
    with pytest.raises(ValueError, match=rf"^{message}; got "):
        jostle.fit_sgmcmc(jostle.mlp(2, 2, hidden=(4,)), leak, progress=False, **{name: value})


def test_minibatches_cover_each_epoch_once_and_average_to_the_full_density(leak):
    # Welling & Teh (2011), eq. 4: the minibatch sum scaled by N / n is unbiased; over one epoch
    # without replacement (200 points, batches of 40) the batches' mean is the full sum exactly
    # up to float32 rounding of 200-term sums (tolerance 1e-4 relative).
    posterior = NetworkPosterior(jostle.mlp(2, 2, hidden=(8,)), leak, 1.0, torch.device("cpu"))
    density = MinibatchDensity(posterior, 40, seed=0)
    flat = map_start(posterior, 3, 0, 1.0, 0)
    seen, values = [], []
    for _ in range(5):
        batch = density.next_batch()
        seen.append(batch)
        density.order = torch.cat([batch, density.order])  # put it back for the call below
        values.append(density(flat))
    assert sorted(torch.cat(seen).tolist()) == list(range(200))
    full = posterior(flat)
    assert torch.allclose(torch.stack(values).mean(0), full, rtol=1e-4)


def test_device_is_checked(leak):
    with pytest.raises(ValueError, match=r"device must name a torch device"):
        jostle.fit_sgmcmc(jostle.mlp(2, 2, hidden=(4,)), leak, device="nowhere", progress=False)
