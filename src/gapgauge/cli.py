"""The command line: parses arguments, calls the Python API, renders the result. No logic here.

Each command is one small function. Errors the user can fix are :class:`GapgaugeError`; they are
printed as one line and the process exits 2.
"""

from __future__ import annotations

import sys

import click
from rich.console import Console

from . import __version__
from .errors import GapgaugeError

console = Console(highlight=False)
err_console = Console(stderr=True, highlight=False)

DEFAULT_STORE = "gapgauge.sqlite"

CAUTION = (
    "CAUTION: model predictions are not a safety guarantee. Run hardware trials with a harness or "
    "spotter, torque and speed limits and an emergency stop; follow your lab's procedures, the "
    "applicable robot-safety standards and local rules."
)

store_option = click.option(
    "--store", "store_path", default=DEFAULT_STORE, show_default=True, type=click.Path(dir_okay=False),
    help="SQLite store file.",
)
json_option = click.option("--json", "json_path", default=None, type=click.Path(dir_okay=False),
                           help="Also write every number as JSON to this file.")


class _Group(click.Group):
    """Turns our own errors into one line on stderr and exit code 2."""

    def invoke(self, ctx: click.Context):
        try:
            return super().invoke(ctx)
        except GapgaugeError as exc:
            err_console.print(f"[bold red]error:[/] {exc}", markup=True, soft_wrap=True)
            sys.exit(exc.exit_code)


@click.group(cls=_Group, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="gapgauge")
def main() -> None:
    """gapgauge: from an overnight simulation sweep to fewer, safer hardware trials."""


# ---- sweep and info (sim/, store/) ---------------------------------------------------------


# ---- ingest and standin (store/logs, sim/standin) ------------------------------------------


# ---- shift (compare/shift) -----------------------------------------------------------------


# ---- prior and propose (compare/prior, compare/propose) ------------------------------------


# ---- budget and calibrate (compare/budget, compare/calibration) ----------------------------


# ---- report and demo (report/, demo) -------------------------------------------------------


# ---- store maintenance ---------------------------------------------------------------------


if __name__ == "__main__":  # pragma: no cover
    main()
