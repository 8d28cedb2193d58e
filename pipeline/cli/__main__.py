"""``python -m pipeline.cli``: the ``helisweep`` command."""

import sys

from pipeline.cli.main import main

sys.exit(main())
