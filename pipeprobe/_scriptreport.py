"""The end of ``pipeprobe run``: close the probe, describe the loaders, print the report and the run folder.

Runs in the script's interpreter after the script ended (see
:mod:`pipeprobe._autowatch`). Everything goes to stderr (or the report to
``--report FILE``): the script's stdout stays the script's.
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Any

from . import tracefile as tf
from ._autowatch import SCRIPT_FILE, STEP_MEANING
from .byloader import loader_run, loader_table, training_loader

__all__ = ["finish"]

_FORMAT = "pipeprobe-script"
_VERSION = 1


def finish(probe: Any, loaders: dict[str, dict[str, Any]], batches_taken: int, options: dict[str, Any]) -> None:
    """Close ``probe``, write ``script.json``, print the report (or a clear message) and the run folder last."""
    probe.close()
    run_dir = Path(options["out"])
    entries = [{"name": name, **info} for name, info in loaders.items()]
    info = {"format": _FORMAT, "format_version": _VERSION, "command": options.get("command", []),
            "step": STEP_MEANING, "loaders": entries, "training_loader": None}
    _warn_unmatched(options, entries)
    if batches_taken == 0:
        _write_info(run_dir, info)
        print("pipeprobe: the script took no batch from a torch DataLoader, so there is nothing to report; "
              "pipeprobe run watches torch.utils.data.DataLoader only", file=sys.stderr)
    else:
        from .load import load

        run = load(run_dir)
        train = training_loader(loader_table(run, entries), options.get("train"))
        info["training_loader"] = train
        _write_info(run_dir, info)
        text = report_text(run, entries, train, options.get("command", []))
        _print_report(text, options.get("report"))
    print(f"pipeprobe: run folder {run_dir}", file=sys.stderr, flush=True)


def _warn_unmatched(options: dict[str, Any], entries: list[dict[str, Any]]) -> None:
    """One line per --name or --train that named no loader, listing the names there were."""
    autos = {str(e.get("auto_name")) for e in entries}
    names = {str(e["name"]) for e in entries}
    there = ", ".join(sorted(autos)) or "none"
    for auto in options.get("names", {}):
        if auto not in autos:
            print(f"pipeprobe: warning: --name {auto}=... matched no loader (loaders: {there})", file=sys.stderr)
    train = options.get("train")
    if train and train not in names and entries:
        print(f"pipeprobe: warning: --train {train} names no loader (loaders: {', '.join(sorted(names))}); "
              "the report covers the one with most batches", file=sys.stderr)


def _write_info(run_dir: Path, info: dict[str, Any]) -> None:
    tf.write_json_atomic(run_dir / SCRIPT_FILE, info)


def _print_report(text: str, path: str | None) -> None:
    if not path:
        print(text, file=sys.stderr, flush=True)
        return
    Path(path).write_text(text + "\n", encoding="utf-8")
    print(f"pipeprobe: report written to {path}", file=sys.stderr)


def report_text(run: Any, entries: list[dict[str, Any]], train: str | None, command: list[str]) -> str:
    """The loader table, then the usual report on the training loader's batches alone."""
    from ._sections import script_lines
    from .analysis import analyze
    from .report import SCRIPT_SECTION, SECTIONS, Section, format_report

    table = loader_table(run, entries, train)
    epochs = next((e["epochs"] for e in entries if e["name"] == train), [])
    analysis = analyze(loader_run(run, epochs))
    # the report's own script section, made from the whole run's table (the analysis holds one loader's batches)
    head = Section(SCRIPT_SECTION, lambda a: script_lines(table, train, command, every_loader=False))
    return format_report(analysis, [head, *(s for s in SECTIONS if s.name != SCRIPT_SECTION)])
