"""The main pass's in-place accumulator (gate.stats.local.RunningGram) gives the statistics of
the merge route (CentredGram.from_block + merge) and of a two-pass reference, for uneven chunks,
empty chunks, weights and both memory orders of a block."""

from __future__ import annotations

import numpy as np
import pytest

from gate.stats.accumulators import CentredGram
from gate.stats.local import RunningGram


@pytest.mark.parametrize("weighted", [False, True])
def test_running_gram_matches_numpy_weighted_covariance_and_the_merge_route(weighted: bool
                                                                             ) -> None:
    rng = np.random.default_rng(20_260_513)  # invented fleet sensor readings, offset and scaled
    p = 23
    running, merged = RunningGram(p), CentredGram.empty(p)
    blocks, weights = [], []
    for k, n in enumerate((40, 0, 7, 300, 1, 64)):
        x = rng.standard_normal((n, p)) * 4.0 + 100.0
        w = rng.random(n) if weighted else None
        blocks.append(x.copy())
        weights.append(w if w is not None else np.ones(n))
        merged = merged.merge(CentredGram.from_block(x.copy(), w))
        running.add(np.asfortranarray(x) if k % 2 else x.copy(), w)
    result = running.result()
    x_all, w_all = np.vstack(blocks), np.concatenate(weights)
    # Outside reference: numpy's weighted covariance (two passes over all rows), times sum(w).
    reference = np.cov(x_all, rowvar=False, aweights=w_all, ddof=0) * w_all.sum()
    scale = np.abs(reference).max()
    assert np.abs(result.comoment - reference).max() / scale < 1e-12
    assert np.abs(result.comoment - merged.comoment).max() / scale < 1e-14
    assert np.array_equal(result.comoment, result.comoment.T)
    assert result.rows == merged.rows == x_all.shape[0]
    assert result.weight_sum == pytest.approx(w_all.sum(), rel=1e-15)
    assert np.allclose(result.mean, np.average(x_all, axis=0, weights=w_all), rtol=1e-14)


def test_running_gram_of_nothing_is_empty() -> None:
    running = RunningGram(3)
    running.add(np.empty((0, 3)), None)
    running.add(np.ones((4, 3)), np.zeros(4))
    assert running.result().weight_sum == 0.0 and running.result().rows == 0


def test_known_column_sums_give_the_same_bits_as_a_second_pass() -> None:
    """The main pass hands RunningGram the column sums the finiteness check computed; sums / n
    is what numpy's mean computes (same pairwise sum, one division), so the statistics are
    identical bit for bit, for both memory orders."""
    rng = np.random.default_rng(20_260_514)  # invented bike-share counts, offset and scaled
    with_sums, without = RunningGram(9), RunningGram(9)
    for k, n in enumerate((1000, 37, 4096, 1)):
        x = rng.standard_normal((n, 9)) * 10.0 ** rng.integers(-3, 4, 9) + 250.0
        x = np.asfortranarray(x) if k % 2 else x
        with_sums.add(x.copy(order="A"), None, sums=x.sum(axis=0))
        without.add(x.copy(order="A"), None)
    a, b = with_sums.result(), without.result()
    assert np.array_equal(a.mean, b.mean)
    assert np.array_equal(a.comoment, b.comoment)
