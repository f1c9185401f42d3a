"""Accuracy, proper scoring rules, calibration and out-of-distribution detection.

Each function takes predictive probabilities ``probs`` of shape (N, C) (or a
:class:`~jostle.Prediction`) and integer labels ``y`` of shape (N,). scikit-learn
computes the scores it already has (log loss, ROC AUC).
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from jostle.common.checks import as_label_tensor, as_numeric_array, check_int
from jostle.posterior.prediction import Prediction

__all__ = ["accuracy", "nll", "brier", "ece", "reliability", "ood_auroc", "Reliability"]


@dataclass(frozen=True)
class Reliability:
    """Equal-width confidence bins: edges (M+1,), and per bin confidence, accuracy, count (M,).

    Empty bins have count 0 and NaN confidence and accuracy.
    """

    edges: np.ndarray
    confidence: np.ndarray
    accuracy: np.ndarray
    count: np.ndarray


def accuracy(probs: Any, y: Any) -> float:
    """Share of points whose most probable class is the label (higher is better)."""
    p, labels = _inputs(probs, y)
    return float((p.argmax(1) == labels).mean())


def nll(probs: Any, y: Any) -> float:
    """Mean negative log-likelihood in nats (lower is better); ``sklearn.metrics.log_loss``."""
    from sklearn.metrics import log_loss

    p, labels = _inputs(probs, y)
    # float32 rows sum to 1 only within ~1e-7 per term; scikit-learn warns below its own tolerance
    p = p / p.sum(1, keepdims=True)
    return float(log_loss(labels, p, labels=list(range(p.shape[1]))))


def brier(probs: Any, y: Any) -> float:
    """Multi-class Brier score: mean over points of sum_c (p_c - [y = c])^2 (lower is better).

    For two classes this is twice ``sklearn.metrics.brier_score_loss`` on p(class 1).
    """
    p, labels = _inputs(probs, y)
    onehot = np.eye(p.shape[1])[labels]
    return float(((p - onehot) ** 2).sum(1).mean())


def reliability(probs: Any, y: Any, n_bins: int = 15) -> Reliability:
    """Top-label reliability table over ``n_bins`` equal-width confidence bins on [0, 1]."""
    n_bins = check_int("n_bins", n_bins, low=1)
    p, labels = _inputs(probs, y)
    confidence = p.max(1)
    correct = (p.argmax(1) == labels).astype(float)
    edges = np.linspace(0.0, 1.0, n_bins + 1)
    # Bins are (lo, hi] except the first, which includes 0, as in Guo et al. 2017.
    which = np.clip(np.searchsorted(edges, confidence, side="left") - 1, 0, n_bins - 1)
    count = np.bincount(which, minlength=n_bins)
    with np.errstate(invalid="ignore", divide="ignore"):
        conf = np.bincount(which, weights=confidence, minlength=n_bins) / count
        acc = np.bincount(which, weights=correct, minlength=n_bins) / count
    return Reliability(edges, conf, acc, count)


def ece(probs: Any, y: Any, n_bins: int = 15) -> float:
    """Expected calibration error with equal-width bins (Naeini et al. 2015; Guo et al. 2017).

    sum over bins of (count / N) * |accuracy - confidence|; lower is better.
    """
    table = reliability(probs, y, n_bins)
    filled = table.count > 0
    weights = table.count[filled] / table.count.sum()
    return float((weights * np.abs(table.accuracy[filled] - table.confidence[filled])).sum())


def ood_auroc(scores_in: Any, scores_out: Any) -> float:
    """ROC AUC for telling out-of-distribution points (label 1) from in-distribution ones
    by a score that should be higher out of distribution, e.g. predictive entropy.
    ``sklearn.metrics.roc_auc_score``; 0.5 is chance, 1 is perfect.
    """
    from sklearn.metrics import roc_auc_score

    inside = _vector("scores_in", scores_in)
    outside = _vector("scores_out", scores_out)
    labels = np.r_[np.zeros(len(inside)), np.ones(len(outside))]
    return float(roc_auc_score(labels, np.r_[inside, outside]))


def _check_rows(p: np.ndarray) -> None:
    rule = "probs must hold finite, non-negative rows that sum to 1"
    if not np.all(np.isfinite(p)):
        raise ValueError(f"{rule}; got NaN or inf in row {int(np.flatnonzero(~np.isfinite(p).all(1))[0])}")
    if p.min() < 0:
        raise ValueError(f"{rule}; got {p.min():g} in row {int(np.flatnonzero((p < 0).any(1))[0])}")
    sums = p.sum(1)
    worst = int(np.argmax(np.abs(sums - 1)))
    # float32 probabilities sum to 1 within ~C * 1.2e-7; 1e-4 leaves room for C up to ~800
    if abs(sums[worst] - 1) > 1e-4:
        raise ValueError(f"{rule}; row {worst} sums to {sums[worst]:g}")


def _vector(name: str, value: Any) -> np.ndarray:
    array = as_numeric_array(name, value)
    if array.ndim != 1 or array.size == 0:
        raise ValueError(f"{name} must be a non-empty 1-d array; got shape {array.shape}")
    if not np.all(np.isfinite(array)):
        raise ValueError(f"{name} must contain only finite values; got NaN or inf")
    return array


def _inputs(probs: Any, y: Any) -> tuple[np.ndarray, np.ndarray]:
    if isinstance(probs, Prediction):
        probs = probs.probs
    p = as_numeric_array("probs", probs)
    if p.ndim != 2 or p.shape[1] < 2:
        raise ValueError(f"probs must have shape (n_points, n_classes >= 2); got shape {p.shape}")
    if p.shape[0] == 0:
        raise ValueError(f"probs must hold at least one point; got shape {p.shape}")
    _check_rows(p)
    labels = as_label_tensor("y", y, n_points=p.shape[0], classes=p.shape[1]).numpy()
    return p, labels
