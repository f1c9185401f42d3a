"""Sweeps over your own data files and networks: npz, IDX, meter cards, builders, module:function."""
from __future__ import annotations

import gzip
import hashlib
import logging
import shutil
import struct

import numpy as np
import pytest
import torch
from sklearn.datasets import load_digits
from sklearn.metrics import accuracy_score

import jostle
from jostle.sweeps.one_run import execute_run, load_run_data
from jostle.sweeps.results_db import RunStore
from jostle.sweeps.spec import SweepConfigError, canonical_json
from tests.kernel_side import sweep_models

MODELS = "tests.kernel_side.sweep_models"
QUICK = dict(methods=[{"name": "map", "epochs": 2, "batch_size": 20}],
             evaluation={"budgets": [0.1], "points": 10, "attacks": [{"method": "fgsm"}]})
METRICS = ["accuracy", "nll", "ece", "success_rate", "robustness"]


def digit_images(count: int, offset: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """scikit-learn's bundled 8x8 digits (UCI Optical Recognition of Handwritten Digits) as bytes 0..255."""
    bunch = load_digits()
    rows = slice(offset, offset + count)
    return np.round(bunch.images[rows] * (255 / 16)).astype(np.uint8), bunch.target[rows].astype(np.int64)


def write_npz(path, count: int = 150, offset: int = 0):
    images, labels = digit_images(count, offset)
    np.savez(path, x=images, y=labels)
    return path


def write_idx(path, array: np.ndarray, zipped: bool = False):
    # IDX layout (the MNIST distribution page; CHECKS.md): big-endian magic 0x0000080N, N sizes, bytes
    magic = 0x00000800 | array.ndim
    payload = struct.pack(">I", magic) + struct.pack(f">{array.ndim}I", *array.shape) + array.tobytes()
    path.write_bytes(gzip.compress(payload) if zipped else payload)
    return path


def test_npz_sweep_keys_the_file_by_content(tmp_path):
    path = write_npz(tmp_path / "cards.npz")
    sweep = jostle.Sweep(datasets=[{"format": "npz", "path": "cards.npz"}], train_sizes=[40, 60], seeds=[0],
                         architectures=[{"depth": 1, "width": 8}], paths_from=tmp_path, **QUICK)
    configs = sweep.runs()
    data = configs[0]["data"]
    assert data["path"] == str(path.resolve())  # relative to paths_from, recorded absolute
    assert data["sha256"] == {"path": hashlib.sha256(path.read_bytes()).hexdigest()}  # hashlib over the bytes
    assert [c["data"]["n_train"] for c in configs] == [40, 60]
    whole = jostle.datasets.from_npz(path)
    cut = load_run_data(data)
    assert torch.equal(cut.x_train, whole.x_train[:40]) and torch.equal(cut.y_train, whole.y_train[:40])
    assert torch.equal(cut.x_test, whole.x_test)  # the whole test split, as for digits

    summary = sweep.run(tmp_path / "runs.sqlite", progress_bar=False)
    assert (summary.finished, summary.failed) == (2, 0)
    frame = sweep.results(wide=True)
    assert set(frame["dataset"]) == {"cards.npz"} and frame[["accuracy", "nll"]].notna().all().all()

    elsewhere = tmp_path / "moved"
    elsewhere.mkdir()
    shutil.copy(path, elsewhere / "cards.npz")
    moved = jostle.Sweep(datasets=[{"format": "npz", "path": elsewhere / "cards.npz"}], train_sizes=[40, 60],
                         architectures=[{"depth": 1, "width": 8}], **QUICK)
    assert moved.keys() == sweep.keys()  # same bytes elsewhere: the same runs, already stored
    assert moved.run(tmp_path / "runs.sqlite", progress_bar=False).skipped == 2

    write_npz(path, offset=300)  # other digits in the same file
    changed = jostle.Sweep(datasets=[{"format": "npz", "path": str(path)}], train_sizes=[40, 60],
                           architectures=[{"depth": 1, "width": 8}], **QUICK)
    assert not set(changed.keys()) & set(sweep.keys())
    stale = sweep.run(tmp_path / "stale.sqlite", progress_bar=False)  # defined before the file changed
    assert stale.failed == 2
    with RunStore(tmp_path / "stale.sqlite", readonly=True) as db:
        errors = {r["error"] for r in db.runs()}
    assert len(errors) == 1 and "has changed since the sweep was defined" in errors.pop()


def test_idx_sweep_reads_the_test_files(tmp_path):
    images, labels = digit_images(160)
    files = {"images_path": write_idx(tmp_path / "train-images.gz", images[:100], zipped=True),
             "labels_path": write_idx(tmp_path / "train-labels", labels[:100].astype(np.uint8)),
             "test_images": write_idx(tmp_path / "test-images", images[100:]),
             "test_labels": write_idx(tmp_path / "test-labels.gz", labels[100:].astype(np.uint8), zipped=True)}
    sweep = jostle.Sweep(datasets=[{"format": "idx", **{k: str(v) for k, v in files.items()}}], train_sizes=[80],
                         architectures=[{"depth": 1, "width": 8}], **QUICK)
    data = sweep.runs()[0]["data"]
    assert data["sha256"] == {k: hashlib.sha256(v.read_bytes()).hexdigest() for k, v in files.items()}
    summary = sweep.run(tmp_path / "runs.sqlite", save_ensembles=True, progress_bar=False)
    assert (summary.finished, summary.failed) == (1, 0)
    with RunStore(tmp_path / "runs.sqlite", readonly=True) as db:
        run = db.runs()[0]
        ens = jostle.load(str(db.ensemble_file(run["key"])))
    assert run["config"]["data"]["format"] == "idx"
    # the test set is the test files' 60 images in file order, pixels / 255 (numpy on the raw bytes)
    x_test = torch.from_numpy(images[100:].reshape(60, 64).astype(np.float32) / 255)
    predicted = ens.predict(x_test).probs.argmax(1).numpy()
    # the same network on the same inputs in one process: the same predictions, so exactly the same share
    assert accuracy_score(labels[100:], predicted) == run["accuracy"]
    frame = sweep.results()
    assert set(frame["dataset"]) == {"train-images.gz"}


def test_function_architecture_gives_the_runs_of_the_same_mlp():
    # plain_mlp builds the layers jostle.mlp builds; the fit draws them again from the seed, so each
    # run must match the depth-width form's run bit for bit (the same kernels on the same inputs)
    sweep = jostle.Sweep(datasets=["moons"], train_sizes=[40], seeds=[0, 1],
                         architectures=[{"depth": 1, "width": 8}, f"{MODELS}:plain_mlp",
                                        {"callable": f"{MODELS}:plain_mlp", "width": 8}], **QUICK)
    archs = [r["architecture"] for r in sweep.runs()[::2]]
    assert archs == [{"depth": 1, "width": 8, "activation": "tanh"}, {"callable": f"{MODELS}:plain_mlp"},
                     {"callable": f"{MODELS}:plain_mlp", "width": 8}]
    records = [execute_run(config) for config in sweep.runs()]
    assert all(r["status"] == "ok" for r in records), [r["error"] for r in records]
    for seed in (0, 1):
        chosen = [r["metrics"] for r in records if r["config"]["seed"] == seed]
        first = {k: chosen[0][k] for k in ("accuracy", "nll", "ece", "attacks")}
        assert all({k: m[k] for k in first} == first for m in chosen[1:])


def test_cnn_builder_and_own_image_network_on_small_images(tmp_path):
    path = write_npz(tmp_path / "cards.npz", count=120)
    sweep = jostle.Sweep(
        datasets=[{"format": "npz", "path": str(path)}], train_sizes=[60],
        architectures=[{"builder": "cnn", "channels": [4]}, {"callable": f"{MODELS}:image_net", "channels": 3}],
        methods=[{"name": "deep_ensemble", "members": 2, "epochs": 2, "batch_size": 20}],
        evaluation={"budgets": [0.05], "points": 8, "attacks": [{"method": "fgsm"}]})
    cnn_arch = sweep.runs()[0]["architecture"]
    assert cnn_arch == {"builder": "cnn", "channels": [4], "kernel": 3, "pool": "max", "norm": None, "hidden": [],
                        "dropout": 0.0, "activation": "relu"}  # jostle.cnn's defaults filled in
    summary = sweep.run(tmp_path / "runs.sqlite", save_ensembles=True, progress_bar=False)
    assert (summary.finished, summary.failed) == (2, 0)
    frame = sweep.results(wide=True)
    assert list(frame["architecture"]) == ["cnn", f"{MODELS}:image_net"]
    assert frame["depth"].isna().all() and frame["accuracy"].notna().all()
    with RunStore(tmp_path / "runs.sqlite", readonly=True) as db:
        runs = {r["config"]["architecture"].get("builder", "own"): r for r in db.runs()}
        saved_cnn = jostle.load(str(db.ensemble_file(runs["cnn"]["key"])))
        own = runs["own"]
        saved_own = jostle.load(str(db.ensemble_file(own["key"])), module=sweep_models.image_net([1, 8, 8], 10, 3))
        certified = db.certified([runs["cnn"]["key"]])
    assert saved_cnn.meta["architecture"]["kwargs"]["in_shape"] == [1, 8, 8]  # from the data set
    assert saved_cnn.meta["architecture"]["kwargs"]["classes"] == 10
    assert len(certified) == 1  # jostle.cnn is a chain certify reads
    assert any("certified accuracy not computed" in w for w in own["warnings"])  # nn.Unflatten it does not
    # the batched pass over an nn.Unflatten-first network against plain torch, member by member
    x = load_run_data(own["config"]["data"]).x_test[:16]
    with torch.no_grad():
        reference = torch.stack([torch.softmax(saved_own.module(i)(x), 1) for i in range(2)]).mean(0)
    # float32 softmax of logits from ~200-term sums: agreement to a few ulp of 1
    torch.testing.assert_close(saved_own.predict(x).probs.float(), reference, atol=1e-5, rtol=0)


def test_meter_cards_and_bare_names():
    sweep = jostle.Sweep(datasets=[{"name": "meter_cards", "colour": True}, "moons"], train_sizes=[30],
                         methods=["map"])
    cards, moons = (r["data"] for r in sweep.runs())
    assert cards == {"name": "meter_cards", "n_train": 30, "resolution": 28, "colour": True, "seed": 0}
    data = load_run_data(cards)
    whole = jostle.datasets.meter_cards(colour=True)
    assert data.image_shape == (3, 28, 28) and torch.equal(data.x_train, whole.x_train[:30])
    named = jostle.Sweep(datasets=[{"name": "moons"}], train_sizes=[30], methods=["map"]).runs()[0]["data"]
    assert moons == named  # a bare name is the table with its defaults


@pytest.fixture
def npz(tmp_path):
    return str(write_npz(tmp_path / "cards.npz", count=60))


@pytest.mark.parametrize("datasets, architectures, message", [
    ([{"format": "npz", "path": "{dir}/nowhere.npz"}], None,
     r"^sweep\.datasets\[0\]\.path: no such file '.*nowhere\.npz'"),
    (["moons", {"format": "npz"}], None, r"^sweep\.datasets\[1\]: missing key 'path'"),
    ([{"format": "csv", "path": "{npz}"}], None, r"^sweep\.datasets\[0\]\.format: unknown file format 'csv'"),
    ([{"format": "npz", "path": "{npz}", "xkey": "x"}], None, r"^sweep\.datasets\[0\]: unknown key 'xkey'"),
    ([{"format": "npz", "path": "{npz}", "sha256": "ab"}], None, r"^sweep\.datasets\[0\]\.sha256: computed"),
    ([{"format": "npz", "path": "{npz}", "x_key": "images"}], None,
     r"^sweep\.datasets\[0\]: .*has no array named 'images'"),
    ([{"format": "folder", "path": "{npz}"}], None, r"^sweep\.datasets\[0\]\.path: no such folder .*\(it is a file\)"),
    ([{"format": "npz", "path": "{npz}"}], None,
     r"^sweep\.datasets\[0\]: training size must be <= \d+ \(the training points of cards\.npz\); got 200"),
    (["moons"], [{"builder": "resnet"}], r"^sweep\.architectures\[0\]\.builder: must name a registered builder"),
    (["moons"], [{"builder": "cnn"}], r"^sweep\.architectures\[0\] on sweep\.datasets\[0\]: cnn needs images"),
    ([{"format": "npz", "path": "{npz}"}], [{"builder": "cnn", "channels": [0]}],
     r"^sweep\.architectures\[0\] on sweep\.datasets\[0\]: cnn refused its arguments: channels must be"),
    (["moons"], [{"builder": "mlp", "classes": 3}], r"^sweep\.architectures\[0\]\.classes: set by the sweep"),
    (["moons"], [{"builder": "mlp", "widths": [3]}], r"^sweep\.architectures\[0\]: unknown key 'widths' of 'mlp'"),
    (["moons"], ["no_such_package.models:net"],
     r"^sweep\.architectures\[0\]\.callable: cannot import module 'no_such_package\.models'"),
    (["moons"], [f"{MODELS}:missing"], r"^sweep\.architectures\[0\]\.callable: module '.*' has no attribute 'missing'"),
    (["moons"], [f"{MODELS}:NOT_CALLABLE"], r"^sweep\.architectures\[0\]\.callable: .* is not callable; it is a int"),
    (["moons"], ["plain_mlp"], r"^sweep\.architectures\[0\]\.callable: must be 'package\.module:function'"),
    (["moons"], [f"{MODELS}:not_a_module"],
     r"^sweep\.architectures\[0\] on sweep\.datasets\[0\]: .*must return a torch\.nn\.Module; it returned a dict"),
    (["moons"], [{"callable": f"{MODELS}:plain_mlp", "builder": "mlp"}], r"^sweep\.architectures\[0\]: give either"),
])
def test_bad_data_and_architectures_name_the_key(tmp_path, npz, datasets, architectures, message):
    def filled(value):
        return value.format(dir=tmp_path, npz=npz) if isinstance(value, str) else value

    datasets = [{k: filled(v) for k, v in d.items()} if isinstance(d, dict) else d for d in datasets]
    kwargs = {} if architectures is None else {"architectures": architectures}
    with pytest.raises(SweepConfigError, match=message):
        jostle.Sweep(datasets=datasets, methods=["map"], train_sizes=[200 if "got 200" in message else 40], **kwargs)


def test_cluster_sends_each_data_set_once(tmp_path):
    distributed = pytest.importorskip("distributed")
    from distributed.diagnostics.plugin import SchedulerPlugin

    class Dependencies(SchedulerPlugin):
        """What each submitted run task depends on, read from the scheduler's own task graph."""

        def __init__(self):
            self.runs: dict = {}

        def update_graph(self, scheduler, *, keys, **kwargs):
            for key in keys:
                if str(key).startswith("jostle-run-"):
                    self.runs[key] = {d.key for d in scheduler.tasks[key].dependencies}

    path = write_npz(tmp_path / "cards.npz", count=100)
    spec = dict(datasets=[{"format": "npz", "path": str(path)}], train_sizes=[30, 40], seeds=[0, 1],
                architectures=[{"depth": 1, "width": 8}], **QUICK)
    held = []
    with distributed.LocalCluster(n_workers=2, processes=False, threads_per_worker=1, dashboard_address=":0",
                                  silence_logs=logging.ERROR) as cluster, distributed.Client(cluster) as client:
        plugin = Dependencies()
        cluster.scheduler.add_plugin(plugin)

        def look(record, summary):  # while the sweep runs: what data each worker holds
            held.append([sorted(str(k) for k in w.data if not str(k).startswith("jostle-run-"))
                         for w in cluster.workers.values()])

        summary = jostle.Sweep(**spec).run(tmp_path / "cluster.sqlite", client=client, progress=look,
                                           progress_bar=False)
    assert (summary.finished, summary.failed) == (4, 0)
    assert len(plugin.runs) == 4
    sources = set().union(*plugin.runs.values())
    # both training sizes cut one loaded file: one data key, scattered (no task computes it), every run's argument
    assert len(sources) == 1 and all(deps == sources for deps in plugin.runs.values())
    assert not sources & set(plugin.runs)
    (source,) = sources
    # broadcast: each worker holds one copy, the same key, all through the sweep
    assert len(held) == 4 and all(view == [[str(source)], [str(source)]] for view in held)
    local = jostle.Sweep(**spec)
    local.run(tmp_path / "local.sqlite", progress_bar=False)
    a = local.results().sort_values(["key", "attack"]).reset_index(drop=True)
    b = local.results(store=tmp_path / "cluster.sqlite").sort_values(["key", "attack"]).reset_index(drop=True)
    assert list(a["key"]) == list(b["key"])
    # each run holds torch to one thread, but two in-process workers share the thread setting: sums may
    # reduce in another order, a few float32 ulp on metrics of order 1
    np.testing.assert_allclose(b[METRICS].to_numpy(float), a[METRICS].to_numpy(float), atol=1e-5, rtol=0)


TOML = """
[sweep]
name = "own-data"
train_sizes = [40]
[[sweep.datasets]]
format = "npz"
path = "data/cards.npz"
[[sweep.architectures]]
builder = "cnn"
channels = [4]
[[sweep.methods]]
name = "map"
epochs = 2
[sweep.evaluation]
budgets = [0.1]
points = 8
attacks = [{method = "fgsm"}]
"""


def test_command_line_sweep_over_a_file_named_from_the_toml(tmp_path, capsys, monkeypatch):
    from tests.kernel_side.test_cli_sweep import in_process

    (tmp_path / "data").mkdir()
    write_npz(tmp_path / "data" / "cards.npz", count=80)
    (tmp_path / "sweep.toml").write_text(TOML)
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()  # the path is read from the TOML file's folder, not the working directory
    ran = in_process(["sweep", "run", str(tmp_path / "sweep.toml"), "--store", "runs.sqlite", "--quiet"],
                     capsys, elsewhere, monkeypatch)
    assert ran.returncode == 0, ran.stderr
    assert "own-data: 1 runs, 0 already stored, 1 finished, 0 failed" in ran.stdout
    shown = in_process(["sweep", "show", "runs.sqlite"], capsys, elsewhere, monkeypatch)
    assert shown.returncode == 0, shown.stderr
    assert "dataset cards.npz, n_train 40, depth -, width -, activation relu, architecture cnn" in shown.stdout
    (tmp_path / "sweep.toml").write_text(TOML.replace("data/cards.npz", "data/gone.npz"))
    refused = in_process(["sweep", "run", str(tmp_path / "sweep.toml"), "--store", "runs.sqlite"],
                         capsys, elsewhere, monkeypatch)
    assert refused.returncode == 1
    assert "sweep.datasets[0].path: no such file" in refused.stderr and "gone.npz" in refused.stderr


def test_canonical_configurations_of_files_are_plain_json(npz):
    # every field of a file entry survives canonical JSON unchanged (TOML and Python give one key)
    config = jostle.Sweep(datasets=[{"format": "npz", "path": npz}], train_sizes=[30], methods=["map"]).runs()[0]
    import json

    assert json.loads(canonical_json(config)) == config


def test_folder_sweep_is_keyed_by_the_files_it_reads(tmp_path):
    from PIL import Image

    images, labels = digit_images(60)
    root = tmp_path / "cards"
    for k, (image, label) in enumerate(zip(images, labels)):
        if label in (0, 1):
            (root / f"digit{label}").mkdir(parents=True, exist_ok=True)
            Image.fromarray(image, mode="L").save(root / f"digit{label}" / f"{k}.png")
    spec = dict(datasets=[{"format": "folder", "path": str(root), "size": [8, 8]}], train_sizes=[8],
                architectures=[{"builder": "cnn", "channels": [2]}], **QUICK)
    sweep = jostle.Sweep(**spec)
    assert sweep.runs()[0]["data"]["size"] == [8, 8]
    summary = sweep.run(tmp_path / "runs.sqlite", progress_bar=False)
    assert (summary.finished, summary.failed) == (1, 0)
    (root / ".DS_Store").write_bytes(b"ignored")  # from_folder skips dot files, and so does the hash
    (root / "digit0" / ".thumbs").write_bytes(b"ignored")
    assert jostle.Sweep(**spec).keys() == sweep.keys()
    first = sorted((root / "digit0").glob("*.png"))[0]
    first.rename(root / "digit1" / first.name)  # one card moved to the other class: other data
    assert jostle.Sweep(**spec).keys() != sweep.keys()


FIT_TOML = """
seed = 0
[data]
format = "npz"
path = "cards.npz"
n_train = 40
[architecture]
builder = "cnn"
channels = [2]
[method]
name = "map"
epochs = 1
"""


def test_fit_command_reads_a_file_named_from_its_toml(tmp_path, capsys, monkeypatch):
    from tests.kernel_side.test_cli_sweep import in_process

    write_npz(tmp_path / "cards.npz", count=80)
    (tmp_path / "fit.toml").write_text(FIT_TOML)
    (tmp_path / "elsewhere").mkdir()
    done = in_process(["fit", str(tmp_path / "fit.toml"), "--out", "cnn.safetensors"], capsys,
                      tmp_path / "elsewhere", monkeypatch)
    assert done.returncode == 0, done.stderr
    ens = jostle.load(str(tmp_path / "elsewhere" / "cnn.safetensors"))
    assert ens.meta["architecture"]["builder"] == "cnn" and ens.meta["architecture"]["kwargs"]["in_shape"] == [1, 8, 8]
    assert ens.meta["run"]["config"]["data"]["sha256"]["path"] == hashlib.sha256(
        (tmp_path / "cards.npz").read_bytes()).hexdigest()


def test_a_builder_registered_with_its_checked_function_is_named_by_sweeps(monkeypatch):
    from jostle.posterior import architectures

    def checked_linear(in_features: int, classes: int, bias: bool = True):
        if not isinstance(bias, bool):
            raise ValueError(f"bias must be True or False; got {bias!r}")
        return architectures.build_architecture("linear_head", in_features=in_features, classes=classes, bias=bias)

    def build(in_features, classes, bias):
        return torch.nn.Sequential(torch.nn.Linear(in_features, classes, bias=bias))

    monkeypatch.setitem(architectures._BUILDERS, "linear_head", (build, checked_linear))  # restored after the test
    sweep = jostle.Sweep(datasets=["moons"], architectures=[{"builder": "linear_head"}], train_sizes=[40], **QUICK)
    assert sweep.runs()[0]["architecture"] == {"builder": "linear_head", "bias": True}
    record = execute_run(sweep.runs()[0])
    assert record["status"] == "ok", record["error"]
    with pytest.raises(SweepConfigError, match=r"^sweep\.architectures\[0\] on sweep\.datasets\[0\]: linear_head "
                                               r"refused its arguments: bias must be True or False; got 'no'"):
        jostle.Sweep(datasets=["moons"], architectures=[{"builder": "linear_head", "bias": "no"}], methods=["map"])
    with pytest.raises(SweepConfigError, match=r"must name a registered builder with a checked function \('cnn', "
                                               r"'linear_head', 'mlp'\); got 'dropout_masks'"):
        jostle.Sweep(datasets=["moons"], architectures=[{"builder": "dropout_masks"}], methods=["map"])


def test_torch_datasets_made_by_a_function(tmp_path):
    entry = {"format": "torch", "datasets": f"{MODELS}:digit_pair", "arguments": {"count": 100}}
    sweep = jostle.Sweep(datasets=[entry], train_sizes=[50], architectures=[{"builder": "cnn", "channels": [2]}],
                         **QUICK)
    data = sweep.runs()[0]["data"]
    train, test = sweep_models.digit_pair(100)
    direct = jostle.datasets.from_torch(train, test)
    cut = load_run_data(data)
    assert cut.image_shape == (1, 8, 8) and torch.equal(cut.x_train, direct.x_train[:50])
    assert torch.equal(cut.x_test, direct.x_test) and cut.x_test.shape[0] == 25
    assert data["sha256"]["arrays"] == jostle.sweeps.data_sources.arrays_sha256(direct)
    other = jostle.Sweep(datasets=[{**entry, "arguments": {"count": 120}}], train_sizes=[50], methods=["map"])
    assert other.runs()[0]["data"]["sha256"] != data["sha256"]  # other images, another hash
    summary = sweep.run(tmp_path / "runs.sqlite", progress_bar=False)
    assert (summary.finished, summary.failed) == (1, 0)
    assert set(sweep.results()["dataset"]) == {f"{MODELS}:digit_pair"}


@pytest.mark.parametrize("entry, message", [
    ({"format": "torch"}, r"^sweep\.datasets\[0\]: missing key 'datasets'"),
    ({"format": "torch", "datasets": f"{MODELS}:one_dataset"},
     r"^sweep\.datasets\[0\]: .*one_dataset' must return a pair \(train_dataset, test_dataset\); got TensorDataset"),
    ({"format": "torch", "datasets": f"{MODELS}:absent"}, r"^sweep\.datasets\[0\]\.datasets: module .* no attribute"),
    ({"format": "torch", "datasets": f"{MODELS}:digit_pair", "arguments": {"count": 100}, "classes": ["a"]},
     r"^sweep\.datasets\[0\]: classes must name every label"),
    ({"format": "torch", "datasets": f"{MODELS}:digit_pair", "count": 100},
     r"^sweep\.datasets\[0\]: unknown key 'count'"),
])
def test_bad_torch_data_name_the_key(entry, message):
    with pytest.raises(SweepConfigError, match=message):
        jostle.Sweep(datasets=[entry], methods=["map"], train_sizes=[20])
