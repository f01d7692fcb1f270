"""An unmodified torch training script for ``pipeprobe run`` tests (knows nothing of pipeprobe).

usage: _plain_train.py KIND WORKERS EPOCHS OUT_JSON [--fail-at N] [--exit N] [--forever]

KIND is ``map`` or ``iter`` (map-style or iterable-style dataset). The
script measures its own time in ``next(loader)`` for every batch it takes
and writes ``{"batches": ..., "next_s": ..., "val_batches": ...}`` to
OUT_JSON, prints ``trained N batches`` on stdout and a note on stderr.
"""

import argparse
import json
import sys
import time

import torch
from torch.utils.data import DataLoader, Dataset, IterableDataset

ITEM_S = 0.003
STEP_S = 0.002


class SquareDigits(Dataset):
    def __len__(self):
        return 48

    def __getitem__(self, i):
        time.sleep(ITEM_S)
        return torch.full((4,), float(i)), torch.tensor([float(i % 7)])


class StreamDigits(IterableDataset):
    def __iter__(self):
        info = torch.utils.data.get_worker_info()
        w, n = (info.id, info.num_workers) if info is not None else (0, 1)
        for i in range(w, 48, n):
            time.sleep(ITEM_S)
            yield torch.full((4,), float(i)), torch.tensor([float(i % 7)])


class CheckDigits(SquareDigits):
    def __len__(self):
        return 8


def main() -> int:
    p = argparse.ArgumentParser()
    p.add_argument("kind", choices=["map", "iter"])
    p.add_argument("workers", type=int)
    p.add_argument("epochs", type=int)
    p.add_argument("out")
    p.add_argument("--fail-at", type=int, default=-1)
    p.add_argument("--exit", type=int, default=None)
    p.add_argument("--forever", action="store_true")
    a = p.parse_args()
    torch.manual_seed(0)
    torch.set_num_threads(1)
    data = SquareDigits() if a.kind == "map" else StreamDigits()
    train = DataLoader(data, batch_size=4, shuffle=a.kind == "map", num_workers=a.workers)
    val = DataLoader(CheckDigits(), batch_size=4)
    model = torch.nn.Linear(4, 1)
    opt = torch.optim.SGD(model.parameters(), lr=1e-4)
    taken, next_s, val_batches = 0, 0.0, 0
    epoch = 0
    while epoch < a.epochs or a.forever:
        it = iter(train)
        while True:
            t0 = time.perf_counter()
            try:
                x, y = next(it)
            except StopIteration:
                break
            next_s += time.perf_counter() - t0
            taken += 1
            if taken == a.fail_at:
                raise RuntimeError(f"loss went NaN at batch {taken}")
            if taken == 2 and a.forever:
                print("training", flush=True)
            loss = (model(x) - y).pow(2).mean()
            opt.zero_grad()
            loss.backward()
            opt.step()
            time.sleep(STEP_S)
        with torch.no_grad():
            for x, _ in val:
                model(x)
                val_batches += 1
        epoch += 1
    with open(a.out, "w") as f:
        json.dump({"batches": taken, "next_s": next_s, "val_batches": val_batches}, f)
    print(f"trained {taken} batches")
    print("note: done", file=sys.stderr)
    return a.exit if a.exit is not None else 0


if __name__ == "__main__":
    sys.exit(main())
