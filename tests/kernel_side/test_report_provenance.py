"""jostle.report's provenance record and drawing: what the report says about a posterior."""
from __future__ import annotations

import math

import numpy as np
import pytest
import torch

import jostle
from jostle.report import posterior_sha256, provenance
from jostle.report.document import state_json
from jostle.report.drawing import Drawing


def test_provenance_of_the_shipped_hmc_posterior_carries_its_diagnostics():
    ens = jostle.demo_posterior("leak_alarm_hmc")
    record = provenance(ens)
    assert record["method"] == "hmc" and record["members"] == len(ens) == 100
    assert record["parameters_per_member"] == ens.num_parameters
    assert record["description"] == jostle.describe(ens)
    diagnostics = ens.meta["diagnostics"]
    assert record["diagnostics"]["divergences"] == diagnostics["divergences"]
    assert record["diagnostics"]["accept_rate"] == diagnostics["accept_rate"]  # JSON-ready copies: exact
    assert record["torch_version"] == torch.__version__
    assert record["posterior_sha256"] == posterior_sha256(ens)
    assert record["drawn_from"].startswith("stored draws")


def test_hash_changes_with_any_parameter_and_refuses_other_values():
    ens = jostle.demo_posterior("leak_alarm_hmc")
    first = posterior_sha256(ens)
    assert posterior_sha256(ens[:50]) != first  # fewer members
    name = sorted(ens.params)[0]
    changed = {k: v.clone() for k, v in ens.params.items()}
    changed[name].view(-1)[0] = torch.nextafter(changed[name].view(-1)[0], torch.tensor(math.inf))  # one ulp
    assert posterior_sha256(jostle.Ensemble(ens.template, changed, ens.meta)) != first
    with pytest.raises(ValueError, match="ens must be a jostle.Ensemble; got dict"):
        posterior_sha256({})


def test_state_json_is_strict_and_cannot_close_a_script_element():
    text = state_json({"name": "</script><script>alert(1)</script>", "x": float("nan"), "y": np.float32(0.5),
                       "line": "a\u2028b"})
    assert "<" not in text and ">" not in text and "\u2028" not in text
    assert "NaN" not in text and '"x": null' in text and '"y": 0.5' in text


def test_svg_text_is_escaped_and_png_is_the_same_size_twice_over():
    d = Drawing(40, 30, label='a "quoted" <label>')
    d.text(5, 20, "<b>&</b>")
    d.line([(0, 0), (40, 30)], "#ee7733", dash=(4, 3))
    svg = d.svg()
    assert "<b>" not in svg and "&lt;b&gt;&amp;&lt;/b&gt;" in svg
    assert 'aria-label="a &quot;quoted&quot; &lt;label&gt;"' in svg
    from io import BytesIO

    from PIL import Image

    with Image.open(BytesIO(d.png())) as image:
        assert image.size == (80, 60)
        pixels = np.asarray(image.convert("RGB")).reshape(-1, 3)
    assert (pixels == (238, 119, 51)).all(-1).any()  # the orange line is drawn
