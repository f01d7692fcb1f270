"""Draw invented photos of machined parts for the demo's quality-control line.

Each photo shows one part (a bracket, flange, gear, hinge or bolt) in brushed
metal on a grainy workbench under uneven light, saved as a JPEG.  The grain
and the light gradient are there on purpose: they make the files cost real
work to decode, as camera photos do.

Most photos are small (160-320 px a side); one in every block of
``LARGE_EVERY`` photos is a large one (900-1400 px a side), so the set has a
heavy tail of slow-to-decode files, which is what the profiler should find.

Everything is drawn from ``numpy.random.default_rng((seed, index))``, so a
photo depends only on the seed and its own index: the first ``n`` photos of a
larger set are the same as a set of ``n``.
"""

from __future__ import annotations

import csv
import math
from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw, ImageFilter

__all__ = [
    "PART_CLASSES",
    "LARGE_EVERY",
    "LABELS_FILE",
    "draw_part_photo",
    "generate_images",
    "read_labels",
]

PART_CLASSES: tuple[str, ...] = ("bracket", "flange", "gear", "hinge", "bolt")
"""Class names, in label order: label ``k`` is ``PART_CLASSES[k]``."""

LARGE_EVERY = 20
"""One photo in each block of this many consecutive indices is large (5 %)."""

LABELS_FILE = "labels.csv"
"""Name of the file listing ``file,label`` rows next to the photos."""

SMALL_SIDE_PX = (160, 320)
LARGE_SIDE_PX = (900, 1400)
JPEG_QUALITY = 82

_Point = tuple[float, float]


def _is_large(index: int, seed: int) -> bool:
    """Tell whether photo ``index`` is the large one of its block.

    The large photo of block ``b`` shows class ``b % len(PART_CLASSES)``, so
    photo size says nothing about the class over a few blocks.
    """
    block, offset = divmod(index, LARGE_EVERY)
    classes = len(PART_CLASSES)
    pick = int(np.random.default_rng((seed, block, 7)).integers(LARGE_EVERY // classes))
    return offset == pick * classes + block % classes


def _transform(points: list[_Point], centre: _Point, scale: float, angle: float) -> list[_Point]:
    """Scale, rotate and move unit-square points onto the canvas."""
    cos_a, sin_a = math.cos(angle), math.sin(angle)
    cx, cy = centre
    return [
        (cx + scale * (x * cos_a - y * sin_a), cy + scale * (x * sin_a + y * cos_a))
        for x, y in points
    ]


def _circle(centre: _Point, radius: float) -> list[float]:
    """Bounding box of a circle, for ``ImageDraw.ellipse``."""
    cx, cy = centre
    return [cx - radius, cy - radius, cx + radius, cy + radius]


def _draw_gear(draw: ImageDraw.ImageDraw, place: dict, rng: np.random.Generator) -> None:
    """A toothed wheel with a bore and a key slot."""
    teeth = int(rng.integers(10, 19))
    outer, root = 0.46, 0.38
    points: list[_Point] = []
    for k in range(teeth):
        base = 2 * math.pi * k / teeth
        step = 2 * math.pi / teeth
        for frac, radius in ((0.0, root), (0.2, outer), (0.5, outer), (0.7, root)):
            a = base + frac * step
            points.append((radius * math.cos(a), radius * math.sin(a)))
    draw.polygon(_transform(points, **place), fill=255)
    centre, scale = place["centre"], place["scale"]
    draw.ellipse(_circle(centre, 0.12 * scale), fill=0)
    slot = [(-0.03, -0.16), (0.03, -0.16), (0.03, -0.10), (-0.03, -0.10)]
    draw.polygon(_transform(slot, **place), fill=0)


def _draw_flange(draw: ImageDraw.ImageDraw, place: dict, rng: np.random.Generator) -> None:
    """A ring with a ring of bolt holes."""
    centre, scale, angle = place["centre"], place["scale"], place["angle"]
    draw.ellipse(_circle(centre, 0.46 * scale), fill=255)
    draw.ellipse(_circle(centre, float(rng.uniform(0.16, 0.22)) * scale), fill=0)
    holes = int(rng.integers(4, 9))
    for k in range(holes):
        a = angle + 2 * math.pi * k / holes
        hole = (centre[0] + 0.34 * scale * math.cos(a), centre[1] + 0.34 * scale * math.sin(a))
        draw.ellipse(_circle(hole, 0.045 * scale), fill=0)


def _draw_bracket(draw: ImageDraw.ImageDraw, place: dict, rng: np.random.Generator) -> None:
    """An L-shaped angle plate with two mounting holes."""
    arm = float(rng.uniform(0.14, 0.22))
    outline = [(-0.42, -0.42), (-0.42 + arm, -0.42), (-0.42 + arm, 0.42 - arm),
               (0.42, 0.42 - arm), (0.42, 0.42), (-0.42, 0.42)]
    draw.polygon(_transform(outline, **place), fill=255)
    for hole in ((-0.42 + arm / 2, -0.2), (0.2, 0.42 - arm / 2)):
        [(hx, hy)] = _transform([hole], **place)
        draw.ellipse(_circle((hx, hy), 0.3 * arm * place["scale"]), fill=0)


def _draw_hinge(draw: ImageDraw.ImageDraw, place: dict, rng: np.random.Generator) -> None:
    """Two leaves joined by a knuckle, each leaf with screw holes."""
    gap = 0.02
    knuckles = int(rng.integers(3, 6))
    for side in (-1, 1):
        x0, x1 = sorted((side * 0.05, side * 0.42))
        leaf = [(x0, -0.4), (x1, -0.4), (x1, 0.4), (x0, 0.4)]
        draw.polygon(_transform(leaf, **place), fill=255)
        for hy in (-0.22, 0.0, 0.22):
            [(hx, hy2)] = _transform([(side * 0.26, hy)], **place)
            draw.ellipse(_circle((hx, hy2), 0.04 * place["scale"]), fill=0)
    height = 0.8 / knuckles
    for k in range(knuckles):
        y0 = -0.4 + k * height + gap
        y1 = y0 + height - 2 * gap
        knuckle = [(-0.06, y0), (0.06, y0), (0.06, y1), (-0.06, y1)]
        draw.polygon(_transform(knuckle, **place), fill=255)


def _draw_bolt(draw: ImageDraw.ImageDraw, place: dict, rng: np.random.Generator) -> None:
    """A hexagon head on a threaded shank."""
    head = [(-0.42 + 0.12 * math.cos(a), 0.12 * math.sin(a))
            for a in np.linspace(0, 2 * math.pi, 7)[:-1] + math.pi / 6]
    head = [(x * 1.0, y * 1.6) for x, y in head]
    draw.polygon(_transform(head, **place), fill=255)
    length = float(rng.uniform(0.55, 0.75))
    shank = [(-0.32, -0.09), (-0.32 + length, -0.09), (-0.32 + length, 0.09), (-0.32, 0.09)]
    draw.polygon(_transform(shank, **place), fill=255)
    threads = int((length - 0.14) / 0.04)
    for k in range(threads):
        x = -0.2 + k * 0.04
        line = _transform([(x, -0.09), (x + 0.02, 0.09)], **place)
        draw.line(line, fill=150, width=max(1, int(place["scale"] * 0.008)))


_DRAWERS = {
    "bracket": _draw_bracket,
    "flange": _draw_flange,
    "gear": _draw_gear,
    "hinge": _draw_hinge,
    "bolt": _draw_bolt,
}


def _smooth_noise(rng: np.random.Generator, height: int, width: int, cell_px: int) -> np.ndarray:
    """Blotchy noise in [-1, 1]: a coarse random grid scaled up bilinearly."""
    rows = max(2, height // cell_px + 2)
    cols = max(2, width // cell_px + 2)
    coarse = rng.uniform(0, 255, size=(rows, cols)).astype(np.uint8)
    fine = Image.fromarray(coarse).resize((width, height), Image.Resampling.BILINEAR)
    return np.asarray(fine, dtype=np.float32) / 127.5 - 1.0


def _light(rng: np.random.Generator, height: int, width: int) -> np.ndarray:
    """A linear light gradient in a random direction, from about 0.6 to 1.1."""
    angle = rng.uniform(0, 2 * math.pi)
    ys, xs = np.mgrid[0:height, 0:width].astype(np.float32)
    ramp = (xs / width - 0.5) * math.cos(angle) + (ys / height - 0.5) * math.sin(angle)
    return (0.85 + 0.5 * ramp).astype(np.float32)


def draw_part_photo(part: str, side_px: tuple[int, int], rng: np.random.Generator) -> Image.Image:
    """Draw one photo of a part on a workbench.

    Parameters
    ----------
    part : str
        One of :data:`PART_CLASSES`.
    side_px : tuple of int
        ``(width, height)`` of the photo in pixels.
    rng : numpy.random.Generator
        Source of every random choice (pose, finish, grain, light).

    Returns
    -------
    PIL.Image.Image
        An RGB image.

    Raises
    ------
    ValueError
        If ``part`` is not a known class.

    Examples
    --------
    >>> import numpy as np
    >>> draw_part_photo("gear", (200, 180), np.random.default_rng(0)).size
    (200, 180)
    """
    if part not in _DRAWERS:
        message = f"unknown part {part!r}; expected one of {', '.join(PART_CLASSES)}"
        raise ValueError(message)
    width, height = side_px
    short = min(width, height)

    # Workbench: a tinted base, blotches and fine grain, lit unevenly.
    bench_rgb = rng.uniform(60, 130, size=3).astype(np.float32)
    blotch = _smooth_noise(rng, height, width, cell_px=max(8, short // 10))
    grain = rng.normal(0.0, 1.0, size=(height, width)).astype(np.float32)
    light = _light(rng, height, width)
    bench = bench_rgb * (1.0 + 0.18 * blotch[..., None]) + 9.0 * grain[..., None]

    # The part: a white-on-black mask drawn at a random pose.
    place = {
        "centre": (width * rng.uniform(0.4, 0.6), height * rng.uniform(0.4, 0.6)),
        "scale": short * rng.uniform(0.7, 0.95),
        "angle": rng.uniform(0, 2 * math.pi),
    }
    mask_image = Image.new("L", (width, height), 0)
    _DRAWERS[part](ImageDraw.Draw(mask_image), place, rng)
    shadow_px = max(2, short // 40)
    shadow = mask_image.filter(ImageFilter.GaussianBlur(shadow_px))
    shadow_arr = np.roll(np.asarray(shadow, dtype=np.float32) / 255.0, (shadow_px, shadow_px), (0, 1))
    mask = np.asarray(mask_image.filter(ImageFilter.GaussianBlur(0.8)), dtype=np.float32) / 255.0

    # Brushed metal: streaks along one direction plus a soft sheen.
    metal_rgb = rng.uniform(150, 215) + rng.uniform(-12, 12, size=3)
    streaks = rng.normal(0.0, 1.0, size=(1, width)).astype(np.float32)
    streaks = np.repeat(streaks, height, axis=0)
    sheen = _smooth_noise(rng, height, width, cell_px=max(16, short // 3))
    metal = metal_rgb * (1.0 + 0.12 * sheen[..., None]) + 7.0 * streaks[..., None]
    metal += 5.0 * grain[..., None]

    scene = bench * (1.0 - 0.45 * shadow_arr[..., None])
    scene = scene * (1.0 - mask[..., None]) + metal * mask[..., None]
    scene *= light[..., None]
    pixels = np.clip(scene, 0, 255).astype(np.uint8)
    return Image.fromarray(pixels, mode="RGB")


def _photo_size(index: int, seed: int, rng: np.random.Generator) -> tuple[int, int]:
    """Pick ``(width, height)`` for photo ``index``: small, or large for the tail."""
    low, high = LARGE_SIDE_PX if _is_large(index, seed) else SMALL_SIDE_PX
    width, height = rng.integers(low, high + 1, size=2)
    return int(width), int(height)


def generate_images(out_dir: str | Path, count: int, seed: int = 0) -> list[Path]:
    """Write ``count`` part photos and a ``labels.csv`` into ``out_dir``.

    Photo ``i`` shows part ``PART_CLASSES[i % len(PART_CLASSES)]`` and is named
    ``<class>_<i:04d>.jpg``.  ``labels.csv`` has a ``file,label`` header and one
    row per photo, ``label`` being the class name.

    Parameters
    ----------
    out_dir : str or pathlib.Path
        Folder to write into; created if missing.  Existing files with the
        same names are overwritten.
    count : int
        Number of photos, at least 0.
    seed : int, optional
        Seed of the whole set.  The same seed gives byte-identical files with
        the same Pillow build.

    Returns
    -------
    list of pathlib.Path
        The photo paths, in index order.

    Raises
    ------
    ValueError
        If ``count`` is negative.

    Examples
    --------
    >>> import tempfile
    >>> paths = generate_images(tempfile.mkdtemp(), 3, seed=1)
    >>> [p.name for p in paths]
    ['bracket_0000.jpg', 'flange_0001.jpg', 'gear_0002.jpg']
    """
    if count < 0:
        message = f"count must be at least 0, got {count}"
        raise ValueError(message)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    paths: list[Path] = []
    rows: list[tuple[str, str]] = []
    for index in range(count):
        part = PART_CLASSES[index % len(PART_CLASSES)]
        rng = np.random.default_rng((seed, index))
        photo = draw_part_photo(part, _photo_size(index, seed, rng), rng)
        path = out / f"{part}_{index:04d}.jpg"
        photo.save(path, format="JPEG", quality=JPEG_QUALITY)
        paths.append(path)
        rows.append((path.name, part))
    with open(out / LABELS_FILE, "w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle, lineterminator="\n")
        writer.writerow(("file", "label"))
        writer.writerows(rows)
    return paths


def read_labels(folder: str | Path) -> tuple[list[Path], list[int]]:
    """Read a photo folder's ``labels.csv``.

    Parameters
    ----------
    folder : str or pathlib.Path
        A folder written by :func:`generate_images`.

    Returns
    -------
    files : list of pathlib.Path
        Photo paths, in the order of the file.
    labels : list of int
        Class index of each photo in :data:`PART_CLASSES`.

    Raises
    ------
    ValueError
        If a row names a class that is not in :data:`PART_CLASSES`.
    FileNotFoundError
        If the folder has no ``labels.csv``.
    """
    root = Path(folder)
    files: list[Path] = []
    labels: list[int] = []
    with open(root / LABELS_FILE, newline="", encoding="utf-8") as handle:
        for row in csv.DictReader(handle):
            if row["label"] not in PART_CLASSES:
                message = f"{root / LABELS_FILE}: unknown label {row['label']!r} for {row['file']}"
                raise ValueError(message)
            files.append(root / row["file"])
            labels.append(PART_CLASSES.index(row["label"]))
    return files, labels
