"""The report's sections, one module per result kind, each a function of
:class:`~gapgauge.report.inputs.ReportInputs` returning the template's context with its figures:
trials, motion (trajectories and the filmstrip), shift (with its "why" in ``shift_text``), calibration,
prior, proposals, budget, sweep; the first screen (decision, the budget, stop-rule and calibration
cards, key figures, cautions, section statuses) and the provenance appendix."""
