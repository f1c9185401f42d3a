"""The posterior ensemble: one module template plus parameters stacked over S samples.

Every posterior in jostle (HMC draws, variational draws, deep-ensemble members, folded
MC-dropout masks, Laplace draws, a deterministic net with S = 1) is an :class:`Ensemble`.
Forward passes run over all members at once and are chunked so that the extra memory
stays under ``memory_budget`` bytes whatever S and N are.
"""
from __future__ import annotations

import copy
from collections.abc import Callable, Iterable, Sequence
from numbers import Integral
from typing import Any

import torch
from torch import Tensor, nn

from jostle.common.checks import (
    as_label_tensor,
    check_choice,
    check_int,
    check_points,
    check_seed,
    show_value,
)
from jostle.files.posterior_file import write_posterior
from jostle.posterior.architectures import architecture_of
from jostle.posterior.description import describe
from jostle.posterior.forward import ForwardPlan, make_plan
from jostle.posterior.gradients import OBJECTIVES, GradientEngine, check_backward
from jostle.posterior.prediction import Prediction

__all__ = ["Ensemble", "DEFAULT_MEMORY_BUDGET"]

DEFAULT_MEMORY_BUDGET = 256 * 2**20


class Ensemble:
    """A posterior ensemble: ``template`` evaluated with each of S stacked parameter sets.

    Parameters
    ----------
    template : nn.Module
        The architecture. Its own parameter values are not used.
    params : dict of str to Tensor of shape (S, ...)
        Every parameter and buffer of ``template``, stacked along a new leading axis.
    meta : dict, optional
        JSON-serialisable record: class names, data bounds, how the posterior was made.
    memory_budget : int
        Upper bound in bytes on the activations one chunk of a forward pass may hold.
    posterior : object, optional
        The distribution the members were drawn from (``fit_vi``'s
        :class:`VariationalPosterior`, ``fit_laplace``'s :class:`LastLayerLaplace`): anything
        with ``draw(samples, seed) -> Ensemble`` and ``to(device, dtype)``. Slicing and
        :meth:`subset` keep it (a slice of draws still comes from it), :meth:`to` moves it
        with the members; :meth:`save` stores the draws only, so a loaded ensemble has
        ``posterior`` None.

    Examples
    --------
    >>> import jostle
    >>> nets = [jostle.mlp(2, 2, hidden=(4,)) for _ in range(3)]
    >>> ens = Ensemble.from_modules(nets)
    >>> ens.logits(torch.zeros(5, 2)).shape
    torch.Size([3, 5, 2])
    """

    def __init__(
        self,
        template: nn.Module,
        params: dict[str, Tensor],
        meta: dict | None = None,
        memory_budget: int = DEFAULT_MEMORY_BUDGET,
        posterior: Any = None,
    ):
        if not isinstance(template, nn.Module):
            raise TypeError(f"template must be a torch.nn.Module; got {type(template).__name__}")
        _refuse_unvectorisable(template, "template")
        expected = {**dict(template.named_parameters()), **dict(template.named_buffers())}
        names = set(params)
        if names != set(expected):
            missing = sorted(set(expected) - names)
            extra = sorted(names - set(expected))
            raise ValueError(
                f"params must hold exactly the template's parameters and buffers; "
                f"missing {missing}, unexpected {extra}"
            )
        sizes = {int(v.shape[0]) for v in params.values()} if params else {0}
        if len(sizes) != 1 or 0 in sizes:
            raise ValueError(f"params must share one leading sample dimension S >= 1; got sizes {sorted(sizes)}")
        for name, value in params.items():
            if tuple(value.shape[1:]) != tuple(expected[name].shape):
                raise ValueError(
                    f"params[{name!r}] must have shape (S, {', '.join(map(str, expected[name].shape))}); "
                    f"got {tuple(value.shape)}"
                )
        for name, value in params.items():
            if value.device.type != "meta" and value.is_floating_point() and not bool(torch.isfinite(value).all()):
                bad = (~torch.isfinite(value.flatten(1))).any(1).nonzero().flatten().tolist()
                raise ValueError(
                    f"params[{name!r}] must contain only finite values; got NaN or inf in members {bad[:5]}"
                )
        self.template = template.eval()
        for p in self.template.parameters():
            p.requires_grad_(False)
        self.params = {name: params[name] for name in expected}
        self.meta = dict(meta or {})
        if "architecture" not in self.meta:
            self.meta["architecture"] = architecture_of(template)
        self.memory_budget = check_int("memory_budget", memory_budget, low=1)
        self.posterior = posterior
        self._plan: ForwardPlan = make_plan(self.template, self.params)
        self._engine = GradientEngine(self._plan)

    @property
    def posterior(self) -> Any:
        """The distribution the members were drawn from, or None (see the class docstring)."""
        return self._posterior

    @posterior.setter
    def posterior(self, value: Any) -> None:
        if value is not None and not (callable(getattr(value, "draw", None)) and callable(getattr(value, "to", None))):
            raise TypeError(f"posterior must be None or have draw(samples, seed) and to(device, dtype) methods; "
                            f"got {type(value).__name__}")
        self._posterior = value

    # ------------------------------------------------------------------ construction
    @classmethod
    def from_modules(cls, modules: Iterable[nn.Module], meta: dict | None = None, **kwargs: Any) -> Ensemble:
        """Stack the parameters of modules that share one architecture.

        Raises
        ------
        ValueError
            If the list is empty, the modules differ in structure, or a module holds a
            layer whose output depends on the batch or on randomness (BatchNorm or
            Dropout in training mode).
        """
        modules = list(modules)
        if not modules:
            raise ValueError("modules must be a non-empty list of torch.nn.Module; got an empty list")
        for i, module in enumerate(modules):
            if not isinstance(module, nn.Module):
                raise TypeError(f"modules[{i}] must be a torch.nn.Module; got {type(module).__name__}")
            _refuse_unvectorisable(module, f"modules[{i}]")
        template = copy.deepcopy(modules[0])
        return cls.from_state_dicts(template, [m.state_dict() for m in modules], meta=meta, **kwargs)

    @classmethod
    def from_state_dicts(
        cls, template: nn.Module, state_dicts: Sequence[dict[str, Tensor]], meta: dict | None = None, **kwargs: Any
    ) -> Ensemble:
        """Stack state dicts (e.g. saved checkpoints) that all fit ``template``."""
        state_dicts = list(state_dicts)
        if not state_dicts:
            raise ValueError("state_dicts must be a non-empty list; got an empty list")
        reference = template.state_dict()
        first_device = next(iter(state_dicts[0].values())).device if state_dicts[0] else None
        for i, state in enumerate(state_dicts):
            devices = {value.device for value in state.values()}
            if first_device is not None and devices - {first_device}:
                raise ValueError(f"state_dicts[{i}] (modules[{i}]) must be on device {str(first_device)!r} like "
                                 f"the first; got {sorted(str(d) for d in devices)} (move them with .to(...))")
            if set(state) != set(reference):
                missing = sorted(set(reference) - set(state))
                extra = sorted(set(state) - set(reference))
                raise ValueError(f"state_dicts[{i}] does not fit the template: missing {missing}, unexpected {extra}")
            for name, value in state.items():
                if tuple(value.shape) != tuple(reference[name].shape):
                    raise ValueError(
                        f"state_dicts[{i}][{name!r}] must have shape {tuple(reference[name].shape)}; "
                        f"got {tuple(value.shape)}"
                    )
        params = {
            name: torch.stack([state[name].detach() for state in state_dicts]).to(reference[name].dtype)
            for name in reference
        }
        return cls(template, params, meta=meta, **kwargs)

    # ------------------------------------------------------------------ container protocol
    def __len__(self) -> int:
        return int(next(iter(self.params.values())).shape[0])

    def __getitem__(self, index: int | slice | Sequence[int] | Tensor) -> Ensemble:
        if isinstance(index, Integral) and not isinstance(index, bool):
            index = [check_int("index", index, low=-len(self), high=len(self) - 1)]
        if isinstance(index, slice):
            chosen = {name: value[index] for name, value in self.params.items()}
        else:
            chosen = {name: value[self._indices(index, "index")] for name, value in self.params.items()}
        if next(iter(chosen.values())).shape[0] == 0:
            raise ValueError(f"index must select at least one member of {len(self)}; got {show_value(index)}")
        return self._with(chosen)

    def subset(self, k: int, seed: int = 0) -> Ensemble:
        """``k`` members drawn at random without replacement (seeded)."""
        k = check_int("k", k, low=1, high=len(self))
        generator = torch.Generator().manual_seed(check_seed(seed))
        order = torch.randperm(len(self), generator=generator)[:k]
        return self[order]

    def to(self, device: torch.device | str | None = None, dtype: torch.dtype | None = None) -> Ensemble:
        """A copy on another device or floating dtype."""
        moved = {
            name: value.to(device=device, dtype=dtype if value.is_floating_point() else None)
            for name, value in self.params.items()
        }
        posterior = None if self.posterior is None else self.posterior.to(device=device, dtype=dtype)
        return self._with(moved, template=copy.deepcopy(self.template).to(device=device, dtype=dtype),
                          posterior=posterior)

    def module(self, i: int) -> nn.Module:
        """Member ``i`` as an ordinary ``nn.Module`` (a copy)."""
        i = check_int("i", i, low=-len(self), high=len(self) - 1)
        member = copy.deepcopy(self.template)
        member.load_state_dict({name: value[i] for name, value in self.params.items()})
        return member

    @property
    def device(self) -> torch.device:
        return next(iter(self.params.values())).device

    @property
    def dtype(self) -> torch.dtype:
        floats = [v for v in self.params.values() if v.is_floating_point()]
        return floats[0].dtype if floats else torch.float32

    @property
    def classes(self) -> list[str] | None:
        return self.meta.get("classes")

    @property
    def num_parameters(self) -> int:
        """Parameters per member."""
        parameter_names = dict(self.template.named_parameters())
        return sum(int(v[0].numel()) for name, v in self.params.items() if name in parameter_names)

    def __repr__(self) -> str:
        method = self.meta.get("method", "unspecified")
        arch = self.meta.get("architecture") or {"builder": type(self.template).__name__}
        return (
            f"Ensemble(S={len(self)}, method={method!r}, architecture={arch.get('builder')!r}, "
            f"parameters_per_member={self.num_parameters}, device={str(self.device)!r})"
        )

    def info(self) -> None:
        """Print how this posterior was made and how far to trust it (see :func:`jostle.describe`)."""
        print(describe(self))

    # ------------------------------------------------------------------ computation
    def logits(self, x: Any, samples: Any = None) -> Tensor:
        """Member logits for inputs ``x``.

        Parameters
        ----------
        x : Tensor of shape (n_points, *input_shape)
            Inputs shared by every member. Gradients flow to ``x`` when it requires grad.
        samples : int, sequence of int, Tensor of indices, or None
            ``None`` uses every member, an int ``k`` the first ``k``, a sequence those members.

        Returns
        -------
        Tensor of shape (n_members_used, n_points, n_classes)
        """
        x = self._prepare_input(x)
        params = self._selected(samples)
        return self._plan.run(params, x, self.memory_budget)

    def predict(self, x: Any, samples: Any = None) -> Prediction:
        """The posterior predictive at ``x`` with its uncertainty split (no gradients).

        Returns
        -------
        Prediction
            ``probs`` (mean of member probabilities), ``member_probs``, ``label``,
            ``total``, ``aleatoric``, ``epistemic`` and the spread across members.
        """
        x = self._prepare_input(x)
        params = self._selected(samples)
        with torch.no_grad():
            member_probs = self._plan.run(params, x, self.memory_budget, transform=_softmax)
        return Prediction(member_probs, classes=self.classes)

    def map_logits(self, x: Any, fn: Callable[[Tensor, slice], Tensor], samples: Any = None) -> Tensor:
        """Apply ``fn(logits_chunk [S, n, C], point_slice) -> Tensor [n, ...]`` over point chunks.

        Each chunk holds every selected member for a block of points, so ``fn`` can average
        over members (an expected loss, a predictive loss). Results are concatenated along
        points. Gradients flow through when enabled; use this to bound the memory a
        backward pass holds.
        """
        x = self._prepare_input(x)
        params = self._selected(samples)
        return self._plan.run_by_points(params, x, self.memory_budget, fn)

    def value_and_input_grad(self, x: Any, y: Any, objective: str = "expected_loss", members: Any = None,
                             targeted: bool = False, backward: str = "auto") -> tuple[Tensor, Tensor]:
        """An attack objective per point and its gradient in the input (no graph is kept).

        Parameters
        ----------
        x : Tensor of shape (n_points, *input_shape)
        y : Tensor of shape (n_points,) of int, or None
            Labels; None takes the full ensemble's predicted labels.
        objective : {"expected_loss", "predictive", "margin"}
            See :mod:`jostle.posterior.gradients`.
        members : int, sequence of int, Tensor of indices, or None
            The members averaged over, as ``samples`` in :meth:`logits`.
        targeted : bool
            Return the objective's negative (``y`` is then a target: ascending the result
            pulls its probability up).
        backward : {"auto", "autograd"}
            ``"auto"``: the plan chosen when the ensemble was built; ``"autograd"``:
            ``torch.autograd`` through the batched forward (the reference).

        Returns
        -------
        value : Tensor of shape (n_points,)
        grad : Tensor of shape (n_points, *input_shape)
            ``d value[i] / d x[i]``; points are independent.
        """
        objective = check_choice("objective", objective, OBJECTIVES)
        if not isinstance(targeted, bool):
            raise ValueError(f"targeted must be True or False; got {show_value(targeted)}")
        x, labels = self._points_and_labels(x, y)
        sign = -1.0 if targeted else 1.0
        return self._engine.value_and_input_grad(self, x, labels, objective, members, sign, check_backward(backward))

    def member_input_grads(self, x: Any, y: Any, members: Any = None, backward: str = "auto") -> Tensor:
        """Each member's input gradient of its own cross-entropy at labels ``y``.

        Parameters are as in :meth:`value_and_input_grad`; ``backward="autograd"`` takes
        ``torch.func.vmap(grad(...))`` over members.

        Returns
        -------
        Tensor of shape (n_members_used, n_points, *input_shape)
        """
        x, labels = self._points_and_labels(x, y)
        return self._engine.member_input_grads(self, x, labels, members, check_backward(backward))

    def _points_and_labels(self, x: Any, y: Any) -> tuple[Tensor, Tensor]:
        x = self._prepare_input(x).detach()
        n = int(x.shape[0])
        if y is None:
            return x, self.predict(x).label
        if isinstance(y, Tensor) and y.dtype == torch.long and y.shape == (n,) and y.device == self.device:
            # an attack's own checked labels, step after step: no copy, no host round trip
            return x, y
        return x, as_label_tensor("y", y, n_points=n).to(self.device)

    # ------------------------------------------------------------------ persistence
    def save(self, path: str, extra_meta: dict | None = None) -> None:
        """Write safetensors plus JSON metadata atomically (temp file, then rename).

        Only the members and ``meta`` are written; ``posterior`` is not (a loaded ensemble
        has ``posterior`` None; keep the fitted object, or refit, to draw more members).
        """
        write_posterior(path, self.params, {**self.meta, **(extra_meta or {})})

    # ------------------------------------------------------------------ helpers
    def _with(self, params: dict[str, Tensor], template: nn.Module | None = None,
              posterior: Any = "same") -> Ensemble:
        clone = object.__new__(Ensemble)
        clone.template = self.template if template is None else template
        clone.params = params
        clone.meta = copy.deepcopy(self.meta)
        clone.memory_budget = self.memory_budget
        clone.posterior = self.posterior if isinstance(posterior, str) else posterior
        clone._plan = make_plan(clone.template, params)
        clone._engine = GradientEngine(clone._plan)
        return clone

    def _indices(self, samples: Any, name: str = "samples") -> Tensor:
        size = len(self)
        if isinstance(samples, Tensor):
            if samples.dtype == torch.bool:
                if samples.shape != (size,):
                    raise ValueError(
                        f"{name} as a boolean mask must have shape ({size},); got shape {tuple(samples.shape)}"
                    )
                samples = samples.nonzero().flatten()
            if samples.is_floating_point() or samples.is_complex():
                raise ValueError(f"{name} must hold integer member indices; got dtype {samples.dtype}")
            index = samples.to(torch.long).flatten()
        else:
            try:
                listed = list(samples)
                out_of_range = [i for i in listed if isinstance(i, Integral) and not -size <= i < size]
                if out_of_range:
                    raise ValueError(f"{name} must index members in [0, {size}); got {show_value(listed)}")
                index = torch.as_tensor(listed, dtype=torch.long)
            except (TypeError, ValueError, RuntimeError) as err:
                if str(err).startswith(f"{name} must index"):
                    raise
                raise ValueError(
                    f"{name} must be None, an int or a sequence of member indices; got {show_value(samples)}"
                ) from None
        if index.numel() and (int(index.min()) < -size or int(index.max()) >= size):
            raise ValueError(f"{name} must index members in [0, {size}); got {show_value(index)}")
        return index.to(self.device)

    def _selected(self, samples: Any) -> dict[str, Tensor]:
        if samples is None:
            return self.params
        if isinstance(samples, Integral) and not isinstance(samples, bool):
            k = check_int("samples", samples, low=1, high=len(self))
            return {name: value[:k] for name, value in self.params.items()}
        index = self._indices(samples)
        if index.numel() == 0:
            raise ValueError("samples must select at least one member; got an empty selection")
        return {name: value[index] for name, value in self.params.items()}

    def check_input_shape(self, x: Tensor, name: str = "x") -> None:
        """Raise a ValueError naming ``name`` when ``x`` [n, ...] cannot feed the first layer."""
        self._plan.check_input(x, name)

    def _prepare_input(self, x: Any, name: str = "x") -> Tensor:
        return check_points(name, x, self)


def _softmax(logits: Tensor) -> Tensor:
    """Softmax over classes; contiguous out.

    Narrow heads come out of the forward pass classes-first underneath (a [s, n, C] view
    of a [s, C, n] block), where a softmax along the classes runs over a short outer axis:
    measured ~10x faster than along a contiguous last axis of 2 classes.
    """
    if logits.dim() >= 2 and logits.stride(-1) != 1 and logits.stride(-2) == 1:
        return torch.softmax(logits.transpose(-1, -2), dim=-2).transpose(-1, -2).contiguous()
    return torch.softmax(logits, dim=-1)


_BATCH_DEPENDENT = (nn.modules.batchnorm._BatchNorm, nn.modules.instancenorm._InstanceNorm)
_RANDOM = (nn.Dropout, nn.Dropout1d, nn.Dropout2d, nn.Dropout3d, nn.AlphaDropout, nn.FeatureAlphaDropout)


def _refuse_unvectorisable(module: nn.Module, name: str) -> None:
    for sub_name, sub in module.named_modules():
        where = f"{name}.{sub_name}" if sub_name else name
        if isinstance(sub, _BATCH_DEPENDENT) and sub.training:
            raise ValueError(
                f"{where} is a {type(sub).__name__} in training mode, whose output depends on the "
                f"whole batch; call .eval() on the module before building an Ensemble"
            )
        if isinstance(sub, _RANDOM) and sub.training and sub.p > 0:
            raise ValueError(
                f"{where} is a {type(sub).__name__} in training mode, which draws fresh noise on every "
                f"call; call .eval(), or use jostle.fit_dropout to fold dropout masks into members"
            )
