"""Correlations of the sweep chart: exact permutation p-values checked by hand and against scipy."""
from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy import stats

from jostle.sweeps.chart_data import SweepPoints, exact_permutation_p, family_correlations


def _points(accuracy, value, family):
    n = len(accuracy)
    return SweepPoints(keys=[str(i) for i in range(n)], accuracy=np.asarray(accuracy, float),
                       value=np.asarray(value, float), family=np.asarray(family, np.uint8),
                       methods=["m"] * n, descriptions=[""] * n, saved=np.zeros(n, bool))


# Hand-computed exact two-sided permutation p-values (Pitman 1937; two-sided rule
# p = 2 min(P(r* <= r), P(r* >= r)), as in scipy.stats.permutation_test). With x = 1..n and all n!
# orders of y equally likely:
# - a perfect rank order is matched by 1 order of n!: p = 2 / n! (1/12 for n = 4, 1/60 for n = 5);
# - y ranks (1, 2, 4, 3): rho = 1 - 6 sum d^2 / (n (n^2 - 1)) = 0.8, and sum d^2 <= 2 holds for the
#   identity and the 3 adjacent swaps: P(rho* >= 0.8) = 4/24, so p = 1/3;
# - y = (2, 1, 4, 30): sum x_i y_pi(i) = 136 is reached or beaten only by 137 (y order 1, 2, 4, 30)
#   and itself, so Pearson's p = 2 * 2/24 = 1/6, while its ranks (2, 1, 3, 4) give rho = 0.8, p = 1/3.
@pytest.mark.parametrize("x, y, expected", [
    ([1, 2, 3, 4], [10, 20, 30, 40], 1 / 12),
    ([1, 2, 3, 4, 5], [5, 4, 3, 2, 1], 1 / 60),
    ([1, 2, 3, 4], [1, 2, 4, 3], 1 / 3),
    ([1, 2, 3, 4], [2, 1, 4, 30], 1 / 6),
])
def test_exact_permutation_p_matches_hand_counts(x, y, expected):
    # counts over n! pairings: p is a ratio of small integers, computed to float64 rounding
    assert exact_permutation_p(x, y) == pytest.approx(expected, rel=1e-15)


def test_exact_permutation_p_of_ranks_is_spearmans_and_differs_from_pearsons():
    x, y = [1, 2, 3, 4], [2, 1, 4, 30]
    assert exact_permutation_p(stats.rankdata(x), stats.rankdata(y)) == pytest.approx(1 / 3, rel=1e-15)
    assert exact_permutation_p(x, y) == pytest.approx(1 / 6, rel=1e-15)


@pytest.mark.parametrize("n, seed", [(4, 0), (6, 1), (7, 2), (8, 3)])
def test_exact_permutation_p_agrees_with_scipy_permutation_test(n, seed):
    # Reference: scipy.stats.permutation_test, permutation_type="pairings", which enumerates all
    # n! pairings when n_resamples >= n!; both are counts / n!, equal to float64 rounding.
    rng = np.random.default_rng(seed)
    x, y = rng.uniform(size=n), rng.uniform(size=n)
    reference = stats.permutation_test(
        (y,), lambda yy, axis: stats.pearsonr(x, yy, axis=axis).statistic, permutation_type="pairings",
        n_resamples=math.factorial(n), vectorized=True, alternative="two-sided").pvalue
    assert exact_permutation_p(x, y) == pytest.approx(reference, abs=1e-12)


def test_exact_permutation_p_counts_every_pairing():
    # brute force over itertools.permutations with the textbook sample correlation (numpy.corrcoef)
    x, y = np.array([0.3, 0.1, 0.7, 0.4, 0.9]), np.array([0.2, 0.5, 0.6, 0.1, 0.8])
    observed = np.corrcoef(x, y)[0, 1]
    null = np.array([np.corrcoef(x, y[list(order)])[0, 1] for order in itertools.permutations(range(5))])
    # tolerance for ties: corrcoef and the enumeration round differently, within 1e-12 on r in [-1, 1]
    expected = 2 * min(np.mean(null <= observed + 1e-12), np.mean(null >= observed - 1e-12))
    assert exact_permutation_p(x, y) == pytest.approx(min(1.0, expected), rel=1e-15)


def test_three_runs_give_coefficients_but_no_p_value():
    # n = 3 perfect order: the exact p would be 1/3 and scipy's asymptotic one about 0; neither is shown
    found = family_correlations(_points([0.7, 0.8, 0.9], [0.9, 0.5, 0.1], [0, 0, 0]))
    deterministic = found[0]
    assert deterministic.n == 3 and deterministic.p_method == "n too small"
    assert deterministic.spearman_rho == pytest.approx(-1.0, abs=1e-15)  # ranks reversed exactly
    assert deterministic.pearson_r == pytest.approx(stats.pearsonr([0.7, 0.8, 0.9], [0.9, 0.5, 0.1]).statistic,
                                                    rel=1e-12)
    assert math.isnan(deterministic.pearson_p) and math.isnan(deterministic.spearman_p)
    assert found[1].n == 0 and found[1].p_method == "n too small" and math.isnan(found[1].pearson_r)


def test_four_to_eight_runs_get_exact_p_and_more_get_scipys_t_approximation():
    rng = np.random.default_rng(4)
    x, y = rng.uniform(size=12), rng.uniform(size=12)
    family = np.array([0] * 4 + [1] * 8)
    small, eight = family_correlations(_points(x, y, family))
    assert (small.n, small.p_method, eight.n, eight.p_method) == (4, "exact permutation", 8, "exact permutation")
    assert small.spearman_p == pytest.approx(exact_permutation_p(stats.rankdata(x[:4]), stats.rankdata(y[:4])),
                                             rel=1e-15)
    many = family_correlations(_points(x, y, np.ones(12)))[1]
    assert many.p_method == "t approximation"
    # reference: scipy.stats.pearsonr / spearmanr p-values
    assert many.pearson_p == pytest.approx(stats.pearsonr(x, y).pvalue, rel=1e-12)
    assert many.spearman_p == pytest.approx(stats.spearmanr(x, y).pvalue, rel=1e-12)


def test_a_constant_variable_gives_no_correlation():
    found = family_correlations(_points([0.8] * 5, [0.1, 0.2, 0.3, 0.4, 0.5], [1] * 5))[1]
    assert found.p_method == "constant values" and math.isnan(found.spearman_rho)
