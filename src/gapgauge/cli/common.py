"""What every command shares: the consoles, the common options, the progress bars, number formatting,
and the error handler that turns a :class:`GapgaugeError` into one line and exit code 2."""

from __future__ import annotations

import math
import sys
from collections.abc import Iterator
from contextlib import contextmanager

import click
from rich.console import Console
from rich.markup import escape
from rich.progress import (
    BarColumn,
    MofNCompleteColumn,
    Progress,
    TaskID,
    TextColumn,
    TimeElapsedColumn,
    TimeRemainingColumn,
)

from ..errors import GapgaugeError
from ..progress import Progress as ProgressCallback

console = Console(highlight=False)
err_console = Console(stderr=True, highlight=False)

DEFAULT_STORE = "gapgauge.sqlite"

store_option = click.option(
    "--store", "store_path", default=DEFAULT_STORE, show_default=True, type=click.Path(dir_okay=False),
    help="SQLite store file.",
)
json_option = click.option("--json", "json_path", default=None, type=click.Path(dir_okay=False),
                           help="Also write every number as JSON to this file.")
seed_option_help = "Seed of every random choice of the command; stored with the result."


class Group(click.Group):
    """Turns our own errors into one line on stderr and exit code 2."""

    def invoke(self, ctx: click.Context):
        try:
            return super().invoke(ctx)
        except GapgaugeError as exc:
            # escape: messages quote TOML tables such as [physics], which rich would eat as markup
            err_console.print(f"[bold red]error:[/] {escape(str(exc))}", markup=True, soft_wrap=True)
            sys.exit(exc.exit_code)


def print_notes(notes: list[str]) -> None:
    for note in notes:
        console.print(f"note: {escape(note)}")


def num(value: float | None, fmt: str = ".3g") -> str:
    """``value`` formatted, or "-" when it is missing or not finite."""
    return format(value, fmt) if value is not None and math.isfinite(value) else "-"


def pair(values: tuple[float, float] | list[float] | None, fmt: str = ".3g") -> str:
    if values is None:
        return "-"
    return f"[{num(values[0], fmt)}, {num(values[1], fmt)}]"


@contextmanager
def progress_bars(show: bool = True, transient: bool = True) -> Iterator[ProgressCallback | None]:
    """A :data:`gapgauge.progress.Progress` callback drawing one rich bar per stage on stderr."""
    if not show:
        yield None
        return
    bars = Progress(TextColumn("[bold]{task.description}"), BarColumn(), MofNCompleteColumn(),
                    TimeElapsedColumn(), TextColumn("left"), TimeRemainingColumn(),
                    console=err_console, transient=transient)
    tasks: dict[str, TaskID] = {}

    def report(stage: str, done: int, total: int) -> None:
        if stage not in tasks:
            tasks[stage] = bars.add_task(stage, total=total or None, completed=done)
        else:
            bars.update(tasks[stage], completed=done, total=total or None)

    with bars:
        yield report
