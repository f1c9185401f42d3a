"""SweepExplorer model: filters, per-family correlations against scipy.stats, run selection."""
from __future__ import annotations

import numpy as np
import pytest
import traitlets
from scipy import stats

import jostle
from jostle.sweeps.results_db import RunStore
from jostle.sweeps.spec import run_key
from jostle.widgets._wire import from_wire
from jostle.widgets.sweep_explorer import SweepExplorer

BUDGETS = [0.1, 0.2]
SWEEP = jostle.Sweep(
    datasets=[{"name": "moons", "n_test": 20}], methods=["map", "deep_ensemble", "vi"],
    architectures=[{"depth": 1, "width": 4}], train_sizes=[20], seeds=list(range(5)),
    evaluation={"budgets": BUDGETS, "points": 5,
                "attacks": [{"method": "fgsm"}, {"method": "pgd", "steps": 3}]},
)


def _fake_record(config, rng):
    """A finished-run record with seeded made-up scores (demo data for the chart only)."""
    accuracy = float(rng.uniform(0.6, 1.0))
    attacks = [{"attack": a["label"], "method": a["method"], "norm": a["norm"], "steps": a["steps"],
                "samples": a["samples"], "budget": b, "success_rate": float(rng.uniform()),
                "robustness": float(np.clip(accuracy - b + rng.normal(0, 0.05), 0, 1))}
               for a in config["evaluation"]["attacks"] for b in config["evaluation"]["budgets"]]
    return {"key": run_key(config), "config": config, "status": "ok", "error": None, "traceback": None,
            "metrics": {"accuracy": accuracy, "nll": 0.4, "ece": 0.05, "members": 1, "attacks": attacks},
            "versions": {}, "ensemble_bytes": None}


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    path = tmp_path_factory.mktemp("sweep") / "runs.sqlite"
    rng = np.random.default_rng(7)
    with RunStore(path) as db:
        for config in SWEEP.runs():
            db.record(_fake_record(config, rng))
    return path


def _expected(store, methods, attack, budget, family, measure="robustness"):
    with RunStore(store, readonly=True) as db:
        frame = db.results()
    rows = frame[(frame.attack == attack) & (frame.budget == budget) & frame.method.isin(methods)
                 & (frame.family == family)]
    y = rows.robustness if measure == "robustness" else 1 - rows.success_rate
    return rows.accuracy.to_numpy(), y.to_numpy()


def test_starts_with_every_method_and_the_first_attack_and_budget(store):
    w = SweepExplorer(store)
    assert w.methods == ["deep_ensemble", "map", "vi"]
    assert (w.attack, w.budget) == ("fgsm-inf", 0.1)
    assert len(w.chart.point_keys) == 15
    family = from_wire(w.chart.family)
    assert family.sum() == 10  # deep_ensemble and vi are Bayesian, map deterministic
    assert w.chart.budget_options == BUDGETS


def test_correlations_match_scipy(store):
    w = SweepExplorer(store)
    w.attack, w.budget = "pgd-inf", 0.2
    by_family = {c.family: c for c in w.correlations}
    for family in ("deterministic", "Bayesian"):
        x, y = _expected(store, w.methods, "pgd-inf", 0.2, family)
        ref_p, ref_s = stats.pearsonr(x, y), stats.spearmanr(x, y)  # scipy.stats as the reference
        got = by_family[family]
        assert got.n == len(x)
        # same formulas on the same float64 data: agreement to rounding
        np.testing.assert_allclose([got.pearson_r, got.spearman_rho], [ref_p.statistic, ref_s.statistic], rtol=1e-12)
        if len(x) > 8:  # scipy's t approximation
            np.testing.assert_allclose([got.pearson_p, got.spearman_p], [ref_p.pvalue, ref_s.pvalue], rtol=1e-12)
        else:  # 5 deterministic runs: exact permutation p (scipy.stats.permutation_test enumerates all 5!)
            exact = [
                stats.permutation_test(
                    (y,), lambda yy, corr=corr, x=x: corr(x, yy).statistic,
                    permutation_type="pairings", n_resamples=120, vectorized=False,
                ).pvalue
                for corr in (stats.pearsonr, stats.spearmanr)
            ]
            np.testing.assert_allclose([got.pearson_p, got.spearman_p], exact, atol=1e-12)  # counts / 120
    assert w.chart.correlations[0][:2] == ["deterministic", "5"] and w.chart.correlations[0][6] == "exact permutation"
    assert w.chart.correlations[1][:2] == ["Bayesian", "10"] and w.chart.correlations[1][6] == "t approximation"


def test_method_filter_and_measure(store):
    w = SweepExplorer(store)
    w.methods = ["vi", "map"]
    assert w.methods == ["map", "vi"]
    assert len(w.points.keys) == 10 and set(w.points.methods) == {"map", "vi"}
    w.measure = "unflipped"
    x, y = _expected(store, ["vi"], "fgsm-inf", 0.1, "Bayesian", measure="unflipped")
    bayes = w.points.family == 1
    np.testing.assert_allclose(np.sort(w.points.value[bayes]), np.sort(y))
    np.testing.assert_allclose(np.sort(from_wire(w.chart.value)[bayes]), np.sort(y))
    assert w.chart.y_title.startswith("share of points")


def test_too_few_runs_give_no_correlation(store):
    w = SweepExplorer(store)
    w.methods = ["map"]
    bayes = [c for c in w.correlations if c.family == "Bayesian"][0]
    assert bayes.n == 0 and np.isnan(bayes.pearson_r)
    assert w.chart.correlations[1][2:] == ["n too small"] * 5


def test_three_runs_show_their_coefficients_but_say_n_too_small_for_p(tmp_path):
    # For n = 3 the exact two-sided permutation p of a perfect rank order is 2/3! = 1/3 (Pitman 1937);
    # an asymptotic p near 0 would mislead, so the table gives none.
    path = tmp_path / "three.sqlite"
    sweep = jostle.Sweep(datasets=[{"name": "moons", "n_test": 20}], methods=["map"],
                         architectures=[{"depth": 1, "width": 4}], train_sizes=[20], seeds=[0, 1, 2],
                         evaluation={"budgets": [0.1], "points": 5, "attacks": [{"method": "fgsm"}]})
    rng = np.random.default_rng(3)
    with RunStore(path) as db:
        for config in sweep.runs():
            db.record(_fake_record(config, rng))
    row = SweepExplorer(path).chart.correlations[0]
    assert row[:2] == ["deterministic", "3"]
    assert row[2] not in ("n/a", "n too small") and row[4] not in ("n/a", "n too small")
    assert row[3] == row[5] == row[6] == "n too small"


def _is_round(step: float) -> bool:
    # 1, 2 or 5 times a power of ten (common practice for axis ticks)
    mantissa = step / 10.0 ** np.floor(np.log10(step))
    return any(abs(mantissa - m) < 1e-9 for m in (1.0, 2.0, 5.0))


def test_sweep_chart_axes_tick_at_round_numbers_inside_their_domain(store):
    w = SweepExplorer(store)
    for measure in ("robustness", "unflipped"):
        w.measure = measure
        for axis, values in ((w.chart.x_axis, w.points.accuracy), (w.chart.y_axis, w.points.value)):
            ticks = np.array(axis["ticks"])
            assert 2 <= len(ticks) <= 7
            assert axis["low"] <= values.min() and values.max() <= axis["high"]
            assert 0.0 <= axis["low"] and axis["high"] <= 1.0
            assert ticks.min() >= axis["low"] - 1e-12 and ticks.max() <= axis["high"] + 1e-12
            steps = np.diff(ticks)
            assert np.allclose(steps, steps[0], rtol=1e-9) and _is_round(float(steps[0]))
            # each tick a whole multiple of the step (to the rounding of k * step)
            assert np.allclose(ticks / steps[0], np.round(ticks / steps[0]), atol=1e-9)
            assert axis["labels"] == [f"{t:.{max(0, -int(np.floor(np.log10(steps[0]))))}f}" for t in ticks]


def test_bad_choices_are_refused(store):
    w = SweepExplorer(store)
    with pytest.raises(traitlets.TraitError, match=r"budget must be one of \[0.1, 0.2\].*got 0.5"):
        w.budget = 0.5
    with pytest.raises(traitlets.TraitError, match=r"methods must be among .*got 'hmc'"):
        w.methods = ["hmc"]
    with pytest.raises(traitlets.TraitError, match=r"attack must be one of .*got 'cw-inf'"):
        w.attack = "cw-inf"
    with pytest.raises(traitlets.TraitError, match=r"measure must be one of .*got 'speed'"):
        w.measure = "speed"
    with pytest.raises(traitlets.TraitError, match=r"selected_key must be '' or the key of a stored run"):
        w.selected_key = "abc"


def test_a_bad_choice_from_the_view_snaps_back(store):
    w = SweepExplorer(store)
    w.chart.budget = 0.7  # as if the browser sent it
    assert w.budget == 0.1 and w.chart.budget == 0.1
    assert "budget must be one of" in w.chart.note
    w.chart.methods = ["map"]
    assert w.methods == ["map"] and len(w.chart.point_keys) == 5


def test_hover_notes_describe_the_configuration(store):
    w = SweepExplorer(store)
    note = w.chart.point_notes[0]
    config = SWEEP.runs()[0]
    assert w.chart.point_keys[0] == run_key(config)
    assert "map" in note and "moons n_train=20" in note and "seed 0" in note and "fgsm-inf eps=0.1" in note


def test_clicking_a_run_without_a_saved_ensemble_says_so(store):
    w = SweepExplorer(store)
    key = w.chart.point_keys[3]
    w.chart.selected_key = key  # a click in the view
    assert w.selected_key == key
    assert "not saved" in w.detail_title.value and w.opened is None
    w.selected_key = ""
    assert w.detail.children == (w.detail_title,)


def test_sweep_source_limits_to_its_runs(store):
    subset = jostle.Sweep(
        datasets=[{"name": "moons", "n_test": 20}], methods=["map"], architectures=[{"depth": 1, "width": 4}],
        train_sizes=[20], seeds=[0, 1], evaluation=SWEEP.runs()[0]["evaluation"], store=store,
    )
    w = SweepExplorer(subset)
    assert len(w.chart.point_keys) == 2


def test_clicking_a_saved_run_opens_an_explorer_beside_the_chart(tmp_path):
    from jostle.sweeps.one_run import fit_run
    from jostle.widgets import Explorer as explorer_class  # a lost export fails here, it never skips
    small = jostle.Sweep(
        datasets=[{"name": "moons", "n_test": 20}], methods=[{"name": "map", "epochs": 2}],
        architectures=[{"depth": 1, "width": 4}], train_sizes=[20], seeds=[0, 1],
        evaluation={"budgets": [0.2], "points": 5, "attacks": [{"method": "pgd", "steps": 3}]},
    )
    path = tmp_path / "runs.sqlite"
    rng = np.random.default_rng(0)
    with RunStore(path) as db:
        for i, config in enumerate(small.runs()):
            record = _fake_record(config, rng)
            if i == 0:  # only the first run keeps its fitted ensemble
                ens, _ = fit_run(config)
                ens.save(str(tmp_path / "post.safetensors"))
                record["ensemble_bytes"] = (tmp_path / "post.safetensors").read_bytes()
            db.record(record)
    w = SweepExplorer(path)
    saved, unsaved = small.keys()
    w.chart.selected_key = saved
    try:
        assert isinstance(w.opened, explorer_class)
        assert w.detail.children == (w.detail_title, w.opened)
        assert (w.opened.budget, w.opened.method, w.opened.steps) == (0.2, "pgd", 3)  # the chart's attack
        first = w.opened
        w.selected_key = unsaved
        assert w.opened is None and "not saved" in w.detail_title.value
        assert first.comm is None  # the replaced explorer was closed
    finally:
        w.selected_key = ""


def test_chart_module_is_self_contained_and_sets_text_only():
    import re
    from pathlib import Path

    from jostle.widgets._assets import asset_path
    from jostle.widgets.sweep_chart import SweepChart

    source = str(SweepChart._esm)  # as served: the shared helpers, then the chart's own module
    own = asset_path("sweep_chart.js").read_text(encoding="utf-8")
    assert re.search(r"^export default \{ render \};$", source, re.M)
    assert not re.search(r"^\s*import\s", source, re.M)  # no CDN or relative imports, no build step
    # run descriptions and method names are user strings: no HTML-parsing sinks (common practice, OWASP DOM XSS)
    for sink in ("innerHTML", "outerHTML", "insertAdjacentHTML", "document.write", "eval(", "new Function"):
        assert sink not in source
    assert len(own.splitlines()) <= 250
    ids = set(re.findall(r'"(sweep-[a-z-]+)"', source))
    widget_source = (Path(__file__).parents[2] / "widgets" / "sweep_explorer.py").read_text()
    ids |= set(re.findall(r'jostle-tid-(sweep-[a-z-]+)"', widget_source))
    assert {"sweep-chart", "sweep-point", "sweep-tooltip", "sweep-method-filter", "sweep-explorer"} <= ids
    listed = set(re.findall(r"`([a-z][a-z0-9-]+)`", (Path(__file__).parents[2] / "widgets" / "TESTIDS.md").read_text()))
    assert ids <= listed, sorted(ids - listed)
    css = asset_path("sweep_chart.css").read_text()
    rules = re.sub(r"/\*.*?\*/", "", css, flags=re.S)
    for selector in re.findall(r"(?:^|\})\s*([^{}]+)\{", rules):
        assert all(part.strip().startswith(".jostle-") for part in selector.split(",")), selector


def test_a_store_with_no_finished_runs_shows_an_empty_chart(tmp_path):
    path = tmp_path / "runs.sqlite"
    with RunStore(path) as db:
        record = _fake_record(SWEEP.runs()[0], np.random.default_rng(0))
        db.record({**record, "status": "failed", "metrics": None, "error": "ValueError: bad"})
    w = SweepExplorer(path)
    assert w.points is None and w.chart.point_keys == [] and w.methods == []
    assert w.chart.note == "No finished runs in this store yet."
    with pytest.raises(FileNotFoundError, match=r"store does not exist: .*nowhere\.sqlite"):
        SweepExplorer(tmp_path / "nowhere.sqlite")


def test_a_saved_digits_run_opens_an_image_explorer(tmp_path):
    from jostle.widgets import ImageExplorer as image_explorer  # a lost export fails, never skips
    digits = jostle.Sweep(
        datasets=[{"name": "digits"}], methods=[{"name": "map", "epochs": 1}],
        architectures=[{"depth": 1, "width": 8}], train_sizes=[60], seeds=[0],
        evaluation={"budgets": [0.0625], "points": 5, "attacks": [{"method": "fgsm"}]},
        store=tmp_path / "runs.sqlite",
    )
    assert digits.run(save_ensembles=True, progress_bar=False).finished == 1
    w = SweepExplorer(digits)
    w.selected_key = digits.keys()[0]
    try:
        assert isinstance(w.opened, image_explorer)
        assert (w.opened.budget, w.opened.method) == (0.0625, "fgsm")
    finally:
        w.selected_key = ""
