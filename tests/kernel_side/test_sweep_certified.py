"""Sweeps record certified accuracy per budget, beside the attacks' success rates.

A point whose posterior predictive is certified over the ball keeps its label under every
perturbation in it, so no attack flips it (the definition of a certificate; Gowal et al. 2018,
Zhang et al. 2018): the certified-correct points are a subset of the correct points the
attack did not flip, and the certified accuracy never exceeds the empirical robust accuracy
of the same points. The stored numbers must also equal jostle.certify called directly.
"""
from __future__ import annotations

import pytest

import jostle
from jostle.cli.commands import main
from jostle.common.threads import torch_threads
from jostle.sweeps.one_run import fit_run
from jostle.sweeps.results_db import RunStore
from jostle.sweeps.spec import SweepConfigError, check_evaluation, run_key

BUDGETS = [0.02, 0.1, 0.3]
POINTS = 40
CERTIFIED = dict(
    datasets=[{"name": "moons", "n_test": POINTS, "noise": 0.2}],
    methods=[{"name": "map", "epochs": 30, "batch_size": 20},
             {"name": "deep_ensemble", "members": 3, "epochs": 30, "batch_size": 20}],
    architectures=[{"depth": 1, "width": 16, "activation": "relu"}],
    train_sizes=[80],
    seeds=[0],
    evaluation={"budgets": BUDGETS, "points": POINTS,
                "attacks": [{"method": "pgd", "steps": 20}, {"method": "square", "steps": 60}]},
    name="certified",
)


@pytest.fixture(scope="module")
def swept(tmp_path_factory):
    path = tmp_path_factory.mktemp("certified") / "runs.sqlite"
    sweep = jostle.Sweep(**CERTIFIED)
    summary = sweep.run(store=path, progress_bar=False)
    assert summary.finished == 2 and summary.failed == 0
    return sweep, path


def test_certified_accuracy_is_stored_per_run_and_budget(swept):
    sweep, path = swept
    certified = sweep.certified(store=path)
    assert len(certified) == 2 * len(BUDGETS)
    assert set(certified["certificate"]) == {"crown"} and set(certified["norm"]) == {"inf"}
    assert set(certified["method"]) == {"map", "deep_ensemble"}
    assert ((certified["certified_accuracy"] >= 0) & (certified["certified_accuracy"] <= 1)).all()
    assert (certified["certified_accuracy"] > 0).any(), "small budgets should certify some points"
    with RunStore(path, readonly=True) as store:
        assert store.certified(sweep.keys()).equals(certified)
        wide = store.results(sweep.keys(), wide=True).set_index("key")
    for _, row in certified.iterrows():
        # the wide column holds the same stored float (a copy)
        assert wide.loc[row["key"], f"certified_accuracy[crown-inf@{row['budget']:g}]"] == row["certified_accuracy"]


def test_certified_accuracy_never_exceeds_the_attacks_robust_accuracy(swept):
    sweep, path = swept
    certified = sweep.certified(store=path)
    attacks = sweep.results(store=path)  # n_test == points: accuracy is over the same points
    for _, row in certified.iterrows():
        same = attacks[(attacks["key"] == row["key"]) & (attacks["budget"] == row["budget"])]
        assert len(same) == 2
        for _, attack in same.iterrows():
            # certified-correct points are correct and unflipped: a subset of the points the attack
            # left alone, so their share is at most 1 - success rate and at most the clean accuracy
            # (shares of 40 points; 1e-12 covers the float64 of k/40)
            assert row["certified_accuracy"] <= 1 - attack["success_rate"] + 1e-12, (row["key"], row["budget"])
            assert row["certified_accuracy"] <= attack["accuracy"] + 1e-12


def test_stored_certified_accuracy_equals_a_direct_certify_and_contains_no_flipped_point(swept):
    sweep, path = swept
    certified = sweep.certified(store=path).set_index(["key", "budget"])
    for config in sweep.runs():
        with torch_threads(1):  # the run's own thread count: the same kernels, bit-equal results
            ens, data = fit_run(config)
            x, y = data.x_test[:POINTS], data.y_test[:POINTS]
            for budget in BUDGETS:
                cert = jostle.certify(ens, x, eps=budget, norm="inf", method="crown")
                good = cert.predictive & (cert.label == y)
                row = certified.loc[(run_key(config), budget)]
                assert row["certified_accuracy"] == float(good.double().mean())
                assert row["members_certified"] == float(cert.share.double().mean())
                for method, steps in (("pgd", 20), ("square", 60)):
                    adv = jostle.attack(ens, x, method=method, eps=budget, steps=steps, seed=config["seed"])
                    assert not bool((good & adv.success).any()), (method, budget)


def test_certify_settings_are_read_and_checked():
    # The default (CROWN, L-inf) stays out of the run's configuration, so run keys from before
    # certified accuracy hold; the run certifies with it all the same.
    assert "certify" not in check_evaluation({}, "e")
    assert "certify" not in check_evaluation({"certify": {"method": "crown"}}, "e")
    assert check_evaluation({"certify": {"method": "ibp", "norm": 2}}, "e")["certify"] == {"method": "ibp", "norm": "2"}
    assert check_evaluation({"certify": False}, "e")["certify"] is False
    assert check_evaluation({"certify": "off"}, "e")["certify"] is False
    with pytest.raises(SweepConfigError, match=r"e.certify.method: must be one of 'crown', 'ibp'; got 'exact'"):
        check_evaluation({"certify": {"method": "exact"}}, "e")
    with pytest.raises(SweepConfigError, match=r"e.certify.norm: must be one of 'inf', '2'; got '1'"):
        check_evaluation({"certify": {"norm": "1"}}, "e")
    with pytest.raises(SweepConfigError, match=r"e.certify: unknown key 'eps'"):
        check_evaluation({"certify": {"eps": 0.1}}, "e")
    with pytest.raises(SweepConfigError, match=r"e.certify: must be a table of keys; got 3"):
        check_evaluation({"certify": 3}, "e")


def test_certify_off_and_unsupported_templates_record_no_certified_rows(tmp_path):
    off = jostle.Sweep(**dict(CERTIFIED, methods=CERTIFIED["methods"][:1],
                              evaluation=dict(CERTIFIED["evaluation"], certify=False)))
    off.run(store=tmp_path / "off.sqlite", progress_bar=False)
    assert off.certified(store=tmp_path / "off.sqlite").empty
    assert not any(c.startswith("certified_accuracy") for c in off.results(store=tmp_path / "off.sqlite", wide=True))
    gelu = jostle.Sweep(**dict(CERTIFIED, methods=CERTIFIED["methods"][:1],
                               architectures=[{"depth": 1, "width": 8, "activation": "gelu"}]))
    summary = gelu.run(store=tmp_path / "gelu.sqlite", progress_bar=False)
    assert summary.finished == 1  # the attacks still count; the certificate is skipped with a warning
    assert gelu.certified(store=tmp_path / "gelu.sqlite").empty
    with RunStore(tmp_path / "gelu.sqlite", readonly=True) as store:
        (run,) = store.runs()
    assert any("certified accuracy not computed" in w and "GELU" in w for w in run["warnings"])


def test_sweep_show_prints_certified_accuracy(swept, capsys):
    _, path = swept
    assert main(["sweep", "show", str(path)]) == 0
    out = capsys.readouterr().out
    assert "certified: certified accuracy (predictive provably unflipped and correct)" in out
    assert "crown-inf" in out and "eps=0.02" in out
