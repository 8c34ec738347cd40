"""``python -m monitor`` is the ``segwatch`` command."""

import sys

from .cli import main

sys.exit(main())
