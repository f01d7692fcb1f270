"""Draw the demo's photos of machined parts into a folder.

Usage::

    python demo_data/generate.py --count 96 --out demo_data/parts

The defaults remake the set kept in ``demo_data/parts`` (the one
``pipeprobe.demo`` uses); a larger ``--count`` makes a bigger set with the
same first photos.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

# Run from a checkout, this script uses the checkout's package, installed or not.
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from pipeprobe.demo.images import LABELS_FILE, generate_images  # noqa: E402
from pipeprobe.demo.sample import SAMPLE_COUNT, SAMPLE_SEED  # noqa: E402


def main(argv: list[str] | None = None) -> int:
    """Parse the command line, draw the photos and say where they went.

    Parameters
    ----------
    argv : list of str, optional
        Arguments without the program name; ``sys.argv[1:]`` by default.

    Returns
    -------
    int
        Exit code, 0 on success.
    """
    parser = argparse.ArgumentParser(description="Draw photos of machined parts for the pipeprobe demo.")
    parser.add_argument("--count", type=int, default=SAMPLE_COUNT, help=f"photos to draw (default {SAMPLE_COUNT})")
    parser.add_argument(
        "--out",
        type=Path,
        default=Path(__file__).resolve().parent / "parts",
        help="folder to write into (default: demo_data/parts beside this script)",
    )
    parser.add_argument("--seed", type=int, default=SAMPLE_SEED, help=f"seed of the set (default {SAMPLE_SEED})")
    args = parser.parse_args(argv)
    if args.count < 0:
        parser.error(f"--count must be at least 0, got {args.count}")
    paths = generate_images(args.out, args.count, seed=args.seed)
    size_bytes = sum(path.stat().st_size for path in paths)
    print(f"wrote {len(paths)} photos ({size_bytes / 1e6:.2f} MB) and {LABELS_FILE} to {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
