"""The ``pipeprobe`` command line.

Each subcommand is one row of :data:`COMMANDS` (its help line, a
description, an example, the function that adds its options and the
function that runs it); another layer adds a subcommand with
:func:`add_command`.

Exit codes: 0 success; 1 a gate failed (``compare`` found a regression);
2 bad input (wrong arguments, missing or corrupt run, an output that cannot
be written) with a one-line error. Output cut short by the reader
(``pipeprobe report RUN | head``) ends quietly with the code a shell gives
a process stopped by a broken pipe (141). Every message is made printable
(control characters from trace files are escaped).
"""

from __future__ import annotations

import argparse
import os
import sys
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Sequence

from . import __version__
from ._text import printable
from .errors import PipeprobeError

EXIT_OK = 0
EXIT_GATE = 1
EXIT_BAD_INPUT = 2
#: 128 + SIGPIPE: what a shell reports for a command whose reader went away.
EXIT_BROKEN_PIPE = 141


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # one line, exit 2
        where = f"pipeprobe {self._sub}" if self._sub else "pipeprobe"
        self.exit(EXIT_BAD_INPUT, f"pipeprobe: error: {printable(message)} (see '{where} --help')\n")

    _sub = ""


class _UsageError(Exception):
    pass


def _int_at_least(minimum: int):
    """An argparse type: a whole number >= ``minimum``."""

    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
        if value < minimum:
            raise argparse.ArgumentTypeError(f"expected a number >= {minimum}, got {value}")
        return value

    return parse


_positive_int = _int_at_least(1)
_non_negative_int = _int_at_least(0)


def _non_negative_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not value >= 0 or value == float("inf"):
        raise argparse.ArgumentTypeError(f"expected a finite number >= 0, got {text!r}")
    return value


@dataclass(frozen=True)
class Command:
    """One subcommand of ``pipeprobe``.

    Attributes
    ----------
    name : str
    summary : str
        One line for ``pipeprobe --help``.
    description : str
        What it does, for ``pipeprobe NAME --help``.
    example : str
        One or more example command lines.
    arguments : callable
        ``arguments(parser)`` adds the options.
    run : callable
        ``run(args) -> int``: the exit code.
    """

    name: str
    summary: str
    description: str
    example: str
    arguments: Callable[[argparse.ArgumentParser], None]
    run: Callable[[argparse.Namespace], int]


# -- demo ------------------------------------------------------------------------------------------------
def _demo_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--out", metavar="DIR", help="new run folder (default: a new folder under ./pipeprobe-runs)")
    p.add_argument("--batches", type=_positive_int, default=60, metavar="N", help="batches to train on (60)")
    p.add_argument("--workers", type=_non_negative_int, default=2, metavar="N",
                   help="loader worker processes; 0 loads in the training process (2)")
    p.add_argument("--prefetch", type=_positive_int, default=4, metavar="N",
                   help="batches in flight across all workers (4)")
    p.add_argument("--image-size", type=_positive_int, default=96, metavar="PX", help="training image side (96)")
    p.add_argument("--augment", default="crop,flip,rotate,jitter", metavar="LIST",
                   help="comma-separated augmentations, from crop,flip,rotate,jitter; '' for none")
    p.add_argument("--width", type=_positive_int, default=256, metavar="N", help="hidden units of the model (256)")
    p.add_argument("--batch-size", type=_positive_int, default=16, metavar="N",
                   help="samples per batch, at most the bundled photos (16)")
    p.add_argument("--seed", type=int, default=0, help="random seed (0)")
    p.add_argument("--step-threads", type=_non_negative_int, default=1, metavar="N",
                   help="threads of the step's math library (1); 0 keeps the library's default, to see the "
                        "report's thread check flag the cores it oversubscribes")


def _check_demo_out(out: str | None) -> None:
    """Refuse an ``--out`` that is a file or already holds a run, before anything is recorded."""
    if out is None:
        return
    path = Path(out)
    if path.exists() and not path.is_dir():
        raise _UsageError(f"--out {out!r} is a file, not a folder; give a new folder for the run")
    if path.is_dir() and any(path.glob("run-r*.json")):
        raise _UsageError(f"--out {out!r} already holds a recorded run; give a new folder")


def _demo_run(args: argparse.Namespace) -> int:
    from .demo import run_demo
    from .demo.pipeline import AUGMENTS

    augment = tuple(a.strip() for a in args.augment.split(",") if a.strip())
    unknown = sorted(set(augment) - set(AUGMENTS))
    if unknown:
        raise _UsageError(f"unknown augmentation {', '.join(unknown)}; choose from {', '.join(AUGMENTS)}")
    _check_demo_out(args.out)
    settings = dict(out=args.out, batches=args.batches, workers=args.workers, prefetch=args.prefetch,
                    image_size=args.image_size, augment=augment, width=args.width, batch_size=args.batch_size,
                    seed=args.seed, step_threads=args.step_threads)
    try:
        result = run_demo(**settings)
    except ValueError as exc:  # run_demo's documented answer to a setting out of range
        raise _UsageError(str(exc)) from None
    print(f"run folder: {result.run_dir}")
    return EXIT_OK


# -- report ----------------------------------------------------------------------------------------------
def _report_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("run_dir", metavar="RUN_DIR", help="recorded run folder")
    p.add_argument("--json", action="store_true", help="print one JSON object (keys: pipeprobe.report.JSON_SCHEMA)")
    p.add_argument("--html", metavar="FILE",
                   help="also write the report with its pictures as one self-contained HTML file")
    p.add_argument("--quiet", action="store_true", help="no progress line on stderr while a long run is analysed")
    p.add_argument("--slice-batches", type=_non_negative_int, metavar="N", default=None,
                   help="analyse the run N batches at a time in bounded memory (exact critical-path shares, stalls "
                        "and stage table; no replays, ceilings, actions or HTML); 0: all in memory; default: in "
                        "slices from 12 million span records on")


def _report_run(args: argparse.Namespace) -> int:
    from ._progress import progress, step
    from .analysis import analyze
    from .report import Report, print_report

    if _sliced(args):
        return _sliced_report_run(args)
    if args.own_process:
        keep_freed_memory()
    path = None
    with progress("report", enabled=not args.quiet):  # shown only past a couple of seconds
        analysis = analyze(args.run_dir)
        step("replays and ceilings")
        report = Report(analysis)
        if args.html:
            from .html import write_report

            step("writing the HTML page")
            path = write_report(report, args.html)
    if path is not None:
        print(f"pipeprobe: wrote {printable(path)}", file=sys.stderr)
    print_report(report, as_json=args.json)
    return EXIT_OK


#: glibc's ``mallopt`` parameters (malloc.h): the most chunks served by ``mmap``, and the free memory at the top
#: of the heap past which ``free`` gives it back to the system.
_M_MMAP_MAX, _M_TRIM_THRESHOLD = -4, -1
#: The environment variables that set them (``man mallopt``): where the user set one, their choice stands.
_MALLOC_ENV = ("MALLOC_MMAP_MAX_", "MALLOC_TRIM_THRESHOLD_", "MALLOC_MMAP_THRESHOLD_", "MALLOC_TOP_PAD_")


def keep_freed_memory() -> bool:
    """Tell glibc to keep the memory it frees, for the next array (the in-memory report's process only).

    A large report allocates tens of GB of short-lived arrays; glibc serves each large one from fresh
    ``mmap`` pages and hands it back on ``free``, so the kernel zeroes new pages for the next (half the
    CPU time of a 10 M-span report). With ``M_MMAP_MAX`` 0 and a 2 GiB trim threshold, freed arrays
    are reused instead. Called only in the ``pipeprobe report`` process itself (``main()`` with no
    arguments), never in a training process or a program that calls ``main([...])``. Returns whether it
    was applied (Linux with glibc, and no ``MALLOC_*`` tuning in the environment); skipped elsewhere.
    """
    try:
        is_glibc = os.confstr("CS_GNU_LIBC_VERSION") or ""
    except (ValueError, OSError, AttributeError):  # no such name on this system
        is_glibc = ""
    if not sys.platform.startswith("linux") or not is_glibc.startswith("glibc") or any(
            v in os.environ for v in _MALLOC_ENV):
        return False
    try:
        import ctypes

        mallopt = ctypes.CDLL(None).mallopt  # the C library this process runs on
    except (OSError, AttributeError):
        return False
    mallopt.argtypes, mallopt.restype = [ctypes.c_int, ctypes.c_int], ctypes.c_int
    return bool(mallopt(_M_MMAP_MAX, 0)) and bool(mallopt(_M_TRIM_THRESHOLD, 2**31 - 1))


def _sliced(args: argparse.Namespace) -> bool:
    """Whether ``pipeprobe report`` analyses the run in slices (asked for, or chosen by the run's size)."""
    if args.slice_batches is None:
        from ._slicereader import count_records
        from .sliced import AUTO_SLICE_SPANS

        return count_records(args.run_dir) >= AUTO_SLICE_SPANS and not args.html
    if args.slice_batches > 0 and args.html:
        raise _UsageError("--html needs the whole run in memory: leave out --slice-batches, or give --slice-batches 0")
    return args.slice_batches > 0


def _sliced_report_run(args: argparse.Namespace) -> int:
    from ._progress import progress
    from ._slicereport import print_sliced_report
    from .sliced import analyze_sliced

    with progress("report", enabled=not args.quiet):
        analysis = analyze_sliced(args.run_dir, slice_batches=args.slice_batches or None)
    print_sliced_report(analysis, as_json=args.json)
    return EXIT_OK


# -- compare ---------------------------------------------------------------------------------------------
def _compare_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("run_a", metavar="RUN_A", help="baseline run folder")
    p.add_argument("run_b", metavar="RUN_B", help="new run folder")
    p.add_argument("--max-stall-increase", type=_non_negative_float, metavar="F",
                   help="fail when the stall fraction rises more than F (0.05 = 5 points)")
    p.add_argument("--max-wall-increase", type=_non_negative_float, metavar="F",
                   help="fail when wall time per batch rises more than F (0.1 = 10 %%)")
    p.add_argument("--max-stage-increase", type=_non_negative_float, metavar="F",
                   help="fail when any stage's mean time rises more than F (0.1 = 10 %%)")
    p.add_argument("--json", action="store_true", help="print one JSON object")


def _compare_run(args: argparse.Namespace) -> int:
    from ._jsonnum import dumps
    from .analysis import analyze
    from .compare import compare, comparison_dict, format_comparison

    result = compare(analyze(args.run_a), analyze(args.run_b), max_stall_increase=args.max_stall_increase,
                     max_wall_increase=args.max_wall_increase, max_stage_increase=args.max_stage_increase)
    print(dumps(comparison_dict(result)) if args.json else format_comparison(result))
    return EXIT_GATE if result.regressed else EXIT_OK


# -- whatif ----------------------------------------------------------------------------------------------
def _whatif_arguments(p: argparse.ArgumentParser) -> None:
    from .whatif import add_arguments

    add_arguments(p)


def _whatif_run(args: argparse.Namespace) -> int:
    from .whatif import run_command

    return run_command(args)


# -- export and run ---------------------------------------------------------------------------------------
def _export_arguments(p: argparse.ArgumentParser) -> None:
    from .export import add_arguments

    add_arguments(p)


def _export_run(args: argparse.Namespace) -> int:
    from .export import run_command

    return run_command(args)


def _launch_arguments(p: argparse.ArgumentParser) -> None:
    from .launch import add_arguments

    add_arguments(p)


def _launch_run(args: argparse.Namespace) -> int:
    from .launch import run_command

    return run_command(args)


#: The subcommands, in the order ``pipeprobe --help`` lists them.
COMMANDS: dict[str, Command] = {
    c.name: c for c in [
        Command("demo", "record the bundled parts-inspection training demo and print its report",
                "Train a small classifier of machined-part photos on the CPU while pipeprobe records its "
                "input pipeline, then print the run's report and its folder.",
                "pipeprobe demo\npipeprobe demo --workers 0 --batches 30 --out runs/inline",
                _demo_arguments, _demo_run),
        Command("report", "print the report of a recorded run (text, --json, --html)",
                "Merge the run's traces and print what sets its pace, what a change would buy, the stalls, the "
                "critical path, the stages and, for several ranks, the straggler.",
                "pipeprobe report runs/today\npipeprobe report runs/today --json > report.json\n"
                "pipeprobe report runs/today --html report.html",
                _report_arguments, _report_run),
        Command("compare", "show what changed from RUN_A to RUN_B; gate on limits (exit 1)",
                "Line up two runs: what paces each, the speed-up at stake, wall time per batch, stall shares, "
                "mean stage times and critical-path shares. With limits it is a CI gate: exit 1 when B "
                "regressed past one.",
                "pipeprobe compare runs/main runs/branch --max-stall-increase 0.05 --max-wall-increase 0.1",
                _compare_arguments, _compare_run),
        Command("whatif", "predict the wall time of RUN_DIR with faster stages, more workers...",
                "Predict the wall time, stall share and critical path of a recorded run under a changed "
                "configuration, by replaying the recorded pipeline.",
                "pipeprobe whatif runs/today --faster decode=2 augment=1.5\n"
                "pipeprobe whatif runs/today --workers 4 --prefetch 8 --json\n"
                "pipeprobe whatif --workers 4 --prefetch-per-worker 2 runs/today",
                _whatif_arguments, _whatif_run),
        Command("export", "write a run as parquet or csv tables with a JSON manifest",
                "Write the run's spans, batches, sample membership, resources and critical-path segments as "
                "tables other tools read (csv always; parquet with the 'parquet' extra), plus manifest.json.",
                "pipeprobe export runs/today tables/today\npipeprobe export runs/today tables/today --format parquet",
                _export_arguments, _export_run),
        Command("run", "record an unmodified training script: pipeprobe run -- python train.py ARGS",
                "Run a training script unchanged while pipeprobe watches every torch DataLoader it iterates; "
                "the script's output, signals and exit code pass through, the report prints at exit.",
                "pipeprobe run -- python train.py --epochs 3\npipeprobe run --out runs/today --quiet -- python train.py",
                _launch_arguments, _launch_run),
    ]
}


def add_command(command: Command) -> None:
    """Add (or replace) a subcommand of ``pipeprobe``."""
    COMMANDS[command.name] = command


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of ``pipeprobe``, one sub-parser per row of :data:`COMMANDS`."""
    parser = _Parser(prog="pipeprobe", description="Find what holds back a training run's input pipeline.",
                     epilog="run 'pipeprobe COMMAND --help' for a command's options and an example")
    parser.add_argument("--version", action="version", version=f"pipeprobe {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True
    for c in COMMANDS.values():
        p = sub.add_parser(c.name, help=c.summary, description=c.description,
                           epilog="example:\n" + "\n".join("  " + line for line in c.example.splitlines()),
                           formatter_class=argparse.RawDescriptionHelpFormatter)
        p._sub = c.name
        c.arguments(p)
    return parser


def _quiet_broken_pipe() -> int:
    """The reader of stdout went away: point stdout at /dev/null so the exit flush cannot fail again."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError, AttributeError):  # stdout without a file descriptor (a test's capture)
        pass
    return EXIT_BROKEN_PIPE


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; return the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    args.own_process = argv is None  # the command line's own process (not main([...]) inside another program)
    previous = warnings.showwarning
    warnings.showwarning = _one_line_warning
    try:
        code = COMMANDS[args.command].run(args)
        sys.stdout.flush()
        return code
    except BrokenPipeError:
        return _quiet_broken_pipe()
    except (PipeprobeError, _UsageError, OSError) as exc:
        print(f"pipeprobe: error: {_one_line(exc)}", file=sys.stderr)
        return EXIT_BAD_INPUT
    finally:
        warnings.showwarning = previous


def _one_line(exc: BaseException) -> str:
    """The error as one printable line (an OSError without a message of ours: its reason and file)."""
    text = str(exc)
    if isinstance(exc, OSError) and exc.strerror and not isinstance(exc, PipeprobeError) and exc.args[1:]:
        where = f" ({exc.filename})" if exc.filename else ""
        text = f"{exc.strerror}{where}"
    return " ".join(printable(text).split("\\x0a"))


def _one_line_warning(message: Any, category: Any, filename: Any, lineno: Any, file: Any = None,
                      line: Any = None) -> None:
    """Print a warning as one line, like the errors (no source location: it is about the input)."""
    print(f"pipeprobe: warning: {printable(message)}", file=file or sys.stderr)


if __name__ == "__main__":
    sys.exit(main())
