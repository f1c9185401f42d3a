"""Labels that match the method: Square's accept rule under resampling, an attack's default
label, and the name a VI fit is shown under.

Square Attack (Andriushchenko et al. 2020) keeps a proposal only if it lowers the margin;
with a fresh member draw per evaluation, the two margins must come from the same draw, or
an offset between members decides instead of the proposal.
"""
import pytest
import torch
from torch import nn

import jostle
from jostle.sweeps.chart_data import _method_label
from tests.conftest import random_mlp_ensemble

W = torch.tensor([1.0, -2.0, 0.5])


def _offset_members(offsets) -> jostle.Ensemble:
    # Member m scores s_m(x) = w'x + offset_m for class 0 against 0 for class 1; with one
    # member and two classes the attacker's margin log p(0) - log p(1) is exactly s_m(x).
    layers = []
    for offset in offsets:
        layer = nn.Linear(3, 2)
        with torch.no_grad():
            layer.weight.copy_(torch.stack([W, torch.zeros(3)]))
            layer.bias.copy_(torch.tensor([offset, 0.0]))
        layers.append(nn.Sequential(layer))
    return jostle.Ensemble.from_modules(layers)


def test_square_with_resample_compares_margins_from_one_draw():
    # Offsets 20 and 10 keep every margin positive (no point ever flips), and the margin of
    # either member falls exactly when w'x falls. Compared under one draw, an accepted
    # proposal lowers w'x; compared across draws, the offset of 10 would let proposals that
    # raise w'x through.
    ens = _offset_members([20.0, 10.0])
    x = torch.randn(16, 3, generator=torch.Generator().manual_seed(0))
    adv = jostle.attack(ens, x, torch.zeros(16, dtype=torch.long), method="square", norm="inf", eps=0.3,
                        steps=60, samples=1, resample=True, seed=2)
    score = adv.path @ W  # [steps + 1, n]
    # A kept point repeats its score exactly; a changed one moves w'x by at least
    # 2 * 0.3 * min|w_i| = 0.3, far beyond float32 rounding, so the test needs no slack.
    assert float((score[1:] - score[:-1]).max()) <= 0.0
    # It still reaches the L-inf optimum of a linear score, the corner -eps sign(w)
    # (Goodfellow et al. 2015 linear view). float32: each x_i +- 0.3 rounds by an ulp
    # (~2.4e-7 at |x| ~ 2), weighted by |w_i| <= 2, plus the dot product's own rounding.
    torch.testing.assert_close(score[-1], x @ W - 0.3 * W.abs().sum(), atol=1e-5, rtol=0)
    # Two evaluations of the attacker per active point and iteration (current and proposal).
    assert adv.queries.tolist() == [1 + 2 * 60] * 16


def test_default_label_is_the_judged_prediction():
    # y=None attacks the judged predictive's label: the whole ensemble's by default, the
    # attacker's samples' with judge="attacker" (documented in jostle.attack).
    ens, _ = random_mlp_ensemble(members=6, classes=3, hidden=(16,), seed=31)
    x = torch.randn(200, 2, generator=torch.Generator().manual_seed(31)) * 2
    whole, attacker = ens.predict(x).label, ens.predict(x, samples=2).label
    assert bool((whole != attacker).any())  # the two rules differ on these points
    assert torch.equal(jostle.attack(ens, x, eps=0.1, steps=2, samples=2).label, whole)
    assert torch.equal(jostle.attack(ens, x, eps=0.1, steps=2, samples=2, judge="attacker").label, attacker)


def test_vi_is_named_for_the_elbo_it_fits():
    # kl_weight = 1 is the ELBO of Bayes by Backprop (Blundell et al. 2015); any other
    # weight is a tempered ELBO and is shown as one (fit meta, describe, sweep notes).
    data = jostle.datasets.moons(n_train=32, n_test=8, noise=0.2, seed=0)
    net = jostle.mlp(2, 2, hidden=(4,))
    tempered = jostle.fit_vi(net, data, samples=3, epochs=1, progress=False)
    assert tempered.meta["method"] == "vi (tempered, kl_weight=0.1)"
    assert jostle.describe(tempered).startswith("vi (tempered, kl_weight=0.1) posterior")
    full = jostle.fit_vi(net, data, samples=3, epochs=1, kl_weight=1.0, progress=False)
    assert full.meta["method"] == "vi"
    assert _method_label("vi", {}) == "vi (tempered, kl_weight=0.1)"
    assert _method_label("vi", {"kl_weight": 1.0}) == "vi" and _method_label("map", {}) == "map"


def test_kl_annealing_ramps_the_kl_weight_up_from_zero():
    # With the KL weight ramped up from 0 over the only epoch, the fit is less pulled
    # towards the prior than with the full weight throughout, so its KL stays larger.
    data = jostle.datasets.moons(n_train=64, n_test=8, noise=0.2, seed=0)
    net = jostle.mlp(2, 2, hidden=(8,))
    settings = dict(samples=2, epochs=1, kl_weight=1.0, init_std=0.1, progress=False)
    ramped = jostle.fit_vi(net, data, kl_anneal=1.0, **settings)
    steady = jostle.fit_vi(net, data, kl_anneal=0.0, **settings)
    assert ramped.posterior.kl() > steady.posterior.kl()
    assert ramped.meta["kl_anneal"] == 1.0
    with pytest.raises(ValueError, match="kl_anneal must be a finite float >= 0 and <= 1; got 2"):
        jostle.fit_vi(net, data, kl_anneal=2.0)
