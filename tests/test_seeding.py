"""Per-trial generators built together equal numpy's own, trial by trial."""
import numpy as np
import pytest

from adapt.streams.seeding import seed_states, trial_generators


@pytest.mark.parametrize("seed, key, trials", [
    (1, (2,), list(range(40))),
    (0, (), [0, 1, 5, 2 ** 32 - 1, 2 ** 32, 2 ** 40 + 3]),        # one- and two-word indices
    (2 ** 70 + 5, (1, 0xFFFFFFFF), list(range(12))),              # a three-word seed
    (20240, (1, 123456), [7, 99999]),
    (123456789012, (0,), list(range(5))),
])
def test_states_equal_numpy_seed_sequence(seed, key, trials):
    # the reference is numpy's SeedSequence itself (numpy/random/bit_generator.pyx)
    ref = np.stack([np.random.SeedSequence(seed, spawn_key=(i,) + key).generate_state(4, np.uint64)
                    for i in trials])
    np.testing.assert_array_equal(seed_states(seed, trials, key), ref)
    for i, g in zip(trials, trial_generators(seed, trials, *key)):
        own = np.random.Generator(np.random.PCG64(np.random.SeedSequence(seed, spawn_key=(i,) + key)))
        np.testing.assert_array_equal(g.standard_normal(4), own.standard_normal(4))


def test_guards():
    with pytest.raises(ValueError, match=">= 0"):
        seed_states(-1, [0])
    with pytest.raises(ValueError, match="trial indices"):
        seed_states(1, [-2])
