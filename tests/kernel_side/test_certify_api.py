"""jostle.certify and jostle.certified_radius: verdicts, the Clopper-Pearson share, radii, and bad input."""
import math
import re

import numpy as np
import pytest
import scipy.stats
import torch
from torch import nn

import jostle
from jostle.certify.verdicts import clopper_pearson_lower
from tests.conftest import random_mlp_ensemble

# Float64 bounds: rounding ~1e-13 after a few hundred operations; 1e-9 is far above it.
TOL64 = 1e-9


def _tanh_ensemble(members=5, classes=3, seed=0):
    ens, _ = random_mlp_ensemble(members=members, classes=classes, hidden=(12, 12), activation="tanh", seed=seed)
    return jostle.Ensemble(ens.template.double(), {k: 2.0 * v.double() for k, v in ens.params.items()})


@pytest.mark.parametrize("members", [1, 7, 30])
@pytest.mark.parametrize("confidence", [0.95, 0.975])
def test_clopper_pearson_lower_bound_is_scipys_exact_interval(members, confidence):
    # Clopper & Pearson 1934: the one-sided lower bound at level c is the low end of the
    # two-sided exact interval at level 2c - 1 (scipy.stats.binomtest(...).proportion_ci).
    for k in range(members + 1):
        expected = scipy.stats.binomtest(k, members).proportion_ci(confidence_level=2 * confidence - 1,
                                                                    method="exact").low
        assert float(clopper_pearson_lower(np.array([k]), members, confidence)[0]) == pytest.approx(expected, abs=1e-12)


def test_certificate_fields_agree_with_each_other_and_with_the_prediction():
    ens = _tanh_ensemble(members=7)
    x = torch.rand(30, 2, generator=torch.Generator().manual_seed(0), dtype=torch.float64) * 2 - 1
    cert = jostle.certify(ens, x, eps=0.05)
    assert cert.members.shape == (7, 30) and cert.members.dtype == torch.bool
    assert torch.equal(cert.label, ens.predict(x).label) and torch.equal(cert.member_label, ens.logits(x).argmax(-1))
    torch.testing.assert_close(cert.share, cert.members.double().mean(0), atol=0, rtol=0)  # a count over 7: exact
    expected = [scipy.stats.binomtest(int(k), 7).proportion_ci(0.90, method="exact").low if k else 0.0
                for k in cert.members.sum(0)]
    np.testing.assert_allclose(cert.share_lower.numpy(), expected, atol=1e-12, rtol=0)
    assert torch.equal(cert.members, cert.margin_lower > 0)
    assert torch.equal(cert.predictive, cert.probability_lower > cert.other_upper)
    assert 0 < int(cert.members.sum()) < cert.members.numel(), "pick eps so that some members fail"
    assert "Caution" in str(cert) and "not for the true posterior" in cert.summary()


def test_at_eps_zero_the_bounds_are_the_network_itself():
    ens = _tanh_ensemble()
    x = torch.rand(20, 2, generator=torch.Generator().manual_seed(1), dtype=torch.float64) * 2 - 1
    logits = ens.logits(x)
    top2 = logits.topk(2, dim=-1).values
    probs = ens.predict(x).probs
    for method in ("ibp", "crown"):
        cert = jostle.certify(ens, x, eps=0.0, method=method)
        torch.testing.assert_close(cert.margin_lower, top2[..., 0] - top2[..., 1], atol=TOL64, rtol=0)
        torch.testing.assert_close(cert.probability_lower, probs.amax(-1), atol=TOL64, rtol=0)
        assert bool(cert.members.all() and cert.predictive.all())


@pytest.mark.parametrize("norm", ["inf", "2"])
def test_probability_bounds_hold_on_random_points_of_the_ball(norm):
    ens = _tanh_ensemble(seed=2)
    g = torch.Generator().manual_seed(2)
    x = torch.rand(6, 2, generator=g, dtype=torch.float64) * 2 - 1
    eps = 0.15
    cert = jostle.certify(ens, x, eps=eps, norm=norm, method="crown")
    step = torch.randn(20000, 6, 2, generator=g, dtype=torch.float64)
    step = step / step.norm(dim=-1, keepdim=True) * torch.rand(20000, 6, 1, generator=g, dtype=torch.float64).sqrt()
    if norm == "inf":
        step = torch.rand(20000, 6, 2, generator=g, dtype=torch.float64) * 2 - 1
    points = (x + eps * step).reshape(-1, 2)
    probs = ens.predict(points).probs.reshape(20000, 6, -1)
    label_probs = probs.gather(2, cert.label[None, :, None].expand(20000, -1, 1)).squeeze(2)
    others = probs.scatter(2, cert.label[None, :, None].expand(20000, -1, 1), -1.0).amax(2)
    assert bool((label_probs >= cert.probability_lower - TOL64).all())
    assert bool((others <= cert.other_upper + TOL64).all())
    member_labels = ens.logits(points).argmax(-1).reshape(len(ens), 20000, 6)
    kept = (member_labels == cert.member_label[:, None]).all(1)
    assert bool(kept[cert.members].all()), "a certified member changed its label at a sampled point"


def test_ibp_certificates_shrink_as_the_budget_grows():
    # Interval arithmetic is monotone in its input intervals (Gowal et al. 2018), so a bigger
    # ball never certifies more.
    ens = _tanh_ensemble(seed=3)
    x = torch.rand(40, 2, generator=torch.Generator().manual_seed(3), dtype=torch.float64) * 2 - 1
    previous = None
    for eps in (0.0, 0.02, 0.05, 0.1, 0.2):
        cert = jostle.certify(ens, x, eps=eps, method="ibp")
        if previous is not None:
            assert bool((cert.members <= previous.members).all() and (cert.predictive <= previous.predictive).all())
        previous = cert


def test_certified_radius_is_certified_and_the_failed_end_is_not():
    ens = _tanh_ensemble(seed=4)
    x = torch.rand(12, 2, generator=torch.Generator().manual_seed(4), dtype=torch.float64) * 2 - 1
    rad = jostle.certified_radius(ens, x, norm="2", bounds=(-1.5, 1.5), iterations=14)
    assert bool(jostle.certify(ens, x, eps=rad.eps, norm="2", bounds=(-1.5, 1.5)).predictive.all())
    failed = torch.isfinite(rad.upper)
    assert bool(failed.any())
    upper = torch.where(failed, rad.upper, 0.0)
    assert not bool(jostle.certify(ens, x, eps=upper, norm="2", bounds=(-1.5, 1.5)).predictive[failed].any())
    for s in range(len(ens)):
        assert bool(jostle.certify(ens, x, eps=rad.members[s], norm="2", bounds=(-1.5, 1.5)).members[s].all())
    assert "Caution" in str(rad)


@pytest.mark.parametrize("norm, dual", [("inf", 1), ("2", 2)])
def test_certified_radius_of_an_affine_member_is_the_closed_form(norm, dual):
    # Smallest flipping budget of a two-class affine model: |w.x + b| / ||w||_dual
    # (Moosavi-Dezfooli et al. 2016 for the affine case), with w, b the class differences.
    g = torch.Generator().manual_seed(6)
    nets = [nn.Linear(3, 2).double() for _ in range(3)]
    for net in nets:
        net.weight.data, net.bias.data = (torch.randn(2, 3, generator=g, dtype=torch.float64),
                                          torch.randn(2, generator=g, dtype=torch.float64))
    ens = jostle.Ensemble.from_modules(nets)
    x = torch.randn(8, 3, generator=g, dtype=torch.float64)
    rad = jostle.certified_radius(ens, x, norm=norm, iterations=40)
    w = ens.params["weight"][:, 0] - ens.params["weight"][:, 1]
    b = ens.params["bias"][:, 0] - ens.params["bias"][:, 1]
    closed = (x @ w.T + b).T.abs() / torch.linalg.vector_norm(w, ord=dual, dim=-1)[:, None]
    assert bool((rad.members <= closed + TOL64).all())
    # bisection from the doubling bracket [2^(k-1), 2^k]: 40 halvings leave < 2^k * 1e-12
    torch.testing.assert_close(rad.members, closed, atol=1e-9 * (1 + float(closed.max())), rtol=0)


def test_convolutional_template_and_chunking_give_the_same_certificate():
    g = torch.Generator().manual_seed(7)
    nets = []
    for _ in range(3):
        net = nn.Sequential(nn.Conv2d(1, 4, 3, padding=1), nn.ReLU(), nn.MaxPool2d(2), nn.Flatten(), nn.Linear(64, 10))
        for p in net.parameters():
            p.data = torch.randn(p.shape, generator=g) * 0.3
        nets.append(net)
    ens = jostle.Ensemble.from_modules(nets)
    x = torch.rand(6, 1, 8, 8, generator=g)
    whole = jostle.certify(ens, x, eps=0.01, bounds=(0.0, 1.0))
    small = jostle.Ensemble.from_modules(nets, memory_budget=200_000)
    chunked = jostle.certify(small, x, eps=0.01, bounds=(0.0, 1.0))
    # the same bounds summed in other batch shapes: float32 rounding (1.2e-7) over ~600 terms
    torch.testing.assert_close(chunked.margin_lower, whole.margin_lower, atol=1e-4, rtol=0)
    assert int(whole.members.sum()) > 0


def test_refuses_unsupported_templates_naming_the_layer():
    gelu, _ = random_mlp_ensemble(members=2, activation="gelu")
    with pytest.raises(ValueError, match=r"layer '1' is a GELU, which it does not support"):
        jostle.certify(gelu, torch.zeros(1, 2))

    class Custom(nn.Module):
        def __init__(self):
            super().__init__()
            self.linear = nn.Linear(2, 2)

        def forward(self, x):
            return self.linear(x)

    custom = jostle.Ensemble.from_modules([Custom(), Custom()])
    with pytest.raises(ValueError, match=r"got a template of type Custom"):
        jostle.certified_radius(custom, torch.zeros(1, 2))
    reflect = jostle.Ensemble.from_modules([nn.Sequential(nn.Conv2d(1, 1, 3, padding=1, padding_mode="reflect"),
                                                          nn.Flatten(), nn.Linear(16, 2))])
    with pytest.raises(ValueError, match=r"padding_mode must be 'zeros' for certify; got 'reflect'"):
        jostle.certify(reflect, torch.zeros(1, 1, 4, 4))


@pytest.mark.parametrize("kwargs, message", [
    (dict(eps=-0.1), "eps must be a finite float >= 0; got -0.1"),
    (dict(eps=math.nan), "eps must be a finite float >= 0; got nan"),
    (dict(eps=[0.1, 0.2]), "eps must have shape (3,) (one budget per point); got shape (2,)"),
    (dict(eps=[0.1, -0.2, 0.0]), "eps must be >= 0 at every point; got -0.2"),
    (dict(norm="1"), "norm must be one of 'inf', '2'; got '1'"),
    (dict(method="lp"), "method must be one of 'ibp', 'crown'; got 'lp'"),
    (dict(confidence=1.0), "confidence must be a finite float > 0 and < 1; got 1"),
    (dict(bounds=(0.5, 1.0)), "x must lie inside bounds; point 0, feature 0 is"),
    (dict(bounds=(1.0, 0.0)), "bounds must have lo <= hi in every feature"),
])
def test_certify_refuses_bad_input(kwargs, message):
    ens, _ = random_mlp_ensemble(members=2, activation="relu")
    with pytest.raises(ValueError, match=re.escape(message)):
        jostle.certify(ens, torch.zeros(3, 2), **kwargs)


def test_certified_radius_refuses_bad_input():
    ens, _ = random_mlp_ensemble(members=2, activation="relu")
    with pytest.raises(ValueError, match=re.escape("iterations must be an integer >= 1; got 0")):
        jostle.certified_radius(ens, torch.zeros(2, 2), iterations=0)
    with pytest.raises(ValueError, match=re.escape("high must be a finite float > 0; got 0")):
        jostle.certified_radius(ens, torch.zeros(2, 2), high=0.0)
    with pytest.raises(ValueError, match=re.escape("x must have shape (n_points, *input_shape)")):
        jostle.certified_radius(ens, torch.zeros(2))
