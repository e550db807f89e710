"""The demo scenario's data generator, mode occupancy and the pictures.

Sources of the checks:

- determinism and the shares of the types: seeded generators (common practice, no source); the
  shares against their probabilities by a chi-square goodness-of-fit test
  (``scipy.stats.chisquare``);
- the templates name the type of noisy scans (a property of the data we claim in the docs,
  measured here);
- the PNG files are decoded by matplotlib's reader (``matplotlib.image.imread``, in the test
  extra), independent of our writer, and by the chunk layout of the PNG standard (ISO/IEC
  15948:2004).
"""

from __future__ import annotations

import math
import struct
import zlib

import matplotlib.image
import pytest
import torch
from scipy.stats import chisquare

import ebm_layers as el
from ebm_layers.datasets import (
    CONTRAST,
    IMAGE_SHAPE,
    MARKING_SHARES,
    MARKING_TYPES,
    grey_parts_markings,
    marking_sheets,
    marking_templates,
    parts_markings,
)
from tests.helpers import seeded

# -- the generator --------------------------------------------------------------------------------


def test_same_seed_same_scans_and_every_type_present():
    images, labels = parts_markings(400, generator=seeded(0))
    again, again_labels = parts_markings(400, generator=seeded(0))
    other, _ = parts_markings(400, generator=seeded(1))
    assert torch.equal(images, again) and torch.equal(labels, again_labels)
    assert not torch.equal(images, other)
    assert images.shape == (400, 144) and images.dtype == torch.float32 and labels.dtype == torch.int64
    assert set(images.unique().tolist()) == {0.0, 1.0}
    assert set(labels.tolist()) == set(range(len(MARKING_TYPES)))
    # No scan is blank: at least one segment always stays.
    clean, _ = parts_markings(400, generator=seeded(2), flip=0.0, missing=0.9)
    assert bool((clean.sum(1) > 0).all())


def test_type_shares_follow_their_probabilities():
    _, labels = parts_markings(20_000, generator=seeded(3))
    counts = torch.bincount(labels, minlength=len(MARKING_TYPES)).double()
    expected = torch.tensor(MARKING_SHARES, dtype=torch.float64) * len(labels)
    assert chisquare(counts.numpy(), expected.numpy()).pvalue > 1e-3
    # Negative control: equal shares are rejected.
    assert chisquare(counts.numpy(), torch.full_like(counts, len(labels) / len(counts)).numpy()).pvalue < 1e-6


def test_noise_and_missing_segments_do_what_they_say():
    clean, labels = parts_markings(2000, generator=seeded(4), flip=0.0, missing=0.0)
    noisy, noisy_labels = parts_markings(2000, generator=seeded(4), flip=0.25, missing=0.0)
    assert torch.equal(labels, noisy_labels)  # the same draws up to the flips
    flipped = float((clean != noisy).double().mean())
    assert abs(flipped - 0.25) < 4 * math.sqrt(0.25 * 0.75 / clean.numel())
    # A scan inks about as many pixels as its clean template.
    templates = marking_templates()
    ink = torch.stack([clean[labels == t].sum(1).mean() for t in range(len(MARKING_TYPES))])
    assert torch.allclose(ink, templates.sum(1), rtol=0.2)
    worn, _ = parts_markings(2000, generator=seeded(4), flip=0.0, missing=0.5)
    assert worn.sum() < 0.8 * clean.sum()


def test_nearest_template_names_most_noisy_scans():
    images, labels = parts_markings(4000, generator=seeded(5))
    assign = el.nearest_template(marking_templates())
    accuracy = float((assign(images) == labels).double().mean())
    assert accuracy > 0.9  # measured: 0.948
    # Negative control: templates in a shuffled order name few scans right.
    shuffled = el.nearest_template(marking_templates()[torch.tensor([1, 2, 3, 4, 5, 6, 7, 0])])
    assert float((shuffled(images) == labels).double().mean()) < 0.2


@pytest.mark.parametrize(
    ("options", "error", "fragment"),
    [
        ({"num_examples": 0}, ValueError, "num_examples must be positive"),
        ({"num_examples": 2.5}, TypeError, "num_examples"),
        ({"flip": 1.5}, ValueError, "flip must be a probability"),
        ({"missing": 1.0}, ValueError, "missing must be a probability below 1"),
        ({"dtype": torch.int64}, TypeError, "dtype must be a floating"),
    ],
)
def test_bad_generator_arguments(options, error, fragment):
    arguments = {"num_examples": 5, **options}
    with pytest.raises(error, match=fragment):
        parts_markings(arguments.pop("num_examples"), **arguments)


def test_grey_scans_are_the_binary_drawings_with_soft_ink_contrast_and_sensor_noise():
    grey, labels = grey_parts_markings(3000, generator=seeded(7))
    again, again_labels = grey_parts_markings(3000, generator=seeded(7))
    assert torch.equal(grey, again) and torch.equal(labels, again_labels)
    assert grey.shape == (3000, 144) and grey.dtype == torch.float32
    # The same types as the binary scans from the same seed: the drawings are drawn first.
    _, binary_labels = parts_markings(3000, generator=seeded(7))
    assert torch.equal(labels, binary_labels)
    # Without noise every pixel lies in [0, 1]; the noise is Gaussian with the given standard
    # deviation (residual of two noisy copies of the same clean scans: variance 2 noise^2; common
    # practice, no source).
    clean, _ = grey_parts_markings(3000, generator=seeded(8), noise=0.0)
    assert float(clean.min()) >= 0.0 and float(clean.max()) <= 1.0
    noisy, _ = grey_parts_markings(3000, generator=seeded(8), noise=0.2)
    residual = (noisy - clean).flatten()
    assert abs(float(residual.std()) - 0.2) < 0.005 and abs(float(residual.mean())) < 0.002
    # A scan's brightest pixel is at most its ink contrast (thin strokes may ink no pixel fully):
    # never above CONTRAST, mostly within it, and spread over it.
    peaks = clean.amax(1)
    assert float(peaks.max()) <= CONTRAST[1] + 1e-6
    assert float(peaks.median()) >= CONTRAST[0] and float(peaks.std()) > 0.05
    # The nearest template (of the binary drawings) still names most grey scans.
    named = el.nearest_template(marking_templates())(grey)
    assert float((named == labels).double().mean()) > 0.85
    with pytest.raises(ValueError, match="noise must be a finite number >= 0"):
        grey_parts_markings(5, noise=-1.0)


def test_marking_sheets_place_each_marking_in_its_window():
    sheets, types, corners = marking_sheets(300, size=30, markings=1, flip=0.0, generator=seeded(9))
    again = marking_sheets(300, size=30, markings=1, flip=0.0, generator=seeded(9))
    assert torch.equal(sheets, again[0]) and torch.equal(types, again[1]) and torch.equal(corners, again[2])
    assert sheets.shape == (300, 900) and types.shape == (300, 1) and corners.shape == (300, 1, 2)
    images = sheets.view(300, 30, 30)
    windows = torch.stack(
        [images[i, r : r + 12, c : c + 12] for i, (r, c) in enumerate(corners[:, 0].tolist())]
    )
    # All the ink lies in the marking's window, and the window is a scan of the marking's type
    # (the nearest template names about 95% of scans, see marking_templates).
    assert torch.equal(windows.sum((1, 2)), images.sum((1, 2))) and bool((windows.sum((1, 2)) > 0).all())
    named = el.nearest_template(marking_templates())(windows.reshape(300, 144))
    assert float((named == types[:, 0]).double().mean()) > 0.85
    # Several markings and the flips: about markings times a scan's ink plus flips of the paper.
    many, _, _ = marking_sheets(200, generator=seeded(10))
    one, _, _ = marking_sheets(200, markings=1, flip=0.0, generator=seeded(10))
    assert 2.0 < float(many.sum(1).mean()) / float(one.sum(1).mean()) < 4.5
    with pytest.raises(ValueError, match="size must be at least"):
        marking_sheets(2, size=10)


# -- mode occupancy -------------------------------------------------------------------------------


def test_mode_occupancy_counts_shares_and_missing_modes():
    templates = torch.eye(3)
    samples = torch.tensor([[1.0, 0, 0], [0.9, 0, 0], [0, 1, 0], [0, 0.8, 0.1]])
    data = torch.tensor([[1.0, 0, 0], [0, 1, 0], [0, 0, 1], [0, 0, 0.9]])
    occupancy = el.mode_occupancy(samples, el.nearest_template(templates), data=data, names=["a", "b", "c"])
    assert occupancy.sample_shares.tolist() == [0.5, 0.5, 0.0]
    assert occupancy.data_shares.tolist() == [0.25, 0.25, 0.5]
    assert occupancy.missing == ("c",)
    assert occupancy.total_variation == pytest.approx(0.5)
    text = str(occupancy)
    assert "missing modes: c" in text and "total variation 0.500" in text
    alone = el.mode_occupancy(samples, lambda x: x.argmax(1), num_modes=4)
    assert alone.data_shares is None and alone.total_variation is None and alone.names[3] == "mode 3"
    assert alone.missing == ("mode 2", "mode 3")


@pytest.mark.parametrize(
    ("call", "error", "fragment"),
    [
        (lambda: el.mode_occupancy(torch.ones(3, 2), "argmax"), TypeError, "assign must be callable"),
        (lambda: el.mode_occupancy(torch.ones(3), lambda x: x), ValueError, "samples must be a non-empty"),
        (lambda: el.mode_occupancy(torch.ones(3, 2), lambda x: x[:, 0]), ValueError, "integer modes"),
        (
            lambda: el.mode_occupancy(torch.ones(3, 2), lambda x: -torch.ones(3).long()),
            ValueError,
            "negative",
        ),
        (
            lambda: el.mode_occupancy(torch.ones(3, 2), lambda x: torch.full((3,), 5), names=["a", "b"]),
            ValueError,
            "outside",
        ),
        (lambda: el.nearest_template(torch.ones(3)), ValueError, "templates must be"),
        (lambda: el.nearest_template(torch.eye(3))(torch.ones(2, 4)), ValueError, "3 columns"),
    ],
)
def test_bad_occupancy_arguments(call, error, fragment):
    with pytest.raises(error, match=fragment):
        call()


# -- pictures -------------------------------------------------------------------------------------


def decode_grey_png(data: bytes) -> torch.Tensor:
    """Decode an 8-bit grey, unfiltered PNG by the chunk layout of the PNG standard."""
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    position, chunks = 8, {}
    while position < len(data):
        (length,) = struct.unpack(">I", data[position : position + 4])
        kind, body = data[position + 4 : position + 8], data[position + 8 : position + 8 + length]
        assert struct.unpack(">I", data[position + 8 + length : position + 12 + length])[0] == zlib.crc32(
            kind + body
        )
        chunks[kind] = chunks.get(kind, b"") + body
        position += 12 + length
    width, height, depth, colour = struct.unpack(">IIBB", chunks[b"IHDR"][:10])
    assert (depth, colour) == (8, 0)
    raw = torch.frombuffer(bytearray(zlib.decompress(chunks[b"IDAT"])), dtype=torch.uint8).view(
        height, width + 1
    )
    assert bool((raw[:, 0] == 0).all())
    return raw[:, 1:]


def test_image_grid_places_every_image(tmp_path):
    images = torch.stack([torch.full((6,), k / 4) for k in range(5)])  # five flat 2x3 images
    grid = el.image_grid(images, (2, 3), columns=3, padding=1)
    assert grid.shape == (2 * 3 + 1, 3 * 4 + 1)
    assert grid[1:3, 1:4].eq(0.0).all() and grid[4:6, 5:8].eq(1.0).all()  # image 0, image 4
    assert grid[4:6, 9:12].eq(0.5).all()  # the empty sixth place stays grey
    weights = torch.tensor([[-2.0, 0.0, 1.0, 2.0, 0.0, 0.0]])
    assert el.image_grid(weights, (2, 3), padding=0, normalize="each")[0].tolist() == [0.0, 0.5, 0.75]
    path = el.save_image_grid(tmp_path / "deep" / "grid.png", images, (2, 3), columns=3, scale=2)
    pixels = decode_grey_png(path.read_bytes())
    expected = (grid * 255).round().to(torch.uint8).repeat_interleave(2, 0).repeat_interleave(2, 1)
    assert torch.equal(pixels, expected)
    read = torch.from_numpy(matplotlib.image.imread(path))
    assert torch.allclose(read, expected.float() / 255, atol=1e-6)


def test_scans_and_training_plot_are_saved(tmp_path):
    images, _ = parts_markings(16, generator=seeded(6))
    assert el.save_image_grid(tmp_path / "scans.png", images, IMAGE_SHAPE).stat().st_size > 100
    history = [{"epoch": e, "statistics_gap": 1.0 / e, "free_energy_gap": 0.1 * e} for e in (1, 2, 3)]
    path = el.save_training_plot(
        tmp_path / "training.png", history, extra={"rough": [(1, -50.0), (3, -40.0)]}
    )
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


@pytest.mark.parametrize(
    ("call", "fragment"),
    [
        (lambda: el.image_grid(torch.ones(2, 6), (2, 2)), "do not fit image_shape"),
        (lambda: el.image_grid(torch.ones(2, 6), (2,)), "image_shape must be"),
        (lambda: el.image_grid(torch.ones(6), (2, 3)), "images must be"),
        (lambda: el.image_grid(torch.ones(2, 6), (2, 3), normalize="all"), "normalize must be"),
        (lambda: el.image_grid(torch.ones(2, 6), (2, 3), columns=0), "columns must be positive"),
    ],
)
def test_bad_picture_arguments(call, fragment):
    with pytest.raises(ValueError, match=fragment):
        call()
