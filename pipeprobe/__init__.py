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

import importlib  # noqa: E402
import sys  # noqa: E402
import types  # noqa: E402
from pathlib import Path  # noqa: E402
from typing import Any  # noqa: E402

from .errors import (  # noqa: E402
    PipeprobeError,
    ProbeStateError,
    RunNotFoundError,
    ScenarioError,
    TraceFormatError,
)
from .record import Probe, set_close_report, stage  # noqa: E402

# The rest loads on first use (PEP 562): a loader worker that only records
# imports the recording layer (numpy, no pandas, no matplotlib).
#: public name -> (module, attribute)
_LAZY = {
    "amdahl_ceiling": (".whatif.laws", "amdahl_ceiling"),
    "amdahl_speedup": (".whatif.laws", "amdahl_speedup"),
    "Action": (".analysis", "Action"),
    "Analysis": (".analysis", "Analysis"),
    "analyze": (".analysis", "analyze"),
    "Ceilings": (".whatif.ceilings", "Ceilings"),
    "ceilings": (".whatif.ceilings", "ceilings"),
    "Comparison": (".compare", "Comparison"),
    "compare": (".compare", "compare"),
    "CriticalPath": (".critical", "CriticalPath"),
    "critical_path": (".critical", "critical_path"),
    "critical_path_length": (".critical", "critical_path_length"),
    "Run": (".load", "Run"),
    "load": (".load", "load"),
    "RankView": (".ranks", "RankView"),
    "rank_view": (".ranks", "rank_view"),
    "StageStats": (".stagestats", "StageStats"),
    "stage_stats": (".stagestats", "stage_stats"),
    "Stalls": (".stalls", "Stalls"),
    "Verdict": (".pace", "Verdict"),
    "stall_summary": (".stalls", "stall_summary"),
    "Timeline": (".timeline", "Timeline"),
    "build_timeline": (".timeline", "build_timeline"),
    "Prediction": (".whatif", "Prediction"),
    "whatif": (".whatif", "whatif"),
    "whatif_sweep": (".whatif", "sweep"),
}


def __getattr__(name: str) -> Any:
    try:
        module, attr = _LAZY[name]
    except KeyError:
        raise AttributeError(f"module 'pipeprobe' has no attribute {name!r}") from None
    value = getattr(importlib.import_module(module, __name__), attr)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))


class _Facade(types.ModuleType):
    """This package's module type: a function keeps its name when its submodule loads.

    ``pipeprobe.load``, ``pipeprobe.whatif``, ``pipeprobe.compare`` and
    ``pipeprobe.ceilings`` are functions named like the submodules that
    define them. Importing such a submodule binds it on the package, which
    would hide the function from :func:`__getattr__`; the binding is skipped.
    """

    def __setattr__(self, name: str, value: Any) -> None:
        if name in _LAZY and isinstance(value, types.ModuleType):
            return
        super().__setattr__(name, value)


sys.modules[__name__].__class__ = _Facade


def _print_close_report(run_dir: Path) -> None:
    """The end-of-run report a probe prints on close: the recording layer is handed it, never imports it."""
    from .report import print_close_report

    print_close_report(run_dir)


set_close_report(_print_close_report)

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
