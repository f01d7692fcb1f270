"""An unmodified pytorch-lightning script for ``pipeprobe run`` tests (knows nothing of pipeprobe).

usage: _lightning_train.py OUT_JSON

The Trainer owns the loop. The script measures its own time in
``next(loader)`` by wrapping its training loader's iterator, counts the
batches its ``training_step`` sees, and writes
``{"batches": ..., "next_batches": ..., "next_s": ...}`` to OUT_JSON.
"""

import json
import sys
import time

import pytorch_lightning as pl
import torch
from torch.utils.data import DataLoader, Dataset

ITEM_S = 0.003


class Squares(Dataset):
    def __len__(self):
        return 64

    def __getitem__(self, i):
        time.sleep(ITEM_S)
        return torch.full((4,), float(i)), torch.tensor([float(i % 5)])


class Holdout(Squares):
    def __len__(self):
        return 16


class _TimedIterator:
    def __init__(self, it, clock):
        self.it, self.clock = it, clock

    def __iter__(self):
        return self

    def __next__(self):
        t0 = time.perf_counter()
        item = next(self.it)  # StopIteration passes through, uncounted
        self.clock["next_s"] += time.perf_counter() - t0
        self.clock["next_batches"] += 1
        return item

    def __len__(self):
        return len(self.it)


CLOCK = {"next_s": 0.0, "next_batches": 0}


class TimedLoader(DataLoader):
    def __iter__(self):
        return _TimedIterator(super().__iter__(), CLOCK)


class Tiny(pl.LightningModule):
    def __init__(self):
        super().__init__()
        self.layer = torch.nn.Linear(4, 1)
        self.seen = 0

    def training_step(self, batch, batch_idx):
        self.seen += 1
        x, y = batch
        time.sleep(0.002)
        return (self.layer(x) - y).pow(2).mean()

    def validation_step(self, batch, batch_idx):
        x, y = batch
        return (self.layer(x) - y).pow(2).mean()

    def configure_optimizers(self):
        return torch.optim.SGD(self.parameters(), lr=1e-4)


def main() -> int:
    torch.set_num_threads(1)
    model = Tiny()
    train = TimedLoader(Squares(), batch_size=4, shuffle=True, num_workers=0)
    val = DataLoader(Holdout(), batch_size=4)
    trainer = pl.Trainer(max_epochs=2, accelerator="cpu", devices=1, logger=False, enable_checkpointing=False,
                         enable_progress_bar=False, enable_model_summary=False)
    trainer.fit(model, train, val)
    with open(sys.argv[1], "w") as f:
        json.dump({"batches": model.seen, **CLOCK}, f)
    return 0


if __name__ == "__main__":
    sys.exit(main())
