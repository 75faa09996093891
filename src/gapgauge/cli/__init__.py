"""The command line: parses arguments, calls the application layer, renders the result. No logic here.

Each command is one small function. Errors the user can fix are :class:`~gapgauge.errors.GapgaugeError`;
they are printed as one line and the process exits 2. Nothing else in the package imports this.

A command's module is imported when that command runs (or ``--help`` lists them all), so ``gapgauge info``
does not load the prior, the report and matplotlib: about 2 s of imports, more than the command's work on
a store of 10^6 rollouts.
"""

from __future__ import annotations

import importlib

import click

from ..version import __version__
from .common import Group

#: command name -> "module:attribute" (``--help`` lists them sorted, as click does)
COMMANDS = {
    "sweep": "gapgauge.cli.run:sweep_command",
    "info": "gapgauge.cli.run:info_command",
    "ingest": "gapgauge.cli.run:ingest_command",
    "standin": "gapgauge.cli.run:standin_command",
    "shift": "gapgauge.cli.analyse:shift_command",
    "prior": "gapgauge.cli.analyse:prior_command",
    "propose": "gapgauge.cli.analyse:propose_command",
    "budget": "gapgauge.cli.analyse:budget_command",
    "calibrate": "gapgauge.cli.analyse:calibrate_command",
    "report": "gapgauge.cli.report:report_command",
    "demo": "gapgauge.cli.report:demo_command",
    "store": "gapgauge.cli.run:store_group",
}


class LazyGroup(Group):
    """The top-level group: commands loaded by name from :data:`COMMANDS` on first use."""

    def list_commands(self, ctx: click.Context) -> list[str]:
        return sorted(COMMANDS)

    def get_command(self, ctx: click.Context, name: str) -> click.Command | None:
        if name not in COMMANDS:
            return None
        module, attribute = COMMANDS[name].split(":")
        return getattr(importlib.import_module(module), attribute)


@click.group(cls=LazyGroup, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="gapgauge")
def main() -> None:
    """gapgauge: from an overnight simulation sweep to fewer, safer hardware trials."""
