"""The first screen beside the verdict and the next step: the budget as a number with its target, the
stop rule, the calibration's finding, the key figures (in the words of the tables below them), which
sections have their data (and the command that fills the others), and the cautions for this store."""

from __future__ import annotations

from dataclasses import dataclass

from ...quantities import format_percent
from ..inputs import RESULT_KINDS, ReportInputs
from . import budget as budget_section
from . import calibration as calibration_section
from . import proposals as proposals_section
from . import shift as shift_section
from .common import VERDICT_WORDS, fmt, fmt_interval, interval
from .sweep import sweep_summary

SECTION_TITLES = {
    "trials": "Hardware trials",
    "motion": "Motion: hardware against simulation",
    "shift": "Feature shift: does simulation carry over?",
    "calibration": "Simulator calibration",
    "prior": "The multi-fidelity prior",
    "proposals": "Proposed next trials",
    "budget": "Trial budget",
    "sweep": "The simulation sweep",
}
FEW_TRIALS = 5  # below this many trials the report warns that verdicts and rho are uncertain


@dataclass(frozen=True)
class SectionStatus:
    """Whether a report section has its data, and the command that would fill it if not."""

    name: str
    title: str
    filled: bool
    fill_command: str | None
    note: str = ""  # why a stored result was left out (an older format), "" otherwise


def section_statuses(inputs: ReportInputs) -> list[SectionStatus]:
    results = inputs.results()
    filled = {
        "sweep": inputs.rollouts is not None,
        "trials": bool(inputs.trials),
        "motion": any(m.hardware is not None or m.simulated is not None for m in inputs.motion),
        **{kind: results[kind] is not None for kind in RESULT_KINDS},
    }
    commands = {
        "sweep": inputs.command("sweep", "--rollouts", "20000"),
        "trials": inputs.command("propose", "--count", "5")
        + "  (run them on the robot, then: "
        + inputs.command("ingest", "LOG.csv", "...")
        + ")",
        "motion": inputs.command("ingest", "LOG.csv", "..."),
        "shift": inputs.command("shift"),
        "prior": inputs.command("prior"),
        "proposals": inputs.command("propose"),
        "budget": inputs.command("budget"),
        "calibration": inputs.command("calibrate"),
    }
    return [
        SectionStatus(name, title, filled[name], None if filled[name] else commands[name], inputs.stale.get(name, ""))
        for name, title in SECTION_TITLES.items()
    ]


def budget_card(inputs: ReportInputs) -> dict[str, str]:
    """The budget as a number of trials at the booking level, with its target in words."""
    budget = inputs.budget
    if budget is None:
        return {"label": "Trial budget", "value": "not planned yet", "sub": f"run {inputs.command('budget')}"}
    level = f"P{round(100 * budget.confidence)}"
    book = budget_section.trials_text(budget.with_prior.book, budget)
    cold = budget_section.trials_text(budget.cold_start.book, budget)
    sub = f"to reach: {budget_section.target_text(budget, inputs.scenario)}; cold start {cold} trials"
    more = budget_section.beyond(budget)
    return {
        "label": f"Trial budget ({level}, with the simulation prior)",
        "value": f"{book} trials",
        "sub": sub + (f". {more}" if more else ""),
    }


def stop_card(inputs: ReportInputs) -> dict[str, str]:
    """When to stop tuning: the proposals' stop rule, or what would give one."""
    text = proposals_section.stop_text(inputs.proposals)
    if text is not None:
        return {"label": "When to stop", "value": text}
    if inputs.proposals is None:
        return {"label": "When to stop", "value": f"no stop rule yet: run {inputs.command('propose')}"}
    return {"label": "When to stop", "value": "the stored proposals carry no stop rule; propose again to get one"}


def calibration_card(inputs: ReportInputs) -> dict[str, str]:
    """The calibration's main finding in a sentence, or what would give one."""
    text = calibration_section.finding(inputs.calibration)
    if text is None:
        return {"label": "Calibration", "value": f"not calibrated yet: run {inputs.command('calibrate')}"}
    return {"label": "Calibration: what the trials say about the robot", "value": text}


def verdict_tally(inputs: ReportInputs) -> str:
    """The shift verdicts counted, in the words of the shift table."""
    shift = inputs.shift
    if shift is None or not shift.features:
        return "not assessed"
    counts = shift_section.verdict_counts(shift)
    return ", ".join(f"{n} {VERDICT_WORDS[v]}" for v, n in counts.items() if n)


def cards(inputs: ReportInputs) -> list[dict[str, str]]:
    """The key figures under the first screen: label, value, and a line under it."""
    sweep = sweep_summary(inputs.scenario, inputs.rollouts)
    n_syn = inputs.n_synthetic
    risk = proposals_section.highest_fall_risk(inputs.proposals)
    prior = inputs.prior
    iv = None if prior is None else interval(prior.rho_interval)
    return [
        {"label": "Features (of the shift table)", "value": verdict_tally(inputs),
         "sub": "" if inputs.shift is None else f"of {len(inputs.shift.features)} features"},
        {"label": "rho (sim to hardware)", "value": "–" if prior is None else fmt(prior.rho),
         "sub": "run gapgauge prior" if prior is None else f"95% interval {fmt_interval(iv)}" if iv else "no interval"},
        {"label": "Hardware trials", "value": fmt(len(inputs.trials)),
         "sub": f"{n_syn} synthetic (stand-in)" if n_syn else "all from hardware" if inputs.trials else "none yet"},
        {"label": "Sweep rollouts", "value": fmt(sweep["total"]),
         "sub": f"{fmt(sweep['fell'])} fell, {fmt(sweep['diverged'])} diverged" if sweep["total"] else "none yet"},
        {"label": "Proposed trials", "value": fmt(proposals_section.count(inputs.proposals)),
         "sub": "run gapgauge propose" if risk is None else f"highest modelled fall risk {format_percent(risk)}"},
    ]


def cautions(inputs: ReportInputs) -> list[str]:
    """The cautions that hold for this store, beside the general caution of ``gapgauge.safety``."""
    out = []
    n_trials, n_syn = len(inputs.trials), inputs.n_synthetic
    if n_syn:
        out.append(
            f"{n_syn} of the {n_trials} trials are synthetic, written by the stand-in robot: they show the "
            "path, not the behaviour of a real machine."
        )
    if 0 < n_trials < FEW_TRIALS:
        out.append(f"Only {n_trials} hardware trials: verdicts and the prior's link are uncertain; read the intervals.")
    out.append(
        "Predictions hold inside the swept bounds and the physics ranges simulated; proposals are confined "
        "to the safe bounds, but a modelled fall risk is an estimate, not a limit the robot obeys."
    )
    out.append("The simulated body is planar: sideways falls, foot roll and stepping are outside the model.")
    return out
