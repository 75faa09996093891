"""Physics randomisation draws (domain randomisation), seeded per rollout index.

Rollout ``i`` of a run with seed ``s`` draws its physical quantities from
``numpy.random.default_rng([s, i])``, uniformly in each ``[low, high]`` of the scenario's ``[physics]``
table, in that table's order. A draw therefore depends only on ``(s, i)``: how a run is chunked, which
worker simulates it and in what order never change it (DEVELOPERS.md, "Physics draw").
"""

from __future__ import annotations

import numpy as np

from ..scenario import Scenario


def draw_physics(scenario: Scenario, seed: int, indices: np.ndarray, nominal: bool = False) -> np.ndarray:
    """Physics draws for the rollouts ``indices`` of a run.

    Args:
        scenario: gives the quantities, their ranges and nominal values (``scenario.physics``).
        seed: the run's seed, a non-negative integer.
        indices: rollout indices within the run, ``(n,)`` non-negative int.
        nominal: if true, every row is the nominal values (no randomness).

    Returns:
        ``(n x k)`` float array, columns in ``scenario.physics`` order, each in its own unit
        (scales are dimensionless, ``joint_damping`` N m s/rad, ``servo_lag`` s).
    """
    indices = np.asarray(indices).reshape(-1)
    if indices.size and (not np.issubdtype(indices.dtype, np.integer) or indices.min() < 0):
        raise ValueError(f"indices must be non-negative integers, got {indices.dtype} array")
    if isinstance(seed, bool) or int(seed) != seed or seed < 0:
        raise ValueError(f"seed must be a non-negative integer, got {seed!r}")
    k = len(scenario.physics)
    if nominal:
        return np.tile(np.array([r.nominal for r in scenario.physics], dtype=float), (indices.size, 1))
    low = np.array([r.low for r in scenario.physics], dtype=float)
    high = np.array([r.high for r in scenario.physics], dtype=float)
    out = np.empty((indices.size, k))
    for row, i in enumerate(indices):
        out[row] = np.random.default_rng([int(seed), int(i)]).uniform(low, high)
    return out
