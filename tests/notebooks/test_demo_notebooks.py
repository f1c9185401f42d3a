"""The demo notebooks run top to bottom in a fresh kernel of this Python, within a time budget.

Each notebook is executed with nbclient in a kernel whose kernelspec names ``sys.executable``
(the venv jostle is installed in), the way ``jostle demo`` starts its kernels. Besides
"no error", each run is checked for outputs that show the notebook did its job: widgets were
created, the masking verdict was printed, the round trip through a file was exact.

Also here: the fresh-clone contract. The README's two set-up commands are the ones the
Makefile defines and CI runs.
"""
from __future__ import annotations

import json
import re
import sys
import time
from pathlib import Path

import pytest

nbformat = pytest.importorskip("nbformat")
nbclient = pytest.importorskip("nbclient")

ROOT = Path(__file__).resolve().parents[2]
NOTEBOOK_DIR = ROOT / "demo_notebooks"
WIDGET_MIME = "application/vnd.jupyter.widget-view+json"

#: wall-time budget per notebook in seconds; they take 20-40 s on a loaded 2-core machine
#: (07, the convolutional one, 40-65 s: two CNN fits, the explorer and attacks on 150 cards),
#: and CI runs them on 2 cores, so the budget leaves room for a slower machine but would
#: catch a notebook that grew a long fit
BUDGET_S = 120

#: notebook -> (widget class names that must be displayed, texts that must appear in the outputs)
EXPECTED = {
    "01_first_tour.ipynb": (["Comparison"], ["failed checks: none", "far from any data", "PGD success at eps",
                                             "flipped readings above the clean 90th percentile"]),
    "02_fading_gradient.ipynb": (["Figure", "Explorer"], ["log-log slope of the norm", "fade chart at",
                                                         "Attack results are empirical evidence"]),
    "03_meter_cards.ipynb": (["ImageExplorer", "GradientComponents"],
                             ["deep ensemble S = 5", "PGD success at eps 0.0625",
                              "deterministic net S = 1: median L-inf"]),
    "04_robustness_vs_accuracy.ipynb": (["SweepExplorer"], ["finished=6, failed=0", "Explorer opened with budget 0.2",
                                                           "Pearson r"]),
    "05_bring_your_own.ipynb": (["Explorer"], ["from_modules and from_state_dicts agree: True",
                                              "identical predictions after loading: True"]),
    "06_limit_study.ipynb": (["SweepExplorer"], ["finished=8, failed=0", "hmc: median L2 norm, all members",
                                                "12 of 12 cells have a run", "Explorer opened"]),
    "07_scanned_cards_cnn.ipynb": (["ImageExplorer"], [
        "deep ensemble PGD success at eps 0.05 / 0.1 / 0.2", "week_48_cards.npz",
        # the npz file holds bytes; the loader divides them by 255 in float32, which the
        # notebook repeats: exact work, so the check is bit equality
        "npz round trip: 120 cards loaded, each identical to a saved card and with its reading: True",
        # the same network, weights and inputs in one process: exact
        "loaded posterior gives identical logits: True",
        "clean cards of the batch above the flag level"]),
}

#: notebook -> (pattern with one number, the least value it may print, why that floor)
FLOORS = {
    "07_scanned_cards_cnn.ipynb": [
        # Ten classes (chance 0.10). Linear and nearest-neighbour classifiers read the 8x8
        # originals at about 0.95 or better (from memory: scikit-learn's digits examples);
        # measured here 0.968 at 2 threads. Thread counts change float reduction order, not
        # accuracy by 7 points: below 0.90 the fit did not learn.
        (r"deep ensemble S = 5: test accuracy (\d\.\d+)", 0.90),
        (r"deterministic S = 1: test accuracy (\d\.\d+)", 0.90),
        # 120 of the same test cards as bytes (measured 0.967): at a true accuracy of 0.95 the
        # binomial standard deviation over 120 cards is 0.02, so 0.85 is 5 of them below
        (r"your batch: accuracy against the clerks' readings (\d\.\d+)", 0.85),
        # Storing as bytes moves each pixel by at most 1/510 = 0.002, sixteen times less than the
        # 8/255 PGD budget, which changes about one reading in ten (measured 120 of 120 agree):
        # more than 6 changed readings would mean the loader altered the cards.
        (r"the 8-bit scans get the float cards' reading on (\d+) of 120", 114),
    ],
}

CAUTION = re.compile(r"empirical evidence, not a\s+(?:>\s*)?certificate")


def _notebooks() -> list[str]:
    return sorted(p.name for p in NOTEBOOK_DIR.glob("*.ipynb"))


def test_every_shipped_notebook_is_covered():
    assert _notebooks() == sorted(EXPECTED)


@pytest.mark.parametrize("name", sorted(EXPECTED))
def test_notebook_is_well_formed_and_carries_the_caution(name):
    nb = nbformat.read(NOTEBOOK_DIR / name, as_version=4)
    nbformat.validate(nb)
    # Without kernelspec metadata JupyterLab opens a kernel-choice dialog (DESIGN.md, browser notes).
    assert nb.metadata["kernelspec"]["name"] == "python3"
    markdown = "\n".join(c.source for c in nb.cells if c.cell_type == "markdown")
    assert CAUTION.search(markdown), "the attack-results caution is missing"
    assert "standards and regulation" in markdown
    assert nb.cells[0].cell_type == "markdown" and nb.cells[0].source.startswith("# ")
    # Shipped clean: outputs come from running it, not from a stored run.
    assert all(not c.get("outputs") for c in nb.cells if c.cell_type == "code")


@pytest.fixture(scope="module")
def this_python_kernel(tmp_path_factory):
    """A ``python3`` kernelspec that runs ``sys.executable``, first on JUPYTER_PATH."""
    base = tmp_path_factory.mktemp("kernels")
    spec_dir = base / "kernels" / "python3"
    spec_dir.mkdir(parents=True)
    spec = {"argv": [sys.executable, "-m", "ipykernel_launcher", "-f", "{connection_file}"],
            "display_name": "Python 3 (jostle tests)", "language": "python"}
    (spec_dir / "kernel.json").write_text(json.dumps(spec), encoding="utf-8")
    return base


@pytest.mark.slow
@pytest.mark.parametrize("name", sorted(EXPECTED))
def test_notebook_runs_within_budget(name, this_python_kernel, tmp_path, monkeypatch):
    monkeypatch.setenv("JUPYTER_PATH", str(this_python_kernel))
    nb = nbformat.read(NOTEBOOK_DIR / name, as_version=4)
    client = nbclient.NotebookClient(nb, timeout=BUDGET_S, kernel_name="python3",
                                     resources={"metadata": {"path": str(tmp_path)}})
    started = time.perf_counter()
    client.execute()
    elapsed = time.perf_counter() - started
    assert elapsed < BUDGET_S, f"{name} took {elapsed:.0f} s; budget {BUDGET_S} s"

    widgets, texts = EXPECTED[name]
    code_cells = [c for c in nb.cells if c.cell_type == "code"]
    for k, cell in enumerate(code_cells):
        assert cell.outputs, f"code cell {k} of {name} shows nothing"
    plain = "\n".join(_output_text(c) for c in code_cells)
    for text in texts:
        assert text in plain, f"{text!r} missing from the outputs of {name}"
    for pattern, floor in FLOORS.get(name, []):
        found = re.search(pattern, plain)
        assert found, f"{pattern!r} missing from the outputs of {name}"
        assert float(found.group(1)) >= floor, f"{name} printed {found.group(0)!r}; the floor is {floor}"
    displayed = [o for c in code_cells for o in c.outputs if WIDGET_MIME in o.get("data", {})]
    shown = " ".join(o["data"].get("text/plain", "") for o in displayed)
    for widget in widgets:
        assert re.search(rf"\b{widget}\(", shown), f"{widget} was not displayed by {name}"
    stderr = "\n".join(o.text for c in code_cells for o in c.outputs
                       if o.output_type == "stream" and o.name == "stderr")
    assert "Warning" not in stderr, f"{name} printed a warning:\n{stderr}"


def _output_text(cell) -> str:
    parts = []
    for output in cell.outputs:
        if output.output_type == "stream":
            parts.append(output.text)
        elif "data" in output:
            parts.append(output["data"].get("text/plain", ""))
    return "\n".join(parts)


# ---------------------------------------------------------------------------- fresh clone
def _readme_commands() -> list[str]:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text.split("## Two commands", 1)[1]
    block = re.search(r"```\n(.*?)```", section, re.S).group(1)
    return [line.split("#", 1)[0].strip() for line in block.splitlines() if line.strip()]


def test_readme_opens_with_the_job_paragraph_then_the_two_commands():
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    headings = re.findall(r"^## .*$", text, re.M)
    assert headings[0] == "## Two commands"
    first_paragraph = text.split("\n\n")[1]
    assert first_paragraph.startswith("Researchers and ML engineers")
    assert _readme_commands() == ["make demo", "make test"]


def test_readme_commands_are_the_makefile_targets_ci_runs():
    makefile = (ROOT / "Makefile").read_text(encoding="utf-8")
    # each target's whole recipe: the tab-indented lines under it
    targets = {name: recipe for name, recipe in re.findall(r"^([a-z]+):[^\n=]*\n((?:\t[^\n]*\n?)+)", makefile, re.M)}
    assert targets["demo"].strip().endswith("jostle demo")
    assert "pytest" in targets["test"] and "ruff check" in targets["test"] and "lint-imports" in targets["test"]
    ci = (ROOT / ".ci" / "run").read_text(encoding="utf-8")
    ci_commands = [line.strip() for line in ci.splitlines() if line.strip() and not line.lstrip().startswith("#")]
    assert ci_commands[-1] == "make test", "CI must end by running the README's test command"
    for command in _readme_commands():
        assert command.split()[1] in targets
