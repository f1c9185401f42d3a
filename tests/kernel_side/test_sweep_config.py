"""Sweep definitions: grid expansion, stable keys, TOML parity, and refusal messages."""
from __future__ import annotations

import hashlib
import json

import pytest

import jostle
from jostle.sweeps.spec import SweepConfigError, canonical_json, check_run, run_key

SMALL = dict(
    datasets=[{"name": "moons", "n_test": 50}],
    methods=["map", {"name": "deep_ensemble", "members": 2}],
    architectures=[{"depth": 1, "width": 4}],
    train_sizes=[40, 80],
    seeds=[0, 1],
    evaluation={"budgets": [0.1, 0.2], "points": 10},
)

TOML = """
[sweep]
name = "small"
seeds = [0, 1]
train_sizes = [40, 80]

[[sweep.datasets]]
name = "moons"
n_test = 50

[[sweep.architectures]]
depth = 1
width = 4

[[sweep.methods]]
name = "map"

[[sweep.methods]]
name = "deep_ensemble"
members = 2

[sweep.evaluation]
budgets = [0.1, 0.2]
points = 10
"""


def test_grid_is_the_cartesian_product():
    # 1 data set x 2 sizes x 1 architecture x 2 methods x 2 seeds (itertools.product, common practice)
    sweep = jostle.Sweep(**SMALL)
    runs = sweep.runs()
    assert len(runs) == 8 == len(set(sweep.keys()))
    assert {(r["data"]["n_train"], r["method"]["name"], r["seed"]) for r in runs} == {
        (n, m, s) for n in (40, 80) for m in ("map", "deep_ensemble") for s in (0, 1)
    }


def test_run_key_is_sha256_of_canonical_json():
    # hashlib.sha256 over json.dumps(sort_keys=True, compact separators) as the reference
    config = jostle.Sweep(**SMALL).runs()[3]
    text = json.dumps(config, sort_keys=True, separators=(",", ":"))
    assert run_key(config) == hashlib.sha256(text.encode()).hexdigest()
    reordered = json.loads(json.dumps(dict(reversed(list(config.items())))))
    assert run_key(reordered) == run_key(config)
    assert canonical_json(reordered) == canonical_json(config)


def test_defaults_are_filled_so_equal_runs_share_a_key():
    explicit = dict(SMALL, datasets=[{"name": "moons", "n_test": 50, "noise": 0.2, "seed": 0}])
    assert jostle.Sweep(**explicit).keys() == jostle.Sweep(**SMALL).keys()


def test_duplicate_grid_entries_give_one_run():
    sweep = jostle.Sweep(**dict(SMALL, seeds=[0, 0, 1]))
    assert len(sweep.runs()) == 8


def test_toml_gives_the_same_runs_as_python(tmp_path):
    path = tmp_path / "sweep.toml"
    path.write_text(TOML)
    from_file = jostle.Sweep.from_toml(path)
    assert from_file.name == "small"
    assert from_file.keys() == jostle.Sweep(**SMALL, name="small").keys()


def test_hyperparameter_grid_expands():
    grid = {"members": [2, 3], "epochs": [1, 2]}
    sweep = jostle.Sweep(**dict(SMALL, methods=[{"name": "deep_ensemble", "grid": grid}]))
    settings = {(r["method"]["members"], r["method"]["epochs"]) for r in sweep.runs()}
    assert settings == {(2, 1), (2, 2), (3, 1), (3, 2)}


def test_default_attacks_are_fgsm_and_pgd():
    evaluation = jostle.Sweep(datasets=[{"name": "moons"}], methods=["map"]).runs()[0]["evaluation"]
    assert [a["method"] for a in evaluation["attacks"]] == ["fgsm", "pgd"]
    assert evaluation["attacks"][0]["steps"] == 1


@pytest.mark.parametrize("change, message", [
    ({"methods": ["map", "vi", "mcmc"]}, r"^sweep\.methods\[2\]: unknown method 'mcmc'"),
    ({"methods": [{"method": "map", "epochs": 5}]},
     r"^sweep\.methods\[0\]: a method table needs the key 'name' \(one of 'map', .*\); "
     r"got the keys 'method', 'epochs'$"),
    ({"seeds": [0, -1]}, r"^sweep\.seeds\[1\]: must be an integer >= 0; got -1"),
    ({"train_sizes": [1]}, r"^sweep\.train_sizes\[0\]: must be an integer >= 2; got 1"),
    ({"datasets": [{"name": "moons", "noise": -1.0}]},
     r"^sweep\.datasets\[0\]: noise must be a finite float >= 0; got -1"),
    ({"datasets": [{"name": "moon"}]}, r"^sweep\.datasets\[0\]\.name: unknown data set 'moon'"),
    ({"datasets": [{"name": "moons", "colour": 1}]}, r"^sweep\.datasets\[0\]: unknown key 'colour'"),
    ({"datasets": [{"name": "moons", "n_train": 5}]}, r"^sweep\.datasets\[0\]\.n_train: set training sizes"),
    ({"architectures": [{"depth": 1, "widht": 3}]}, r"^sweep\.architectures\[0\]: unknown key 'widht'"),
    ({"architectures": [{"activation": "swish"}]},
     r"^sweep\.architectures\[0\]\.activation: unknown activation 'swish'"),
    ({"methods": [{"name": "map", "epoch": 3}]}, r"^sweep\.methods\[0\]\.epoch: unknown hyper-parameter of fit_map"),
    ({"methods": [{"name": "map", "seed": 3}]}, r"^sweep\.methods\[0\]\.seed: set by the sweep itself"),
    ({"methods": [{"name": "map", "lr": {"a": 1}}]}, r"^sweep\.methods\[0\]\.lr: must be a number, string"),
    ({"evaluation": {"budgets": [0.1, -0.2]}},
     r"^sweep\.evaluation\.budgets\[1\]: must be a finite number >= 0; got -0.2"),
    ({"evaluation": {"attacks": [{"method": "fgsm", "norm": "1"}]}},
     r"^sweep\.evaluation\.attacks\[0\]\.norm: norm must be one of \['inf', '2'\] for method 'fgsm'; got '1'"),
    ({"evaluation": {"attacks": ["pgd", "deepfool"]}},
     r"^sweep\.evaluation\.attacks\[1\]\.method: unknown attack 'deepfool'"),
    ({"evaluation": {"attacks": ["pgd", "pgd"]}}, r"^sweep\.evaluation\.attacks\[1\]: label 'pgd-inf' repeats"),
    ({"evaluation": {"point": 3}}, r"^sweep\.evaluation: unknown key 'point'"),
    ({"evaluation": {"target": "label"}}, r"^sweep\.evaluation\.target: must be one of 'predicted', 'true'"),
    ({"seeds": []}, r"^sweep\.seeds: must not be empty"),
    ({"seeds": 3}, r"^sweep\.seeds: must be a list; got 3"),
])
def test_bad_definitions_name_the_key(change, message):
    with pytest.raises(SweepConfigError, match=message):
        jostle.Sweep(**dict(SMALL, **change))


def test_digits_training_size_is_bounded():
    # load_digits has 1797 images; a 0.3 test split leaves 1257 for training (sklearn's ceil rule)
    with pytest.raises(SweepConfigError, match=r"sweep\.datasets\[0\]: training size must be <= 1257"):
        jostle.Sweep(datasets=[{"name": "digits"}], methods=["map"], train_sizes=[2000])


@pytest.mark.parametrize("text, message", [
    ("[sweep]\nname = 'x'\n[extra]\n", r"unknown key 'extra' at the top"),
    ("[other]\n", r"unknown key 'other' at the top"),
    ("", r"has no \[sweep\] table"),
    ("[sweep\n", r"is not valid TOML"),
    ("[sweep]\ndatasets = [{name = 'moons'}]\nmethods = ['map']\nbudget = 1\n", r"^sweep: unknown key 'budget'"),
    ("[sweep]\ndatasets = [{name = 'moons'}]\n", r"^sweep: missing key 'methods'"),
])
def test_bad_toml_files_are_refused(tmp_path, text, message):
    path = tmp_path / "bad.toml"
    path.write_text(text)
    with pytest.raises(SweepConfigError, match=message):
        jostle.Sweep.from_toml(path)


def test_missing_file_is_named(tmp_path):
    with pytest.raises(SweepConfigError, match=r"config file does not exist: .*nowhere\.toml"):
        jostle.Sweep.from_toml(tmp_path / "nowhere.toml")


def test_single_run_config():
    config = check_run({"data": {"name": "circles", "n_train": 30}, "method": {"name": "map", "epochs": 2}},
                       need_evaluation=False)
    assert config["data"] == {"name": "circles", "n_train": 30, "n_test": 300, "noise": 0.1, "factor": 0.5, "seed": 0}
    assert config["architecture"] == {"depth": 2, "width": 32, "activation": "tanh"}
    with pytest.raises(SweepConfigError, match=r"^run\.method: a single run takes one setting"):
        check_run({"data": {"name": "moons"}, "method": {"name": "map", "grid": {"epochs": [1, 2]}}})
    with pytest.raises(SweepConfigError, match=r"^run: unknown key 'seeds'"):
        check_run({"data": {"name": "moons"}, "method": "map", "seeds": [1]})


EXAMPLES = sorted((__import__("pathlib").Path(__file__).parents[2] / "examples").glob("*_sweep.toml"))


@pytest.mark.parametrize("path", EXAMPLES, ids=lambda p: p.name)
def test_example_sweeps_parse(path):
    sweep = jostle.Sweep.from_toml(path)
    assert len(sweep.runs()) >= 2


def test_example_fit_config_parses():
    from jostle.sweeps.spec import read_toml

    path = EXAMPLES[0].parent / "leak_alarm_fit.toml"
    assert check_run(read_toml(path), need_evaluation=False)["method"]["name"] == "map"
