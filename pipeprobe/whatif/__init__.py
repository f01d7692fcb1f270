"""The what-if layer: replay a recorded run under a changed configuration, and the laws beside it.

Modules, from the bottom up:

``limits``
    Bounds on scenario values, and the checks that apply them.
``plan``
    :func:`~pipeprobe.whatif.plan.build_plan`: a recorded run as per-batch
    work and loader constants (a :class:`~pipeprobe.whatif.plan.ReplayPlan`).
``scenario``
    :class:`Scenario`: the changes, checked once and carried as one object.
``engine``
    :func:`~pipeprobe.whatif.engine.replay`: the discrete-event model
    (event queue, one handler per event kind, loader policies, processor
    sharing of the cores).
``predict``
    :func:`whatif` and :func:`sweep`: predictions against the measured run.
``ceilings``
    Per-stage speed-up ceilings: Amdahl's law next to the replay.
``laws``
    Amdahl's law, the bottleneck law and Little's law as plain formulas.

Private helpers: ``_recorded`` (the steps of ``build_plan``),
``_contention`` (taking the recorded contention out), ``_cores``
(processor sharing), ``_loader`` (loader policies), ``_replay_path`` (the
replayed critical path), ``_command`` (the ``pipeprobe whatif`` command).

**The name ``pipeprobe.whatif``.** The top-level package re-exports the
*function* :func:`whatif` under this package's name, so after ``import
pipeprobe`` the attribute ``pipeprobe.whatif`` is the function (a call,
``pipeprobe.whatif(run, workers=4)``, is what users type most). The
package stays importable by its full name: ``from pipeprobe.whatif import
Prediction`` and ``from pipeprobe.whatif.plan import build_plan`` work as
usual (Python finds submodules in ``sys.modules``, not as attributes).
Write imports in those two forms; ``import pipeprobe.whatif as w`` binds
the function, and ``pipeprobe.whatif.plan`` as an attribute chain does not
exist.
"""

from ._command import add_arguments, run_command
from .predict import JSON_KEYS, Prediction, format_prediction, sweep, whatif
from .scenario import Scenario, check_scenario, parse_factors

__all__ = [
    "whatif",
    "sweep",
    "Prediction",
    "Scenario",
    "check_scenario",
    "parse_factors",
    "format_prediction",
    "JSON_KEYS",
    "add_arguments",
    "run_command",
]
