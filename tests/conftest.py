"""Shared fixtures: exact synthetic runs first, then runs recorded for real.

Exact traces are written by ``_synth.py`` (no probe runs, so expected
numbers follow by hand); recorded runs (real sleeps, real process pools)
are made by ``_recorded.py`` and carry the machine's timing noise.
"""

from __future__ import annotations

import os
import sys
from pathlib import Path

import matplotlib
import pytest

matplotlib.use("Agg")

# CI runs the property tests on the same examples every time (a red build must be reproducible);
# locally they explore new examples on every run. CI machines are shared and loaded: an example
# that takes long there is not a failure, so CI has no per-example deadline and no "too slow" check.
from hypothesis import HealthCheck, settings  # noqa: E402

settings.register_profile(
    "ci", derandomize=True, database=None, deadline=None, suppress_health_check=[HealthCheck.too_slow],
)
if os.environ.get("PIPEPROBE_CI"):
    settings.load_profile("ci")
sys.path.insert(0, str(Path(__file__).parent))

# Helper scripts (``_*.py``) are run as subprocesses or imported by tests; ``--doctest-modules``
# must not import them on its own (``_ddp_job.py`` needs torch, which is optional).
collect_ignore_glob = ["_*.py"]

from _recorded import analysis_load_batch, record_sleep_run  # noqa: E402, F401 (tests import record_sleep_run here)
from _synth import simple_pipeline, write_run  # noqa: E402


@pytest.fixture(autouse=True)
def _no_progress_line(request: pytest.FixtureRequest, monkeypatch: pytest.MonkeyPatch) -> None:
    """No progress line on stderr, except in test_progress.py, which tests it.

    A report past 2 s (any report, on a loaded machine) names its steps on stderr; the tests
    that count stderr lines (one-line errors) must not depend on how loaded the machine is.
    """
    if request.module.__name__ != "test_progress":
        monkeypatch.setenv("PIPEPROBE_PROGRESS", "0")


@pytest.fixture
def simple_run_dir(tmp_path: Path) -> Path:
    """3 batches x 2 samples x (3 ms decode + 1 ms augment) in the wait, then a 10 ms step."""
    return write_run(tmp_path / "simple", simple_pipeline())


# -- runs recorded for real ----------------------------------------------------------------------


@pytest.fixture(scope="session")
def analysis_pool_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Recorded run: a 2-worker fork Pool loader (linked by samples=), a 1 ms to_device, a 4 ms step."""
    import multiprocessing as mp
    import time

    import pipeprobe

    d = tmp_path_factory.mktemp("analysis_pool") / "run"
    with pipeprobe.Probe(d, report=False, sample_interval_s=0.02) as probe:
        with mp.get_context("fork").Pool(2) as pool:
            for _ in probe.watch(pool.imap(analysis_load_batch, range(10)), samples=lambda ids: ids):
                with probe.stage("to_device"):
                    time.sleep(0.001)
                with probe.step():
                    time.sleep(0.004)
    return d


@pytest.fixture(scope="session")
def analysis_sleep_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Recorded run: one producer (a generator in the training thread), per batch 4 samples x
    (6 ms decode + 2 ms augment), then a 20 ms step; 6 batches."""
    return record_sleep_run(tmp_path_factory.mktemp("analysis_sleep") / "run")
