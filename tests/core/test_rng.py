"""Seeds: derived generators are fixed by the seed and the purpose, and leave the run's stream alone."""

import numpy as np
import pytest

from pairvel.core.errors import ConfigError
from pairvel.core.rng import as_generator, derived_generators


def test_derived_generators_are_reproducible_distinct_and_apart_from_the_main_stream():
    draw = lambda gens: [g.integers(2**62) for g in gens]  # noqa: E731
    a = draw(derived_generators(7, "regions", 3))
    assert a == draw(derived_generators(7, "regions", 3))          # same seed and purpose: same numbers
    assert len(set(a)) == 3                                        # the three differ from each other
    assert a[:2] == draw(derived_generators(7, "regions", 2))      # more of them do not change the first ones
    assert set(a).isdisjoint(draw(derived_generators(7, "shuffles", 3)))
    assert set(a).isdisjoint(draw(derived_generators(8, "regions", 3)))
    assert as_generator(7).integers(2**62) not in a
    with pytest.raises(ConfigError, match="seed must be None or a non-negative integer; got -1"):
        derived_generators(-1, "regions", 2)
    assert np.isfinite(derived_generators(None, "regions", 1)[0].random())


def test_a_sets_generator_depends_on_seed_kind_and_index_only():
    """The documented scheme (core.rng.set_generator): set k is child k of the kind's derived generators,
    whatever else is drawn before it; kinds, indices and seeds give different streams."""
    from pairvel.core.rng import set_generator

    draw = lambda g: g.integers(2**62, size=3).tolist()  # noqa: E731
    spawned = [draw(g) for g in derived_generators(5, "shuffled", 4)]
    assert [draw(set_generator(5, "shuffled", k)) for k in (3, 0, 2, 1)] == [spawned[k] for k in (3, 0, 2, 1)]
    assert draw(set_generator(5, "shuffled", 1)) != draw(set_generator(5, "shuffled_in_z", 1))
    assert draw(set_generator(5, "shuffled", 1)) != draw(set_generator(6, "shuffled", 1))
    with pytest.raises(ConfigError, match="set index must be a non-negative integer; got -2"):
        set_generator(5, "shuffled", -2)
    with pytest.raises(ConfigError, match="seed must be a non-negative integer; got None"):
        set_generator(None, "shuffled", 0)
