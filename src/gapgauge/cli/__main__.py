"""``python -m gapgauge.cli``: the same as the ``gapgauge`` command."""

from . import main

main()
