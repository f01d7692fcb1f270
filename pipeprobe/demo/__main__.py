"""``python -m pipeprobe.demo [options]``: the same as ``pipeprobe demo [options]``."""

import sys

from pipeprobe.cli import main

sys.exit(main(["demo", *sys.argv[1:]]))
