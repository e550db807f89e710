"""Demo data: synthetic 12x12 scans of stamped markings from a parts line, binarised or grey.

The scenario is our own and the data are invented; nothing is read from files or downloaded. A
stamping station marks every part with one of eight marking types; a camera takes a 12x12 scan
of the marking. Each scan is the type's drawing with a small random shift, a random stroke
thickness and now and then a missing segment (a worn die). The binarised scans
(:func:`parts_markings`) carry pixel-flip noise (dust, glare); the grey-level scans
(:func:`grey_parts_markings`) carry soft stroke edges, a per-scan ink contrast and Gaussian
sensor noise. Every type is one mode of the data, so samples of a model trained on it show plainly
whether they cover all modes.
"""

from __future__ import annotations

import math

import torch
from torch import Tensor

from ._checks import check_size
from ._random import resolve_generator

__all__ = [
    "IMAGE_SHAPE",
    "MARKING_SHARES",
    "MARKING_TYPES",
    "grey_parts_markings",
    "marking_sheets",
    "marking_templates",
    "parts_markings",
]

IMAGE_SHAPE = (12, 12)
MARKING_TYPES = ("stroke", "ring", "bar", "cross", "corners", "chevron", "triangle", "frame")
# How often the line stamps each type: unequal on purpose, so that a model's samples can be
# checked against the data's shares and not only against "one eighth each".
MARKING_SHARES = (0.20, 0.16, 0.14, 0.12, 0.11, 0.10, 0.09, 0.08)

# Scan defaults: shifts up to SHIFT pixels along each axis; stroke half-width between the two
# THICKNESS values (a pixel is inked when its centre lies that close to the drawing); each segment
# missing with probability MISSING (one always stays); each pixel flipped with FLIP.
SHIFT = 1.0
THICKNESS = (0.55, 1.0)
MISSING = 0.1
FLIP = 0.03
# Grey scans: ink contrast drawn uniformly between the two CONTRAST values (worn ink, lighting),
# Gaussian sensor noise of standard deviation NOISE on a 0 (paper) .. 1 (full ink) scale.
CONTRAST = (0.6, 1.0)
NOISE = 0.15


Line = tuple[float, float, float, float]


def _arc(radius: float, start: float, stop: float, pieces: int = 4) -> list[Line]:
    """An arc of a circle about the centre, from angle ``start`` to ``stop`` (radians), as lines."""
    angles = [start + (stop - start) * k / pieces for k in range(pieces + 1)]
    points = [(radius * math.cos(a), radius * math.sin(a)) for a in angles]
    return [(*p, *q) for p, q in zip(points[:-1], points[1:])]


# Each type is a list of segments (the parts a worn die can lose), each a list of straight lines
# (x0, y0, x1, y1) in pixels relative to the centre of the image (x to the right, y down).
_SEGMENTS: dict[str, list[list[Line]]] = {
    "stroke": [[(-3.5, -3.5, 0.0, 0.0)], [(0.0, 0.0, 3.5, 3.5)]],
    "ring": [_arc(3.6, k * math.pi / 2, (k + 1) * math.pi / 2) for k in range(4)],
    "bar": [[(-4.0, -0.5, 0.0, -0.5), (-4.0, 0.5, 0.0, 0.5)], [(0.0, -0.5, 4.0, -0.5), (0.0, 0.5, 4.0, 0.5)]],
    "cross": [[(0.0, 0.0, dx * 4.0, dy * 4.0)] for dx, dy in ((1, 0), (-1, 0), (0, 1), (0, -1))],
    "corners": [
        [(sx * 4.0, sy * 4.0, sx * 2.0, sy * 4.0), (sx * 4.0, sy * 4.0, sx * 4.0, sy * 2.0)]
        for sx, sy in ((1, 1), (1, -1), (-1, 1), (-1, -1))
    ],
    "chevron": [[(-4.0, -2.5, 0.0, 2.5)], [(0.0, 2.5, 4.0, -2.5)]],
    "triangle": [[(0.0, -4.0, -4.0, 3.0)], [(-4.0, 3.0, 4.0, 3.0)], [(4.0, 3.0, 0.0, -4.0)]],
    "frame": [
        [(-3.0, -3.0, 3.0, -3.0)],
        [(3.0, -3.0, 3.0, 3.0)],
        [(3.0, 3.0, -3.0, 3.0)],
        [(-3.0, 3.0, -3.0, -3.0)],
    ],
}


def _pixel_centres(dtype: torch.dtype) -> tuple[Tensor, Tensor]:
    """x and y of every pixel centre relative to the image centre, each ``(144,)``, row-major."""
    rows, columns = IMAGE_SHAPE
    y, x = torch.meshgrid(
        torch.arange(rows, dtype=dtype) - (rows - 1) / 2,
        torch.arange(columns, dtype=dtype) - (columns - 1) / 2,
        indexing="ij",
    )
    return x.reshape(-1), y.reshape(-1)


def _ink(lines: Tensor, shift: Tensor, half_width: Tensor) -> Tensor:
    """Which pixels lie within ``half_width`` of any line: ``(B, 144)`` float 0/1.

    ``lines`` is ``(B, L, 4)`` (a NaN row is a line left out), ``shift`` ``(B, 2)``, ``half_width`` ``(B,)``.
    """
    distance = _distance(lines, shift)
    return (distance <= half_width[:, None]).to(lines.dtype)


def _distance(lines: Tensor, shift: Tensor) -> Tensor:
    """Distance ``(B, 144)`` from each pixel centre to the nearest line (infinite without lines)."""
    px, py = _pixel_centres(lines.dtype)
    x0, y0 = lines[..., 0] + shift[:, :1], lines[..., 1] + shift[:, 1:]
    dx, dy = lines[..., 2] - lines[..., 0], lines[..., 3] - lines[..., 1]
    # Distance from each pixel centre to each line: project onto the line, clamp to its ends.
    rel_x, rel_y = px[None, None, :] - x0[..., None], py[None, None, :] - y0[..., None]  # (B, L, 144)
    length2 = (dx * dx + dy * dy).clamp_min(1e-12)[..., None]
    t = ((rel_x * dx[..., None] + rel_y * dy[..., None]) / length2).clamp(0.0, 1.0)
    distance2 = (rel_x - t * dx[..., None]).square() + (rel_y - t * dy[..., None]).square()
    distance2 = distance2.nan_to_num(nan=math.inf).amin(1)  # nearest line; missing lines never ink
    return distance2.sqrt()


def _lines(kinds: Tensor, keep: Tensor, dtype: torch.dtype) -> Tensor:
    """``(B, L, 4)`` lines of each example's type, NaN where a segment is missing (``keep`` False)."""
    table, owner = _line_table(dtype)
    lines = table[kinds]  # (B, L, 4)
    kept = keep.gather(1, owner[kinds])  # (B, L): is each line's segment kept
    return lines.masked_fill(~kept[..., None], math.nan)


def _line_table(dtype: torch.dtype) -> tuple[Tensor, Tensor]:
    """Every type's lines padded to one length ``(T, L, 4)`` (NaN padding), and the segment index
    of each line ``(T, L)`` (padding points at segment 0, whose NaN lines stay NaN)."""
    width = max(sum(len(segment) for segment in _SEGMENTS[name]) for name in MARKING_TYPES)
    table = torch.full((len(MARKING_TYPES), width, 4), math.nan, dtype=dtype)
    owner = torch.zeros(len(MARKING_TYPES), width, dtype=torch.long)
    for t, name in enumerate(MARKING_TYPES):
        flat = [(s, line) for s, segment in enumerate(_SEGMENTS[name]) for line in segment]
        table[t, : len(flat)] = torch.tensor([line for _, line in flat], dtype=dtype)
        owner[t, : len(flat)] = torch.tensor([s for s, _ in flat])
    return table, owner


def marking_templates(*, dtype: torch.dtype = torch.float32) -> Tensor:
    """Each type's average clean drawing ``(8, 144)`` in [0, 1]: the share of scans that ink each
    pixel, over an even grid of the scans' shifts and thicknesses, every segment present, no
    noise. Row ``t`` is ``MARKING_TYPES[t]``; the nearest template (squared distance) names the
    type of about 95% of noisy scans."""
    offsets = torch.linspace(-SHIFT, SHIFT, 9, dtype=dtype)
    widths = torch.linspace(*THICKNESS, 5, dtype=dtype)
    shift = torch.cartesian_prod(offsets, offsets)  # (81, 2)
    grid = shift.repeat(len(widths), 1)
    half_width = widths.repeat_interleave(len(shift))
    count, types = len(grid), len(MARKING_TYPES)
    kinds = torch.arange(types).repeat_interleave(count)  # every type over the whole grid, at once
    keep = torch.ones(types * count, _max_segments(), dtype=torch.bool)
    ink = _ink(_lines(kinds, keep, dtype), grid.repeat(types, 1), half_width.repeat(types))
    return ink.view(types, count, -1).mean(1)


def _max_segments() -> int:
    return max(len(_SEGMENTS[name]) for name in MARKING_TYPES)


def parts_markings(
    num_examples: int,
    *,
    generator: torch.Generator | None = None,
    flip: float = FLIP,
    missing: float = MISSING,
    dtype: torch.dtype = torch.float32,
) -> tuple[Tensor, Tensor]:
    """Draw ``num_examples`` synthetic marking scans (invented data, see the module docstring).

    Types follow ``MARKING_SHARES``; each scan is its type's drawing shifted by up to one pixel
    along each axis, with a stroke half-width drawn from ``THICKNESS``, each segment missing with
    probability ``missing`` (at least one stays), then every pixel flipped with probability
    ``flip``. Same generator state, same data.

    Args:
        num_examples: number of scans.
        generator: the ``torch.Generator`` of every draw (``None``: seeded once from torch's
            global generator).
        flip: pixel-flip probability in [0, 1].
        missing: probability in [0, 1) that a segment is missing.
        dtype: floating dtype of the images.

    Returns:
        ``(images, labels)``: ``(num_examples, 144)`` 0/1 images (rows of the 12x12 scan, top
        first) and ``(num_examples,)`` int64 type indices into ``MARKING_TYPES``.

    Examples::

        >>> images, labels = parts_markings(5, generator=torch.Generator().manual_seed(0))
        >>> images.shape, labels.shape
        (torch.Size([5, 144]), torch.Size([5]))
    """
    num_examples = check_size("num_examples", num_examples)
    _check_probability("flip", flip)
    labels, lines, shift, half_width, generator = _draw_markings(num_examples, generator, missing, dtype)
    images = _ink(lines, shift, half_width)
    flips = torch.rand(images.shape, generator=generator, dtype=dtype) < flip
    return torch.where(flips, 1.0 - images, images), labels


def grey_parts_markings(
    num_examples: int,
    *,
    generator: torch.Generator | None = None,
    noise: float = NOISE,
    missing: float = MISSING,
    dtype: torch.dtype = torch.float32,
) -> tuple[Tensor, Tensor]:
    """Draw ``num_examples`` grey-level marking scans (invented data, see the module docstring).

    The same drawings as :func:`parts_markings` (types, shifts, thicknesses, missing segments), but
    a pixel holds how much ink it sees: 1 well inside a stroke, falling linearly to 0 over one pixel
    across the stroke's edge, times the scan's ink contrast (uniform in ``CONTRAST``), plus
    independent Gaussian sensor noise of standard deviation ``noise``. Same generator state, same
    data.

    Args:
        num_examples: number of scans.
        generator: the ``torch.Generator`` of every draw (``None``: seeded once from torch's
            global generator).
        noise: standard deviation of the sensor noise, ``>= 0``.
        missing: probability in [0, 1) that a segment is missing.
        dtype: floating dtype of the images.

    Returns:
        ``(images, labels)``: ``(num_examples, 144)`` real-valued images (rows of the 12x12 scan, top
        first; about 0 for paper, up to 1 for full ink, plus noise) and ``(num_examples,)`` int64
        type indices into ``MARKING_TYPES``.

    Examples::

        >>> images, labels = grey_parts_markings(5, generator=torch.Generator().manual_seed(0))
        >>> images.shape, images.dtype
        (torch.Size([5, 144]), torch.float32)
    """
    num_examples = check_size("num_examples", num_examples)
    if isinstance(noise, bool) or not isinstance(noise, (int, float)) or not 0.0 <= noise < math.inf:
        raise ValueError(f"noise must be a finite number >= 0, got {noise!r}")
    labels, lines, shift, half_width, generator = _draw_markings(num_examples, generator, missing, dtype)
    ink = (half_width[:, None] + 0.5 - _distance(lines, shift)).clamp(0.0, 1.0)
    low, high = CONTRAST
    contrast = low + (high - low) * torch.rand(num_examples, 1, generator=generator, dtype=dtype)
    sensor = torch.randn(ink.shape, generator=generator, dtype=dtype) * noise
    return ink * contrast + sensor, labels


def marking_sheets(
    num_examples: int,
    *,
    size: int = 48,
    markings: int = 3,
    generator: torch.Generator | None = None,
    flip: float = FLIP / 3,
    dtype: torch.dtype = torch.float32,
) -> tuple[Tensor, Tensor, Tensor]:
    """Draw ``num_examples`` inspection sheets of ``size`` x ``size`` binarised pixels, each carrying
    ``markings`` stamped markings at random places (invented data, see the module docstring).

    Every marking is a clean 12x12 scan of :func:`parts_markings` (its type, shift, thickness and
    missing segments; no flips) pasted with its top-left corner uniform over the sheet (overlaps ink
    their union); then every pixel of the sheet flips with probability ``flip``. Same generator
    state, same data.

    Returns:
        ``(sheets, types, corners)``: ``(num_examples, size * size)`` 0/1 sheets (rows top first),
        ``(num_examples, markings)`` int64 type indices into ``MARKING_TYPES`` and
        ``(num_examples, markings, 2)`` int64 (row, column) of each marking's top-left pixel.

    Examples::

        >>> sheets, types, corners = marking_sheets(2, generator=torch.Generator().manual_seed(0))
        >>> sheets.shape, types.shape, corners.shape
        (torch.Size([2, 2304]), torch.Size([2, 3]), torch.Size([2, 3, 2]))
    """
    num_examples = check_size("num_examples", num_examples)
    markings = check_size("markings", markings)
    side = IMAGE_SHAPE[0]
    size = check_size("size", size)
    if size < side:
        raise ValueError(f"size must be at least the markings' {side} pixels, got {size}")
    _check_probability("flip", flip)
    count = num_examples * markings
    labels, lines, shift, half_width, generator = _draw_markings(count, generator, MISSING, dtype)
    scans = _ink(lines, shift, half_width).view(num_examples, markings, side, side)
    corners = torch.randint(0, size - side + 1, (num_examples, markings, 2), generator=generator)
    sheets = torch.zeros(num_examples, size, size, dtype=dtype)
    for example in range(num_examples):
        for k in range(markings):
            row, column = (int(c) for c in corners[example, k])
            window = sheets[example, row : row + side, column : column + side]
            torch.maximum(window, scans[example, k], out=window)
    flips = torch.rand(sheets.shape, generator=generator, dtype=dtype) < flip
    sheets = torch.where(flips, 1.0 - sheets, sheets)
    return sheets.flatten(1), labels.view(num_examples, markings), corners


def _check_probability(name: str, value: object, top: float = 1.0) -> None:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0.0 <= value <= top:
        raise ValueError(f"{name} must be a probability{' below 1' if top < 1 else ''}, got {value!r}")


def _draw_markings(
    num_examples: int, generator: torch.Generator | None, missing: float, dtype: torch.dtype
) -> tuple[Tensor, Tensor, Tensor, Tensor, torch.Generator]:
    """The drawings both kinds of scan share: types, lines (missing segments NaN), shifts and
    half-widths, drawn in this order from ``generator`` (resolved, and returned for the noise)."""
    _check_probability("missing", missing, 1.0 - 1e-9)
    if not (isinstance(dtype, torch.dtype) and dtype.is_floating_point):
        raise TypeError(f"dtype must be a floating torch.dtype, got {dtype!r}")
    generator = resolve_generator(generator)
    shares = torch.tensor(MARKING_SHARES, dtype=torch.float64)
    labels = torch.multinomial(shares, num_examples, replacement=True, generator=generator)
    shift = (torch.rand(num_examples, 2, generator=generator, dtype=dtype) * 2 - 1) * SHIFT
    low, high = THICKNESS
    half_width = low + (high - low) * torch.rand(num_examples, generator=generator, dtype=dtype)
    keep = torch.rand(num_examples, _max_segments(), generator=generator) >= missing
    # At least one segment stays: a part with a blank scan is not a marking.
    counts = torch.tensor([len(_SEGMENTS[name]) for name in MARKING_TYPES])[labels]
    first = torch.randint(0, 2**31, (num_examples,), generator=generator) % counts
    keep[torch.arange(num_examples), first] = True
    return labels, _lines(labels, keep, dtype), shift, half_width, generator
