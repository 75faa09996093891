"""What every report section shares: the figure record, number formatting, the verdict words, the
parameters of the trials in the unit cube."""

from __future__ import annotations

import base64
import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ...records import TrialRecord
from ...scenario import Scenario

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
    """A number for a table: thousands separated when large, ``digits`` significant figures otherwise."""
    if isinstance(value, bool):
        return "yes" if value else "no"
    x = number(value)
    if x is None:
        return "–" if value is None or isinstance(value, (int, float, np.floating)) else str(value)
    if isinstance(value, (int, np.integer)):
        return f"{int(value):,}"
    if abs(x) >= 1000:
        return f"{x:,.0f}"
    return f"{x:.{digits}g}"


def fmt_interval(value: Sequence[Any] | None) -> str:
    iv = interval(value)
    return "–" if iv is None else f"[{fmt(iv[0])}, {fmt(iv[1])}]"


def trials_unit(scenario: Scenario, trials: list[TrialRecord]) -> np.ndarray | None:
    """The trials' parameters in the unit cube of the scenario's bounds, ``(m x dim)``, or None."""
    if not trials:
        return None
    names = scenario.parameter_names
    matrix = np.array([[t.params.get(n, np.nan) for n in names] for t in trials], dtype=float)
    return np.clip(scenario.to_unit(matrix), 0.0, 1.0)
