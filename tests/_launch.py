"""Start the ranks of a small torch.distributed job as separate processes, like a launcher does."""

from __future__ import annotations

import os
import socket
import subprocess
import sys
from pathlib import Path

HERE = Path(__file__).parent


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def launch(script: str, args: list[str], world: int = 2, timeout_s: float = 80.0) -> list[str]:
    """Run ``script`` as ranks 0..world-1 with the launcher environment; return their outputs."""
    port = free_port()
    root = str(HERE.parent)
    procs = []
    for rank in range(world):
        env = dict(os.environ, MASTER_ADDR="127.0.0.1", MASTER_PORT=str(port), RANK=str(rank),
                   WORLD_SIZE=str(world), PYTHONPATH=root + os.pathsep + os.environ.get("PYTHONPATH", ""))
        procs.append(subprocess.Popen([sys.executable, str(HERE / script), *args], env=env, cwd=root,
                                      stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True))
    outs = []
    try:
        for p in procs:
            out, _ = p.communicate(timeout=timeout_s)
            outs.append(out)
            if p.returncode != 0:
                raise AssertionError(f"{script} rank failed ({p.returncode}):\n{out[-3000:]}")
    finally:
        for p in procs:
            if p.poll() is None:
                p.kill()
    return outs
