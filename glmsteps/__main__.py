"""``python -m glmsteps``: the ``glmsteps`` command (see :mod:`glmsteps.cli`)."""

import sys

from .cli import main

sys.exit(main())
