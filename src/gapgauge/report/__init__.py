"""The transfer report and the run sheet, rendered from typed results (pure: nothing here reads a store).

``html.render`` assembles the sections of ``sections/`` into one self-contained page; ``sheet.render_sheet``
prints proposals for the lab; the figures come from ``plots`` (sweep, shared axes), ``result_plots``,
``shift_plots`` and ``motion_plots`` (trajectories and the stick-figure filmstrip posed by ``kinematics``).
"""
