"""Vectorised forward passes over stacked parameters, chunked under a memory budget.

Two plans share one interface. ``MLPPlan`` handles ``nn.Sequential`` stacks of Linear
layers and elementwise activations with batched matrix products (the common case, and
much faster than ``vmap`` at small N). ``GeneralPlan`` handles any module with
``torch.func.vmap(functional_call)``.
"""
from __future__ import annotations

from typing import Callable

import torch
from torch import Tensor, nn
from torch.func import functional_call, vmap

_ELEMENTWISE = (
    nn.Tanh, nn.ReLU, nn.GELU, nn.SiLU, nn.ELU, nn.Sigmoid, nn.Softplus, nn.LeakyReLU,
    nn.Mish, nn.Hardtanh, nn.Identity, nn.Dropout,
)

# Activations of one member chunk are sized to stay near this many bytes per layer.
# Measured on a 2-core CPU (100 members of 2-64-64-2, predict): 4 MiB ran 10-20% faster
# than 1 MiB from 1,000 to 4,096 points (fewer, larger kernels; the shared first layer is
# one GEMM per chunk) and no slower at 100; 16 MiB was up to 2x slower on one thread.
_CACHE_BYTES = 4 * 2**20

# With no gradient to track, activations are applied in place: on a 2-core CPU a fresh
# allocation per layer costs more than the tanh itself.
_IN_PLACE = {
    nn.Tanh: lambda layer, h: h.tanh_(),
    nn.ReLU: lambda layer, h: h.relu_(),
    nn.Sigmoid: lambda layer, h: h.sigmoid_(),
    nn.SiLU: lambda layer, h: torch.nn.functional.silu(h, inplace=True),
    nn.ELU: lambda layer, h: torch.nn.functional.elu(h, layer.alpha, inplace=True),
    nn.LeakyReLU: lambda layer, h: torch.nn.functional.leaky_relu(h, layer.negative_slope, inplace=True),
    nn.Identity: lambda layer, h: h,
    nn.Dropout: lambda layer, h: h,
}


def make_plan(template: nn.Module, params: dict[str, Tensor]) -> "ForwardPlan":
    plan = MLPPlan.try_build(template, params)
    return plan if plan is not None else GeneralPlan(template)


class ForwardPlan:
    """Shared chunking logic; subclasses provide ``forward(params, x) -> [s, n, C]``."""

    #: floats held per (member, point) pair during a forward pass
    floats_per_pair: int = 1

    def forward(self, params: dict[str, Tensor], x: Tensor, per_member: bool = False) -> Tensor:
        raise NotImplementedError

    def check_input(self, x: Tensor, name: str = "x") -> None:
        """Raise a clear error, naming the parameter ``name``, when ``x`` cannot feed the first layer."""

    def chunk_sizes(self, members: int, points: int, memory_budget: int, element_bytes: int) -> tuple[int, int]:
        grad = torch.is_grad_enabled()
        pair_bytes = self.floats_per_pair * element_bytes * (2 if grad else 1)
        point_chunk = max(1, min(points, memory_budget // max(1, pair_bytes)))
        member_budget = memory_budget // max(1, pair_bytes * point_chunk)
        member_cache = _CACHE_BYTES // max(1, self.widest * element_bytes * point_chunk)
        member_chunk = max(1, min(members, member_budget, max(member_cache, 1)))
        return member_chunk, point_chunk

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
        member_chunk, point_chunk = self.chunk_sizes(members, points, memory_budget, x.element_size())
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
        point_chunk = max(1, min(points, memory_budget // max(1, pair_bytes * members)))
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
    def try_build(cls, template: nn.Module, params: dict[str, Tensor]) -> "MLPPlan | None":
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
            elif isinstance(layer, _ELEMENTWISE):
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
            elif in_place and owned and type(step[1]) in _IN_PLACE:
                hidden = _IN_PLACE[type(step[1])](step[1], hidden)
            else:
                hidden = step[1](hidden)
        return hidden

    def value_and_input_grad(
        self,
        params: dict[str, Tensor],
        x: Tensor,
        memory_budget: int,
        head: Callable[[Tensor, slice], Tensor],
        separable: bool = False,
    ) -> tuple[Tensor, Tensor]:
        """Per-point value of ``head`` on the logits and its gradient in the shared input.

        The forward pass keeps what the backward pass needs (no autograd graph); only
        ``head`` -- logits [s, n, C] and the point slice -> [n] -- is differentiated by
        autograd, on the logits alone. The chain rule through the Linear and activation
        stack is then applied by hand with batched products.

        Parameters
        ----------
        params : dict of Tensor [s, ...]
        x : Tensor of shape (n_points, *input_shape), shared by every member
        memory_budget : int
            Bytes the kept activations of one point chunk may take.
        head : callable
            ``head(logits [s, n, C], point_slice) -> Tensor [n]``.
        separable : bool
            True when ``head`` is a mean over members of per-member terms (the expected
            loss): each member chunk then runs forward, head and backward while its
            activations are still in cache, weighted by its share of the members.

        Returns
        -------
        value : Tensor of shape (n_points,)
        grad : Tensor of shape (n_points, *input_shape)
            ``d sum(value) / d x``; each point receives its own gradient.
        """
        members = int(next(iter(params.values())).shape[0])
        points = int(x.shape[0])
        pair_bytes = 2 * self.floats_per_pair * x.element_size()
        point_chunk = max(1, min(points, memory_budget // max(1, pair_bytes * members)))
        member_cache = _CACHE_BYTES // max(1, self.widest * x.element_size() * point_chunk)
        member_chunk = max(1, min(members, member_cache))
        values, grads = [], []
        with torch.no_grad():
            for n0 in range(0, points, point_chunk):
                where = slice(n0, min(points, n0 + point_chunk))
                run_chunk = self._separable_value_and_grad if separable else self._chunk_value_and_grad
                value, grad = run_chunk(params, x[where], where, head, member_chunk)
                values.append(value)
                grads.append(grad)
        return torch.cat(values), torch.cat(grads)

    def _separable_value_and_grad(self, params, x, where, head, member_chunk):
        members = int(next(iter(params.values())).shape[0])
        value = grad = None
        for m0 in range(0, members, member_chunk):
            chunk = {k: v[m0:m0 + member_chunk] for k, v in params.items()}
            logits, tape = self._forward_keeping(chunk, x)
            share = logits.shape[0] / members
            with torch.enable_grad():
                leaf = logits.requires_grad_(True)
                part = head(leaf, where) * share
                (upstream,) = torch.autograd.grad(part.sum(), leaf)
            part_grad = _backward(tape, upstream)
            value = part.detach() if value is None else value + part.detach()
            grad = part_grad if grad is None else grad + part_grad
        return value, grad

    def _chunk_value_and_grad(self, params, x, where, head, member_chunk):
        members = int(next(iter(params.values())).shape[0])
        tapes, logits = [], []
        for m0 in range(0, members, member_chunk):
            chunk = {k: v[m0:m0 + member_chunk] for k, v in params.items()}
            out, tape = self._forward_keeping(chunk, x)
            tapes.append(tape)
            logits.append(out)
        with torch.enable_grad():
            leaf = torch.cat(logits).requires_grad_(True)
            value = head(leaf, where)
            (upstream,) = torch.autograd.grad(value.sum(), leaf)
        grad = None
        for m0, tape in zip(range(0, members, member_chunk), tapes):
            part = _backward(tape, upstream[m0:m0 + member_chunk])
            grad = part if grad is None else grad + part
        return value.detach(), grad

    def _forward_keeping(self, params: dict[str, Tensor], x: Tensor) -> tuple[Tensor, list[tuple]]:
        """Logits [s, n, C] and the tape of what each step's derivative needs."""
        tape: list[tuple] = []
        hidden = x
        shared = True
        owned = False  # hidden was made by this pass and nothing kept refers to it
        for step in self.steps:
            kind = step[0]
            if kind == "linear":
                weight = params[step[1]]
                bias = params[step[2]] if step[2] is not None else None
                tape.append(("linear", weight, shared))
                hidden = _batched_linear(hidden, weight, bias, shared)
                shared, owned = False, True
            elif kind == "flatten":
                tape.append(("flatten", hidden.shape))
                hidden = hidden.flatten(1)
            elif type(step[1]) in (nn.Identity, nn.Dropout):
                continue
            elif type(step[1]) in _FROM_OUTPUT:
                hidden = _IN_PLACE[type(step[1])](step[1], hidden) if owned else step[1](hidden)
                tape.append(("output", type(step[1]), hidden))
                owned = False
            else:
                tape.append(("input", step[1], hidden))
                hidden = step[1](hidden)
                owned = True
        return hidden, tape


_SQRT_HALF = 0.5 ** 0.5
_INV_SQRT_2PI = (2 * 3.141592653589793) ** -0.5

# Activations whose derivative is a function of their output alone: tanh' = 1 - h^2,
# relu' = [h > 0], sigmoid' = h (1 - h), each applied to the incoming gradient in one
# fused kernel (the ones autograd itself calls) rather than three elementwise passes.
# The result overwrites the incoming gradient, which the backward pass owns: a fresh
# block per layer costs more than the product itself on a 2-core CPU.
_FROM_OUTPUT = {
    nn.Tanh: lambda delta, h: torch.ops.aten.tanh_backward.grad_input(delta, h, grad_input=delta),
    nn.ReLU: lambda delta, h: torch.ops.aten.threshold_backward.grad_input(delta, h, 0, grad_input=delta),
    nn.Sigmoid: lambda delta, h: torch.ops.aten.sigmoid_backward.grad_input(delta, h, grad_input=delta),
}


def _from_input(layer: nn.Module, z: Tensor) -> Tensor | None:
    """Exact derivative of ``layer`` at pre-activation ``z``, or None when not hand-coded."""
    kind = type(layer)
    if kind is nn.SiLU:
        s = torch.sigmoid(z)
        return s * (1 + z * (1 - s))
    if kind is nn.ELU:
        return torch.where(z > 0, torch.ones_like(z), layer.alpha * torch.exp(z))
    if kind is nn.LeakyReLU:
        return torch.where(z > 0, torch.ones_like(z), torch.full_like(z, layer.negative_slope))
    if kind is nn.Softplus:
        scaled = z * layer.beta
        return torch.where(scaled > layer.threshold, torch.ones_like(z), torch.sigmoid(scaled))
    if kind is nn.GELU and layer.approximate == "none":
        return 0.5 * (1 + torch.erf(z * _SQRT_HALF)) + z * torch.exp(-0.5 * z * z) * _INV_SQRT_2PI
    return None


# Layers at most this wide (the logit layer) are computed as W @ h^T: measured ~4x
# faster than h @ W^T for 2 outputs from 64 inputs at 40 members x 100 points.
_NARROW = 8


def _kept_linear(hidden: Tensor, weight: Tensor, bias: Tensor | None) -> Tensor:
    """``hidden [s, n, in] @ weight.T + bias`` -> [s, n, out] for a per-member input."""
    if weight.shape[1] <= _NARROW:
        if bias is None:
            return torch.bmm(weight, hidden.transpose(1, 2)).transpose(1, 2)
        return torch.baddbmm(bias.unsqueeze(2), weight, hidden.transpose(1, 2)).transpose(1, 2)
    # A product then an in-place bias add: measured ~10% faster than baddbmm at 64 x 64.
    out = torch.bmm(hidden, weight.transpose(1, 2))
    return out if bias is None else out.add_(bias.unsqueeze(1))


def _backward(tape: list[tuple], delta: Tensor) -> Tensor:
    """Apply the kept chain rule from logit gradients [s, n, C] back to the shared input."""
    delta = delta.contiguous()  # activations overwrite it: it must not be a broadcast view
    for entry in reversed(tape):
        kind = entry[0]
        if kind == "linear":
            weight, shared = entry[1], entry[2]
            if shared:
                # The input is common to all members: its gradient is sum_s delta_s @ W_s
                # (measured faster than one GEMM over a transposed copy of delta).
                delta = torch.bmm(delta, weight).sum(0)
            else:
                delta = torch.bmm(delta, weight)
        elif kind == "flatten":
            delta = delta.reshape(entry[1])
        elif kind == "output":
            delta = _FROM_OUTPUT[entry[1]](delta, entry[2])
        else:
            delta = _through_activation(entry[1], entry[2], delta)
    return delta


def _through_activation(layer: nn.Module, z: Tensor, delta: Tensor) -> Tensor:
    derivative = _from_input(layer, z)
    if derivative is not None:
        return delta * derivative
    # Activations without a hand-coded derivative: autograd on this one elementwise map.
    with torch.enable_grad():
        leaf = z.detach().requires_grad_(True)
        (out,) = torch.autograd.grad(layer(leaf), leaf, delta)
    return out


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
            raise ValueError(f"the module must return logits of shape (n_points, n_classes); got {tuple(out.shape[1:])}")
        return out
