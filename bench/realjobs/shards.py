"""Real job (b): an iterable dataset over tar shards read with webdataset, split across loader workers.

The shards hold the bench's invented shelf-label photos (``NNNN.jpg`` and
``NNNN.cls`` per sample, written at bench start); ``--data`` is their
folder. webdataset lists the shards, hands each loader worker its own
(``split_by_worker``) and reads the tar members; the job decodes each
photo with PIL (``decode``) and augments it (``augment``: ``4 * --cost``
rounds; ``--remove augment`` leaves it out).

    python bench/realjobs/shards.py --data DIR [--workers N] [--prefetch K] [--persistent]
        [--epochs N] [--threads N] [--cost F] [--remove augment] [--record RUN_DIR]
"""

from __future__ import annotations

import io
import os
import sys

import numpy as np
import torch
import webdataset as wds
from PIL import Image
from torch.utils.data import DataLoader, IterableDataset

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _loop import job_options, loader_options, set_threads, sgd_step, train  # noqa: E402
from photos import ROUNDS, SIDE, augment  # noqa: E402

import pipeprobe  # noqa: E402


@pipeprobe.stage("decode")
def decode(sample_id: int, raw: bytes) -> Image.Image:
    with Image.open(io.BytesIO(raw)) as img:
        return img.convert("RGB").resize((SIDE, SIDE), Image.BILINEAR)


class ShelfShards(IterableDataset):
    """Samples of the tar shards in ``folder``, each worker reading its own shards."""

    def __init__(self, folder: str, rounds: int) -> None:
        self.shards = sorted(os.path.join(folder, f) for f in os.listdir(folder) if f.endswith(".tar"))
        self.rounds = rounds

    def __iter__(self):
        pipeline = wds.DataPipeline(wds.SimpleShardList(self.shards), wds.split_by_worker, wds.tarfile_to_samples())
        for sample in pipeline:
            i = int(sample["__key__"])
            img = decode(i, sample["jpg"])
            if self.rounds:
                img = augment(i, img, self.rounds)
            x = torch.from_numpy(np.asarray(img, dtype=np.float32) / 255.0).permute(2, 0, 1)
            yield x, int(sample["cls"])


def main() -> None:
    args = job_options(__doc__.splitlines()[0]).parse_args()
    set_threads(args)
    torch.manual_seed(0)
    rounds = 0 if args.remove == "augment" else max(1, round(ROUNDS * args.cost))
    loader = DataLoader(ShelfShards(args.data, rounds), batch_size=16, **loader_options(args))
    net = torch.nn.Sequential(torch.nn.Conv2d(3, 8, 5, stride=2), torch.nn.ReLU(), torch.nn.AdaptiveAvgPool2d(4),
                              torch.nn.Flatten(), torch.nn.Linear(128, 5))
    train(args, loader, sgd_step(net))


if __name__ == "__main__":
    main()
