"""Export speed: a large synthetic run written as parquet and csv tables.

Writes a run of about a million spans (tests/_synth.py), loads it once, then
times :func:`pipeprobe.export.export_tables` per format (critical path
included) and sums the size of the tables written.

    python bench/bench_export.py [--spans N]
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
from pathlib import Path
from time import perf_counter

import pipeprobe
from pipeprobe.export import export_tables

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))
from _synth import write_many_spans  # noqa: E402


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--spans", type=int, default=1_000_000)
    a = p.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        write_many_spans(Path(tmp) / "run", a.spans)
        run = pipeprobe.load(Path(tmp) / "run")
        for fmt in ("parquet", "csv"):
            try:
                t = perf_counter()
                done = export_tables(run, Path(tmp) / f"tables-{fmt}", format=fmt)
                dt = perf_counter() - t
            except pipeprobe.PipeprobeError as exc:  # parquet without pyarrow
                print(f"{fmt}: skipped ({exc})")
                continue
            size = sum(os.path.getsize(f) for f in done.files.values())
            print(f"{fmt:<8} {done.rows['spans']:,} spans: {dt:6.2f} s, {size / 2**20:6.1f} MiB of tables")


if __name__ == "__main__":
    main()
