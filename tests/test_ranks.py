"""Our mid-ranks and beta quantiles give scipy.stats's own bits (reference: scipy.stats.rankdata with
method='average' and scipy.stats.beta.ppf, the functions they replace in a run)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from planrunner.engines.pvalues import clopper_pearson
from planrunner.engines.ranks import rankdata


def _same_bits(ours: np.ndarray, theirs: np.ndarray) -> bool:
    return ours.dtype == theirs.dtype and ours.shape == theirs.shape and ours.tobytes() == theirs.tobytes()


@pytest.mark.parametrize("seed", range(6))
def test_ranks_equal_scipy_on_random_tied_and_untied_rows(seed):
    rng = np.random.default_rng(seed)
    for shape in [(1,), (2,), (7,), (50,), (3, 40), (4, 2, 25)]:
        for values in (rng.normal(size=shape), rng.integers(0, 4, size=shape).astype(float),
                       rng.integers(-3, 3, size=shape), np.round(rng.exponential(size=shape), 1)):
            for axis in range(-len(shape), len(shape)):
                assert _same_bits(rankdata(values, axis=axis), stats.rankdata(values, axis=axis)), (shape, axis)


@pytest.mark.parametrize("values", [
    [], [5.0], [2.0, 2.0, 2.0], [np.inf, -np.inf, 0.0, np.inf], [-0.0, 0.0, 1.0], [1.0, np.nan, 0.5],
    [[1.0, 2.0, 2.0], [np.nan, 1.0, 0.0], [3.0, 3.0, 3.0]], [[], []], [True, False, True],
    [1e308, -1e308, 5e-324, -5e-324, 0.0]])
def test_ranks_equal_scipy_on_edges(values):
    assert _same_bits(rankdata(np.asarray(values)), stats.rankdata(values, axis=-1))


def test_clopper_pearson_is_scipy_beta_quantiles_bit_for_bit():
    # the interval as the textbook writes it with scipy.stats.beta.ppf (Clopper & Pearson 1934)
    rng = np.random.default_rng(3)
    for trials in [1, 2, 3, 10, 99, 999, 9999, 10**5, 10**7]:
        counts = {0, 1, 2, trials // 2, trials - 2, trials - 1, trials, *rng.integers(0, trials + 1, 12).tolist()}
        for count in sorted(c for c in counts if 0 <= c <= trials):
            for level in (0.5, 0.9, 0.95, 0.99, 0.999):
                tail = (1.0 - level) / 2.0
                lower = 0.0 if count == 0 else float(stats.beta.ppf(tail, count, trials - count + 1))
                upper = 1.0 if count == trials else float(stats.beta.ppf(1.0 - tail, count + 1, trials - count))
                ours = clopper_pearson(count, trials, level)
                assert np.float64(ours).tobytes() == np.float64((lower, upper)).tobytes(), (count, trials, level)
