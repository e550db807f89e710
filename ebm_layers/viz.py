"""Pictures: image grids of samples or weights as PNG files (no dependency), and training curves
(needs matplotlib, the ``plots`` extra)."""

from __future__ import annotations

import os
import struct
import zlib
from collections.abc import Mapping, Sequence
from pathlib import Path

import torch
from torch import Tensor

from ._checks import check_count, check_size

__all__ = ["image_grid", "save_image_grid", "save_training_plot"]

NORMALIZE = ("none", "each")


def image_grid(
    images: Tensor,
    image_shape: tuple[int, int],
    *,
    columns: int | None = None,
    padding: int = 1,
    normalize: str = "none",
) -> Tensor:
    """Tile ``images`` into one grey-level picture, row by row.

    Args:
        images: ``(N, h * w)`` or ``(N, h, w)``: samples, marginals, or weights (one filter per row,
            e.g. ``weight.T`` of a coupling from the visible layer).
        image_shape: ``(h, w)``.
        columns: images per row of the grid (default: about ``sqrt(N)``).
        padding: pixels between images (drawn mid-grey).
        normalize: ``"none"``: values are intensities in [0, 1] (clamped); ``"each"``: each image
            divided by its largest absolute value and mapped to [0, 1] with 0 at mid-grey (weights).

    Returns:
        ``(rows * (h + padding) + padding, columns * (w + padding) + padding)`` float32 in [0, 1].
    """
    if not (isinstance(image_shape, Sequence) and len(image_shape) == 2):
        raise ValueError(f"image_shape must be (height, width), got {image_shape!r}")
    height, width = (check_size("image_shape", side) for side in image_shape)
    if not isinstance(images, Tensor) or images.ndim not in (2, 3) or images.shape[0] == 0:
        shape = tuple(images.shape) if isinstance(images, Tensor) else type(images).__name__
        raise ValueError(f"images must be a non-empty (N, h * w) or (N, h, w) tensor, got {shape}")
    if images[0].numel() != height * width:
        raise ValueError(f"images of {images[0].numel()} values do not fit image_shape {tuple(image_shape)}")
    if normalize not in NORMALIZE:
        raise ValueError(f"normalize must be one of {NORMALIZE}, got {normalize!r}")
    padding = check_count("padding", padding)
    count = images.shape[0]
    columns = check_size("columns", columns) if columns is not None else max(1, round(count**0.5))
    rows = -(-count // columns)
    pictures = images.detach().to(torch.float32).reshape(count, height, width)
    if normalize == "each":
        scale = pictures.abs().amax(dim=(1, 2), keepdim=True).clamp_min(1e-12)
        pictures = 0.5 + 0.5 * pictures / scale
    grid = torch.full((rows * (height + padding) + padding, columns * (width + padding) + padding), 0.5)
    for k in range(count):
        top = padding + (k // columns) * (height + padding)
        left = padding + (k % columns) * (width + padding)
        grid[top : top + height, left : left + width] = pictures[k].clamp(0.0, 1.0)
    return grid


def save_image_grid(
    path: str | os.PathLike,
    images: Tensor,
    image_shape: tuple[int, int],
    *,
    columns: int | None = None,
    padding: int = 1,
    normalize: str = "none",
    scale: int = 4,
) -> Path:
    """Write :func:`image_grid` of ``images`` as an 8-bit grey PNG, each pixel drawn as a
    ``scale`` x ``scale`` block; creates missing folders and returns the path.

    Needs no plotting library. Other arguments as in :func:`image_grid`.
    """
    scale = check_size("scale", scale)
    grid = image_grid(images, image_shape, columns=columns, padding=padding, normalize=normalize)
    pixels = (grid * 255).round().to(torch.uint8).repeat_interleave(scale, 0).repeat_interleave(scale, 1)
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(_png(pixels))
    return path


def _png(pixels: Tensor) -> bytes:
    """An 8-bit greyscale PNG of ``pixels`` ``(H, W)`` uint8 (the format: ISO/IEC 15948:2004)."""
    height, width = pixels.shape

    def chunk(kind: bytes, data: bytes) -> bytes:
        return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))

    # Each scanline starts with filter type 0 (none).
    rows = torch.cat([torch.zeros(height, 1, dtype=torch.uint8), pixels], dim=1)
    header = struct.pack(">IIBBBBB", width, height, 8, 0, 0, 0, 0)  # 8 bits, grey, no interlace
    return b"".join(
        [
            b"\x89PNG\r\n\x1a\n",
            chunk(b"IHDR", header),
            chunk(b"IDAT", zlib.compress(rows.numpy().tobytes(), 9)),
            chunk(b"IEND", b""),
        ]
    )


def save_training_plot(
    path: str | os.PathLike,
    history: Sequence[Mapping],
    *,
    extra: Mapping[str, Sequence[tuple[float, float]]] | None = None,
) -> Path:
    """Plot training curves per epoch into a PNG (needs matplotlib): the statistics gap and, when
    recorded, the held-out free-energy gap of a :func:`fit` history, plus one panel per ``extra``
    series (title -> ``(epoch, value)`` points, e.g. log-likelihoods at a few checkpoints).
    """
    try:
        from matplotlib.figure import Figure  # no pyplot: the user's backend stays as it is
    except ImportError as error:
        raise ImportError("save_training_plot needs matplotlib: pip install matplotlib") from error
    panels = [("statistics gap (data - model)", [(r["epoch"], r["statistics_gap"]) for r in history])]
    held_out = [(r["epoch"], r["free_energy_gap"]) for r in history if r.get("free_energy_gap") is not None]
    if held_out:
        panels.append(("held-out minus training free energy", held_out))
    panels.extend((extra or {}).items())
    figure = Figure(figsize=(4.2 * len(panels), 3.2))
    axes = figure.subplots(1, len(panels), squeeze=False)
    for axis, (title, points) in zip(axes[0], panels):
        xs, ys = zip(*points) if points else ((), ())
        axis.plot(xs, ys, marker="o" if len(points) < 20 else None)
        axis.set_title(title, fontsize=9)
        axis.set_xlabel("epoch")
        axis.grid(alpha=0.3)
    figure.tight_layout()
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    figure.savefig(path, dpi=100)
    return path
