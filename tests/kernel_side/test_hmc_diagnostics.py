"""R-hat / ESS through arviz (Vehtari et al. 2021) and the plain-text posterior summary."""
from __future__ import annotations

import numpy as np
import pytest
import torch

import jostle
from jostle.fitting.hmc.diagnostics import chain_diagnostics
from jostle.fitting.hmc.fit import _thin_interleaved
from jostle.fitting.hmc.network_density import convergence_checks, failed_checks, point_rhat_summary


def test_iid_draws_give_rhat_near_one_and_ess_near_the_draw_count():
    # Vehtari et al. 2021: for independent draws R-hat -> 1 and ESS -> the number of draws.
    draws = np.random.default_rng(0).normal(size=(4, 1000, 3))
    found = chain_diagnostics(draws)
    assert found["rhat"].shape == (3,)
    assert bool((found["rhat"] < 1.01).all())
    assert bool((np.abs(found["ess_bulk"] / 4000 - 1) < 0.15).all())
    assert bool((np.abs(found["ess_tail"] / 4000 - 1) < 0.25).all())


def test_chains_at_different_means_are_flagged():
    # Vehtari et al. 2021 sec. 4: chains that have not mixed give R-hat clearly above 1.01.
    draws = np.random.default_rng(1).normal(size=(4, 500))
    draws[0] += 1.0
    found = chain_diagnostics(draws)
    assert float(found["rhat"]) > 1.05
    assert np.ndim(found["rhat"]) == 0


def test_rhat_and_ess_are_arvizs_own_numbers_wiring_only():
    # Wiring, not an independent check: jostle hands the draws to arviz unchanged. The
    # statistical checks are the iid and shifted-chain cases above (Vehtari et al. 2021,
    # Bayesian Analysis 16:667, rank-normalised split R-hat and bulk ESS).
    from jostle.fitting.hmc.diagnostics import _arviz

    draws = np.cumsum(np.random.default_rng(2).normal(size=(4, 300)), axis=1)  # strongly autocorrelated
    found = chain_diagnostics(draws)
    az = _arviz()
    assert float(found["rhat"]) == pytest.approx(float(az.rhat(draws)), rel=1e-12)
    assert float(found["ess_bulk"]) == pytest.approx(float(az.ess(draws, method="bulk")), rel=1e-12)
    assert float(found["ess_bulk"]) < 100


@pytest.mark.parametrize("values, message", [
    (np.zeros(5), r"values must have shape \(C, T\) or \(C, T, K\); got shape \(5,\)"),
    (np.zeros((4, 3)), "values must hold at least 4 draws per chain; got 3"),
])
def test_chain_diagnostics_rejects_bad_shapes(values, message):
    with pytest.raises(ValueError, match=message):
        chain_diagnostics(values)


def test_thinning_spreads_draws_and_interleaves_chains_in_member_order():
    chains, draws = 3, 10
    # Encode chain and draw in the value: 100 * chain + draw.
    samples = (100 * torch.arange(chains)[:, None] + torch.arange(draws)[None, :]).double()[..., None]
    kept = _thin_interleaved(samples, 7).flatten().long().tolist()
    assert [k // 100 for k in kept] == [0, 1, 2, 0, 1, 2, 0]
    assert [k % 100 for k in kept if k // 100 == 0] == [0, 4, 9]
    assert [k % 100 for k in kept if k // 100 == 1] == [0, 9]


def test_describe_reports_what_the_meta_holds_for_any_method():
    nets = [jostle.mlp(2, 2, hidden=(3,)) for _ in range(2)]
    ens = jostle.Ensemble.from_modules(nets, meta={"method": "deep_ensemble", "seconds": 1.25,
                                                   "diagnostics": {"final_loss": 0.123456}})
    text = jostle.describe(ens)
    assert text.startswith("deep_ensemble posterior: 2 members")
    assert "time taken: 1.2 s" in text or "time taken: 1.3 s" in text
    assert "final_loss: 0.1235" in text
    assert jostle.describe(jostle.Ensemble.from_modules(nets)).startswith("unspecified posterior")


def _record(rhat):
    # a function-space record whose train log-likelihood and ESS pass, with the given test-point R-hats
    tp = point_rhat_summary(np.asarray(rhat), np.full(len(rhat), 2000.0))
    return {"train_log_likelihood": {"rhat": 1.001, "ess_bulk": 2000.0}, "test_probs": tp}


def test_test_point_rhat_check_uses_the_95th_percentile_not_the_median():
    # 60 points at 1.00 and 40 at 1.05: the median (1.00) passes the 1.01 limit (common practice,
    # Vehtari et al. 2021 sec. 4) but 40% of points exceed it. numpy's default (linear, Hyndman &
    # Fan 1996 type 7) 95th percentile of 100 sorted values sits at position 0.95 * 99 = 94.05,
    # among the 1.05s, so the check fails and says so.
    record = _record([1.0] * 60 + [1.05] * 40)
    tp = record["test_probs"]
    assert tp["rhat_median"] == 1.0
    assert tp["rhat_q95"] == pytest.approx(1.05, abs=1e-15)  # interpolates between two equal values
    assert tp["share_rhat_over_1.01"] == pytest.approx(0.4, abs=1e-15)  # 40 / 100 in float64
    failed = failed_checks(record, chains=4)
    assert failed == ["95th percentile of test-probability R-hat 1.050 > 1.01 (40% of test points above)"]


def test_test_point_rhat_check_passes_when_only_a_few_points_exceed_the_limit():
    # 96 at 1.00 and 4 at 1.50: position 94.05 falls between two 1.00s, so the 95th percentile is
    # 1.00 and passes, while the maximum (also recorded) shows the outliers.
    record = _record([1.0] * 96 + [1.5] * 4)
    assert record["test_probs"]["rhat_q95"] == 1.0 and record["test_probs"]["rhat_max"] == 1.5
    assert failed_checks(record, chains=4) == []
    assert failed_checks(_record([float("nan")] * 3), chains=4)[0].startswith("95th percentile")


def test_describe_names_the_checks_that_passed():
    nets = [jostle.mlp(2, 2, hidden=(3,)) for _ in range(2)]
    checks = convergence_checks(4) + ["no divergent transitions after warm-up"]
    meta = {"method": "hmc", "diagnostics": {"problems": [], "checks": checks, "step_size": [0.1, 0.1]}}
    text = jostle.describe(jostle.Ensemble.from_modules(nets, meta=meta))
    assert "checks passed: train log-likelihood R-hat <= 1.01" in text
    assert "95th percentile of test-probability R-hat <= 1.01" in text
    assert "median test-probability bulk ESS >= 400 (100 per chain)" in text
    assert "step size (shared by the chains): 0.1" in text
    old = {"method": "hmc", "diagnostics": {"problems": []}}
    text = jostle.describe(jostle.Ensemble.from_modules(nets, meta=old))
    assert "checks passed" not in text and "no failed checks recorded" in text
