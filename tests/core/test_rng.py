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
