"""Exceptions raised by pipeprobe.

Every error pipeprobe raises on purpose derives from :class:`PipeprobeError`.
The narrow subclasses also inherit the built-in exception that fits, so a
caller that only knows Python's own exceptions still catches them.
"""

from __future__ import annotations

__all__ = [
    "PipeprobeError",
    "TraceFormatError",
    "RunNotFoundError",
    "ProbeStateError",
    "ScenarioError",
    "StageNameError",
    "StageTargetError",
    "WindowSpecError",
]


class PipeprobeError(Exception):
    """Base class of every error pipeprobe raises on purpose."""


class TraceFormatError(PipeprobeError, ValueError):
    """A trace file or run header is corrupt, truncated or of an unknown version."""


class RunNotFoundError(PipeprobeError, FileNotFoundError):
    """A run directory is missing or holds no pipeprobe run."""


class ProbeStateError(PipeprobeError, RuntimeError):
    """A probe was used in a state that does not allow it (e.g. two at once)."""


class ScenarioError(PipeprobeError, ValueError):
    """A what-if scenario names an unknown stage or gives an invalid factor."""


class StageNameError(PipeprobeError, ValueError):
    """A stage name cannot be recorded: not a str, empty, too long, reserved or not encodable as UTF-8."""


class StageTargetError(PipeprobeError, TypeError):
    """A stage decorator was put on a function it cannot time (a generator or an async function)."""


class WindowSpecError(PipeprobeError, ValueError):
    """A recording window is written wrongly (see ``pipeprobe.record._window.parse_window``)."""
