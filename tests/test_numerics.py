"""The shared numerics helpers against general-purpose references (itertools, numpy)."""
from __future__ import annotations

import itertools

import numpy as np
import pytest

from hamstride.numerics import runs, runs_1d


def _groupby_runs(mask) -> list[tuple[int, int]]:
    """Reference: the runs of True by itertools.groupby over the mask's values."""
    out, i = [], 0
    for value, group in itertools.groupby(mask):
        n = len(list(group))
        if value:
            out.append((i, i + n))
        i += n
    return out


@pytest.mark.parametrize("seed", range(5))
def test_runs_1d_equals_itertools_groupby(seed):
    rng = np.random.default_rng(seed)
    for n in (0, 1, 2, 17, 300):
        mask = rng.random(n) < 0.6
        assert [tuple(r) for r in runs_1d(mask)] == _groupby_runs(mask.tolist())


def test_runs_of_a_2d_mask_are_each_columns_runs_1d():
    mask = np.random.default_rng(9).random((50, 4)) < 0.5
    col, start, stop = runs(mask)
    for c in range(4):
        expected = runs_1d(mask[:, c])
        assert np.array_equal(np.stack([start[col == c], stop[col == c]], axis=1).reshape(-1, 2), expected)
