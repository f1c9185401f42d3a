"""The limit chart's numbers (jostle.sweeps.chart_data.limit_grid) from a made-up read-out."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from jostle.sweeps.chart_data import limit_grid, limit_sample_options


def _frame():
    """Two widths x two sizes of 'hmc' (100 members, one cell missing, one cell with two seeds) and
    a deep ensemble of 5; value = width + size/1000 + S/1e4 + seed/1e5 (made-up, to trace cells)."""
    rows = []
    cells = [(4, 50, [0]), (16, 50, [0, 1]), (4, 200, [0])]  # (16, 200) has no run
    for width, size, seeds in cells:
        for seed in seeds:
            for method, members in (("hmc", 100), ("deep_ensemble", 5)):
                for samples in sorted({min(s, members) for s in (1, 4, 16, 64, members)}):
                    for which in ("expected", "member"):
                        value = width + size / 1000 + samples / 1e4 + seed / 1e5 + (which == "member")
                        rows.append({"method": method, "width": width, "n_train": size, "seed": seed,
                                     "key": f"{method}-{width}-{size}-{seed}", "members": members,
                                     "samples": samples, "which": which, "l2_median": value,
                                     "linf_median": value / 2, "abs_mean": value / 3})
    return pd.DataFrame(rows)


def test_cells_sit_at_width_across_and_size_up_with_missing_ones_empty():
    grid = limit_grid(_frame(), "hmc", "16", saved_keys={"hmc-16-50-1"})
    assert grid.widths == [4, 16] and grid.train_sizes == [50, 200]
    assert grid.values[0, 0] == 4 + 0.05 + 16e-4  # exact: the one run's stored value
    # two seeds: the median of two is their mean; float64 rounding of numbers near 16
    assert grid.values[0, 1] == pytest.approx(16 + 0.05 + 16e-4 + 0.5e-5, rel=1e-15)
    assert np.isnan(grid.values[1, 1]) and grid.keys[1][1] == "" and grid.runs[1, 1] == 0
    assert grid.runs.tolist() == [[1, 2], [1, 0]]
    assert grid.keys[0][1] == "hmc-16-50-1" and grid.saved[0, 1]  # the saved run is the one to open
    assert not grid.saved[0, 0] and "ensemble not saved" in grid.notes[0][0]
    assert "median of 2 runs" in grid.notes[0][1]


def test_sample_count_is_clipped_to_each_posterior_and_all_is_its_size():
    frame = _frame()
    ensemble = limit_grid(frame, "deep_ensemble", "64")
    assert ensemble.values[0, 0] == 4 + 0.05 + 5e-4  # S = 64 clipped to the 5 members
    assert limit_grid(frame, "deep_ensemble", "all").values[0, 0] == ensemble.values[0, 0]
    assert limit_grid(frame, "hmc", "all").values[0, 0] == 4 + 0.05 + 100e-4
    assert limit_grid(frame, "hmc", 1, statistic="linf_median").values[0, 0] == (4 + 0.05 + 1e-4) / 2


def test_curves_and_the_one_over_root_s_reference():
    grid = limit_grid(_frame(), "hmc", "all")
    row, column, counts, values = grid.curves[0]
    assert (row, column) == (0, 0) and counts.tolist() == [1, 4, 16, 64, 100]
    assert values.tolist() == [4 + 0.05 + s / 1e4 for s in (1, 4, 16, 64, 100)]
    scale = np.median([c[3][0] for c in grid.curves])
    # Monte Carlo rate (standard Monte Carlo theory): c / sqrt(S), the same float64 operations
    np.testing.assert_array_equal(grid.reference, scale / np.sqrt(np.array([1, 4, 16, 64, 100])))


def test_log_colour_scale_spans_the_cells_with_numbered_ticks():
    grid = limit_grid(_frame(), "hmc", "4")
    finite = grid.values[np.isfinite(grid.values)]
    assert (grid.colour_low, grid.colour_high) == (finite.min(), finite.max())
    assert len(grid.legend) >= 2 and all(grid.colour_low * 0.99 <= t <= grid.colour_high * 1.01 for t in grid.legend)


def test_sample_options_and_bad_statistic():
    configs = [{"evaluation": {}}, {"evaluation": {"gradient_samples": [2, "all"]}}]
    assert limit_sample_options(configs) == ["1", "2", "4", "16", "64", "all"]
    assert limit_sample_options([]) == []
    with pytest.raises(ValueError, match=r"statistic must be one of .*'l2_median'.*; got 'l3'"):
        limit_grid(_frame(), "hmc", "all", statistic="l3")
