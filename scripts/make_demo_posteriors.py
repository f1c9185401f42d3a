"""Regenerate the posteriors shipped in kernel_side/data/ (the first tour's leak alarm).

    .venv/bin/python scripts/make_demo_posteriors.py            # write kernel_side/data/*.safetensors
    .venv/bin/python scripts/make_demo_posteriors.py --check    # refit and compare with the shipped files

Every fit is seeded and runs on one CPU thread, so the same torch build gives the same
parameters bit for bit (another torch version or CPU may differ in the last bits; the
check then reports the largest difference).
"""
from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

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


def compare(name: str, fresh: Path) -> float:
    """Largest absolute parameter difference between a refit and the shipped file."""
    shipped = jostle.load(DATA_DIR / f"{name}.safetensors")
    again = jostle.load(fresh)
    return max(float((shipped.params[k] - again.params[k]).abs().max()) for k in shipped.params)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--check", action="store_true", help="refit into a scratch folder and compare")
    parser.add_argument("--only", choices=sorted(RECIPES), help="one posterior instead of all")
    args = parser.parse_args(argv)
    torch.set_num_threads(1)
    names = [args.only] if args.only else sorted(RECIPES)
    worst = 0.0
    with tempfile.TemporaryDirectory() as scratch:
        out_dir = Path(scratch) if args.check else DATA_DIR
        out_dir.mkdir(parents=True, exist_ok=True)
        for name in names:
            started = time.perf_counter()
            path = make(name, out_dir)
            line = f"{name}: {path.stat().st_size / 1024:.0f} KiB in {time.perf_counter() - started:.0f} s"
            if args.check:
                difference = compare(name, path)
                worst = max(worst, difference)
                line += f", largest difference from the shipped file {difference:.3g}"
            print(line)
    return 0 if worst == 0.0 else 1


if __name__ == "__main__":
    sys.exit(main())
