"""Regenerate the posteriors shipped in kernel_side/data/ (the first tour's leak alarm).

    .venv/bin/python scripts/make_demo_posteriors.py            # write kernel_side/data/*.safetensors
    .venv/bin/python scripts/make_demo_posteriors.py --check    # refit and compare with the shipped files

Every fit is seeded and runs on one CPU thread, so the same torch build on the same CPU
gives the same parameters bit for bit. Another torch version or CPU model rounds some
reductions differently, and a few hundred training or sampling steps carry that drift
beyond the last bit; ``--check`` therefore reports the largest parameter difference
against a tolerance scaled by the parameters' size, and whether the refit predicts the
test points the same way (labels equal, probabilities within 1e-5). It fails on either.
"""
from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path
from typing import NamedTuple

import torch

import jostle

ROOT = Path(__file__).resolve().parents[1]
DATA_DIR = ROOT / "kernel_side" / "data"
SEED = 0
ARCHITECTURE = {"in_features": 2, "classes": 2, "hidden": (16, 16), "activation": "tanh"}
RECIPES = {
    "leak_alarm_map": {"fit": "fit_map", "settings": {"epochs": 200, "lr": 0.01, "weight_decay": 1e-4}},
    "leak_alarm_hmc": {"fit": "fit_hmc", "settings": {"samples": 100, "chains": 4, "warmup": 200,
                                                      "prior_std": 1.0, "target_accept": 0.8}},
}


def make(name: str, out_dir: Path) -> Path:
    """Fit one shipped posterior from its recipe and save it under ``out_dir``."""
    recipe = RECIPES[name]
    data = jostle.datasets.leak_alarm()
    net = jostle.mlp(**ARCHITECTURE)
    fit = getattr(jostle, recipe["fit"])
    ens = fit(net, data, seed=SEED, progress=False, **recipe["settings"])
    path = out_dir / f"{name}.safetensors"
    demo = {"name": name, "script": "scripts/make_demo_posteriors.py", "fit": recipe["fit"],
            "settings": recipe["settings"], "seed": SEED, "data": "jostle.datasets.leak_alarm()",
            "torch": torch.__version__}
    ens.save(str(path), extra_meta={"demo": demo})
    return path


# float32 eps (1.2e-7) x ~100: the drift that rounding a few reductions differently leaves
# after the recipes' ~1400 Adam steps or 300 HMC transitions when it is not amplified
# (training contracts towards the mode; the chains take the same accept decisions),
# relative to the largest parameter, because rounding is relative to the values rounded.
PARAMETER_RTOL = 1e-5
# The shipped and refitted posteriors must predict the test points alike: the figures and
# the tours read predictions, not parameters.
PROBABILITY_ATOL = 1e-5


class Comparison(NamedTuple):
    """How a refit differs from the shipped file."""

    parameter_difference: float  # largest absolute parameter difference
    parameter_tolerance: float  # PARAMETER_RTOL x max(1, largest |shipped parameter|)
    labels_equal: bool  # same predicted label on every test point
    probability_difference: float  # largest absolute difference of predictive probabilities

    @property
    def ok(self) -> bool:
        return (self.parameter_difference <= self.parameter_tolerance and self.labels_equal
                and self.probability_difference <= PROBABILITY_ATOL)

    def __str__(self) -> str:
        return (f"largest parameter difference {self.parameter_difference:.3g} "
                f"(tolerance {self.parameter_tolerance:.3g}); test labels "
                f"{'equal' if self.labels_equal else 'DIFFER'}; largest probability difference "
                f"{self.probability_difference:.3g} (tolerance {PROBABILITY_ATOL:g})")


def compare(name: str, fresh: Path) -> Comparison:
    """Parameters and test-set predictions of a refit against the shipped file."""
    shipped = jostle.load(DATA_DIR / f"{name}.safetensors")
    again = jostle.load(fresh)
    difference = max(float((shipped.params[k] - again.params[k]).abs().max()) for k in shipped.params)
    scale = max(float(v.abs().max()) for v in shipped.params.values())
    x_test = jostle.datasets.leak_alarm().x_test
    with torch.no_grad():
        want, got = shipped.predict(x_test), again.predict(x_test)
    return Comparison(difference, PARAMETER_RTOL * max(1.0, scale), bool(torch.equal(want.label, got.label)),
                      float((want.probs - got.probs).abs().max()))


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--check", action="store_true", help="refit into a scratch folder and compare")
    parser.add_argument("--only", choices=sorted(RECIPES), help="one posterior instead of all")
    args = parser.parse_args(argv)
    torch.set_num_threads(1)
    names = [args.only] if args.only else sorted(RECIPES)
    failed = False
    with tempfile.TemporaryDirectory() as scratch:
        out_dir = Path(scratch) if args.check else DATA_DIR
        out_dir.mkdir(parents=True, exist_ok=True)
        for name in names:
            started = time.perf_counter()
            path = make(name, out_dir)
            line = f"{name}: {path.stat().st_size / 1024:.0f} KiB in {time.perf_counter() - started:.0f} s"
            if args.check:
                comparison = compare(name, path)
                failed = failed or not comparison.ok
                line += f"; against the shipped file: {comparison}"
            print(line)
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
