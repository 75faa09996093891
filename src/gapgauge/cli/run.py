"""Commands that fill the store: sweep, ingest, standin; and the ones that look into it: info, store check."""

from __future__ import annotations

import sys

import click
from rich.markup import escape
from rich.table import Table

from ..app.ingest import ingest
from ..app.sweep import sweep
from ..errors import GapgaugeError
from ..quantities import format_number
from ..records import DEFAULT_MATCHES
from ..scenario import load_scenario
from ..sim.standin import load_params_file, run_standin
from ..sim.sweep import DEFAULT_CHUNK, MAX_ROLLOUTS
from ..store import Store, check_store
from .common import console, err_console, json_option, progress_bars, store_option


@click.command("sweep")
@click.argument("scenario", type=click.Path(dir_okay=False))
@click.option("--rollouts", default=2000, show_default=True, type=click.IntRange(1, MAX_ROLLOUTS),
              help="Planned number of rollouts (the design size); more in further runs with other seeds.")
@click.option("--design", default="sobol", show_default=True, type=click.Choice(["sobol", "lhs", "random"]),
              help="Space-filling design over the parameter bounds.")
@click.option("--seed", default=0, show_default=True, type=click.IntRange(0, 2**63 - 1),
              help="Seed of the design and of every physics draw.")
@store_option
@click.option("--workers", default=None, type=click.IntRange(1),
              help="Simulation threads (local; default all cores) or MuJoCo threads per Dask task (default 1).")
@click.option("--dask", "dask_address", default=None, metavar="ADDRESS",
              help="Run the chunks on this Dask scheduler (e.g. tcp://host:8786); this process writes the store.")
@click.option("--nominal", is_flag=True, help="Nominal physics for every rollout (no randomisation).")
@click.option("--chunk-size", default=None, type=click.IntRange(1),
              help=f"Rollouts per chunk, each stored in one transaction (default {DEFAULT_CHUNK}).")
def sweep_command(scenario: str, rollouts: int, design: str, seed: int, store_path: str, workers: int | None,
                  dask_address: str | None, nominal: bool, chunk_size: int | None) -> None:
    """Simulate the scenario over its parameter space; resumable (run the same command again)."""
    try:
        with progress_bars(transient=False) as progress:
            s = sweep(scenario, rollouts, design=design, seed=seed, store=store_path, workers=workers,
                      dask=dask_address, nominal=nominal, chunk_size=chunk_size, progress=progress)
    except KeyboardInterrupt:
        err_console.print("interrupted: every finished chunk is stored; run the same command again to resume")
        sys.exit(130)
    if s.nothing_to_do:
        console.print(f"nothing left to do: run {s.run_id} already holds all {s.planned} rollouts "
                      f"in {escape(s.store)}")
    for line in s.stale:
        console.print(f"[yellow]note[/]: {escape(line)}", soft_wrap=True)
    table = Table(title=f"sweep {escape(s.scenario)} (run {s.run_id}, {escape(s.store)})", title_justify="left")
    table.add_column("")
    table.add_column("value", justify="right")
    physics = "nominal" if s.nominal else "randomised"
    table.add_row("rollouts", f"{s.done:,} of {s.planned:,} ({s.ran_now:,} now)")
    table.add_row("design / seed / physics", f"{s.design} / {s.seed} / {physics}")
    table.add_row("stood (ok)", f"{s.ok:,}")
    table.add_row("fell", f"{s.fell:,}")
    table.add_row("diverged", f"{s.diverged:,}")
    table.add_row("best objective", "-" if s.best_objective is None else format_number(s.best_objective))
    if s.ran_now:
        table.add_row("wall time", f"{s.wall_seconds:.1f} s")
        table.add_row("rate", f"{s.rollouts_per_second:,.1f} rollouts/s")
    console.print(table)
    if s.best_params:
        best = Table(title="best parameters (lowest objective, did not fall)", title_justify="left")
        for column in ("parameter", "value", "unit"):
            best.add_column(column, justify="right" if column == "value" else "left")
        for name, value in s.best_params.items():
            best.add_row(escape(name), format_number(value), escape(s.units.get(name, "")))
        console.print(best)


@click.command("info")
@store_option
@json_option
@click.option("--scenario", "scenario_path", default=None, type=click.Path(dir_okay=False),
              help="Also say which runs this scenario can use, which are stale, and why.")
def info_command(store_path: str, json_path: str | None, scenario_path: str | None) -> None:
    """What the store holds: scenarios, runs with progress, rollouts by status, trials, models."""
    scenario = None if scenario_path is None else load_scenario(scenario_path)
    with Store(store_path, create=False) as store:
        info = store.info(json_path=json_path, scenario=scenario)
    r = info["rollouts"]
    console.print(f"store {escape(info['store'])} (schema {info['schema_version']}): {r['total']:,} rollouts "
                  f"({r['ok']:,} ok, {r['fell']:,} fell, {r['diverged']:,} diverged), "
                  f"{info['trials']['total']} hardware trial(s) ({info['trials']['synthetic']} synthetic, "
                  f"{info['trials']['flagged']} flagged, {info['trials']['unplaced']} not placed in time), "
                  f"{info['matches']} match(es), {len(info['models'])} fitted model(s)")
    if info["scenarios"]:
        table = Table(title="scenarios", title_justify="left")
        for column in ("name", "hash", "trials", "path"):
            table.add_column(column)
        for sc in info["scenarios"]:
            table.add_row(escape(sc["name"]), sc["hash"], str(sc["trials"]), escape(sc["path"]))
        console.print(table)
    if info["runs"]:
        table = Table(title="runs", title_justify="left")
        for column in ("id", "kind", "scenario", "design", "seed", "physics", "done / planned", "status"):
            table.add_column(column, justify="right" if column in ("id", "seed") else "left")
        for run in info["runs"]:
            table.add_row(str(run["id"]), run["kind"], escape(run["scenario"]), escape(run["design"]), str(run["seed"]),
                          "nominal" if run["nominal"] else "randomised", f"{run['done']:,} / {run['planned']:,}",
                          run["status"] if run["status"] == "done" else "[yellow]resumable[/]")
        console.print(table)
    if info["trials"]["checks"]:
        table = Table(title="trials with unusual channels or an onset not placed (kept; see shift)",
                      title_justify="left")
        for column in ("trial", "log", "flags", "onset"):
            table.add_column(column, overflow="fold")
        for t in info["trials"]["checks"]:
            table.add_row(str(t["trial"]), escape(t["file"]), escape("; ".join(t["flags"]) or "-"),
                          "placed" if t["placed"] else f"[yellow]not placed[/]: {escape(t['reason'])}")
        console.print(table)
    if "usable" in info:
        _usable_table(info["usable"])
    if info["models"]:
        table = Table(title="fitted models and results", title_justify="left")
        for column in ("id", "kind", "scenario", "created"):
            table.add_column(column)
        for m in info["models"]:
            table.add_row(str(m["id"]), escape(m["kind"]), escape(m["scenario"]), m["created_at"])
        console.print(table)
    if json_path:
        console.print(f"JSON: {escape(json_path)}")


def _usable_table(usable: dict) -> None:
    runs = usable["runs"]
    title = (f"runs scenario {escape(usable['scenario'])} can use (simulation {usable['simulation_hash']}): "
             f"{sum(r['status'] == 'usable' for r in runs)} of {len(runs)}")
    table = Table(title=title, title_justify="left")
    for column in ("run", "kind", "scenario version", "use", "why not"):
        table.add_column(column, overflow="fold")
    colour = {"usable": "green", "stale": "yellow", "other": "red"}
    for r in runs:
        table.add_row(str(r["id"]), r["kind"], r["scenario_hash"], f"[{colour[r['status']]}]{r['status']}[/]",
                      escape(r["why"]))
    console.print(table)


@click.command("ingest")
@click.argument("scenario", type=click.Path(dir_okay=False))
@click.argument("logs", nargs=-1, required=True, type=click.Path())
@store_option
@click.option("--matches", default=DEFAULT_MATCHES, show_default=True, type=click.IntRange(1, 4096),
              help="Matched simulations per trial: nominal physics plus K-1 randomised draws.")
@click.option("--seed", default=0, show_default=True, type=click.IntRange(0),
              help="Seed of the physics draws.")
def ingest_command(scenario: str, logs: tuple[str, ...], store_path: str, matches: int, seed: int) -> None:
    """Validate hardware LOGs (CSV + sidecar JSON, or ROS 2 bags), store them and match simulations."""
    with progress_bars() as progress:
        summary = ingest(scenario, store_path, list(logs), matches=matches, seed=seed, progress=progress)
    table = Table(title=f"ingest into {escape(store_path)}", title_justify="left")
    for column in ("log", "result", "trial", "notes"):
        table.add_column(column, overflow="fold")
    groups = (("[green]stored[/]", summary.stored), ("already stored", summary.skipped_duplicates))
    for label, items in groups:
        for item in items:
            notes = []
            if item.synthetic:
                notes.append("synthetic")
            if item.ignored_columns:
                notes.append("ignored columns: " + ", ".join(item.ignored_columns))
            notes.extend(f"[yellow]flag[/] {escape(f)}" for f in item.flags)
            if item.alignment and not item.alignment.startswith("the log's clock is the scenario's"):
                notes.append(escape(item.alignment))
            notes.extend(escape(w) for w in item.warnings if not item.alignment or item.alignment not in w)
            table.add_row(escape(item.path), label, str(item.trial_id), "; ".join(notes))
    for path, reason in summary.failed:
        table.add_row(escape(path), "[red]failed[/]", "", escape(reason))
    console.print(table)
    console.print(
        f"{len(summary.stored)} stored, {len(summary.skipped_duplicates)} already stored, "
        f"{len(summary.failed)} failed; {len(summary.matched)} trial(s) with {summary.matches} matched "
        f"simulations each (seed {summary.seed}; {summary.simulated} simulated now)"
    )
    if summary.failed:
        sys.exit(2)


@click.command("standin")
@click.argument("scenario", type=click.Path(dir_okay=False))
@click.option("--profile", "profile_path", required=True, type=click.Path(dir_okay=False),
              help="Perturbation profile (TOML), e.g. scenarios/standin/close.toml.")
@click.option("--params", "params_path", default=None, type=click.Path(dir_okay=False),
              help="Parameter sets: the propose output or a JSON list of {name: value}.")
@click.option("--design", default=None, type=click.IntRange(1, 10000),
              help="Instead of --params: this many Sobol sets inside the safe bounds.")
@click.option("--out", "out_dir", required=True, type=click.Path(file_okay=False),
              help="Folder for the logs.")
@click.option("--seed", default=0, show_default=True, type=click.IntRange(0),
              help="Seed of the design and the noise.")
def standin_command(scenario: str, profile_path: str, params_path: str | None, design: int | None,
                    out_dir: str, seed: int) -> None:
    """Run parameter sets on the stand-in robot and write SYNTHETIC logs in the hardware contract."""
    if (params_path is None) == (design is None):
        raise GapgaugeError("standin: give exactly one of --params FILE.json or --design N")
    params = None if params_path is None else load_params_file(params_path)
    wanted = design if design is not None else len(params)
    paths = run_standin(scenario, profile_path, params_list=params, design=design, out_dir=out_dir, seed=seed,
                        source=params_path)
    console.print(f"[bold]SYNTHETIC[/] logs from the stand-in robot ({escape(profile_path)}, seed {seed}), "
                  "not hardware trials:")
    for path in paths:
        console.print(f"  {escape(str(path))}  (+ {escape(path.with_suffix('.json').name)})")
    if len(paths) < wanted:
        console.print(f"{wanted - len(paths)} parameter set(s) diverged in simulation; no log for them")


@click.group("store")
def store_group() -> None:
    """Store maintenance."""


@store_group.command("check")
@store_option
def store_check_command(store_path: str) -> None:
    """Verify the store: SQLite's integrity check plus gapgauge's own. Exit 0 healthy, 1 otherwise."""
    problems, resumable = check_store(store_path)
    for run in resumable:
        console.print(f"run {run.id} ({run.kind}) holds {run.done:,} of {run.planned:,} rollouts: resumable "
                      "(run the same command again to finish it)")
    if not problems:
        console.print(f"[green]healthy[/]: {escape(store_path)} passed SQLite's integrity check and gapgauge's checks")
        return
    for problem in problems:
        console.print(f"[red]problem[/]: {escape(problem)}", soft_wrap=True)
    console.print(f"{len(problems)} problem(s) in {escape(store_path)}; "
                  "make a copy of the file before repairing anything")
    sys.exit(1)
