"""Margin of stability from the extrapolated centre of mass (Hof, Gazendam and Sinke 2005, J. Biomech.
38:1-8): how far the extrapolated centre of mass stays inside the base of support.
"""

from __future__ import annotations

import math

import numpy as np

#: Standard gravity, m/s^2 (the value Hof et al. 2005 use for omega0).
GRAVITY = 9.81


def extrapolated_com(
    com_x: np.ndarray, com_vx: np.ndarray, leg_length: float, g: float = GRAVITY
) -> np.ndarray:
    """Extrapolated centre of mass (m): ``XcoM = x + v / omega0``, ``omega0 = sqrt(g / l)``
    (Hof, Gazendam and Sinke 2005, J. Biomech. 38:1-8).

    Args:
        com_x: horizontal centre-of-mass position, ``(nbatch x nstep)`` m.
        com_vx: horizontal centre-of-mass velocity, ``(nbatch x nstep)`` m/s.
        leg_length: pendulum length ``l``, m. g: m/s^2.

    Returns:
        ``(nbatch x nstep)`` m.
    """
    return com_x + com_vx * math.sqrt(leg_length / g)


def margin_of_stability_series(
    com_x: np.ndarray,
    com_vx: np.ndarray,
    heel_x: np.ndarray,
    toe_x: np.ndarray,
    leg_length: float,
    g: float = GRAVITY,
) -> np.ndarray:
    """Margin of stability over time (m): distance from the extrapolated centre of mass to the edge
    of the base of support in the direction of motion, positive while inside: ``toe_x - XcoM`` when
    ``com_vx >= 0``, ``XcoM - heel_x`` when ``com_vx < 0`` (Hof, Gazendam and Sinke 2005, J. Biomech.
    38:1-8).

    Args:
        com_x: ``(nbatch x nstep)`` m. com_vx: ``(nbatch x nstep)`` m/s.
        heel_x, toe_x: rear and front edges of the support, ``(nbatch x nstep)`` m.
        leg_length: pendulum length ``l`` for ``omega0 = sqrt(g / l)``, m. g: m/s^2.

    Returns:
        ``(nbatch x nstep)`` m.
    """
    xcom = extrapolated_com(com_x, com_vx, leg_length, g)
    to_toe = np.subtract(toe_x, xcom)
    # A blend instead of np.where (slow when the sign flips often), in place to keep temporaries few:
    # to_heel + forward * (to_toe - to_heel), exact because forward is 0 or 1.
    to_heel = np.subtract(xcom, heel_x, out=xcom)
    to_toe -= to_heel
    to_toe *= com_vx >= 0.0
    return np.add(to_toe, to_heel, out=to_toe)


def margin_of_stability(
    com_x: np.ndarray,
    com_vx: np.ndarray,
    heel_x: np.ndarray,
    toe_x: np.ndarray,
    leg_length: float,
    g: float = GRAVITY,
) -> np.ndarray:
    """Margin of stability (m): the minimum over the window of :func:`margin_of_stability_series`
    (Hof, Gazendam and Sinke 2005, J. Biomech. 38:1-8). Negative means the extrapolated centre of
    mass left the base of support at some time.

    Args: as :func:`margin_of_stability_series`.

    Returns:
        ``(nbatch,)`` m; NaN for rows with NaN input.
    """
    # A NaN velocity leaves XcoM NaN, so that row of the series and its minimum are NaN.
    return np.min(margin_of_stability_series(com_x, com_vx, heel_x, toe_x, leg_length, g), axis=1)
