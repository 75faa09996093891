"""The first screen's verdict and recommended next step, by written rules (see :func:`decide`)."""

from __future__ import annotations

import math
import shlex
from dataclasses import dataclass

from ...quantities import format_percent, label
from ..inputs import ReportInputs, relative
from . import calibration as calibration_section
from . import prior as prior_section
from . import proposals as proposals_section
from . import shift as shift_section

# Below this lower end of rho's interval the simulation level tells the prior almost nothing.
RHO_HEALTHY_LOW = 0.0
NAMES_IN_VERDICT = 4


@dataclass(frozen=True)
class Decision:
    """The first screen: a verdict and the recommended next step, with the reasons.

    level: ``go`` (to hardware), ``caution``, ``stop`` (fix the simulator first) or ``pending``
    (a step of the workflow has not been run yet).
    """

    verdict: str
    level: str
    next_step: str
    command: str | None
    reasons: tuple[str, ...]


def _calibrated_next(inputs: ReportInputs, verdict: str, reasons: list[str]) -> Decision:
    """Rule 4 once calibration has run: sweep again on the calibrated overlay."""
    calibration = inputs.calibration
    assert calibration is not None
    after_bad, matched = calibration_section.does_not_carry_over_after(calibration)
    if matched:
        reasons.append(f"at the calibrated physics {after_bad} of {matched} matched features do not carry over")
    pinned = calibration.identifiable
    if pinned:
        reasons.append(f"calibration pinned down {', '.join(pinned)}")
    overlay = calibration.overlay_path
    return Decision(
        verdict,
        "stop",
        "The simulator has been calibrated: sweep again on the calibrated physics, then re-assess the shift "
        "and refit the prior before going back to hardware.",
        None if overlay is None else f"gapgauge sweep {shlex.quote(relative(overlay))}",
        tuple(reasons),
    )


def _prior_rules(inputs: ReportInputs, carry: str, reasons: list[str]) -> Decision:
    """Rules 6 to 8: the prior exists or not, helps or not; go with the proposals and the budget."""
    prior = inputs.prior
    if prior is None:
        return Decision(
            "Simulation carries over; no prior fitted yet",
            "pending",
            "Fit the multi-fidelity prior so hardware tuning starts from what simulation learned.",
            inputs.command("prior"),
            tuple(reasons),
        )
    low, high = prior.rho_interval
    reasons.append(
        f"rho = {prior.rho:.3g}" + (f", interval [{low:.3g}, {high:.3g}]" if math.isfinite(low + high) else "")
    )
    mf = prior_section.loo_rmse(prior, "multi_fidelity")
    hw = prior_section.loo_rmse(prior, "hardware_only")
    weak_link = math.isfinite(low) and low <= RHO_HEALTHY_LOW
    worse_loo = mf is not None and hw is not None and mf > hw
    if worse_loo:
        reasons.append(f"leave-one-out RMSE with the prior {mf:.3g} is worse than hardware alone {hw:.3g}")
    if weak_link or worse_loo:
        reasons.append("the simulation level does not yet inform hardware")
        calibrated = inputs.calibration is not None
        return Decision(
            f"{carry}, but the prior does not help yet",
            "caution",
            "Tune on hardware with a cold-start budget in mind"
            + ("" if calibrated else "; calibrate the simulator first, it may restore the link")
            + ".",
            inputs.command("propose") if calibrated else inputs.command("calibrate"),
            tuple(reasons),
        )
    n_proposed = proposals_section.count(inputs.proposals)
    if not n_proposed:
        return Decision(
            carry,
            "go",
            "The prior is healthy: get the next trials under the fall-risk limit.",
            inputs.command("propose"),
            tuple(reasons),
        )
    stop = getattr(inputs.proposals, "stop", None)
    if stop is not None and getattr(stop, "stop", False):
        reasons.append(f"stop rule: {proposals_section.stop_text(inputs.proposals)}")
        return Decision(
            f"{carry}; the stop rule says tuning is done",
            "go",
            "Stop tuning: keep the best parameters so far and confirm them with a repeat trial instead of "
            "running the proposals.",
            None,
            tuple(reasons),
        )
    risk = proposals_section.highest_fall_risk(inputs.proposals)
    step = f"Go to hardware with the {n_proposed} proposed trials (highest modelled fall risk {format_percent(risk)})"
    command = None
    budget = inputs.budget
    if budget is None:
        command = inputs.command("budget")
        step += "; plan the trial budget first"
    else:  # the booking at the plan's level, as the budget card and the budget section show it
        level = f"P{round(100 * budget.confidence)}"
        book, cold = budget.with_prior.book, budget.cold_start.book
        if book is not None:
            step += f"; budget {level} = {book} trials"
            if cold is not None:
                step += f" (cold start {cold})"
        else:  # planned, but the draws do not reach the target often enough within the simulated horizon
            step += f"; budget {level} beyond the {budget.max_trials} trials planned for"
    stop = getattr(inputs.proposals, "stop", None)
    if stop is not None:
        step += "; the stop rule says keep tuning"
    return Decision(carry, "go", step + ".", command, tuple(reasons))


def decide(inputs: ReportInputs) -> Decision:
    """The verdict and the next step, by these rules, first match wins:

    1. no sweep rollouts: run the sweep;
    2. no hardware trials: run the first trials from ``gapgauge propose``;
    3. no shift assessment: run ``gapgauge shift``;
    4. at least half of the decided features do not carry over: fix the simulator
       (``gapgauge calibrate``; if calibration has been run, sweep again on its overlay);
    5. most features undecided: run more trials (the shift says how many would decide);
    6. the joint MMD test finds a difference and no calibration has been run: calibrate;
    7. no prior: run ``gapgauge prior``;
    8. rho's interval reaches down to 0 (the simulation level does not inform hardware), or the prior's
       leave-one-out error is worse than hardware alone: tune on hardware with care, calibrate first
       if not done;
    9. the proposals' stop rule (Wilson 2024) says the best so far is good enough: stop tuning;
    10. otherwise go to hardware with the proposed trials (``gapgauge propose`` if there are none),
        quoting the budget's booking at its level, P80 by default (``gapgauge budget`` if there is no
        budget; "beyond the trials planned for" when the draws do not reach the target within the
        budget's horizon).
    """
    n_rollouts, n_trials = inputs.n_rollouts, len(inputs.trials)
    if n_rollouts == 0:
        return Decision(
            "No simulation sweep yet",
            "pending",
            "Run the simulation sweep first (overnight for a real study; a few thousand rollouts to try).",
            inputs.command("sweep", "--rollouts", "20000"),
            ("the store holds no simulated rollouts for this scenario",),
        )
    reasons = [f"the sweep holds {n_rollouts:,} rollouts"]
    if n_trials == 0:
        return Decision(
            "No hardware trials yet: simulation only",
            "pending",
            "Run the first 3 to 5 hardware trials: get them from the propose command, run them with a "
            "spotter, then take their logs in with gapgauge ingest.",
            inputs.command("propose", "--count", "5"),
            (*reasons, "nothing can be said about the robot until trials are in"),
        )
    reasons.append(f"{n_trials} hardware trial{'s' if n_trials != 1 else ''} in the store")
    shift = inputs.shift
    if shift is None:
        return Decision(
            "Trials are in; carry-over not assessed yet",
            "pending",
            "Measure which features carry over from simulation to the robot.",
            inputs.command("shift"),
            tuple(reasons),
        )
    counts = shift_section.verdict_counts(shift)
    total = sum(counts.values())
    decided = total - counts["undecided"]
    bad = counts["does_not_carry_over"]
    reasons.append(
        f"of {total} features: {counts['carries_over']} carry over, {counts['offset_order_kept']} offset "
        f"with the order kept, {bad} do not carry over, {counts['undecided']} undecided"
    )
    if decided and bad * 2 >= decided:
        bad_names = [label(n) for n in shift_section.names_with(shift, "does_not_carry_over")]
        shown = ", ".join(bad_names[:NAMES_IN_VERDICT]) + (", ..." if len(bad_names) > NAMES_IN_VERDICT else "")
        verdict = f"Simulation does not carry over ({bad} of {total} features: {shown})"
        if inputs.calibration is not None:
            return _calibrated_next(inputs, verdict, reasons)
        return Decision(
            verdict,
            "stop",
            "Fix the simulator before trusting its prior: calibrate its physics to the trials.",
            inputs.command("calibrate"),
            (*reasons, "a prior built on a simulator that misses these features would mislead the proposals"),
        )
    if counts["undecided"] * 2 >= total:
        more = shift_section.trials_to_decide(shift)
        n_proposed = proposals_section.count(inputs.proposals)
        step = "Run more hardware trials before judging carry-over"
        if more is not None:
            step += f": about {more} more would decide"
        if n_proposed:
            step += f"; the {n_proposed} proposed trials below are a good next batch"
        return Decision(
            "Not enough trials yet to judge carry-over",
            "caution",
            step + ".",
            None if n_proposed else inputs.command("propose", "--count", "5"),
            tuple(reasons),
        )
    mmd_p = shift_section.mmd_p_value(shift)
    if math.isfinite(mmd_p) and mmd_p < shift_section.level(shift):
        reasons.append(
            f"the joint test (MMD, p = {mmd_p:.3g}) finds simulation and hardware differ when all features "
            "are taken together"
        )
        if inputs.calibration is None:
            return Decision(
                "Features carry over one by one, but jointly simulation and hardware differ",
                "caution",
                "Calibrate the simulator's physics to the trials before leaning on the prior.",
                inputs.command("calibrate"),
                tuple(reasons),
            )
    offset = counts["offset_order_kept"] > counts["carries_over"]
    carry = "Simulation keeps the order of parameter sets, with an offset" if offset else "Simulation carries over"
    return _prior_rules(inputs, carry, reasons)
