"""Posterior fits: stacked deep-ensemble training against one-by-one, and a quality table.

1. Ten members of a 2-32-32-2 tanh MLP on moons, trained together as stacked parameters
   (fit_deep_ensemble) against ten fit_map runs one after another with the same seeds and
   epochs. Target: together >= 3x faster. Rounds alternate so load swings hit both alike.
2. Accuracy, NLL and ECE (15 bins) of every method on the digits test split.
"""
from __future__ import annotations

import time

from _timing import interleaved, median

import jostle

MEMBERS = 10
EPOCHS = 30
TARGET = 3.0


def _together(data):
    return jostle.fit_deep_ensemble(jostle.mlp(2, 2, hidden=(32, 32)), data, members=MEMBERS, epochs=EPOCHS,
                                    seed=0, progress=False)


def _one_by_one(data):
    return [jostle.fit_map(jostle.mlp(2, 2, hidden=(32, 32)), data, epochs=EPOCHS, seed=m, progress=False)
            for m in range(MEMBERS)]


def speed_table() -> float:
    data = jostle.datasets.moons(noise=0.2, seed=0)
    times = interleaved({"together": lambda: _together(data), "one by one": lambda: _one_by_one(data)},
                        repeats=3, warmup=1)
    together, alone = median(times["together"]), median(times["one by one"])
    ratio = alone / together
    print(f"deep ensemble, {MEMBERS} members of 2-32-32-2, moons 300 points, {EPOCHS} epochs, batch 32")
    print(f"{'way':<12} {'median s':>9}")
    print(f"{'together':<12} {together:>9.3f}")
    print(f"{'one by one':<12} {alone:>9.3f}")
    print(f"speed-up {ratio:.1f}x (target >= {TARGET:.0f}x): {'met' if ratio >= TARGET else 'MISSED'}")
    return ratio


def quality_table() -> None:
    data = jostle.datasets.digits(seed=0)
    settings = dict(epochs=50, seed=0, progress=False)
    fits = {
        "map": lambda net: jostle.fit_map(net, data, **settings),
        "deep_ensemble": lambda net: jostle.fit_deep_ensemble(net, data, members=10, **settings),
        "dropout": lambda net: jostle.fit_dropout(net, data, p=0.1, samples=100, **settings),
        "vi": lambda net: jostle.fit_vi(net, data, samples=100, **settings),
        "vi (kl 1)": lambda net: jostle.fit_vi(net, data, samples=100, kl_weight=1.0, **settings),
        "laplace": lambda net: jostle.fit_laplace(net, data, samples=100, **settings),
    }
    print(f"\ndigits ({data.x_train.shape[0]} train, {data.x_test.shape[0]} test), MLP 64-64-10 tanh, 50 epochs")
    print(f"{'method':<14} {'S':>4} {'accuracy':>9} {'NLL':>7} {'ECE':>7} {'fit s':>7}")
    for name, fit in fits.items():
        started = time.perf_counter()
        ens = fit(jostle.mlp(64, 10, hidden=(64,)))
        seconds = time.perf_counter() - started
        probs = ens.predict(data.x_test).probs.double()
        probs = probs / probs.sum(1, keepdim=True)
        acc = jostle.metrics.accuracy(probs, data.y_test)
        nll = jostle.metrics.nll(probs, data.y_test)
        ece = jostle.metrics.ece(probs, data.y_test)
        print(f"{name:<14} {len(ens):>4} {acc:>9.4f} {nll:>7.4f} {ece:>7.4f} {seconds:>7.2f}")


def main() -> None:
    speed_table()
    quality_table()


if __name__ == "__main__":
    main()
