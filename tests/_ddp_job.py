"""One rank of a real data-parallel CPU training job (gloo, DistributedDataParallel), for tests.

Run as ``python _ddp_job.py OUT_DIR SLOW_RANK STEPS EXTRA_MS`` with the usual launcher
environment (MASTER_ADDR, MASTER_PORT, RANK, WORLD_SIZE). The scenario is ours: a
quality-control line classifying photos of machined parts, here 16-pixel stand-ins. Rank
SLOW_RANK's dataset decodes each photo EXTRA_MS slower. Each rank writes
``backward-r<rank>.txt``: the seconds its ``loss.backward()`` took per step, measured
outside pipeprobe (a rank's backward includes waiting for the gradient all-reduce).
"""

import os
import sys
import time

import torch
import torch.distributed as dist
from torch.nn.parallel import DistributedDataParallel
from torch.utils.data import DataLoader, Dataset

import pipeprobe


class PartPhotos(Dataset):
    def __init__(self, n: int, extra_s: float) -> None:
        self.n, self.extra_s = n, extra_s

    def __len__(self) -> int:
        return self.n

    @pipeprobe.stage("decode")
    def __getitem__(self, index: int):
        time.sleep(0.001 + self.extra_s)
        g = torch.Generator().manual_seed(index)
        return torch.rand(16, generator=g), index % 2


def main() -> None:
    out, slow, steps, extra_ms = sys.argv[1], int(sys.argv[2]), int(sys.argv[3]), float(sys.argv[4])
    torch.set_num_threads(1)
    dist.init_process_group("gloo")
    rank = dist.get_rank()
    torch.manual_seed(0)
    model = DistributedDataParallel(torch.nn.Sequential(torch.nn.Linear(16, 32), torch.nn.ReLU(), torch.nn.Linear(32, 2)))
    opt = torch.optim.SGD(model.parameters(), lr=0.01)
    data = PartPhotos(steps * 4, extra_ms / 1e3 if rank == slow else 0.0)
    loader = DataLoader(data, batch_size=4, num_workers=0)
    backward = []
    with pipeprobe.Probe(out, report=False, sample_interval_s=0) as probe:
        for x, y in probe.watch(loader):
            with probe.step():
                loss = torch.nn.functional.cross_entropy(model(x), y)
                opt.zero_grad()
                t = time.perf_counter()
                loss.backward()
                backward.append(time.perf_counter() - t)
                opt.step()
    with open(os.path.join(out, f"backward-r{rank}.txt"), "w") as fh:
        fh.write("\n".join(f"{b:.9f}" for b in backward))
    dist.destroy_process_group()


if __name__ == "__main__":
    main()
