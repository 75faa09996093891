"""How long work reports progress: a callback, so that nothing below the command line draws a bar.

A job calls ``progress(stage, done, total)`` as it goes: ``stage`` is a short description in words
("sweep: rollouts", "budget: simulated trials, with the prior"), ``done`` and ``total`` count the
units of that stage (``total`` may be 0 when unknown). The command line turns the calls into progress
bars; the Python API passes None (silent) or its own callable.
"""

from __future__ import annotations

from collections.abc import Callable

Progress = Callable[[str, int, int], None]


def silent(stage: str, done: int, total: int) -> None:
    """The default callback: report nothing."""


def or_silent(progress: Progress | None | bool) -> Progress:
    """``progress`` itself, or :func:`silent` when it is None or not callable (``False``)."""
    return progress if callable(progress) else silent
