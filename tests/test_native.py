"""The native Philox4x32-10 kernel (``ebm_layers.model.native``) against an independent numpy
reference of the same stream, the library's eager Bernoulli comparison, and statistics of its draws.

Sources: Philox4x32-10 from Salmon, Moraes, Dror, Shaw, "Parallel Random Numbers: As Easy as 1, 2, 3"
(SC 2011), written here from the paper's description; its known-answer vectors from memory (they
agree with that description, which the reference is checked against); the chi-square test is
``scipy.stats.chisquare``; the other checks name theirs beside them.
"""

from __future__ import annotations

import threading

import numpy as np
import pytest
import torch
from scipy.stats import chisquare

from ebm_layers.model import native
from ebm_layers.model.functional import UNIFORM_GRID, bernoulli_from_uniforms

MASK = 0xFFFFFFFF
MULTIPLIERS = (np.uint64(0xD2511F53), np.uint64(0xCD9E8D57))
WEYL = (0x9E3779B9, 0xBB67AE85)
KEYS = (0, 1, 0xFFFFFFFF_FFFFFFFF, 0x0123_4567_89AB_CDEF)
OFFSETS = (0, 1, 2, 3, 5, 1000)
LENGTHS = (0, 1, 3, 7, 1001)
DTYPES = (torch.float32, torch.float64)


def philox(counters: list[int], key: int) -> np.ndarray:
    """Philox4x32-10 of 128-bit ``counters`` (ints, word 0 = low 32 bits) under the 64-bit ``key``:
    the ``(len(counters), 4)`` uint32 output words."""
    x = [np.array([(c >> (32 * r)) & MASK for c in counters], dtype=np.uint64) for r in range(4)]
    k0, k1 = key & MASK, key >> 32
    for _ in range(10):
        product0, product1 = x[0] * MULTIPLIERS[0], x[2] * MULTIPLIERS[1]
        x = [
            (product1 >> np.uint64(32)) ^ x[1] ^ np.uint64(k0),
            product1 & np.uint64(MASK),
            (product0 >> np.uint64(32)) ^ x[3] ^ np.uint64(k1),
            product0 & np.uint64(MASK),
        ]
        k0, k1 = (k0 + WEYL[0]) & MASK, (k1 + WEYL[1]) & MASK
    return np.stack(x, axis=1).astype(np.uint32)


def reference_words(key: int, counter_start: int, blocks: int) -> np.ndarray:
    """Words ``(4 blocks,)`` of Philox blocks of counters ``counter_start + i`` (mod 2^128)."""
    return philox([(counter_start + i) % (1 << 128) for i in range(blocks)], key).reshape(-1)


def reference_uniforms(n: int, dtype: torch.dtype, key: int, offset: int) -> torch.Tensor:
    """Uniform numbers ``offset .. offset + n - 1`` of the stream of ``key``, as documented in
    ``native``: float32 from one word, float64 from two."""
    per_block = 4 if dtype == torch.float32 else 2
    first, skip = divmod(offset, per_block)
    words = reference_words(key, first, -(-(skip + n) // per_block)).astype(np.uint64)
    if dtype == torch.float32:
        grid_units = words[skip : skip + n] >> np.uint64(8)
        return torch.from_numpy((grid_units.astype(np.float64) * 2.0**-24).astype(np.float32))
    words = words[2 * skip : 2 * (skip + n)]
    grid_units = (words[0::2] >> np.uint64(5)) * np.uint64(1 << 26) + (words[1::2] >> np.uint64(6))
    return torch.from_numpy(grid_units.astype(np.float64) * 2.0**-53)


def test_reference_known_answers():
    # Philox4x32-10 known-answer vectors, from memory (counter words 0..3, key words 0..1).
    vectors = [
        ((0, 0, 0, 0), (0, 0), (0x6627E8D5, 0xE169C58D, 0xBC57AC4C, 0x9B00DBD8)),
        ((MASK,) * 4, (MASK, MASK), (0x408F276D, 0x41C83B0E, 0xA20BC7C6, 0x6D5451FD)),
        (
            (0x243F6A88, 0x85A308D3, 0x13198A2E, 0x03707344),
            (0xA4093822, 0x299F31D0),
            (0xD16CFE09, 0x94FDCCEB, 0x5001E420, 0x24126EA1),
        ),
    ]
    for counter, key, expected in vectors:
        counter_int = sum(word << (32 * r) for r, word in enumerate(counter))
        words = reference_words(key[0] | key[1] << 32, counter_int, 1)
        assert words.tolist() == list(expected)


def test_kernel_words_through_float32_uniforms(native_kernel):
    # u * 2^24 == w >> 8 exactly: the first block of key 0 is the first known-answer vector.
    u = native.fill_uniforms(torch.empty(4), 0, 0)
    assert (u.double() * 2**24).long().tolist() == [
        w >> 8 for w in (0x6627E8D5, 0xE169C58D, 0xBC57AC4C, 0x9B00DBD8)
    ]
    words = reference_words(KEYS[3], 0, 300) >> np.uint32(8)
    u = native.fill_uniforms(torch.empty(1200), KEYS[3], 0)
    assert torch.equal((u.double() * 2**24).long(), torch.from_numpy(words.astype(np.int64)))


@pytest.mark.parametrize("dtype", DTYPES)
def test_uniforms_equal_the_reference(native_kernel, dtype):
    for key in KEYS:
        for offset in OFFSETS:
            for n in LENGTHS:
                u = native.fill_uniforms(torch.full((n,), -1.0, dtype=dtype), key, offset)
                assert torch.equal(u, reference_uniforms(n, dtype, key, offset)), (key, offset, n)


@pytest.mark.parametrize("dtype", DTYPES)
def test_far_stream_positions(native_kernel, dtype):
    """Counters past 2^32 (the high counter word) and up to the last numbers of the stream."""
    for offset in (2**34 + 1, 2**63 + 3, 2**64 - 9):
        u = native.fill_uniforms(torch.empty(9, dtype=dtype), 99, offset)
        assert torch.equal(u, reference_uniforms(9, dtype, 99, offset)), offset


@pytest.mark.parametrize("dtype", DTYPES)
def test_consecutive_pieces_continue_one_stream(native_kernel, dtype):
    whole = native.fill_uniforms(torch.empty(5000, dtype=dtype), 42, 17)
    pieces, start = [], 17
    for n in (1, 2, 3, 0, 61, 1000, 3933):
        pieces.append(native.fill_uniforms(torch.empty(n, dtype=dtype), 42, start))
        start += n
    assert torch.equal(torch.cat(pieces), whole)


def test_fill_may_be_split_over_threads(native_kernel):
    """ctypes releases the GIL: halves filled at the same time equal one fill."""
    whole = native.fill_uniforms(torch.empty(400_001), 5, 0)
    out = torch.empty(400_001)
    halves = [(out[:200_000], 0), (out[200_000:], 200_000)]
    threads = [threading.Thread(target=native.fill_uniforms, args=(part, 5, at)) for part, at in halves]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert torch.equal(out, whole)


def test_results_do_not_depend_on_the_number_of_threads(native_kernel):
    """Built with OpenMP, large calls are shared among torch's threads chunk by chunk; the stream is
    counter-based, so one thread and two give the same numbers and counts."""
    p = torch.rand(300_007, generator=torch.Generator().manual_seed(3))
    u = native.fill_uniforms(torch.empty(300_007), 9, 11)
    p[::1000] = u[::1000] + UNIFORM_GRID[torch.float32] / 2  # in their grid cell where u < 1/2
    threads = torch.get_num_threads()
    results = []
    try:
        for count in (1, 2):
            torch.set_num_threads(count)
            out = torch.empty_like(p)
            cells = native.bernoulli(p, out, 9, 11)
            results.append((native.fill_uniforms(torch.empty(300_007), 9, 11), out, cells))
    finally:
        torch.set_num_threads(threads)
    (u1, out1, cells1), (u2, out2, cells2) = results
    assert torch.equal(u1, u2) and torch.equal(out1, out2) and cells1 == cells2 >= 100


def probabilities_near_the_uniforms(u: torch.Tensor, generator: torch.Generator) -> torch.Tensor:
    """Random probabilities, with ``p`` inside the grid cell above ``u``, at ``u``, one grid step above,
    half a step below, 0, 1 and NaN at some positions."""
    grid = UNIFORM_GRID[u.dtype]
    p = torch.rand(u.shape, dtype=u.dtype, generator=generator)
    p[0::7] = u[0::7] + grid / 2
    p[1::7] = u[1::7]
    p[2::7] = u[2::7] + grid
    p[3::7] = u[3::7] - grid / 2
    p[4::29], p[5::31], p[6::37] = 0.0, 1.0, float("nan")
    return p


@pytest.mark.parametrize("dtype", DTYPES)
def test_bernoulli_is_the_eager_comparison(native_kernel, dtype, generator):
    grid, key, offset = UNIFORM_GRID[dtype], 31, 3
    u = native.fill_uniforms(torch.empty(37, 101, dtype=dtype), key, offset)
    p = probabilities_near_the_uniforms(u, generator)
    out = torch.full_like(p, 7.0)
    count = native.bernoulli(p, out, key, offset)
    difference = torch.sub(p, u)
    in_cell = (difference > 0) & (difference < grid)
    assert torch.equal(out, torch.ge(difference, grid).to(dtype))
    assert count == int(in_cell.sum()) > 100
    # The library's own eager path agrees outside the cell (inside it, it draws again).
    eager = bernoulli_from_uniforms(p, u.clone(), generator)
    assert torch.equal(out[~in_cell], eager[~in_cell])
    assert out[p.isnan()].eq(0).all() and out[p == 0].eq(0).all() and out[p == 1].eq(1).all()

    in_place = p.clone()
    assert native.bernoulli(in_place, in_place, key, offset) == count
    assert torch.equal(in_place, out)


def uniformity_failures(u: np.ndarray) -> list[str]:
    """The checks that float32 uniforms ``u`` fail: grid, range, mean, variance, 256-bin chi-square."""
    failures = []
    n = len(u)
    if not (np.all((u >= 0) & (u < 1)) and np.all(u * 2**24 == np.floor(u * 2**24))):
        failures.append("grid")
    # Mean and variance within 5 standard errors of 1/2 and 1/12: common practice, no source; the
    # variance of a sample variance, (mu4 - sigma^4) / n with mu4 = 1/80, from memory.
    if abs(u.mean() - 0.5) > 5 * np.sqrt(1 / 12 / n):
        failures.append("mean")
    if abs(u.var() - 1 / 12) > 5 * np.sqrt((1 / 80 - 1 / 144) / n):
        failures.append("variance")
    # Pearson's chi-square against equal bins: scipy.stats.chisquare (p-value from scipy.stats.chi2).
    counts = np.bincount((u * 256).astype(np.int64), minlength=256)
    if chisquare(counts).pvalue < 1e-4:
        failures.append("chi-square")
    return failures


def test_uniform_statistics(native_kernel):
    u = native.fill_uniforms(torch.empty(1_000_000), 20240, 0).numpy().astype(np.float64)
    assert uniformity_failures(u) == []


def test_uniformity_checks_catch_bad_streams(native_kernel):
    u = native.fill_uniforms(torch.empty(1_000_000), 20240, 0).numpy().astype(np.float64)
    units = (u * 2**24).astype(np.int64)
    counter = (np.arange(len(u)) % 2**24) * 2.0**-24  # a plain counter
    biased = (units | (units & 1) << 23) * 2.0**-24  # the top bit forced on by the low one
    emptied = np.where(units >> 16 == 17, units + (1 << 16), units) * 2.0**-24  # bin 17 moved to 18
    assert {"mean", "chi-square"} <= set(uniformity_failures(counter))
    assert {"mean", "chi-square"} <= set(uniformity_failures(biased))
    assert uniformity_failures(emptied) == ["chi-square"]


def test_disabled_by_the_environment(monkeypatch):
    monkeypatch.setattr(native, "unavailable_reason", native.unavailable_reason)
    monkeypatch.setenv("EBM_LAYERS_NATIVE", "0")
    assert not native.available()
    assert "EBM_LAYERS_NATIVE" in native.unavailable_reason


def test_bogus_compiler_means_unavailable(monkeypatch, tmp_path):
    for name in ("_loaded", "unavailable_reason"):
        monkeypatch.setattr(native, name, getattr(native, name))
    monkeypatch.setattr(native, "_loaded", None)
    monkeypatch.delenv("EBM_LAYERS_NATIVE", raising=False)
    monkeypatch.setenv("CC", "/nonexistent/ebm-layers-cc")
    monkeypatch.setenv("EBM_LAYERS_CACHE", str(tmp_path / "cache"))
    assert not native.available()
    assert "/nonexistent/ebm-layers-cc" in native.unavailable_reason
    with pytest.raises(RuntimeError, match="not available: .*/nonexistent/ebm-layers-cc"):
        native.fill_uniforms(torch.empty(3), 0, 0)
    assert list((tmp_path / "cache").iterdir()) == []


def test_build_failures_are_reasons(tmp_path):
    assert "no C compiler" in native._load(tmp_path, None)
    assert "failed" in native._load(tmp_path, ["false"])
    assert list(tmp_path.iterdir()) == []  # no temporary file left behind
    (tmp_path / "file").write_text("")
    assert "cache directory" in native._load(tmp_path / "file" / "cache", ["cc"])


def test_portable_build_is_cached_and_reused(native_kernel, tmp_path, generator):
    """The build without the AVX2 path (-U__AVX2__) gives the same stream; a second load reuses it."""
    compiler = [*native._compiler(), "-U__AVX2__"]
    kernels = native._load(tmp_path, compiler)
    assert isinstance(kernels, dict), kernels
    (built,) = tmp_path.iterdir()
    assert built.name.startswith("philox-") and built.suffix == ".so"
    stamp = built.stat().st_mtime_ns
    assert isinstance(native._load(tmp_path, compiler), dict)
    assert list(tmp_path.iterdir()) == [built] and built.stat().st_mtime_ns == stamp
    for dtype in DTYPES:
        fill, compare = kernels[dtype]
        u = torch.empty(1001, dtype=dtype)
        fill(u.data_ptr(), u.numel(), KEYS[2], 5)
        assert torch.equal(u, reference_uniforms(1001, dtype, KEYS[2], 5))
        p = probabilities_near_the_uniforms(u, generator)
        out, expected = torch.empty_like(p), torch.empty_like(p)
        count = compare(p.data_ptr(), out.data_ptr(), p.numel(), KEYS[2], 5)
        assert count == native.bernoulli(p, expected, KEYS[2], 5) > 0 and torch.equal(out, expected)


def test_bad_input(native_kernel):
    good = torch.empty(4)
    with pytest.raises(TypeError, match="out has dtype torch.int32"):
        native.fill_uniforms(torch.empty(4, dtype=torch.int32), 0, 0)
    with pytest.raises(TypeError, match="out must be a torch.Tensor"):
        native.fill_uniforms(np.empty(4, dtype=np.float32), 0, 0)
    with pytest.raises(ValueError, match="not contiguous"):
        native.fill_uniforms(torch.empty(4, 4).t(), 0, 0)
    with pytest.raises(ValueError, match="device meta"):
        native.fill_uniforms(torch.empty(4, device="meta"), 0, 0)
    with pytest.raises(ValueError, match=r"key must be in \[0, 2\^64\), got -1"):
        native.fill_uniforms(good, -1, 0)
    with pytest.raises(ValueError, match="offset must be"):
        native.fill_uniforms(good, 0, 2**64)
    with pytest.raises(ValueError, match="end of the stream"):
        native.fill_uniforms(good, 0, 2**64 - 3)
    with pytest.raises(TypeError, match="key must be an int, got 1.5"):
        native.fill_uniforms(good, 1.5, 0)
    with pytest.raises(ValueError, match=r"out has shape \(5,\), p has \(4,\)"):
        native.bernoulli(good, torch.empty(5), 0, 0)
    with pytest.raises(TypeError, match="out has dtype torch.float64, p has torch.float32"):
        native.bernoulli(good, torch.empty(4, dtype=torch.float64), 0, 0)
    base = torch.empty(5)
    with pytest.raises(ValueError, match="out overlaps p"):
        native.bernoulli(base[:4], base[1:], 0, 0)
    with pytest.raises(ValueError, match="p .* is not contiguous"):
        native.bernoulli(torch.empty(4, 4).t(), torch.empty(4, 4), 0, 0)
