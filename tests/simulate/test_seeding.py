"""The reproducibility contract: stable scenario keys and one stream per seed block."""

import numpy as np

from estbench.simulate.dgms import build_dgm
from estbench.study.scenarios import expand_study, scenario_key
from estbench.simulate.seeding import block_generator, estimator_generator


def test_block_stream_is_the_documented_seed_sequence():
    # Contract: Generator(PCG64DXSM(SeedSequence(entropy=seed, spawn_key=(key_s, b)))).
    seed, key, block = 2**100 + 7, 0xDEADBEEF12345678, 4
    expected = np.random.Generator(np.random.PCG64DXSM(
        np.random.SeedSequence(entropy=seed, spawn_key=(key, block)))).standard_normal(5)
    np.testing.assert_array_equal(block_generator(seed, key, block).standard_normal(5), expected)


def test_spawn_key_equals_spawning_children():
    # numpy documents SeedSequence(root, spawn_key=(i,)) == SeedSequence(root).spawn(n)[i].
    child = np.random.SeedSequence(99).spawn(3)[2]
    assert np.array_equal(np.random.SeedSequence(99, spawn_key=(2,)).generate_state(4),
                          child.generate_state(4))


def test_scenario_key_ignores_names_order_and_number_spelling():
    a = scenario_key({"distribution": "norm", "params": {"loc": 0, "scale": 1.0}}, 10)
    b = scenario_key({"params": {"scale": 1, "loc": 0.0}, "distribution": "norm"}, 10)
    assert a == b and len(a) == 16
    assert a != scenario_key({"distribution": "norm", "params": {"loc": 0, "scale": 1}}, 11)
    assert a != scenario_key({"distribution": "norm", "params": {"loc": 0.5, "scale": 1}}, 10)
    first = expand_study({"x": {"distribution": "norm", "params": {"loc": [0, 1]}}}, [5, 10])
    renamed = expand_study({"other": {"distribution": "t", "params": {"df": 3}},
                            "y": {"distribution": "norm", "params": {"loc": [1, 0]}}}, [10, 5])
    assert {s.key for s in first} <= {s.key for s in renamed}


def test_blocks_are_independent_and_reproducible():
    dgm = build_dgm({"distribution": "norm", "params": {}})
    b0 = dgm.draw(block_generator(1, 2, 0), 4, 3)
    assert np.array_equal(b0, dgm.draw(block_generator(1, 2, 0), 4, 3))
    assert not np.array_equal(b0, dgm.draw(block_generator(1, 2, 1), 4, 3))
    assert not np.array_equal(b0, dgm.draw(block_generator(2, 2, 0), 4, 3))


def test_estimator_streams_differ_from_data_and_each_other():
    data = block_generator(1, 2, 0).random(3)
    a = estimator_generator(1, 2, 0, "boot_a").random(3)
    b = estimator_generator(1, 2, 0, "boot_b").random(3)
    assert not np.array_equal(data, a) and not np.array_equal(a, b)
    np.testing.assert_array_equal(a, estimator_generator(1, 2, 0, "boot_a").random(3))
