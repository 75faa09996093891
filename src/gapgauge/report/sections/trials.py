"""Section 2, the hardware trials: one row per trial file, its hash, robot, outcome and notes."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from ..inputs import ReportInputs
from .common import fmt


def trials_section(inputs: ReportInputs) -> list[dict[str, Any]]:
    """One row per trial (every string as stored: the template escapes it)."""
    return [
        {
            "file": Path(t.source_path).name or t.source_path,
            "source_path": t.source_path,
            "sha256": t.sha256,
            "sha_short": t.sha256[:12],
            "robot_id": t.robot_id,
            "recorded_at": t.recorded_at,
            "outcome": t.outcome or "not given",
            "synthetic": bool(t.synthetic),
            "objective": fmt(t.objective),
            "notes": t.notes,
            "checks": _checks(t.extra),
            "ingested_at": t.ingested_at,
            "tool_version": t.tool_version,
        }
        for t in inputs.trials
    ]


def _checks(extra: dict[str, Any]) -> list[str]:
    """What ingest noticed and kept (gapgauge.logs): unusual channels, and an onset not placed in time."""
    lines = [str(f.get("detail", "")) for f in extra.get("flags") or [] if isinstance(f, dict)]
    alignment = extra.get("alignment") if isinstance(extra.get("alignment"), dict) else {}
    if alignment.get("placed") is False:
        lines.append(f"onset not placed ({alignment.get('reason', '')}): left out of the shift assessment")
    return lines
