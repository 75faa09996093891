"""The command line: parses arguments, calls the Python API, renders the result. No logic here.

Each command is one small function. Errors the user can fix are :class:`GapgaugeError`; they are
printed as one line and the process exits 2.
"""

from __future__ import annotations

import sys

import click
from rich.console import Console
from rich.markup import escape

from .version import __version__
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


def _print_notes(notes: list[str]) -> None:
    for note in notes:
        console.print(f"note: {escape(note)}")


class _Group(click.Group):
    """Turns our own errors into one line on stderr and exit code 2."""

    def invoke(self, ctx: click.Context):
        try:
            return super().invoke(ctx)
        except GapgaugeError as exc:
            # escape: messages quote TOML tables such as [physics], which rich would eat as markup
            err_console.print(f"[bold red]error:[/] {escape(str(exc))}", markup=True, soft_wrap=True)
            sys.exit(exc.exit_code)


@click.group(cls=_Group, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="gapgauge")
def main() -> None:
    """gapgauge: from an overnight simulation sweep to fewer, safer hardware trials."""


# ---- sweep and info (sim/, store/) ---------------------------------------------------------


@main.command("sweep")
@click.argument("scenario", type=click.Path(dir_okay=False))
@click.option("--rollouts", default=2000, show_default=True, type=click.IntRange(1, 1_000_000),
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
              help="Rollouts per chunk, each stored in one transaction (default 256).")
def sweep_command(scenario: str, rollouts: int, design: str, seed: int, store_path: str, workers: int | None,
                  dask_address: str | None, nominal: bool, chunk_size: int | None) -> None:
    """Simulate the scenario over its parameter space; resumable (run the same command again)."""
    from rich.markup import escape
    from rich.table import Table

    from .sim.sweep import sweep

    try:
        s = sweep(scenario, rollouts, design=design, seed=seed, store=store_path, workers=workers,
                  dask=dask_address, nominal=nominal, chunk_size=chunk_size, progress=True)
    except KeyboardInterrupt:
        err_console.print("interrupted: every finished chunk is stored; run the same command again to resume")
        sys.exit(130)
    if s.nothing_to_do:
        console.print(f"nothing left to do: run {s.run_id} already holds all {s.planned} rollouts "
                      f"in {escape(s.store)}")
    table = Table(title=f"sweep {escape(s.scenario)} (run {s.run_id}, {escape(s.store)})", title_justify="left")
    table.add_column("")
    table.add_column("value", justify="right")
    physics = "nominal" if s.nominal else "randomised"
    table.add_row("rollouts", f"{s.done:,} of {s.planned:,} ({s.ran_now:,} now)")
    table.add_row("design / seed / physics", f"{s.design} / {s.seed} / {physics}")
    table.add_row("stood (ok)", f"{s.ok:,}")
    table.add_row("fell", f"{s.fell:,}")
    table.add_row("diverged", f"{s.diverged:,}")
    table.add_row("best objective", "-" if s.best_objective is None else f"{s.best_objective:.4g}")
    if s.ran_now:
        table.add_row("wall time", f"{s.wall_seconds:.1f} s")
        table.add_row("rate", f"{s.rollouts_per_second:,.1f} rollouts/s")
    console.print(table)
    if s.best_params:
        best = Table(title="best parameters (lowest objective, did not fall)", title_justify="left")
        for column in ("parameter", "value", "unit"):
            best.add_column(column, justify="right" if column == "value" else "left")
        for name, value in s.best_params.items():
            best.add_row(escape(name), f"{value:.4g}", escape(s.units.get(name, "")))
        console.print(best)


@main.command("info")
@store_option
@json_option
def info_command(store_path: str, json_path: str | None) -> None:
    """What the store holds: scenarios, runs with progress, rollouts by status, trials, models."""
    from rich.markup import escape
    from rich.table import Table

    from .store import Store

    with Store(store_path, create=False) as store:
        info = store.info(json_path=json_path)
    r = info["rollouts"]
    console.print(f"store {escape(info['store'])} (schema {info['schema_version']}): {r['total']:,} rollouts "
                  f"({r['ok']:,} ok, {r['fell']:,} fell, {r['diverged']:,} diverged), "
                  f"{info['trials']['total']} hardware trial(s) ({info['trials']['synthetic']} synthetic), "
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
    if info["models"]:
        table = Table(title="fitted models", title_justify="left")
        for column in ("id", "kind", "scenario", "created"):
            table.add_column(column)
        for m in info["models"]:
            table.add_row(str(m["id"]), escape(m["kind"]), escape(m["scenario"]), m["created_at"])
        console.print(table)
    if json_path:
        console.print(f"JSON: {escape(json_path)}")


# ---- ingest and standin (store/logs, sim/standin) ------------------------------------------


@main.command("ingest")
@click.argument("scenario", type=click.Path(dir_okay=False))
@click.argument("logs", nargs=-1, required=True, type=click.Path())
@store_option
@click.option("--matches", default=32, show_default=True, type=click.IntRange(1, 4096),
              help="Matched simulations per trial: nominal physics plus K-1 randomised draws.")
@click.option("--seed", default=0, show_default=True, type=click.IntRange(0),
              help="Seed of the physics draws.")
def ingest_command(scenario: str, logs: tuple[str, ...], store_path: str, matches: int, seed: int) -> None:
    """Validate hardware LOGs (CSV + sidecar JSON, or ROS 2 bags), store them and match simulations."""
    from rich.markup import escape
    from rich.table import Table

    from .scenario import load_scenario
    from .store import Store
    from .store.ingest import ingest

    sc = load_scenario(scenario)
    store = Store(store_path)
    try:
        summary = ingest(sc, list(logs), store=store, matches=matches, seed=seed, progress=True)
    finally:
        getattr(store, "close", lambda: None)()
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
            notes.extend(item.warnings)
            table.add_row(escape(item.path), label, str(item.trial_id), escape("; ".join(notes)))
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


@main.command("standin")
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
    from rich.markup import escape

    from .errors import GapgaugeError
    from .scenario import load_scenario
    from .sim.standin import load_params_file, run_standin

    if (params_path is None) == (design is None):
        raise GapgaugeError("standin: give exactly one of --params FILE.json or --design N")
    sc = load_scenario(scenario)
    params = load_params_file(params_path) if params_path is not None else None
    paths = run_standin(sc, profile_path, params_list=params_path, design=design, out_dir=out_dir, seed=seed)
    wanted = design if design is not None else len(params or [])
    console.print(f"[bold]SYNTHETIC[/] logs from the stand-in robot ({escape(profile_path)}, seed {seed}), "
                  "not hardware trials:")
    for path in paths:
        console.print(f"  {escape(str(path))}  (+ {escape(path.with_suffix('.json').name)})")
    if len(paths) < wanted:
        console.print(f"{wanted - len(paths)} parameter set(s) diverged in simulation; no log for them")


# ---- shift (compare/shift) -----------------------------------------------------------------


@main.command("shift")
@click.argument("scenario", type=click.Path(dir_okay=False))
@store_option
@json_option
@click.option("--plots", "plots_dir", default=None, type=click.Path(file_okay=False),
              help="Save a PNG per feature (simulated spread with the hardware values; residuals) here.")
@click.option("--seed", default=0, show_default=True, type=click.IntRange(0),
              help="Seed of the bootstraps and permutations.")
@click.option("--level", default=None, type=click.FloatRange(0.0, 0.5, min_open=True, max_open=True),
              help="Significance level; overrides the scenario's [shift] level.")
def shift_command(scenario: str, store_path: str, json_path: str | None, plots_dir: str | None, seed: int,
                  level: float | None) -> None:
    """Does simulation carry over? Per-feature verdicts and joint tests on the matched hardware trials."""
    import math

    from rich.markup import escape
    from rich.table import Table

    from .compare.shift import assess_shift
    from .scenario import load_scenario

    sc = load_scenario(scenario)
    report = assess_shift(sc, store_path, seed=seed, level=level, json_path=json_path, plots_dir=plots_dir)
    s = report.settings

    def num(value: float | None, fmt: str = ".3g") -> str:
        return format(value, fmt) if value is not None and math.isfinite(value) else "-"

    def pair(values: tuple[float, float]) -> str:
        return f"[{num(values[0])}, {num(values[1])}]"

    colours = {"carries_over": "green", "offset_order_kept": "yellow", "does_not_carry_over": "red",
               "undecided": "white"}
    title = f"shift: {escape(sc.name)}, {len(report.trial_ids)} trial(s)"
    table = Table(title=title, title_justify="left")
    for column in ("feature", "verdict", "n", "bias (sd)", f"{1 - s['level']:.0%} bias interval",
                   "max |resid|", "Wasserstein (sd)", "KS", "Kendall tau"):
        table.add_column(column, overflow="fold")
    for f in report.features:
        tau = f.rank.kendall if f.rank is not None else None
        table.add_row(
            escape(f.name), f"[{colours[f.verdict]}]{f.verdict}[/]", str(f.n_trials),
            num(f.bias_sd_units, "+.2f"),
            pair(f.bias_test_interval), num(f.max_abs_residual, ".2f"), num(f.wasserstein_sd_units, ".2f"),
            num(f.ks_statistic, ".2f"), num(tau, ".2f"),
        )
    console.print(table)
    for f in report.features:
        console.print(f"[{colours[f.verdict]}]{escape(f.name)}[/]: {escape(f.reason)}")
    j = report.joint
    console.print(
        f"joint ({len(j['features'])} features): MMD^2 {num(j['mmd2'])} (p = {num(j['mmd_p_value'], '.3f')}, "
        f"{j['mmd_permutations']} permutations); classifier AUC {num(j['classifier_auc'], '.2f')} "
        f"{pair(j['classifier_auc_interval'])} (p = {num(j['classifier_p_value'], '.3f')})"
    )
    if report.objective is not None:
        o = report.objective
        console.print(
            f"objective: Kendall tau {num(o.rank.kendall, '.2f')} "
            f"(p = {num(o.rank.kendall_p_value, '.3f')}); "
            f"hardware = {num(o.link.intercept)} {pair(o.link.intercept_interval)} + "
            f"{num(o.link.slope)} {pair(o.link.slope_interval)} x simulation"
        )
    console.print(
        f"level {s['level']:g}; carries over: {1 - 2 * s['level']:.0%} bias interval inside "
        f"+-{s['offset_limit']:g} sd and residuals beyond {s['residual_limit']:g} "
        "no more often than in simulation; "
        f"order kept: Kendall tau >= {s['rank_threshold']:g} with p < level; seed {report.seed}"
    )
    _print_notes(report.notes)
    if json_path:
        console.print(f"JSON: {escape(json_path)}")
    for path in report.plots:
        console.print(f"plot: {escape(path)}")


# ---- prior and propose (compare/prior, compare/propose) ------------------------------------


@main.command("prior")
@click.argument("scenario", type=click.Path(dir_okay=False))
@store_option
@json_option
@click.option("--seed", default=0, show_default=True, type=click.IntRange(0),
              help="Seed of the subsample, inducing points and optimiser restarts.")
@click.option("--max-inducing", default=300, show_default=True, type=click.IntRange(10, 5000),
              help="Inducing points of the simulation level (sparse GP above 2,000 rollouts).")
def prior_command(scenario: str, store_path: str, json_path: str | None, seed: int, max_inducing: int) -> None:
    """Fit and store the multi-fidelity prior (simulation corrected by hardware) and the fall model."""
    import math

    from rich.markup import escape
    from rich.table import Table

    from .compare.prior import fit_prior
    from .scenario import load_scenario

    sc = load_scenario(scenario)
    fit = fit_prior(sc, store_path, seed=seed, max_inducing=max_inducing, progress=True)

    def num(value: float | None, fmt: str = ".3g") -> str:
        return format(value, fmt) if value is not None and math.isfinite(value) else "-"

    low, high = fit.rho_interval
    console.print(f"prior: {escape(sc.name)}: {fit.n_sim} simulated rollouts, {fit.n_hardware} hardware trial(s)")
    console.print(f"rho = {num(fit.rho)}  95% interval [{num(low)}, {num(high)}]  (hardware = rho x simulation "
                  "+ discrepancy)")
    console.print(f"discrepancy scale {num(fit.discrepancy_scale)} (objective units); "
                  f"offset {num(fit.objective_model.offset_, '+.3g')}; "
                  f"hardware noise sd {num(fit.objective_model.hardware_noise_sd_)}")
    table = Table(title=f"leave-one-out over {fit.n_hardware} hardware trial(s)", title_justify="left")
    for column in ("model", "RMSE (objective units)", "mean log predictive density"):
        table.add_column(column)
    names = {"multi_fidelity": "multi-fidelity prior", "hardware_only": "hardware only",
             "simulation_only": "simulation only"}
    for key, label in names.items():
        row = fit.loo[key]
        table.add_row(label, num(row["rmse"]), num(row["log_predictive_density"], ".3f"))
    console.print(table)
    console.print(f"fit time {fit.fit_seconds:.1f} s; simulation level "
                  f"{type(fit.objective_model.low_).__name__}; stored as model {fit.model_id}; seed {fit.seed}")
    _print_notes(fit.notes)
    if json_path:
        fit.write_json(json_path)
        console.print(f"JSON: {escape(json_path)}")


@main.command("propose")
@click.argument("scenario", type=click.Path(dir_okay=False))
@store_option
@click.option("--count", default=1, show_default=True, type=click.IntRange(1, 50),
              help="Number of trials to propose (a batch by kriging believer).")
@click.option("--max-fall-risk", default=0.05, show_default=True,
              type=click.FloatRange(0.0, 1.0, min_open=True), help="Highest modelled fall probability allowed.")
@click.option("--out", "out_path", default=None, type=click.Path(dir_okay=False),
              help='Write {"proposals": [...]} JSON here (gapgauge standin --params reads it).')
@click.option("--seed", default=0, show_default=True, type=click.IntRange(0),
              help="Seed of the candidate sets (and of a refit, if the stored prior is out of date).")
def propose_command(scenario: str, store_path: str, count: int, max_fall_risk: float, out_path: str | None,
                    seed: int) -> None:
    """Propose the next hardware trials: expected improvement x P(no fall), inside the safe bounds."""
    from rich.markup import escape
    from rich.table import Table

    from .compare.propose import propose
    from .scenario import load_scenario

    sc = load_scenario(scenario)
    result = propose(sc, store_path, count=count, max_fall_risk=max_fall_risk, seed=seed)
    table = Table(title=f"proposals: {escape(sc.name)} (P(fall) <= {max_fall_risk:g})", title_justify="left")
    table.add_column("parameter")
    table.add_column("unit")
    for i in range(len(result.proposals)):
        table.add_column(f"#{i + 1}", justify="right")
    for name in sc.parameter_names:
        table.add_row(escape(name), escape(result.units[name]),
                      *[f"{p['params'][name]:.4g}" for p in result.proposals])
    table.add_row("predicted objective", "", *[f"{p['predicted_objective']:.4g}" for p in result.proposals])
    table.add_row("predicted sd", "", *[f"{p['predicted_sd']:.3g}" for p in result.proposals])
    table.add_row("P(fall)", "", *[f"{p['fall_risk']:.3f}" for p in result.proposals])
    console.print(table)
    for i, p in enumerate(result.proposals):
        console.print(f"#{i + 1}: {escape(p['reason'])}")
    console.print(f"batch: {escape(result.batch_method)}; incumbent {result.incumbent:.4g}; "
                  f"{result.n_hardware} hardware trial(s), {result.n_sim} simulated rollouts; seed {result.seed}")
    _print_notes(result.notes)
    if out_path:
        result.write_json(out_path)
        console.print(f"JSON: {escape(out_path)}")
    console.print(f"[bold yellow]{CAUTION}[/]")


# ---- budget and calibrate (compare/budget, compare/calibration) ----------------------------


@main.command("budget")
@click.argument("scenario", type=click.Path(dir_okay=False))
@store_option
@click.option("--target", "target_fraction", default=0.95, show_default=True,
              type=click.FloatRange(0.0, 1.0, min_open=True),
              help="Target: this fraction of the way from a random safe parameter set (median) to the best.")
@click.option("--target-value", default=None, type=float,
              help="Target: this objective value instead (objective units, lower is better).")
@click.option("--confidence", default=0.8, show_default=True, type=click.FloatRange(0.0, 1.0, min_open=True,
              max_open=True), help="Probability of reaching the target within the booked trials.")
@click.option("--max-trials", default=20, show_default=True, type=click.IntRange(1, 500),
              help="Trials per simulated tuning run.")
@click.option("--draws", default=128, show_default=True, type=click.IntRange(1, 100_000),
              help="Plausible hardware response surfaces drawn from the posterior.")
@click.option("--max-fall-risk", default=0.05, show_default=True,
              type=click.FloatRange(0.0, 1.0, min_open=True), help="Fall-risk limit of the policy (as propose).")
@click.option("--seed", default=0, show_default=True, type=click.IntRange(0),
              help="Seed of the candidates, the draws and the observation noise.")
@json_option
def budget_command(scenario: str, store_path: str, target_fraction: float, target_value: float | None,
                   confidence: float, max_trials: int, draws: int, max_fall_risk: float, seed: int,
                   json_path: str | None) -> None:
    """How many hardware trials to book: Monte Carlo of the propose policy, with and without the prior."""
    from rich.markup import escape
    from rich.table import Table

    from .compare.budget import book_text, plan_budget
    from .scenario import load_scenario
    from .store import Store

    sc = load_scenario(scenario)
    store = Store(store_path, create=False)
    try:
        plan = plan_budget(sc, store, target_fraction=target_fraction, target_value=target_value,
                           confidence=confidence, max_trials=max_trials, draws=draws, seed=seed,
                           max_fall_risk=max_fall_risk, progress=True)
    finally:
        store.close()
    level = f"P{round(100 * confidence)}"
    table = Table(title=f"budget: {escape(sc.name)}, trials to reach the target ({plan.draws} draws, "
                  f"up to {plan.max_trials} trials)", title_justify="left")
    keys = ["p50", "p80", "p95"] + ([] if level in ("P50", "P80", "P95") else ["book"])
    for column in ("", "P50", "P80", "P95", level)[: len(keys) + 1] + ("reached", "expected falls"):
        table.add_column(column, justify="right")
    for label, arm in (("with the simulation prior", plan.with_prior), ("cold start (no prior)", plan.cold_start)):
        table.add_row(label, *[book_text(arm[k], plan.max_trials) for k in keys],
                      f"{100 * arm['reached_fraction']:.0f}%", f"{arm['expected_falls']:.2f}")
    console.print(table)
    if plan.saving is not None:
        console.print(f"saving (cold P80 - prior P80): {plan.saving} trial(s)")
    elif plan.saving_at_least is not None:
        console.print(f"saving (cold P80 - prior P80): at least {plan.saving_at_least} trial(s)")
    marks = sorted({n for n in (1, 2, 3, 5, 8, 10, 15, 20, 30, 50, plan.max_trials) if n <= plan.max_trials})
    curve = Table(title="P(target reached by trial n)", title_justify="left")
    curve.add_column("n", justify="right")
    for n in marks:
        curve.add_column(str(n), justify="right")
    for key, label in (("with_prior", "with prior"), ("cold_start", "cold start")):
        curve.add_row(label, *[f"{plan.curve[n - 1][key]:.2f}" for n in marks])
    console.print(curve)
    console.print(f"target: {escape(plan.target['definition'])}; fall-risk limit {plan.max_fall_risk:g}; "
                  f"{plan.n_hardware} hardware trial(s) known; seed {plan.seed}; {plan.seconds:.1f} s")
    _print_notes(plan.notes)
    console.print(f"[bold]{escape(plan.sentence)}[/]")
    if json_path:
        plan.write_json(json_path)
        console.print(f"JSON: {escape(json_path)}")


@main.command("calibrate")
@click.argument("scenario", type=click.Path(dir_okay=False))
@store_option
@click.option("--physics", "physics", default=None,
              help="Comma-separated physical quantities to fit (default: the scenario's [calibration] physics).")
@click.option("--overlay", "overlay_path", default=None, type=click.Path(dir_okay=False),
              help="Where to write the calibrated scenario overlay (default: <scenario>.calibrated.toml beside it).")
@json_option
@click.option("--seed", default=0, show_default=True, type=click.IntRange(0),
              help="Seed of the spread draws and the optimiser.")
def calibrate_command(scenario: str, store_path: str, physics: str | None, overlay_path: str | None,
                      json_path: str | None, seed: int) -> None:
    """Fit the simulator's physics to the hardware trials; write a calibrated scenario overlay."""
    from rich.markup import escape
    from rich.table import Table

    from .scenario import load_scenario
    from .store import Store
    from .workflow import calibrate_from_store

    sc = load_scenario(scenario)
    names = None if physics is None else [n.strip() for n in physics.split(",") if n.strip()]
    store = Store(store_path, create=False)
    try:
        result = calibrate_from_store(sc, store, physics_names=names, overlay_path=overlay_path, seed=seed,
                                      json_path=json_path, progress=True)
    finally:
        store.close()
    table = Table(title=f"calibrate: {escape(sc.name)}, {result.n_trials} trial(s)", title_justify="left")
    for column in ("physics", "estimate", "95% interval", "was", "identifiable", "why"):
        table.add_column(column, overflow="fold")
    for p in result.parameters:
        table.add_row(
            escape(p.name), f"{p.estimate:.4g} {escape(p.unit)}", f"[{p.interval[0]:.4g}, {p.interval[1]:.4g}]",
            f"{p.base_nominal:.4g}", "[green]yes[/]" if p.identifiable else "[yellow]no[/]", escape(p.reason),
        )
    console.print(table)
    shift = Table(title="feature shift (standardised residual rms; SHIFT verdict)", title_justify="left")
    for column in ("feature", "before (nominal physics)", "after (calibrated)"):
        shift.add_column(column, overflow="fold")
    for j, name in enumerate(result.features):
        shift.add_row(
            escape(name),
            f"{result.shift_before.rms[j]:.2f}  {result.shift_before.verdicts[j]}",
            f"{result.shift_after.rms[j]:.2f}  {result.shift_after.verdicts[j]}",
        )
    shift.add_row("all (mean square)", f"{result.shift_before.total:.3g}", f"{result.shift_after.total:.3g}")
    console.print(shift)
    for name, why in result.excluded_features.items():
        console.print(f"not matched: {escape(name)} ({escape(why)})")
    console.print(
        f"discrepancy {result.discrepancy}, optimiser {escape(result.optimiser)}: {result.evaluations} "
        f"evaluations, {result.rollouts} rollouts, seed {result.seed}"
    )
    console.print(f"overlay: {escape(str(result.overlay_path))}")
    if json_path:
        console.print(f"JSON: {escape(json_path)}")
    console.print(f"next: gapgauge sweep {escape(str(result.overlay_path))} --rollouts 200000")


# ---- report and demo (report/, demo) -------------------------------------------------------


@main.command("report")
@click.argument("scenario", type=click.Path(dir_okay=False))
@store_option
@click.option("--out", "out_path", default="report.html", show_default=True, type=click.Path(dir_okay=False),
              help="HTML file to write; the JSON summary goes beside it (same name, .json).")
@click.option("--plots", "plots_dir", default=None, type=click.Path(file_okay=False),
              help="Also save every figure as a PNG here.")
def report_command(scenario: str, store_path: str, out_path: str, plots_dir: str | None) -> None:
    """Write the self-contained HTML transfer report and its JSON summary."""
    from pathlib import Path

    from rich.markup import escape

    from .errors import StoreError
    from .report.html import write_report
    from .scenario import load_scenario
    from .store import Store

    sc = load_scenario(scenario)
    if not Path(store_path).is_file():
        raise StoreError(f"{store_path}: store not found; "
                         f"run gapgauge sweep {scenario} --store {store_path} first")
    store = Store(store_path)
    try:
        result = write_report(sc, store, out_path, plots_dir=plots_dir)
    finally:
        getattr(store, "close", lambda: None)()
    console.print(f"[bold]verdict:[/] {escape(result.decision.verdict)}")
    console.print(f"[bold]next step:[/] {escape(result.decision.next_step)}")
    if result.decision.command:
        console.print(f"  {escape(result.decision.command)}")
    for section in result.sections:
        if not section.filled:
            command = escape(section.fill_command or "")
            console.print(f"section '{escape(section.title)}' is empty: run {command}")
    console.print(f"report: {escape(str(result.path))}\nJSON: {escape(str(result.json_path))}")
    console.print(CAUTION)


@main.command("demo")
@click.option("--out", "out_dir", default="gapgauge-demo", show_default=True,
              type=click.Path(file_okay=False),
              help="Folder for the scenario copy, the store, the stand-in logs and the report.")
@click.option("--quick", is_flag=True, help="A smaller sweep and cheaper fits: about a minute in all.")
@click.option("--seed", default=0, show_default=True, type=click.IntRange(0), help="Seed of every step.")
def demo_command(out_dir: str, quick: bool, seed: int) -> None:
    """The whole path on the bundled push-recovery scenario with the stand-in robot (no robot needed)."""
    from .demo import run_demo

    run_demo(out_dir, quick=quick, seed=seed, progress=True)


# ---- store maintenance ---------------------------------------------------------------------


@main.group("store")
def store_group() -> None:
    """Store maintenance."""


@store_group.command("check")
@store_option
def store_check_command(store_path: str) -> None:
    """Verify the store: SQLite's integrity check plus gapgauge's own. Exit 0 healthy, 1 otherwise."""
    from rich.markup import escape

    from .store.db import check_store

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


if __name__ == "__main__":  # pragma: no cover
    main()
