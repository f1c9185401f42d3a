"""The panels' computations for the live engine (see :mod:`jostle.live`)."""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch

from jostle.attacks.readouts import gradient_fade
from jostle.attacks.run import attack
from jostle.live.contours import decision_segments
from jostle.posterior.ensemble import Ensemble
from jostle.posterior.prediction import Prediction

__all__ = ["PointView", "GridView", "AttackView", "FadeView", "SpreadView",
           "point_part", "spread_part", "grid_prediction", "grid_part", "attack_part", "fade_part"]


@dataclass
class PointView:
    """Posterior predictive at one input. Entropies in nats.

    probs, lower, upper : (n_classes,) mean and 5% / 95% quantiles across members
    member_probs : (n_members, n_classes)
    """

    probs: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    member_probs: np.ndarray
    total: float
    aleatoric: float
    epistemic: float
    agreement: float


@dataclass
class GridView:
    """Background layer on a regular grid over the input box.

    xs : (n_x,), ys : (n_y,) grid coordinates; probs : (n_y, n_x, n_classes) predictive of the
    attacker's members; values : (n_y, n_x) the chosen layer; value_max : its scale top;
    segments : (n_segments, 4) member boundaries ``(x0, y0, x1, y1)``; segment_member : (n_segments,)
    """

    xs: np.ndarray
    ys: np.ndarray
    probs: np.ndarray
    layer: str
    values: np.ndarray
    value_max: float
    segments: np.ndarray
    segment_member: np.ndarray
    members_drawn: tuple[int, ...]


@dataclass
class AttackView:
    """One attack from the picked input.

    x_adv : (n_features,); path : (steps + 1, n_features); loss, label_prob : (steps + 1,)
    (``label_prob`` is the whole ensemble's probability of the attacked label along the path, NaN
    where the state's ``path_probs`` is False);
    distance : size of the final perturbation in the attack's norm.
    """

    x_adv: np.ndarray
    path: np.ndarray
    loss: np.ndarray
    label_prob: np.ndarray
    success: bool
    distance: float


@dataclass
class FadeView:
    """L2 norm of the expected input gradient of the loss against the samples averaged.

    From :func:`jostle.gradient_fade`. counts : (n_counts,) int; norm_mean, norm_low, norm_high :
    (n_counts,) mean, min and max over random member subsets; reference : (n_counts,)
    ``norm_mean[0] * sqrt(counts[0] / counts)`` (the 1/sqrt(S) Monte Carlo rate).
    """

    counts: np.ndarray
    norm_mean: np.ndarray
    norm_low: np.ndarray
    norm_high: np.ndarray
    reference: np.ndarray


@dataclass
class SpreadView:
    """Histogram over members of the attacked label's probability, at the input and attacked input.

    edges : (bins + 1,) over [0, 1]; before, after : (bins,) member counts (after is None without attacks)
    """

    edges: np.ndarray
    before: np.ndarray
    after: np.ndarray | None


def spread_part(before: PointView, after: PointView | None, label: int, bins: int = 20) -> SpreadView:
    edges = np.linspace(0.0, 1.0, bins + 1)

    def count(view: PointView) -> np.ndarray:
        return np.histogram(np.clip(view.member_probs[:, label], 0.0, 1.0), bins=edges)[0]

    return SpreadView(edges=edges, before=count(before), after=None if after is None else count(after))


def point_part(ens: Ensemble, point: Any) -> PointView:
    return _summary(ens.predict(as_input(ens, [point])))


def grid_prediction(ens: Ensemble, samples: int, grid: int, lo: tuple, hi: tuple) -> tuple:
    """``(xs, ys, member_probs)`` with member_probs of shape (samples, grid, grid, n_classes)."""
    xs = np.linspace(lo[0], hi[0], grid)
    ys = np.linspace(lo[1], hi[1], grid)
    gx, gy = np.meshgrid(xs, ys)
    member_probs = ens.predict(as_input(ens, np.stack([gx.ravel(), gy.ravel()], axis=1)), samples=samples).member_probs
    return xs, ys, member_probs.reshape(member_probs.shape[0], grid, grid, -1).to("cpu", torch.float32)


def grid_part(prediction: tuple, layer: str, boundaries: int) -> GridView:
    xs, ys, member_probs = prediction
    members, ny, nx, classes = member_probs.shape
    pred = Prediction(member_probs.reshape(members, ny * nx, classes))
    if layer == "predictive":
        values, top = pred.probs.max(-1).values, 1.0
    elif layer == "epistemic":
        values, top = pred.epistemic, math.log(classes)
    else:
        values, top = pred.total, math.log(classes)
    drawn = tuple(sorted(set(np.linspace(0, members - 1, min(boundaries, members)).round().astype(int).tolist())))
    segments, owners = [np.zeros((0, 4))], [np.zeros(0, dtype=np.int32)]
    for m in drawn:
        found = decision_segments(member_probs[m].numpy(), xs, ys)
        segments.append(found)
        owners.append(np.full(found.shape[0], m, dtype=np.int32))
    return GridView(xs=xs.astype(np.float32), ys=ys.astype(np.float32),
                    probs=pred.probs.reshape(ny, nx, classes).numpy().astype(np.float32), layer=layer,
                    values=values.reshape(ny, nx).numpy().astype(np.float32), value_max=float(top),
                    segments=np.concatenate(segments).astype(np.float32), segment_member=np.concatenate(owners),
                    members_drawn=drawn)


def attack_part(ens: Ensemble, state: Any, label: int) -> tuple[AttackView, PointView]:
    x = as_input(ens, [state.point])
    adv = attack(ens, x, y=torch.tensor([label], device=ens.device), method=state.method, eps=state.budget,
                 norm=state.norm, steps=state.steps, samples=state.samples, objective=state.objective, seed=state.seed)
    path = to_numpy(adv.path)[:, 0, :]
    x_adv = to_numpy(adv.x_adv)[0]
    if state.path_probs:
        along = to_numpy(ens.predict(as_input(ens, path)).probs[:, label])
    else:
        along = np.full(path.shape[0], np.nan)
    delta = x_adv - np.asarray(state.point, dtype=x_adv.dtype)
    distance = float(np.abs(delta).max() if state.norm == "inf" else np.linalg.norm(delta))
    view = AttackView(x_adv=x_adv, path=path.astype(np.float32), loss=to_numpy(adv.loss)[:, 0].astype(np.float32),
                      label_prob=along.astype(np.float32), success=bool(to_numpy(adv.success)[0]),
                      distance=distance)
    return view, point_part(ens, x_adv)


def fade_part(ens: Ensemble, point: Any, label: int, repeats: int, seed: int) -> FadeView:
    size = len(ens)
    counts = sorted({2**k for k in range(int(math.log2(size)) + 1)} | {size})
    fade = gradient_fade(ens, as_input(ens, [point]), torch.tensor([label], device=ens.device), sample_counts=counts,
                         repeats=repeats, seed=seed)
    norms = np.asarray(fade.norms["l2"], dtype=np.float64)[..., 0]  # (counts, repeats)
    return FadeView(counts=np.asarray(fade.sample_counts, dtype=np.int64),
                    norm_mean=np.asarray(fade.norm_mean["l2"], dtype=np.float64), norm_low=norms.min(axis=1),
                    norm_high=norms.max(axis=1), reference=np.asarray(fade.reference["l2"], dtype=np.float64))


def _summary(pred: Prediction) -> PointView:
    return PointView(probs=to_numpy(pred.probs[0]).astype(np.float64),
                     lower=to_numpy(pred.lower[0]).astype(np.float64), upper=to_numpy(pred.upper[0]).astype(np.float64),
                     member_probs=to_numpy(pred.member_probs[:, 0]).astype(np.float32),
                     total=float(pred.total[0]), aleatoric=float(pred.aleatoric[0]),
                     epistemic=float(pred.epistemic[0]), agreement=float(pred.agreement[0]))


def as_input(ens: Ensemble, values: Any) -> torch.Tensor:
    """Points for ``ens``: in its dtype, on its device (views are computed where the members live)."""
    return torch.as_tensor(np.asarray(values, dtype=np.float64), dtype=ens.dtype, device=ens.device)


def to_numpy(value: Any) -> np.ndarray:
    """A view's array, from a tensor on any device."""
    if isinstance(value, torch.Tensor):
        return value.detach().cpu().numpy()
    return np.asarray(value)
