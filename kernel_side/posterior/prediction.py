"""The posterior predictive and its split into aleatoric and epistemic parts."""
from __future__ import annotations

import math
from functools import cached_property

import torch
from torch import Tensor

__all__ = ["Prediction", "entropy"]

_QUANTILE_LIMIT = 2**24


def entropy(probs: Tensor, dim: int = -1) -> Tensor:
    """Shannon entropy in nats along ``dim``, with 0 log 0 = 0."""
    return -torch.special.xlogy(probs, probs).sum(dim)


class Prediction:
    """The posterior predictive at N points from S members.

    Attributes (all lazily computed, then cached)
    ----------------------------------------------
    member_probs : Tensor of shape (S, N, C)
    probs : Tensor of shape (N, C)
        Mean of member probabilities (probabilities are averaged, never logits).
    label : Tensor of shape (N,)
    total : Tensor of shape (N,)
        Entropy of the mean prediction.
    aleatoric : Tensor of shape (N,)
        Mean of the members' entropies.
    epistemic : Tensor of shape (N,)
        Mutual information between the label and the parameters: total - aleatoric.
    std, lower, upper : Tensor of shape (N, C)
        Spread of class probabilities across members (population std, 5% and 95% quantiles).
    agreement : Tensor of shape (N,)
        Share of members whose own top class is the predicted label.

    Entropies are in nats; :meth:`in_bits` returns the same prediction in bits.
    """

    def __init__(self, member_probs: Tensor, classes: list[str] | None = None, units: str = "nats"):
        if member_probs.ndim != 3:
            raise ValueError(f"member_probs must have shape (S, N, C); got {tuple(member_probs.shape)}")
        if units not in ("nats", "bits"):
            raise ValueError(f"units must be one of 'nats', 'bits'; got {units!r}")
        self.member_probs = member_probs
        self.classes = classes
        self.units = units
        self._scale = 1.0 if units == "nats" else 1.0 / math.log(2.0)

    def in_bits(self) -> Prediction:
        return Prediction(self.member_probs, classes=self.classes, units="bits")

    @cached_property
    def probs(self) -> Tensor:
        return self.member_probs.mean(0)

    @cached_property
    def label(self) -> Tensor:
        return self.probs.argmax(-1)

    @cached_property
    def total(self) -> Tensor:
        return entropy(self.probs) * self._scale

    @cached_property
    def aleatoric(self) -> Tensor:
        return entropy(self.member_probs).mean(0) * self._scale

    @cached_property
    def epistemic(self) -> Tensor:
        # Mutual information is >= 0; rounding can push the difference a hair below.
        return (self.total - self.aleatoric).clamp_min(0.0)

    @cached_property
    def std(self) -> Tensor:
        return self.member_probs.std(0, correction=0)

    @cached_property
    def lower(self) -> Tensor:
        return self.quantile(0.05)

    @cached_property
    def upper(self) -> Tensor:
        return self.quantile(0.95)

    @cached_property
    def agreement(self) -> Tensor:
        votes = self.member_probs.argmax(-1)
        return (votes == self.label.unsqueeze(0)).to(self.member_probs.dtype).mean(0)

    def quantile(self, q: float) -> Tensor:
        """Per-class ``q``-quantile across members (linear interpolation, ``torch.quantile``), shape (N, C)."""
        if not 0.0 <= float(q) <= 1.0:
            raise ValueError(f"q must be a float in [0, 1]; got {q}")
        members, points, classes = self.member_probs.shape
        # torch.quantile refuses inputs past 2**24 elements: take blocks of points under that.
        block = max(1, _QUANTILE_LIMIT // max(1, members * classes))
        parts = [torch.quantile(self.member_probs[:, start:start + block], float(q), dim=0)
                 for start in range(0, points, block)]
        return torch.cat(parts) if parts else self.member_probs.new_empty((0, classes))

    def __len__(self) -> int:
        return int(self.member_probs.shape[1])

    def __repr__(self) -> str:
        s, n, c = self.member_probs.shape
        return f"Prediction(members={s}, points={n}, classes={c}, units={self.units!r})"
