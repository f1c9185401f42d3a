"""The live engine's pure view computation, checked against the ensemble computed directly."""
from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
import scipy.stats
import torch

import jostle
import jostle.live.engine as live

from .conftest import tiny_ensemble

BOUNDS = ([-2.0, -1.5], [2.5, 2.0])


@pytest.fixture(scope="module")
def state():
    return live.ExplorerState(point=(0.3, -0.2), budget=0.2, samples=4, steps=10, grid=16, boundaries=3)


def test_point_panel_matches_predict(ens, state):
    view = live.compute_view(ens, state, bounds=BOUNDS)
    pred = ens.predict(torch.tensor([state.point]))
    np.testing.assert_allclose(view.before.probs, pred.probs[0].numpy(), rtol=1e-6)
    np.testing.assert_allclose(view.before.lower, pred.lower[0].numpy(), rtol=1e-6)
    np.testing.assert_allclose(view.before.upper, pred.upper[0].numpy(), rtol=1e-6)
    assert view.label == int(pred.label[0])
    # uncertainty split against scipy.stats.entropy (Houlsby et al. 2011 decomposition)
    members = pred.member_probs[:, 0].numpy().astype(np.float64)
    total = scipy.stats.entropy(members.mean(0))
    aleatoric = np.mean([scipy.stats.entropy(m) for m in members])
    assert view.before.total == pytest.approx(total, rel=1e-5)
    assert view.before.aleatoric == pytest.approx(aleatoric, rel=1e-5)
    assert view.before.epistemic == pytest.approx(total - aleatoric, abs=1e-6)
    assert view.spread.before.sum() == len(ens)


def test_grid_layers_match_predict_on_the_grid(ens, state):
    view = live.compute_view(ens, replace(state, layer="epistemic"), bounds=BOUNDS)
    grid = view.grid
    gx, gy = np.meshgrid(grid.xs, grid.ys)
    pred = ens.predict(torch.tensor(np.stack([gx.ravel(), gy.ravel()], 1)), samples=state.samples)
    np.testing.assert_allclose(grid.probs.reshape(-1, 2), pred.probs.numpy(), atol=1e-6)
    np.testing.assert_allclose(grid.values.ravel(), pred.epistemic.numpy(), atol=1e-6)
    assert grid.xs[0] == pytest.approx(BOUNDS[0][0]) and grid.ys[-1] == pytest.approx(BOUNDS[1][1])
    entropy = live.compute_view(ens, replace(state, layer="entropy"), bounds=BOUNDS).grid
    np.testing.assert_allclose(entropy.values.ravel(), pred.total.numpy(), atol=1e-6)
    assert entropy.value_max == pytest.approx(np.log(2))


def test_member_boundaries_lie_on_that_members_tie(ens, state):
    view = live.compute_view(ens, state, bounds=BOUNDS)
    grid = view.grid
    assert grid.members_drawn == (0, 2, 3)  # evenly spread over the attacker's 4 members
    assert grid.segments.shape[0] > 0
    for member in grid.members_drawn:
        ends = grid.segments[grid.segment_member == member]
        if ends.size == 0:  # this random member's boundary misses the box
            continue
        points = torch.tensor(np.concatenate([ends[:, :2], ends[:, 2:]]))
        probs = torch.softmax(ens.module(member)(points), -1).detach().numpy()
        # linear interpolation on a 16x16 grid: ties hold to the field's curvature over one cell
        assert np.abs(probs[:, 1] - probs[:, 0]).max() < 0.05


def test_cache_recomputes_only_what_a_change_touches(ens, state):
    cache = live.ViewCache()
    first = live.compute_view(ens, state, bounds=BOUNDS, cache=cache)
    assert {"point", "grid_prediction", "grid"} <= set(first.recomputed)
    moved_budget = live.compute_view(ens, replace(state, budget=0.3), bounds=BOUNDS, cache=cache)
    assert not {"point", "grid_prediction", "grid", "fade"} & set(moved_budget.recomputed)
    assert moved_budget.grid is first.grid
    new_layer = live.compute_view(ens, replace(state, layer="entropy"), bounds=BOUNDS, cache=cache)
    assert "grid" in new_layer.recomputed and "grid_prediction" not in new_layer.recomputed
    new_samples = live.compute_view(ens, replace(state, samples=5), bounds=BOUNDS, cache=cache)
    assert {"grid_prediction", "grid"} <= set(new_samples.recomputed) and "point" not in new_samples.recomputed
    again = live.compute_view(ens, state, bounds=BOUNDS, cache=cache)
    assert again.recomputed == ()


def test_samples_none_resolves_to_every_member(ens, state):
    view = live.compute_view(ens, replace(state, samples=None), bounds=BOUNDS)
    assert view.state.samples == len(ens)


@pytest.mark.parametrize("field, value, message", [
    ("point", (float("nan"), 0.0), r"point must hold only finite floats"),
    ("point", (1.0,), r"point must have 2 coordinates; got 1"),
    ("point", "ab", r"point must be a sequence of finite floats"),
    ("budget", -0.1, r"budget must be a finite float >= 0; got -0.1"),
    ("budget", float("inf"), r"budget must be a finite float >= 0; got inf"),
    ("samples", 0, r"samples must be an integer in \[1, 6\]; got 0"),
    ("samples", 7, r"samples must be an integer in \[1, 6\]; got 7"),
    ("method", "laser", r"method must be one of 'fgsm', 'pgd', 'cw', 'spsa', 'square'; got 'laser'"),
    ("norm", "1", r"norm must be one of 'inf', '2'; got '1'"),
    ("steps", 0, r"steps must be an integer in \[1, 10000\]; got 0"),
    ("layer", "heat", r"layer must be one of 'predictive', 'epistemic', 'entropy', 'certified'; got 'heat'"),
    ("objective", "max", r"objective must be one of 'expected_loss', 'predictive', 'margin'; got 'max'"),
])
def test_bad_fields_name_field_rule_and_value(ens, state, field, value, message):
    with pytest.raises(ValueError, match=message):
        live.check_field(ens, field, value, n_features=2)
    if field != "point" or len(value) != 1:
        with pytest.raises(ValueError, match=message.split(";")[0]):
            live.compute_view(ens, replace(state, **{field: value}), bounds=BOUNDS)


def test_state_type_and_bounds_are_checked(ens, state):
    with pytest.raises(ValueError, match="state must be an ExplorerState"):
        live.compute_view(ens, {"point": (0, 0)})
    with pytest.raises(ValueError, match="bounds must be two arrays of 2 values with lo < hi"):
        live.compute_view(ens, state, bounds=([1.0, 1.0], [0.0, 2.0]))


def test_image_inputs_skip_the_map():
    ens = tiny_ensemble(members=3, in_features=64, classes=10, hidden=(8,))
    view = live.compute_view(ens, live.ExplorerState(point=tuple(np.linspace(0, 1, 64)), grid=0))
    assert view.grid is None and view.before.probs.shape == (10,)
    assert view.classes == [str(c) for c in range(10)]


def test_attack_panel_matches_jostle_attack(ens, state):
    view = live.compute_view(ens, state, bounds=BOUNDS)
    x = torch.tensor([state.point])
    adv = jostle.attack(ens, x, y=torch.tensor([view.label]), method=state.method, eps=state.budget,
                        norm=state.norm, steps=state.steps, samples=state.samples, objective=state.objective,
                        seed=state.seed)
    np.testing.assert_allclose(view.attack.x_adv, adv.x_adv[0].numpy(), atol=1e-6)
    np.testing.assert_allclose(view.attack.path, adv.path[:, 0].numpy(), atol=1e-6)
    np.testing.assert_allclose(view.attack.loss, adv.loss[:, 0].numpy(), atol=1e-6)
    assert view.attack.success == bool(adv.success[0])
    after = ens.predict(adv.x_adv)
    np.testing.assert_allclose(view.after.probs, after.probs[0].numpy(), atol=1e-6)
    np.testing.assert_allclose(view.attack.label_prob[-1], after.probs[0, view.label].item(), atol=1e-6)
    assert view.attack.distance <= state.budget + 1e-6  # PGD stays in the eps-ball (Madry et al. 2018)


def test_fade_panel_matches_gradient_fade_and_expected_gradient(ens, state):
    view = live.compute_view(ens, state, bounds=BOUNDS)
    fade = view.fade
    assert fade.counts.tolist() == [1, 2, 4, 6]
    x, y = torch.tensor([state.point]), torch.tensor([view.label])
    direct = jostle.gradient_fade(ens, x, y, sample_counts=[1, 2, 4, 6], repeats=state.fade_repeats, seed=state.seed)
    np.testing.assert_allclose(fade.norm_mean, direct.norm_mean["l2"], rtol=1e-6)
    # with every member the subset is the whole ensemble: the expected gradient itself
    full = jostle.expected_gradient(ens, x, y)
    assert fade.norm_mean[-1] == pytest.approx(float(full.norm()), rel=1e-4)
    assert fade.norm_low[-1] == pytest.approx(fade.norm_high[-1], rel=1e-6)
    # one sample: the mean over random single members of their own gradient norms
    singles = [float(jostle.expected_gradient(ens, x, y, samples=[m]).norm()) for m in range(len(ens))]
    assert min(singles) - 1e-6 <= fade.norm_low[0] and fade.norm_high[0] <= max(singles) + 1e-6
    assert np.all(fade.norm_low <= fade.norm_mean + 1e-12) and np.all(fade.norm_mean <= fade.norm_high + 1e-12)
    np.testing.assert_allclose(fade.reference, fade.norm_mean[0] / np.sqrt(fade.counts), rtol=1e-6)


def test_the_live_engine_imports_no_widget_library():
    import subprocess
    import sys

    code = ("import sys, jostle.live; bad = [m for m in sys.modules if m.split('.')[0] in "
            "('ipywidgets', 'traitlets', 'anywidget', 'bqplot', 'comm', 'ipykernel')]; print(bad); "
            "sys.exit(1 if bad else 0)")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stdout + done.stderr


def test_attack_panel_without_the_path_predictive_is_the_same_attack(ens, state):
    full = live.compute_view(ens, state, bounds=BOUNDS)
    lean = live.compute_view(ens, replace(state, path_probs=False), bounds=BOUNDS)
    # the same seeded attack on the same inputs in one process: the same arithmetic, bit for bit
    np.testing.assert_array_equal(lean.attack.x_adv, full.attack.x_adv)
    np.testing.assert_array_equal(lean.attack.loss, full.attack.loss)
    assert np.isnan(lean.attack.label_prob).all() and lean.attack.label_prob.shape == full.attack.label_prob.shape
    with pytest.raises(ValueError, match="path_probs must be True or False; got 1"):
        live.check_field(ens, "path_probs", 1)


def test_the_certified_read_out_comes_after_the_rest_of_the_view(ens, state):
    seen = []
    view = live.compute_view(ens, replace(state, certificate="ibp", radius=False), bounds=BOUNDS,
                             on_panels=seen.append)
    assert len(seen) == 1 and seen[0].budget_certificate is None and seen[0].attack is view.attack
    x = torch.tensor([state.point])
    cert = jostle.certify(ens[: state.samples], x, eps=state.budget, method="ibp",
                          bounds=tuple(torch.tensor(b, dtype=ens.dtype) for b in BOUNDS))
    assert view.budget_certificate.certified == int(cert.members[:, 0].sum())  # integer count
    assert "budget_certificate" in view.recomputed and "budget_certificate" not in seen[0].recomputed
    seen.clear()
    live.compute_view(ens, replace(state, certificate="off"), bounds=BOUNDS, on_panels=seen.append)
    assert seen == []  # nothing to wait for: the view is the whole view
