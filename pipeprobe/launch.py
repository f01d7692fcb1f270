"""``pipeprobe run``: record an unmodified Python training script.

``pipeprobe run [options] -- python [PYTHON_OPTIONS] train.py ARGS`` (or
``python -m pipeprobe run train.py ARGS``) checks its input, then replaces
itself (``exec``) with the script's own interpreter started on
:func:`pipeprobe._autowatch.main`. Being the same process, the script keeps
its pid, its stdin, stdout and stderr, every signal sent to it, and its
exit status. The steps: :func:`parse_command` splits the interpreter, its
options and the script; :func:`check_out_dir` makes sure the run folder
can be written; :func:`exec_script` hands over.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import sys
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

from .errors import PipeprobeError

__all__ = ["add_arguments", "run_command", "parse_command", "check_out_dir", "ScriptCommand", "CommandError"]

RUNS_DIR = "pipeprobe-runs"
_PYTHON = re.compile(r"^python(\d+(\.\d+)*)?(\.exe)?$")
# interpreter options that take a value in the next argument
_OPTIONS_WITH_VALUE = {"-W", "-X", "--check-hash-based-pycs"}
_BOOT = "from pipeprobe._autowatch import main; main()"


class CommandError(PipeprobeError, ValueError):
    """``pipeprobe run`` got no command, a missing script, or a folder it cannot write."""


@dataclass(frozen=True)
class ScriptCommand:
    """A split ``python [options] (SCRIPT | -m MODULE) ARGS`` command.

    Attributes
    ----------
    python : str
        The interpreter to start (as given, or this one for a bare script).
    options : list of str
        Interpreter options before the script (``-u``, ``-X dev``...).
    module : str or None
        The module of ``-m MODULE``; ``None`` for a script.
    argv : list of str
        What the script sees as ``sys.argv``.
    """

    python: str
    options: list[str]
    module: str | None
    argv: list[str]


def parse_command(command: list[str]) -> ScriptCommand:
    """Split a command line into interpreter, options, script and its arguments.

    Raises
    ------
    CommandError
        No command; not a Python interpreter or ``.py`` script; ``-c``; no script after the options;
        a script file that does not exist.

    Examples
    --------
    >>> c = parse_command(["python3", "-u", "-X", "dev", "-m", "trainer", "--lr", "0.1"])
    >>> (c.options, c.module, c.argv)
    (['-u', '-X', 'dev'], 'trainer', ['trainer', '--lr', '0.1'])
    """
    if command and command[0] == "--":
        command = command[1:]
    if not command:
        raise CommandError("no command to run; give one after --, e.g. pipeprobe run -- python train.py")
    first = command[0]
    if _PYTHON.match(Path(first).name):
        python, rest = first, command[1:]
    elif first.endswith(".py"):
        python, rest = sys.executable, command
    else:
        raise CommandError(f"{first!r} is not a Python interpreter or a .py script; "
                           "give 'python SCRIPT ARGS' or 'python -m MODULE ARGS'")
    options, rest = _interpreter_options(rest)
    if not rest:
        raise CommandError("no script after the interpreter; give 'python SCRIPT ARGS' or 'python -m MODULE ARGS'")
    if rest[0] == "-m":
        if len(rest) < 2:
            raise CommandError("-m needs a module name, e.g. python -m trainer")
        return ScriptCommand(python, options, rest[1], [rest[1], *rest[2:]])
    script = rest[0]
    if not Path(script).is_file():
        raise CommandError(f"no such script: {script}; give the path of a Python file")
    return ScriptCommand(python, options, None, list(rest))


def _interpreter_options(args: list[str]) -> tuple[list[str], list[str]]:
    """Leading interpreter options, and what follows them."""
    options: list[str] = []
    i = 0
    while i < len(args) and args[i].startswith("-") and args[i] != "-m":
        if args[i].startswith("-c"):
            raise CommandError("pipeprobe run records a script or a module, not python -c; save the code to a file")
        options.append(args[i])
        if args[i] in _OPTIONS_WITH_VALUE and i + 1 < len(args):
            options.append(args[i + 1])
            i += 1
        i += 1
    return options, args[i:]


def check_out_dir(out: str | None, command: ScriptCommand) -> Path:
    """The run folder: created now (a new one under ./pipeprobe-runs by default) and checked writable.

    Raises
    ------
    CommandError
        The folder is a file, already holds a run, or cannot be created or written.
    """
    path = Path(out) if out else _new_run_dir(command)
    if path.exists() and not path.is_dir():
        raise CommandError(f"--out {path} is a file; give a folder for the run")
    if path.is_dir() and any(path.glob("run-r*.json")):
        raise CommandError(f"--out {path} already holds a recorded run; give a new folder")
    try:
        path.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise CommandError(f"cannot create --out {path} ({exc.strerror or exc}); give a folder you can write") from None
    if not os.access(path, os.W_OK | os.X_OK):
        raise CommandError(f"cannot write to --out {path}; give a folder you can write")
    return path.resolve()


def _new_run_dir(command: ScriptCommand) -> Path:
    stem = Path(command.module or command.argv[0]).stem.replace(".", "-") or "script"
    base = Path.cwd() / RUNS_DIR / f"{stem}-{datetime.now():%Y%m%d-%H%M%S}"
    path, n = base, 2
    while path.exists():
        path, n = base.with_name(f"{base.name}-{n}"), n + 1
    return path


def _name_pair(text: str) -> tuple[str, str]:
    auto, sep, name = text.partition("=")
    if not sep or not auto or not name:
        raise argparse.ArgumentTypeError(f"expected AUTO_NAME=NAME (e.g. DigitSet-1=val), got {text!r}")
    return auto, name


def _positive_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not 0 < value < float("inf"):
        raise argparse.ArgumentTypeError(f"expected a number > 0, got {text!r}")
    return value


def _window_spec(text: str) -> str:
    """A recording window, checked here so a bad one stops before the script starts."""
    from .errors import WindowSpecError
    from .record._window import parse_window

    try:
        return parse_window(text).spec
    except WindowSpecError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


def add_arguments(parser: Any) -> None:
    """The ``pipeprobe run`` arguments."""
    parser.add_argument("--out", metavar="DIR", help=f"run folder (default: a new folder under ./{RUNS_DIR})")
    parser.add_argument("--flush", type=_positive_float, default=1.0, metavar="S",
                        help="seconds between writes of the trace; a killed script loses at most this much (1)")
    parser.add_argument("--quiet", action="store_true", help="no status line while the script runs")
    parser.add_argument("--status-every", type=_positive_float, default=5.0, metavar="S",
                        help="seconds between status lines on stderr (5)")
    parser.add_argument("--report", metavar="FILE", help="write the report to FILE instead of stderr")
    parser.add_argument("--name", type=_name_pair, action="append", default=[], metavar="AUTO=NAME",
                        help="call a loader NAME instead of its automatic name (dataset class-creation order)")
    parser.add_argument("--window", type=_window_spec, metavar="SPEC",
                        help="record only some batches of a long job: A:B (batches A to B-1; ranges joined by "
                             "commas) or K/N[s|m|h] (K batches every N seconds, minutes or hours)")
    parser.add_argument("--train", metavar="NAME", help="the loader the report covers first (default: most batches)")
    parser.add_argument("script_command", nargs=argparse.REMAINDER, metavar="-- python SCRIPT ARGS",
                        help="the command that runs the script, unchanged")


def run_command(args: argparse.Namespace) -> int:
    """Check the input, then become the script's interpreter (does not return unless exec fails)."""
    command = parse_command(list(args.script_command))
    out = check_out_dir(args.out, command)
    if args.report:
        report_dir = Path(args.report).resolve().parent
        if not report_dir.is_dir() or not os.access(report_dir, os.W_OK):
            raise CommandError(f"cannot write --report {args.report}: {report_dir} is not a writable folder")
    options = {
        "out": str(out),
        "flush_s": args.flush,
        "live_s": None if args.quiet else args.status_every,
        "report": str(Path(args.report).resolve()) if args.report else None,
        "names": dict(args.name),
        "train": args.train,
        "window": args.window,
        "module": command.module,
        "argv": command.argv,
        "command": _shown(list(args.script_command)),
    }
    return exec_script(command, options)


def _shown(command: list[str]) -> list[str]:
    return command[1:] if command[:1] == ["--"] else command


def exec_script(command: ScriptCommand, options: dict[str, Any]) -> int:
    """Replace this process with ``python [options] -c BOOT ARGV...``; the boot reads ``options`` from the environment."""
    from ._autowatch import ENV_LAUNCH

    env = dict(os.environ)
    env[ENV_LAUNCH] = json.dumps(options)
    argv = [command.python, *command.options, "-c", _BOOT, *command.argv]
    sys.stdout.flush()
    sys.stderr.flush()
    try:
        os.execvpe(command.python, argv, env)
    except OSError as exc:
        raise CommandError(f"cannot start {command.python} ({exc.strerror or exc}); give a Python interpreter") from None
    return 0  # not reached
