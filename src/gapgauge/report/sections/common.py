"""What every report section shares: the figure record, number formatting (units from
:mod:`gapgauge.quantities`), the verdict words, the parameter axes and the trials' parameters."""

from __future__ import annotations

import base64
import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ...quantities import format_count, format_number
from ...records import TrialRecord
from ...scenario import Scenario
from ..plots import ParameterAxis

VERDICT_WORDS = {
    "carries_over": "carries over",
    "offset_order_kept": "offset, order kept",
    "does_not_carry_over": "does not carry over",
    "undecided": "not enough trials yet",
}


@dataclass(frozen=True)
class Figure:
    """One figure of the report: ``name`` (also the PNG's file name), PNG bytes, alt text, caption."""

    name: str
    png: bytes
    alt: str
    caption: str

    @property
    def uri(self) -> str:
        return "data:image/png;base64," + base64.b64encode(self.png).decode("ascii")


def number(value: Any) -> float | None:
    """A finite float, or None for anything else (None, NaN, inf, text)."""
    if isinstance(value, bool) or value is None:
        return None
    try:
        out = float(value)
    except (TypeError, ValueError):
        return None
    return out if math.isfinite(out) else None


def interval(value: Sequence[Any] | None) -> tuple[float, float] | None:
    """``(low, high)`` when both ends are finite numbers, else None."""
    if value is None or len(value) != 2:
        return None
    low, high = number(value[0]), number(value[1])
    return None if low is None or high is None else (low, high)


def fmt(value: Any, digits: int = 3) -> str:
    """A pure number (a count, a ratio, a p-value) for a table: counts with thousands separated, others
    to ``digits`` significant figures; quantities with a unit go through :mod:`gapgauge.quantities`."""
    if isinstance(value, bool):
        return "yes" if value else "no"
    x = number(value)
    if x is None:
        return "–" if value is None or isinstance(value, (int, float, np.floating)) else str(value)
    if isinstance(value, (int, np.integer)):
        return format_count(int(value))
    return format_number(x, digits)


def fmt_interval(value: Sequence[Any] | None) -> str:
    iv = interval(value)
    return "–" if iv is None else f"[{fmt(iv[0])}, {fmt(iv[1])}]"


def parameter_axes(scenario: Scenario) -> list[ParameterAxis]:
    """Each policy parameter's axis: its bounds in its unit, log where the scenario says so."""
    return [ParameterAxis(p.name, p.unit, p.low, p.high, p.log) for p in scenario.parameters]


def trials_params(scenario: Scenario, trials: list[TrialRecord]) -> np.ndarray | None:
    """The trials' parameters ``(m x dim)`` in scenario units (NaN where a trial lacks one), or None."""
    if not trials:
        return None
    names = scenario.parameter_names
    return np.array([[t.params.get(n, np.nan) for n in names] for t in trials], dtype=float)
