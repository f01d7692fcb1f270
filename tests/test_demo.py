"""Tests of the bundled demo: photos, pipeline stages, loader, classifier and the recorded run."""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

import pipeprobe
from pipeprobe.demo import generate_images, run_demo
from pipeprobe.demo import sample as demo_sample
from pipeprobe.demo.images import LARGE_EVERY, PART_CLASSES, read_labels
from pipeprobe.demo.loader import PartsLoader
from pipeprobe.demo.model import MLP, pool_images
from pipeprobe.demo.pipeline import (
    AUGMENTS,
    BatchTask,
    augment_image,
    collate,
    decode_jpeg,
    load_batch,
    read_bytes,
    resize_square,
    sample_rng,
)

SMALL_SEED = 3
SMALL_COUNT = LARGE_EVERY  # one block: exactly one large photo
CHECKOUT_PARTS = Path(__file__).resolve().parents[1] / "demo_data" / "parts"


@pytest.fixture(scope="module")
def small_set(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A folder of 20 photos (one of them large) with labels.csv."""
    folder = tmp_path_factory.mktemp("parts")
    generate_images(folder, SMALL_COUNT, seed=SMALL_SEED)
    return folder


@pytest.fixture(scope="module")
def small_files(small_set: Path) -> tuple[list[Path], list[int]]:
    """Files and labels of the small set."""
    return read_labels(small_set)


def _side_px(path: Path) -> tuple[int, int]:
    with Image.open(path) as image:
        return image.size


class TestGenerateImages:
    def test_same_seed_gives_identical_bytes(self, small_set: Path, tmp_path: Path) -> None:
        """Regenerating with the same seed reproduces the photos byte for byte (and a prefix of a set is a set)."""
        again = generate_images(tmp_path, 4, seed=SMALL_SEED)
        expected = [(small_set / path.name).read_bytes() for path in again]
        assert expected == [path.read_bytes() for path in again]

    def test_other_seed_gives_other_photos(self, small_set: Path, tmp_path: Path) -> None:
        """A different seed draws different photos."""
        other = generate_images(tmp_path, 2, seed=SMALL_SEED + 1)
        assert [False, False] == [(small_set / p.name).read_bytes() == p.read_bytes() for p in other]

    def test_names_and_labels_follow_the_classes(self, small_set: Path) -> None:
        """Photo i is named <class>_<i>.jpg and labelled with its class, in labels.csv order."""
        with open(small_set / "labels.csv", newline="") as handle:
            rows = list(csv.reader(handle))
        expected = [["file", "label"]] + [
            [f"{PART_CLASSES[i % 5]}_{i:04d}.jpg", PART_CLASSES[i % 5]] for i in range(SMALL_COUNT)
        ]
        assert expected == rows

    def test_one_large_photo_per_block(self, small_files: tuple[list[Path], list[int]]) -> None:
        """A block of 20 photos has exactly one 900-1400 px photo; the rest are 160-320 px."""
        sides = [_side_px(path) for path in small_files[0]]
        large = [side for side in sides if min(side) >= 900]
        small = [side for side in sides if max(side) <= 320 and min(side) >= 160]
        assert (1, SMALL_COUNT - 1) == (len(large), len(small))
        assert all(max(side) <= 1400 for side in large)

    def test_large_photos_cost_more_to_decode(self, small_files: tuple[list[Path], list[int]]) -> None:
        """The heavy tail is in the files too: the large photo is several times the median file size."""
        sizes = sorted(path.stat().st_size for path in small_files[0])
        assert sizes[-1] > 5 * sizes[len(sizes) // 2]

    def test_negative_count_is_refused(self, tmp_path: Path) -> None:
        """A negative count raises ValueError rather than writing an empty set."""
        with pytest.raises(ValueError, match="count"):
            generate_images(tmp_path, -1)


class TestBundledSample:
    def test_checkout_sample_is_complete_and_small(self) -> None:
        """demo_data/parts lists 96 photos that all exist, about 5 % of them large, in at most 3 MB."""
        files, labels = read_labels(CHECKOUT_PARTS)
        sides = [_side_px(path) for path in files]
        size_bytes = sum(path.stat().st_size for path in files)
        assert (demo_sample.SAMPLE_COUNT, True, 5) == (
            len(files),
            size_bytes <= 3_000_000,
            sum(min(side) >= 900 for side in sides),
        )
        assert [i % 5 for i in range(len(files))] == labels

    def test_checkout_sample_matches_the_generator(self, tmp_path: Path) -> None:
        """The committed photos are the generator's: same names and sizes as a fresh draw."""
        fresh = generate_images(tmp_path, 5, seed=demo_sample.SAMPLE_SEED)
        assert [(p.name, _side_px(p)) for p in fresh] == [
            (p.name, _side_px(CHECKOUT_PARTS / p.name)) for p in fresh
        ]

    def test_demo_finds_the_checkout_sample(self) -> None:
        """From a checkout, the demo uses demo_data/parts."""
        assert CHECKOUT_PARTS == demo_sample.demo_parts_dir()

    def test_without_checkout_the_sample_is_drawn_once_into_the_cache(
        self, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
    ) -> None:
        """An installed package draws the set into $PIPEPROBE_CACHE/demo_parts once and reuses it."""
        monkeypatch.setattr(demo_sample, "_checkout_parts_dir", lambda: tmp_path / "no-checkout")
        monkeypatch.setattr(demo_sample, "SAMPLE_COUNT", 3)
        monkeypatch.setenv("PIPEPROBE_CACHE", str(tmp_path / "cache"))
        first = demo_sample.demo_parts_dir()

        def refuse(*args: object, **kwargs: object) -> None:
            raise AssertionError("the cached set was drawn again")

        monkeypatch.setattr(demo_sample, "generate_images", refuse)
        second = demo_sample.demo_parts_dir()
        assert (tmp_path / "cache" / "demo_parts", first, 3) == (second, second, len(read_labels(second)[0]))
        assert ["demo_parts"] == [p.name for p in (tmp_path / "cache").iterdir()]


class TestPipelineStages:
    def test_decode_gives_rgb_bytes_of_the_photo_size(self, small_files: tuple[list[Path], list[int]]) -> None:
        """decode_jpeg returns uint8 (height, width, 3)."""
        path = small_files[0][1]
        width, height = _side_px(path)
        image = decode_jpeg(read_bytes(path))
        assert ((height, width, 3), np.dtype(np.uint8)) == (image.shape, image.dtype)

    def test_resize_gives_a_square(self, small_files: tuple[list[Path], list[int]]) -> None:
        """resize_square returns uint8 (size, size, 3) whatever the photo's shape."""
        image = resize_square(decode_jpeg(read_bytes(small_files[0][0])), 40)
        assert ((40, 40, 3), np.dtype(np.uint8)) == (image.shape, image.dtype)

    @pytest.fixture
    def square(self, small_files: tuple[list[Path], list[int]]) -> np.ndarray:
        return resize_square(decode_jpeg(read_bytes(small_files[0][2])), 48)

    def test_no_augmentation_only_scales_to_unit_range(self, square: np.ndarray) -> None:
        """With augment=() the sample is the resized photo divided by 255, as float32."""
        out = augment_image(square, (), sample_rng(0, 0, 0))
        assert (np.dtype(np.float32), True) == (out.dtype, np.allclose(square / 255, out, rtol=0, atol=1e-7))

    @pytest.mark.parametrize("name", AUGMENTS)
    def test_each_augmentation_changes_the_sample(self, square: np.ndarray, name: str) -> None:
        """Each augmentation alone alters some of eight samples, keeping shape, dtype and [0, 1] range."""
        plain = augment_image(square, (), sample_rng(0, 0, 0))
        outs = [augment_image(square, (name,), sample_rng(0, 0, k)) for k in range(8)]
        changed = any(not np.array_equal(plain, out) for out in outs)
        in_range = all(out.min() >= 0.0 and out.max() <= 1.0 for out in outs)
        assert (True, True, {(48, 48, 3)}, {np.dtype(np.float32)}) == (
            changed,
            in_range,
            {out.shape for out in outs},
            {out.dtype for out in outs},
        )

    def test_dropping_an_augmentation_drops_its_effect(self, square: np.ndarray) -> None:
        """Without jitter the colours keep their 1/255 steps; with only jitter they do not."""
        no_jitter = augment_image(square, ("crop", "flip", "rotate"), sample_rng(0, 0, 1))
        jitter = augment_image(square, ("jitter",), sample_rng(0, 0, 1))
        on_grid = [np.allclose(out * 255, np.round(out * 255), atol=1e-3) for out in (no_jitter, jitter)]
        assert [True, False] == on_grid

    def test_augmentation_is_reproducible_per_seed_epoch_and_sample(self, square: np.ndarray) -> None:
        """The same (seed, epoch, sample id) gives the same sample; another epoch gives another."""
        first = augment_image(square, AUGMENTS, sample_rng(1, 2, 3))
        again = augment_image(square, AUGMENTS, sample_rng(1, 2, 3))
        later = augment_image(square, AUGMENTS, sample_rng(1, 3, 3))
        assert (True, False) == (np.array_equal(first, again), np.array_equal(first, later))

    def test_unknown_augmentation_is_refused(self, square: np.ndarray) -> None:
        """A misspelt augmentation raises ValueError instead of being skipped."""
        with pytest.raises(ValueError, match="blur"):
            augment_image(square, ("crop", "blur"), sample_rng(0, 0, 0))

    def test_collate_stacks_channels_first(self) -> None:
        """collate turns n (size, size, 3) samples into one contiguous float32 (n, 3, size, size) array."""
        rng = np.random.default_rng(0)
        samples = [rng.random((5, 5, 3), dtype=np.float32) for _ in range(4)]
        batch = collate(samples)
        assert ((4, 3, 5, 5), np.dtype(np.float32), True) == (batch.shape, batch.dtype, batch.flags.c_contiguous)
        assert np.array_equal(samples[2][..., 1], batch[2, 1])

    def test_load_batch_keeps_sample_order(self, small_files: tuple[list[Path], list[int]]) -> None:
        """load_batch returns images, int64 labels and sample ids in the task's order."""
        files, labels = small_files
        task = BatchTask(
            batch_id=7, epoch=0, sample_ids=(3, 1), paths=(str(files[3]), str(files[1])),
            labels=(labels[3], labels[1]), image_size=32, augment=(), seed=0,
        )
        batch = load_batch(task)
        alone = load_batch(BatchTask(7, 0, (1,), (str(files[1]),), (labels[1],), 32, (), 0))
        assert (7, (2, 3, 32, 32), [3, 1], [labels[3], labels[1]], np.dtype(np.int64)) == (
            batch.batch_id, batch.images.shape, batch.sample_ids, batch.labels.tolist(), batch.labels.dtype,
        )
        assert np.array_equal(alone.images[0], batch.images[1])


def _loader(files_labels: tuple[list[Path], list[int]], **options: object) -> PartsLoader:
    files, labels = files_labels
    settings: dict = {"batch_size": 4, "workers": 0, "prefetch": 2, "image_size": 32}
    settings.update(options)
    return PartsLoader(files, labels, **settings)


class TestPartsLoader:
    @pytest.mark.parametrize("workers", [0, 2])
    def test_batches_come_in_order_with_planned_samples(
        self, small_files: tuple[list[Path], list[int]], workers: int
    ) -> None:
        """Two epochs give batch ids 0..9 in order, each with the sample ids and labels the plan names."""
        with _loader(small_files, workers=workers) as loader:
            got = [(b.batch_id, b.sample_ids, b.labels.tolist()) for _ in range(2) for b in loader]
            plan = loader.plan_epoch(0) + loader.plan_epoch(1)
        assert [(t.batch_id, list(t.sample_ids), list(t.labels)) for t in plan] == got
        assert list(range(10)) == [batch_id for batch_id, _, _ in got]

    def test_sample_ids_name_file_and_epoch(self, small_files: tuple[list[Path], list[int]]) -> None:
        """Each epoch holds every file once; sample id = epoch * files + file index."""
        loader = _loader(small_files)
        epochs = [[i for t in loader.plan_epoch(e) for i in t.sample_ids] for e in range(2)]
        assert [list(range(0, 20)), list(range(20, 40))] == [sorted(ids) for ids in epochs]
        files = small_files[0]
        assert [str(files[i % 20]) for i in epochs[1][:4]] == list(loader.plan_epoch(1)[0].paths)

    def test_workers_load_what_the_consumer_would(self, small_files: tuple[list[Path], list[int]]) -> None:
        """Loading in worker processes gives bit-identical batches to loading inline."""
        with _loader(small_files, workers=0) as inline, _loader(small_files, workers=2) as pooled:
            pairs = list(zip(inline, pooled, strict=True))
        assert [True] * 5 == [np.array_equal(a.images, b.images) for a, b in pairs]

    def test_batches_limit_stops_mid_epoch(self, small_files: tuple[list[Path], list[int]]) -> None:
        """batches=7 gives 5 batches in the first epoch, 2 in the second, none after."""
        with _loader(small_files, batches=7) as loader:
            assert [5, 2, 0] == [len(list(loader)) for _ in range(3)]

    @pytest.mark.parametrize("prefetch", [1, 3])
    def test_prefetch_bounds_batches_in_flight(
        self, small_files: tuple[list[Path], list[int]], prefetch: int
    ) -> None:
        """At most `prefetch` batches are asked of the workers beyond those handed out, never past the epoch."""
        loader = _loader(small_files, workers=1, prefetch=prefetch)
        asked: list[int] = []
        start_pool = loader._ensure_pool

        class Counting:
            def apply_async(self, fn, args):  # noqa: ANN001, ANN202
                asked.append(args[0].batch_id)
                return start_pool().apply_async(fn, args)

        loader._ensure_pool = Counting  # type: ignore[method-assign]
        with loader:
            in_flight = [len(asked) - handed for handed, _ in enumerate(loader, start=1)]
        assert [min(prefetch, 5 - k) for k in range(1, 6)] == in_flight
        assert list(range(5)) == asked

    def test_worker_failure_reaches_the_consumer(self, small_files: tuple[list[Path], list[int]]) -> None:
        """A file that cannot be read raises in the training loop and the pool is stopped."""
        files, labels = small_files
        broken = [*files[:3], files[0].with_name("missing.jpg")]
        loader = PartsLoader(broken, labels[:4], batch_size=2, workers=2, prefetch=2, image_size=16, shuffle=False)
        with pytest.raises(FileNotFoundError):
            with loader:
                list(loader)
        assert None is loader._pool

    @pytest.mark.parametrize(
        ("options", "word"),
        [
            ({"batch_size": 0}, "batch_size"),
            ({"batch_size": 21}, "batch_size"),
            ({"workers": -1}, "workers"),
            ({"workers": 2, "prefetch": 0}, "prefetch"),
            ({"augment": ("crop", "smudge")}, "smudge"),
        ],
    )
    def test_bad_settings_are_refused(
        self, small_files: tuple[list[Path], list[int]], options: dict, word: str
    ) -> None:
        """Out-of-range settings raise ValueError naming the setting."""
        with pytest.raises(ValueError, match=word):
            _loader(small_files, **options)


class TestModel:
    def test_gradients_match_finite_differences(self) -> None:
        """Hand-written gradients agree with central finite differences (common practice) to 1e-6."""
        rng = np.random.default_rng(4)
        model = MLP((3, 4, 4), width=7, classes=5, input_pool=2, seed=1, dtype=np.float64)
        images = rng.random((6, 3, 4, 4))
        labels = rng.integers(0, 5, size=6)
        _, gradients = model.loss_and_gradients(images, labels)
        step = 1e-6
        worst = 0.0
        for name, param in model.params.items():
            for flat in rng.choice(param.size, size=min(param.size, 12), replace=False):
                index = np.unravel_index(flat, param.shape)
                saved = param[index]
                param[index] = saved + step
                up, _ = model.loss_and_gradients(images, labels)
                param[index] = saved - step
                down, _ = model.loss_and_gradients(images, labels)
                param[index] = saved
                numeric = (up - down) / (2 * step)
                written = gradients[name][index]
                worst = max(worst, abs(numeric - written) / max(1e-8, abs(numeric) + abs(written)))
        assert worst < 1e-6

    def test_loss_goes_down_on_a_fixed_batch(self, small_files: tuple[list[Path], list[int]]) -> None:
        """Thirty steps on one batch of photos lower its loss."""
        with _loader(small_files, batch_size=10, image_size=32, augment=()) as loader:
            batch = next(iter(loader))
        model = MLP((3, 32, 32), width=32, classes=5, seed=0)
        losses = [model.train_step(batch.images, batch.labels) for _ in range(31)]
        assert losses[-1] < 0.5 * losses[0]

    def test_pooling_averages_blocks(self) -> None:
        """pool_images averages factor x factor blocks, as a reshape-mean does."""
        images = np.random.default_rng(0).random((2, 3, 9, 8), dtype=np.float32)
        expected = images[:, :, :8, :8].reshape(2, 3, 4, 2, 4, 2).mean(axis=(3, 5))
        assert np.allclose(expected, pool_images(images, 2), atol=1e-6)

    def test_first_layer_grows_with_width(self) -> None:
        """The step's big product has inputs x width weights (so step time grows with width)."""
        shapes = [MLP((3, 96, 96), width=w, classes=5, input_pool=2).params["w1"].shape for w in (64, 256)]
        assert [(6912, 64), (6912, 256)] == shapes


class TestRunDemo:
    def test_recorded_run_links_worker_stages_to_batches(
        self, small_set: Path, tmp_path: Path
    ) -> None:
        """A recorded demo writes a run whose worker stages land on the batches that used their samples."""
        out = tmp_path / "run"
        result = run_demo(out=out, batches=6, workers=2, prefetch=2, image_size=32, batch_size=4,
                          data_dir=small_set, quiet=True)
        run = pipeprobe.load(result.run_dir)
        spans = run.spans
        decode = spans[spans["stage"] == "decode"]
        planned = {}
        loader = PartsLoader(*read_labels(small_set), batch_size=4, workers=0, image_size=32)
        for epoch in range(2):
            for task in loader.plan_epoch(epoch):
                planned.update({sample_id: task.batch_id for sample_id in task.sample_ids})
        linked = dict(zip(decode["sample_id"].astype(int), decode["batch_id"].astype(int), strict=True))
        assert (out, 6, list(range(6))) == (result.run_dir, len(result.losses), run.batches["batch_id"].tolist())
        assert {sid: planned[sid] for sid in linked} == linked
        assert 24 == len(decode)
        assert ["main", "worker", "worker"] == sorted(run.processes["role"].astype(str))
        assert list(range(6)) == sorted(spans.loc[spans["stage"] == "collate", "batch_id"].astype(int))

    def test_recording_does_not_change_training(self, small_set: Path, tmp_path: Path) -> None:
        """Recorded or not, in workers or inline, the demo computes the same losses."""
        options = {"batches": 6, "image_size": 32, "batch_size": 4, "width": 16, "data_dir": small_set, "quiet": True}
        recorded = run_demo(out=tmp_path / "a", workers=2, **options)
        bare = run_demo(record=False, workers=0, **options)
        assert (recorded.losses, None) == (bare.losses, bare.run_dir)

    def test_default_run_folder_is_new_and_timestamped(
        self, small_set: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
    ) -> None:
        """Without out=, each run gets its own demo-<time> folder under ./pipeprobe-runs."""
        monkeypatch.chdir(tmp_path)
        options = {"batches": 1, "workers": 0, "image_size": 16, "batch_size": 4, "data_dir": small_set, "quiet": True}
        first = run_demo(**options).run_dir
        second = run_demo(**options).run_dir
        assert ([tmp_path / "pipeprobe-runs"] * 2, True, True) == (
            [first.parent, second.parent],
            first != second and first.name.startswith("demo-") and second.name.startswith(first.name),
            (second / "run-r0.json").is_file(),
        )

    def test_quiet_prints_nothing(self, small_set: Path, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
        """quiet=True keeps the demo and the probe's report silent; the default prints a summary."""
        options = {"batches": 2, "workers": 0, "image_size": 16, "batch_size": 4, "data_dir": small_set}
        run_demo(out=tmp_path / "q", quiet=True, **options)
        quiet_out = capsys.readouterr().out
        run_demo(out=tmp_path / "l", **options)
        loud_out = capsys.readouterr().out
        assert ("", True) == (quiet_out, "2 steps in" in loud_out)

    @pytest.mark.slow
    def test_default_demo_learns(self) -> None:
        """Over the default 60-step demo on the bundled photos, the mean loss of the last 10 steps falls below the first 10."""
        result = run_demo(record=False, quiet=True)
        first, last = np.mean(result.losses[:10]), np.mean(result.losses[-10:])
        assert (60, True) == (len(result.losses), last < first - 0.2)
