"""Vectorised forward passes over stacked parameters, chunked under a memory budget.

Three plans share one interface. ``MLPPlan`` handles ``nn.Sequential`` stacks of Linear
layers and elementwise activations with batched matrix products (the common case, and
much faster than ``vmap`` at small N). ``ConvPlan`` handles Sequential convolutional
stacks (Conv2d, pooling, BatchNorm in eval mode, GroupNorm, LayerNorm, Flatten, Linear)
with members as channel blocks or a loop over members, chosen by a size rule (see the
class). ``GeneralPlan`` handles any module with ``torch.func.vmap(functional_call)``.
"""
from __future__ import annotations

from collections.abc import Callable

import torch
from torch import Tensor, nn
from torch.func import functional_call, vmap

from jostle.common.threads import threads_for, torch_threads
from jostle.posterior.activations import ELEMENTWISE, activation_of
from jostle.posterior.conv_pass import activation_sizes, conv_forward, conv_steps

# Activations of one member chunk are sized to stay near this many bytes per layer.
# Measured on a 2-core CPU (100 members of 2-64-64-2, predict): 4 MiB ran 10-20% faster
# than 1 MiB from 1,000 to 4,096 points (fewer, larger kernels; the shared first layer is
# one GEMM per chunk) and no slower at 100; 16 MiB was up to 2x slower on one thread.
# The planned input gradient measured the same (one chunk of all 100 members at 100
# points, 2.4 MiB per layer, ran 10-20% faster than chunks that fit a 2 MiB L2 cache).
CACHE_BYTES = 4 * 2**20

# Layers at most this wide (the logit layer) are computed as W @ h^T: measured ~4x
# faster than h @ W^T for 2 outputs from 64 inputs at 40 members x 100 points.
NARROW = 8


def chunk_sizes(members: int, points: int, pair_bytes: int, row_bytes: int, memory_budget: int,
                cache_bytes: int = CACHE_BYTES) -> tuple[int, int]:
    """(members, points) of one chunk of a batched pass: the one chunking rule.

    Points first: as many as keep ``pair_bytes`` per (member, point) pair, for one member,
    under ``memory_budget``; then as many members as keep both the whole chunk under
    ``memory_budget`` and one layer's block (``row_bytes`` per pair, its widest layer)
    under ``cache_bytes``. Always at least one of each.
    """
    point_chunk = max(1, min(points, memory_budget // max(1, pair_bytes)))
    member_budget = memory_budget // max(1, pair_bytes * point_chunk)
    member_cache = cache_bytes // max(1, row_bytes * point_chunk)
    return max(1, min(members, member_budget, member_cache)), point_chunk


def make_plan(template: nn.Module, params: dict[str, Tensor]) -> ForwardPlan:
    plan = MLPPlan.try_build(template, params)
    if plan is None:
        plan = ConvPlan.try_build(template)
    return plan if plan is not None else GeneralPlan(template)


class ForwardPlan:
    """Shared chunking logic; subclasses provide ``forward(params, x) -> [s, n, C]``."""

    #: floats held per (member, point) pair during a forward pass
    floats_per_pair: int = 1

    def forward(self, params: dict[str, Tensor], x: Tensor, per_member: bool = False) -> Tensor:
        raise NotImplementedError

    def check_input(self, x: Tensor, name: str = "x") -> None:
        """Raise a clear error, naming the parameter ``name``, when ``x`` cannot feed the first layer."""

    def chunk_sizes(self, members: int, points: int, memory_budget: int, element_bytes: int,
                    device: torch.device | str = "cpu") -> tuple[int, int]:
        grad = torch.is_grad_enabled()
        pair_bytes = self.floats_per_pair * element_bytes * (2 if grad else 1)
        return chunk_sizes(members, points, pair_bytes, self.widest * element_bytes, memory_budget)

    widest: int = 1

    def run(
        self,
        params: dict[str, Tensor],
        x: Tensor,
        memory_budget: int,
        transform: Callable[[Tensor], Tensor] | None = None,
    ) -> Tensor:
        members = int(next(iter(params.values())).shape[0])
        points = int(x.shape[0])
        member_chunk, point_chunk = self.chunk_sizes(members, points, memory_budget, x.element_size(), x.device)
        if member_chunk >= members and point_chunk >= points:
            out = self.forward(params, x)
            return (out if transform is None else transform(out)).contiguous()
        tracking = torch.is_grad_enabled() and (x.requires_grad or any(p.requires_grad for p in params.values()))
        rows = []
        out = None
        for m0 in range(0, members, member_chunk):
            chunk_params = {k: v[m0:m0 + member_chunk] for k, v in params.items()}
            pieces = []
            for n0 in range(0, points, point_chunk):
                block = self.forward(chunk_params, x[n0:n0 + point_chunk])
                if transform is not None:
                    block = transform(block)
                if tracking:
                    pieces.append(block)
                    continue
                if out is None:
                    out = block.new_empty((members, points) + tuple(block.shape[2:]))
                out[m0:m0 + block.shape[0], n0:n0 + block.shape[1]] = block
            if tracking:
                rows.append(torch.cat(pieces, dim=1))
        return torch.cat(rows, dim=0) if tracking else out

    def run_by_points(
        self,
        params: dict[str, Tensor],
        x: Tensor,
        memory_budget: int,
        fn: Callable[[Tensor, slice], Tensor],
    ) -> Tensor:
        members = int(next(iter(params.values())).shape[0])
        points = int(x.shape[0])
        pair_bytes = self.floats_per_pair * x.element_size() * (2 if torch.is_grad_enabled() else 1)
        # every member in each point chunk: one "member" of all members' pairs
        _, point_chunk = chunk_sizes(1, points, pair_bytes * members, 0, memory_budget)
        results = []
        for n0 in range(0, points, point_chunk):
            where = slice(n0, min(points, n0 + point_chunk))
            results.append(fn(self.run(params, x[where], memory_budget), where))
        return torch.cat(results, dim=0)


class MLPPlan(ForwardPlan):
    """Batched matrix products over members for Linear + elementwise stacks."""

    def __init__(self, steps: list[tuple], in_features: int, widths: list[int]):
        self.steps = steps
        self.in_features = in_features
        self.floats_per_pair = in_features + 2 * sum(widths)
        self.widest = max([in_features] + widths)

    @classmethod
    def try_build(cls, template: nn.Module, params: dict[str, Tensor]) -> MLPPlan | None:
        if not isinstance(template, nn.Sequential) or any(True for _ in template.buffers()):
            return None
        steps: list[tuple] = []
        widths: list[int] = []
        in_features = None
        for name, layer in template.named_children():
            if isinstance(layer, nn.Linear):
                has_bias = layer.bias is not None
                steps.append(("linear", f"{name}.weight", f"{name}.bias" if has_bias else None))
                in_features = layer.in_features if in_features is None else in_features
                widths.append(layer.out_features)
            elif isinstance(layer, nn.Flatten) and layer.start_dim == 1 and layer.end_dim == -1 and not steps:
                steps.append(("flatten",))
            elif isinstance(layer, ELEMENTWISE):
                if isinstance(layer, nn.Dropout) and layer.training and layer.p > 0:
                    return None
                steps.append(("map", layer))
            else:
                return None
        if not widths:
            return None
        return cls(steps, in_features, widths)

    def check_input(self, x: Tensor, name: str = "x") -> None:
        features = x[0].numel() if any(s[0] == "flatten" for s in self.steps) else x.shape[-1]
        if (x.ndim != 2 and not any(s[0] == "flatten" for s in self.steps)) or features != self.in_features:
            raise ValueError(
                f"{name} must have shape (n_points, {self.in_features}) for this network; got shape {tuple(x.shape)}"
            )

    def forward(self, params: dict[str, Tensor], x: Tensor, per_member: bool = False) -> Tensor:
        """Logits [s, n, C]; ``x`` is [n, ...] shared by every member, or with
        ``per_member=True`` [s, n, ...], one block of inputs per member."""
        in_place = not torch.is_grad_enabled() or not (
            x.requires_grad or any(p.requires_grad for p in params.values())
        )
        hidden = x
        shared = not per_member  # hidden is still [n, d], common to every member
        owned = False  # hidden is a tensor this pass made, safe to overwrite
        for step in self.steps:
            kind = step[0]
            if kind == "linear":
                weight = params[step[1]]
                bias = params[step[2]] if step[2] is not None else None
                hidden = _batched_linear(hidden, weight, bias, shared, fast=in_place)
                shared = False
                owned = True
            elif kind == "flatten":
                hidden = hidden.flatten(1 if not per_member else 2)
            elif in_place and owned and _in_place(step[1]) is not None:
                hidden = _in_place(step[1])(step[1], hidden)
            else:
                hidden = step[1](hidden)
        return hidden


def _in_place(layer: nn.Module):
    """The in-place form of an elementwise layer (identities: return the input), or None."""
    if type(layer) in (nn.Identity, nn.Dropout):
        return _unchanged
    entry = activation_of(layer)
    return None if entry is None else entry.in_place


def _unchanged(layer: nn.Module, h: Tensor) -> Tensor:
    return h


def _kept_linear(hidden: Tensor, weight: Tensor, bias: Tensor | None) -> Tensor:
    """``hidden [s, n, in] @ weight.T + bias`` -> [s, n, out] for a per-member input."""
    if weight.shape[1] <= NARROW:
        if bias is None:
            return torch.bmm(weight, hidden.transpose(1, 2)).transpose(1, 2)
        return torch.baddbmm(bias.unsqueeze(2), weight, hidden.transpose(1, 2)).transpose(1, 2)
    # A product then an in-place bias add: measured ~10% faster than baddbmm at 64 x 64.
    out = torch.bmm(hidden, weight.transpose(1, 2))
    return out if bias is None else out.add_(bias.unsqueeze(1))


# Up to this many shared points one GEMM against all members' weights side by side wins
# (measured, benchmarks/bench_ensemble.py), with the bias added after it.
_SMALL_BATCH = 16


def _batched_linear(hidden: Tensor, weight: Tensor, bias: Tensor | None, shared: bool,
                   fast: bool = True) -> Tensor:
    """``hidden @ weight.T + bias`` for every member: weight [s, out, in] -> [s, n, out].

    ``fast`` (no autograd graph is being recorded): a shared input [n, in] meets all
    members' weights side by side in one GEMM, ``[n, in] @ [in, s*out]``, and the result
    is a [s, n, out] view of that point-by-point block; per-member inputs take
    :func:`_kept_linear` (narrow layers as ``W @ h^T``). Otherwise the products of
    training and of autograd attacks, unchanged so that seeded fits stay bit for bit.
    """
    members, out_features, in_features = weight.shape
    if shared and hidden.shape[0] <= _SMALL_BATCH:
        # One GEMM against all members' weights side by side: [n, in] @ [in, s*out].
        flat = hidden @ weight.reshape(members * out_features, in_features).T
        result = flat.reshape(hidden.shape[0], members, out_features).transpose(0, 1)
        return result if bias is None else result + bias.unsqueeze(1)
    if not fast:
        if shared:
            hidden = hidden.expand(members, *hidden.shape)
        if bias is None:
            return torch.bmm(hidden, weight.transpose(1, 2))
        return torch.baddbmm(bias.unsqueeze(1), hidden, weight.transpose(1, 2))
    if not shared:
        return _kept_linear(hidden, weight, bias)
    n = hidden.shape[0]
    side_by_side = weight.reshape(members * out_features, in_features).T  # [in, s*out], a view
    if bias is None:
        flat = hidden @ side_by_side
    elif n > in_features + 1:
        # The bias as one more weight row, met by a column of ones beside the input: one
        # GEMM and no pass over the output (copying the weights is the cheaper side here;
        # measured 2x faster than addmm's broadcast bias for a 2-D input at 2,500 points).
        ones = hidden.new_ones(n, 1)
        flat = torch.cat([hidden, ones], 1) @ torch.cat([side_by_side, bias.reshape(1, -1)], 0)
    else:
        flat = torch.addmm(bias.reshape(1, -1), hidden, side_by_side)
    return flat.view(n, members, out_features).transpose(0, 1)


class GeneralPlan(ForwardPlan):
    """``vmap(functional_call)`` over members for any module without batch-dependent layers."""

    def __init__(self, template: nn.Module):
        self.template = template
        widths = [m.out_features for m in template.modules() if isinstance(m, nn.Linear)]
        self.floats_per_pair = 4 * max(1, sum(widths)) + 256
        self.widest = max(widths or [64])

        def one_member(member_params: dict[str, Tensor], x: Tensor) -> Tensor:
            return functional_call(self.template, member_params, (x,))

        self._call = vmap(one_member, in_dims=(0, None))
        self._call_each = vmap(one_member, in_dims=(0, 0))

    def forward(self, params: dict[str, Tensor], x: Tensor, per_member: bool = False) -> Tensor:
        """Logits [s, n, C]; with ``per_member=True`` ``x`` is [s, n, ...], one block per member."""
        try:
            out = (self._call_each if per_member else self._call)(params, x)
        except RuntimeError as err:
            raise ValueError(
                f"the module could not be evaluated over stacked members with torch.func.vmap "
                f"({err}); wrap a module without data-dependent control flow or in-place buffer updates"
            ) from err
        if out.ndim != 3:
            raise ValueError(
                f"the module must return logits of shape (n_points, n_classes); got {tuple(out.shape[1:])}"
            )
        return out


# The size rule of ConvPlan, measured for the default jostle.cnn on 28x28 images on a 2-core
# CPU shared with other jobs (side by side in one process, medians of interleaved repeats;
# benchmarks/bench_cnn.py). Up to GROUPED_POINTS points, GROUPED_MEMBERS members side by
# side as channel blocks: S = 100, N = 1 took 2.3 ms against 9.7 ms one member at a time
# and 12 ms for a per-member loop; at N = 16 grouped convolutions still won (26 against
# 38 ms) but they grow faster than N (a grouped convolution over 16 images took 37x one
# image's time). Above it, one member per block over BLOCK_POINTS images, which keeps a
# block's activations near the caches: S = 20, N = 1,000 took 426 ms against 2,131 ms for
# the loop over whole batches; blocks of 64 images beat 16, 32 and 128 (38 against 41-50 ms
# at N = 100, two threads). Every convolution's output is kept channels-last: a one-channel
# input's convolution comes back NCHW, where 2x2 max pooling measured ~10x slower than on
# the same values channels-last (1.7 against 0.15 ms for 32 images of 16 x 28 x 28).
# The rule is the CPU's. On a GPU (an H200, same benchmark with --device cuda) the CPU's
# small blocks left the device waiting on kernel launches: predict at S = 100, N = 1,000
# took 365 ms against 33 ms for the per-member loop; off the CPU, blocks are as large as
# the memory budget allows.
GROUPED_POINTS = 16
GROUPED_MEMBERS = 20
BLOCK_MEMBERS = 1
BLOCK_POINTS = 64
CHANNELS_LAST = True


class ConvPlan(ForwardPlan):
    """Convolutional stacks (:mod:`jostle.posterior.conv_pass`) under a size rule.

    Up to ``GROUPED_POINTS`` points, ``GROUPED_MEMBERS`` members run side by side as
    channel blocks (one convolution for a block of members), which amortises the
    per-call cost of tiny convolutions; above it, a loop over members
    (``BLOCK_MEMBERS = 1``) over ``BLOCK_POINTS`` images at a time, where a plain
    convolution is efficient and a grouped one was slower (measurements above). Blocks
    always stay under the memory budget (``chunk_sizes``). Small work runs on one thread
    (:func:`jostle.common.threads.threads_for`): on a shared 2-core machine a tiny
    convolution on two threads measured up to 40x slower.
    """

    def __init__(self, template: nn.Module, steps: list[tuple], shape: tuple[int, int, int] | None):
        self.template = template
        self.steps = steps
        self.shape = shape
        self._sizes: dict[tuple, list[int]] = {}
        if shape is not None:
            self._measure(shape)

    @classmethod
    def try_build(cls, template: nn.Module) -> ConvPlan | None:
        found = conv_steps(template)
        return None if found is None else cls(template, *found)

    def _measure(self, shape: tuple[int, ...]) -> None:
        if shape not in self._sizes:
            self._sizes[shape] = activation_sizes(self.template, shape)
        sizes = self._sizes[shape]
        self.floats_per_pair = sum(sizes) + max(sizes)
        self.widest = max(sizes)

    def image_shape(self, x: Tensor, per_member: bool = False) -> tuple[int, int, int]:
        rest = tuple(x.shape[2:] if per_member else x.shape[1:])
        return self.shape if self.shape is not None else rest

    def check_input(self, x: Tensor, name: str = "x") -> None:
        shape = self.image_shape(x)
        if self.shape is not None:
            size = int(torch.Size(self.shape).numel())
            if x.ndim < 2 or x[0].numel() != size or tuple(x.shape[1:]) not in ((size,), self.shape):
                raise ValueError(f"{name} must have shape (n_points, {size}) or (n_points, "
                                 f"{', '.join(map(str, self.shape))}) for this network; got shape {tuple(x.shape)}")
        elif x.ndim != 4:
            raise ValueError(f"{name} must have shape (n_points, channels, height, width) for this network; "
                             f"got shape {tuple(x.shape)}")
        try:
            self._measure(shape)
        except RuntimeError as err:
            raise ValueError(f"{name} of shape {tuple(x.shape)} cannot feed this network: {err}") from None

    def chunk_sizes(self, members: int, points: int, memory_budget: int, element_bytes: int,
                    device: torch.device | str = "cpu") -> tuple[int, int]:
        grad = torch.is_grad_enabled()
        pair_bytes = self.floats_per_pair * element_bytes * (2 if grad else 1)
        if torch.device(device).type != "cpu":  # an accelerator: the largest blocks the budget allows
            block_members, block_points = members, points
        elif points <= GROUPED_POINTS:
            block_members, block_points = GROUPED_MEMBERS, points
        else:
            block_members, block_points = BLOCK_MEMBERS, BLOCK_POINTS
        return chunk_sizes(min(members, block_members), min(points, block_points), pair_bytes, 0, memory_budget,
                           cache_bytes=2**62)

    def run(self, params: dict[str, Tensor], x: Tensor, memory_budget: int,
            transform: Callable[[Tensor], Tensor] | None = None) -> Tensor:
        work = int(next(iter(params.values())).shape[0]) * int(x.shape[0]) * self.floats_per_pair
        with torch_threads(threads_for("auto", work, x.device)):
            return super().run(params, x, memory_budget, transform)

    def forward(self, params: dict[str, Tensor], x: Tensor, per_member: bool = False) -> Tensor:
        """Logits [s, n, C]; with ``per_member=True`` ``x`` is [s, n, ...], one block per member."""
        return conv_forward(self.steps, params, x, self.image_shape(x, per_member), per_member, CHANNELS_LAST)
