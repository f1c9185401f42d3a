"""The expected input gradient of Bayesian logistic regression, by quadrature and by jostle.

Model: two classes with logits (0, w.x), so p(class 1 | x, w) = sigmoid(w.x) and the
cross-entropy at label y has input gradient (sigmoid(w.x) - y) w (common practice). The
posterior over w is Gaussian, N(m, Sigma); jostle sees it as a one-layer ensemble of
sampled weights with bias 0.

Reference: u = w.x is N(m.x, x'Sigma x), and w given u is Gaussian with mean
m + Sigma x (u - m.x) / (x'Sigma x) (Bishop 2006, PRML eq. 2.81, the conditional mean of a
partitioned Gaussian). So E_w[(sigmoid(u) - y) w] = E_u[(sigmoid(u) - y) E[w | u]], a 1-d
integral, done with Gauss-Hermite quadrature: int exp(-t^2) f(t) dt ~ sum_i a_i f(t_i)
(Abramowitz & Stegun 1964, eq. 25.4.46; nodes and weights from numpy.polynomial.hermite.hermgauss).
jostle's Monte Carlo estimate must land within 4 standard errors, estimated from the
member gradients (standard Monte Carlo theory: the error of a mean of M iid draws has
standard deviation std / sqrt(M)).
"""
import numpy as np
import torch
from numpy.polynomial.hermite import hermgauss
from torch import nn

import jostle

MEAN = np.array([1.2, -0.7, 0.4])
COVARIANCE = np.array([[0.50, 0.20, -0.10],
                       [0.20, 0.40, 0.05],
                       [-0.10, 0.05, 0.30]])
POINTS = np.array([[0.6, 0.3, -0.5], [-0.4, 0.9, 1.1], [1.5, -0.2, 0.7], [0.1, -1.0, -0.8]])
LABELS = np.array([1, 0, 0, 1])
MEMBERS = 4000


def quadrature_gradient(x: np.ndarray, y: int, nodes: int = 60) -> np.ndarray:
    """E_w[(sigmoid(w.x) - y) w] for w ~ N(MEAN, COVARIANCE), by Gauss-Hermite along u = w.x."""
    t, a = hermgauss(nodes)
    centre, spread = MEAN @ x, float(x @ COVARIANCE @ x)
    u = centre + np.sqrt(2.0 * spread) * t  # u = mu + sqrt(2) s t turns N(mu, s^2) into exp(-t^2)
    conditional_mean = MEAN[None, :] + np.outer(u - centre, COVARIANCE @ x) / spread  # Bishop eq. 2.81
    weight = (1.0 / (1.0 + np.exp(-u)) - y) * a / np.sqrt(np.pi)
    return weight @ conditional_mean


def logistic_ensemble(members: int = MEMBERS, seed: int = 0) -> jostle.Ensemble:
    generator = torch.Generator().manual_seed(seed)
    factor = torch.linalg.cholesky(torch.tensor(COVARIANCE))
    draws = torch.tensor(MEAN) + torch.randn(members, 3, generator=generator, dtype=torch.float64) @ factor.T
    weight = torch.stack([torch.zeros_like(draws), draws], dim=1)  # logits (0, w.x)
    params = {"0.weight": weight, "0.bias": torch.zeros(members, 2, dtype=torch.float64)}
    template = nn.Sequential(nn.Linear(3, 2)).double()
    return jostle.Ensemble(template, params, meta={"classes": ["0", "1"]})


def test_quadrature_has_converged():
    # 60 and 120 nodes agree to float64 rounding: the integrand is smooth (A&S 25.4.46's
    # error term falls with the 2n-th derivative), so the reference itself is not the limit.
    for x, y in zip(POINTS, LABELS):
        np.testing.assert_allclose(quadrature_gradient(x, y, 60), quadrature_gradient(x, y, 120), rtol=0, atol=1e-12)


def test_monte_carlo_expected_gradient_matches_gauss_hermite():
    ens = logistic_ensemble()
    x, y = torch.tensor(POINTS), torch.tensor(LABELS)
    estimate = jostle.expected_gradient(ens, x, y).numpy()
    members = ens.member_input_grads(x, y).numpy()  # (M, n, 3)
    error = members.std(axis=0, ddof=1) / np.sqrt(MEMBERS)
    reference = np.stack([quadrature_gradient(p, int(c)) for p, c in zip(POINTS, LABELS)])
    assert np.all(np.abs(estimate - reference) <= 4.0 * error), (estimate, reference, error)
    # The standard errors are small against the gradient, so the check has teeth.
    assert np.all(error < 0.1 * np.abs(reference).max(axis=1, keepdims=True))
    # the member gradients are the closed form (sigmoid(w.x) - y) w of each draw
    draws = ens.params["0.weight"][:, 1].numpy()
    closed = (1.0 / (1.0 + np.exp(-(draws @ POINTS.T))) - LABELS)[:, :, None] * draws[:, None, :]
    np.testing.assert_allclose(members, closed, rtol=1e-12, atol=1e-14)  # float64, a few operations


def test_gradient_pictures_all_members_matches_gauss_hermite():
    ens = logistic_ensemble()
    out = jostle.gradient_pictures(ens, torch.tensor(POINTS), torch.tensor(LABELS), samples=(1, 64, None))
    members = ens.member_input_grads(torch.tensor(POINTS), torch.tensor(LABELS)).numpy()
    error = members.std(axis=0, ddof=1) / np.sqrt(MEMBERS)
    reference = np.stack([quadrature_gradient(p, int(c)) for p, c in zip(POINTS, LABELS)])
    assert list(out.sample_counts) == [1, 64, MEMBERS]
    assert np.all(np.abs(out.gradients[-1] - reference) <= 4.0 * error)
