"""Commands that show the whole picture: report (the HTML transfer report) and demo (the whole path)."""

from __future__ import annotations

import click
from rich.markup import escape

from ..app.demo import DemoStep, run_demo
from ..app.report import write_report
from ..quantities import format_number
from ..safety import CAUTION
from .common import console, progress_bars, store_option


@click.command("report")
@click.argument("scenario", type=click.Path(dir_okay=False))
@store_option
@click.option("--out", "out_path", default="report.html", show_default=True, type=click.Path(dir_okay=False),
              help="HTML file to write; the JSON summary goes beside it (same name, .json).")
@click.option("--plots", "plots_dir", default=None, type=click.Path(file_okay=False),
              help="Also save every figure as a PNG here.")
def report_command(scenario: str, store_path: str, out_path: str, plots_dir: str | None) -> None:
    """Write the self-contained HTML transfer report and its JSON summary."""
    with progress_bars() as progress:
        result = write_report(scenario, store_path, out_path, plots_dir=plots_dir, progress=progress)
    console.print(f"[bold]verdict:[/] {escape(result.decision.verdict)}")
    console.print(f"[bold]next step:[/] {escape(result.decision.next_step)}")
    if result.decision.command:
        console.print(f"  {escape(result.decision.command)}")
    first = result.first_screen
    if first.get("budget"):
        console.print(f"[bold]budget:[/] {escape(first['budget']['value'])} ({escape(first['budget']['sub'])})")
    for key, name in (("stop_rule", "stop rule"), ("calibration", "calibration")):
        if first.get(key):
            console.print(f"[bold]{name}:[/] {escape(first[key]['value'])}")
    for section in result.sections:
        if not section.filled:
            command = escape(section.fill_command or "")
            console.print(f"section '{escape(section.title)}' is empty: run {command}")
    console.print(f"report: {escape(str(result.path))}\nJSON: {escape(str(result.json_path))}")
    console.print(CAUTION)


def _figures_text(figures: dict) -> str:
    parts = []
    for key, value in figures.items():
        if value is None:
            value = "\u2013"
        elif isinstance(value, float):
            value = format_number(value)
        elif isinstance(value, (tuple, list)):
            value = "[" + ", ".join(format_number(v) if isinstance(v, float) else str(v) for v in value) + "]"
        parts.append(f"{key.replace('_', ' ')}: {value}")
    return "; ".join(parts)


def _show_step(step: DemoStep) -> None:
    if not step.done:
        console.rule(f"[bold]{step.number}. {escape(step.name)}", align="left")
    else:
        console.print(escape(_figures_text(step.figures)) + f"  [{step.seconds:.1f} s]")


@click.command("demo")
@click.option("--out", "out_dir", default="gapgauge-demo", show_default=True,
              type=click.Path(file_okay=False),
              help="Folder for the scenario copy, the store, the stand-in logs and the report.")
@click.option("--quick", is_flag=True, help="A smaller sweep and cheaper fits: about a minute in all.")
@click.option("--seed", default=0, show_default=True, type=click.IntRange(0), help="Seed of every step.")
def demo_command(out_dir: str, quick: bool, seed: int) -> None:
    """The whole path on the bundled push-recovery scenario with the stand-in robot (no robot needed)."""
    with progress_bars() as progress:
        result = run_demo(out_dir, quick=quick, seed=seed, progress=progress, on_step=_show_step)
    if result.report_path is not None:
        console.print(f"report: {result.report_path.resolve()}  (JSON: {result.json_path.name}); "
                      f"demo took {result.seconds:.0f} s")
    console.print(CAUTION)
