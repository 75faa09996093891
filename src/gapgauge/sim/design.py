"""Space-filling designs over a scenario's parameter space (scipy.stats.qmc).

- ``sobol``: scrambled Sobol' sequence (Sobol' 1967; Owen 1998 scrambling), drawn as ``2^m >= n``
  points with ``random_base2`` (the balance properties hold for powers of two) and cut to the first n.
- ``lhs``: Latin hypercube (McKay, Beckman and Conover 1979): every one of the n equal strata of every
  axis holds exactly one point.
- ``random``: independent uniform points from ``numpy.random.default_rng(seed)``.

Points are drawn in the unit cube and mapped with :meth:`Scenario.from_unit` onto the FULL bounds
(log-scale axes uniform in the logarithm). The same ``(kind, n, seed)`` always gives the same design,
which is what lets a sweep resume: it rebuilds the design and simulates the rows not yet stored.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.stats import qmc

from ..scenario import Scenario

DESIGNS = ("sobol", "lhs", "random")


def unit_design(dim: int, n: int, kind: str = "sobol", seed: int = 0) -> np.ndarray:
    """``(n x dim)`` points in the unit cube ``[0, 1)^dim``; deterministic in ``(dim, n, kind, seed)``."""
    if kind not in DESIGNS:
        raise ValueError(f"design {kind!r} is not one of {', '.join(DESIGNS)}")
    if n < 0 or dim < 1:
        raise ValueError(f"need n >= 0 and dim >= 1, got n = {n}, dim = {dim}")
    if n == 0:
        return np.empty((0, dim))
    rng = np.random.default_rng(seed)
    if kind == "sobol":
        m = max(0, math.ceil(math.log2(n)))
        return qmc.Sobol(d=dim, scramble=True, rng=rng).random_base2(m)[:n]
    if kind == "lhs":
        return qmc.LatinHypercube(d=dim, rng=rng).random(n)
    return rng.random((n, dim))


def make_design(scenario: Scenario, n: int, kind: str = "sobol", seed: int = 0) -> np.ndarray:
    """A design of ``n`` parameter sets over the scenario's full bounds.

    Args:
        scenario: gives the parameters, their bounds and log scales.
        n: number of points.
        kind: ``"sobol"`` | ``"lhs"`` | ``"random"``.
        seed: non-negative integer; the design is a pure function of ``(scenario bounds, n, kind, seed)``.

    Returns:
        ``(n x dim)`` parameters in scenario units, columns in scenario parameter order.
    """
    return scenario.from_unit(unit_design(scenario.dim, n, kind, seed)).reshape(n, scenario.dim)
