"""Inside ``pipeprobe run``: record an unmodified script's torch DataLoaders.

The launcher (:mod:`pipeprobe.launch`) starts the script's own interpreter
with this module as the entry point and the options in the environment
variable :data:`ENV_LAUNCH`. :func:`main` then

1. opens a :class:`pipeprobe.Probe` on the run folder;
2. installs an import hook that patches ``torch.utils.data.DataLoader``
   once the script imports it (torch is never imported here first: a script
   may set thread counts or devices before it does);
3. runs the script as ``__main__`` with its own ``sys.argv`` and
   ``sys.path[0]``;
4. closes the probe, writes :data:`SCRIPT_FILE` next to the trace, prints
   the report (stderr, or ``--report FILE``) and the run folder last, and
   leaves the way the script would have: same exit code, same traceback,
   same signal.

Every ``iter(loader)`` of a patched DataLoader goes through
``probe.watch(loader)`` (the zero-change hooks of :mod:`pipeprobe.record._loaders`),
so waits, fetches, collates and sample ids are recorded as usual. The step
is not timed: a script left unedited has no ``probe.step()``. What is
recorded under ``step`` is the loop's time between taking a batch and
asking any loader for the next one (:class:`_LoopSteps`); ``script.json``
says so, and so does the report.
"""

from __future__ import annotations

import importlib.abc
import importlib.util
import json
import os
import runpy
import sys
import threading
import weakref
from pathlib import Path
from time import monotonic_ns, thread_time_ns
from typing import Any, Generator

from .record._probe import step_code
from .record._recorder import RECORDER

__all__ = ["main", "ENV_LAUNCH", "SCRIPT_FILE", "STEP_MEANING"]

#: Environment variable carrying the launcher's options (JSON) to :func:`main`.
ENV_LAUNCH = "PIPEPROBE_LAUNCH"
#: File in the run folder describing the script, its loaders and what ``step`` means.
SCRIPT_FILE = "script.json"
#: What the ``step`` spans of a ``pipeprobe run`` trace measure.
STEP_MEANING = "loop time between batches: from taking a batch until the loop asks a loader for the next (not timed)"
_TARGET = "torch.utils.data.dataloader"


class _LoaderBook:
    """Names the DataLoaders a script creates and remembers which epochs each one ran.

    A loader is named after its dataset's class and its creation order
    among all loaders (``DigitSet-0``, ``DigitSet-1``), or by the name the
    user mapped that automatic name to (``--name DigitSet-1=val``).
    """

    def __init__(self, renames: dict[str, str]) -> None:
        self.renames = dict(renames)
        self.created = 0
        self.names: weakref.WeakKeyDictionary = weakref.WeakKeyDictionary()
        self.loaders: dict[str, dict[str, Any]] = {}

    def on_created(self, loader: Any) -> str:
        """Name a new loader; return its name."""
        dataset = type(getattr(loader, "dataset", None)).__name__
        auto = f"{dataset}-{self.created}"
        name = self.renames.get(auto, auto)
        self.loaders[name] = {"auto_name": auto, "dataset": dataset, "created": self.created, "epochs": []}
        self.created += 1
        self.names[loader] = name
        return name

    def name_of(self, loader: Any) -> str:
        name = self.names.get(loader)
        return name if name is not None else self.on_created(loader)

    def add_epoch(self, name: str, epoch: int) -> None:
        self.loaders[name]["epochs"].append(epoch)


class _LoopSteps:
    """One open loop step per thread: opened when a batch is taken, closed when any loader is asked again.

    A step ends at the instant the loop asks for the next batch, and that
    instant is where the batch's wait begins (:class:`_TakenBatches`), so
    the loop's own clock around ``next(loader)`` sees the wait and nothing
    of the step's bookkeeping. A step left open when the script ends (a
    loop that broke off) is dropped, not recorded.
    """

    def __init__(self, probe: Any) -> None:
        self.probe = probe
        self.tls = threading.local()

    def open(self) -> None:
        """Start this thread's step now (wall clock first, so reading the CPU clock lands inside it)."""
        t0 = monotonic_ns()
        self.tls.start = (t0, thread_time_ns() if RECORDER.cpu_time else -1)

    def close(self, end_ns: int) -> None:
        """End this thread's open step at ``end_ns`` and record it (never raises)."""
        start = getattr(self.tls, "start", None)
        if start is None:
            return
        self.tls.start = None
        t0, c0 = start
        rec = RECORDER
        if not rec.on:
            return
        try:
            cpu = thread_time_ns() - c0 if c0 >= 0 else -1
            rec.record(t0, end_ns, cpu, -1, rec.buffer().ctx, step_code())
        except Exception as exc:  # noqa: BLE001 - an untimed step is lost, the loop goes on
            rec.fail(exc)


class _TakenBatches:
    """The iterator a patched ``iter(loader)`` returns: the watched batches, with loop steps around them.

    The watch's generator is driven with ``send(t)``: ``t``, read first
    thing in ``__next__``, ends the step and starts the wait.
    """

    def __init__(self, watched: Generator[Any, int, None], steps: _LoopSteps, loader: Any,
                 session: _Session) -> None:
        self._watched = watched
        self._steps = steps
        self._loader = loader
        self._session = session
        self._started = False

    def __iter__(self) -> _TakenBatches:
        return self

    def __next__(self) -> Any:
        asked = monotonic_ns()
        self._steps.close(asked)
        if self._started:
            item = self._watched.send(asked)  # StopIteration ends the loop as it would without us
        else:  # a generator takes a value only once it has started
            self._started = True
            item = next(self._watched)
        self._session.batches += 1
        self._steps.open()
        return item

    def __len__(self) -> int:
        return len(self._loader)


class _Session:
    """What one ``pipeprobe run`` holds while the script runs."""

    def __init__(self, probe: Any, book: _LoaderBook) -> None:
        self.probe = probe
        self.book = book
        self.steps = _LoopSteps(probe)
        self.tls = threading.local()
        self.epoch = -1
        self.batches = 0
        self.failed = False

    def iterate(self, loader: Any, base: type, original_iter: Any) -> Any:
        """``iter(loader)`` through the probe's watch.

        On pipeprobe's own failure before the loader starts, the plain
        iterator (and one warning); an exception of the loader itself
        passes through unchanged.
        """
        guard = _AsBaseLoader(loader, base, self.tls)
        try:
            name = self.book.name_of(loader)
            self.epoch += 1
            self.book.add_epoch(name, self.epoch)
            watch = self.probe.watch(loader, epoch=self.epoch)
            guard.__enter__()
        except Exception as exc:  # noqa: BLE001 - a pipeprobe failure must not stop the script
            self._fail(exc)
            return original_iter(loader)
        try:
            watched = iter(watch)
        finally:
            guard.__exit__()
        return _TakenBatches(watched, self.steps, loader, self)

    def _fail(self, exc: BaseException) -> None:
        if not self.failed:
            self.failed = True
            import warnings

            warnings.warn(f"pipeprobe run stopped watching DataLoaders: {exc!r}", RuntimeWarning, stacklevel=3)


class _AsBaseLoader:
    """While the watch starts the loader's iterator: plain ``DataLoader.__iter__``, once.

    The watch calls ``iter(loader)``. For a subclass whose own ``__iter__``
    wraps ``super().__iter__()`` (as trainers and users do), that would run
    the subclass's wrapper a second time, inside our watch; so for this
    moment the loader is seen as a plain ``DataLoader``, and the patched
    ``__iter__`` hands out torch's own iterator.
    """

    def __init__(self, loader: Any, base: type, tls: threading.local) -> None:
        self.loader, self.base, self.tls = loader, base, tls
        self.cls = type(loader)

    def __enter__(self) -> None:
        if self.cls is not self.base:  # a TypeError here (a subclass with slots) leaves everything as it was
            object.__setattr__(self.loader, "__class__", self.base)
        self.tls.busy = True

    def __exit__(self, *exc: Any) -> None:
        if self.cls is not self.base:
            object.__setattr__(self.loader, "__class__", self.cls)
        self.tls.busy = False


_SESSION: _Session | None = None


def _patch_dataloader(module: Any) -> None:
    """Wrap ``DataLoader.__init__`` (names) and ``__iter__`` (the watch) of the freshly imported module."""
    cls = getattr(module, "DataLoader", None)
    if cls is None or getattr(cls, "_pp_patched", False):
        return
    original_init, original_iter = cls.__init__, cls.__iter__

    def __init__(self: Any, *args: Any, **kwargs: Any) -> None:
        original_init(self, *args, **kwargs)
        session = _SESSION
        if session is not None:
            try:
                session.book.on_created(self)
            except Exception as exc:  # noqa: BLE001
                session._fail(exc)

    def __iter__(self: Any) -> Any:
        session = _SESSION
        if session is None or getattr(session.tls, "busy", False) or session.failed:
            return original_iter(self)
        return session.iterate(self, cls, original_iter)

    __init__.__wrapped__ = original_init  # type: ignore[attr-defined]
    __iter__.__wrapped__ = original_iter  # type: ignore[attr-defined]
    cls.__init__, cls.__iter__ = __init__, __iter__
    cls._pp_patched = True


class _AfterImport(importlib.abc.MetaPathFinder):
    """Calls ``callback(module)`` right after the module named ``target`` is first executed."""

    def __init__(self, target: str, callback: Any) -> None:
        self.target = target
        self.callback = callback

    def find_spec(self, name: str, path: Any, target: Any = None) -> Any:
        if name != self.target:
            return None
        sys.meta_path.remove(self)  # once; and so find_spec below does not come back here
        spec = importlib.util.find_spec(name)
        loader = getattr(spec, "loader", None)
        if loader is None or not hasattr(loader, "exec_module"):
            return spec
        run_module, callback = loader.exec_module, self.callback

        def exec_module(module: Any) -> None:
            run_module(module)
            try:
                callback(module)
            except Exception as exc:  # noqa: BLE001 - the import must succeed whatever we do
                if _SESSION is not None:
                    _SESSION._fail(exc)

        loader.exec_module = exec_module
        return spec


def _install_hook() -> None:
    module = sys.modules.get(_TARGET)
    if module is not None:
        _patch_dataloader(module)
    else:
        sys.meta_path.insert(0, _AfterImport(_TARGET, _patch_dataloader))


def read_options() -> dict[str, Any]:
    """The launcher's options; removed from the environment so the script's own children do not see them."""
    text = os.environ.pop(ENV_LAUNCH, None)
    if not text:
        raise SystemExit("pipeprobe: error: start scripts with 'pipeprobe run -- python SCRIPT ARGS'")
    return json.loads(text)


def main() -> None:
    """Entry point of the script's interpreter under ``pipeprobe run`` (see the module docstring)."""
    global _SESSION
    options = read_options()
    _SESSION = _open_session(options)
    if _SESSION is not None:
        _install_hook()
    try:
        _run_target(options.get("module"), options["argv"])
    except BaseException as exc:  # noqa: BLE001 - leave exactly as the script would, after the report
        _leave(options, exc)
    _leave(options, None)


def _open_session(options: dict[str, Any]) -> _Session | None:
    """The probe and loader book; ``None`` (and one warning) when the probe cannot start."""
    from .record import Probe

    try:
        probe = Probe(options["out"], report=False, flush_interval_s=float(options.get("flush_s", 1.0)),
                      live=options.get("live_s") or False, window=options.get("window"))
    except Exception as exc:  # noqa: BLE001 - the script runs anyway
        import warnings

        warnings.warn(f"pipeprobe run could not start recording: {exc}", RuntimeWarning, stacklevel=2)
        return None
    return _Session(probe, _LoaderBook(options.get("names", {})))


def _run_target(module: str | None, argv: list[str]) -> None:
    """Run the script (or ``-m`` module) as ``__main__``, as the interpreter would."""
    sys.argv = list(argv)
    if module:
        sys.path[0] = os.getcwd()
        runpy.run_module(module, run_name="__main__", alter_sys=True)
        return
    script = os.path.abspath(argv[0])
    sys.path[0] = str(Path(os.path.realpath(script)).parent)
    if not os.path.isfile(script):  # a folder or zip with __main__.py
        runpy.run_path(script, run_name="__main__")
        return
    _exec_as_main(script)


def _exec_as_main(path: str) -> None:
    """What ``python path`` does: a fresh ``__main__`` module with an absolute ``__file__``, argv as given."""
    import builtins
    import importlib.machinery
    import io
    import types

    with io.open_code(path) as f:
        source = f.read()
    code = compile(source, path, "exec", dont_inherit=True)
    main = types.ModuleType("__main__")
    main.__dict__.update({"__file__": path, "__cached__": None, "__builtins__": builtins,
                          "__loader__": importlib.machinery.SourceFileLoader("__main__", path)})
    sys.modules["__main__"] = main
    exec(code, main.__dict__)


def _leave(options: dict[str, Any], exc: BaseException | None) -> None:
    """Print the script's traceback as Python would, then the report, then leave as the script would have."""
    if exc is not None and not isinstance(exc, SystemExit):
        tb = _script_frames(exc.__traceback__)
        exc.__traceback__ = tb
        sys.excepthook(type(exc), exc, tb)
    session = _SESSION
    if session is not None:
        try:
            from ._scriptreport import finish

            finish(session.probe, session.book.loaders, session.batches, options)
        except Exception as err:  # noqa: BLE001 - the script's exit status matters more than our report
            print(f"pipeprobe: warning: could not finish the report: {err}", file=sys.stderr)
    if exc is None:
        return
    if not isinstance(exc, SystemExit):
        sys.excepthook = _printed_already
    raise exc


def _printed_already(*args: Any) -> None:
    """``sys.excepthook`` once the script's traceback is printed: the interpreter only sets the exit status."""


def _script_frames(tb: Any) -> Any:
    """The traceback without our frames and runpy's in front of the script's."""
    ours = {os.path.realpath(__file__), os.path.realpath(runpy.__file__)}
    while tb is not None:
        name = tb.tb_frame.f_code.co_filename
        if not (name.startswith("<frozen runpy") or os.path.realpath(name) in ours):
            break
        tb = tb.tb_next
    return tb
