"""The planned expected-loss gradient (jostle.posterior.planned_gradient) against torch.autograd.

Reference: torch.autograd.grad of the mean over members of
``torch.nn.functional.cross_entropy`` through the same ensemble's batched forward
(``ens.logits`` on an input that requires grad), across activations, depths, class
counts (two classes, a narrow head, a wide head), image inputs, chunking over members and
points, targeted signs and threads sharing nothing.
"""
import threading

import pytest
import torch
from torch import nn

import jostle
import jostle.posterior.forward as _forward
import jostle.posterior.planned_gradient as _input_grad
from jostle.attacks.problem import build_problem
from jostle.posterior.gradients import objective_values as _objective
from jostle.posterior.planned_gradient import ExpectedLossGradient

# Hand backward vs autograd, two code paths: unit roundoff (float32 1.2e-7, float64 2.2e-16)
# x ~100 for products over up to 20 inputs, 4 hidden layers and 12 classes, with margin.
TOLERANCE = {torch.float32: 2e-5, torch.float64: 1e-11}
# member gradients, float64, two code paths: a few ulp of O(1) values, wide margin
MEMBER_TOLERANCE = {"rtol": 1e-10, "atol": 1e-12}


def _ensemble(make, members=7, seed=0, dtype=torch.float64):
    g = torch.Generator().manual_seed(seed)
    nets = []
    for _ in range(members):
        net = make()
        with torch.no_grad():
            for p in net.parameters():
                p.copy_(torch.randn(p.shape, generator=g, dtype=p.dtype) * 0.7)
        nets.append(net.to(dtype).eval())
    return jostle.Ensemble.from_modules(nets)


def _points(n, shape, dtype=torch.float64, seed=1):
    g = torch.Generator().manual_seed(seed)
    return (torch.randn((n,) + tuple(shape), generator=g) * 1.5).to(dtype)


def _labels(n, classes, seed=2):
    return torch.randint(0, classes, (n,), generator=torch.Generator().manual_seed(seed))


def _reference(ens, x, labels, sign=1.0):
    leaf = x.detach().clone().requires_grad_(True)
    logits = ens.logits(leaf)  # [S, n, C]
    members, n, classes = logits.shape
    losses = nn.functional.cross_entropy(logits.reshape(-1, classes), labels.repeat(members), reduction="none")
    value = sign * losses.view(members, n).mean(0)
    (grad,) = torch.autograd.grad(value.sum(), leaf)
    return value.detach(), grad


def _planned(ens, labels, sign=1.0, chunk_bytes=None):
    params = {k: v.detach() for k, v in ens.params.items()}
    return ExpectedLossGradient.try_build(ens._plan.steps, params, labels, sign, chunk_bytes=chunk_bytes)


def _assert_match(got, want, dtype):
    tol = TOLERANCE[dtype]
    for a, b in zip(got, want):
        assert a.shape == b.shape
        torch.testing.assert_close(a, b, rtol=tol, atol=tol * float(b.abs().max().clamp_min(1.0)))


CASES = {
    # name: (module factory, input shape, classes)
    "2d-tanh-2-classes": (lambda: jostle.mlp(2, 2, hidden=(16, 16), activation="tanh"), (2,), 2),
    "2d-relu-3-classes": (lambda: jostle.mlp(2, 3, hidden=(12,), activation="relu"), (2,), 3),
    "3d-sigmoid-deep": (lambda: jostle.mlp(3, 5, hidden=(8, 7, 6, 5), activation="sigmoid"), (3,), 5),
    "wide-input-wide-head": (lambda: jostle.mlp(20, 12, hidden=(10, 9), activation="tanh"), (20,), 12),
    "image-input": (lambda: nn.Sequential(nn.Flatten(), nn.Linear(16, 9), nn.ReLU(), nn.Linear(9, 10)), (4, 4), 10),
    "no-bias-identity-dropout": (lambda: nn.Sequential(nn.Linear(2, 6, bias=False), nn.Tanh(), nn.Identity(),
                                                       nn.Dropout(0.3), nn.Linear(6, 6), nn.Linear(6, 2, bias=False)),
                                 (2,), 2),
    "linear-then-activation-free-head": (lambda: nn.Sequential(nn.Linear(5, 4), nn.Linear(4, 4), nn.Sigmoid(),
                                                               nn.Linear(4, 3)), (5,), 3),
}


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
@pytest.mark.parametrize("case", sorted(CASES))
def test_matches_autograd(case, dtype):
    make, shape, classes = CASES[case]
    ens = _ensemble(make, dtype=dtype)
    x = _points(11, shape, dtype=dtype)
    labels = _labels(11, classes)
    kernel = _planned(ens, labels)
    assert kernel is not None
    _assert_match(kernel(x), _reference(ens, x, labels), dtype)


@pytest.mark.parametrize("chunk_bytes", [1, 300, 5_000, 2**30])
@pytest.mark.parametrize("case", ["2d-tanh-2-classes", "wide-input-wide-head", "image-input"])
def test_chunking_over_members_and_points_changes_nothing(case, chunk_bytes):
    # chunk_bytes=1 forces one member and one point per chunk; 2**30 a single chunk.
    make, shape, classes = CASES[case]
    ens = _ensemble(make)
    x = _points(9, shape)
    labels = _labels(9, classes)
    kernel = _planned(ens, labels, chunk_bytes=chunk_bytes)
    if chunk_bytes == 1:
        assert len(kernel.chunks) == len(ens) and kernel.point_chunk == 1
    if chunk_bytes == 2**30:
        assert len(kernel.chunks) == 1 and kernel.point_chunk == 9
    _assert_match(kernel(x), _reference(ens, x, labels), torch.float64)


def test_chunks_split_members_evenly():
    ens = _ensemble(CASES["2d-tanh-2-classes"][0], members=10)
    labels = _labels(5, 2)
    per_member = 5 * 16 * 8  # points x widest layer x float64 bytes
    kernel = _planned(ens, labels, chunk_bytes=4 * per_member)
    assert [chunk["k"] for chunk in kernel.chunks] == [3, 4, 3]


@pytest.mark.parametrize("case", ["2d-tanh-2-classes", "2d-relu-3-classes", "wide-input-wide-head"])
def test_targeted_sign(case):
    make, shape, classes = CASES[case]
    ens = _ensemble(make)
    x = _points(6, shape)
    labels = _labels(6, classes)
    _assert_match(_planned(ens, labels, sign=-1.0)(x), _reference(ens, x, labels, sign=-1.0), torch.float64)


def test_repeated_calls_reuse_blocks_without_touching_earlier_results():
    # The work blocks are reused; what a call returned must stay what it was.
    make, shape, classes = CASES["2d-tanh-2-classes"]
    ens = _ensemble(make)
    labels = _labels(8, classes)
    kernel = _planned(ens, labels)
    x1, x2 = _points(8, shape, seed=3), _points(8, shape, seed=4)
    first = kernel(x1)
    kept = [t.clone() for t in first]
    second = kernel(x2)
    for a, b in zip(first, kept):
        torch.testing.assert_close(a, b, rtol=0, atol=0)  # against its own clone: exact
    _assert_match(second, _reference(ens, x2, labels), torch.float64)
    _assert_match(kernel(x1), _reference(ens, x1, labels), torch.float64)


def test_two_kernels_in_one_thread_and_kernels_in_two_threads():
    # Kernels of one thread share its pool (used one at a time); other threads have their own.
    make, shape, classes = CASES["2d-relu-3-classes"]
    ens_a, ens_b = _ensemble(make, seed=5), _ensemble(make, seed=6)
    labels = _labels(10, classes)
    xs = [_points(10, shape, seed=s) for s in range(6)]
    ka, kb = _planned(ens_a, labels), _planned(ens_b, labels)
    for x in xs[:2]:
        _assert_match(ka(x), _reference(ens_a, x, labels), torch.float64)
        _assert_match(kb(x), _reference(ens_b, x, labels), torch.float64)

    failures = []

    def work(ens):
        kernel = _planned(ens, labels)
        for _ in range(20):
            for x in xs:
                try:
                    _assert_match(kernel(x), _reference(ens, x, labels), torch.float64)
                except AssertionError as error:  # pragma: no cover - reported below
                    failures.append(error)

    threads = [threading.Thread(target=work, args=(e,)) for e in (ens_a, ens_b)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not failures


@pytest.mark.parametrize("make", [
    lambda: jostle.mlp(2, 2, hidden=(6,), activation="gelu"),          # derivative needs the input
    lambda: nn.Sequential(nn.Linear(2, 4), nn.Tanh(), nn.Linear(4, 2), nn.Sigmoid()),  # ends in an activation
    lambda: nn.Sequential(nn.Linear(2, 2)),                            # a single affine layer
    lambda: nn.Sequential(nn.Linear(2, 4), nn.Tanh(), nn.ReLU(), nn.Linear(4, 2)),  # two activations in a row
])
def test_stacks_it_does_not_cover_fall_back(make):
    ens = _ensemble(make)
    assert _planned(ens, _labels(3, 2)) is None


def test_fallback_stacks_still_attack_through_autograd():
    # GELU: the gradient engine takes autograd through the batched forward; reference: autograd
    # of the cross-entropy itself (nn.functional.cross_entropy).
    ens = _ensemble(lambda: jostle.mlp(2, 2, hidden=(6,), activation="gelu"))
    assert not ens._engine.planned
    x = _points(5, (2,))
    labels = _labels(5, 2)
    problem = build_problem(ens, x, labels, eps=0.1, norm="inf", objective="expected_loss", samples=None,
                            resample=False, target=None, bounds=None, seed=0)
    _assert_match(problem.objective_and_grad(x), _reference(ens, x, labels), torch.float64)


def test_wrong_input_shape_is_named():
    ens = _ensemble(CASES["2d-tanh-2-classes"][0])
    kernel = _planned(ens, _labels(4, 2))
    with pytest.raises(ValueError, match=r"x must have shape \(4, 2\)"):
        kernel(_points(3, (2,)))


@pytest.mark.parametrize("options", [{}, {"samples": 4}, {"samples": [0, 3, 5]}, {"samples": 3, "resample": True},
                                     {"target": [1, 0, 1, 1, 0, 0]}])
def test_attack_problem_uses_the_planned_gradient_and_matches_autograd(monkeypatch, options):
    # Reference: the same problem's autograd path (backward="autograd"), same seeded member draws.
    ens = _ensemble(CASES["2d-tanh-2-classes"][0], dtype=torch.float32)
    x = _points(6, (2,), dtype=torch.float32)
    built = []
    original = ExpectedLossGradient.try_build.__func__

    def counting(cls, *args, **kwargs):
        built.append(1)
        return original(cls, *args, **kwargs)

    results = []
    monkeypatch.setattr(ExpectedLossGradient, "try_build", classmethod(counting))
    for backward in ("auto", "autograd"):
        problem = build_problem(ens, x, None, eps=0.1, norm="inf", objective="expected_loss",
                                samples=options.get("samples"), resample=options.get("resample", False),
                                target=options.get("target"), bounds=None, seed=3, backward=backward)
        results.append([problem.objective_and_grad(x + 0.01 * k) for k in range(3)])
        if backward == "auto":
            # planned once for a fixed attacker, at every evaluation when resampling
            assert len(built) == (3 if options.get("resample") else 1)
    for got, want in zip(*results):
        _assert_match(got, want, torch.float32)


def _lipschitz_bound(ens):
    # |grad_x| of the cross-entropy and of each softmax probability is at most
    # 2 max_c |grad_x logit_c| <= 2 prod_l |W_l|_2 for a stack of Linear layers and
    # 1-Lipschitz activations (ReLU); the largest member bounds the mean over members.
    norms = torch.ones(len(ens), dtype=torch.float64)
    for name, value in ens.params.items():
        if name.endswith("weight"):
            norms = norms * torch.linalg.matrix_norm(value, ord=2)
    return 2.0 * float(norms.max())


def test_pgd_iterates_equal_the_autograd_path():
    # End to end in float64: PGD, restarts, targeted, L2. Reference: the autograd path.
    ens = _ensemble(CASES["2d-relu-3-classes"][0])
    x = _points(8, (2,))
    steps = 12
    lipschitz = _lipschitz_bound(ens)
    for kwargs in ({"restarts": 2}, {"target": _labels(8, 3, seed=9)}, {"norm": "2", "eps": 0.5}):
        runs = [jostle.attack(ens, x, steps=steps, seed=4, backward=backward, **{"eps": 0.3, **kwargs})
                for backward in ("auto", "autograd")]
        if kwargs.get("norm") != "2":
            # L-inf steps are eps-scaled signs: while every gradient sign agrees (float64
            # gradients differ by ~1e-15 relative) both paths compute the same floats, and
            # one flipped sign would differ by a whole step (0.075); 1e-12 tells the two apart.
            tol = 1e-12
        else:
            # L2 steps are grad / |grad|, not signs. The projection's guard shrink (x (1 - 1e-6),
            # a radial move of 1e-6 eps) fires on a last-ulp overshoot of the budget, so one
            # path may take it at a step and the other not. At most one per step; the next
            # projection onto the sphere removes its radial part and the direction turns by
            # step x curvature << 1, so they add up to at most steps x 1e-6 x eps (6e-6 here;
            # the float64 gradients themselves differ by ~1e-15).
            tol = steps * 1e-6 * kwargs["eps"]
        torch.testing.assert_close(runs[0].x_adv, runs[1].x_adv, rtol=0, atol=tol)
        # The loss and the probabilities move by at most Lipschitz x |dx|; 1e-12 covers the two
        # paths' float64 rounding of values of order 1 (eps 2.2e-16 x a few hundred terms).
        torch.testing.assert_close(runs[0].loss, runs[1].loss, rtol=0, atol=lipschitz * tol + 1e-12)
        torch.testing.assert_close(runs[0].adv_probs, runs[1].adv_probs, rtol=0, atol=lipschitz * tol + 1e-12)
        assert torch.equal(runs[0].success, runs[1].success)


def test_chunk_budget_is_a_module_setting(monkeypatch):
    ens = _ensemble(CASES["2d-tanh-2-classes"][0], members=6)
    labels = _labels(4, 2)
    monkeypatch.setattr(_forward, "CACHE_BYTES", 4 * 16 * 8 * 2)
    assert len(_planned(ens, labels).chunks) == 3


def _reference_members(ens, x, labels, sign=1.0):
    # Reference: torch.autograd, one member at a time, on each member's own nn.Module.
    grads = []
    for i in range(len(ens)):
        leaf = x.detach().clone().requires_grad_(True)
        loss = sign * nn.functional.cross_entropy(ens.module(i)(leaf), labels, reduction="sum")
        grads.append(torch.autograd.grad(loss, leaf)[0])
    return torch.stack(grads)


@pytest.mark.parametrize("chunk_bytes", [1, 5_000, None])
@pytest.mark.parametrize("case", sorted(CASES))
def test_member_gradients_match_autograd_member_by_member(case, chunk_bytes):
    make, shape, classes = CASES[case]
    ens = _ensemble(make)
    x = _points(9, shape)
    labels = _labels(9, classes)
    for sign in (1.0, -1.0):
        got = _planned(ens, labels, sign=sign, chunk_bytes=chunk_bytes).member_gradients(x)
        want = _reference_members(ens, x, labels, sign=sign)
        assert got.shape == (len(ens), 9) + tuple(shape)
        torch.testing.assert_close(got, want, **MEMBER_TOLERANCE)


def test_member_gradients_public_function_takes_the_planned_path():
    # jostle.member_gradients: planned path and the vmap path agree (reference: vmap(grad)).
    from jostle.attacks.readouts import member_gradients

    ens = _ensemble(CASES["2d-relu-3-classes"][0])
    assert ens._engine.planned
    x = _points(10, (2,))
    labels = _labels(10, 3)
    planned = member_gradients(ens, x, labels)
    torch.testing.assert_close(planned, member_gradients(ens, x, labels, backward="autograd"), **MEMBER_TOLERANCE)


@pytest.mark.parametrize("points", [1, 2, 3])
@pytest.mark.parametrize("case", ["2d-tanh-2-classes", "3d-sigmoid-deep", "wide-input-wide-head"])
def test_one_or_two_points_read_the_weights_both_ways(case, points):
    # Up to _FEW_POINTS points the forward product reads the backward's weights transposed.
    make, shape, classes = CASES[case]
    ens = _ensemble(make)
    x = _points(points, shape)
    labels = _labels(points, classes)
    kernel = _planned(ens, labels)
    forward = kernel.chunks[0]["hidden"][0][0]
    assert forward.is_contiguous() == (points > _input_grad._FEW_POINTS)
    _assert_match(kernel(x), _reference(ens, x, labels), torch.float64)
    torch.testing.assert_close(kernel.member_gradients(x), _reference_members(ens, x, labels), **MEMBER_TOLERANCE)


@pytest.mark.skipif(not torch.cuda.is_available(), reason="no CUDA device on this machine")
def test_runs_on_a_cuda_device_and_matches_the_cpu():
    # Device-agnostic: the same plan on a GPU gives the CPU's numbers (float64).
    make, shape, classes = CASES["wide-input-wide-head"]
    ens = _ensemble(make)
    x = _points(9, shape)
    labels = _labels(9, classes)
    want = _planned(ens, labels)(x)
    gpu = ens.to(device="cuda")
    params = {k: v.detach() for k, v in gpu.params.items()}
    got = ExpectedLossGradient.try_build(gpu._plan.steps, params, labels.cuda(), 1.0)(x.cuda())
    _assert_match([t.cpu() for t in got], want, torch.float64)


def test_one_kernel_called_from_two_threads_at_once():
    # Each thread evaluates on blocks of its own, even through one shared kernel.
    make, shape, classes = CASES["2d-tanh-2-classes"]
    ens = _ensemble(make, members=12)
    labels = _labels(30, classes)
    kernel = _planned(ens, labels)
    xs = [_points(30, shape, seed=s) for s in range(4)]
    wants = [_reference(ens, x, labels) for x in xs]
    failures = []

    def work(offset):
        for _ in range(30):
            for i in range(len(xs)):
                j = (i + offset) % len(xs)
                try:
                    _assert_match(kernel(xs[j]), wants[j], torch.float64)
                except AssertionError as error:  # pragma: no cover - reported below
                    failures.append(error)

    threads = [threading.Thread(target=work, args=(k,)) for k in (0, 1)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not failures


def _reference_head(ens, x, labels, objective, sign=1.0):
    leaf = x.detach().clone().requires_grad_(True)
    value = sign * _objective(ens.logits(leaf), labels, objective)
    (grad,) = torch.autograd.grad(value.sum(), leaf)
    return value.detach(), grad


@pytest.mark.parametrize("objective", ["predictive", "margin", "expected_loss"])
@pytest.mark.parametrize("case", sorted(CASES))
def test_any_head_matches_autograd(case, objective):
    # Reference: torch.autograd through ens.logits of the attack objectives themselves.
    make, shape, classes = CASES[case]
    ens = _ensemble(make)
    x = _points(8, shape)
    labels = _labels(8, classes)
    kernel = _planned(ens, labels)
    assert kernel.takes_any_head
    for sign in (1.0, -1.0):
        def head(logits, where, sign=sign):
            return sign * _objective(logits, labels[where], objective)

        got = kernel.head_value_and_grad(x, head)
        _assert_match(got, _reference_head(ens, x, labels, objective, sign), torch.float64)


def test_any_head_needs_one_chunk():
    make, shape, classes = CASES["2d-tanh-2-classes"]
    ens = _ensemble(make)
    kernel = _planned(ens, _labels(5, classes), chunk_bytes=300)
    assert not kernel.takes_any_head
    with pytest.raises(ValueError, match="head_value_and_grad needs every member and point in one chunk"):
        kernel.head_value_and_grad(_points(5, shape), lambda logits, where: logits.sum((0, 2)))


@pytest.mark.parametrize("objective", ["predictive", "margin"])
def test_attack_problem_takes_the_planned_head_or_falls_back(monkeypatch, objective):
    # One chunk: the planned passes with autograd on the head; forced into several
    # chunks (a 300-byte memory budget): autograd. Both equal the autograd path.
    heads = []
    original = ExpectedLossGradient.head_value_and_grad

    def counting(self, *args, **kwargs):
        heads.append(1)
        return original(self, *args, **kwargs)

    monkeypatch.setattr(ExpectedLossGradient, "head_value_and_grad", counting)
    x = _points(6, (2,))
    results = []
    for backward, budget in (("auto", None), ("auto", 300), ("autograd", None)):
        ens = _ensemble(CASES["2d-relu-3-classes"][0])
        if budget is not None:
            ens = jostle.Ensemble(ens.template, ens.params, memory_budget=budget)
        problem = build_problem(ens, x, None, eps=0.1, norm="inf", objective=objective, samples=None,
                                resample=False, target=None, bounds=None, seed=3, backward=backward)
        heads.clear()
        results.append(problem.objective_and_grad(x + 0.01))
        assert len(heads) == (1 if backward == "auto" and budget is None else 0)
    for got in results[:2]:
        _assert_match(got, results[2], torch.float64)
