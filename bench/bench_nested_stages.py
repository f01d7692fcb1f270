"""A real torch job with decorated stages inside the loader's ``fetch``: replay and what-if against reruns.

The scenario (our own): a parts-photo classifier. A few hundred invented
JPEGs are written with PIL at start; a map-style dataset decodes each
(``@pipeprobe.stage("decode")``) and augments it (``@pipeprobe.stage("augment")``)
inside ``__getitem__``, which the DataLoader hooks time as ``fetch``. A small
CNN trains on the CPU, ``DataLoader(batch_size=16, num_workers=2)``.

Printed: the measured wall time, the replay of the unchanged configuration,
augment's critical-path share, and ``--faster augment=2`` predicted against a
real rerun whose augmentation does the same work in half the repetitions.

    python bench/bench_nested_stages.py [--images 320] [--epochs 2] [--repeats 2]
    python bench/bench_nested_stages.py --flatten 400000   # speed of the nesting sweep alone

``--flatten N`` times :func:`pipeprobe.nesting.flatten_spans` on ``N`` fetch
spans with a decode and an augment inside each, on 8 threads (median of 3),
against one ``np.lexsort`` of the same spans measured in the same run, and
``2 N`` spans that cross (each held open into the next fetch) on one thread.
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import time

os.environ.setdefault("OMP_NUM_THREADS", "1")


def make_images(folder: str, count: int, size: int = 96) -> list[str]:
    """Invented part photos: a gradient with a bright disc whose place depends on the index."""
    import numpy as np
    from PIL import Image

    paths = []
    yy, xx = np.mgrid[0:size, 0:size]
    for i in range(count):
        cx, cy = (17 * i) % size, (29 * i) % size
        disc = ((xx - cx) ** 2 + (yy - cy) ** 2 < (size // 6) ** 2) * 120
        rgb = np.stack([(xx + i) % 256, (yy * 2) % 256, disc], axis=-1).astype(np.uint8)
        path = os.path.join(folder, f"part_{i:04d}.jpg")
        Image.fromarray(rgb).save(path, quality=90)
        paths.append(path)
    return paths


def build_dataset(paths: list[str], augment_rounds: int, augment_ids: bool = False):
    import numpy as np
    import torch
    from PIL import Image, ImageFilter

    import pipeprobe

    @pipeprobe.stage("decode")
    def decode(i: int) -> Image.Image:  # an int first argument: recorded as the sample id
        with Image.open(paths[i]) as im:
            return im.convert("RGB")

    @pipeprobe.stage("augment")
    def augment(i: int | None, img: Image.Image) -> Image.Image:  # i=None: no sample id recorded
        for _ in range(augment_rounds):  # the costly part: blur and rotate, repeated
            img = img.filter(ImageFilter.GaussianBlur(1.5)).rotate(7)
        return img

    class Parts(torch.utils.data.Dataset):
        def __len__(self) -> int:
            return len(paths)

        def __getitem__(self, i: int):
            img = augment(i if augment_ids else None, decode(i))  # without an id augment takes fetch's
            x = torch.from_numpy(np.asarray(img, dtype=np.float32).copy()).permute(2, 0, 1) / 255.0
            return x, i % 4

    return Parts()


def train(paths: list[str], out: str, augment_rounds: int, epochs: int, augment_ids: bool = False) -> float:
    import torch

    import pipeprobe

    torch.manual_seed(0)
    torch.set_num_threads(1)
    loader = torch.utils.data.DataLoader(build_dataset(paths, augment_rounds, augment_ids), batch_size=16, num_workers=2)
    model = torch.nn.Sequential(torch.nn.Conv2d(3, 8, 3, padding=1), torch.nn.ReLU(), torch.nn.MaxPool2d(4),
                                torch.nn.Flatten(), torch.nn.Linear(8 * 24 * 24, 4))
    opt = torch.optim.SGD(model.parameters(), lr=0.01)
    t0 = time.perf_counter()
    with pipeprobe.Probe(out, report=False) as probe:
        for _ in range(epochs):
            for x, y in probe.watch(loader):
                with probe.step():
                    opt.zero_grad()
                    torch.nn.functional.cross_entropy(model(x), y).backward()
                    opt.step()
    return time.perf_counter() - t0


def flatten_speed(fetches: int) -> None:
    import numpy as np

    from pipeprobe.nesting import flatten_spans

    t = np.arange(fetches) * 10.0
    start, end = np.concatenate([t, t + 1, t + 5]), np.concatenate([t + 10, t + 4, t + 9])
    thread = np.tile(np.arange(fetches) % 8, 3)
    took, base = [], []
    for _ in range(3):
        t0 = time.perf_counter()
        flat = flatten_spans(start, end, thread)
        took.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        np.lexsort((-end, start, thread))
        base.append(time.perf_counter() - t0)
    med, ref = statistics.median(took), statistics.median(base)
    print(f"flatten_spans: {len(start)} spans -> {len(flat.span)} pieces in {med:.2f} s "
          f"({1e6 * med / len(start):.2f} us per span; {med / ref:.1f}x one lexsort of the spans)")
    # crossing spans (a stage held open across a yield, into the next fetch): the exact sweep, one thread
    start, end = np.concatenate([t, t + 5]), np.concatenate([t + 10, t + 12])
    t0 = time.perf_counter()
    flat = flatten_spans(start, end, np.zeros(len(start), np.int64))
    took_s = time.perf_counter() - t0
    print(f"flatten_spans, crossing spans on one thread: {len(start)} spans in {took_s:.2f} s "
          f"({1e6 * took_s / len(start):.2f} us per span)")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--images", type=int, default=320)
    ap.add_argument("--epochs", type=int, default=2)
    ap.add_argument("--rounds", type=int, default=8, help="augment repetitions of the base job")
    ap.add_argument("--repeats", type=int, default=2)
    ap.add_argument("--augment-ids", action="store_true", help="augment records the sample id too")
    ap.add_argument("--flatten", type=int, default=0, help="only time the nesting sweep on this many fetch spans")
    args = ap.parse_args()
    if args.flatten:
        flatten_speed(args.flatten)
        return

    import pipeprobe
    from pipeprobe.whatif import whatif

    work = tempfile.mkdtemp(prefix="pp-nested-")
    paths = make_images(work, args.images)
    base, half = [], []
    for r in range(args.repeats):  # alternate, so drift in the machine's load hits both alike
        base.append(os.path.join(work, f"base{r}"))
        train(paths, base[-1], args.rounds, args.epochs, args.augment_ids)
        half.append(os.path.join(work, f"half{r}"))
        train(paths, half[-1], args.rounds // 2, args.epochs, args.augment_ids)
    runs = [pipeprobe.load(d) for d in base]
    measured = statistics.median(r.wall_s for r in runs)
    replayed = statistics.median(whatif(r).baseline_replay_wall_s for r in runs)
    predicted = statistics.median(whatif(r, faster={"augment": 2}).predicted_wall_s for r in runs)
    rerun = statistics.median(pipeprobe.load(d).wall_s for d in half)
    a = pipeprobe.analyze(runs[0])
    shares = a.stage_shares()
    print(f"machine: {os.cpu_count()} cores, load average {os.getloadavg()[0]:.1f}; medians of {args.repeats}")
    print(f"measured wall            {measured:8.2f} s")
    print(f"replayed unchanged       {replayed:8.2f} s  ({replayed / measured:.2f} of measured)")
    top = ", ".join(f"{k} {100 * v:.0f} %" for k, v in sorted(shares.items(), key=lambda kv: -kv[1])[:5])
    print(f"critical path            {top}")
    print(f"faster augment=2         predicted {measured / predicted:.2f}x ({predicted:.2f} s); "
          f"rerun with half the augment work {measured / rerun:.2f}x ({rerun:.2f} s)")
    print(f"each run (s)             base {', '.join(f'{r.wall_s:.2f}' for r in runs)}; "
          f"half augment {', '.join(f'{pipeprobe.load(d).wall_s:.2f}' for d in half)}")
    print(f"first action             {a.actions[0].text if a.actions else '-'}")
    print(f"traces under {work}", file=sys.stderr)


if __name__ == "__main__":
    main()
