"""Designs: space filling, inside the bounds, reproducible from the seed.

Outside checks: scipy.stats.qmc.discrepancy (centred L2 discrepancy, Hickernell 1998); the
stratification that defines a Latin hypercube (McKay, Beckman and Conover 1979); the (0, m, 1)-net
property of every one-dimensional projection of a scrambled Sobol' sequence of 2^m points (Owen 1998).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from scipy.stats import qmc

from gapgauge import load_scenario
from gapgauge.sim.design import DESIGNS, make_design

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def scenario():
    return load_scenario(ROOT / "scenarios" / "push_recovery.toml")


def test_sobol_is_more_uniform_than_random_points(scenario):
    sobol = qmc.discrepancy(scenario.to_unit(make_design(scenario, 256, "sobol", seed=1)))
    random = qmc.discrepancy(scenario.to_unit(make_design(scenario, 256, "random", seed=1)))
    assert sobol < 0.6 * random


def test_sobol_puts_one_point_in_each_of_2_to_the_m_strata_of_every_axis(scenario):
    unit = scenario.to_unit(make_design(scenario, 256, "sobol", seed=2))
    for axis in range(scenario.dim):
        assert sorted(np.floor(unit[:, axis] * 256).astype(int)) == list(range(256))


def test_lhs_puts_one_point_in_each_of_n_strata_of_every_axis(scenario):
    n = 300
    unit = scenario.to_unit(make_design(scenario, n, "lhs", seed=3))
    for axis in range(scenario.dim):
        assert sorted(np.floor(unit[:, axis] * n).astype(int)) == list(range(n))


@pytest.mark.parametrize("kind", DESIGNS)
def test_every_design_stays_inside_the_full_bounds(scenario, kind):
    x = make_design(scenario, 300, kind, seed=4)
    low, high = scenario.bounds().T
    assert x.shape == (300, scenario.dim)
    assert ((x >= low) & (x <= high)).all()


def test_log_scale_axes_are_uniform_in_the_logarithm(scenario):
    axis = next(i for i, p in enumerate(scenario.parameters) if p.log)
    low, high = scenario.parameters[axis].low, scenario.parameters[axis].high
    x = make_design(scenario, 512, "sobol", seed=5)[:, axis]
    # a uniform log axis puts half the points below the geometric mean of the bounds
    assert np.sum(x < np.sqrt(low * high)) == 256


@pytest.mark.parametrize("kind", DESIGNS)
def test_a_design_is_reproducible_from_its_seed(scenario, kind):
    first = make_design(scenario, 100, kind, seed=6)
    np.testing.assert_array_equal(first, make_design(scenario, 100, kind, seed=6))
    assert not np.array_equal(first, make_design(scenario, 100, kind, seed=7))


def test_a_shorter_sobol_design_is_a_prefix_of_a_longer_one(scenario):
    # both are cut from the same scrambled sequence, so rows keep their index across sizes
    np.testing.assert_array_equal(make_design(scenario, 300, "sobol", 8), make_design(scenario, 512, "sobol", 8)[:300])
