"""Real job (c): a step heavy enough for torch's intra-op threads to matter, over a light in-memory loader.

The dataset holds invented 3x64x64 pallet-camera frames made from a fixed
seed at start; ``crop`` (48 ``* --cost`` rounds of a shifted crop, flip and pad) runs in the loader. The step is a convolutional net whose
``--threads`` (0: torch's default intra-op threads) is the point of
the job.

    python bench/realjobs/steps.py --data DIR [--workers N] [--prefetch K] [--persistent]
        [--epochs N] [--threads N] [--cost F] [--record RUN_DIR]
"""

from __future__ import annotations

import os
import sys

import torch
from torch.utils.data import DataLoader, Dataset

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _loop import job_options, loader_options, set_threads, sgd_step, train  # noqa: E402

import pipeprobe  # noqa: E402

FRAMES = 128
ROUNDS = 48


class PalletFrames(Dataset):
    def __init__(self, rounds: int) -> None:
        gen = torch.Generator().manual_seed(0)
        self.frames = torch.randint(0, 255, (FRAMES, 3, 72, 72), dtype=torch.uint8, generator=gen)
        self.rounds = rounds

    def __len__(self) -> int:
        return FRAMES

    def __getitem__(self, i: int) -> tuple[torch.Tensor, int]:
        with pipeprobe.stage("crop", sample=i):
            x = self.frames[i].float()
            for r in range(self.rounds):
                dx, dy = (i + r) % 8, (3 * i + r) % 8
                x = torch.flip(x[:, dy:dy + 64, dx:dx + 64], dims=(2,)).contiguous()
                x = torch.nn.functional.pad(x, (4, 4, 4, 4))
            x = x[:, 4:68, 4:68] / 255.0
        return x, i % 10


def main() -> None:
    args = job_options(__doc__.splitlines()[0]).parse_args()
    set_threads(args)
    torch.manual_seed(0)
    loader = DataLoader(PalletFrames(max(1, round(ROUNDS * args.cost))), batch_size=16, shuffle=True,
                        **loader_options(args))
    net = torch.nn.Sequential(torch.nn.Conv2d(3, 16, 3, padding=1), torch.nn.ReLU(), torch.nn.Conv2d(16, 16, 3),
                              torch.nn.ReLU(), torch.nn.AdaptiveAvgPool2d(2), torch.nn.Flatten(),
                              torch.nn.Linear(64, 10))
    train(args, loader, sgd_step(net))


if __name__ == "__main__":
    main()
