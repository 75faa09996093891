"""The command line: parses arguments, calls the application layer, renders the result. No logic here.

Each command is one small function. Errors the user can fix are :class:`~gapgauge.errors.GapgaugeError`;
they are printed as one line and the process exits 2. Nothing else in the package imports this.
"""

from __future__ import annotations

import click

from ..version import __version__
from .analyse import budget_command, calibrate_command, prior_command, propose_command, shift_command
from .common import Group
from .report import demo_command, report_command
from .run import info_command, ingest_command, standin_command, store_group, sweep_command


@click.group(cls=Group, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="gapgauge")
def main() -> None:
    """gapgauge: from an overnight simulation sweep to fewer, safer hardware trials."""


for command in (sweep_command, info_command, ingest_command, standin_command, shift_command, prior_command,
                propose_command, budget_command, calibrate_command, report_command, demo_command, store_group):
    main.add_command(command)
