"""The demo's input pipeline: read, decode, resize, augment and collate photos.

Every function here is module-level so that worker processes, forked or
spawned, can import and unpickle it.  :func:`load_sample` and
:func:`load_batch` wrap each stage in ``pipeprobe.stage`` so a probe sees
where the time goes; outside a probe those blocks cost next to nothing.

Stages, per sample unless noted:

``read``
    the file's bytes from disk;
``decode``
    JPEG bytes to an RGB ``uint8`` array;
``resize``
    to an ``image_size`` x ``image_size`` square;
``augment``
    to ``float32`` in [0, 1], then the chosen augmentations;
``collate`` (per batch)
    stack the samples into one ``float32`` array, channels first.
"""

from __future__ import annotations

import io
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from PIL import Image

import pipeprobe

__all__ = [
    "AUGMENTS",
    "Batch",
    "BatchTask",
    "read_bytes",
    "decode_jpeg",
    "resize_square",
    "augment_image",
    "collate",
    "sample_rng",
    "load_sample",
    "load_batch",
]

AUGMENTS: tuple[str, ...] = ("crop", "flip", "rotate", "jitter")
"""Augmentations :func:`augment_image` knows, in the order it applies them."""

_LUMA = np.array([0.299, 0.587, 0.114], dtype=np.float32)  # ITU-R BT.601 weights
_MAX_TILT_DEG = 12.0


@dataclass(frozen=True)
class BatchTask:
    """Everything a worker needs to load one batch.

    Attributes
    ----------
    batch_id : int
        Position of the batch in the run, counting from 0 across epochs.
    epoch : int
        Epoch the batch belongs to.
    sample_ids : tuple of int
        Id of each sample, unique within the run.
    paths : tuple of str
        Photo file of each sample.
    labels : tuple of int
        Class index of each sample.
    image_size : int
        Side of the square output images, in pixels.
    augment : tuple of str
        Augmentations to apply, a subset of :data:`AUGMENTS`.
    seed : int
        Seed of the run; with ``epoch`` and the sample id it fixes every
        random choice of the augmentations.
    """

    batch_id: int
    epoch: int
    sample_ids: tuple[int, ...]
    paths: tuple[str, ...]
    labels: tuple[int, ...]
    image_size: int
    augment: tuple[str, ...]
    seed: int


@dataclass
class Batch:
    """One loaded batch, ready for a training step.

    Attributes
    ----------
    batch_id : int
        Position of the batch in the run.
    images : numpy.ndarray
        ``float32`` array of shape ``(n, 3, image_size, image_size)``, values
        in [0, 1].
    labels : numpy.ndarray
        ``int64`` class indices, shape ``(n,)``.
    sample_ids : list of int
        Id of each sample, in the order of ``images``.
    """

    batch_id: int
    images: np.ndarray
    labels: np.ndarray
    sample_ids: list[int]


def read_bytes(path: str | Path) -> bytes:
    """Return the whole content of a file.

    Parameters
    ----------
    path : str or pathlib.Path
        File to read.

    Returns
    -------
    bytes
    """
    with open(path, "rb") as handle:
        return handle.read()


def decode_jpeg(data: bytes) -> np.ndarray:
    """Decode JPEG (or any Pillow-readable) bytes to an RGB array.

    Parameters
    ----------
    data : bytes
        The encoded image.

    Returns
    -------
    numpy.ndarray
        ``uint8`` array of shape ``(height, width, 3)``.
    """
    with Image.open(io.BytesIO(data)) as image:
        return np.asarray(image.convert("RGB"))


def resize_square(image: np.ndarray, image_size: int) -> np.ndarray:
    """Resize an RGB array to ``image_size`` x ``image_size`` pixels.

    The aspect ratio is not kept; the filter averages over the source pixels,
    so shrinking a large photo costs time in proportion to its area.

    Parameters
    ----------
    image : numpy.ndarray
        ``uint8`` array of shape ``(height, width, 3)``.
    image_size : int
        Side of the output, in pixels.

    Returns
    -------
    numpy.ndarray
        ``uint8`` array of shape ``(image_size, image_size, 3)``.
    """
    resized = Image.fromarray(image).resize((image_size, image_size), Image.Resampling.BILINEAR)
    return np.asarray(resized)


def sample_rng(seed: int, epoch: int, sample_id: int) -> np.random.Generator:
    """Return the random generator of one sample in one epoch.

    Parameters
    ----------
    seed : int
        Seed of the run.
    epoch : int
        Epoch number.
    sample_id : int
        Id of the sample.

    Returns
    -------
    numpy.random.Generator
        The same stream for the same three numbers, in any process.
    """
    return np.random.default_rng((seed, epoch, sample_id))


def _random_crop(image: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Shift the image by up to 1/8 of its side, filling with its mirror."""
    side = image.shape[0]
    pad = max(1, side // 8)
    padded = np.pad(image, ((pad, pad), (pad, pad), (0, 0)), mode="reflect")
    top, left = rng.integers(0, 2 * pad + 1, size=2)
    return padded[top:top + side, left:left + side]


def _rotate(image: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Turn by a random multiple of 90 degrees plus a small random tilt."""
    turned = np.ascontiguousarray(np.rot90(image, k=int(rng.integers(4))))
    tilt_deg = float(rng.uniform(-_MAX_TILT_DEG, _MAX_TILT_DEG))
    tilted = Image.fromarray(turned).rotate(tilt_deg, resample=Image.Resampling.BILINEAR)
    return np.asarray(tilted)


def _jitter(image: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Scale brightness, contrast and saturation by random factors in place."""
    brightness, contrast, saturation = rng.uniform(0.75, 1.25, size=3).astype(np.float32)
    image *= brightness
    mean = image.mean(dtype=np.float32)
    image -= mean
    image *= contrast
    image += mean
    grey = image @ _LUMA
    image -= grey[..., None]
    image *= saturation
    image += grey[..., None]
    np.clip(image, 0.0, 1.0, out=image)
    return image


def augment_image(image: np.ndarray, augment: Sequence[str], rng: np.random.Generator) -> np.ndarray:
    """Convert a square RGB array to ``float32`` and apply augmentations.

    Augmentations run in the order of :data:`AUGMENTS`, whatever the order of
    ``augment``; one that is not listed is skipped and draws nothing from
    ``rng``.

    ``crop``
        shift by up to 1/8 of the side, filling the edge with its mirror;
    ``flip``
        mirror left-right with probability 1/2;
    ``rotate``
        turn by 0, 90, 180 or 270 degrees, then tilt by up to 12 degrees;
    ``jitter``
        scale brightness, contrast (around the mean) and saturation
        (around the grey of each pixel) by factors in [0.75, 1.25].

    Parameters
    ----------
    image : numpy.ndarray
        ``uint8`` array of shape ``(size, size, 3)``.
    augment : sequence of str
        Names from :data:`AUGMENTS`.
    rng : numpy.random.Generator
        Source of the random choices (see :func:`sample_rng`).

    Returns
    -------
    numpy.ndarray
        ``float32`` array of shape ``(size, size, 3)``, values in [0, 1].

    Raises
    ------
    ValueError
        If ``augment`` names an unknown augmentation.
    """
    unknown = sorted(set(augment) - set(AUGMENTS))
    if unknown:
        message = f"unknown augmentation(s) {', '.join(unknown)}; known: {', '.join(AUGMENTS)}"
        raise ValueError(message)
    if "crop" in augment:
        image = _random_crop(image, rng)
    if "flip" in augment and rng.random() < 0.5:
        image = image[:, ::-1]
    if "rotate" in augment:
        image = _rotate(image, rng)
    scaled = image.astype(np.float32)
    scaled *= np.float32(1.0 / 255.0)
    if "jitter" in augment:
        scaled = _jitter(scaled, rng)
    return scaled


def collate(images: Sequence[np.ndarray]) -> np.ndarray:
    """Stack ``(size, size, 3)`` samples into one channels-first batch.

    Parameters
    ----------
    images : sequence of numpy.ndarray
        ``float32`` arrays of equal shape ``(size, size, 3)``.

    Returns
    -------
    numpy.ndarray
        C-contiguous ``float32`` array of shape ``(n, 3, size, size)``.
    """
    return np.ascontiguousarray(np.stack(images).transpose(0, 3, 1, 2), dtype=np.float32)


def load_sample(
    sample_id: int,
    path: str | Path,
    image_size: int,
    augment: Sequence[str],
    seed: int,
    epoch: int,
) -> np.ndarray:
    """Read, decode, resize and augment one photo, timing each stage.

    Parameters
    ----------
    sample_id : int
        Id of the sample; recorded with each stage and used to seed it.
    path : str or pathlib.Path
        Photo file.
    image_size : int
        Side of the output, in pixels.
    augment : sequence of str
        Names from :data:`AUGMENTS`.
    seed : int
        Seed of the run.
    epoch : int
        Epoch number.

    Returns
    -------
    numpy.ndarray
        ``float32`` array of shape ``(image_size, image_size, 3)``.
    """
    with pipeprobe.stage("read", sample=sample_id):
        data = read_bytes(path)
    with pipeprobe.stage("decode", sample=sample_id):
        image = decode_jpeg(data)
    with pipeprobe.stage("resize", sample=sample_id):
        image = resize_square(image, image_size)
    with pipeprobe.stage("augment", sample=sample_id):
        return augment_image(image, augment, sample_rng(seed, epoch, sample_id))


def load_batch(task: BatchTask) -> Batch:
    """Load every sample of a batch and collate them.

    This is what a loader worker runs; with no workers the consumer runs it.

    Parameters
    ----------
    task : BatchTask
        The batch to load.

    Returns
    -------
    Batch
        Images in the order of ``task.sample_ids``.
    """
    samples = [
        load_sample(sample_id, path, task.image_size, task.augment, task.seed, task.epoch)
        for sample_id, path in zip(task.sample_ids, task.paths, strict=True)
    ]
    with pipeprobe.stage("collate", batch=task.batch_id):
        images = collate(samples)
        labels = np.asarray(task.labels, dtype=np.int64)
    return Batch(batch_id=task.batch_id, images=images, labels=labels, sample_ids=list(task.sample_ids))
