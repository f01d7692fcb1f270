"""A real torch job, twice: new loader workers each epoch, then persistent workers; predicted vs measured gain.

A few hundred invented JPEGs (coloured gradients with a numbered square,
made with PIL at start) are decoded and augmented in ``__getitem__`` of a
map-style dataset; a small CNN trains on them with
``DataLoader(batch_size=16, num_workers=2)`` for 3 epochs. The first run
uses torch's default ``persistent_workers=False``; pipeprobe measures the
wait for new workers at each epoch and replays the run with them kept
(:func:`pipeprobe.whatif.restart.worker_restarts`). The second run keeps
the workers (``persistent_workers=True``). Printed: both wall times, the
restart waits, the predicted and the measured gain, and the worker advice
of the first run.

To make the workers' start-up visible each worker builds a lookup table in
``worker_init_fn`` when it starts (``--init-ms``, as a worker that opens an
index file or a tokenizer would). (Work a dataset does lazily on its first
item runs inside the first loader span instead: the recording counts it as
that batch's loading, not as start-up.)

    python bench/real_restarts.py [--images 320] [--epochs 3] [--init-ms 300] [--pairs 1]
"""

from __future__ import annotations

import argparse
import functools
import io
import statistics
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

import numpy as np  # noqa: E402
import torch  # noqa: E402
from PIL import Image, ImageDraw  # noqa: E402
from torch.utils.data import DataLoader, Dataset  # noqa: E402

import pipeprobe  # noqa: E402
from pipeprobe.whatif.advice import worker_advice  # noqa: E402
from pipeprobe.whatif.plan import build_plan  # noqa: E402
from pipeprobe.whatif.restart import worker_restarts  # noqa: E402


def make_images(n: int, size: int = 96) -> list[bytes]:
    """``n`` invented JPEGs: a gradient in a colour of its own with a numbered square."""
    out = []
    for i in range(n):
        x = np.linspace(0, 255, size, dtype=np.float32)
        rgb = np.stack([np.add.outer(x * (i % 3 == c), x[::-1]) / 2 for c in range(3)], -1).astype(np.uint8)
        img = Image.fromarray(rgb)
        ImageDraw.Draw(img).rectangle([8 + i % 40, 8, 40 + i % 40, 40], fill=(i * 37 % 256, 90, 200))
        buf = io.BytesIO()
        img.save(buf, format="JPEG", quality=90)
        out.append(buf.getvalue())
    return out


class Parts(Dataset):
    """Decode and augment one invented JPEG; the label is its index modulo 4."""

    def __init__(self, jpegs: list[bytes]) -> None:
        self.jpegs = jpegs
        self.table = np.arange(256, dtype=np.float32) / 255.0

    def __len__(self) -> int:
        return len(self.jpegs)

    def __getitem__(self, i: int):
        with pipeprobe.stage("decode", sample=i):
            img = Image.open(io.BytesIO(self.jpegs[i])).convert("RGB")
        with pipeprobe.stage("augment", sample=i):
            img = img.rotate((i * 7) % 30).resize((64, 64))
            arr = self.table[np.asarray(img)]
            if i % 2:
                arr = arr[:, ::-1]
            x = torch.from_numpy(np.ascontiguousarray(arr.transpose(2, 0, 1)))
        return x, i % 4


def start_worker(init_ms: float, worker_id: int) -> None:
    """A worker's own start-up: building its tables (a sleep of ``init_ms`` stands for it)."""
    time.sleep(init_ms / 1e3)


def train(jpegs: list[bytes], out: Path, persistent: bool, epochs: int, init_ms: float, workers: int = 2) -> float:
    """One recorded training run; returns its measured wall time."""
    torch.manual_seed(0)
    net = torch.nn.Sequential(
        torch.nn.Conv2d(3, 8, 3, padding=1), torch.nn.ReLU(), torch.nn.MaxPool2d(2),
        torch.nn.Conv2d(8, 16, 3, padding=1), torch.nn.ReLU(), torch.nn.AdaptiveAvgPool2d(1),
        torch.nn.Flatten(), torch.nn.Linear(16, 4))
    opt = torch.optim.SGD(net.parameters(), lr=0.05)
    loader = DataLoader(Parts(jpegs), batch_size=16, shuffle=True, num_workers=workers,
                        persistent_workers=persistent, worker_init_fn=functools.partial(start_worker, init_ms))
    with pipeprobe.Probe(out, report=False) as probe:
        for epoch in range(epochs):
            for x, y in probe.watch(loader, epoch=epoch):
                with probe.step():
                    opt.zero_grad()
                    torch.nn.functional.cross_entropy(net(x), y).backward()
                    opt.step()
    return pipeprobe.load(out).wall_s


def check_advice(jpegs: list[bytes], root: Path, a: argparse.Namespace, kept_dir: Path) -> None:
    """Rerun the kept-workers job with the count the advice gives for it, and compare the speed-ups."""
    adv = worker_advice(build_plan(pipeprobe.load(kept_dir)))
    if adv.workers == adv.recorded_workers:
        print(f"        advice on the kept run: keep {adv.workers} workers ({adv.reason}); nothing to rerun")
        return
    wall_before = train(jpegs, root / "before", True, a.epochs, a.init_ms, adv.recorded_workers)
    wall_after = train(jpegs, root / "after", True, a.epochs, a.init_ms, adv.workers)
    print(f"        advice on the kept run: {adv.workers} workers, replayed {adv.speedup:.2f}x; rerun "
          f"{adv.recorded_workers} -> {adv.workers} workers: {wall_before:.3f} s -> {wall_after:.3f} s, "
          f"measured {wall_before / wall_after:.2f}x")


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--images", type=int, default=320)
    p.add_argument("--epochs", type=int, default=3)
    p.add_argument("--init-ms", type=float, default=300.0)
    p.add_argument("--pairs", type=int, default=1)
    p.add_argument("--check-advice", action="store_true", help="rerun with the advised worker count")
    a = p.parse_args()
    torch.set_num_threads(1)
    jpegs = make_images(a.images)
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        for k in range(a.pairs):
            new_dir, kept_dir = Path(tmp) / f"new{k}", Path(tmp) / f"kept{k}"
            wall_new = train(jpegs, new_dir, False, a.epochs, a.init_ms)
            wall_kept = train(jpegs, kept_dir, True, a.epochs, a.init_ms)
            run = pipeprobe.load(new_dir)
            plan = build_plan(run)
            r = worker_restarts(plan, run)
            kept = worker_restarts(build_plan(pipeprobe.load(kept_dir)), pipeprobe.load(kept_dir))
            adv = worker_advice(plan)
            rows.append((wall_new, wall_kept, r.persistent_wall_s))
            print(f"pair {k}: new workers each epoch {wall_new:.3f} s (restarts {r.restarts}, waits "
                  f"{', '.join(f'{s:.3f}' for s in r.restart_s)} s; first start {r.first_start_s:.3f} s)")
            print(f"        persistent workers: measured {wall_kept:.3f} s (restarts seen: {kept.restarts}); "
                  f"predicted {r.persistent_wall_s:.3f} s")
            print(f"        gain: predicted {r.saved_s:.3f} s, measured {wall_new - wall_kept:.3f} s; "
                  f"epoch barrier {plan.epoch_barrier}, prefetch {plan.prefetch}, dispatch {plan.dispatch_s:.4f} s")
            print(f"        worker advice: more workers {adv.more_workers}: {adv.reason}")
            if a.check_advice:
                check_advice(jpegs, Path(tmp) / f"advice{k}", a, kept_dir)
    if len(rows) > 1:
        med = [statistics.median(c) for c in zip(*rows, strict=True)]
        print(f"medians: new {med[0]:.3f} s, kept {med[1]:.3f} s, predicted kept {med[2]:.3f} s")


if __name__ == "__main__":
    main()
