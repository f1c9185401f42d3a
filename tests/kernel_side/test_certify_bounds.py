"""Bounds contain every output of the ball; affine ensembles are bounded exactly; CROWN is never looser than IBP.

Interval bound propagation: Gowal et al. 2018 ("On the effectiveness of interval bound
propagation for training verifiably robust models"); linear relaxation bounds: Zhang et al.
2018 (NeurIPS, "Efficient neural network robustness certification with general activation
functions"). The containment checks are our own: 10^5 random points of the ball (and the
ball's box corners, where piecewise-linear networks take extreme values) never leave the bounds.
"""
import itertools

import numpy as np
import pytest
import scipy.special
import torch
from torch import nn

import jostle
from jostle.certify.intervals import PerturbationSet
from jostle.certify.linear_bounds import output_bounds, pair_lower_bounds
from jostle.certify.network import read_chain
from jostle.certify.relaxations import activation_lines

# Float64 bounds over a few hundred multiply-adds: rounding ~1e-13, far below 1e-9.
TOL64 = 1e-9
BOX = (-1.0, 1.0)
POINTS = 10**5


def _network(kind: str, g: torch.Generator) -> nn.Module:
    if kind == "conv":
        net = nn.Sequential(nn.Conv2d(1, 3, 3, padding=1), nn.ReLU(), nn.MaxPool2d(2), nn.Conv2d(3, 4, 3),
                            nn.Tanh(), nn.AvgPool2d(2, padding=1), nn.Flatten(), nn.Linear(16, 3))
    elif kind == "pooling":
        net = nn.Sequential(nn.Conv2d(1, 2, 2), nn.Sigmoid(), nn.MaxPool2d(2, stride=1), nn.Flatten(),
                            nn.Linear(32, 3))
    else:
        act = {"relu": nn.ReLU, "tanh": nn.Tanh, "sigmoid": nn.Sigmoid}[kind]
        net = nn.Sequential(nn.Linear(3, 12), act(), nn.Linear(12, 12), act(), nn.Linear(12, 3))
    for p in net.parameters():
        p.data = torch.randn(p.shape, generator=g, dtype=torch.float64) * 0.8
    return net.double()


def _ensemble(kind: str, members: int = 3, seed: int = 0) -> jostle.Ensemble:
    g = torch.Generator().manual_seed(seed)
    return jostle.Ensemble.from_modules([_network(kind, g) for _ in range(members)])


def _shape(kind: str) -> tuple[int, ...]:
    return {"conv": (1, 8, 8), "pooling": (1, 6, 6)}.get(kind, (3,))


def _ball_samples(x: torch.Tensor, eps: float, norm: str, count: int, g: torch.Generator) -> torch.Tensor:
    """Points of the ball around each x [N, *shape] intersected with BOX: [count, N, *shape]."""
    shape = (count, *x.shape)
    if norm == "inf":
        step = (torch.rand(shape, generator=g, dtype=x.dtype) * 2 - 1) * eps
        corners = torch.randint(0, 2, (count // 10, *x.shape), generator=g).to(x.dtype) * 2 - 1
        step[: count // 10] = corners * eps
    else:  # uniform in the L2 ball: a normal direction, radius U^(1/d) (Muller 1959)
        direction = torch.randn(shape, generator=g, dtype=x.dtype)
        direction = direction / direction.flatten(2).norm(dim=-1).reshape(count, x.shape[0], *[1] * (x.dim() - 1))
        radius = torch.rand(count, x.shape[0], generator=g, dtype=x.dtype) ** (1 / x[0].numel())
        step = direction * radius.reshape(count, x.shape[0], *[1] * (x.dim() - 1)) * eps
    # Clamping to the box moves each coordinate towards x (x is inside), so points stay in the ball.
    return (x[None] + step).clamp(*BOX)


@pytest.mark.parametrize("kind", ["relu", "tanh", "sigmoid", "conv", "pooling"])
@pytest.mark.parametrize("norm", ["inf", "2"])
def test_bounds_contain_the_outputs_of_random_points_of_the_ball(kind, norm):
    ens = _ensemble(kind)
    g = torch.Generator().manual_seed(1)
    shape = _shape(kind)
    x = (torch.rand(4, *shape, generator=g, dtype=torch.float64) * 2 - 1) * 0.9
    eps = 0.3
    chain = read_chain(ens.template, ens.params, shape)
    region = PerturbationSet.around(x, torch.full((1, 4), eps, dtype=torch.float64), norm,
                                    (torch.full(shape, BOX[0], dtype=torch.float64),
                                     torch.full(shape, BOX[1], dtype=torch.float64)))
    samples = _ball_samples(x, eps, norm, POINTS // 4, g)
    logits = ens.logits(samples.reshape(-1, *shape)).reshape(len(ens), -1, 4, 3)
    differences = logits[..., :, None] - logits[..., None, :]
    for method in ("ibp", "crown"):
        lower, upper = output_bounds(chain.steps, region, method)
        assert bool((logits >= lower[:, None] - TOL64).all()), f"{method} lower bound above an output"
        assert bool((logits <= upper[:, None] + TOL64).all()), f"{method} upper bound below an output"
        pairs = pair_lower_bounds(chain, region, method)
        assert bool((differences >= pairs[:, None] - TOL64).all()), f"{method} pair bound above a difference"


@pytest.mark.parametrize("kind", ["relu", "tanh", "sigmoid", "conv", "pooling"])
@pytest.mark.parametrize("norm", ["inf", "2"])
def test_crown_is_never_looser_than_ibp_and_tighter_on_average(kind, norm):
    ens = _ensemble(kind, seed=3)
    g = torch.Generator().manual_seed(3)
    shape = _shape(kind)
    x = torch.rand(6, *shape, generator=g, dtype=torch.float64) * 2 - 1
    chain = read_chain(ens.template, ens.params, shape)
    region = PerturbationSet.around(x, torch.full((1, 6), 0.2, dtype=torch.float64), norm, None)
    ibp_lower, ibp_upper = output_bounds(chain.steps, region, "ibp")
    crown_lower, crown_upper = output_bounds(chain.steps, region, "crown")
    assert bool((crown_lower >= ibp_lower - TOL64).all() and (crown_upper <= ibp_upper + TOL64).all())
    ibp_pairs, crown_pairs = pair_lower_bounds(chain, region, "ibp"), pair_lower_bounds(chain, region, "crown")
    assert bool((crown_pairs >= ibp_pairs - TOL64).all())
    assert float((crown_upper - crown_lower).mean()) < float((ibp_upper - ibp_lower).mean())


def _affine_ensemble(members=4, features=3, classes=3, seed=0):
    g = torch.Generator().manual_seed(seed)
    nets = []
    for _ in range(members):
        net = nn.Sequential(nn.Linear(features, classes)).double()
        net[0].weight.data = torch.randn(classes, features, generator=g, dtype=torch.float64)
        net[0].bias.data = torch.randn(classes, generator=g, dtype=torch.float64)
        nets.append(net)
    return jostle.Ensemble.from_modules(nets)


@pytest.mark.parametrize("method", ["ibp", "crown"])
@pytest.mark.parametrize("norm, dual", [("inf", 1), ("2", 2)])
def test_affine_ensemble_pair_bounds_are_the_closed_form(method, norm, dual):
    # min of (w_c - w_j).x' + (b_c - b_j) over ||x' - x|| <= eps is the value at x minus
    # eps times the dual norm of w_c - w_j (Hoelder; Goodfellow et al. 2015's linear view).
    ens = _affine_ensemble()
    g = torch.Generator().manual_seed(5)
    x = torch.randn(5, 3, generator=g, dtype=torch.float64)
    eps = 0.4
    chain = read_chain(ens.template, ens.params, (3,))
    region = PerturbationSet.around(x, torch.full((1, 5), eps, dtype=torch.float64), norm, None)
    pairs = pair_lower_bounds(chain, region, method)
    w, b = ens.params["0.weight"], ens.params["0.bias"]
    dw = w[:, :, None, :] - w[:, None, :, :]  # [S, C, C, D]
    value = torch.einsum("scjd,nd->sncj", dw, x) + (b[:, :, None] - b[:, None, :])[:, None]
    expected = value - eps * torch.linalg.vector_norm(dw, ord=dual, dim=-1)[:, None]
    torch.testing.assert_close(pairs, expected, atol=TOL64, rtol=0)


@pytest.mark.parametrize("method", ["ibp", "crown"])
def test_affine_ensemble_over_ball_and_box_matches_the_best_vertex(method):
    # The L-inf ball cut by the data box is a box, and a linear function's minimum over a box
    # is at one of its vertices (common practice): enumerate the vertices.
    ens = _affine_ensemble(features=2, seed=7)
    x = torch.tensor([[0.9, -0.2], [0.1, 0.95]], dtype=torch.float64)
    eps, lo, hi = 0.3, -1.0, 1.0
    chain = read_chain(ens.template, ens.params, (2,))
    box = (torch.full((2,), lo, dtype=torch.float64), torch.full((2,), hi, dtype=torch.float64))
    region = PerturbationSet.around(x, torch.full((1, 2), eps, dtype=torch.float64), "inf", box)
    pairs = pair_lower_bounds(chain, region, method)
    low, high = (x - eps).clamp(lo, hi), (x + eps).clamp(lo, hi)
    vertices = torch.stack([torch.where(torch.tensor(c, dtype=torch.bool), high, low)
                            for c in itertools.product([0, 1], repeat=2)])  # [4, N, 2]
    logits = ens.logits(vertices.reshape(-1, 2)).reshape(len(ens), 4, 2, -1)
    expected = (logits[..., :, None] - logits[..., None, :]).amin(1)
    torch.testing.assert_close(pairs, expected, atol=TOL64, rtol=0)


@pytest.mark.parametrize("kind, reference", [("tanh", np.tanh), ("sigmoid", scipy.special.expit),
                                             ("relu", lambda z: np.maximum(z, 0))])
def test_activation_lines_bound_the_activation_on_their_interval(kind, reference):
    # Zhang et al. 2018 sec. 3.2: each line must hold on all of [l, u]; checked on a dense grid
    # against numpy/scipy's activation for intervals left of, right of, across 0, wide and narrow.
    g = torch.Generator().manual_seed(11)
    centre = torch.randn(4000, generator=g, dtype=torch.float64) * 3
    width = torch.rand(4000, generator=g, dtype=torch.float64) ** 3 * 12
    width[:50] = 0.0
    lower, upper = centre - width / 2, centre + width / 2
    a_lo, b_lo, a_up, b_up = (t.numpy() for t in activation_lines(kind, lower, upper))
    grid = np.linspace(0, 1, 501)[:, None]
    z = lower.numpy() + grid * (upper - lower).numpy()
    f = reference(z)
    assert np.all(a_lo * z + b_lo <= f + TOL64)
    assert np.all(a_up * z + b_up >= f - TOL64)


def test_float32_bounds_contain_the_outputs_within_rounding():
    g = torch.Generator().manual_seed(2)
    nets = [jostle.init_parameters(jostle.mlp(2, 3, hidden=(16, 16), activation="relu"), g) for _ in range(3)]
    ens = jostle.Ensemble.from_modules(nets)
    x = torch.rand(5, 2, generator=g) * 2 - 1
    chain = read_chain(ens.template, ens.params, (2,))
    region = PerturbationSet.around(x, torch.full((1, 5), 0.25), "inf", None)
    lower, upper = output_bounds(chain.steps, region, "crown")
    logits = ens.logits(_ball_samples(x, 0.25, "inf", 20000, g).reshape(-1, 2)).reshape(3, -1, 5, 3)
    # float32 (eps 1.2e-7) over sums of ~50 terms of size ~1: 1e-5 covers the rounding
    assert bool((logits >= lower[:, None] - 1e-5).all() and (logits <= upper[:, None] + 1e-5).all())


@pytest.mark.parametrize("method", ["ibp", "crown"])
def test_a_jostle_cnn_is_certified_soundly(method):
    # jostle.cnn starts with ImageView (flat rows to images), read as a reshape. Soundness: the
    # margin lower bound holds at 4,000 random points of each ball (float32 rounding slack 1e-5).
    nets = [jostle.init_parameters(jostle.cnn((1, 10, 10), 4, channels=(3, 4)), torch.Generator().manual_seed(k))
            for k in range(3)]
    ens = jostle.Ensemble.from_modules(nets)
    x = torch.rand(2, 100, generator=torch.Generator().manual_seed(5))
    box = (torch.zeros(100), torch.ones(100))
    cert = jostle.certify(ens, x, eps=0.01, method=method, bounds=box)
    loose = jostle.certify(ens, x, eps=0.01, method="ibp", bounds=box)
    assert bool((cert.margin_lower >= loose.margin_lower - 1e-5).all())  # CROWN never looser than IBP
    shift = (torch.rand(4000, 2, 100, generator=torch.Generator().manual_seed(6)) * 2 - 1) * 0.01
    points = (x[None] + shift).clamp(0, 1).reshape(-1, 100)
    logits = ens.logits(points).reshape(len(ens), 4000, 2, 4)
    own = logits.gather(-1, cert.member_label[:, None, :, None].expand(-1, 4000, -1, 1)).squeeze(-1)
    others = logits.scatter(-1, cert.member_label[:, None, :, None].expand(-1, 4000, -1, 1), float("-inf"))
    margin = own - others.amax(-1)  # [S, 4000, N]
    assert bool((margin.amin(1) >= cert.margin_lower - 1e-5).all())
