"""``python -m sim_instrument``: the same as the ``heliotrope-sim`` command."""

from sim_instrument.cli import main

raise SystemExit(main())
