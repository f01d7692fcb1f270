"""pipeprobe: find what holds back a training run's input pipeline.

Record
    Probe, stage
Load
    load, Run
Errors
    PipeprobeError, TraceFormatError, RunNotFoundError, ProbeStateError, ScenarioError
"""

__version__ = "0.1.0"

from .errors import (  # noqa: E402
    PipeprobeError,
    ProbeStateError,
    RunNotFoundError,
    ScenarioError,
    TraceFormatError,
)
from .load import Run, load  # noqa: E402
from .record import Probe, stage  # noqa: E402

__all__ = [
    # record
    "Probe",
    "stage",
    # load
    "load",
    "Run",
    # errors
    "PipeprobeError",
    "TraceFormatError",
    "RunNotFoundError",
    "ProbeStateError",
    "ScenarioError",
]
