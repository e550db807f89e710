"""Pure tensor functions of binary units: exact Bernoulli draws from blocks of uniforms, and the
log-odds of base rates. ``BinaryLayer`` draws through them; nothing else samples bits."""

from __future__ import annotations

import math
import os
from collections.abc import Sequence
from concurrent.futures import ThreadPoolExecutor

import torch
from torch import Tensor

from . import native

__all__ = [
    "UNIFORM_GRID",
    "Uniforms",
    "base_rate_logits",
    "base_rates",
    "batch_mean",
    "bernoulli_from_uniforms",
    "draw_uniforms",
    "sample_bernoulli",
    "stream_key",
]


def batch_mean(x: Tensor, weights: Tensor | None = None) -> Tensor:
    """The average ``(n,)`` of the rows of ``x`` ``(B, n)``, weighted by ``weights`` ``(B,)`` when given."""
    return x.mean(0) if weights is None else weights.to(x.dtype) @ x


def base_rates(data: Tensor, pseudocount: float = 0.0) -> Tensor:
    """The smoothed base rates ``(n,)`` (float64) of binary ``data`` ``(B, n)``:
    ``p_i = (sum_b v_bi + pseudocount) / (B + 2 pseudocount)``."""
    counts = data.detach().to(torch.float64).sum(0)
    return (counts + pseudocount) / (data.shape[0] + 2 * pseudocount)


def base_rate_logits(data: Tensor, pseudocount: float) -> Tensor:
    """Log-odds ``(n,)`` (float64) of :func:`base_rates`: the biases of independent binary units
    that reproduce them."""
    return torch.logit(base_rates(data, pseudocount))


# torch's uniform_ draws float32 on the grid k / 2^24 and float64 on k / 2^53 (checked in
# tests/test_bernoulli.py); other dtypes use torch.bernoulli.
UNIFORM_GRID = {torch.float32: 2.0**-24, torch.float64: 2.0**-53}


def sample_bernoulli(probabilities: Tensor, generator: torch.Generator | Uniforms) -> Tensor:
    """Draw binary units with ``p(x = 1) = probabilities``; same shape and dtype.

    About three times faster than ``torch.bernoulli``: one uniform ``u`` per unit from
    ``generator`` (or taken from a block of :class:`Uniforms` drawn from one), compared with
    ``p``. A plain ``u < p`` on the uniform's grid of step ``e`` (``2^-24`` in float32) would turn
    units on with probability ``ceil(p / e) * e``, wrong for every ``p`` off the grid and never
    0 < p < e exactly. So the comparison is exact outside the grid cell holding ``p``
    (``p - u >= e``: on; ``p - u <= 0``: off), and inside it (probability ``e`` per unit) the
    unit is on with probability ``(p - u) / e`` by a second, float64 draw: in total exactly ``p``
    (to within ``e * 2^-53``). ``p - u`` is computed exactly where it matters, since ``u`` and
    ``p`` are then within a factor of two (Sterbenz's lemma, from memory).

    With the native kernel (:mod:`~ebm_layers.model.native`) the uniforms come from a Philox stream
    keyed by ``generator`` and the comparison is made in the same pass, without storing them.
    """
    source = generator if isinstance(generator, Uniforms) else None
    generator = generator.generator if source is not None else generator
    if probabilities.dtype not in UNIFORM_GRID:
        return torch.bernoulli(probabilities, generator=generator)
    same_stream = source is not None and source.dtype == probabilities.dtype
    if probabilities.is_cpu and native.available():
        p = probabilities.contiguous()
        key, offset = source.reserve(p.numel()) if same_stream else (stream_key(generator), 0)
        on = torch.empty_like(p)
        if native.bernoulli(p, on, key, offset):  # units in their grid cell: decided as below
            uniform = native.fill_uniforms(torch.empty_like(p), key, offset)
            on = bernoulli_from_uniforms(p, uniform, generator)
        return on
    if same_stream:
        uniform = source.take(probabilities.shape)
    else:
        uniform = draw_uniforms(probabilities.shape, probabilities.dtype, generator)
    return bernoulli_from_uniforms(probabilities, uniform, generator)


def stream_key(generator: torch.Generator) -> int:
    """A key of the native Philox stream, drawn from ``generator`` (one number of its stream)."""
    return int(torch.randint(0, 2**62, (), generator=generator))


class Uniforms:
    """Uniforms on [0, 1) drawn from ``generator`` in blocks and handed out in order.

    One block for all the draws of a Gibbs sweep (or of many annealing steps) costs one call, filled
    by two threads when large, instead of one call per layer. ``take`` draws a new block of
    ``max(block_size, needed)`` when the current one runs out (its rest is dropped), so the
    numbers depend only on the sequence of requests. With the native kernel the block is one Philox
    stream, keyed by one number from ``generator`` when first used: ``take`` fills the next numbers
    of it, and ``reserve`` hands out positions in it for draws that never store their uniforms.
    """

    def __init__(self, generator: torch.Generator, dtype: torch.dtype, block_size: int) -> None:
        self.generator, self.dtype, self.block_size = generator, dtype, block_size
        self._block, self._used = torch.empty(0, dtype=dtype), 0
        self._key: int | None = None

    def reserve(self, count: int) -> tuple[int, int]:
        """The key and offset of the next ``count`` numbers of the native stream."""
        if self._key is None:
            self._key = stream_key(self.generator)
        offset = self._used
        self._used += count
        return self._key, offset

    def take(self, shape: Sequence[int]) -> Tensor:
        """The next uniforms, a fresh ``shape`` view the caller may overwrite."""
        count = math.prod(shape)
        if native.available():
            key, offset = self.reserve(count)
            return native.fill_uniforms(torch.empty(shape, dtype=self.dtype), key, offset)
        if self._used + count > self._block.numel():
            self._block = draw_uniforms((max(self.block_size, count),), self.dtype, self.generator)
            self._used = 0
        out = self._block[self._used : self._used + count].view(shape)
        self._used += count
        return out


# Draws of at least this many units are split in two halves filled at the same time, the second by
# a generator seeded from ``generator`` (measured: 1M float32 uniforms in 1.36 ms instead of 2.63 ms
# on 2 cores; below about 100k units the thread hand-off costs more than it saves). The split
# depends only on the size, so results do not depend on the number of threads.
_SPLIT_SIZE = 1 << 17
_worker: tuple[int, ThreadPoolExecutor] | None = None


def draw_uniforms(shape: Sequence[int], dtype: torch.dtype, generator: torch.Generator) -> Tensor:
    """Uniforms on [0, 1) of ``shape`` from ``generator`` (and, when large, a generator seeded
    from it; with the native kernel, a Philox stream keyed from it), on torch's grid for ``dtype``."""
    out = torch.empty(shape, dtype=dtype)
    if native.available():
        return native.fill_uniforms(out, stream_key(generator), 0)
    if out.numel() < _SPLIT_SIZE:
        return out.uniform_(generator=generator)
    flat, half = out.view(-1), out.numel() // 2
    second = torch.Generator().manual_seed(int(torch.randint(0, 2**62, (), generator=generator)))
    pending = _random_worker().submit(flat[half:].uniform_, generator=second)
    flat[:half].uniform_(generator=generator)
    pending.result()
    return out


def _random_worker() -> ThreadPoolExecutor:
    """One background thread for the second half of large draws (a new one after a fork)."""
    global _worker
    if _worker is None or _worker[0] != os.getpid():
        _worker = (os.getpid(), ThreadPoolExecutor(max_workers=1, thread_name_prefix="ebm_layers-uniform"))
    return _worker[1]


def _count(ones: Tensor) -> float:
    """The number of ones in a contiguous 0/1 tensor, exactly: float sums are exact below 2^24 terms,
    so large tensors are summed in parts of 2^23 (a float64 sum would copy the whole tensor first)."""
    if ones.numel() < 1 << 24:
        return float(ones.sum())
    return sum(float(part.sum()) for part in ones.view(-1).split(1 << 23))


def bernoulli_from_uniforms(probabilities: Tensor, uniform: Tensor, generator: torch.Generator) -> Tensor:
    """``sample_bernoulli`` given the uniforms (float32 or float64, on torch's grid; overwritten with
    ``p - u``); ``generator`` draws the rare corrections."""
    grid = UNIFORM_GRID[probabilities.dtype]
    difference = torch.sub(probabilities, uniform, out=uniform)
    on = torch.ge(difference, grid, out=torch.empty_like(probabilities))  # written as 0.0 / 1.0
    # Units in the grid cell of their probability are rare (probability ``grid`` each): they are the
    # ones counted by ``difference > 0`` but not by ``on``. Sums of 0/1 count exactly (in float32 below
    # 2^24 units) and are far cheaper than count_nonzero or building the cell's mask every time.
    positive = torch.gt(difference, 0.0, out=torch.empty_like(probabilities))
    if _count(positive) != _count(on):
        cell = torch.nonzero(((difference > 0) & (difference < grid)).view(-1)).squeeze(1)
        fraction = difference.view(-1)[cell].to(torch.float64) / grid
        draws = torch.rand(fraction.shape, dtype=torch.float64, generator=generator) < fraction
        on.view(-1)[cell] = draws.to(on.dtype)
    return on
