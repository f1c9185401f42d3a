"""The uncertainty split (Houlsby et al. 2011; Depeweg et al. 2018) against scipy and worked cases."""
import math

import numpy as np
import pytest
import torch
from scipy.stats import entropy as scipy_entropy

import jostle
from jostle import Prediction


def test_split_matches_scipy_on_random_members(generator):
    # total = H(mean p); aleatoric = mean H(p_s); epistemic = MI = total - aleatoric
    # (Houlsby et al. 2011; Depeweg et al. 2018). Reference: scipy.stats.entropy.
    member = torch.softmax(torch.randn(7, 11, 4, generator=generator, dtype=torch.float64), -1)
    pred = Prediction(member)
    p = member.numpy()
    total = scipy_entropy(p.mean(0), axis=-1)
    aleatoric = scipy_entropy(p, axis=-1).mean(0)
    # float64 sums of 4 terms p log p and means over 7 members, in another order: a few ulp
    np.testing.assert_allclose(pred.total.numpy(), total, atol=1e-12)
    np.testing.assert_allclose(pred.aleatoric.numpy(), aleatoric, atol=1e-12)
    np.testing.assert_allclose(pred.epistemic.numpy(), total - aleatoric, atol=1e-12)
    assert bool((pred.epistemic >= 0).all())


def test_disagreeing_certain_members_are_all_epistemic():
    # Members (1,0) and (0,1): total = MI = ln 2, aleatoric = 0 (worked from the split of
    # Depeweg et al. 2018: entropy of the mean minus the mean entropy).
    pred = Prediction(torch.tensor([[[1.0, 0.0]], [[0.0, 1.0]]], dtype=torch.float64))
    assert pred.total.item() == pytest.approx(math.log(2), abs=1e-12)
    assert pred.epistemic.item() == pytest.approx(math.log(2), abs=1e-12)
    assert pred.aleatoric.item() == pytest.approx(0.0, abs=1e-12)


def test_agreeing_uncertain_members_are_all_aleatoric():
    # Members (.5,.5) twice: aleatoric = ln 2, MI = 0 (the same split, Depeweg et al. 2018).
    pred = Prediction(torch.full((2, 1, 2), 0.5, dtype=torch.float64))
    assert pred.aleatoric.item() == pytest.approx(math.log(2), abs=1e-12)
    assert pred.epistemic.item() == pytest.approx(0.0, abs=1e-12)


def test_probabilities_are_averaged_not_logits():
    # Member logits (0,0) and (4,0): p1 = (0.5 + sigmoid(4)) / 2 = 0.741007; averaging
    # logits would give sigmoid(2) = 0.880797 (the posterior predictive is the mean of the
    # members' probabilities, Lakshminarayanan et al. 2017, from memory; arithmetic by hand).
    ens = _affine_ensemble([torch.zeros(2), torch.tensor([4.0, 0.0])])
    pred = ens.predict(torch.zeros(1, 1))
    assert pred.probs[0, 0].item() == pytest.approx(0.741007, abs=1e-6)
    assert pred.probs[0, 0].item() != pytest.approx(0.880797, abs=1e-3)


def test_bits_are_nats_over_ln2(generator):
    member = torch.softmax(torch.randn(5, 3, 2, generator=generator), -1)
    nats, bits = Prediction(member), Prediction(member).in_bits()
    torch.testing.assert_close(bits.total, nats.total / math.log(2))
    torch.testing.assert_close(bits.epistemic, nats.epistemic / math.log(2))
    # Two classes: at most 1 bit (information theory, common practice).
    assert float(bits.total.max()) <= 1.0 + 1e-6


def test_spread_quantiles_agree_with_numpy(generator):
    member = torch.softmax(torch.randn(21, 6, 3, generator=generator, dtype=torch.float64), -1)
    pred = Prediction(member)
    # float64 interpolation between two order statistics and a 21-term std: a few ulp
    np.testing.assert_allclose(pred.lower.numpy(), np.quantile(member.numpy(), 0.05, axis=0), atol=1e-12)
    np.testing.assert_allclose(pred.upper.numpy(), np.quantile(member.numpy(), 0.95, axis=0), atol=1e-12)
    np.testing.assert_allclose(pred.std.numpy(), member.numpy().std(0), atol=1e-12)


def test_agreement_counts_votes():
    member = torch.tensor([[[0.9, 0.1]], [[0.8, 0.2]], [[0.3, 0.7]], [[0.6, 0.4]]])
    pred = Prediction(member)
    assert pred.label.item() == 0
    assert pred.agreement.item() == pytest.approx(0.75)


def test_prediction_rejects_bad_shapes_and_units():
    with pytest.raises(ValueError, match=r"member_probs must have shape \(S, N, C\); got \(2, 2\)"):
        Prediction(torch.ones(2, 2))
    with pytest.raises(ValueError, match="units must be one of 'nats', 'bits'; got 'bans'"):
        Prediction(torch.ones(1, 1, 2) / 2, units="bans")
    with pytest.raises(ValueError, match=r"q must be a float in \[0, 1\]; got 1.5"):
        Prediction(torch.ones(1, 1, 2) / 2).quantile(1.5)


def _affine_ensemble(biases):
    nets = []
    for bias in biases:
        net = torch.nn.Sequential(torch.nn.Linear(1, 2))
        with torch.no_grad():
            net[0].weight.zero_()
            net[0].bias.copy_(bias)
        nets.append(net)
    return jostle.Ensemble.from_modules(nets)
