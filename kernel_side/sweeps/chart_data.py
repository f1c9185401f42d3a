"""What the sweep chart shows: one point per run, filtered, with per-family correlations.

Pure functions over the long-form results of :meth:`jostle.sweeps.results_db.RunStore.results`, so
the widget holds no numerical code and these can be checked against scipy directly.
"""
from __future__ import annotations

import itertools
import json
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from jostle.common.checks import check_choice
from jostle.common.ticks import log_ticks
from jostle.fitting.variational import DEFAULT_KL_WEIGHT, vi_method_label
from jostle.sweeps.spec import DEFAULT_GRADIENT_SAMPLES

__all__ = ["SweepPoints", "Correlation", "ROBUSTNESS_MEASURES", "sweep_view", "sweep_points",
           "family_correlations", "exact_permutation_p", "FAMILIES", "LimitGrid", "limit_grid",
           "limit_sample_options", "GRADIENT_MEASURES"]

#: y-axis choices: column or derived quantity -> axis title (higher is more robust for both)
ROBUSTNESS_MEASURES = {
    "robustness": "softmax robustness",
    "unflipped": "share of points the attack did not flip (1 - success rate)",
}
FAMILIES = ("deterministic", "Bayesian")
#: below this many runs no p-value is given: the exact permutation p of a perfect rank order
#: of 3 runs is already 1/3, and the asymptotic one would be meaningless
MIN_RUNS_FOR_P = 4
#: up to this many runs p is exact, over all n! pairings (8! = 40,320); above, scipy's t approximation
EXACT_MAX_RUNS = 8


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

    Coefficients are NaN when n < 3 or either variable is constant (no correlation defined);
    p-values are NaN as well when n < 4. ``p_method`` says how the p-values were found:
    ``"exact permutation"`` (n <= 8), ``"t approximation"`` (scipy's, n > 8), ``"n too small"``
    or ``"constant values"`` (none).
    """

    family: str
    n: int
    pearson_r: float
    pearson_p: float
    spearman_rho: float
    spearman_p: float
    p_method: str = ""


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
    between accuracy and the robustness value, separately for each family.

    Two-sided p-values: none below 4 runs, exact permutation p-values (:func:`exact_permutation_p`)
    up to 8 runs, and scipy's t approximation above.
    """
    from scipy import stats

    out = []
    nan = float("nan")
    for code, family in enumerate(FAMILIES):
        chosen = points.family == code
        x, y = points.accuracy[chosen], points.value[chosen]
        n = int(chosen.sum())
        if n < 3 or np.ptp(x) == 0 or np.ptp(y) == 0:
            reason = "n too small" if n < MIN_RUNS_FOR_P else "constant values"
            out.append(Correlation(family, n, nan, nan, nan, nan, reason))
            continue
        pearson, spearman = stats.pearsonr(x, y), stats.spearmanr(x, y)
        if n < MIN_RUNS_FOR_P:
            p_values, method = (nan, nan), "n too small"
        elif n <= EXACT_MAX_RUNS:
            ranks = (stats.rankdata(x), stats.rankdata(y))  # Spearman's rho is Pearson's r of the ranks
            p_values, method = (exact_permutation_p(x, y), exact_permutation_p(*ranks)), "exact permutation"
        else:
            p_values, method = (float(pearson.pvalue), float(spearman.pvalue)), "t approximation"
        out.append(Correlation(family, n, float(pearson.statistic), p_values[0],
                               float(spearman.statistic), p_values[1], method))
    return out


def exact_permutation_p(x: Any, y: Any) -> float:
    """Two-sided exact permutation p-value of Pearson's r between ``x`` and ``y`` (Pitman 1937).

    Every one of the n! pairings of ``y`` with ``x`` is equally likely under no association;
    with ``r*`` over them, p = min(1, 2 min(P(r* <= r), P(r* >= r))), the two-sided rule of
    ``scipy.stats.permutation_test``. Meant for small n (n! rows are enumerated).
    """
    x = np.asarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    xc, yc = x - x.mean(), y - y.mean()
    scale = np.linalg.norm(xc) * np.linalg.norm(yc)
    pairings = np.array(list(itertools.permutations(range(len(y)))))
    null = (yc[pairings] @ xc) / scale
    observed = float(xc @ yc / scale)
    # r lies in [-1, 1] and each value is a sum of at most 8 rounded products: pairings with the
    # same r agree to a few 1e-16, far inside 1e-12, so ties count as ties
    tie = 1e-12
    less = float(np.mean(null <= observed + tie))
    greater = float(np.mean(null >= observed - tie))
    return min(1.0, 2.0 * min(less, greater))


#: limit-chart colour choices: read-out statistic -> its readable name
GRADIENT_MEASURES = {
    "l2_median": "median L2 norm of the expected gradient",
    "linf_median": "median L-inf norm of the expected gradient",
    "abs_mean": "mean absolute component of the expected gradient",
}


@dataclass(frozen=True)
class LimitGrid:
    """The limit chart for one method and sample count: widths across, training sizes up.

    ``values``, ``keys``, ``saved`` and ``runs`` have shape (n_sizes, n_widths), row 0 the
    smallest training size; a cell without a run holds NaN, ``""``, False and 0. A cell's
    value is the median over its runs (seeds, other settings); its key is one of those runs,
    a saved one where there is one. ``curves`` holds per filled cell ``(size index, width
    index, sample counts, values)``: the statistic against S for the norm-against-S view,
    with ``reference`` the Monte Carlo rate c / sqrt(S) at those counts, c the median of the
    cells' values at S = 1 (standard Monte Carlo theory). ``colour_low``/``colour_high`` bound
    the log colour scale; ``legend`` holds its ticks.
    """

    widths: list[int]
    train_sizes: list[int]
    values: np.ndarray
    keys: list[list[str]]
    saved: np.ndarray
    runs: np.ndarray
    notes: list[list[str]]
    curves: list[tuple]
    reference_counts: np.ndarray
    reference: np.ndarray
    colour_low: float
    colour_high: float
    legend: np.ndarray


def limit_sample_options(configs: Any) -> list[str]:
    """The sample counts the chart offers for these run configurations: the counts their
    evaluations ask for (``gradient_samples``, ascending, as text), then ``"all"``."""
    counts = {s for config in configs
              for s in config.get("evaluation", {}).get("gradient_samples", DEFAULT_GRADIENT_SAMPLES) if s != "all"}
    return [str(s) for s in sorted(counts)] + ["all"] if configs else []


def limit_grid(gradients: Any, method: str, samples: str | int, statistic: str = "l2_median",
               saved_keys: Any = ()) -> LimitGrid:
    """The cells of the limit chart from the long read-out of :meth:`RunStore.gradients`.

    Parameters
    ----------
    gradients : pandas.DataFrame
        The read-out (``which == "expected"`` rows are used).
    method : str
        Posterior method whose runs fill the grid.
    samples : int, str or "all"
        Sample count S; each run shows its read-out at min(S, its size) (the read-out is
        clipped the same way), "all" at its size.
    statistic : {"l2_median", "linf_median", "abs_mean"}
    saved_keys : collection of str
        Runs whose ensemble was saved (their cells open an explorer when clicked).
    """
    check_choice("statistic", statistic, tuple(GRADIENT_MEASURES))
    rows = gradients[(gradients["which"] == "expected") & (gradients["method"] == method)]
    rows = rows[rows["width"].notna()]  # widths are the depth-width MLP's; other architectures have none
    widths = sorted({int(w) for w in rows["width"]})
    sizes = sorted({int(n) for n in rows["n_train"]})
    shape = (len(sizes), len(widths))
    values, runs = np.full(shape, np.nan), np.zeros(shape, dtype=np.int64)
    keys = [["" for _ in widths] for _ in sizes]
    notes = [["" for _ in widths] for _ in sizes]
    saved, saved_keys = np.zeros(shape, dtype=bool), set(saved_keys)
    curves = []
    for (size, width), cell in rows.groupby(["n_train", "width"], sort=True):
        i, j = sizes.index(int(size)), widths.index(int(width))
        chosen = cell[cell["samples"] == _clipped(cell["members"], samples)]
        if chosen.empty:
            continue
        values[i, j], runs[i, j] = float(np.median(chosen[statistic])), chosen["key"].nunique()
        ordered = sorted(chosen["key"].unique(), key=lambda k: (k not in saved_keys, k))
        keys[i][j], saved[i, j] = ordered[0], ordered[0] in saved_keys
        by_count = cell.groupby("samples")[statistic].median()
        curves.append((i, j, by_count.index.to_numpy(dtype=np.int64), by_count.to_numpy(dtype=float)))
        notes[i][j] = _cell_note(method, int(size), int(width), chosen, statistic, values[i, j], saved[i, j])
    return LimitGrid(widths, sizes, values, keys, saved, runs, notes, curves, *_reference(curves),
                     *_log_scale(values))


def _clipped(members: Any, samples: str | int):
    members = members.to_numpy(dtype=np.int64)
    return members if str(samples) == "all" else np.minimum(int(samples), members)


def _reference(curves: list) -> tuple[np.ndarray, np.ndarray]:
    if not curves:
        return np.zeros(0), np.zeros(0)
    counts = np.unique(np.concatenate([c[2] for c in curves])).astype(np.int64)
    at_one = [c[3][0] for c in curves if c[2][0] == 1 and c[3][0] > 0]
    scale = float(np.median(at_one)) if at_one else float("nan")
    return counts, scale / np.sqrt(counts)


def _log_scale(values: np.ndarray) -> tuple[float, float, np.ndarray]:
    finite = values[np.isfinite(values) & (values > 0)]
    if not finite.size:
        return 1.0, 10.0, log_ticks(1.0, 10.0)
    low, high = float(finite.min()), float(finite.max())
    if high <= low * (1 + 1e-9):  # one value: a decade around it
        low, high = low / np.sqrt(10.0), high * np.sqrt(10.0)
    return low, high, log_ticks(low, high)


def _cell_note(method: str, size: int, width: int, chosen: Any, statistic: str, value: float, saved: bool) -> str:
    count = chosen["samples"].iloc[0]
    members = chosen["members"].iloc[0]
    parts = [f"{method}, width {width}, n_train {size}",
             f"{GRADIENT_MEASURES[statistic]}: {value:.3g}",
             f"S = {count} of {members} members" + (f", median of {len(chosen)} runs" if len(chosen) > 1 else ""),
             "click to open it" if saved else "ensemble not saved"]
    return "\n".join(parts)


def _describe(row: Any) -> str:
    hyper = json.loads(row["method_settings"]) if isinstance(row.get("method_settings"), str) else {}
    settings = ", ".join(f"{k}={v}" for k, v in sorted(hyper.items()))
    parts = [
        f"{_method_label(row['method'], hyper)}" + (f" ({settings})" if settings else ""),
        f"{row['dataset']} n_train={row['n_train']}",
        (f"depth {row['depth']} x width {row['width']} {row['activation']}"
         if row.get("architecture", "mlp") == "mlp" else f"architecture {row['architecture']}"),
        f"seed {row['seed']}",
        f"accuracy {row['accuracy']:.3f}, NLL {row['nll']:.3f}, ECE {row['ece']:.3f}",
        f"{row['attack']} eps={row['budget']:g}: success {row['success_rate']:.3f}, robustness {row['robustness']:.3f}",
    ]
    return "\n".join(parts)


def _method_label(method: str, hyper: dict) -> str:
    """The fit's own name for its method: VI runs say whether their ELBO was tempered."""
    if method != "vi":
        return method
    return vi_method_label(hyper.get("kl_weight", DEFAULT_KL_WEIGHT))
