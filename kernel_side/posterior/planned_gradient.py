"""The expected cross-entropy and its input gradient, planned once for a fixed ensemble.

A gradient attack on an ensemble of Linear + activation networks evaluates the same
function of the input again and again: the mean over members of the per-member
cross-entropy at fixed labels, and its gradient in the input. :class:`ExpectedLossGradient`
prepares everything that does not change between evaluations (the weights of each member
chunk in the layout its products want, the one-hot labels) and runs each evaluation as a
short, fixed sequence of batched kernels with the chain rule written out by hand, so that
an attack step costs little beyond its arithmetic:

* The first layer reads the input that all members share. Its output is laid out point
  by point, ``[n, members * width]``: one GEMM against the members' weights side by side
  makes it (the bias met by a column of ones beside the input), and on the way back the
  input gradient of every member *summed* is again one GEMM,
  ``[d, members * width] @ [members * width, n]``.
* Deeper layers are batched products over members, ``[k, n, in] @ [k, in, out]``.
* The logits of a narrow head (``C <= 8``) are made as ``W @ h^T``, classes before points,
  so that the softmax runs along a short outer axis. The gradient of the cross-entropy in
  the logits is ``softmax - onehot`` (no autograd). With two classes only the difference
  of the two logits matters: the head computes it alone, ``log p(label)`` is a log-sigmoid
  of it, and the product back through the head is one multiplication by the difference
  of the two weight rows.
* Activations whose derivative is a function of their output (tanh, ReLU, sigmoid) are
  applied in place going forward, and their derivative overwrites the incoming gradient
  coming back, with the same fused kernels autograd itself calls.
* Members (and, for many points, points) are processed in chunks under a memory bound;
  the work blocks are allocated once per thread and reused, so an attack step allocates
  almost nothing.

:meth:`ExpectedLossGradient.member_gradients` runs the same passes and keeps each member's
gradient apart (for the fading-gradient read-outs), and
:meth:`ExpectedLossGradient.head_value_and_grad` runs them for any head over all members'
logits (the predictive loss, the margin), with autograd on the logits alone, when one
chunk holds every member and point.

Anything else (other activations, a network ending in an activation, a single Linear
layer) returns None from :meth:`ExpectedLossGradient.try_build`, and the gradient engine
(:mod:`jostle.posterior.gradients`) takes autograd through the batched forward instead.
"""
from __future__ import annotations

import math
import threading

import torch
from torch import Tensor, nn

import jostle.posterior.forward as forward_plans
from jostle.posterior.activations import activation_of, is_identity
from jostle.posterior.forward import NARROW, chunk_sizes

__all__ = ["ExpectedLossGradient"]

# Reused work blocks, one set per thread (see ExpectedLossGradient._workspace). Each block
# grows to the largest chunk a thread has evaluated (at most ``chunk_bytes`` per layer).
_POOL = threading.local()

# Up to this many points the forward and backward products read one copy of the weights.
_FEW_POINTS = 2

class ExpectedLossGradient:
    """``sign * mean_s CE(logits_s(x), labels)`` per point and its gradient in ``x``.

    Build with :meth:`try_build`; call with ``x`` [n, ...] (the ``n`` points whose labels
    were given) to get ``(value [n], grad [n, ...])``.
    """

    def __init__(self, layers, flatten: bool, labels: Tensor, sign: float, members: int, chunk_bytes: int):
        self.flatten = flatten
        self.labels = labels.to(device=layers[0][0].device, dtype=torch.long)
        self.sign = sign
        self.members = members
        self.layers = layers  # [(weight [s, out, in], bias [s, out] | None, activation | None)]
        self._spaces: dict[tuple, list[dict]] = {}
        self.in_features = int(layers[0][0].shape[2])
        self.classes = int(layers[-1][0].shape[1])
        self.narrow = self.classes <= NARROW  # heads this narrow are computed classes-first
        dtype, device = layers[0][0].dtype, layers[0][0].device
        points = self.points = int(labels.shape[0])
        member_chunk, self.point_chunk = _chunking(layers, members, points, chunk_bytes)
        # Equal chunks: 100 members at a cap of 40 run as 34 + 33 + 33, not 40 + 40 + 20.
        count = -(-members // member_chunk)
        bounds = [round(i * members / count) for i in range(count + 1)]
        self.chunks = [self._prepare(slice(a, b)) for a, b in zip(bounds[:-1], bounds[1:])]
        self.onehot = torch.zeros((1, self.classes, points) if self.narrow else (1, points, self.classes),
                                  dtype=dtype, device=device)
        where = torch.arange(points, device=device)
        if self.narrow:
            self.onehot[0, self.labels, where] = 1
        else:
            self.onehot[0, where, self.labels] = 1
        # two classes: [1, 1, n], +1 where the label is 0 and -1 where it is 1
        self.signs = (1 - 2 * self.onehot[:, 1:2]) if self.classes == 2 else None
        self.ones = torch.ones(min(points, self.point_chunk), 1, dtype=dtype, device=device)

    @classmethod
    def try_build(cls, steps: list[tuple], params: dict[str, Tensor], labels: Tensor, sign: float,
                  chunk_bytes: int | None = None) -> ExpectedLossGradient | None:
        """The planned evaluation, or None when the network is not a plain Linear stack.

        ``steps`` are :class:`jostle.posterior.forward.MLPPlan` steps; ``params`` the selected
        members' stacked parameters (detached); ``labels`` [n] the cross-entropy labels;
        ``sign`` +1 (ascend the loss) or -1 (targeted: ascend the target's log-probability);
        ``chunk_bytes`` the bound on one layer's block of a chunk (default
        :data:`jostle.posterior.forward.CACHE_BYTES`).
        """
        layout = cls.layout(steps)
        if layout is None:
            return None
        names, flatten = layout
        layers = [(params[weight], None if bias is None else params[bias], act) for weight, bias, act in names]
        members = int(layers[0][0].shape[0])
        return cls(layers, flatten, labels, sign, members,
                   forward_plans.CACHE_BYTES if chunk_bytes is None else chunk_bytes)

    @staticmethod
    def layout(steps: list[tuple]) -> tuple[list[tuple], bool] | None:
        """``([(weight name, bias name | None, Activation | None)], flatten)`` of a stack the
        planned passes cover (Linear layers, each followed by at most one tanh / ReLU /
        sigmoid, the last by none; at least two layers), or None."""
        layers: list[list] = []
        flatten = False
        for step in steps:
            kind = step[0]
            if kind == "flatten":
                flatten = True
            elif kind == "linear":
                layers.append([step[1], step[2], None])
            elif is_identity(step[1]):
                continue
            elif _fused(step[1]) and layers and layers[-1][2] is None:
                layers[-1][2] = activation_of(step[1])
            else:
                return None
        if len(layers) < 2 or layers[-1][2] is not None:
            return None
        return [tuple(layer) for layer in layers], flatten

    # ------------------------------------------------------------------ preparation
    def _prepare(self, members: slice) -> dict:
        """The weights of one member chunk in the layouts the products below read."""
        first_w, first_b, _ = self.layers[0]
        w = first_w[members]
        k, width, fan_in = w.shape
        # [in + 1, k*width]: columns member by member, unit by unit; the last row is the
        # bias, met by a column of ones beside the input (one GEMM, bias included).
        bias = (first_b[members].reshape(1, k * width) if first_b is not None
                else torch.zeros(1, k * width, dtype=w.dtype, device=w.device))
        augmented = torch.cat([w.reshape(k * width, fan_in).T, bias], 0).contiguous()
        chunk = {"k": k, "start": members.start, "first_aug": augmented, "first_cat": augmented[:fan_in],
                 "first_w": w}
        hidden = []
        for weight, bias, _ in self.layers[1:-1]:
            wk = weight[members]
            wk = wk.contiguous()
            # A transposed copy for the forward product (a product over a contiguous copy
            # measured 10-25% faster from 4 to 100 points); for one or two points the
            # products only stream the weights, and reading one copy both ways measured
            # ~40% faster at 1 point (100 members of 64 x 64).
            forward = wk.transpose(1, 2) if self.points <= _FEW_POINTS else wk.transpose(1, 2).contiguous()
            hidden.append((forward, wk,
                           None if bias is None else bias[members].unsqueeze(1).contiguous()))
        chunk["hidden"] = hidden
        last_w, last_b, _ = self.layers[-1]
        wk = last_w[members].contiguous()  # [k, C, in]
        chunk["head_w"] = wk
        if self.narrow:
            chunk["head_b"] = (last_b[members].unsqueeze(2).contiguous() if last_b is not None
                               else torch.zeros(k, self.classes, 1, dtype=wk.dtype, device=wk.device))
        else:
            chunk["head_wt"] = wk.transpose(1, 2).contiguous()
            chunk["head_b"] = None if last_b is None else last_b[members].unsqueeze(1).contiguous()
        if self.classes == 2:
            chunk["head_diff"] = (wk[:, 0] - wk[:, 1]).unsqueeze(1).contiguous()  # [k, 1, in]
            bias = chunk["head_b"]  # [k, 2, 1]
            chunk["head_bias_diff"] = (bias[:, 0] - bias[:, 1]).unsqueeze(1).contiguous()  # [k, 1, 1]
        return chunk

    # ------------------------------------------------------------------ evaluation
    @torch.no_grad()
    def __call__(self, x: Tensor) -> tuple[Tensor, Tensor]:
        shape = x.shape
        flat = x.reshape(shape[0], -1) if self.flatten else x
        points = int(flat.shape[0])
        self._check(flat, shape)
        values, grads = [], []
        for p0 in range(0, points, self.point_chunk):
            where = slice(p0, min(points, p0 + self.point_chunk))
            value, grad = self._points(flat[where], where)
            values.append(value)
            grads.append(grad)
        value = values[0] if len(values) == 1 else torch.cat(values)
        grad = grads[0] if len(grads) == 1 else torch.cat(grads)
        scale = self.sign / self.members
        return value.mul_(-scale), grad.mul_(scale).reshape(shape)

    @torch.no_grad()
    def member_gradients(self, x: Tensor) -> Tensor:
        """Each member's own input gradient, ``sign * d CE_s / d x`` -> [s, n, ...]."""
        shape = x.shape
        flat = x.reshape(shape[0], -1) if self.flatten else x
        self._check(flat, shape)
        out = torch.empty(self.members, flat.shape[0], self.in_features, dtype=x.dtype, device=x.device)
        for p0 in range(0, int(flat.shape[0]), self.point_chunk):
            where = slice(p0, min(int(flat.shape[0]), p0 + self.point_chunk))
            self._points(flat[where], where, members_out=out[:, where])
        if self.sign != 1.0:
            out.mul_(self.sign)
        return out.view((self.members,) + tuple(shape))

    def _check(self, flat: Tensor, shape) -> None:
        if flat.shape[0] != int(self.labels.shape[0]) or flat.shape[1] != self.in_features:
            raise ValueError(f"x must have shape ({int(self.labels.shape[0])}, {self.in_features}) "
                             f"after flattening; got {tuple(shape)}")

    def _workspace(self, points: int, like: Tensor) -> list[dict]:
        """Per member chunk, views into blocks that every evaluation reuses.

        Fresh large blocks at each evaluation cost page faults that measured ~10% of a PGD
        step on a 2-core CPU; the blocks live in a per-thread pool, so that successive
        attacks (a widget dragging a point, a budget sweep) reuse them too, and a
        background thread never shares them. The views are built once per kernel.
        """
        # per thread too: a kernel shared between threads must not share its blocks
        key = (points, like.dtype, like.device, threading.get_ident())
        if key in self._spaces:
            return self._spaces[key]
        pool = _POOL.__dict__.setdefault("blocks", {})
        spaces = []
        for chunk in self.chunks:
            k, first_width = chunk["k"], chunk["first_cat"].shape[1]
            shapes = {"first": (points, first_width), "spread": (points, first_width),
                      "delta_head": (k, points, chunk["head_w"].shape[2])}
            for index, (wt, _, _) in enumerate(chunk["hidden"]):
                shapes[f"hidden{index}"] = (k, points, wt.shape[2])
                shapes[f"delta{index}"] = (k, points, wt.shape[1])
            views = {}
            for name, shape in shapes.items():
                slot, size = (name, like.dtype, like.device), math.prod(shape)
                if slot not in pool or pool[slot].numel() < size:
                    pool[slot] = torch.empty(size, dtype=like.dtype, device=like.device)
                views[name] = pool[slot][:size].view(shape)
            spaces.append(views)
        self._spaces[key] = spaces
        return spaces

    def _forward(self, chunk: dict, space: dict, x_aug: Tensor, points: int) -> list[Tensor]:
        """One member chunk's forward pass to the head's input, keeping each activation's
        output for its derivative: ``kept[0]`` [k, n, width] (a view of the point-by-point
        first layer), then one [k, n, width] block per hidden layer."""
        first = space["first"]  # [n, k * width]: point by point
        torch.mm(x_aug, chunk["first_aug"], out=first)
        first_act = self.layers[0][2]
        if first_act is not None:
            first_act.in_place(None, first)
        kept = [first.view(points, chunk["k"], -1).transpose(0, 1)]
        for index, ((wt, _, bias), layer) in enumerate(zip(chunk["hidden"], self.layers[1:-1])):
            h = torch.bmm(kept[-1], wt, out=space[f"hidden{index}"])
            if bias is not None:
                h.add_(bias)
            if layer[2] is not None:
                layer[2].in_place(None, h)
            kept.append(h)
        return kept

    def _logits(self, chunk: dict, kept: list[Tensor]) -> Tensor:
        """The chunk's logits: [k, C, n] for a narrow head, [k, n, C] for a wide one."""
        if self.narrow:
            return torch.baddbmm(chunk["head_b"], chunk["head_w"], kept[-1].transpose(1, 2))
        logits = torch.bmm(kept[-1], chunk["head_wt"])
        return logits if chunk["head_b"] is None else logits.add_(chunk["head_b"])

    def _backward(self, chunk: dict, space: dict, kept: list[Tensor], delta: Tensor, points: int) -> Tensor:
        """From the gradient at the head's input [k, n, width] back through the hidden layers
        and the first layer's activation; returns the point-by-point gradient at the first
        layer's output, ``spread`` [n, k * width], and leaves its [k, n, width] view in
        ``space["spread_view"]``."""
        for index in range(len(chunk["hidden"]), 0, -1):
            act = self.layers[index][2]
            if act is not None:
                act.from_output(delta, kept[index], delta)
            delta = torch.bmm(delta, chunk["hidden"][index - 1][1], out=space[f"delta{index - 1}"])
        spread = space["spread"]
        target = spread.view(points, chunk["k"], -1).transpose(0, 1)
        first_act = self.layers[0][2]
        if first_act is not None:
            first_act.from_output(delta, kept[0], target)
        else:
            target.copy_(delta)
        space["spread_view"] = target
        return spread

    def _points(self, x: Tensor, where: slice, members_out: Tensor | None = None) -> tuple[Tensor, Tensor] | None:
        """Summed log-probability of the labels and summed loss gradient over all members;
        with ``members_out`` [s, n, in], each member's own loss gradient written there instead."""
        points = int(x.shape[0])
        onehot = self.onehot[:, :, where] if self.narrow else self.onehot[:, where]
        signs = self.signs[:, :, where] if self.classes == 2 else None
        grad_t = torch.zeros(self.in_features, points, dtype=x.dtype, device=x.device)  # [in, n]
        log_prob = None
        x_aug = torch.cat([x, self.ones[:points]], 1)
        for chunk, space in zip(self.chunks, self._workspace(points, x)):
            k = chunk["k"]
            kept = self._forward(chunk, space, x_aug, points)
            delta = space["delta_head"]
            if self.classes == 2:
                # Two classes: only t = s (z_0 - z_1) matters, s = +1 for label 0 and -1 for
                # label 1. log p(label) = log sigmoid(t); d CE / d z_0 = -s sigmoid(-t) and
                # d CE / d z_1 is its negative, so the head's backward is one product with
                # the difference of its weight rows (the -s is applied to the input gradient).
                t = torch.baddbmm(chunk["head_bias_diff"], chunk["head_diff"], kept[-1].transpose(1, 2))
                t.mul_(signs)  # [k, 1, n]
                summed = torch.nn.functional.logsigmoid(t).sum(0)
                log_prob = summed if log_prob is None else log_prob.add_(summed)
                torch.mul(t.neg_().sigmoid_().transpose(1, 2), chunk["head_diff"], out=delta)
            else:
                log_p = torch.log_softmax(self._logits(chunk, kept), 1 if self.narrow else 2)
                summed = log_p.sum(0)
                log_prob = summed if log_prob is None else log_prob.add_(summed)
                # d CE / d logits = softmax - onehot
                upstream = log_p.exp_().sub_(onehot)
                torch.bmm(upstream.transpose(1, 2) if self.narrow else upstream, chunk["head_w"], out=delta)
            spread = self._backward(chunk, space, kept, delta, points)
            if members_out is not None:
                # per member, as W_s^T-side products: [k, in, width] @ [k, width, n]
                per_member = torch.bmm(chunk["first_w"].transpose(1, 2), space["spread_view"].transpose(1, 2))
                if self.classes == 2:
                    per_member.mul_(signs).neg_()
                members_out[chunk["start"]:chunk["start"] + k].copy_(per_member.transpose(1, 2))
                continue
            # sum over members and units at once, as W @ spread^T: [in, k*width] @ [k*width, n]
            # (measured ~6x faster than spread @ W^T for a 2-D input)
            grad_t.addmm_(chunk["first_cat"], spread.T)
        if members_out is not None:
            return None
        if self.classes == 2:
            return log_prob.view(-1), grad_t.mul_(signs.view(1, -1)).neg_().T.contiguous()
        label_index = self.labels[where].view(1, -1) if self.narrow else self.labels[where].view(-1, 1)
        value = log_prob.gather(0 if self.narrow else 1, label_index).view(-1)
        return value, grad_t.T.contiguous()

    # ------------------------------------------------------------------ any head
    @property
    def takes_any_head(self) -> bool:
        """Whether :meth:`head_value_and_grad` can run: one chunk holds every member and point."""
        return len(self.chunks) == 1 and self.point_chunk >= self.points

    @torch.no_grad()
    def head_value_and_grad(self, x: Tensor, head) -> tuple[Tensor, Tensor]:
        """``head(logits [s, n, C], slice) -> [n]`` over every member's logits, and its input
        gradient: the same planned passes, with autograd on the head alone (for objectives
        that are not a mean of per-member terms, such as the predictive loss or the
        margin). Needs :attr:`takes_any_head`; the labels given at build time are unused."""
        if not self.takes_any_head:
            raise ValueError("head_value_and_grad needs every member and point in one chunk; "
                             f"this plan has {len(self.chunks)} member chunks of {self.point_chunk} points")
        shape = x.shape
        flat = x.reshape(shape[0], -1) if self.flatten else x
        self._check(flat, shape)
        points = int(flat.shape[0])
        chunk, space = self.chunks[0], self._workspace(points, flat)[0]
        x_aug = torch.cat([flat, self.ones[:points]], 1)
        kept = self._forward(chunk, space, x_aug, points)
        logits = self._logits(chunk, kept)
        with torch.enable_grad():
            leaf = (logits.transpose(1, 2) if self.narrow else logits).detach().requires_grad_(True)
            value = head(leaf, slice(0, points))
            (upstream,) = torch.autograd.grad(value.sum(), leaf)  # [s, n, C]
        delta = space["delta_head"]
        torch.bmm(upstream, chunk["head_w"], out=delta)
        spread = self._backward(chunk, space, kept, delta, points)
        grad_t = torch.mm(chunk["first_cat"], spread.T)
        return value.detach(), grad_t.T.contiguous().reshape(shape)


def _fused(layer: nn.Module) -> bool:
    """Whether the planned passes cover ``layer``: an in-place forward and a derivative from
    its output (tanh, ReLU, sigmoid; none of them reads a layer setting)."""
    entry = activation_of(layer)
    return entry is not None and entry.in_place is not None and entry.from_output is not None


def _chunking(layers, members: int, points: int, chunk_bytes: int) -> tuple[int, int]:
    """(members, points) of one chunk: as many members as keep each layer's block under
    ``chunk_bytes``, or one member and as many points as fit (the one chunking rule,
    :func:`jostle.posterior.forward.chunk_sizes`, with the block as the whole budget)."""
    row_bytes = max(int(w.shape[1]) for w, _, _ in layers) * layers[0][0].element_size()
    return chunk_sizes(members, points, row_bytes, row_bytes, chunk_bytes, chunk_bytes)
