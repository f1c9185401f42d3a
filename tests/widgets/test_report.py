"""Reports of the explorers: the numbers equal the live view, user text is escaped, the file is
self-contained and written atomically, and from_report restores only the same posterior."""
from __future__ import annotations

import hashlib
import html
import json
import re
import xml.etree.ElementTree as ET
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

import jostle
import jostle.files.posterior_file as posterior_file
from jostle.report import palette as report_palette
from jostle.report import posterior_sha256, read_report_state
from jostle.widgets import Comparison, Explorer, ImageExplorer
from jostle.widgets import _palette as widget_palette

from .conftest import tiny_ensemble

EVIL_CLASS = "<script>alert(1)</script>"
EVIL_DATA = "moons</script><img src=x onerror=alert(2)>"


class Tables(HTMLParser):
    """Rows of every table with a data-testid, as lists of cell texts (entities decoded)."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tables: dict[str, list[list[str]]] = {}
        self._current = self._row = self._cell = None
        self.script_tags = 0
        self.images: list[str] = []

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag == "script":
            self.script_tags += 1
        if tag == "image":
            self.images.append(attrs.get("href", ""))
        if tag == "table" and "data-testid" in attrs:
            self._current = self.tables.setdefault(attrs["data-testid"], [])
        elif tag == "tr" and self._current is not None:
            self._row = []
            self._current.append(self._row)
        elif tag in ("td", "th") and self._row is not None:
            self._cell = []

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._cell is not None:
            self._row.append("".join(self._cell))
            self._cell = None
        elif tag == "table":
            self._current = self._row = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)


def _tables(path: Path) -> Tables:
    parser = Tables()
    parser.feed(path.read_text(encoding="utf-8"))
    return parser


@pytest.fixture(scope="module")
def evil_moons():
    base = jostle.datasets.moons(n_train=40, n_test=10, noise=0.2, seed=0)
    return jostle.datasets.from_arrays(base.x_train, base.y_train, base.x_test, base.y_test,
                                       classes=[EVIL_CLASS, "b & c"], name=EVIL_DATA, bounds=base.bounds)


@pytest.fixture(scope="module")
def explorer(evil_moons):
    ens = tiny_ensemble(class_names=evil_moons.classes)
    ex = Explorer(ens, evil_moons, steps=6, grid=24, budget=0.3)
    assert ex.wait(60)
    yield ex
    ex.close()


@pytest.fixture(scope="module")
def report(explorer, tmp_path_factory):
    return explorer.report(tmp_path_factory.mktemp("report") / "finding.html")


def test_embedded_numbers_equal_the_live_view(explorer, report):
    state = read_report_state(report)
    assert state["kind"] == "explorer" and len(state["entries"]) == 1
    entry, view = state["entries"][0], explorer.result
    numbers = entry["view"]
    # JSON writes each float's shortest round-trip repr, so the float32 values come back exactly
    for name in ("probs", "lower", "upper"):
        np.testing.assert_array_equal(np.asarray(numbers["before"][name], dtype=view.before.probs.dtype),
                                      getattr(view.before, name))
        np.testing.assert_array_equal(np.asarray(numbers["after"][name], dtype=view.after.probs.dtype),
                                      getattr(view.after, name))
    assert numbers["label"] == view.label and numbers["classes"] == view.classes
    assert numbers["attack"]["success"] == view.attack.success
    assert numbers["attack"]["distance"] == view.attack.distance
    np.testing.assert_array_equal(np.asarray(numbers["attack"]["path"], dtype=view.attack.path.dtype),
                                  view.attack.path)
    np.testing.assert_array_equal(np.asarray(numbers["fade"]["norm_mean"], dtype=view.fade.norm_mean.dtype),
                                  view.fade.norm_mean)
    assert entry["state"]["point"] == list(explorer.point) and entry["state"]["budget"] == explorer.budget
    assert entry["state"]["samples"] == explorer.samples and entry["state"]["method"] == explorer.method


def test_visible_text_shows_the_live_numbers(explorer, report):
    tables, view = _tables(report).tables, explorer.result
    rows = tables["report-predictive"][1:]
    assert [r[0] for r in rows] == view.classes  # entities decoded: the class name as written
    for c, row in enumerate(rows):
        # shown to 4 decimals: within half a unit of the last place (plus float32 rounding)
        assert abs(float(row[1]) - float(view.before.probs[c])) <= 5e-5 + 1e-7
        assert abs(float(row[2]) - float(view.before.lower[c])) <= 5e-5 + 1e-7
        assert abs(float(row[4]) - float(view.after.probs[c])) <= 5e-5 + 1e-7
    settings = dict(tables["report-settings"])
    assert settings["method"] == "pgd" and float(settings["budget (eps)"]) == 0.3
    assert settings["norm"] == "L-inf" and settings["steps"] == "6" and settings["seed"] == "0"
    assert settings["attacker samples"] == str(explorer.samples) and settings["objective"] == "expected_loss"
    summary = dict(tables["report-summary"])
    assert summary["attack flipped the prediction"] == ("yes" if view.attack.success else "no")
    assert abs(float(summary["distance moved"]) - view.attack.distance) <= 5e-5
    provenance = dict(tables["report-provenance"])
    assert provenance["posterior sha256"] == posterior_sha256(explorer._ens)
    assert provenance["posterior samples S"] == str(len(explorer._ens))
    assert provenance["torch version"] == __import__("torch").__version__


def test_user_text_is_escaped_and_cannot_leave_the_state_element(report):
    text = report.read_text(encoding="utf-8")
    assert EVIL_CLASS not in text and "<img src=x" not in text
    assert html.escape(EVIL_CLASS) in text and html.escape(EVIL_DATA) in text
    parser = _tables(report)
    assert parser.script_tags == 1  # only the inert application/json element
    assert text.count("</script>") == 1
    state = read_report_state(report)
    assert state["entries"][0]["view"]["classes"][0] == EVIL_CLASS
    assert EVIL_DATA in state["entries"][0]["heading"]


def test_the_file_is_self_contained(report):
    text = report.read_text(encoding="utf-8")
    assert "<link" not in text and "url(" not in text and "@import" not in text
    assert not re.search(r"<script[^>]*\ssrc=", text)
    assert not re.search(r"(?:src|href)=\"(?!data:|#)", text)  # every src/href is an inline data: URI
    assert "default-src 'none'" in text  # the page itself refuses to fetch anything
    views = re.findall(r'<figure data-view="([a-z]+)">', text)
    assert views == ["map", "predictive", "spread", "path", "fade"]
    assert "not certificates" in text and "standards and regulation" in text


def test_report_palette_is_the_live_palette():
    assert report_palette.CLASS_COLOURS == widget_palette.CLASS_COLOURS
    assert report_palette.ATTACK_COLOUR == widget_palette.ATTACK_COLOUR
    assert report_palette.INPUT_COLOUR == widget_palette.INPUT_COLOUR
    css = jostle.widgets.read_asset("theme.css")
    for k, colour in enumerate(report_palette.CLASS_COLOURS):
        assert f"--jostle-class-{k}: {colour};" in css
    for name, colour in (("uncertain", report_palette.UNCERTAIN_COLOUR), ("attack", report_palette.ATTACK_COLOUR),
                         ("diverge-low", report_palette.DIVERGE_LOW), ("diverge-high", report_palette.DIVERGE_HIGH)):
        assert f"--jostle-{name}: {colour}" in css
    assert f"--jp-ui-font-color1, {report_palette.INK})" in css
    assert f"--jp-layout-color1, {report_palette.SURFACE})" in css


def test_round_trip_restores_the_same_view(explorer, report, evil_moons):
    restored = Explorer.from_report(report, explorer._ens, evil_moons)
    try:
        assert restored.wait(60)
        assert restored.point == explorer.point and restored.budget == explorer.budget
        for name in ("method", "norm", "steps", "objective", "samples", "layer"):
            assert getattr(restored, name) == getattr(explorer, name)
        # same ensemble, state and seed in one process: the same kernels on the same input
        assert restored.result.state == explorer.result.state
        np.testing.assert_array_equal(restored.result.after.probs, explorer.result.after.probs)
        np.testing.assert_array_equal(restored.result.attack.path, explorer.result.attack.path)
    finally:
        restored.close()


def test_from_report_refuses_another_posterior(explorer, report, evil_moons):
    other = tiny_ensemble(seed=1, class_names=evil_moons.classes)
    with pytest.raises(ValueError, match=r"ens must be the posterior the report .* was made with: "
                                         r"its parameters' sha256 is [0-9a-f]{16}\.\.\., the report's is"):
        Explorer.from_report(report, other, evil_moons)
    with pytest.raises(ValueError, match=r"path must be a report of image_explorer"):
        ImageExplorer.from_report(report, explorer._ens, evil_moons)


def test_read_report_state_refuses_other_files_without_running_them(tmp_path):
    page = tmp_path / "page.html"
    page.write_text("<html><script>throw 1</script></html>", encoding="utf-8")
    with pytest.raises(ValueError, match="holds no jostle report state"):
        read_report_state(page)
    page.write_text('<script type="application/json" id="jostle-state">{"format": </script>', encoding="utf-8")
    with pytest.raises(ValueError, match="the embedded report state is not valid JSON"):
        read_report_state(page)
    with pytest.raises(ValueError, match="path must be an existing jostle report file; got"):
        read_report_state(tmp_path / "missing.html")


def test_report_is_written_atomically(explorer, tmp_path, monkeypatch):
    target = tmp_path / "finding.html"
    target.write_text("previous report", encoding="utf-8")

    def fail(src, dst):
        raise OSError("disk full")

    monkeypatch.setattr(posterior_file.os, "replace", fail)
    with pytest.raises(OSError, match="disk full"):
        explorer.report(target)
    assert target.read_text(encoding="utf-8") == "previous report"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["finding.html"]  # no temporary file left
    monkeypatch.undo()
    explorer.report(target)
    assert read_report_state(target)["kind"] == "explorer"


def test_figures_as_svg_and_png(explorer, tmp_path):
    for name in ("map", "predictive", "spread", "path", "fade"):
        svg = explorer.figure(name, tmp_path / f"{name}.svg")
        root = ET.parse(svg).getroot()
        assert root.tag == "{http://www.w3.org/2000/svg}svg"
        png = explorer.figure(name, tmp_path / f"{name}.png")
        with Image.open(png) as image:
            # Pillow draws at twice the SVG's CSS pixel size
            assert image.size == (2 * int(root.get("width")), 2 * int(root.get("height")))
            pixels = np.asarray(image.convert("RGB"))
        assert len(np.unique(pixels.reshape(-1, 3), axis=0)) > 8  # something is drawn, not a blank canvas
    with pytest.raises(ValueError, match=r"name must be one of \['map', 'predictive', 'spread', 'path', "
                                         r"'fade'\]; got 'pie'"):
        explorer.figure("pie", tmp_path / "pie.svg")
    with pytest.raises(ValueError, match=r"path must end in .svg or .png; got '.*view.gif'"):
        explorer.figure("map", tmp_path / "view.gif")


def test_posterior_hash_is_of_the_parameters_in_canonical_order(explorer, tmp_path):
    ens = explorer._ens
    digest = hashlib.sha256()  # the documented byte order, rebuilt with numpy
    for name in sorted(ens.params):
        value = ens.params[name].numpy()
        digest.update(f"{name}\0{ens.params[name].dtype}\0{tuple(value.shape)}\0".encode())
        digest.update(np.ascontiguousarray(value).astype(value.dtype.newbyteorder("<")).tobytes())
    assert posterior_sha256(ens) == digest.hexdigest()
    ens.save(str(tmp_path / "post.safetensors"))
    assert posterior_sha256(jostle.load(str(tmp_path / "post.safetensors"))) == digest.hexdigest()


@pytest.fixture(scope="module")
def digits():
    return jostle.datasets.digits(seed=0)


def test_image_report_round_trip_and_refusals(digits, tmp_path):
    ens = tiny_ensemble(members=4, in_features=64, classes=10, hidden=(8,), class_names=digits.classes)
    ex = ImageExplorer(ens, digits, strip=6, steps=4, budget=0.2, index=2)
    try:
        assert ex.wait(60)
        path = ex.report(tmp_path / "digit.html")
        parser = _tables(path)
        text = path.read_text(encoding="utf-8")
        assert re.findall(r'<figure data-view="([a-z]+)">', text) == [
            "original", "perturbation", "attacked", "predictive", "fade"]
        assert len(parser.images) == 3 and all(h.startswith("data:image/png;base64,") for h in parser.images)
        assert ex.result.budget_certificate is not None  # members certified at the budget, with its caution
        assert ex.result.budget_certificate.words in html.unescape(text)
        entry = read_report_state(path)["entries"][0]
        np.testing.assert_array_equal(np.asarray(entry["view"]["attack"]["x_adv"], dtype=ex.result.attack.x_adv.dtype),
                                      ex.result.attack.x_adv)
        restored = ImageExplorer.from_report(path, ens, digits)
        try:
            assert restored.wait(60) and restored.index == 2 and restored.result.state == ex.result.state
        finally:
            restored.close()
        shuffled = jostle.datasets.from_arrays(digits.x_train, digits.y_train, digits.x_test.flip(0),
                                               digits.y_test.flip(0), classes=digits.classes,
                                               image_shape=digits.image_shape, bounds=digits.bounds)
        with pytest.raises(ValueError, match="data must be the data set the report .* its test image 2 differs"):
            ImageExplorer.from_report(path, ens, shuffled)
        png = ex.figure("perturbation", tmp_path / "delta.png")
        with Image.open(png) as image:
            assert image.size == (360, 408)
    finally:
        ex.close()


def test_comparison_report_has_one_section_per_column_and_round_trips(moons, tmp_path):
    a, b = tiny_ensemble(seed=3), tiny_ensemble(members=1, seed=4)
    cmp = Comparison([a, b], moons, labels=["six <members>", "one"], steps=3, grid=16)
    try:
        assert cmp.wait(60)
        path = cmp.report(tmp_path / "compare.html")
        state = read_report_state(path)
        assert [e["column"] for e in state["entries"]] == ["six <members>", "one"]
        assert [e["posterior_sha256"] for e in state["entries"]] == [posterior_sha256(a), posterior_sha256(b)]
        assert "six &lt;members&gt;" in path.read_text(encoding="utf-8")
        restored = Comparison.from_report(path, [a, b], moons)
        try:
            assert restored.wait(60) and restored.used_samples() == cmp.used_samples()
            assert [e.result.state for e in restored.explorers] == [e.result.state for e in cmp.explorers]
        finally:
            restored.close()
        with pytest.raises(ValueError, match=r"ensembles\[0\] must be the posterior the report"):
            Comparison.from_report(path, [b, a], moons)
        with pytest.raises(ValueError, match="ensembles must hold the report's 2 posteriors; got 1"):
            Comparison.from_report(path, [a], moons)
    finally:
        cmp.close()


def test_explorer_report_state_json_is_strict(report):
    raw = re.search(r'<script type="application/json" id="jostle-state">(.*?)</script>',
                    report.read_text(encoding="utf-8"), re.S).group(1)
    assert "<" not in raw and ">" not in raw  # written as \u003c / \u003e
    json.loads(raw, parse_constant=lambda name: pytest.fail(f"non-strict JSON constant {name}"))


def test_the_certified_radius_of_the_live_view_is_drawn_and_written(explorer, report):
    from jostle.report.charts import map_drawing
    from jostle.report.explorer_report import certified_radius_of

    view = explorer.result
    assert view.radius is not None, "the Explorer computes the CROWN radius at the picked input"
    assert certified_radius_of(view) == view.radius.radius
    bounds = explorer._bounds
    plain = map_drawing(view, bounds).svg()
    certified = map_drawing(view, bounds, certified_radius=0.1).svg()
    assert report_palette.CERTIFIED_COLOUR not in plain
    assert certified.count(f'stroke="{report_palette.CERTIFIED_COLOUR}"') == 1
    text = html.unescape(report.read_text(encoding="utf-8"))
    assert f"{view.radius.radius:.4f}" in text and view.radius.words in text
    assert view.radius.caution in text  # the caution stands beside the certified read-out


def test_settings_the_attack_refuses_still_give_a_report(evil_moons, tmp_path):
    ens = tiny_ensemble(class_names=evil_moons.classes)
    ex = Explorer(ens, evil_moons, method="cw", norm="inf", steps=3, grid=16)
    try:
        assert ex.wait(60) and ex.result.attack is None
        path = ex.report(tmp_path / "refused.html")
        summary = dict(_tables(path).tables["report-summary"])
        assert "norm must be one of ['2'] for method 'cw'; got 'inf'" in summary["note: 1"]
        assert "no attack for these settings" in path.read_text(encoding="utf-8")
        assert read_report_state(path)["entries"][0]["view"]["errors"] == ex.result.errors
    finally:
        ex.close()
