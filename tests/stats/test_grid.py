"""The probability grid: equal-width thresholds, logit resolution, bin rule."""

from __future__ import annotations

import math

import numpy as np
import pytest

from plumbwatch.stats import grid


def test_edges_shape_and_ends() -> None:
    e = grid.GRID_EDGES
    assert e.dtype == np.float64 and e[0] == 0.0 and e[-1] == 1.0
    assert np.all(np.diff(e) > 0)
    assert e.size - 1 == grid.N_BINS
    assert grid.P_CLIP in e and grid.P_HIGH in e


@pytest.mark.parametrize("n_bins", [10, 15])
def test_floor_rule_thresholds_are_edges(n_bins: int) -> None:
    for k in range(1, n_bins):
        t = grid.floor_rule_threshold(k, n_bins)
        assert t in grid.GRID_EDGES
        assert math.floor(t * n_bins) >= k > math.floor(np.nextafter(t, 0) * n_bins)


def test_documented_threshold_values() -> None:
    # Documented in grid.py: k/B except 9/10; linspace differs at 3, 6, 7 of 10.
    assert grid.floor_rule_threshold(3, 10) == 0.3 != np.linspace(0, 1, 11)[3]
    assert grid.floor_rule_threshold(9, 10) == 0.8999999999999999
    assert all(grid.floor_rule_threshold(k, 15) == k / 15 for k in range(1, 15))


@pytest.mark.parametrize("n_bins", [10, 15])
def test_coarse_map_reproduces_floor_rule(n_bins: int) -> None:
    rng = np.random.default_rng(1)
    near = np.concatenate(
        [
            grid.GRID_EDGES,
            np.nextafter(grid.GRID_EDGES, -1)[1:],
            np.nextafter(grid.GRID_EDGES, 2)[:-1],
        ]
    )
    p = np.concatenate([rng.random(100_000), near, np.arange(n_bins + 1) / n_bins])
    rule = np.minimum(np.floor(p * n_bins), n_bins - 1).astype(np.intp)
    assert np.array_equal(grid.coarse_map(n_bins)[grid.bin_index(p)], rule)


def test_bin_index_equals_searchsorted() -> None:
    rng = np.random.default_rng(2)
    near = np.concatenate(
        [
            grid.GRID_EDGES,
            np.nextafter(grid.GRID_EDGES, -1)[1:],
            np.nextafter(grid.GRID_EDGES, 2)[:-1],
        ]
    )
    p = np.concatenate(
        [
            rng.random(200_000),
            1 / (1 + np.exp(-rng.normal(0, 8, 200_000))),
            near,
            [0.0, 5e-324, 1e-300, 1.0],
        ]
    )
    ref = np.minimum(np.searchsorted(grid.GRID_EDGES, p, side="right") - 1, grid.N_BINS - 1)
    assert np.array_equal(grid.bin_index(p), ref)
    assert grid.bin_index([1.0])[0] == grid.N_BINS - 1
    assert grid.bin_index([0.0])[0] == 0


def test_logit_resolution_near_the_ends() -> None:
    e = grid.GRID_EDGES[1:-1]
    z = np.log(e) - np.log1p(-e)
    assert np.diff(z).max() <= grid.LOGIT_STEP * (1 + 1e-9)
    # 1e-4 and 2e-4 (and their mirror images) fall in different, narrow bins.
    b = grid.bin_index(np.array([1e-4, 1.02e-4, 2e-4, 1 - 1e-4, 1 - 2e-4]))
    assert len(set(b.tolist())) == 5


def test_clipped_logit() -> None:
    z = grid.clipped_logit(np.array([0.0, 0.5, 1.0]))
    assert z[1] == 0.0 and z[0] == pytest.approx(math.log(1e-6 / (1 - 1e-6)))
    assert z[2] == pytest.approx(-z[0], rel=1e-9)


def test_coarse_map_rejects_other_bin_counts() -> None:
    with pytest.raises(ValueError, match="n_bins"):
        grid.coarse_map(12)
