"""A pair pass fed in chunks of sets gives the sums of one pass over the whole stack."""

import numpy as np
import pytest

from pairvel.core.errors import InputError
from pairvel.maps.trend import remove_redshift_trend
from pairvel.pairs.chunked import WORKING_COPIES, ChunkedPass, sets_per_chunk
from pairvel.pairs.estimator import pairwise_momentum


@pytest.fixture(scope="module")
def survey():
    rng = np.random.default_rng(41)
    n = 1500
    pos = rng.uniform(0, 300, (n, 3)) + [900.0, 0.0, 0.0]
    return dict(pos=pos, regions=rng.integers(0, 7, n), z=rng.uniform(0.2, 0.4, n), w=rng.uniform(0.5, 1.5, n),
                temps=rng.normal(0, 10, (45, n)), edges=np.linspace(0, 90, 4))


def chunked(s, *, method, chunk, order):
    engine = ChunkedPass(s["pos"], s["edges"], s["temps"].shape[0], regions=s["regions"], redshifts=s["z"],
                         weights=s["w"], method=method, chunk_sets=chunk)
    for k in range(0, order.size, chunk):
        rows = order[k:k + chunk]
        engine.add(rows, s["temps"][rows])
    return engine, engine.result()


@pytest.mark.parametrize("method", ["linear", "direct"])
def test_chunks_in_any_order_give_the_one_pass_sums(survey, method):
    """Internal regression: every set is its own column of the sums, so chunks of 4 sets given in a
    shuffled order reproduce one pass of the same path (direct: bit for bit, the loop runs once on
    the same stack; linear: the same products, BLAS may round shorter blocks differently at 1e-16)."""
    s = survey
    one = pairwise_momentum(s["pos"], s["temps"], s["edges"], regions=s["regions"], redshifts=s["z"],
                            weights=s["w"], method=method)
    engine, res = chunked(s, method=method, chunk=4, order=np.random.default_rng(2).permutation(45))
    assert engine.linear == (method == "linear")
    scale = np.abs(one.p).max()
    for got, want in ((res.p, one.p), (res.p_jk, one.p_jk), (res.numerator, one.numerator)):
        if method == "direct":
            np.testing.assert_array_equal(got, want)
        else:
            np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-12 * scale)
    for got, want in ((res.denominator, one.denominator), (res.pair_counts, one.pair_counts), (res.z_eff, one.z_eff),
                      (res.den_jk, one.den_jk)):
        np.testing.assert_array_equal(got, want)


def test_auto_takes_the_linear_path_when_the_sets_need_several_chunks(survey):
    """The direct path would hold every set until the end: with more sets than a chunk, auto goes linear."""
    s = survey
    many, _ = chunked(s, method="auto", chunk=10, order=np.arange(45))
    one, _ = chunked(s, method="auto", chunk=45, order=np.arange(45))
    assert many.linear and not one.linear  # 45 sets in one chunk: the cost model picks direct here


def test_every_row_once(survey):
    s = survey
    engine = ChunkedPass(s["pos"], s["edges"], 3, regions=s["regions"], method="linear")
    engine.add(slice(0, 2), s["temps"][:2])
    with pytest.raises(InputError, match="given twice"):
        engine.add([1], s["temps"][2:3])
    with pytest.raises(InputError, match="1 of 3 temperature sets were never given"):
        engine.result()
    with pytest.raises(InputError, match="a chunk of 2 temperature sets was given 1 rows"):
        engine.add([2], s["temps"][:2])
    bad = s["temps"][2:3].copy()
    bad[0, 5] = np.nan
    with pytest.raises(InputError, match="temperatures must be finite"):
        engine.add([2], bad)


def test_chunk_size_from_the_budget():
    """Analytic: WORKING_COPIES copies of (sets x N) float64 within the budget, at least one set."""
    assert sets_per_chunk(1_000_000, 1.0) == int(1e9 // (WORKING_COPIES * 8e6))
    assert sets_per_chunk(1_000_000, 1e-6) == 1
    assert WORKING_COPIES * 8 * 1e6 * sets_per_chunk(1_000_000, 2.0) <= 2e9


def test_trend_of_many_sets_in_one_call_is_that_of_each_set():
    """Internal regression: each set's arithmetic in the trend removal does not depend on the other
    sets, so removing the trend of a chunk at once equals doing it set by set, bit for bit: the gridded
    sum (20000 tracers) and the windowed direct one (300 tracers, where maps.trend's cost model takes it)."""
    rng = np.random.default_rng(5)
    for n in (20000, 300):
        z = rng.uniform(0.1, 0.6, n)
        sets = rng.normal(0, 20, (7, n)) + 30 * z
        together = remove_redshift_trend(sets, z, sigma_z=0.01)
        for k in range(sets.shape[0]):
            np.testing.assert_array_equal(together[k], remove_redshift_trend(sets[k], z, sigma_z=0.01))
