"""Predicted against real reruns of real torch jobs, and recorded stalls against the jobs' own clocks.

Three job shapes written for this bench (``bench/realjobs/``; not the demo):

  photos  a map-style dataset over invented JPEG photos, PIL ``decode`` and
          ``augment`` timed by ``@pipeprobe.stage`` decorators;
  shards  an iterable dataset over tar shards read with webdataset, split
          across loader workers;
  steps   a convolutional step at torch's default intra-op threads and at
          one thread, over a light in-memory loader.

Every job times itself (wall time of its training loop, total time inside
``next(loader)``) and runs 3 epochs with torch's default
``persistent_workers=False`` unless a row says otherwise. For each
scenario the base configuration is recorded (``--record``: a
``pipeprobe.Probe`` opened right before the loop, ``probe.watch`` and
``probe.step``), the replay predicts the changed configuration from that
recording, and the changed configuration is rerun for real WITHOUT
pipeprobe. Each rerun runs right next to the base it is predicted from
(:func:`repetition_plan`; order reversed on odd repetitions), ``--reps``
times each, each in a fresh process, each started when the machine is quiet
if it gets quiet within ``--quiet-wait`` seconds. A fixed workload timed in
the bench's process right before and after every run (:func:`speed_probe`)
says how fast the machine ran then. The table compares the median
prediction with the median measured loop time, the median of each
prediction against its own rerun ("paired"), and that with the two runs'
speed probes taken out ("speed-corrected"), over all runs and over the
quiet runs (other processes used less than a quarter core while it ran).

Stalls: every recorded base run, and every job once per repetition under
``python -m pipeprobe run`` (unchanged but for its stage decorators), give
the recorded stall seconds next to the job's own time in ``next(loader)``.

Scenarios the installed pipeprobe refuses (a keyword it does not know,
e.g. persistent workers before the replay models worker restarts) print
"not supported by this pipeprobe" instead of a number. Where a prediction
carries a range, the table shows it and whether the rerun fell inside.

    python bench/bench_real.py [--reps N] [--quiet-wait S] [--only JOB ...]
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

HERE = Path(__file__).resolve().parent
JOBS = HERE / "realjobs"
sys.path.insert(0, str(HERE.parent / "tests"))

from _recorded import wait_for_quiet_cpu  # noqa: E402

import pipeprobe  # noqa: E402
from pipeprobe.errors import PipeprobeError  # noqa: E402
from pipeprobe.stalls import stall_summary  # noqa: E402
from pipeprobe.whatif import whatif  # noqa: E402

#: A run counts as quiet when the machine's other processes used less than this many cores (as bench_predict).
QUIET_CORES = 0.25
#: Targets of issue #11 section 4: every error within 10 %, the median within 5 %, stalls within 5 %.
MAX_ERROR, MEDIAN_ERROR, STALL_ERROR = 0.10, 0.05, 0.05
#: Photos the bench invents (the photos and shards jobs read the same ones).
PHOTOS, SHARDS = 160, 8
NOT_SUPPORTED = "not supported by this pipeprobe"


@dataclass(frozen=True)
class Config:
    """One job configuration: the job script and its command-line options."""

    job: str
    options: tuple[tuple[str, Any], ...]

    @classmethod
    def of(cls, job: str, **options: Any) -> Config:
        return cls(job, tuple(sorted(options.items())))

    def argv(self) -> list[str]:
        out = []
        for key, value in self.options:
            flag = "--" + key.replace("_", "-")
            if value is True:
                out.append(flag)
            elif value is not False:
                out += [flag, str(value)]
        return out

    def get(self, key: str, default: Any = None) -> Any:
        return dict(self.options).get(key, default)


@dataclass(frozen=True)
class Scenario:
    """A row: record ``base``, predict with ``change`` (whatif keywords), rerun ``target`` for real."""

    name: str
    base: Config
    target: Config
    change: dict[str, Any]


@dataclass
class Row:
    """What the repetitions of one scenario gave."""

    scenario: Scenario
    # (s, other cores, range, miss, the machine's speed index while the base was recorded)
    predicted: list[tuple[float, float, Any, float, float]] = field(default_factory=list)
    measured: list[tuple[float, float, float]] = field(default_factory=list)  # (s, other cores, speed index)
    refused: str = ""


def scenarios() -> list[Scenario]:
    """The rows of the table: workers, persistence, a nested stage removed or cheaper, prefetch, threads."""
    ph = dict(threads=1, epochs=3)
    p2 = Config.of("photos", workers=2, **ph)
    sh = dict(threads=1, epochs=3)
    s2 = Config.of("shards", workers=2, **sh)
    rows = [
        Scenario("photos: workers 1 -> 2", Config.of("photos", workers=1, **ph), p2, dict(workers=2, prefetch=4)),
        Scenario("photos: workers 0 -> 2", Config.of("photos", workers=0, **ph), p2, dict(workers=2, prefetch=4)),
        Scenario("photos: persistent workers on", p2, Config.of("photos", workers=2, persistent=True, **ph),
                 dict(persistent_workers=True)),
        Scenario("photos: augment 2x cheaper", p2, Config.of("photos", workers=2, cost=0.5, **ph),
                 dict(faster={"augment": 2})),
        Scenario("photos: augment removed", p2, Config.of("photos", workers=2, remove="augment", **ph),
                 dict(faster={"augment": float("inf")})),
        Scenario("photos: prefetch 1 -> 4 per worker", Config.of("photos", workers=2, prefetch=1, **ph),
                 Config.of("photos", workers=2, prefetch=4, **ph), dict(prefetch=8)),
        Scenario("shards: workers 0 -> 2", Config.of("shards", workers=0, **sh), s2, dict(workers=2, prefetch=4)),
        Scenario("shards: persistent workers on", s2, Config.of("shards", workers=2, persistent=True, **sh),
                 dict(persistent_workers=True)),
    ]
    for threads, label in ((0, "default threads"), (1, "1 thread")):
        rows.append(Scenario(f"steps ({label}): workers 0 -> 2", Config.of("steps", workers=0, threads=threads),
                             Config.of("steps", workers=2, threads=threads), dict(workers=2, prefetch=4)))
    return rows


def recorded_settings(config: Config) -> dict[str, Any]:
    """The recorded loader's settings, as the bench knows them (prefetch: all workers together)."""
    workers = int(config.get("workers", 0))
    if workers == 0:
        return {"recorded_workers": 0}
    return {"recorded_workers": workers, "recorded_prefetch": workers * int(config.get("prefetch", 2))}


# -- the input files -----------------------------------------------------------------------------------------

def write_photos(folder: Path, count: int = PHOTOS) -> None:
    """Invented shelf-label photos: a grey shelf with coloured labels, 256x256 JPEG."""
    import random

    from PIL import Image, ImageDraw

    folder.mkdir(parents=True, exist_ok=True)
    rng = random.Random(11)
    for i in range(count):
        img = Image.new("RGB", (256, 256), (rng.randrange(170, 235),) * 3)
        draw = ImageDraw.Draw(img)
        for _ in range(12):
            x, y = rng.randrange(0, 230), rng.randrange(0, 230)
            draw.rectangle([x, y, x + rng.randrange(10, 60), y + rng.randrange(5, 30)],
                           fill=tuple(rng.randrange(0, 255) for _ in range(3)))
        img.save(folder / f"label-{i:04d}.jpg", quality=90)


def write_shards(photos: Path, folder: Path, shards: int = SHARDS) -> None:
    """The photos as webdataset tar shards (``NNNN.jpg``, ``NNNN.cls``), dealt round-robin."""
    import webdataset as wds

    folder.mkdir(parents=True, exist_ok=True)
    files = sorted(photos.glob("*.jpg"))
    for s in range(shards):
        with wds.TarWriter(str(folder / f"shelf-{s:02d}.tar")) as sink:
            for k in range(s, len(files), shards):
                sink.write({"__key__": f"{k:04d}", "jpg": files[k].read_bytes(), "cls": str(k % 5).encode()})


# -- running a job -------------------------------------------------------------------------------------------

def _cpu_snapshot() -> tuple[float, float]:
    """(busy CPU seconds of the whole machine, CPU seconds of our finished children)."""
    with open("/proc/stat", encoding="ascii") as fh:
        fields = [int(x) for x in fh.readline().split()[1:]]
    busy = (sum(fields) - fields[3] - (fields[4] if len(fields) > 4 else 0)) / os.sysconf("SC_CLK_TCK")
    kids = resource.getrusage(resource.RUSAGE_CHILDREN)
    return busy, kids.ru_utime + kids.ru_stime


def speed_probe(rounds: int = 5) -> float:
    """Seconds of a fixed workload in this process (the median of ``rounds``): how fast the machine runs now.

    PIL rotations and smoothing as the jobs' ``augment`` does, and a small
    matrix product; about 30 ms a round. Timed right before and right after
    every run, its mean over the session's median is that run's speed index.
    """
    from PIL import Image, ImageFilter

    img = Image.new("RGB", (96, 96), (120, 160, 200))
    a = np.arange(96 * 96, dtype=np.float32).reshape(96, 96) / 9216.0
    times = []
    for _ in range(rounds):
        t0 = time.perf_counter()
        x = img
        for r in range(30):
            x = x.rotate(3 + r % 5, resample=Image.BICUBIC).filter(ImageFilter.SMOOTH_MORE)
        for _ in range(20):
            a = (a @ a) / 96.0
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def run_job(config: Config, data: dict[str, Path], *, record: Path | None = None, launch: Path | None = None,
            quiet_wait: float) -> dict[str, Any]:
    """Run the job in a fresh process; its JSON plus ``other_cores`` (what other processes used meanwhile).

    ``record``: the job records itself into that folder; ``launch``: it runs
    unchanged under ``python -m pipeprobe run --out FOLDER``.
    """
    wait_for_quiet_cpu(max_wait_s=quiet_wait)
    cmd = [sys.executable, str(JOBS / f"{config.job}.py"), "--data", str(data[config.job]), *config.argv()]
    if record is not None:
        cmd += ["--record", str(record)]
    if launch is not None:
        cmd = [sys.executable, "-m", "pipeprobe", "run", "--out", str(launch), "--quiet", "--", *cmd]
    before = speed_probe()
    busy0, kids0 = _cpu_snapshot()
    t0 = time.monotonic()
    done = subprocess.run(cmd, capture_output=True, text=True, timeout=600)
    wall = time.monotonic() - t0
    busy1, kids1 = _cpu_snapshot()
    after = speed_probe()
    if done.returncode != 0:
        raise RuntimeError(f"{config.job} {config.argv()} failed:\n{done.stderr[-2000:]}")
    out = json.loads(done.stdout.strip().splitlines()[-1])
    out["other_cores"] = max(0.0, ((busy1 - busy0) - (kids1 - kids0)) / wall)
    out["probe_s"] = (before + after) / 2
    return out


# -- predictions ---------------------------------------------------------------------------------------------

def predict(run_dir: Path, scenario: Scenario) -> tuple[float, Any, float]:
    """The replay's predicted loop time of the target, its range when it gives one, and the model's own miss.

    The miss is how far the replay of the unchanged base lands from the base's measured wall time
    (``Prediction.model_check``): a large one says the model does not reproduce the base run.

    Raises ``LookupError`` with :data:`NOT_SUPPORTED` when this pipeprobe does not know the change.
    """
    try:
        p = whatif(run_dir, **scenario.change, **recorded_settings(scenario.base))
    except TypeError as exc:  # an unknown keyword: a feature this pipeprobe does not have
        raise LookupError(f"{NOT_SUPPORTED} ({exc})") from exc
    except PipeprobeError as exc:
        raise LookupError(f"{NOT_SUPPORTED} ({exc})") from exc
    miss = p.model_check.miss if p.model_check is not None else float("nan")
    return p.predicted_wall_s, prediction_range(p.to_dict()), miss


def prediction_range(d: dict[str, Any]) -> tuple[float, float] | None:
    """A (low, high) range of predicted wall seconds when the prediction has one.

    Looks for a two-number key whose name says range (``predicted_wall_range_s``)
    or for ``..._low_s`` / ``..._high_s`` keys next to the predicted wall time.
    """
    for key, value in d.items():
        if "range" in key and "wall" in key and isinstance(value, (list, tuple)) and len(value) == 2:
            return float(value[0]), float(value[1])
    low = [v for k, v in d.items() if "wall" in k and k.endswith(("low_s", "min_s"))]
    high = [v for k, v in d.items() if "wall" in k and k.endswith(("high_s", "max_s"))]
    if low and high:
        return float(low[0]), float(high[0])
    return None


def recorded_stall(run_dir: Path) -> tuple[float, float]:
    """The stall seconds pipeprobe reports for a run (all batches of all loaders), and the median CPU
    seconds of one loader item (the loader's ``fetch`` span with the stages inside it; NaN without)."""
    run = pipeprobe.load(run_dir)
    fetch = run.spans.loc[(run.spans["stage"] == "fetch").to_numpy(), "cpu_s"].dropna()
    return float(stall_summary(run).total_s), float(fetch.median()) if len(fetch) else float("nan")


# -- one repetition ------------------------------------------------------------------------------------------

@dataclass
class Stall:
    """One run's recorded stall against the job's own time in ``next(loader)``."""

    label: str
    recorded_s: float
    own_s: float
    other_cores: float
    item_cpu_s: float = float("nan")
    probe_s: float = float("nan")


def repetition_plan(rows: list[Row], rep: int) -> list[tuple[str, Config, Config | None]]:
    """The runs of one repetition: each recorded base right next to the reruns predicted from it.

    ``(kind, config, base)``: a base, then each target predicted from it (a
    target of two bases is rerun next to each), then the ``pipeprobe run``
    recordings; on odd repetitions every group and the order of the groups
    are reversed, so a slow drift of the machine weighs on bases and reruns
    alike.
    """
    groups: dict[Config, list[Config]] = {}
    for row in rows:
        if not row.refused:
            targets = groups.setdefault(row.scenario.base, [])
            if row.scenario.target not in targets:
                targets.append(row.scenario.target)
    plan = []
    for base, targets in groups.items():
        group = [("base", base, None)] + [("target", t, base) for t in targets]
        plan.append(group[::-1] if rep % 2 else group)
    plan.append([("launch", c, None) for c in launched(sorted({b.job for b in groups}))])
    if rep % 2:
        plan.reverse()
    return [run for group in plan for run in group]


def one_repetition(rows: list[Row], stalls: list[Stall], data: dict[str, Path], work: Path, rep: int,
                   quiet_wait: float) -> None:
    """Record every base once, rerun every target next to its base (:func:`repetition_plan`), predict."""
    recorded: dict[Config, tuple[Path, float, float]] = {}
    measured: dict[tuple[Config, Config], tuple[float, float, float]] = {}
    for n, (kind, config, base) in enumerate(repetition_plan(rows, rep)):
        folder = work / f"rep{rep}-{n}-{kind}-{config.job}"
        if kind == "base":
            out = run_job(config, data, record=folder, quiet_wait=quiet_wait)
            recorded[config] = (folder, out["other_cores"], out["probe_s"])
            stall, item = recorded_stall(folder)
            stalls.append(Stall(f"{config.job} {_short(config)} (Probe.watch)", stall, out["next_s"],
                                out["other_cores"], item, out["probe_s"]))
        elif kind == "launch":
            out = run_job(config, data, launch=folder, quiet_wait=quiet_wait)
            stall, item = recorded_stall(folder)
            stalls.append(Stall(f"{config.job} {_short(config)} (pipeprobe run)", stall, out["next_s"],
                                out["other_cores"], item, out["probe_s"]))
        else:
            out = run_job(config, data, quiet_wait=quiet_wait)
            measured[(base, config)] = (out["wall_s"], out["other_cores"], out["probe_s"])
        with open(work / "runs.jsonl", "a", encoding="utf-8") as log:  # what each run measured, by folder
            log.write(json.dumps({"kind": kind, "folder": folder.name, "argv": config.argv(), **out}) + "\n")
    for row in rows:
        if row.refused:
            continue
        folder, other, probe_s = recorded[row.scenario.base]
        try:
            seconds, span, miss = predict(folder, row.scenario)
        except LookupError as exc:
            row.refused = str(exc)
            continue
        row.predicted.append((seconds, other, span, miss, probe_s))
        row.measured.append(measured[(row.scenario.base, row.scenario.target)])


def launched(jobs: list[str]) -> list[Config]:
    """The runs recorded unchanged under ``pipeprobe run``: 2 workers each, and photos once with persistent workers."""
    runs = [Config.of(job, workers=2, threads=1) for job in jobs]
    if "photos" in jobs:
        runs.append(Config.of("photos", workers=2, threads=1, persistent=True))
    return runs


def _short(config: Config) -> str:
    return " ".join(f"{k}={v}" for k, v in config.options if k not in ("epochs",))


# -- the tables ----------------------------------------------------------------------------------------------

def _fmt_range(spans: list[Any]) -> str:
    spans = [s for s in spans if s is not None]
    if not spans:
        return "-"
    return f"{statistics.median(s[0] for s in spans):.2f} to {statistics.median(s[1] for s in spans):.2f}"


#: The three errors of a scenario row: medians against medians, the median of each base against the rerun
#: made next to it, and the same with the machine's speed index of each run taken out.
ERROR_KINDS = ("medians", "paired", "speed-corrected")


def scenario_table(rows: list[Row], keep: Any) -> tuple[list[str], dict[str, list[float]]]:
    """Markdown lines of the prediction table over the runs ``keep(other_cores)`` admits, and the errors by kind.

    ``paired``: the median over repetitions of each prediction against the
    rerun made right after (or before) its base. ``speed-corrected``: the same,
    each prediction scaled by the speed probe's seconds around the rerun over
    those around the base (:func:`speed_probe`), so that the machine running
    faster or slower between the two does not count as the model's error.
    """
    lines = ["| job and scenario | predicted s | range s | measured s | error | paired | speed-corrected | in range "
             "| reruns' spread | runs |", "|---|---|---|---|---|---|---|---|---|---|"]
    errors: dict[str, list[float]] = {k: [] for k in ERROR_KINDS}
    for row in rows:
        name = row.scenario.name
        if row.refused:
            lines.append(f"| {name} | {NOT_SUPPORTED} | - | - | - | - | - | - | - | - |")
            continue
        pairs = [(p, m) for p, m in zip(row.predicted, row.measured, strict=True) if keep(p[1]) and keep(m[1])]
        if not pairs:
            lines.append(f"| {name} | - | - | - | - | - | - | - | - | 0 |")
            continue
        pm, mm = statistics.median(p[0] for p, _ in pairs), statistics.median(m[0] for _, m in pairs)
        paired = statistics.median(p[0] / m[0] - 1 for p, m in pairs)
        corrected = statistics.median(p[0] * m[2] / (p[4] * m[0]) - 1 for p, m in pairs)
        for kind, err in zip(ERROR_KINDS, (pm / mm - 1, paired, corrected), strict=True):
            errors[kind].append(err)
        spans = [p[2] for p, _ in pairs]
        inside = "-" if all(x is None for x in spans) else (
            "yes" if any(x is not None and x[0] <= mm <= x[1] for x in spans) else "no")
        ms = [m[0] for _, m in pairs]
        spread = (max(ms) - min(ms)) / 2 / mm  # half the reruns' range: how far one rerun can land from the median
        lines.append(f"| {name} | {pm:.3f} | {_fmt_range(spans)} | {mm:.3f} | {100 * (pm / mm - 1):+.1f} % | "
                     f"{100 * paired:+.1f} % | {100 * corrected:+.1f} % | {inside} | +-{100 * spread:.1f} % | "
                     f"{len(pairs)} |")
    return lines, errors


def stall_table(stalls: list[Stall]) -> tuple[list[str], list[float]]:
    """Markdown lines of the stall table (medians per run kind) and the errors."""
    lines = ["| job, how recorded | recorded stall s | job's own next() s | error | runs |", "|---|---|---|---|---|"]
    errors = []
    for label in dict.fromkeys(s.label for s in stalls):
        mine = [s for s in stalls if s.label == label]
        rec, own = statistics.median(s.recorded_s for s in mine), statistics.median(s.own_s for s in mine)
        err = statistics.median(s.recorded_s / s.own_s - 1 for s in mine if s.own_s > 0)
        errors.append(err)
        lines.append(f"| {label} | {rec:.3f} | {own:.3f} | {100 * err:+.1f} % | {len(mine)} |")
    return lines, errors


def verdict(errors: list[float], limit: float, median_limit: float | None = None) -> str:
    if not errors:
        return "no rows to judge"
    worst, med = max(abs(e) for e in errors), statistics.median(abs(e) for e in errors)
    ok = worst <= limit and (median_limit is None or med <= median_limit)
    return f"median |error| {100 * med:.1f} %, max {100 * worst:.1f} %: {'PASS' if ok else 'FAIL'}"


def probe_follows_items(stalls: list[Stall]) -> str:
    """How well the speed probe around each recorded run follows that run's median CPU per loader item.

    Both over their median per recorded configuration (so each run's speed
    relative to its like), then Pearson's correlation and the least-squares
    slope of item on probe over all recorded runs.
    """
    xs, ys = [], []
    for label in dict.fromkeys(s.label for s in stalls):
        mine = [s for s in stalls if s.label == label and s.item_cpu_s == s.item_cpu_s and s.probe_s == s.probe_s]
        if len(mine) > 1:
            mp, mi = statistics.median(s.probe_s for s in mine), statistics.median(s.item_cpu_s for s in mine)
            xs += [s.probe_s / mp for s in mine]
            ys += [s.item_cpu_s / mi for s in mine]
    if len(xs) < 3 or np.std(xs) == 0 or np.std(ys) == 0:
        return "too few recorded runs to say"
    r = float(np.corrcoef(xs, ys)[0, 1])
    slope = float(np.polyfit(xs, ys, 1)[0])
    return (f"correlation {r:.2f}, slope {slope:.2f} over {len(xs)} recorded runs (probe spread "
            f"{min(xs):.2f} to {max(xs):.2f}, item CPU {min(ys):.2f} to {max(ys):.2f}, each over its median)")


def print_report(rows: list[Row], stalls: list[Stall], reps: int) -> None:
    print(f"\nreal jobs, {reps} alternating repetitions, {os.cpu_count()} cores, pipeprobe {pipeprobe.__version__}")
    for title, keep in (("all runs", lambda other: True),
                        (f"quiet runs (other load < {QUIET_CORES} core)", lambda other: other < QUIET_CORES)):
        lines, errors = scenario_table(rows, keep)
        print(f"\npredicted (replay of the recorded base) against measured (rerun without pipeprobe), {title}\n")
        print("\n".join(lines))
        for kind in ERROR_KINDS:
            print(f"\n{kind}: {verdict(errors[kind], MAX_ERROR, MEDIAN_ERROR)} (targets: each within 10 %, median "
                  "within 5 %)", end="")
        print()
    lines, errors = stall_table(stalls)
    print("\nrecorded stall against the job's own time in next(loader)\n")
    print("\n".join(lines))
    print(f"\n{verdict(errors, STALL_ERROR)} (target: each within 5 %)")
    print("\nthe machine's own drift: median CPU ms of one loader item (fetch), same recorded configuration, "
          "each repetition")
    for label in dict.fromkeys(s.label for s in stalls):
        items = [s.item_cpu_s for s in stalls if s.label == label and s.item_cpu_s == s.item_cpu_s]
        if len(items) > 1:
            print(f"  {label}: " + ", ".join(f"{1e3 * x:.2f}" for x in items)
                  + f" (max / min {max(items) / min(items):.2f})")
    print(f"\ndoes the speed probe follow the jobs' own speed? {probe_follows_items(stalls)}")
    print("\nevery run: predicted (other load of the base run, the replay's miss on the base run, speed probe ms) / "
          "measured (other load, speed probe ms)")
    for row in rows:
        print(f"  {row.scenario.name}: " + (row.refused or ", ".join(
            f"{p:.2f} ({po:.2f}, {100 * miss:+.0f} %, {1e3 * pf:.1f}) / {m:.2f} ({mo:.2f}, {1e3 * mf:.1f})"
            for (p, po, _, miss, pf), (m, mo, mf) in zip(row.predicted, row.measured, strict=True))))
    for s in stalls:
        print(f"  stall {s.label}: {s.recorded_s:.3f} / {s.own_s:.3f} (other load {s.other_cores:.2f})")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--reps", type=int, default=3, help="alternating repetitions of every run (3)")
    ap.add_argument("--quiet-wait", type=float, default=60.0,
                    help="seconds to wait for a quiet machine before each run (60)")
    ap.add_argument("--only", nargs="+", choices=["photos", "shards", "steps"], help="only these jobs")
    ap.add_argument("--keep", type=Path, help="keep the input files and every recorded run in this folder")
    args = ap.parse_args()
    jobs = set(args.only or ["photos", "shards", "steps"])
    try:
        import webdataset  # noqa: F401
    except ImportError:
        print("bench_real: the shards job needs webdataset (pip install -e '.[bench]'); leaving it out",
              file=sys.stderr)
        jobs.discard("shards")
    rows = [Row(s) for s in scenarios() if s.base.job in jobs]
    stalls: list[Stall] = []
    with tempfile.TemporaryDirectory(prefix="bench-real-") as tmp:
        work = Path(tmp) if args.keep is None else args.keep
        work.mkdir(parents=True, exist_ok=True)
        data = {"photos": work / "photos", "shards": work / "shards", "steps": work}
        write_photos(data["photos"])
        if "shards" in jobs:
            write_shards(data["photos"], data["shards"])
        # one unmeasured run of each job first: in one session the first repetition's loader items took 6-17 %
        # more CPU than the later ones'
        for job in sorted(jobs):
            run_job(Config.of(job, workers=0, threads=1), data, quiet_wait=args.quiet_wait)
        for rep in range(args.reps):
            started = time.monotonic()
            one_repetition(rows, stalls, data, work, rep, args.quiet_wait)
            print(f"  repetition {rep + 1}/{args.reps} done in {time.monotonic() - started:.0f} s", file=sys.stderr)
    print_report(rows, stalls, args.reps)


if __name__ == "__main__":
    main()
