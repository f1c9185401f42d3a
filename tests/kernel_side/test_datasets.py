"""Data sets against scikit-learn's generators and loaders (Pedregosa et al. 2011; sklearn.datasets docs)."""
import numpy as np
import pytest
import torch
from sklearn.datasets import load_digits, make_moons

import jostle
from jostle import datasets


def test_moons_are_sklearns_arrays():
    # make_moons(n): n//2 points in class 0; same random_state, same arrays (scikit-learn
    # documentation of sklearn.datasets.make_moons).
    data = datasets.moons(n_train=301, n_test=50, noise=0.2, seed=4)
    x, y = make_moons(301, noise=0.2, random_state=4)
    np.testing.assert_allclose(data.x_train.numpy(), x.astype(np.float32))
    np.testing.assert_array_equal(data.y_train.numpy(), y)
    assert int((data.y_train == 0).sum()) == 301 // 2 + 1 or int((data.y_train == 0).sum()) == 301 // 2
    xt, _ = make_moons(50, noise=0.2, random_state=4 + datasets.TEST_SEED_OFFSET)
    np.testing.assert_allclose(data.x_test.numpy(), xt.astype(np.float32))
    assert int((datasets.moons(n_train=300).y_train == 0).sum()) == 150
    again = datasets.moons(n_train=301, n_test=50, noise=0.2, seed=4)
    assert torch.equal(again.x_train, data.x_train)  # same function, same seed, one process: exact
    lo, hi = data.bounds
    assert bool((data.x_train >= lo).all() and (data.x_train <= hi).all())


def test_digits_facts():
    # load_digits(): 1797 images, 8x8, integers 0..16, 10 classes (UCI Optical Recognition
    # of Handwritten Digits, test part).
    data = datasets.digits(seed=0)
    assert data.x_train.shape[0] + data.x_test.shape[0] == 1797
    assert data.x_train.shape[1] == 64 and data.image_shape == (1, 8, 8)
    assert data.classes == [str(d) for d in range(10)]
    allx = torch.cat([data.x_train, data.x_test]).numpy()
    assert allx.min() == 0.0 and allx.max() == 1.0  # integers 0..16 over 16 are exact in binary floats
    np.testing.assert_allclose(np.unique(allx * 16), np.arange(17))
    raw = load_digits()
    assert sorted(map(tuple, (allx * 16).round().astype(int))) == sorted(map(tuple, raw.data.astype(int)))
    assert data.bounds[0].tolist() == [0.0] * 64 and data.bounds[1].tolist() == [1.0] * 64


def test_circles_and_spirals_are_seeded_and_balanced():
    for make in (datasets.circles, datasets.spirals):
        a, b = make(seed=3), make(seed=3)
        # same function, same seed, one process: exact
        assert torch.equal(a.x_train, b.x_train) and torch.equal(a.y_test, b.y_test)
        assert not torch.equal(a.x_train, make(seed=4).x_train)
        assert abs(int(a.y_train.sum()) - 150) <= 1


def test_from_arrays_checks_its_inputs():
    x = np.zeros((4, 2))
    y = np.array([0, 1, 0, 1])
    data = datasets.from_arrays(x + np.arange(4)[:, None], y, x, y, classes=["steady", "leak"], name="pipes")
    assert data.classes == ["steady", "leak"] and data.n_features == 2
    with pytest.raises(ValueError, match=r"x_train must be a 2-d array; got shape \(4,\)"):
        datasets.from_arrays(np.zeros(4), y, x, y)
    with pytest.raises(ValueError, match="x_train must contain only finite values; got NaN or inf"):
        datasets.from_arrays(np.full((4, 2), np.nan), y, x, y)
    with pytest.raises(ValueError, match=r"y_train must have shape \(4,\); got shape \(3,\)"):
        datasets.from_arrays(x, y[:3], x, y)
    with pytest.raises(ValueError, match=r"y_test must hold labels < 2 \(the number of classes\); got 2"):
        datasets.from_arrays(x, y, x, np.array([0, 1, 2, 0]), classes=["a", "b"])
    with pytest.raises(ValueError, match="y_train must hold labels >= 0; got -1"):
        datasets.from_arrays(x, np.array([0, -1, 0, 1]), x, y)
    with pytest.raises(ValueError, match=r"y_train must hold integer class labels"):
        datasets.from_arrays(x, np.array([0.5, 1, 0, 1]), x, y)
    with pytest.raises(ValueError, match="x_test must have 2 features like x_train; got 3"):
        datasets.from_arrays(x, y, np.zeros((4, 3)), y)
    with pytest.raises(ValueError, match="bounds must contain every point"):
        datasets.from_arrays(x + 5, y, x, y, bounds=(0.0, 1.0))
    with pytest.raises(ValueError, match="bounds must have lo < hi in every feature"):
        datasets.from_arrays(x, y, x, y, bounds=(1.0, 0.0))
    with pytest.raises(ValueError, match=r"image_shape \(3, 3\) must multiply to n_features = 2"):
        datasets.from_arrays(x, y, x, y, image_shape=(3, 3))


def test_generator_arguments_are_checked():
    with pytest.raises(ValueError, match="noise must be a finite float >= 0; got -0.1"):
        datasets.moons(noise=-0.1)
    with pytest.raises(ValueError, match="n_train must be an integer >= 2; got 1"):
        datasets.moons(n_train=1)
    with pytest.raises(ValueError, match="seed must be an integer >= 0; got 'a'"):
        datasets.circles(seed="a")
    with pytest.raises(ValueError, match=r"test_fraction must be a finite float > 0 and < 1; got 1"):
        datasets.digits(test_fraction=1.0)


def test_mlp_builder_checks_and_records():
    net = jostle.mlp(2, 2, hidden=(4, 3), activation="relu", dropout=0.1)
    assert [type(m).__name__ for m in net] == ["Linear", "ReLU", "Dropout", "Linear", "ReLU", "Dropout", "Linear"]
    assert jostle.posterior.architectures.architecture_of(net)["kwargs"]["hidden"] == [4, 3]
    with pytest.raises(ValueError, match="activation must be one of 'tanh'.*; got 'swish'"):
        jostle.mlp(2, 2, activation="swish")
    with pytest.raises(ValueError, match="classes must be an integer >= 2; got 1"):
        jostle.mlp(2, 1)
    with pytest.raises(ValueError, match="hidden must be a sequence of positive integers; got 5"):
        jostle.mlp(2, 2, hidden=5)
    with pytest.raises(ValueError, match=r"dropout must be a finite float >= 0 and < 1; got 1"):
        jostle.mlp(2, 2, dropout=1.0)


def test_seeded_initialisation_matches_pytorch_bounds():
    # nn.Linear's default init is U(-1/sqrt(fan_in), 1/sqrt(fan_in)) (PyTorch docs).
    net = jostle.init_parameters(jostle.mlp(16, 2, hidden=(200,)), torch.Generator().manual_seed(0))
    bound = 1 / 4
    w = net[0].weight.detach()
    assert float(w.abs().max()) <= bound and float(w.abs().max()) > 0.95 * bound
    again = jostle.init_parameters(jostle.mlp(16, 2, hidden=(200,)), torch.Generator().manual_seed(0))
    assert torch.equal(again[0].weight, w)  # same generator seed, one process: exact
