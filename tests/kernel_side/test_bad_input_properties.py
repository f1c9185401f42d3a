"""Bad input, tried systematically (property-based): every refusal names the parameter,
the rule and the value, and nothing returns a silent NaN or fails deep inside torch."""
from __future__ import annotations

import math
import re

import numpy as np
import pytest
import torch
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import jostle
from jostle import metrics

FEW = settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
NOT_FINITE = st.sampled_from([math.nan, math.inf, -math.inf])
FLOAT32_MAX = float(torch.finfo(torch.float32).max)


def _tiny() -> jostle.Ensemble:
    generator = torch.Generator().manual_seed(0)
    nets = [jostle.init_parameters(jostle.mlp(2, 2, hidden=(8,)), generator) for _ in range(3)]
    return jostle.Ensemble.from_modules(nets)


ENS = _tiny()  # a 2-8-2 MLP with 3 members, built once
X = torch.tensor([[0.1, 0.2], [0.3, -0.4]])


@FEW
@given(bad=NOT_FINITE, where=st.integers(0, 3))
def test_non_finite_inputs_are_refused_everywhere(bad, where):
    x = X.clone().flatten()
    x[where] = bad
    x = x.view(2, 2)
    message = r"x must contain only finite values; got NaN or inf"
    for call in (lambda: ENS.logits(x), lambda: ENS.predict(x), lambda: jostle.attack(ENS, x, steps=2),
                 lambda: jostle.expected_gradient(ENS, x), lambda: jostle.gradient_fade(ENS, x, sample_counts=(1,)),
                 lambda: jostle.minimal_budget(ENS, x, iterations=1, steps=1),
                 lambda: jostle.softmax_robustness(ENS, x, X), lambda: jostle.masking_check(ENS, x, steps=1)):
        with pytest.raises(ValueError, match=message):
            call()
    with pytest.raises(ValueError, match=r"x_adv must contain only finite values; got NaN or inf"):
        jostle.softmax_robustness(ENS, X, x)


@FEW
@given(features=st.integers(0, 6).filter(lambda d: d != 2), points=st.integers(1, 4))
def test_wrong_feature_counts_name_the_network_shape(features, points):
    x = torch.zeros(points, features)
    message = rf"x must have shape \(n_points, 2\) for this network; got shape \({points}, {features}\)"
    with pytest.raises(ValueError, match=message):
        ENS.logits(x)
    with pytest.raises(ValueError, match=message):
        jostle.attack(ENS, x)


@pytest.mark.parametrize("call", [
    lambda x: jostle.attack(ENS, x), lambda x: jostle.expected_gradient(ENS, x),
    lambda x: jostle.gradient_fade(ENS, x, sample_counts=(1,)), lambda x: jostle.minimal_budget(ENS, x),
    lambda x: jostle.masking_check(ENS, x), lambda x: jostle.softmax_robustness(ENS, x, x)])
def test_empty_batches_are_refused(call):
    with pytest.raises(ValueError, match=r"x must hold at least one point; got shape \(0, 2\)"):
        call(torch.zeros(0, 2))


def test_complex_and_meta_inputs_are_refused():
    with pytest.raises(ValueError, match=r"x must hold real numbers; got dtype torch.complex64"):
        ENS.logits(torch.zeros(2, 2, dtype=torch.complex64))
    device_rule = r"a 'meta' tensor holds no values, so put both on one real device"
    with pytest.raises(ValueError, match=r"x is on device 'meta' and ens on device 'cpu'; " + device_rule):
        ENS.predict(torch.zeros(2, 2, device="meta"))
    with pytest.raises(ValueError, match=r"x is on device 'meta' and ens on device 'cpu'"):
        jostle.attack(ENS, torch.zeros(2, 2, device="meta"))
    elsewhere = ENS.to("meta")  # an ensemble on another device than its inputs
    for call in (lambda: elsewhere.logits(X), lambda: jostle.attack(elsewhere, X),
                 lambda: jostle.expected_gradient(elsewhere, X)):
        with pytest.raises(ValueError, match=r"x is on device 'cpu' and ens on device 'meta'; " + device_rule):
            call()
    with pytest.raises(ValueError, match=r"state_dicts\[1\] \(modules\[1\]\) must be on device 'cpu' like the first"):
        jostle.Ensemble.from_modules([torch.nn.Linear(2, 2), torch.nn.Linear(2, 2).to("meta")])


@FEW
@given(eps=st.one_of(st.floats(max_value=-1e-9, allow_nan=False, allow_infinity=True), NOT_FINITE),
       method=st.sampled_from(["fgsm", "pgd", "spsa", "square"]))
def test_negative_or_non_finite_budgets_are_refused(eps, method):
    with pytest.raises(ValueError, match=re.escape(f"eps must be a finite float >= 0; got {eps:g}")):
        jostle.attack(ENS, X, method=method, eps=eps, steps=1)


@FEW
@given(eps=st.floats(min_value=FLOAT32_MAX * 1.01, max_value=1e308))
def test_budgets_past_float32_are_refused(eps):
    with pytest.raises(ValueError, match=r"eps must fit the ensemble's dtype float32 \(\|eps\| <= 3.403e\+38\)"):
        jostle.attack(ENS, X, eps=eps, steps=1)


@FEW
@given(eps=st.floats(min_value=1e3, max_value=1e30), norm=st.sampled_from(["inf", "2"]))
def test_enormous_finite_budgets_give_finite_results(eps, norm):
    result = jostle.attack(ENS, X, eps=eps, norm=norm, steps=2, method="pgd")
    assert bool(torch.isfinite(result.x_adv).all()) and bool(torch.isfinite(result.loss).all())


@FEW
@given(samples=st.one_of(st.integers(max_value=0), st.integers(min_value=4, max_value=10**6)))
def test_sample_counts_outside_one_to_s_are_refused(samples):
    message = rf"samples must be an integer in \[1, 3\]; got {samples}"
    for call in (lambda: ENS.logits(X, samples=samples), lambda: jostle.attack(ENS, X, samples=samples, steps=1),
                 lambda: jostle.expected_gradient(ENS, X, samples=samples)):
        with pytest.raises(ValueError, match=message):
            call()
    with pytest.raises(ValueError, match=rf"sample_counts entry must be an integer in \[1, 3\]; got {samples}"):
        jostle.gradient_fade(ENS, X, sample_counts=(1, samples))
    with pytest.raises(ValueError, match=rf"k must be an integer in \[1, 3\]; got {samples}"):
        ENS.subset(samples)


@FEW
@given(index=st.one_of(st.integers(max_value=-4), st.integers(min_value=3)))
def test_member_indices_out_of_range_are_refused(index):
    with pytest.raises(ValueError, match=rf"index must be an integer in \[-3, 2\]; got {index}"):
        ENS[index]
    with pytest.raises(ValueError, match=r"index must index members in \[0, 3\)"):
        ENS[[0, index]]
    with pytest.raises(ValueError, match=r"samples must index members in \[0, 3\)"):
        ENS.logits(X, samples=[index])


def test_member_selections_of_the_wrong_kind_are_refused():
    with pytest.raises(ValueError, match=r"samples must hold integer member indices; got dtype torch.float32"):
        ENS.logits(X, samples=torch.tensor([0.5]))
    with pytest.raises(ValueError, match=r"samples as a boolean mask must have shape \(3,\); got shape \(2,\)"):
        ENS.logits(X, samples=torch.tensor([True, False]))
    assert ENS.logits(X, samples=np.int64(2)).shape == (2, 2, 2)  # numpy integers count as ints
    with pytest.raises(ValueError, match=r"index must select at least one member of 3"):
        ENS[3:]


@FEW
@given(label=st.one_of(st.integers(max_value=-1), st.integers(min_value=2, max_value=10**9)))
def test_labels_out_of_range_are_refused(label):
    rule = r"labels >= 0; got" if label < 0 else r"labels < 2 \(the number of classes\); got"
    for call in (lambda: jostle.attack(ENS, X, y=[0, label], steps=1),
                 lambda: jostle.attack(ENS, X, target=[label, 0], steps=1),
                 lambda: jostle.expected_gradient(ENS, X, y=[label, 1]),
                 lambda: metrics.accuracy([[0.5, 0.5], [0.2, 0.8]], [label, 0])):
        with pytest.raises(ValueError, match=rule + rf" {label}"):
            call()


@pytest.mark.parametrize("labels, message", [
    ([0.5, 1], r"y must hold integer class labels; got dtype float64"),
    ([math.nan, 1], r"y must hold integer class labels; got dtype float64"),
    (["a", "b"], r"y must hold integer class labels; got dtype <U1"),
    ([[0, 1]], r"y must have shape \(2,\); got shape \(1, 2\)"),
])
def test_labels_of_the_wrong_kind_are_refused(labels, message):
    with pytest.raises(ValueError, match=message):
        jostle.attack(ENS, X, y=labels, steps=1)
    with pytest.raises(ValueError, match=message):
        metrics.nll([[0.5, 0.5], [0.2, 0.8]], labels)


@FEW
@given(seed=st.one_of(st.integers(max_value=-1), st.integers(min_value=2**63)))
def test_seeds_outside_the_generator_range_are_refused(seed):
    rule = r">= 0" if seed < 0 else r">= 0 and <= 2\*\*63 - 1"
    message = rf"seed must be an integer {rule}; got {seed}"
    with pytest.raises(ValueError, match=message):
        jostle.attack(ENS, X, seed=seed)
    with pytest.raises(ValueError, match=message):
        ENS.subset(2, seed=seed)


@FEW
@given(steps=st.integers(max_value=0), name=st.sampled_from(["steps", "iterations"]))
def test_zero_or_negative_iteration_counts_are_refused(steps, name):
    with pytest.raises(ValueError, match=rf"{name} must be an integer >= 1; got {steps}"):
        jostle.minimal_budget(ENS, X, **{name: steps})
    with pytest.raises(ValueError, match=rf"steps must be an integer >= 1; got {steps}"):
        jostle.attack(ENS, X, steps=steps)


@FEW
@given(bad=NOT_FINITE, row=st.integers(0, 1))
def test_metrics_refuse_non_finite_probabilities(bad, row):
    probs = np.array([[0.5, 0.5], [0.2, 0.8]])
    probs[row, 0] = bad
    for metric in (metrics.accuracy, metrics.nll, metrics.brier, metrics.ece):
        with pytest.raises(ValueError, match=rf"probs must hold finite, non-negative rows that sum to 1; "
                                             rf"got NaN or inf in row {row}"):
            metric(probs, [0, 1])


@FEW
@given(scale=st.floats(0.0, 10.0).filter(lambda s: abs(s - 1) > 1e-3))
def test_metrics_refuse_rows_that_do_not_sum_to_one(scale):
    probs = np.array([[0.5, 0.5], [0.2, 0.8]]) * np.array([[1.0], [scale]])
    with pytest.raises(ValueError, match=re.escape(f"rows that sum to 1; row 1 sums to {scale:g}")):
        metrics.brier(probs, [0, 1])


@pytest.mark.parametrize("probs, message", [
    (np.zeros((0, 2)), r"probs must hold at least one point; got shape \(0, 2\)"),
    ([[0.5, 0.5], [1.0]], r"probs must be a numeric array"),
    ([["a", "b"]], r"probs must be a numeric array"),
    (np.ones(3) / 3, r"probs must have shape \(n_points, n_classes >= 2\); got shape \(3,\)"),
    (torch.zeros(2, 2, device="meta"), r"probs is on device 'meta', which holds no values"),
])
def test_metrics_refuse_malformed_probabilities(probs, message):
    with pytest.raises(ValueError, match=message):
        metrics.ece(probs, [0] * (len(probs) if hasattr(probs, "__len__") else 0))


@FEW
@given(bad=st.one_of(NOT_FINITE, st.just("a")))
def test_ood_auroc_refuses_bad_scores(bad):
    message = r"scores_out must (contain only finite values|be a numeric array)"
    with pytest.raises(ValueError, match=message):
        metrics.ood_auroc([0.1, 0.2], [0.3, bad])
