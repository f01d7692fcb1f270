"""Zero-change recording of torch DataLoaders, thread pools and process pools."""

from __future__ import annotations

import multiprocessing as mp
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import pytest

import pipeprobe
from pipeprobe import stage

torch = pytest.importorskip("torch")
from torch.utils.data import DataLoader, Dataset, IterableDataset  # noqa: E402


class PartPhotos(Dataset):
    """Map-style: 24 photos of machined parts; decode is a decorated stage inside __getitem__."""

    def __init__(self, n: int = 24) -> None:
        self.n = n
        self.lens_id = "default"

    def __len__(self) -> int:
        return self.n

    def __getitem__(self, index: int):
        with stage("decode", sample=int(index)):
            time.sleep(0.0005)
        return torch.tensor([index])


class PartStream(IterableDataset):
    """Iterable-style: worker w of n yields photos w, w + n, ... of 24 (item k of worker w is photo k*n + w)."""

    def __iter__(self):
        info = torch.utils.data.get_worker_info()
        w, n = (info.id, info.num_workers) if info else (0, 1)
        for i in range(w, 24, n):
            yield torch.tensor([i])


def _record(loader, out: Path, epochs: int = 2, **probe_kwargs) -> tuple[pipeprobe.Run, list[list[int]]]:
    delivered = []
    with pipeprobe.Probe(out, report=False, sample_interval_s=0, **probe_kwargs) as probe:
        for _ in range(epochs):
            for batch in probe.watch(loader):
                delivered.append(sorted(batch.flatten().tolist()))
                with probe.step():
                    pass
    return pipeprobe.load(out), delivered


def _check_linked(run: pipeprobe.Run, epochs: int, samples: int, batches: int) -> None:
    sp = run.spans
    fetch, collate = sp[sp["stage"] == "fetch"], sp[sp["stage"] == "collate"]
    assert epochs * samples == len(fetch)
    assert epochs * batches == len(collate)
    membership = set(zip(run.samples["batch_id"], run.samples["sample_id"]))
    for part in (fetch, collate):
        assert (part["batch_id"] >= 0).all()
        assert all((b, s) in membership for b, s in zip(part["batch_id"], part["sample_id"]))


LOADERS = [
    pytest.param(0, None, id="in-process"),
    pytest.param(2, "fork", id="fork"),
    pytest.param(2, "spawn", id="spawn", marks=pytest.mark.slow),
]


class TestZeroChange:
    @pytest.mark.parametrize("workers,method", LOADERS)
    def test_map_dataset_fetch_and_collate_are_timed_and_linked(self, tmp_path: Path, workers, method) -> None:
        """watch(loader) alone times every item fetch and collate, each linked to the batch holding its sample."""
        loader = DataLoader(PartPhotos(), batch_size=4, shuffle=True, num_workers=workers,
                            multiprocessing_context=method)
        epochs = 1 if method == "spawn" else 2  # a spawned worker costs seconds to start
        run, delivered = _record(loader, tmp_path / "r", epochs=epochs)
        assert delivered == run.samples.groupby("batch_id")["sample_id"].apply(sorted).tolist()
        _check_linked(run, epochs=epochs, samples=24, batches=6)
        assert sum(([e] * 6 for e in range(epochs)), []) == run.batches["epoch"].tolist()

    @pytest.mark.parametrize("workers,method", LOADERS)
    def test_iterable_dataset_ids_follow_worker_order(self, tmp_path: Path, workers, method) -> None:
        """Iterable datasets: item k of worker w gets sample id k * num_workers + w (documented rule)."""
        loader = DataLoader(PartStream(), batch_size=4, num_workers=workers, multiprocessing_context=method)
        epochs = 1 if method == "spawn" else 2
        run, delivered = _record(loader, tmp_path / "r", epochs=epochs)
        # PartStream's item k of worker w is photo k * n + w, so the ids equal the photo numbers.
        assert delivered == run.samples.groupby("batch_id")["sample_id"].apply(sorted).tolist()
        _check_linked(run, epochs=epochs, samples=24, batches=6)

    def test_decorated_stage_nests_inside_fetch(self, tmp_path: Path) -> None:
        """A stage timed inside __getitem__ lies within its fetch span (same thread, same sample)."""
        loader = DataLoader(PartPhotos(8), batch_size=4, num_workers=2, multiprocessing_context="fork")
        run, _ = _record(loader, tmp_path / "r", epochs=1)
        sp = run.spans
        fetch = sp[sp["stage"] == "fetch"].set_index(["tid", "sample_id"])
        decode = sp[sp["stage"] == "decode"].set_index(["tid", "sample_id"])
        both = decode.join(fetch[["start_s", "end_s"]].add_suffix("_fetch"))
        assert 8 == len(both)
        assert (both["start_s_fetch"] <= both["start_s"]).all() and (both["end_s"] <= both["end_s_fetch"]).all()

    @pytest.mark.filterwarnings("ignore::UserWarning")
    def test_pin_memory_and_batched_fetch(self, tmp_path: Path) -> None:
        """pin_memory on, and a dataset with a batched __getitems__ (a Subset): one fetch span per batch."""
        subset = torch.utils.data.Subset(PartPhotos(), list(range(12)))
        loader = DataLoader(subset, batch_size=4, num_workers=0, pin_memory=True)
        run, delivered = _record(loader, tmp_path / "r", epochs=1)
        assert [[0, 1, 2, 3], [4, 5, 6, 7], [8, 9, 10, 11]] == delivered
        fetch = run.spans[run.spans["stage"] == "fetch"]
        assert [0, 4, 8] == fetch["sample_id"].tolist()
        assert [0, 1, 2] == fetch["batch_id"].tolist()

    def test_wrapping_is_invisible_to_the_user(self, tmp_path: Path) -> None:
        """Inside workers the dataset is still the user's class, its attributes can be set, and the loader is unchanged after."""
        seen = mp.get_context("fork").Queue()

        def init(worker_id: int) -> None:
            ds = torch.utils.data.get_worker_info().dataset
            ds.lens_id = f"lens-{worker_id}"
            seen.put((isinstance(ds, PartPhotos), ds.lens_id))

        data = PartPhotos(8)
        loader = DataLoader(data, batch_size=4, num_workers=2, worker_init_fn=init, multiprocessing_context="fork")
        _record(loader, tmp_path / "r", epochs=1)
        got = sorted(seen.get(timeout=10) for _ in range(2))
        assert [(True, "lens-0"), (True, "lens-1")] == got
        assert loader.dataset is data and loader.collate_fn is torch.utils.data.default_collate

    def test_user_exception_in_dataset_passes_through(self, tmp_path: Path) -> None:
        """An error raised by the dataset reaches the training loop unchanged; its fetch span is flagged."""

        class Broken(PartPhotos):
            def __getitem__(self, index: int):
                if index == 5:
                    raise KeyError("photo 5 unreadable")
                return super().__getitem__(index)

        loader = DataLoader(Broken(8), batch_size=4)
        with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0) as probe:
            with pytest.raises(KeyError, match="photo 5 unreadable"):
                for _ in probe.watch(loader):
                    pass
        fetch = pipeprobe.load(tmp_path / "r").spans.query("stage == 'fetch'")
        assert [5] == fetch[fetch["error"]]["sample_id"].tolist()


class TestPersistentWorkers:
    @pytest.mark.parametrize("method", ["fork", pytest.param("spawn", marks=pytest.mark.slow)])
    def test_close_collects_the_last_spans_of_live_workers(self, tmp_path: Path, method: str) -> None:
        """With persistent workers still alive, every span is on disk when close() returns (no 30 s flush wait)."""
        loader = DataLoader(PartPhotos(16), batch_size=4, num_workers=2, persistent_workers=True,
                            multiprocessing_context=method)
        run, delivered = _record(loader, tmp_path / "r", epochs=3, flush_interval_s=30.0)
        assert all(w.is_alive() for w in loader._iterator._workers)  # they outlived the probe
        assert 12 == len(delivered)
        _check_linked(run, epochs=3, samples=16, batches=4)
        assert 48 == len(run.spans[run.spans["stage"] == "decode"])
        assert not list((tmp_path / "r").glob("close-*.done"))
        loader._iterator._shutdown_workers()


def _inspect(sample_ids: list[int]) -> list[int]:
    """A loader task for a pool: decode each photo of the batch."""
    for sid in sample_ids:
        with stage("decode", sample=sid):
            time.sleep(0.001)
    return sample_ids


class TestPools:
    def test_thread_pool_links_samples_to_batches(self, tmp_path: Path) -> None:
        """concurrent.futures threads as a loader: spans link through samples=, one lane per thread."""
        chunks = [list(range(b * 4, b * 4 + 4)) for b in range(6)]
        with pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0) as probe:
            with ThreadPoolExecutor(2) as pool:
                for _ in probe.watch(pool.map(_inspect, chunks), samples=lambda b: b):
                    with probe.step():
                        pass
        run = pipeprobe.load(tmp_path / "r")
        decode = run.spans[run.spans["stage"] == "decode"]
        assert (decode["sample_id"] // 4).tolist() == decode["batch_id"].tolist()
        assert 24 == len(decode)

    @pytest.mark.parametrize("method", ["fork", pytest.param("spawn", marks=pytest.mark.slow)])
    def test_process_pool_open_at_close(self, tmp_path: Path, method: str) -> None:
        """A multiprocessing pool still open at close: its workers' spans are flushed and linked."""
        chunks = [list(range(b * 4, b * 4 + 4)) for b in range(6)]
        probe = pipeprobe.Probe(tmp_path / "r", report=False, sample_interval_s=0, flush_interval_s=30.0)
        pool = mp.get_context(method).Pool(2)  # started while recording, so its workers record
        try:
            for _ in probe.watch(pool.imap(_inspect, chunks), samples=lambda b: b):
                with probe.step():
                    pass
            probe.close()
            run = pipeprobe.load(tmp_path / "r")
        finally:
            probe.close()
            pool.terminate()
            pool.join()
        decode = run.spans[run.spans["stage"] == "decode"]
        assert list(range(24)) == sorted(decode["sample_id"])
        assert (decode["sample_id"] // 4).tolist() == decode["batch_id"].tolist()
