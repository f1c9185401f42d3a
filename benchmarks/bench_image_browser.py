"""ImageExplorer latency in a real browser: from a budget change to the image panels redrawn.

JupyterLab and headless Chromium (as in tests/browser) run an ImageExplorer over S = 100
members of the default CNN ``jostle.cnn((1, 28, 28), 10)`` (seeded random members: the
latency, not the fit, is measured) on the 28x28 meter cards, PGD 40 steps on one image.
Each action moves the budget slider to a value not used before (so the view cache never
answers); it is timed in the page from the slider's ``input`` event to the first animation
frame where the panels show the kernel's new view (``image-panels-root``'s
``data-view-revision`` past the one before, the kernel's counter of views sent). The widget
draws the panels and charts before its members-certified-at-the-budget line (``auto``: IBP for
a convolutional network); the time until that line is done too (the status line idle again)
is the second row.

Beside them: the kernel's own compute time for the whole update (the status line's
"updated in N ms"), and the panels' paints per view. Then,
in this process, what a budget change costs the kernel by part, candidates interleaved round
after round: the view's attack part (what the widget's worker runs), and within it the attack
itself and the predictive along its recorded path (the Explorer's path chart reads it; the
ImageExplorer draws no path); and the members-certified-at-the-budget read-out by each bound
method; CROWN, which the widget uses for networks without convolutions, would take many
minutes at this size (the last line: one member).
"""
from __future__ import annotations

import time

from _browser_timing import CHROMIUM, arm, lab_page, slider_grid, time_actions  # puts the repository on sys.path
from _timing import interleaved, median, percentile

from tests.browser.image_page import IMAGES, PANELS_JS, panels, wait_for_image_explorer

MEMBERS = 100
STEPS = 40
REPEATS = 11
TARGET_MS = 300.0
SETUP = f'''import torch, jostle

cards = jostle.datasets.meter_cards(resolution=28)
generator = torch.Generator().manual_seed(0)
nets = [jostle.init_parameters(jostle.cnn((1, 28, 28), 10), generator).eval() for _ in range({MEMBERS})]
ens = jostle.Ensemble.from_modules(nets)'''
NOTEBOOK = [
    SETUP,
    f'''from jostle.widgets import ImageExplorer

images = ImageExplorer(ens, cards, strip=8, steps={STEPS}, budget=0.1)
images''',
]
_DESCRIBE_JS = f"""([before, fields]) => {{ const s = ({PANELS_JS})({IMAGES!r});
  return s && {{viewRevision: s.viewRevision, status: s.status, statusText: s.statusText, budget: s.budget}}; }}"""


def main() -> None:
    if not CHROMIUM.is_file():
        print(f"skipped: headless Chromium is not installed at {CHROMIUM}")
        return
    timed, budgets, draws, last = _measure()
    # The panels show the last budget's attack: PGD iterates stay in the L-inf ball (Madry et al. 2018).
    if not (float(last["budget"]) == budgets[-1] and 0 < last["maxAbs"] <= budgets[-1] + 1e-6):
        raise AssertionError(f"the panels do not show the last budget {budgets[-1]}: {last}")
    browser = [d["ms"] for d in timed]
    idle = [d["idleMs"] for d in timed]
    kernel = [d["kernelMs"] for d in timed if d["kernelMs"] is not None]
    verdict = "met" if median(browser) <= TARGET_MS else "MISSED"
    print(f"S = {MEMBERS} x jostle.cnn((1, 28, 28), 10), meter cards 28x28, PGD {STEPS} steps, "
          f"certificate auto (IBP); {REPEATS} timed budget changes, in JupyterLab + Chromium")
    _row("budget -> panels redrawn", browser, f"target <= {TARGET_MS:.0f} ms {verdict}")
    _row("budget -> certificate line too (status idle)", idle)
    if kernel:
        _row("  kernel compute, whole update (status line)", kernel)
    print(f"{'  panel paints per view (data-revision steps)':46s} median {median(draws):7.0f}")
    print("kernel parts of one budget change, in this process:")
    for name, ms in _kernel_parts(budgets):
        print(f"  {name:60s} {ms:9.0f} ms", flush=True)


def _row(name: str, values: list[float], note: str = "") -> None:
    print(f"{name:46s} median {median(values):7.0f} ms   p90 {percentile(values, 90):7.0f} ms   {note}".rstrip())


def _measure() -> tuple[list[dict], list[float], list[float], dict]:
    with lab_page(NOTEBOOK, timeout=300) as page:
        wait_for_image_explorer(page, timeout=600)
        slider = f"{IMAGES} [data-testid=budget-slider]"
        arm(page, [(slider, "input")])
        budgets = slider_grid(page, "budget-slider", REPEATS + 2, start=20, scope=IMAGES)
        shown = iter(budgets)
        revisions: list[dict] = []

        def before() -> dict:
            revisions.append(panels(page))
            return revisions[-1]

        def act() -> None:
            page.locator(slider).first.fill(str(next(shown)))

        timed = time_actions(page, act, before, f"({PANELS_JS})({IMAGES!r})", ["budget"], repeats=REPEATS,
                             timeout=120, describe=_DESCRIBE_JS, drawn_first=True)
        last = panels(page)
        revisions.append(last)
    draws = [b["revision"] - a["revision"] for a, b in zip(revisions, revisions[1:])]
    return timed, budgets, draws, last


def _kernel_parts(used: list[float]) -> list[tuple[str, float]]:
    """Each part of a budget change timed alone, candidates interleaved round after round."""
    import numpy as np
    import torch

    import jostle
    import jostle.live.engine as live
    from jostle.live.certified_parts import budget_certificate_part
    from jostle.live.view_parts import attack_part

    space: dict = {}
    exec(SETUP, space)  # the notebook's own set-up cell: the same members as in the browser
    ens, cards = space["ens"], space["cards"]
    point = tuple(cards.x_test[0].double().tolist())
    box = tuple(np.asarray(b, dtype=float) for b in cards.bounds)
    budget = used[-1]
    state = live.ExplorerState(point=point, budget=budget, samples=MEMBERS, steps=STEPS, grid=0, boundaries=0,
                               radius=False, certificate="off", path_probs=False)
    view = live.compute_view(ens, state, bounds=box)
    x = torch.as_tensor(np.asarray(point)[None], dtype=ens.dtype)
    label = torch.tensor([view.label])
    path = torch.as_tensor(view.attack.path, dtype=ens.dtype)

    times = interleaved({
        f"the view's attack part (PGD {STEPS}, S = {MEMBERS})": lambda: attack_part(ens, state, view.label),
        "  in it: jostle.attack, path recorded": lambda: jostle.attack(ens, x, label, eps=budget, steps=STEPS),
        f"  the 2-D explorer's predictive along the path ({path.shape[0]} points)": lambda: ens.predict(path),
    }, repeats=5, warmup=1)
    rows = [(f"{name}, median of 5", median(values) * 1e3) for name, values in times.items()]
    for method, samples in (("ibp", MEMBERS), ("crown", 1)):
        started = time.perf_counter()
        budget_certificate_part(ens, point, budget, "inf", samples, method, box)
        rows.append((f"certificate {method.upper()} at the budget, {samples} member{'s' * (samples > 1)}",
                     (time.perf_counter() - started) * 1e3))
    return rows


if __name__ == "__main__":
    main()
