"""``python -m tests.sim``: see :mod:`tests.sim.run`."""

from tests.sim.run import main

raise SystemExit(main())
