"""An unmodified torch training script whose batches are nearly always ready (knows nothing of pipeprobe).

usage: _ready_train.py OUT_JSON

Two loader workers make 4-sample batches of cheap items while the step
sleeps 3 ms, so the loop mostly finds its next batch waiting and the
stall is the loader's hand-over alone (a few hundred microseconds a
batch). The script reads ``time.monotonic_ns`` right before and right
after every ``next(loader)`` and writes the pairs to OUT_JSON as
``{"next_ns": [[t0, t1], ...]}``.
"""

import json
import sys
import time

import torch
from torch.utils.data import DataLoader, Dataset

STEP_S = 0.003


class ShelfCounts(Dataset):
    def __len__(self):
        return 240

    def __getitem__(self, i):
        return torch.full((64,), float(i)), i % 3


def main() -> int:
    torch.set_num_threads(1)
    loader = DataLoader(ShelfCounts(), batch_size=4, num_workers=2)
    stamps = []
    for _ in range(2):
        it = iter(loader)
        while True:
            t0 = time.monotonic_ns()
            try:
                x, y = next(it)
            except StopIteration:
                break
            stamps.append((t0, time.monotonic_ns()))
            time.sleep(STEP_S)
    with open(sys.argv[1], "w") as f:
        json.dump({"next_ns": stamps}, f)
    return 0


if __name__ == "__main__":
    sys.exit(main())
