"""The caution every proposal carries: one text, read by the command line, the proposals and the report.

gapgauge proposes parameters for a physical machine that can fall and hurt people or itself; the model's
fall risk is an estimate, never a guarantee (DESIGN.md section 7).
"""

from __future__ import annotations

CAUTION_BODY = (
    "model predictions are not a safety guarantee. Run hardware trials with a harness or "
    "spotter, torque and speed limits and an emergency stop; follow your lab's procedures, the "
    "applicable robot-safety standards and local rules."
)

CAUTION = "CAUTION: " + CAUTION_BODY

#: the caution as the checks an operator ticks before each hardware trial (the run sheet of
#: ``gapgauge propose --sheet``): the same harness or spotter, limits and emergency stop
CHECKLIST: tuple[str, ...] = (
    "harness or spotter in place",
    "torque and speed limits set on the robot",
    "emergency stop within reach and tested",
    "parameters on the robot match this column",
    "lab procedure and safety rules followed",
)
