"""Bad input to data wrapping, fitting, HMC, ensemble building and loading (property-based)."""
from __future__ import annotations

import math
import re

import numpy as np
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st

import jostle

FEW = settings(max_examples=25, deadline=None)
NOT_FINITE = st.sampled_from([math.nan, math.inf, -math.inf])
DATA = jostle.datasets.moons(n_train=20, n_test=6, noise=0.2, seed=0)
XT = [[0.0, 0.0], [0.0, 1.0]]


def _net():
    return jostle.mlp(2, 2, hidden=(4,))


@FEW
@given(bad=NOT_FINITE, which=st.sampled_from(["x_train", "x_test"]))
def test_from_arrays_refuses_non_finite_features(bad, which):
    arrays = {"x_train": [[0.0, 0.0], [0.0, 1.0]], "y_train": [0, 1],
              "x_test": [[0.0, 0.0], [0.0, 1.0]], "y_test": [0, 1]}
    arrays[which][1][0] = bad
    with pytest.raises(ValueError, match=rf"{which} must contain only finite values; got NaN or inf"):
        jostle.datasets.from_arrays(**arrays)


@pytest.mark.parametrize("kwargs, message", [
    ({"y_train": [0, 1.5]}, r"y_train must hold integer class labels; got dtype float64"),
    ({"y_train": [0, -1]}, r"y_train must hold labels >= 0; got -1"),
    ({"y_train": [0]}, r"y_train must have shape \(2,\); got shape \(1,\)"),
    ({"x_train": np.zeros((0, 2)), "y_train": []}, r"x_train must hold at least one point; got 0"),
    ({"x_train": [0.0, 1.0]}, r"x_train must be a 2-d array; got shape \(2,\)"),
    ({"x_train": [["a", "b"], ["c", "d"]]}, r"x_train must be a numeric array"),
    ({"x_test": [[0.0, 0.0, 0.0]], "y_test": [0]}, r"x_test must have 2 features like x_train; got 3"),
])
def test_from_arrays_refuses_malformed_arrays(kwargs, message):
    arrays = {"x_train": XT, "y_train": [0, 1], "x_test": XT, "y_test": [0, 1], **kwargs}
    with pytest.raises(ValueError, match=message):
        jostle.datasets.from_arrays(**arrays)


FITS = {"map": jostle.fit_map, "deep_ensemble": jostle.fit_deep_ensemble, "vi": jostle.fit_vi,
        "dropout": jostle.fit_dropout, "laplace": jostle.fit_laplace}


@FEW
@given(fit=st.sampled_from(sorted(FITS)), epochs=st.integers(max_value=0))
def test_fits_refuse_zero_or_negative_epochs(fit, epochs):
    with pytest.raises(ValueError, match=rf"epochs must be an integer >= 1; got {epochs}"):
        FITS[fit](_net(), DATA, epochs=epochs)


@FEW
@given(fit=st.sampled_from(sorted(FITS)),
       lr=st.one_of(NOT_FINITE, st.floats(max_value=0.0, allow_nan=False, allow_infinity=False)))
def test_fits_refuse_bad_learning_rates(fit, lr):
    with pytest.raises(ValueError, match=re.escape(f"lr must be a finite float > 0; got {lr:g}")):
        FITS[fit](_net(), DATA, lr=lr)


@FEW
@given(fit=st.sampled_from(["vi", "dropout", "laplace"]), samples=st.integers(max_value=0))
def test_fits_refuse_zero_or_negative_sample_counts(fit, samples):
    with pytest.raises(ValueError, match=rf"samples must be an integer >= 1; got {samples}"):
        FITS[fit](_net(), DATA, samples=samples)


@FEW
@given(members=st.one_of(st.integers(max_value=0), st.just(True), st.just(2.0)))
def test_deep_ensemble_refuses_bad_member_counts(members):
    with pytest.raises(ValueError, match=rf"members must be an integer >= 1; got {members!r}"):
        jostle.fit_deep_ensemble(_net(), DATA, members=members)


@FEW
@given(p=st.one_of(NOT_FINITE, st.floats(max_value=-1e-9, allow_infinity=False),
                   st.floats(min_value=1.0, max_value=1e9)))
def test_dropout_refuses_rates_outside_zero_to_one(p):
    with pytest.raises(ValueError, match=re.escape(f"p must be a finite float >= 0 and < 1; got {p:g}")):
        jostle.fit_dropout(_net(), DATA, p=p)


def test_a_diverging_fit_is_an_error_not_a_nan_posterior():
    with pytest.raises(ValueError, match=r"training diverged: the loss became (nan|inf) in epoch \d+; "
                                         r"lr = 1e\+30 is probably too large"):
        jostle.fit_map(_net(), DATA, lr=1e30, epochs=5, progress=False)


def test_fits_refuse_a_device_without_values():
    with pytest.raises(ValueError, match=r"device must hold values to train on, such as 'cpu' or 'cuda'; got 'meta'"):
        jostle.fit_map(_net(), DATA, epochs=1, device="meta")


def _log_density(q):
    return -0.5 * (q ** 2).sum(-1)


@FEW
@given(num_samples=st.integers(max_value=0), warmup=st.integers(min_value=0, max_value=3))
def test_sample_hmc_refuses_zero_draws(num_samples, warmup):
    with pytest.raises(ValueError, match=rf"num_samples must be an integer >= 1; got {num_samples}"):
        jostle.sample_hmc(_log_density, torch.zeros(2, 3), num_samples=num_samples, warmup=warmup)


@FEW
@given(warmup=st.one_of(st.integers(max_value=-1), st.just(1.5)))
def test_sample_hmc_refuses_bad_warmup(warmup):
    with pytest.raises(ValueError, match=rf"warmup must be an integer >= 0; got {warmup}"):
        jostle.sample_hmc(_log_density, torch.zeros(2, 3), num_samples=2, warmup=warmup)


@FEW
@given(shape=st.lists(st.integers(0, 3), min_size=1, max_size=3).filter(lambda s: len(s) != 2 or 0 in s))
def test_sample_hmc_refuses_initial_of_the_wrong_shape(shape):
    message = f"initial must have shape (C, P) with C, P >= 1; got shape {tuple(shape)}"
    with pytest.raises(ValueError, match=re.escape(message)):
        jostle.sample_hmc(_log_density, torch.zeros(*shape), num_samples=2, warmup=2)


@pytest.mark.parametrize("initial, message", [
    (torch.full((2, 3), math.nan), r"initial must contain only finite values; got NaN or inf"),
    (torch.zeros(2, 3, dtype=torch.int64), r"initial must be a floating tensor; got dtype torch.int64"),
    (torch.zeros(2, 3, device="meta"), r"initial is on device 'meta', which holds no values"),
])
def test_sample_hmc_refuses_bad_initial_values(initial, message):
    with pytest.raises(ValueError, match=message):
        jostle.sample_hmc(_log_density, initial, num_samples=2, warmup=2)


def test_from_modules_refuses_bad_members():
    with pytest.raises(ValueError, match=r"modules must be a non-empty list of torch.nn.Module; got an empty list"):
        jostle.Ensemble.from_modules([])
    with pytest.raises(TypeError, match=r"modules\[0\] must be a torch.nn.Module; got int"):
        jostle.Ensemble.from_modules([1, 2])
    with pytest.raises(ValueError, match=r"state_dicts\[1\]\['0.weight'\] must have shape \(4, 2\); got \(5, 2\)"):
        jostle.Ensemble.from_modules([_net(), jostle.mlp(2, 2, hidden=(5,))])
    broken = torch.nn.Linear(2, 2)
    with torch.no_grad():
        broken.weight[0, 0] = math.nan
    with pytest.raises(ValueError, match=r"params\['weight'\] must contain only finite values; "
                                         r"got NaN or inf in members \[1\]"):
        jostle.Ensemble.from_modules([torch.nn.Linear(2, 2), broken])
    with pytest.raises(ValueError, match=r"memory_budget must be an integer >= 1; got 0"):
        jostle.Ensemble.from_modules([torch.nn.Linear(2, 2)], memory_budget=0)


def test_load_refuses_bad_paths(tmp_path):
    with pytest.raises(FileNotFoundError, match=r"path does not exist: .*missing.safetensors"):
        jostle.load(tmp_path / "missing.safetensors")
    with pytest.raises(IsADirectoryError, match=r"path must name a .safetensors file; got a directory"):
        jostle.load(tmp_path)
    with pytest.raises(TypeError, match=r"path must be a str or os.PathLike naming a .safetensors file; got int"):
        jostle.load(3)
    garbage = tmp_path / "garbage.safetensors"
    garbage.write_bytes(b"garbage")
    with pytest.raises(jostle.FormatError,
                       match=r"is truncated or corrupted: 7 bytes is shorter than a safetensors header"):
        jostle.load(garbage)


@FEW
@given(scale=st.one_of(NOT_FINITE, st.floats(max_value=0.0, allow_nan=False, allow_infinity=False), st.just("a")))
def test_masking_check_refuses_bad_budget_scales(scale):
    ens = jostle.Ensemble.from_modules([jostle.init_parameters(_net(), torch.Generator().manual_seed(0))])
    shown = f"'{scale}'" if isinstance(scale, str) else f"{scale:g}"
    with pytest.raises(ValueError, match=re.escape(f"budget_scales entry must be a finite float > 0; got {shown}")):
        jostle.masking_check(ens, torch.zeros(1, 2), budget_scales=[scale, 1.0], steps=1)
