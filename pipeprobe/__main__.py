"""``python -m pipeprobe``: the command line (see :mod:`pipeprobe.cli`)."""

import sys

from .cli import main

sys.exit(main())
