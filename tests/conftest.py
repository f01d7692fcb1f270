"""Shared fixtures. Tiny traces live in ``_synth.py``; fixtures here wrap them."""

from __future__ import annotations

import sys
from pathlib import Path

import matplotlib
import pytest

matplotlib.use("Agg")
sys.path.insert(0, str(Path(__file__).parent))

from _synth import simple_pipeline, write_run  # noqa: E402


@pytest.fixture
def simple_run_dir(tmp_path: Path) -> Path:
    """3 batches x 2 samples x (3 ms decode + 1 ms augment) in the wait, then a 10 ms step."""
    return write_run(tmp_path / "simple", simple_pipeline())
