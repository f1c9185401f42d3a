"""What the sweep chart shows: one point per run, filtered, with per-family correlations.

Pure functions over the long-form results of :meth:`jostle.store.RunStore.results`, so
the widget holds no numerical code and these can be checked against scipy directly.
"""
from __future__ import annotations

import json
from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np

from ._checks import check_choice

__all__ = ["SweepPoints", "Correlation", "ROBUSTNESS_MEASURES", "sweep_view", "sweep_points",
           "family_correlations", "FAMILIES"]

#: y-axis choices: column or derived quantity -> axis title (higher is more robust for both)
ROBUSTNESS_MEASURES = {
    "robustness": "softmax robustness",
    "unflipped": "share of points the attack did not flip (1 - success rate)",
}
FAMILIES = ("deterministic", "Bayesian")


@dataclass(frozen=True)
class SweepPoints:
    """The runs drawn for one filter setting (arrays of shape (n_runs,)).

    ``family`` holds 0 for deterministic and 1 for Bayesian runs; ``descriptions`` one
    plain-text note per run (its configuration and scores, one item per line) for hovering.
    """

    keys: list[str]
    accuracy: np.ndarray
    value: np.ndarray
    family: np.ndarray
    methods: list[str]
    descriptions: list[str]
    saved: np.ndarray


@dataclass(frozen=True)
class Correlation:
    """Pearson and Spearman correlation of robustness with accuracy within one family.

    Statistics are NaN when n < 3 or either variable is constant (no correlation defined).
    """

    family: str
    n: int
    pearson_r: float
    pearson_p: float
    spearman_rho: float
    spearman_p: float


def sweep_view(frame: Any, methods: Sequence[str] | None, budget: float, attack: str,
               measure: str = "robustness") -> tuple[SweepPoints, list[Correlation]]:
    """Everything the chart draws for one filter setting: the points and the correlations."""
    points = sweep_points(frame, methods, budget, attack, measure)
    return points, family_correlations(points)


def sweep_points(frame: Any, methods: Sequence[str] | None, budget: float, attack: str,
                 measure: str = "robustness") -> SweepPoints:
    """Select the rows for one attack and budget, from the chosen methods, one per run.

    Parameters
    ----------
    frame : pandas.DataFrame
        Long-form results (one row per run x attack x budget) of finished runs.
    methods : sequence of str or None
        Posterior methods to keep; None keeps all.
    budget : float
        Attack budget eps (matched to 1e-12).
    attack : str
        Attack label, as stored.
    measure : {"robustness", "unflipped"}
        The y value: softmax robustness, or 1 - attack success rate.
    """
    check_choice("measure", measure, tuple(ROBUSTNESS_MEASURES))
    rows = frame[(frame["attack"] == attack) & (np.abs(frame["budget"] - budget) < 1e-12)]
    if methods is not None:
        rows = rows[rows["method"].isin(list(methods))]
    rows = rows.drop_duplicates("key")
    value = rows["robustness"] if measure == "robustness" else 1.0 - rows["success_rate"]
    family = (rows["family"] == "Bayesian").astype(np.uint8).to_numpy()
    return SweepPoints(
        keys=rows["key"].tolist(),
        accuracy=rows["accuracy"].to_numpy(dtype=float),
        value=value.to_numpy(dtype=float),
        family=family,
        methods=rows["method"].tolist(),
        descriptions=[_describe(r) for _, r in rows.iterrows()],
        saved=rows["ensemble_path"].notna().to_numpy() if "ensemble_path" in rows else np.zeros(len(rows), bool),
    )


def family_correlations(points: SweepPoints) -> list[Correlation]:
    """Pearson (``scipy.stats.pearsonr``) and Spearman (``scipy.stats.spearmanr``) correlation
    between accuracy and the robustness value, separately for each family."""
    from scipy import stats

    out = []
    for code, family in enumerate(FAMILIES):
        chosen = points.family == code
        x, y = points.accuracy[chosen], points.value[chosen]
        n = int(chosen.sum())
        if n < 3 or np.ptp(x) == 0 or np.ptp(y) == 0:
            out.append(Correlation(family, n, *(float("nan"),) * 4))
            continue
        pearson = stats.pearsonr(x, y)
        spearman = stats.spearmanr(x, y)
        out.append(Correlation(family, n, float(pearson.statistic), float(pearson.pvalue),
                               float(spearman.statistic), float(spearman.pvalue)))
    return out


def _describe(row: Any) -> str:
    hyper = json.loads(row["method_settings"]) if isinstance(row.get("method_settings"), str) else {}
    settings = ", ".join(f"{k}={v}" for k, v in sorted(hyper.items()))
    parts = [
        f"{_method_label(row['method'], hyper)}" + (f" ({settings})" if settings else ""),
        f"{row['dataset']} n_train={row['n_train']}",
        f"depth {row['depth']} x width {row['width']} {row['activation']}",
        f"seed {row['seed']}",
        f"accuracy {row['accuracy']:.3f}, NLL {row['nll']:.3f}, ECE {row['ece']:.3f}",
        f"{row['attack']} eps={row['budget']:g}: success {row['success_rate']:.3f}, robustness {row['robustness']:.3f}",
    ]
    return "\n".join(parts)


def _method_label(method: str, hyper: dict) -> str:
    """The fit's own name for its method: VI runs say whether their ELBO was tempered."""
    if method != "vi":
        return method
    from .bayes_by_backprop import DEFAULT_KL_WEIGHT, vi_method_label

    return vi_method_label(hyper.get("kl_weight", DEFAULT_KL_WEIGHT))
