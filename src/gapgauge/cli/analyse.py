"""Commands that analyse what the store holds: shift, prior, propose, budget, calibrate."""

from __future__ import annotations

import click
from rich.markup import escape
from rich.table import Table

from ..app.budget import plan_budget
from ..app.calibrate import calibrate
from ..app.prior import fit_prior
from ..app.propose import propose
from ..app.sheet import check_sheet_path, write_run_sheet
from ..app.shift import assess_shift
from ..compare.budget import DEFAULT_CANDIDATES, book_text
from ..compare.multifidelity import SPARSE_THRESHOLD
from ..quantities import display_unit, feature_unit, format_interval, format_number, format_quantity
from ..report.sections.shift_text import detail as shift_detail
from ..safety import CAUTION
from ..scenario import load_scenario
from .common import console, json_option, num, pair, print_notes, progress_bars, store_option


@click.command("shift")
@click.argument("scenario", type=click.Path(dir_okay=False))
@store_option
@json_option
@click.option("--plots", "plots_dir", default=None, type=click.Path(file_okay=False),
              help="Save a PNG per feature (simulated spread with the hardware values; residuals) here.")
@click.option("--seed", default=0, show_default=True, type=click.IntRange(0),
              help="Seed of the bootstraps and permutations.")
@click.option("--level", default=None, type=click.FloatRange(0.0, 0.5, min_open=True, max_open=True),
              help="Significance level; overrides the scenario's [shift] level.")
@click.option("--leave-out-flagged", is_flag=True,
              help="Leave out, trial by trial, the features that read a channel flagged as unusual at ingest.")
def shift_command(scenario: str, store_path: str, json_path: str | None, plots_dir: str | None, seed: int,
                  level: float | None, leave_out_flagged: bool) -> None:
    """Does simulation carry over? Per-feature verdicts and joint tests on the matched hardware trials."""

    sc = load_scenario(scenario)
    report = assess_shift(sc, store_path, seed=seed, level=level, json_path=json_path, plots_dir=plots_dir,
                          leave_out_flagged=leave_out_flagged)
    s = report.settings

    colours = {"carries_over": "green", "offset_order_kept": "yellow", "does_not_carry_over": "red",
               "undecided": "white"}
    title = f"shift: {escape(sc.name)}, {len(report.trial_ids)} trial(s)"
    table = Table(title=title, title_justify="left")
    for column in ("feature", "verdict", "n", "bias", "bias (sd)", f"{1 - s.level:.0%} bias interval",
                   "max |resid| (sd)", "Wasserstein (sd)", "KS", "Kendall tau"):
        table.add_column(column, overflow="fold")
    for f in report.features:
        tau = f.rank.kendall if f.rank is not None else None
        unit = feature_unit(f.name)
        shown = display_unit(unit, [f.bias, *f.bias_test_interval])
        table.add_row(
            escape(f.name), f"[{colours[f.verdict]}]{f.verdict}[/]", str(f.n_trials),
            format_quantity(f.bias, unit, display=shown, signed=True), num(f.bias_sd_units, "+.2f"),
            format_interval(f.bias_test_interval, unit, display=shown), num(f.max_abs_residual, ".2f"),
            num(f.wasserstein_sd_units, ".2f"), num(f.ks_statistic, ".2f"), num(tau, ".2f"),
        )
    console.print(table)
    for f in report.features:  # the rule's evidence with the feature's unit, as the report states it
        console.print(f"[{colours[f.verdict]}]{escape(f.name)}[/]: {escape(shift_detail(f, report.settings))}")
    j = report.joint
    console.print(
        f"joint ({len(j.features)} features): MMD^2 {num(j.mmd2)} (p = {num(j.mmd_p_value, '.3f')}, "
        f"{j.mmd_permutations} permutations); classifier AUC {num(j.classifier_auc, '.2f')} "
        f"{pair(j.classifier_auc_interval)} (p = {num(j.classifier_p_value, '.3f')})"
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
        f"level {s.level:g}; carries over: {1 - 2 * s.level:.0%} bias interval inside "
        f"+-{s.offset_limit:g} sd and residuals beyond {s.residual_limit:g} "
        "no more often than in simulation; "
        f"order kept: Kendall tau >= {s.rank_threshold:g} with p < level; seed {report.seed}"
    )
    print_notes(report.notes)
    if json_path:
        console.print(f"JSON: {escape(json_path)}")
    for path in report.plots:
        console.print(f"plot: {escape(path)}")




@click.command("prior")
@click.argument("scenario", type=click.Path(dir_okay=False))
@store_option
@json_option
@click.option("--seed", default=0, show_default=True, type=click.IntRange(0),
              help="Seed of the subsample, inducing points and optimiser restarts.")
@click.option("--max-inducing", default=None, type=click.IntRange(10, 5000),
              help=f"Inducing points of the simulation level (a sparse GP above {SPARSE_THRESHOLD:,} "
              "standing rollouts); default 300, or 600 for a sweep of more than 100,000 rollouts.")
def prior_command(scenario: str, store_path: str, json_path: str | None, seed: int, max_inducing: int | None) -> None:
    """Fit and store the multi-fidelity prior (simulation corrected by hardware) and the fall model."""

    sc = load_scenario(scenario)
    with progress_bars() as progress:
        fit = fit_prior(sc, store_path, seed=seed, max_inducing=max_inducing, progress=progress)

    low, high = fit.rho_interval
    console.print(f"prior: {escape(sc.name)}: {fit.n_sim} simulated rollouts, {fit.n_hardware} hardware trial(s)")
    console.print(f"rho = {num(fit.rho)}  95% interval [{num(low)}, {num(high)}]  (hardware = rho x simulation "
                  "+ discrepancy)")
    console.print(f"discrepancy scale {num(fit.discrepancy_scale)} (objective units); "
                  f"offset {num(fit.offset, '+.3g')}; "
                  f"hardware noise sd {num(fit.hardware_noise_sd)}")
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
                  f"{fit.simulation_level}{' (reused: the sweep has not changed)' if fit.simulation_reused else ''}; "
                  f"stored as model {fit.model_id}; seed {fit.seed}")
    print_notes(fit.notes)
    if json_path:
        fit.write_json(json_path)
        console.print(f"JSON: {escape(json_path)}")


@click.command("propose")
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
@click.option("--stop-epsilon", default=None, type=click.FloatRange(0.0, min_open=True),
              help="Stop rule: the regret allowed, objective units (default: 5% of the simulated objective's "
              "spread over the safe bounds).")
@click.option("--stop-level", default=0.9, show_default=True,
              type=click.FloatRange(0.0, 1.0, min_open=True, max_open=True),
              help="Stop rule: stop when the probability that the current best is within epsilon of the best "
              "reaches this.")
@click.option("--sheet", "sheet_path", default=None, type=click.Path(dir_okay=False),
              help="Also write the run sheet for the lab: FILE.html (print it; one A4 page per 5 trials) or FILE.csv.")
def propose_command(scenario: str, store_path: str, count: int, max_fall_risk: float, out_path: str | None,
                    seed: int, stop_epsilon: float | None, stop_level: float, sheet_path: str | None) -> None:
    """Propose the next hardware trials: expected improvement x P(no fall), inside the safe bounds."""

    if sheet_path:
        check_sheet_path(sheet_path)  # a wrong suffix is refused before the work, not after
    sc = load_scenario(scenario)
    with progress_bars() as progress:
        result = propose(sc, store_path, count=count, max_fall_risk=max_fall_risk, seed=seed,
                         stop_epsilon=stop_epsilon, stop_level=stop_level, progress=progress)
    table = Table(title=f"proposals: {escape(sc.name)} (P(fall) <= {max_fall_risk:g})", title_justify="left")
    table.add_column("parameter")
    table.add_column("unit")
    for i in range(len(result.proposals)):
        table.add_column(f"#{i + 1}", justify="right")
    for name in sc.parameter_names:
        table.add_row(escape(name), escape(result.units[name]),
                      *[format_number(p.params[name]) for p in result.proposals])
    table.add_row("predicted objective", "", *[format_number(p.predicted_objective) for p in result.proposals])
    table.add_row("predicted sd", "", *[format_number(p.predicted_sd) for p in result.proposals])
    table.add_row("P(fall)", "%", *[format_number(100 * p.fall_risk) for p in result.proposals])
    console.print(table)
    for i, p in enumerate(result.proposals):
        console.print(f"#{i + 1}: {escape(p.reason)}")
    console.print(f"batch: {escape(result.batch_method)}; incumbent {result.incumbent:.4g}; "
                  f"{result.n_hardware} hardware trial(s), {result.n_sim} simulated rollouts; seed {result.seed}")
    print_notes(result.notes)
    if result.stop is not None:
        console.print(f"[bold]{escape(result.stop.decision)}[/]")
    if out_path:
        result.write_json(out_path)
        console.print(f"JSON: {escape(out_path)}")
    if sheet_path:
        console.print(f"run sheet: {escape(str(write_run_sheet(sc, store_path, sheet_path, proposals=result)))}")
    console.print(f"[bold yellow]{CAUTION}[/]")




@click.command("budget")
@click.argument("scenario", type=click.Path(dir_okay=False))
@store_option
@click.option("--target-value", default=None, type=float,
              help="Target: no fall, the success rule and this objective value or better (objective units, lower "
              "is better). Default: the level most simulated tuning runs with the prior reach (see --reach-share).")
@click.option("--within", "target_within", default=None, type=click.FloatRange(0.0),
              help="Target: within this much (objective units) of the best the posterior expects for this robot.")
@click.option("--target-fraction", default=None, type=click.FloatRange(0.0, 1.0, min_open=True),
              help="Target, per drawn surface: this fraction of the way from a random safe parameter set to the "
              "surface's own best (e.g. 0.95; an extreme, rarely reached).")
@click.option("--reach-share", default=0.9, show_default=True,
              type=click.FloatRange(0.0, 1.0, min_open=True, max_open=True),
              help="Default target: the most ambitious level this share of the simulated runs reach within "
              "--max-trials.")
@click.option("--confidence", default=0.8, show_default=True, type=click.FloatRange(0.0, 1.0, min_open=True,
              max_open=True), help="Probability of reaching the target within the booked trials.")
@click.option("--max-trials", default=20, show_default=True, type=click.IntRange(1, 500),
              help="Trials per simulated tuning run (the horizon).")
@click.option("--draws", default=128, show_default=True, type=click.IntRange(1, 100_000),
              help="Plausible hardware response surfaces drawn from the posterior.")
@click.option("--candidates", "n_candidates", default=DEFAULT_CANDIDATES, show_default=True,
              type=click.IntRange(2, 8192), help="Parameter sets the simulated tuner picks among (Sobol points of "
              "the safe bounds); 4096 takes about 1.4 GB and 10 s, 1024 a fifth of that and is coarser.")
@click.option("--max-fall-risk", default=0.05, show_default=True,
              type=click.FloatRange(0.0, 1.0, min_open=True), help="Fall-risk limit of the policy (as propose).")
@click.option("--seed", default=0, show_default=True, type=click.IntRange(0),
              help="Seed of the candidates, the draws and the observation noise.")
@json_option
def budget_command(scenario: str, store_path: str, target_value: float | None, target_within: float | None,
                   target_fraction: float | None, reach_share: float, confidence: float, max_trials: int, draws: int,
                   n_candidates: int, max_fall_risk: float, seed: int, json_path: str | None) -> None:
    """How many hardware trials to book: Monte Carlo of the propose policy, with and without the prior."""

    sc = load_scenario(scenario)
    with progress_bars() as progress:
        plan = plan_budget(sc, store_path, target_fraction=target_fraction, target_value=target_value,
                           target_within=target_within, reach_share=reach_share, confidence=confidence,
                           max_trials=max_trials, draws=draws, seed=seed, max_fall_risk=max_fall_risk,
                           n_candidates=n_candidates, progress=progress)
    level = f"P{round(100 * confidence)}"
    table = Table(title=f"budget: {escape(sc.name)}, trials to reach the target ({plan.draws} draws, "
                  f"up to {plan.max_trials} trials)", title_justify="left")
    keys = ["p50", "p80", "p95"] + ([] if level in ("P50", "P80", "P95") else ["book"])
    for column in ("", "P50", "P80", "P95", level)[: len(keys) + 1] + ("reached", "expected falls"):
        table.add_column(column, justify="right")
    for label, arm in (("with the simulation prior", plan.with_prior), ("cold start (no prior)", plan.cold_start)):
        table.add_row(label, *[book_text(getattr(arm, k), plan.max_trials) for k in keys],
                      f"{100 * arm.reached_fraction:.0f}%", f"{arm.expected_falls:.2f}")
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
        curve.add_row(label, *[f"{getattr(plan.curve[n - 1], key):.2f}" for n in marks])
    console.print(curve)
    console.print(f"[bold]target[/]: {escape(plan.target.sentence)}")
    console.print(f"why: {escape(plan.target.why)}")
    for label, arm in (("with the prior", plan.with_prior), ("cold start", plan.cold_start)):
        if arm.beyond:
            console.print(f"{label}: {escape(arm.beyond)} (options: --max-trials, --target-value, --draws)")
    console.print(f"fall-risk limit {plan.max_fall_risk:g}; {plan.n_hardware} hardware trial(s) known; "
                  f"seed {plan.seed}; {plan.seconds:.1f} s")
    print_notes(plan.notes)
    console.print(f"[bold]{escape(plan.sentence)}[/]")
    if json_path:
        plan.write_json(json_path)
        console.print(f"JSON: {escape(json_path)}")


@click.command("calibrate")
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

    sc = load_scenario(scenario)
    names = None if physics is None else [n.strip() for n in physics.split(",") if n.strip()]
    with progress_bars() as progress:
        result = calibrate(sc, store_path, physics_names=names, overlay_path=overlay_path, seed=seed,
                           json_path=json_path, progress=progress)
    table = Table(title=f"calibrate: {escape(sc.name)}, {result.n_trials} trial(s)", title_justify="left")
    for column in ("physics", "estimate", "95% interval", "was", "identifiable", "why"):
        table.add_column(column, overflow="fold")
    for p in result.parameters:
        shown = display_unit(p.unit, [p.estimate, *p.interval, p.base_nominal])
        table.add_row(
            escape(p.name), escape(format_quantity(p.estimate, p.unit, display=shown)),
            escape(format_interval(p.interval, p.unit, display=shown)),
            escape(format_quantity(p.base_nominal, p.unit, display=shown)),
            "[green]yes[/]" if p.identifiable else "[yellow]no[/]", escape(p.reason),
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
