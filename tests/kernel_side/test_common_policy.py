"""The shared policies: input coercion, thread count, progress bars and the fits' training options."""
from __future__ import annotations

import inspect

import numpy as np
import pytest
import torch

import jostle
from jostle.common.checks import check_points
from jostle.common.progress import progress_bar
from jostle.common.threads import SMALL_WORK, threads_for, torch_threads
from jostle.fitting.training_options import OPTIMISER_OPTIONS, TRAINING_OPTIONS, TrainingOptions, training_fit
from jostle.posterior.prediction import Prediction

FITS = (jostle.fit_map, jostle.fit_deep_ensemble, jostle.fit_dropout, jostle.fit_vi, jostle.fit_laplace)


# ------------------------------------------------------------------ check_points
def test_check_points_names_the_parameter_and_the_feature_count():
    with pytest.raises(ValueError, match=r"^x must have shape \(n_points, 2\); got shape \(3, 5\)$"):
        check_points("x", torch.zeros(3, 5), 2)
    with pytest.raises(ValueError, match=r"^x_adv must have shape \(n_points, \*input_shape\); got shape \(4,\) "
                                         r"\(use x_adv\[None\] for a single point\)$"):
        check_points("x_adv", np.zeros(4), 2)
    with pytest.raises(ValueError, match=r"^probe must be a numeric array of shape \(n_points, \.\.\.\); got"):
        check_points("probe", [["a", "b"]], 2)
    with pytest.raises(ValueError, match=r"^x must hold at least one point; got shape \(0, 2\)$"):
        check_points("x", np.zeros((0, 2)), 2, min_points=1)
    with pytest.raises(ValueError, match=r"^x must contain only finite values; got NaN or inf$"):
        check_points("x", [[0.0, float("nan")]], 2)
    with pytest.raises(ValueError, match=r"^x must hold real numbers; got dtype torch.complex64$"):
        check_points("x", torch.zeros(1, 2, dtype=torch.complex64), 2)


def test_check_points_casts_to_the_ensemble_and_keeps_or_cuts_the_graph():
    ens = jostle.demo_posterior("leak_alarm_map")
    values = np.array([[0.25, -1.5]])  # exactly representable: the float32 cast is exact
    x = check_points("x", values, ens)
    assert x.dtype == ens.dtype and x.device == ens.device and x.tolist() == values.tolist()
    leaf = torch.zeros(2, 2, dtype=ens.dtype, requires_grad=True)
    assert check_points("x", leaf, ens).requires_grad
    assert not check_points("x", leaf, ens, detach=True).requires_grad
    with pytest.raises(ValueError,
                       match=r"^x_adv must have shape \(n_points, 2\) for this network; got shape \(1, 3\)"):
        check_points("x_adv", torch.zeros(1, 3), ens)


def test_every_coercion_site_gives_the_same_message():
    ens = jostle.demo_posterior("leak_alarm_map")
    message = r"x must have shape \(n_points, 2\) for this network; got shape \(3, 5\)"
    for call in (lambda x: ens.predict(x), lambda x: jostle.attack(ens, x, eps=0.1, method="fgsm"),
                 lambda x: jostle.softmax_robustness(ens, x, x)):
        with pytest.raises(ValueError, match=message):
            call(torch.zeros(3, 5))
    with pytest.raises(ValueError, match=r"x_adv must have shape \(n_points, 2\) for this network"):
        jostle.softmax_robustness(ens, torch.zeros(3, 2), torch.zeros(3, 5))


# ------------------------------------------------------------------ threads
def test_threads_for_follows_the_rule():
    assert threads_for("auto", SMALL_WORK) == 1
    assert threads_for("auto", SMALL_WORK + 1) is None
    assert threads_for("auto", 10, "meta") is None  # not the CPU: torch's setting stays
    assert threads_for("auto", 10, small=5) is None
    assert threads_for(None, 10) is None and threads_for(3, 10**12) == 3
    with pytest.raises(ValueError, match=r"^threads must be an integer >= 1; got 0$"):
        threads_for(0, 10)
    with pytest.raises(ValueError, match=r"^threads must be 'auto', an integer >= 1 or None; got 'many'$"):
        threads_for("many", 10)


def test_torch_threads_sets_and_restores_the_count():
    before = torch.get_num_threads()
    with torch_threads(1):
        assert torch.get_num_threads() == 1
    assert torch.get_num_threads() == before
    with pytest.raises(RuntimeError, match="inside"):
        with torch_threads(1):
            raise RuntimeError("inside")
    assert torch.get_num_threads() == before


# ------------------------------------------------------------------ progress bars
def test_a_disabled_bar_is_silent_and_an_enabled_one_is_tqdm(capsys):
    from tqdm.auto import tqdm

    with progress_bar(False, 3, "quiet") as bar:
        bar.update(1)
        bar.set_postfix(loss="0.1")
        assert bar.disable
    assert capsys.readouterr().err == ""
    bar = progress_bar(True, 2, "shown", unit="epoch")
    try:
        assert isinstance(bar, tqdm) and bar.total == 2 and bar.desc.startswith("shown") and not bar.disable
    finally:
        bar.close()


# ------------------------------------------------------------------ training options
def test_the_five_fits_take_the_shared_options_with_its_defaults():
    defaults = TrainingOptions()
    for fit in FITS:
        parameters = inspect.signature(fit).parameters
        expected = [o for o in TRAINING_OPTIONS if fit is not jostle.fit_vi or o not in OPTIMISER_OPTIONS]
        assert list(fit.training_options) == expected, fit.__name__
        for name in expected:
            assert parameters[name].kind is inspect.Parameter.KEYWORD_ONLY, (fit.__name__, name)
            assert parameters[name].default == getattr(defaults, name), (fit.__name__, name)
        assert "epochs : int\n        Passes over the training points." in fit.__doc__, fit.__name__
        assert "{training_options}" not in fit.__doc__


def test_training_options_are_checked_with_named_messages():
    assert TrainingOptions(device=None).checked().device == torch.device("cpu")
    for bad, message in (({"epochs": 0}, r"^epochs must be an integer >= 1; got 0$"),
                         ({"lr": -1.0}, r"^lr must be a finite float > 0; got -1$"),
                         ({"optimizer": "rms"}, r"^optimizer must be one of 'adam', 'sgd'; got 'rms'$"),
                         ({"seed": -1}, r"^seed must be an integer >= 0; got -1$"),
                         ({"device": "meta"}, r"^device must hold values to train on")):
        with pytest.raises(ValueError, match=message):
            TrainingOptions(**bad).checked()


def test_a_fit_whose_default_drifts_from_the_options_is_refused_at_definition():
    def fit_drifted(module, data, *, epochs=50, seed=0):
        """{training_options}"""

    with pytest.raises(TypeError, match=r"fit_drifted must take epochs=100 \(TrainingOptions\); default 50"):
        training_fit(("epochs", "seed"))(fit_drifted)


def test_the_sweep_accepts_shared_and_own_options_and_names_the_known_ones():
    from jostle.sweeps.spec import SweepConfigError, check_sweep

    base = {"datasets": [{"name": "moons"}], "architectures": [{"depth": 1, "width": 4}], "train_sizes": [20],
            "seeds": [0]}
    check_sweep({**base, "methods": [{"name": "vi", "epochs": 2, "kl_weight": 1.0}]})
    with pytest.raises(SweepConfigError, match=r"sweep\.methods\[0\]\.momentum: unknown hyper-parameter of fit_vi "
                                               r"\(known: 'samples', .*'epochs', 'batch_size', 'lr', 'validation', "
                                               r"'patience'\)$"):
        check_sweep({**base, "methods": [{"name": "vi", "momentum": 0.5}]})


# ------------------------------------------------------------------ prediction quantiles
def test_quantiles_in_blocks_agree_with_numpy(monkeypatch):
    import jostle.posterior.prediction as prediction

    members = torch.rand(7, 11, 3, generator=torch.Generator().manual_seed(0), dtype=torch.float64)
    monkeypatch.setattr(prediction, "_QUANTILE_LIMIT", 7 * 3 * 2)  # blocks of 2 points, the last of 1
    for q in (0.0, 0.05, 0.5, 0.95, 1.0):
        expected = np.quantile(members.numpy(), q, axis=0)  # numpy's default linear method (Hyndman & Fan 1996, def. 7)
        # one interpolation between two float64 order statistics: a few ulp of values <= 1
        np.testing.assert_allclose(Prediction(members).quantile(q).numpy(), expected, rtol=0, atol=1e-15)
