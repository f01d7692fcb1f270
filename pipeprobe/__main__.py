"""``python -m pipeprobe``: the same command line as ``pipeprobe``."""

import sys

from .cli import main

if __name__ == "__main__":
    sys.exit(main())
