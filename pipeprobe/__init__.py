"""pipeprobe: find what holds back a training run's input pipeline.

Record
    Probe, stage
Load
    load, Run
Analyse
    analyze, Analysis, Action, build_timeline, Timeline, critical_path, critical_path_length, CriticalPath,
    stall_summary, Stalls, Verdict, stage_stats, StageStats, compare, Comparison
Ranks
    rank_view, RankView
What-if
    whatif, whatif_sweep, Prediction, ceilings, Ceilings, amdahl_speedup, amdahl_ceiling
Errors
    PipeprobeError, TraceFormatError, RunNotFoundError, ProbeStateError, ScenarioError
"""

__version__ = "0.1.0"

from .analysis import Action, Analysis, analyze  # noqa: E402
from .compare import Comparison, compare  # noqa: E402
from .critical import CriticalPath, critical_path, critical_path_length  # noqa: E402
from .errors import (  # noqa: E402
    PipeprobeError,
    ProbeStateError,
    RunNotFoundError,
    ScenarioError,
    TraceFormatError,
)
from .load import Run, load  # noqa: E402
from .pace import Verdict  # noqa: E402
from .ranks import RankView, rank_view  # noqa: E402
from .record import Probe, stage  # noqa: E402
from .stagestats import StageStats, stage_stats  # noqa: E402
from .stalls import Stalls, stall_summary  # noqa: E402
from .timeline import Timeline, build_timeline  # noqa: E402

# the function ``whatif`` takes the name of the subpackage as an attribute (see pipeprobe/whatif/__init__.py)
from .whatif import Prediction, whatif  # noqa: E402
from .whatif import sweep as whatif_sweep  # noqa: E402
from .whatif.ceilings import Ceilings, ceilings  # noqa: E402
from .whatif.laws import amdahl_ceiling, amdahl_speedup  # noqa: E402

__all__ = [
    # record
    "Probe",
    "stage",
    # load
    "load",
    "Run",
    # Analyse
    "analyze",
    "Analysis",
    "Action",
    "build_timeline",
    "Timeline",
    "critical_path",
    "critical_path_length",
    "CriticalPath",
    "stall_summary",
    "Stalls",
    "Verdict",
    "stage_stats",
    "StageStats",
    "compare",
    "Comparison",
    # ranks
    "rank_view",
    "RankView",
    # What-if
    "whatif",
    "whatif_sweep",
    "Prediction",
    "ceilings",
    "Ceilings",
    "amdahl_speedup",
    "amdahl_ceiling",
    # errors
    "PipeprobeError",
    "TraceFormatError",
    "RunNotFoundError",
    "ProbeStateError",
    "ScenarioError",
]
