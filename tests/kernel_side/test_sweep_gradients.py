"""The sweep's expected-gradient read-out: against jostle.expected_gradient computed directly,
zero on a posterior symmetric under a reflection of the input, reproducible, stored and shown."""
from __future__ import annotations

import sqlite3

import numpy as np
import pytest
import torch
from torch import nn

import jostle
from jostle.sweeps.one_run import GRADIENT_STATISTICS, gradient_readout
from jostle.sweeps.results_db import OldStoreWarning, RunStore, StoreError
from jostle.sweeps.spec import SweepConfigError, check_evaluation, gradient_sample_counts

EPS32 = float(torch.finfo(torch.float32).eps)


def _modules(members: int, seed: int, in_features: int = 3, hidden: int = 6, classes: int = 3):
    torch.manual_seed(seed)
    return [nn.Sequential(nn.Linear(in_features, hidden), nn.Tanh(), nn.Linear(hidden, classes))
            for _ in range(members)]


def _mlp_ensemble(members: int, seed: int, in_features: int = 3):
    return jostle.Ensemble.from_modules(_modules(members, seed, in_features))


def _autograd_input_gradient(module, x, y):
    x = x.clone().requires_grad_(True)
    loss = nn.functional.cross_entropy(module(x), y, reduction="sum")  # per point: d(sum)/dx_n = dL_n/dx_n
    (grad,) = torch.autograd.grad(loss, x)
    return grad


MODULES = _modules(10, seed=3)


@pytest.mark.parametrize("labels", ["given", "predicted"])
def test_readout_equals_expected_gradient_computed_directly(labels):
    ens = jostle.Ensemble.from_modules(MODULES)
    generator = torch.Generator().manual_seed(1)
    x = torch.randn(25, 3, generator=generator)
    y = torch.randint(0, 3, (25,), generator=generator) if labels == "given" else None
    counts = [1, 4, 7, 10]
    rows = gradient_readout(ens, x, y, counts, seed=11)
    # the read-out's member order is Ensemble.subset's: randperm under a generator seeded by seed
    order = torch.randperm(10, generator=torch.Generator().manual_seed(11))
    label = ens.predict(x).label if y is None else y
    # each member's gradient by torch.autograd on its own module (the outside reference)
    singles = torch.stack([_autograd_input_gradient(m, x, label) for m in MODULES]).double()
    for count in counts:
        chosen = order[:count].tolist()
        direct = jostle.expected_gradient(ens, x, label, samples=chosen).double()
        l2, linf = direct.norm(dim=1).numpy(), direct.abs().amax(dim=1).numpy()
        expected = {"l2_mean": l2.mean(), "l2_median": np.median(l2), "l2_p90": np.percentile(l2, 90),
                    "linf_mean": linf.mean(), "linf_median": np.median(linf), "linf_p90": np.percentile(linf, 90),
                    "abs_mean": direct.abs().mean().item()}
        member = singles[chosen]
        m_l2, m_linf = member.norm(dim=2).flatten().numpy(), member.abs().amax(dim=2).flatten().numpy()
        member_expected = {"l2_mean": m_l2.mean(), "l2_median": np.median(m_l2), "l2_p90": np.percentile(m_l2, 90),
                           "linf_mean": m_linf.mean(), "linf_median": np.median(m_linf),
                           "linf_p90": np.percentile(m_linf, 90), "abs_mean": member.abs().mean().item()}
        got = {r["which"]: r for r in rows if r["samples"] == count}
        for stat in GRADIENT_STATISTICS:
            # float32 gradients averaged over <= 10 members in a different order (float32 engine
            # mean against a float64 prefix sum): a few float32 ulps, 1e-5 relative is ample
            assert got["expected"][stat] == pytest.approx(expected[stat], rel=1e-5, abs=1e-9), (count, stat)
            assert got["member"][stat] == pytest.approx(member_expected[stat], rel=1e-5, abs=1e-9), (count, stat)
    # the average is smaller than its parts (triangle inequality, exact for the mean of norms)
    full = {r["which"]: r for r in rows if r["samples"] == 10}
    assert full["expected"]["l2_mean"] <= full["member"]["l2_mean"] * (1 + 1e-6)


def _reflected_pairs(members: int, anchor: torch.Tensor, seed: int):
    """Member pairs w, w' with first-layer input weights -W1 and bias b1 + 2 W1 anchor, so
    f_w'(x) = f_w(2 anchor - x): the posterior is symmetric under the reflection through the
    anchor, its expected loss is too, and so its gradient vanishes at the anchor
    (a symmetric function's gradient is odd about its centre; derived here)."""
    ens = _mlp_ensemble(members, seed, in_features=anchor.numel())
    params = {k: v.clone() for k, v in ens.params.items()}
    weight = next(k for k in params if k.endswith("0.weight"))
    bias = next(k for k in params if k.endswith("0.bias"))
    params[weight] = torch.cat([params[weight], -params[weight]])
    params[bias] = torch.cat([params[bias], params[bias] + 2 * params[weight][:members] @ anchor])
    for k in params:
        if k not in (weight, bias):
            params[k] = torch.cat([params[k], params[k]])
    return jostle.Ensemble(ens.template, params, dict(ens.meta))


@pytest.mark.parametrize(("seed", "centred"), [(0, True), (1, False), (2, False)])
def test_symmetric_posterior_reads_zero(seed, centred):
    # centred: the anchor is the origin, so the pair differs only in the sign of W1 (b1 unchanged)
    anchor = torch.zeros(3) if centred else torch.randn(3, generator=torch.Generator().manual_seed(100 + seed))
    ens = _reflected_pairs(members=8, anchor=anchor, seed=seed)
    rows = gradient_readout(ens, anchor[None], torch.tensor([seed % 3]), [1, 16], seed=seed)
    got = {(r["samples"], r["which"]): r for r in rows}
    single = got[(16, "member")]["l2_mean"]
    assert single > 1e-3  # the members' own gradients are far from zero, so zero below means cancelling
    # the pair's first-layer pre-activations agree up to float32 rounding of b1 + 2 W1 a - W1 a,
    # a few ulps of the terms' size; tanh and the head are 1-Lipschitz-ish, so the residual is
    # within a few dozen eps32 of the member gradient's size: 64 eps32 relative
    for stat in GRADIENT_STATISTICS:
        assert got[(16, "expected")][stat] <= 64 * EPS32 * max(1.0, single), stat
    assert got[(1, "expected")]["l2_mean"] == pytest.approx(got[(1, "member")]["l2_mean"], rel=0, abs=0)


def test_readout_reproduces_with_its_seed_and_changes_with_another():
    ens = _mlp_ensemble(members=12, seed=5)
    x = torch.randn(9, 3, generator=torch.Generator().manual_seed(2))
    first = gradient_readout(ens, x, None, [1, 4, 12], seed=7)
    assert first == gradient_readout(ens, x, None, [1, 4, 12], seed=7)  # same kernel, same input, same seed
    other = gradient_readout(ens, x, None, [1, 4, 12], seed=9)  # seed 9 starts with member 10, seed 7 with 3
    assert other[0]["l2_mean"] != first[0]["l2_mean"]
    for mine, theirs in zip(other[-2:], first[-2:]):  # all 12 members: the same set in another order
        # a float64 sum of 12 float32 gradients in another order: within 1e-12 relative
        assert mine["l2_mean"] == pytest.approx(theirs["l2_mean"], rel=1e-12)


def test_sample_counts_are_clipped_and_deduplicated():
    assert gradient_sample_counts({}, 100) == [1, 4, 16, 64, 100]
    assert gradient_sample_counts({}, 8) == [1, 4, 8]
    assert gradient_sample_counts({}, 1) == [1]
    assert gradient_sample_counts({"gradient_samples": [32, "all", 2]}, 20) == [2, 20]
    with pytest.raises(ValueError, match=r"sample_counts must lie in \[1, 5\]; got \[0, 2\]"):
        gradient_readout(_mlp_ensemble(5, 0), torch.zeros(1, 3), None, [0, 2])


@pytest.mark.parametrize(("value", "message"), [
    ([0, 4], r"sweep\.evaluation\.gradient_samples\[0\]: must be an integer >= 1 or 'all'; got 0"),
    (["most"], r"gradient_samples\[0\]: must be an integer >= 1 or 'all'; got 'most'"),
    ([1.5], r"gradient_samples\[0\]: must be an integer >= 1 or 'all'; got 1\.5"),
    ([True], r"gradient_samples\[0\]: must be an integer >= 1 or 'all'; got True"),
    ([4, 4], r"gradient_samples\[1\]: 4 repeats an earlier entry"),
    ("all", r"gradient_samples: must be a list; got 'all'"),
    ([], r"gradient_samples: must not be empty"),
])
def test_bad_gradient_samples_are_refused(value, message):
    with pytest.raises(SweepConfigError, match=message):
        check_evaluation({"gradient_samples": value}, "sweep.evaluation")


def test_default_gradient_samples_keep_run_keys():
    plain = jostle.Sweep(datasets=[{"name": "moons"}], methods=["map"])
    default = jostle.Sweep(datasets=[{"name": "moons"}], methods=["map"],
                           evaluation={"gradient_samples": [1, 4, 16, 64, "all"]})
    other = jostle.Sweep(datasets=[{"name": "moons"}], methods=["map"], evaluation={"gradient_samples": [2]})
    assert plain.keys() == default.keys() != other.keys()
    assert other.runs()[0]["evaluation"]["gradient_samples"] == [2]


SMALL = jostle.Sweep(datasets=[{"name": "leak_alarm", "n_test": 30}],
                     methods=[{"name": "map", "epochs": 5}, {"name": "deep_ensemble", "members": 3, "epochs": 5}],
                     architectures=[{"depth": 1, "width": 4}], train_sizes=[30],
                     evaluation={"budgets": [0.1], "points": 12, "attacks": [{"method": "fgsm"}],
                                 "gradient_samples": [1, 2, "all"]})


@pytest.fixture(scope="module")
def small_store(tmp_path_factory):
    path = tmp_path_factory.mktemp("grad") / "runs.sqlite"
    SMALL.run(path, progress_bar=False)
    return path


def test_store_keeps_the_readout_long_and_wide(small_store):
    frame = SMALL.gradients(small_store)
    assert set(frame["method"]) == {"map", "deep_ensemble"}
    ensemble = frame[frame["method"] == "deep_ensemble"]
    assert sorted(set(ensemble["samples"])) == [1, 2, 3] and set(ensemble["which"]) == {"expected", "member"}
    assert sorted(set(frame.loc[frame["method"] == "map", "samples"])) == [1]
    assert {"dataset", "n_train", "width", "seed", "members", *GRADIENT_STATISTICS} <= set(frame.columns)
    wide = SMALL.results(small_store, wide=True).set_index("method")
    row = ensemble[(ensemble["samples"] == 3) & (ensemble["which"] == "expected")].iloc[0]
    assert wide.loc["deep_ensemble", "grad_l2_median[expected@3]"] == row["l2_median"]  # a copy
    assert wide.loc["deep_ensemble", "grad_l2_median[expected@all]"] == row["l2_median"]
    assert np.isnan(wide.loc["map", "grad_l2_median[expected@2]"])
    assert wide.loc["map", "grad_abs_mean[member@all]"] == wide.loc["map", "grad_abs_mean[expected@1]"]


def test_readout_in_the_store_matches_a_refit(small_store):
    """A run's numbers reproduce: refit the deep ensemble (seeded) and read out again."""
    from jostle.sweeps.one_run import evaluate, fit_run

    config = next(c for c in SMALL.runs() if c["method"]["name"] == "deep_ensemble")
    with jostle.common.threads.torch_threads(1):  # as each sweep run does: fit and score on one thread
        ens, data = fit_run(config)
        again = evaluate(ens, data, config["evaluation"], seed=config["seed"])["gradients"]
    frame = SMALL.gradients(small_store)
    stored = frame[frame["key"] == jostle.sweeps.spec.run_key(config)]
    for row in again:
        match = stored[(stored["samples"] == row["samples"]) & (stored["which"] == row["which"])].iloc[0]
        for stat in GRADIENT_STATISTICS:  # same seed, same kernel, one thread: the same bits
            assert match[stat] == row[stat]


def _make_version_one(path):
    db = sqlite3.connect(path)
    db.execute("DROP TABLE gradient_results")
    db.execute("UPDATE store_info SET value = '1' WHERE name = 'schema_version'")
    db.commit()
    db.close()


def test_version_one_store_reads_with_a_clear_message(small_store, tmp_path):
    old = tmp_path / "old.sqlite"
    sqlite3.connect(small_store).backup(target := sqlite3.connect(old))
    target.close()
    _make_version_one(old)
    with pytest.warns(OldStoreWarning, match=r"old\.sqlite is a version-1 jostle run store.*no gradient read-out"):
        store = RunStore(old, readonly=True)
    with store:
        assert store.schema_version == 1
        assert len(store.results()) == 2 and store.gradients().empty
        assert not any(c.startswith("grad_") for c in store.results(wide=True).columns)
    with pytest.warns(OldStoreWarning):  # opened to write: gains the empty table and becomes version 2
        RunStore(old).close()
    with RunStore(old, readonly=True) as store:
        assert store.schema_version == 2 and store.gradients().empty


def test_newer_store_is_refused(tmp_path):
    path = tmp_path / "new.sqlite"
    RunStore(path).close()
    db = sqlite3.connect(path)
    db.execute("UPDATE store_info SET value = '3' WHERE name = 'schema_version'")
    db.commit()
    db.close()
    message = r"new\.sqlite has store schema 3, written by a newer jostle; this jostle reads schemas 1 to 2"
    for readonly in (True, False):
        with pytest.raises(StoreError, match=message):
            RunStore(path, readonly=readonly)


def test_sweep_show_prints_the_readout_and_the_old_store_note(small_store, tmp_path, capsys):
    from jostle.cli.commands import main

    assert main(["sweep", "show", str(small_store)]) == 0
    out = capsys.readouterr().out
    assert "median L2 norm over points: expected over S members / single member" in out
    assert "S=1" in out and "S=3" in out and "note:" not in out
    old = tmp_path / "old.sqlite"
    sqlite3.connect(small_store).backup(target := sqlite3.connect(old))
    target.close()
    _make_version_one(old)
    assert main(["sweep", "show", str(old)]) == 0
    out = capsys.readouterr().out
    assert "note: " in out and "version-1 jostle run store" in out and "median L2 norm" not in out
