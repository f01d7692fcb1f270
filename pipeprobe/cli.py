"""The ``pipeprobe`` command line.

Exit codes: 0 success; 1 a gate failed (``compare`` found a regression);
2 bad input (wrong arguments, missing or corrupt run) with a one-line error.
"""

from __future__ import annotations

import argparse
import sys
import warnings
from typing import Sequence

from .errors import PipeprobeError

EXIT_OK = 0
EXIT_GATE = 1
EXIT_BAD_INPUT = 2


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # one line, exit 2
        where = f"pipeprobe {self._sub}" if self._sub else "pipeprobe"
        self.exit(EXIT_BAD_INPUT, f"pipeprobe: error: {message} (see '{where} --help')\n")

    _sub = ""


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


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="pipeprobe", description="Find what holds back a training run's input pipeline.")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True

    demo = sub.add_parser("demo", help="record the bundled parts-inspection training demo and print its report")
    demo._sub = "demo"
    demo.add_argument("--out", metavar="DIR", help="run folder (default: a new folder under ./pipeprobe-runs)")
    demo.add_argument("--batches", type=_positive_int, default=60, metavar="N", help="batches to train on (60)")
    demo.add_argument("--workers", type=_non_negative_int, default=2, metavar="N",
                      help="loader worker processes; 0 loads in the training process (2)")
    demo.add_argument("--prefetch", type=_positive_int, default=4, metavar="N",
                      help="batches in flight across all workers (4)")
    demo.add_argument("--image-size", type=_positive_int, default=96, metavar="PX", help="training image side (96)")
    demo.add_argument("--augment", default="crop,flip,rotate,jitter", metavar="LIST",
                      help="comma-separated augmentations, from crop,flip,rotate,jitter; '' for none")
    demo.add_argument("--width", type=_positive_int, default=256, metavar="N", help="hidden units of the model (256)")
    demo.add_argument("--batch-size", type=_positive_int, default=16, metavar="N", help="samples per batch (16)")
    demo.add_argument("--seed", type=int, default=0, help="random seed (0)")

    report = sub.add_parser("report", help="print the stall report of a recorded run")
    report._sub = "report"
    report.add_argument("run_dir", metavar="RUN_DIR")
    report.add_argument("--json", action="store_true", help="print one JSON object (schema: pipeprobe.report)")
    report.add_argument("--html", metavar="FILE",
                        help="also write the report with its pictures as one self-contained HTML file")

    compare = sub.add_parser("compare", help="show what changed from RUN_A to RUN_B; gate on limits (exit 1)")
    compare._sub = "compare"
    compare.add_argument("run_a", metavar="RUN_A", help="baseline run folder")
    compare.add_argument("run_b", metavar="RUN_B", help="new run folder")
    compare.add_argument("--max-stall-increase", type=_non_negative_float, metavar="F",
                         help="fail when the stall fraction rises more than F (0.05 = 5 points)")
    compare.add_argument("--max-wall-increase", type=_non_negative_float, metavar="F",
                         help="fail when wall time per batch rises more than F (0.1 = 10 %%)")
    compare.add_argument("--max-stage-increase", type=_non_negative_float, metavar="F",
                         help="fail when any stage's mean time rises more than F (0.1 = 10 %%)")
    compare.add_argument("--json", action="store_true", help="print one JSON object")

    from .whatif import add_arguments as _whatif_arguments

    whatif = sub.add_parser("whatif", help="predict the wall time of RUN_DIR with faster stages, more workers...")
    whatif._sub = "whatif"
    _whatif_arguments(whatif)

    from .export import add_arguments as _export_arguments

    export = sub.add_parser("export", help="write a run as parquet or csv tables with a JSON manifest")
    export._sub = "export"
    _export_arguments(export)

    from .launch import add_arguments as _run_arguments

    run = sub.add_parser("run", help="record an unmodified training script: pipeprobe run -- python train.py ARGS")
    run._sub = "run"
    _run_arguments(run)
    return parser


def _cmd_demo(args: argparse.Namespace) -> int:
    from .demo import run_demo
    from .demo.pipeline import AUGMENTS

    augment = tuple(a.strip() for a in args.augment.split(",") if a.strip())
    unknown = sorted(set(augment) - set(AUGMENTS))
    if unknown:
        raise _UsageError(f"unknown augmentation {', '.join(unknown)}; choose from {', '.join(AUGMENTS)}")
    result = run_demo(
        out=args.out,
        batches=args.batches,
        workers=args.workers,
        prefetch=args.prefetch,
        image_size=args.image_size,
        augment=augment,
        width=args.width,
        batch_size=args.batch_size,
        seed=args.seed,
    )
    print(f"run folder: {result.run_dir}")
    return EXIT_OK


def _cmd_report(args: argparse.Namespace) -> int:
    from .report import print_close_report

    if args.html:
        from .html import write_report

        path = write_report(args.run_dir, args.html)
        print(f"pipeprobe: wrote {path}", file=sys.stderr)
    print_close_report(args.run_dir, as_json=args.json)
    return EXIT_OK


def _cmd_compare(args: argparse.Namespace) -> int:
    import json

    from .analysis import analyze
    from .compare import compare, comparison_dict, format_comparison

    result = compare(
        analyze(args.run_a),
        analyze(args.run_b),
        max_stall_increase=args.max_stall_increase,
        max_wall_increase=args.max_wall_increase,
        max_stage_increase=args.max_stage_increase,
    )
    if args.json:
        print(json.dumps(comparison_dict(result), allow_nan=False))
    else:
        print(format_comparison(result))
    return EXIT_GATE if result.regressed else EXIT_OK


def _cmd_whatif(args: argparse.Namespace) -> int:
    from .whatif import run_command

    return run_command(args)


def _cmd_run(args: argparse.Namespace) -> int:
    from .launch import run_command

    return run_command(args)


def _cmd_export(args: argparse.Namespace) -> int:
    from .export import run_command

    return run_command(args)


class _UsageError(Exception):
    pass


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; return the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    handlers = {"demo": _cmd_demo, "report": _cmd_report, "compare": _cmd_compare, "whatif": _cmd_whatif,
                "export": _cmd_export, "run": _cmd_run}
    previous = warnings.showwarning
    warnings.showwarning = _one_line_warning
    try:
        return handlers[args.command](args)
    except (PipeprobeError, _UsageError, FileNotFoundError, NotADirectoryError, PermissionError) as exc:
        print(f"pipeprobe: error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    finally:
        warnings.showwarning = previous


def _one_line_warning(message, category, filename, lineno, file=None, line=None) -> None:  # noqa: ANN001
    """Print a warning as one line, like the errors (no source location: it is about the input)."""
    print(f"pipeprobe: warning: {message}", file=file or sys.stderr)


if __name__ == "__main__":
    sys.exit(main())
