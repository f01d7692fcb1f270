"""Real job (a): a map-style dataset of JPEG photos, PIL decode and augment timed by stage decorators.

The photos are shelf-label snapshots the bench invents at start (see
``bench/bench_real.py``); ``--data`` is their folder. ``__getitem__``
decodes one photo (``decode``) and augments it (``augment``: ``4 *
--cost`` rounds of a PIL rotation and smoothing; ``--remove augment``
leaves it out); a small convolutional net trains on the batches.

    python bench/realjobs/photos.py --data DIR [--workers N] [--prefetch K] [--persistent]
        [--epochs N] [--threads N] [--cost F] [--remove augment] [--record RUN_DIR]
"""

from __future__ import annotations

import os
import sys

import numpy as np
import torch
from PIL import Image, ImageFilter
from torch.utils.data import DataLoader, Dataset

import pipeprobe

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _loop import job_options, loader_options, set_threads, sgd_step, train  # noqa: E402

SIDE = 96
ROUNDS = 4


@pipeprobe.stage("decode")
def decode(sample_id: int, path: str) -> Image.Image:
    with Image.open(path) as img:
        return img.convert("RGB").resize((SIDE, SIDE), Image.BILINEAR)


@pipeprobe.stage("augment")
def augment(sample_id: int, img: Image.Image, rounds: int) -> Image.Image:
    for r in range(rounds):
        img = img.rotate(3 + (sample_id + r) % 5, resample=Image.BICUBIC).filter(ImageFilter.SMOOTH_MORE)
    return img


class ShelfPhotos(Dataset):
    def __init__(self, folder: str, rounds: int) -> None:
        self.files = sorted(os.path.join(folder, f) for f in os.listdir(folder) if f.endswith(".jpg"))
        self.rounds = rounds

    def __len__(self) -> int:
        return len(self.files)

    def __getitem__(self, i: int) -> tuple[torch.Tensor, int]:
        img = decode(i, self.files[i])
        if self.rounds:
            img = augment(i, img, self.rounds)
        x = torch.from_numpy(np.asarray(img, dtype=np.float32) / 255.0).permute(2, 0, 1)
        return x, i % 5


def main() -> None:
    args = job_options(__doc__.splitlines()[0]).parse_args()
    set_threads(args)
    torch.manual_seed(0)
    rounds = 0 if args.remove == "augment" else max(1, round(ROUNDS * args.cost))
    data = ShelfPhotos(args.data, rounds)
    loader = DataLoader(data, batch_size=16, shuffle=True, **loader_options(args))
    net = torch.nn.Sequential(torch.nn.Conv2d(3, 8, 5, stride=2), torch.nn.ReLU(), torch.nn.AdaptiveAvgPool2d(4),
                              torch.nn.Flatten(), torch.nn.Linear(128, 5))
    train(args, loader, sgd_step(net))


if __name__ == "__main__":
    main()
