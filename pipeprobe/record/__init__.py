"""The recording layer: what runs inside the user's training loop and its loader workers.

Public: :class:`Probe` and :func:`stage` (re-exported as ``pipeprobe.Probe``
and ``pipeprobe.stage``). Private modules, each on one topic:

``_probe``
    the probe's life cycle, the loader watch and the step timer
``_spans``
    stage timers: the block form, the decorator, the checks on names and ids
``_recorder``
    the per-process recorder: its state, flushing, fork and exit hooks,
    joining a run from the environment in a worker
``_buffers``
    per-thread span buffers and their conversion to fixed-width records
    (where ids too large for the record are fitted by the documented rule)
``_signals``
    SIGTERM and SIGINT: write what is recorded, then hand the signal on
``_closing``
    the close request to worker processes that outlive the probe
``_sampler``
    the background resource sampler (psutil)
``_loaders``
    the hooks that time a torch ``DataLoader`` without changes
``_clocksync``
    clock offsets between the ranks of a ``torch.distributed`` job

Design note: one-way dependencies
---------------------------------
This layer imports only the trace format (``pipeprobe.tracefile``) and the
errors, never the analysis, the what-if replay or the report. A loader
worker that records imports numpy and this package, not pandas or
matplotlib: that keeps a spawned worker's start-up time and memory small,
and a change on the analysis side cannot break recording. The end-of-run
report is the one place where recording meets the output layer; it is
reached through a callback (:func:`set_close_report`) that the package
facade, ``pipeprobe/__init__.py``, installs: the facade sits above every
layer, so it may name both sides, and the probe only calls what it was
given.
"""

from ._probe import Probe, set_close_report
from ._spans import stage

__all__ = ["Probe", "stage", "set_close_report"]
