"""The first screen beside the verdict: the key-figure cards, which sections have their data (and the
command that fills the others), and the cautions that hold for this store."""

from __future__ import annotations

from dataclasses import dataclass

from ..inputs import RESULT_KINDS, ReportInputs
from . import budget as budget_section
from . import proposals as proposals_section
from .common import fmt, fmt_interval, interval
from .sweep import sweep_summary

SECTION_TITLES = {
    "sweep": "The simulation sweep",
    "trials": "Hardware trials",
    "shift": "Feature shift: does simulation carry over?",
    "prior": "The multi-fidelity prior",
    "proposals": "Proposed next trials",
    "budget": "Trial budget",
    "calibration": "Simulator calibration",
}
FEW_TRIALS = 5  # below this many trials the report warns that verdicts and rho are uncertain


@dataclass(frozen=True)
class SectionStatus:
    """Whether a report section has its data, and the command that would fill it if not."""

    name: str
    title: str
    filled: bool
    fill_command: str | None


def section_statuses(inputs: ReportInputs) -> list[SectionStatus]:
    results = inputs.results()
    filled = {
        "sweep": inputs.rollouts is not None,
        "trials": bool(inputs.trials),
        **{kind: results[kind] is not None for kind in RESULT_KINDS},
    }
    commands = {
        "sweep": inputs.command("sweep", "--rollouts", "20000"),
        "trials": inputs.command("propose", "--count", "5")
        + "  (run them on the robot, then: "
        + inputs.command("ingest", "LOG.csv", "...")
        + ")",
        "shift": inputs.command("shift"),
        "prior": inputs.command("prior"),
        "proposals": inputs.command("propose"),
        "budget": inputs.command("budget"),
        "calibration": inputs.command("calibrate"),
    }
    return [
        SectionStatus(name, title, filled[name], None if filled[name] else commands[name])
        for name, title in SECTION_TITLES.items()
    ]


def _budget_card(inputs: ReportInputs) -> dict[str, str]:
    budget = inputs.budget
    if budget is None:
        return {"label": "Trial budget (P80)", "value": "–", "sub": "run gapgauge budget"}
    p80 = budget_section.p80(budget, "with_prior")
    cold = budget_section.p80(budget, "cold_start")
    return {
        "label": "Trial budget (P80)",
        "value": f"{budget_section.trials_text(p80, budget)} trials",
        "sub": f"cold start {fmt(cold)}; saving {fmt(cold - p80)}"
        if cold is not None and p80 is not None
        else f"with the prior; cold start {budget_section.trials_text(cold, budget)}",
    }


def _rho_card(inputs: ReportInputs) -> dict[str, str]:
    prior = inputs.prior
    if prior is None:
        return {"label": "rho (sim to hardware)", "value": "–", "sub": "run gapgauge prior"}
    iv = interval(prior.rho_interval)
    return {
        "label": "rho (sim to hardware)",
        "value": fmt(prior.rho),
        "sub": f"95% interval {fmt_interval(iv)}" if iv else "no interval",
    }


def _verdict_tally(inputs: ReportInputs) -> str:
    shift = inputs.shift
    if shift is None or not shift.features:
        return "–"
    good = sum(1 for f in shift.features if f.verdict in ("carries_over", "offset_order_kept"))
    return f"{good} / {len(shift.features)}"


def cards(inputs: ReportInputs) -> list[dict[str, str]]:
    """The key figures of the first screen: label, value, and a line under it."""
    sweep = sweep_summary(inputs.scenario, inputs.rollouts)
    n_syn = inputs.n_synthetic
    risk = proposals_section.highest_fall_risk(inputs.proposals)
    return [
        _budget_card(inputs),
        _rho_card(inputs),
        {
            "label": "Hardware trials",
            "value": fmt(len(inputs.trials)),
            "sub": f"{n_syn} synthetic (stand-in)" if n_syn else "all from hardware" if inputs.trials else "none yet",
        },
        {
            "label": "Sweep rollouts",
            "value": fmt(sweep["total"]),
            "sub": f"{fmt(sweep['fell'])} fell, {fmt(sweep['diverged'])} diverged" if sweep["total"] else "none yet",
        },
        {
            "label": "Proposed trials",
            "value": fmt(proposals_section.count(inputs.proposals)),
            "sub": "run gapgauge propose" if risk is None else f"max fall risk {fmt(risk)}",
        },
        {"label": "Verdicts", "value": _verdict_tally(inputs), "sub": "features carrying over / of all"},
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
