"""A run whose temperature sets are made and summed in chunks equals the run of one stacked pass."""

import warnings

import numpy as np

from pairvel.core.errors import PairvelWarning

EXTRA = """
[compute]
memory_budget_gb = {budget}
"""


def run(folder, budget, monkeypatch=None, stacked=False):
    from pairvel import pipeline
    from pairvel.input.config import load_config

    text = (folder / "run.toml").read_text()
    text = text.replace("n_regions = 12", 'n_regions = 12\nestimator = "simulations"\nn_sim = 8')
    text = text.replace("n_random = 2", "n_random = 5\nn_shuffle = 7\nn_shuffle_z = 4\nrotation_deg = [8.0, 12.0]")
    text = text.replace("radius_arcmin = 12.0", "radius_arcmin = 12.0\nradii_arcmin = [16.0]")
    path = folder / f"run_{budget}_{stacked}.toml"
    path.write_text(text + EXTRA.format(budget=budget))
    if stacked:
        monkeypatch.setattr(pipeline, "chunked_pair_pass", pipeline.stacked_pair_pass)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", PairvelWarning)
        return pipeline.run_pipeline(load_config(path))


def test_chunked_sets_reproduce_the_stacked_pass(tiny_survey, monkeypatch):
    """Internal regression: chunks of 3 sets (budget 1e-4 GB at 600 tracers), every set in one chunk, and the
    one stack of every set give the same curves, covariances, null curves and fits (random draws in the same
    order: a shuffle or simulated sky drawn out of turn would change the null and simulated curves entirely;
    the paths differ only in the pair engine's path, linear against direct, which round at 1e-16)."""
    from pairvel.pairs.chunked import sets_per_chunk

    assert sets_per_chunk(600, 1e-4) == 3
    chunks = run(tiny_survey, 1e-4)
    whole = run(tiny_survey, 100.0)
    stacked = run(tiny_survey, 1e-4, monkeypatch, stacked=True)
    for other in (whole, stacked):
        scale = np.abs(other.p).max()
        for got, want in ((chunks.p, other.p), (chunks.p_jk, other.p_jk), (chunks.pair_counts, other.pair_counts)):
            np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-12 * scale)
        np.testing.assert_allclose(chunks.covariance, other.covariance, rtol=1e-10, atol=1e-12 * scale**2)
        assert [n.kind for n in chunks.nulls] == [n.kind for n in other.nulls]
        for a, b in zip(chunks.nulls, other.nulls):
            np.testing.assert_allclose(a.p, b.p, rtol=1e-10, atol=1e-12 * scale)
        np.testing.assert_allclose(chunks.fit.amplitude, other.fit.amplitude, rtol=1e-9)
    assert {n.kind: n.n_real for n in chunks.nulls} == {"random_positions": 5, "shuffled": 7, "shuffled_in_z": 4,
                                                        "rotated": 2}
