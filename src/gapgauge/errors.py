"""The package's own exception types.

Every error a user can cause is one of these, with a message that names the file, the line or key,
what was wrong and how to fix it. The command line prints ``str(error)`` on one line and exits 2.
"""

from __future__ import annotations


class GapgaugeError(Exception):
    """Base class: a problem the user can fix. The message is one line, ready to print."""

    exit_code = 2


class ScenarioError(GapgaugeError):
    """A scenario file (or its model file) is missing, malformed or inconsistent."""


class ControllerError(ScenarioError):
    """A scenario's own controller cannot be loaded, raised, or returned something unusable."""


class LogError(GapgaugeError):
    """A hardware log or its sidecar cannot be taken in."""


class StoreError(GapgaugeError):
    """The store cannot be opened, is of an unknown schema version, or lacks what a command needs."""


class ModelError(GapgaugeError):
    """A fitted model is missing or cannot be used for the request (for example too few trials)."""


def where(path: object, line: int | None = None, column: str | int | None = None) -> str:
    """Format a location prefix ``file:line:column`` for error messages."""
    text = str(path)
    if line is not None:
        text += f":{line}"
    if column is not None:
        text += f":{column}"
    return text
