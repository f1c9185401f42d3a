"""Shared fixtures. Every test is seeded and runs on the CPU."""
from __future__ import annotations

import os

import pytest
import torch
from hypothesis import settings

os.environ.setdefault("OMP_NUM_THREADS", "2")

# Under CI the property tests draw the same examples on every run and machine (a failure
# there is reproducible from the log); elsewhere they explore new examples each run.
settings.register_profile("ci", derandomize=True, database=None, print_blob=True)
if os.environ.get("CI"):
    settings.load_profile("ci")


def pytest_configure(config):
    # JOSTLE_TEST_THREADS=1 runs the whole suite with torch on one thread; the suite must
    # pass both ways, since the thread count changes the order of float reductions.
    threads = os.environ.get("JOSTLE_TEST_THREADS")
    if threads:
        if not threads.isdigit() or int(threads) < 1:
            raise pytest.UsageError(f"JOSTLE_TEST_THREADS must be an integer >= 1; got {threads!r}")
        torch.set_num_threads(int(threads))


@pytest.fixture
def generator() -> torch.Generator:
    return torch.Generator().manual_seed(1234)


def random_mlp_ensemble(members: int = 5, in_features: int = 2, classes: int = 3, hidden=(8, 8),
                        activation: str = "tanh", seed: int = 0):
    import jostle

    g = torch.Generator().manual_seed(seed)
    nets = [jostle.init_parameters(jostle.mlp(in_features, classes, hidden=hidden, activation=activation), g)
            for _ in range(members)]
    return jostle.Ensemble.from_modules(nets), nets


def random_sign(problem, steps: int = 1, record_path: bool = True):
    """A tiny test attack: one random corner of the L-inf ball (queries the predictive once)."""
    from jostle.attacks.outcome import finish

    signs = torch.randint(0, 2, tuple(problem.x.shape), generator=problem.generator) * 2 - 1
    x_adv = problem.project(problem.x + problem.eps_b * signs.to(problem.x))
    with torch.no_grad():
        loss = torch.stack([problem.objective(problem.x), problem.objective(x_adv)])
    path = torch.stack([problem.x, x_adv]) if record_path else None
    return finish(problem, x_adv, path, loss, torch.full((problem.points,), 2, dtype=torch.long), "random_sign")


@pytest.fixture
def random_sign_attack():
    """Registers ``random_sign`` (gradient-free, L-inf only) for one test, then removes it."""
    import jostle

    jostle.register_attack("random_sign", norms=("inf",), objectives=("margin", "expected_loss"),
                           gradient_free=True, description="one random corner of the L-inf ball",
                           function=random_sign)
    try:
        yield "random_sign"
    finally:
        jostle.unregister_attack("random_sign")
