"""Exact smallest L-inf flipping distance of a small ReLU network, as a mixed-integer linear program.

Big-M encoding of each ReLU (Tjeng, Xiao & Tedrake 2019, "Evaluating robustness of neural
networks with mixed integer programming", ICLR, sec. 4.1): for a neuron with pre-activation
bounds ``l < 0 < u``, ``a >= 0, a >= z, a <= u d, a <= z - l (1 - d)`` with binary ``d``;
stable neurons are ``a = z`` or ``a = 0``. The bounds are plain interval arithmetic over the
L-inf ball of radius ``reach`` (intersected with the data box), so the program is exact for
distances up to ``reach``. Solved with ``scipy.optimize.milp`` (HiGHS). Written in numpy,
independent of jostle's bound code.
"""
from __future__ import annotations

import numpy as np
from scipy.optimize import Bounds, LinearConstraint, milp


def milp_radius(layers: list[tuple[np.ndarray, np.ndarray]], x: np.ndarray, label: int, reach: float,
                box: tuple[float, float] | None = None) -> float:
    """min ||x' - x||_inf subject to logit[label] - logit[other] <= 0, for a two-class ReLU MLP.

    ``layers`` is [(W, b), ...] with ReLU between them; returns inf when no flip lies within ``reach``.
    """
    d = x.size
    lo, hi = x - reach, x + reach
    if box is not None:
        lo, hi = np.maximum(lo, box[0]), np.minimum(hi, box[1])
    # variables: x' (d), t, then per hidden layer z (m), a (m), binary (m)
    hidden = [w.shape[0] for w, _ in layers[:-1]]
    size = d + 1 + 3 * sum(hidden)
    rows, lower, upper = [], [], []
    var_lo, var_hi = np.full(size, -np.inf), np.full(size, np.inf)
    var_lo[:d], var_hi[:d] = lo, hi
    var_lo[d], var_hi[d] = 0.0, reach
    integrality = np.zeros(size)
    for i in range(d):  # |x'_i - x_i| <= t
        for sign in (1.0, -1.0):
            row = np.zeros(size)
            row[i], row[d] = sign, -1.0
            rows.append(row), lower.append(-np.inf), upper.append(sign * x[i])
    prev_index = list(range(d))
    prev_lo, prev_hi = lo, hi
    start = d + 1
    for (w, b), m in zip(layers[:-1], hidden):
        z_index = list(range(start, start + m))
        a_index = list(range(start + m, start + 2 * m))
        bin_index = list(range(start + 2 * m, start + 3 * m))
        start += 3 * m
        centre, radius = (prev_lo + prev_hi) / 2, (prev_hi - prev_lo) / 2
        z_lo, z_hi = w @ centre + b - np.abs(w) @ radius, w @ centre + b + np.abs(w) @ radius
        for k in range(m):
            row = np.zeros(size)
            row[prev_index] = w[k]
            row[z_index[k]] = -1.0
            rows.append(row), lower.append(-b[k]), upper.append(-b[k])
            _relu_rows(rows, lower, upper, size, z_index[k], a_index[k], bin_index[k], z_lo[k], z_hi[k])
            integrality[bin_index[k]] = 1
            var_lo[bin_index[k]], var_hi[bin_index[k]] = 0, 1
            var_lo[a_index[k]] = 0.0
        prev_index, prev_lo, prev_hi = a_index, np.maximum(z_lo, 0), np.maximum(z_hi, 0)
    w, b = layers[-1]
    other = 1 - label
    row = np.zeros(size)
    row[prev_index] = w[label] - w[other]
    rows.append(row), lower.append(-np.inf), upper.append(-(b[label] - b[other]))
    cost = np.zeros(size)
    cost[d] = 1.0
    result = milp(cost, constraints=LinearConstraint(np.array(rows), lower, upper), integrality=integrality,
                  bounds=Bounds(var_lo, var_hi), options={"mip_rel_gap": 1e-9})
    return float(result.x[d]) if result.status == 0 else float("inf")


def _relu_rows(rows, lower, upper, size, z, a, binary, low, high):
    def add(coefficients: dict[int, float], lo: float, hi: float) -> None:
        row = np.zeros(size)
        for index, value in coefficients.items():
            row[index] = value
        rows.append(row), lower.append(lo), upper.append(hi)

    if low >= 0:
        add({a: 1.0, z: -1.0}, 0.0, 0.0)
    elif high <= 0:
        add({a: 1.0}, 0.0, 0.0)
    else:
        add({a: 1.0, z: -1.0}, 0.0, np.inf)  # a >= z
        add({a: 1.0, binary: -high}, -np.inf, 0.0)  # a <= u d
        add({a: 1.0, z: -1.0, binary: -low}, -np.inf, -low)  # a <= z - l (1 - d)
