"""One rank of a 2-process gloo job that measures clock offsets, for tests.

``python _clock_job.py OUT SHIFT_S`` with MASTER_ADDR/MASTER_PORT/RANK/WORLD_SIZE set:
rank 1 reads a monotonic clock shifted by SHIFT_S seconds (a rank on another host);
writes the exchange result as JSON to OUT/clock-r<rank>.json.
"""

import json
import os
import sys
from time import monotonic_ns

import torch.distributed as dist

from pipeprobe.record import _clocksync


def main() -> None:
    out, shift_s = sys.argv[1], float(sys.argv[2])
    dist.init_process_group("gloo")
    rank = dist.get_rank()
    shift = int(shift_s * 1e9) if rank == 1 else 0
    result = _clocksync.exchange(dist, f"job-of-rank-{rank}", clock=lambda: monotonic_ns() + shift)
    with open(os.path.join(out, f"clock-r{rank}.json"), "w") as fh:
        json.dump(result, fh)
    dist.destroy_process_group()


if __name__ == "__main__":
    main()
