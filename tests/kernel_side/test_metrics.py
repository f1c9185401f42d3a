"""Metrics against scikit-learn (Pedregosa et al. 2011, JMLR 12) and their definitions."""
import numpy as np
import pytest
from sklearn.calibration import calibration_curve
from sklearn.metrics import brier_score_loss, log_loss

from jostle import metrics


@pytest.fixture
def scored():
    rng = np.random.default_rng(7)
    logits = rng.normal(size=(400, 3)) * 2
    probs = np.exp(logits) / np.exp(logits).sum(1, keepdims=True)
    y = np.array([rng.choice(3, p=p) for p in probs])
    return probs, y


def test_ece_bins_match_sklearn_calibration_curve(scored):
    # Equal-width bins (Naeini et al. 2015; Guo et al. 2017); sklearn drops empty bins and
    # takes top-label correctness and confidence (sklearn.calibration.calibration_curve docs).
    probs, y = scored
    confidence = probs.max(1)
    correct = (probs.argmax(1) == y).astype(int)
    frac_pos, mean_pred = calibration_curve(correct, confidence, n_bins=10, strategy="uniform")
    table = metrics.reliability(probs, y, n_bins=10)
    filled = table.count > 0
    # float64 bin means of <= 400 values summed in another order: < 400 x 2.2e-16 ~ 1e-13
    np.testing.assert_allclose(table.accuracy[filled], frac_pos, atol=1e-12)
    np.testing.assert_allclose(table.confidence[filled], mean_pred, atol=1e-12)
    weights = table.count[filled] / len(y)
    assert metrics.ece(probs, y, n_bins=10) == pytest.approx(float((weights * abs(frac_pos - mean_pred)).sum()))


def test_ece_is_zero_when_confidence_equals_accuracy():
    # Every prediction at confidence 0.75 and 3 of 4 correct: perfectly calibrated.
    probs = np.tile([0.75, 0.25], (8, 1))
    y = np.array([0, 0, 0, 1] * 2)
    assert metrics.ece(probs, y) == pytest.approx(0.0, abs=1e-12)


def test_nll_is_the_mean_negative_log_probability_of_the_label(scored):
    # Definition (Bishop 2006, PRML eq. 4.108, cross-entropy error): -1/n sum_i ln p_i[y_i],
    # computed here by hand, since jostle.metrics.nll itself calls sklearn's log_loss.
    # float64 mean of 400 logs: ~400 x 2.2e-16 relative at most, 1e-12 is a wide margin.
    probs, y = scored
    by_hand = -np.log(probs[np.arange(len(y)), y]).mean()
    assert metrics.nll(probs, y) == pytest.approx(by_hand, rel=1e-12)


def test_nll_wiring_to_sklearn_log_loss(scored):
    # Wiring only (the same function underneath): the arguments reach log_loss in order.
    probs, y = scored
    assert metrics.nll(probs, y) == pytest.approx(log_loss(y, probs), rel=1e-12)


def test_brier_binary_is_twice_sklearn(scored):
    # sklearn's binary Brier is mean (p1 - y)^2; the multi-class sum over classes doubles it.
    rng = np.random.default_rng(3)
    p1 = rng.uniform(size=200)
    y = (rng.uniform(size=200) < p1).astype(int)
    probs = np.stack([1 - p1, p1], 1)
    assert metrics.brier(probs, y) == pytest.approx(2 * brier_score_loss(y, p1), rel=1e-12)


def test_brier_multiclass_matches_sklearn(scored):
    probs, y = scored
    # sklearn >= 1.7 computes the multi-class Brier score, unscaled with scale_by_half=False.
    assert metrics.brier(probs, y) == pytest.approx(brier_score_loss(y, probs, scale_by_half=False), rel=1e-12)


def test_ood_auroc_worked_example():
    # Scores in [.1,.2,.3] vs out [.25,.4,.5]: 8 of 9 pairs ordered, AUROC 8/9 (AUROC as the
    # Mann-Whitney probability that an OOD score exceeds an in-distribution one; Hanley &
    # McNeil 1982, Radiology 143:29).
    assert metrics.ood_auroc([0.1, 0.2, 0.3], [0.25, 0.4, 0.5]) == pytest.approx(8 / 9)


def test_accuracy_counts_top_class():
    assert metrics.accuracy(np.array([[0.9, 0.1], [0.4, 0.6], [0.7, 0.3]]), [0, 0, 0]) == pytest.approx(2 / 3)


def test_metric_inputs_are_checked():
    with pytest.raises(ValueError, match=r"probs must have shape \(n_points, n_classes >= 2\); got shape \(3,\)"):
        metrics.accuracy(np.ones(3), [0, 0, 0])
    with pytest.raises(ValueError, match="probs must hold finite, non-negative rows that sum to 1"):
        metrics.nll(np.array([[0.5, 0.6]]), [0])
    with pytest.raises(ValueError, match=r"y must have shape \(2,\); got shape \(3,\)"):
        metrics.brier(np.array([[0.5, 0.5], [0.5, 0.5]]), [0, 1, 1])
    with pytest.raises(ValueError, match=r"y must hold labels < 2 \(the number of classes\); got 2"):
        metrics.ece(np.array([[0.5, 0.5]]), [2])
    with pytest.raises(ValueError, match=r"n_bins must be an integer >= 1; got 0"):
        metrics.ece(np.array([[0.5, 0.5]]), [0], n_bins=0)
    with pytest.raises(ValueError, match="scores_out must be a non-empty 1-d array"):
        metrics.ood_auroc([0.1], [])
