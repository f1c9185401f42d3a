"""jostle.gradient_pictures and jostle.dataset_gradients against expected_gradient and autograd.

References: the S-sample expected gradient is the gradient of the mean of S members'
cross-entropies, equal to the mean of their gradients (Athalye et al. 2018); torch.autograd
through the batched forward (``backward="autograd"``) is the outside reference.
"""
import numpy as np
import pytest
import torch

import jostle
from tests.conftest import random_mlp_ensemble


@pytest.fixture(scope="module")
def ensemble():
    ens, _ = random_mlp_ensemble(members=20, in_features=12, classes=3, hidden=(8,), activation="tanh", seed=3)
    return ens


@pytest.fixture(scope="module")
def points():
    return torch.randn(6, 12, generator=torch.Generator().manual_seed(5))


def test_each_count_is_the_expected_gradient_of_its_members(ensemble, points):
    out = jostle.gradient_pictures(ensemble, points, samples=(1, 4, 16, 64, None), seed=7)
    assert list(out.sample_counts) == [1, 4, 16, 20]  # 64 and None clip to the 20 members
    assert sorted(out.order.tolist()) == list(range(20))
    labels = ensemble.predict(points).label
    assert out.labels.tolist() == labels.tolist()
    for k, count in enumerate(out.sample_counts):
        members = out.order[:count].tolist()
        for backward in ("auto", "autograd"):
            reference = jostle.expected_gradient(ensemble, points, labels, samples=members, backward=backward)
            # float32 member gradients summed in another order: about count * eps32 relative
            scale = float(reference.abs().max())
            np.testing.assert_allclose(out.gradients[k], reference.numpy(), rtol=0, atol=32 * 1.2e-7 * scale)


def test_norms_and_component_means(ensemble, points):
    out = jostle.gradient_pictures(ensemble, points, samples=(2, 5), seed=1)
    flat = out.gradients.reshape(2, 6, -1)
    # numpy on the same float64 array: a different summation order only, so float64 rounding
    np.testing.assert_allclose(out.linf, np.linalg.norm(flat, ord=np.inf, axis=2), rtol=0, atol=0)
    np.testing.assert_allclose(out.l2, np.linalg.norm(flat, axis=2), rtol=1e-14)
    np.testing.assert_allclose(out.component_abs_mean, np.abs(flat).mean(axis=1), rtol=1e-14)
    assert out.components.shape == (2, 6, 12)


def test_the_seed_fixes_the_member_subsets(ensemble, points):
    first = jostle.gradient_pictures(ensemble, points, samples=(4,), seed=11)
    again = jostle.gradient_pictures(ensemble, points, samples=(4,), seed=11)
    other = jostle.gradient_pictures(ensemble, points, samples=(4,), seed=12)
    assert np.array_equal(first.order, again.order)  # same seed, same generator: exact
    assert np.array_equal(first.gradients, again.gradients)  # same kernel, same input, one process
    assert not np.array_equal(first.order, other.order)


def test_every_member_does_not_depend_on_the_order(ensemble, points):
    # S = all is a mean over the same set whatever the order: equal up to float32 summation order
    a = jostle.gradient_pictures(ensemble, points, samples=(None,), seed=0)
    b = jostle.gradient_pictures(ensemble, points, samples=(None,), seed=99)
    np.testing.assert_allclose(a.gradients, b.gradients, rtol=0, atol=20 * 1.2e-7 * np.abs(a.gradients).max())


def test_given_labels_are_used(ensemble, points):
    labels = torch.tensor([0, 1, 2, 0, 1, 2])
    out = jostle.gradient_pictures(ensemble, points, labels, samples=(None,))
    reference = jostle.expected_gradient(ensemble, points, labels, backward="autograd")
    np.testing.assert_allclose(out.gradients[0], reference.numpy(), rtol=0,
                               atol=32 * 1.2e-7 * float(reference.abs().max()))  # float32 order, 20 members


def test_pictures_of_one_channel_are_signed_and_of_three_are_magnitudes():
    ens, _ = random_mlp_ensemble(members=3, in_features=12, classes=2, hidden=(4,), seed=0)
    out = jostle.gradient_pictures(ens, torch.rand(2, 12, generator=torch.Generator().manual_seed(0)),
                                   samples=(1, 3))
    grey = out.pictures((1, 3, 4))
    assert grey.signed and grey.kind == "signed" and grey.images.shape == (2, 2, 3, 4)
    np.testing.assert_array_equal(grey.images, out.gradients.reshape(2, 2, 3, 4))  # a reshape: exact
    np.testing.assert_array_equal(grey.scales, out.linf)  # max |g| of the same numbers: exact
    assert out.pictures((3, 4)).images.shape == (2, 2, 3, 4)
    colour = out.pictures((3, 2, 2))
    assert not colour.signed and colour.kind == "magnitude over 3 channels"
    channels = out.gradients.reshape(2, 2, 3, 2, 2)
    expected = np.sqrt((channels ** 2).sum(axis=2))
    np.testing.assert_allclose(colour.images, expected, rtol=1e-15)  # float64, three squares
    np.testing.assert_allclose(colour.scales, expected.reshape(2, 2, -1).max(axis=2), rtol=0, atol=0)
    with pytest.raises(ValueError, match=r"image_shape must be \(H, W\) or \(C, H, W\) with 12 values"):
        out.pictures((5, 5))


def test_dataset_gradients_on_digits():
    data = jostle.datasets.digits(seed=0)
    ens, _ = random_mlp_ensemble(members=6, in_features=64, classes=10, hidden=(8,), seed=1)
    out = jostle.dataset_gradients(ens, data, points=10, samples=(1, 4, None), seed=2)
    assert out.indices.shape == (10,) and np.all(np.diff(out.indices) > 0)
    assert out.labels.tolist() == data.y_test[out.indices].tolist()
    direct = jostle.gradient_pictures(ens, data.x_test[out.indices], data.y_test[out.indices], samples=(1, 4, None),
                                      seed=2)
    np.testing.assert_array_equal(out.gradients, direct.gradients)  # same kernel, same input, one process
    assert out.pictures(data.image_shape).images.shape == (3, 10, 8, 8)
    everything = jostle.dataset_gradients(ens, data, points=10_000, samples=(1,))
    assert everything.gradients.shape[1] == data.x_test.shape[0]


@pytest.mark.parametrize(("samples", "message"), [
    ("all", r"samples must be a sequence of integers >= 1 or None \(None: every member\); got 'all'"),
    (4, r"samples must be a sequence of integers >= 1 or None \(None: every member\); got 4"),
    ((), r"samples must hold at least one sample count; got an empty sequence"),
    ((1, 0), r"samples entries must be integers >= 1 or None \(None: every member\); got 0"),
    ((2.5,), r"samples entries must be integers >= 1 or None \(None: every member\); got 2.5"),
    ((True,), r"samples entries must be integers >= 1 or None \(None: every member\); got True"),
])
def test_bad_samples(ensemble, points, samples, message):
    with pytest.raises(ValueError, match=message):
        jostle.gradient_pictures(ensemble, points, samples=samples)


def test_bad_arguments(ensemble, points):
    with pytest.raises(ValueError, match=r"seed must be an integer >= 0; got -1"):
        jostle.gradient_pictures(ensemble, points, seed=-1)
    with pytest.raises(ValueError, match=r"x must have shape \(n_points, \*input_shape\)"):
        jostle.gradient_pictures(ensemble, points[0])
    with pytest.raises(ValueError, match=r"y must have shape \(6,\); got shape \(2,\)"):
        jostle.gradient_pictures(ensemble, points, [0, 1])
    with pytest.raises(ValueError, match=r"y must hold labels < 3"):
        jostle.gradient_pictures(ensemble, points, [0, 1, 2, 3, 0, 0])
    data = jostle.datasets.digits(seed=0)
    with pytest.raises(ValueError, match=r"points must be an integer >= 1; got 0"):
        jostle.dataset_gradients(ensemble, data, points=0)
    with pytest.raises(ValueError, match=r"data must be a jostle.Dataset; got list"):
        jostle.dataset_gradients(ensemble, [1, 2], points=3)
