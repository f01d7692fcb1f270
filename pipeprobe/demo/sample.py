"""Find the demo's photo set, or make it once.

A checkout (or an editable install) carries the set in ``demo_data/parts/``
beside the package.  An ordinary install has no such folder, so the set is
drawn once into a cache folder and reused from then on.
"""

from __future__ import annotations

import os
import shutil
import tempfile
from pathlib import Path

from pipeprobe.demo.images import LABELS_FILE, generate_images

__all__ = ["SAMPLE_COUNT", "SAMPLE_SEED", "CACHE_ENV", "cache_dir", "demo_parts_dir"]

SAMPLE_COUNT = 96
"""Number of photos in the demo set (``demo_data/parts`` holds this many)."""

SAMPLE_SEED = 0
"""Seed the demo set is drawn with."""

CACHE_ENV = "PIPEPROBE_CACHE"
"""Environment variable naming pipeprobe's cache root (default ``~/.cache/pipeprobe``)."""


def _checkout_parts_dir() -> Path:
    """``demo_data/parts`` of the source tree this package was imported from."""
    return Path(__file__).resolve().parents[2] / "demo_data" / "parts"


def cache_dir() -> Path:
    """Return pipeprobe's cache root: ``$PIPEPROBE_CACHE`` or ``~/.cache/pipeprobe``.

    Returns
    -------
    pathlib.Path
        The folder; it may not exist yet.
    """
    configured = os.environ.get(CACHE_ENV)
    if configured:
        return Path(configured).expanduser()
    return Path.home() / ".cache" / "pipeprobe"


def demo_parts_dir() -> Path:
    """Return a folder holding the demo's photos and their ``labels.csv``.

    The source tree's ``demo_data/parts`` is used when present.  Otherwise
    ``<cache>/demo_parts`` (see :func:`cache_dir`) is used, drawing the
    :data:`SAMPLE_COUNT` photos into it first if it is not complete.  The set
    is drawn into a scratch folder and moved into place at the end, so an
    interrupted draw never leaves a half set behind.

    Returns
    -------
    pathlib.Path
        A folder with ``labels.csv`` and the photos it names.
    """
    checkout = _checkout_parts_dir()
    if (checkout / LABELS_FILE).is_file():
        return checkout
    cached = cache_dir() / "demo_parts"
    if (cached / LABELS_FILE).is_file():
        return cached
    cached.parent.mkdir(parents=True, exist_ok=True)
    scratch = Path(tempfile.mkdtemp(prefix="demo_parts-", dir=cached.parent))
    try:
        generate_images(scratch, SAMPLE_COUNT, seed=SAMPLE_SEED)
        if cached.exists():
            shutil.rmtree(cached)  # an incomplete folder left by someone else
        os.replace(scratch, cached)
    except OSError:
        if not (cached / LABELS_FILE).is_file():
            raise
        # another process moved a complete set in first: use theirs
    finally:
        if scratch.exists():
            shutil.rmtree(scratch)
    return cached
