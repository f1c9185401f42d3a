"""What the expected-gradient read-out adds to a sweep run's evaluation, at the sizes of
examples/leak_alarm_limit.toml: 200 test readings scored, 100 attacked by FGSM and PGD-20 at two
budgets, read-out at S = 1, 4, 16, 64 and all. Target: at most 20% of the rest of the evaluation.

Both are timed side by side, interleaved, on one thread (as a sweep run is). The members are
random networks of the study's shapes (1, 8 and 100 members of a 2-w-2 tanh net), because the
cost of a forward or backward pass depends on the shapes, not on the fitted values.
"""
from __future__ import annotations

from pathlib import Path

import torch
from _timing import interleaved, median

import jostle
from jostle.common.threads import torch_threads
from jostle.sweeps.one_run import evaluate, gradient_readout, load_run_data
from jostle.sweeps.spec import gradient_sample_counts

EXAMPLE = Path(__file__).resolve().parents[1] / "examples" / "leak_alarm_limit.toml"
MEMBERS = (1, 8, 100)  # MAP, the deep ensemble, HMC in the example
WIDTHS = (4, 64, 256)


def random_ensemble(members: int, width: int) -> jostle.Ensemble:
    torch.manual_seed(members * 1000 + width)
    modules = [jostle.mlp(2, 2, hidden=(width,), activation="tanh") for _ in range(members)]
    return jostle.Ensemble.from_modules(modules)


def main() -> None:
    config = jostle.Sweep.from_toml(EXAMPLE).runs()[0]
    evaluation = config["evaluation"]
    data = load_run_data(config["data"])
    x = data.x_test[:evaluation["points"]]
    print(f"{'members':>7} {'width':>5} {'evaluation ms':>13} {'read-out ms':>11} {'added %':>8}")
    with torch_threads(1):
        for members in MEMBERS:
            for width in WIDTHS:
                ens = random_ensemble(members, width)
                counts = gradient_sample_counts(evaluation, members)
                times = interleaved({
                    "evaluation": lambda ens=ens: evaluate(ens, data, evaluation, seed=0),
                    "readout": lambda ens=ens, counts=counts: gradient_readout(ens, x, None, counts, seed=0),
                }, repeats=7, warmup=1)
                whole, readout = median(times["evaluation"]), median(times["readout"])
                rest = whole - readout  # evaluate() includes the read-out
                print(f"{members:>7} {width:>5} {1e3 * rest:>13.1f} {1e3 * readout:>11.2f} "
                      f"{100 * readout / rest:>7.1f}%", flush=True)
    print("(medians of 7 interleaved rounds, one thread; 'evaluation' is the rest of evaluate(): "
          "metrics on 200 readings and the attacks; target: added % <= 20)")


if __name__ == "__main__":
    main()
