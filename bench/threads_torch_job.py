"""A small real torch job for the thread check: a CNN step on torch's intra-op threads beside PIL workers.

The scenario (our own): a sorter of coloured tiles trains a small
convolutional network on 64 px tiles drawn with PIL in the loader's
workers (shapes, blur, rotation, JPEG round trip). torch's intra-op pool
keeps its default (one thread per core) unless ``--threads`` is given, so
on a machine with few cores the step's threads and the workers compete.

    python bench/threads_torch_job.py --out RUN --workers 1
    python -m pipeprobe whatif RUN --workers 2       # predicted
    python bench/threads_torch_job.py --out RUN2 --workers 2   # the rerun

Prints the wall time of the loop. Needs torch (not a dependency of pipeprobe).
"""

from __future__ import annotations

import argparse
import io
import time

import numpy as np
import torch
from PIL import Image, ImageDraw, ImageFilter

import pipeprobe

TILE_PX = 64
CLASSES = 4


class Tiles(torch.utils.data.Dataset):
    """Tiles drawn on demand: a shape per class, blurred, rotated and JPEG-compressed."""

    def __init__(self, n: int) -> None:
        self.n = n

    def __len__(self) -> int:
        return self.n

    def __getitem__(self, i: int) -> tuple[torch.Tensor, int]:
        rng = np.random.default_rng(i)
        label = i % CLASSES
        with pipeprobe.stage("draw", sample=i):
            img = Image.new("RGB", (2 * TILE_PX, 2 * TILE_PX), tuple(int(c) for c in rng.integers(0, 255, 3)))
            pen = ImageDraw.Draw(img)
            box = [int(v) for v in rng.integers(10, 118, 4)]
            box = [min(box[0], box[2]), min(box[1], box[3]), max(box[0], box[2]) + 4, max(box[1], box[3]) + 4]
            if label == 0:
                pen.ellipse(box, fill=(250, 250, 250))
            elif label == 1:
                pen.rectangle(box, fill=(250, 250, 250))
            else:
                (pen.chord if label == 2 else pen.pieslice)(box, 20, 250, fill=(250, 250, 250))
        with pipeprobe.stage("augment", sample=i):
            img = img.filter(ImageFilter.GaussianBlur(2)).rotate(float(rng.uniform(-30, 30)))
            img = img.resize((TILE_PX, TILE_PX), Image.BILINEAR)
            buf = io.BytesIO()
            img.save(buf, "JPEG", quality=80)
            img = Image.open(io.BytesIO(buf.getvalue())).convert("RGB")
        with pipeprobe.stage("to_tensor", sample=i):
            x = torch.from_numpy(np.asarray(img, np.float32).transpose(2, 0, 1) / 255.0)
        return x, label


def _model() -> torch.nn.Module:
    return torch.nn.Sequential(
        torch.nn.Conv2d(3, 32, 3, padding=1), torch.nn.ReLU(), torch.nn.MaxPool2d(2),
        torch.nn.Conv2d(32, 64, 3, padding=1), torch.nn.ReLU(), torch.nn.MaxPool2d(2),
        torch.nn.Conv2d(64, 64, 3, padding=1), torch.nn.ReLU(), torch.nn.AdaptiveAvgPool2d(1),
        torch.nn.Flatten(), torch.nn.Linear(64, CLASSES))


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--out", required=True)
    p.add_argument("--workers", type=int, default=2)
    p.add_argument("--threads", type=int, default=0, help="torch intra-op threads (0: torch's default)")
    p.add_argument("--batches", type=int, default=50)
    p.add_argument("--batch-size", type=int, default=32)
    a = p.parse_args()
    if a.threads:
        torch.set_num_threads(a.threads)
    torch.manual_seed(0)
    data = Tiles(a.batches * a.batch_size)
    loader = torch.utils.data.DataLoader(data, batch_size=a.batch_size, num_workers=a.workers, shuffle=False)
    model = _model()
    opt = torch.optim.SGD(model.parameters(), lr=0.05, momentum=0.9)
    t0 = time.perf_counter()
    with pipeprobe.Probe(a.out, report=False) as probe:
        for x, y in probe.watch(loader):
            with probe.step():
                opt.zero_grad()
                loss = torch.nn.functional.cross_entropy(model(x), y)
                loss.backward()
                opt.step()
    print(f"{a.batches} batches, {a.workers} workers, {torch.get_num_threads()} intra-op threads: "
          f"{time.perf_counter() - t0:.2f} s")


if __name__ == "__main__":
    main()
