"""The report's sections, one module per result kind, each a function of
:class:`~gapgauge.report.inputs.ReportInputs` returning the template's context with its figures:
sweep, trials, shift, prior, proposals, budget, calibration; the first screen (decision, cards,
cautions, section statuses) and the provenance appendix."""
