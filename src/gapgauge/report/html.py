"""The transfer report: one self-contained HTML page and its JSON summary, rendered from
:class:`~gapgauge.report.inputs.ReportInputs` (pure: nothing here reads a store or writes a file).

The HTML is rendered with jinja2, autoescape on, so every string that comes from a user or a file
(robot ids, notes, file names, reasons) shows as text. Figures are PNG data URIs; styles are inline;
a Content-Security-Policy meta tag forbids scripts and every fetch, so the file opens the same from
a laptop, a mail attachment or a printer, and a string that slipped past escaping still cannot run.
Each section's context and figures come from its module in ``report/sections/``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import jinja2

from ..safety import CAUTION_BODY
from ..version import __version__
from .inputs import ReportInputs
from .sections.budget import budget_section
from .sections.calibration import calibration_section
from .sections.common import Figure
from .sections.decision import Decision, decide
from .sections.first_screen import (
    SectionStatus,
    budget_card,
    calibration_card,
    cards,
    cautions,
    section_statuses,
    stop_card,
)
from .sections.motion import motion_section
from .sections.prior import prior_section
from .sections.proposals import proposals_section
from .sections.provenance import provenance_section
from .sections.shift import shift_section
from .sections.sweep import sweep_section
from .sections.trials import trials_section
from .summary import summary_json

ENVIRONMENT = jinja2.Environment(
    loader=jinja2.PackageLoader("gapgauge.report", "templates"),
    autoescape=True,
    undefined=jinja2.StrictUndefined,
    trim_blocks=True,
    lstrip_blocks=True,
)


@dataclass(frozen=True)
class RenderedReport:
    """The report as text: the HTML page, the JSON summary, and what the first screen decided."""

    html: str
    summary: dict[str, Any]
    decision: Decision
    sections: list[SectionStatus]
    figures: list[Figure]


def render(inputs: ReportInputs, json_name: str = "report.json") -> RenderedReport:
    """Render the report of ``inputs``; ``json_name`` is the JSON summary's file name the page cites."""
    decision = decide(inputs)
    sections = section_statuses(inputs)
    parts = {
        "motion": motion_section(inputs),
        "sweep": sweep_section(inputs),
        "shift": shift_section(inputs),
        "prior": prior_section(inputs),
        "proposals": proposals_section(inputs),
        "budget": budget_section(inputs),
        "calibration": calibration_section(inputs),
    }
    figures = [fig for part in parts.values() if part for fig in part["figures"]]
    trials = trials_section(inputs)
    html = ENVIRONMENT.get_template("report.html").render(
        **parts,
        scenario={
            "name": inputs.scenario.name,
            "description": inputs.scenario.description,
            "hash_short": inputs.scenario.content_hash[:12],
        },
        tool_version=__version__,
        generated_at=inputs.generated_at,
        decision=decision,
        cards=cards(inputs),
        budget_card=budget_card(inputs),
        stop_card=stop_card(inputs),
        calibration_card=calibration_card(inputs),
        section_numbers={s.name: i for i, s in enumerate(sections, start=1)},
        caution_body=CAUTION_BODY,
        sections=sections,
        trials=trials,
        n_synthetic=inputs.n_synthetic,
        cautions=cautions(inputs),
        provenance=provenance_section(inputs, json_name),
        json_name=json_name,
    )
    summary = summary_json(inputs, decision, sections, first_screen(inputs, decision))
    return RenderedReport(html, summary, decision, sections, figures)


def first_screen(inputs: ReportInputs, decision: Decision) -> dict[str, Any]:
    """The first screen's words, as the page shows them (for the JSON summary)."""
    return {
        "verdict": decision.verdict,
        "next_step": decision.next_step,
        "budget": budget_card(inputs),
        "stop_rule": stop_card(inputs),
        "calibration": calibration_card(inputs),
        "key_figures": cards(inputs),
        "caution": CAUTION_BODY,
    }
