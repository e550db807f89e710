"""Pure tensor functions behind every model: energy terms, conditional inputs, free energies,
pair statistics and Bernoulli draws.

The modules only hold state and call these. A model's graph is passed as ``edges``: one
``(a, b)`` pair per coupling, in coupling order, with ``weights[k]`` of shape ``(n_a, n_b)``;
``a == b`` marks a lateral coupling whose weight is the full symmetric zero-diagonal
``(n_a, n_a)`` matrix, with energy term ``-1/2 x W x^T``.

``states`` are indexable by layer (a list, or a dict holding only some layers); every
state is ``(B, n_i)``.
"""

from __future__ import annotations

import math
import os
from collections.abc import Callable, Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor

import torch
from torch import Tensor
from torch.nn.functional import softplus

__all__ = [
    "base_rate_logits",
    "bernoulli",
    "bernoulli_log_probability",
    "coupling_input",
    "energy",
    "layer_logits",
    "marginal_free_energy",
    "pair_energy",
    "pair_mean",
    "sample_bernoulli",
    "Uniforms",
    "update_layer",
]

Edge = tuple[int, int]
States = Sequence[Tensor] | Mapping[int, Tensor]


def coupling_input(edge: Edge, weight: Tensor, target: int) -> tuple[int, Tensor]:
    """The source layer ``s`` and matrix ``M`` of the input ``x_s @ M`` ``(B, n_target)`` that one
    coupling sends to layer ``target``: ``(a, W)`` into ``b``, ``(b, W^T)`` into ``a``.

    For a lateral coupling (``a == b == target``) the input is ``x_a @ W``; the zero diagonal
    keeps a unit's own state out of its input.
    """
    a, b = edge
    if target == b:
        return a, weight
    return b, weight.mT


def layer_logits(
    states: States,
    target: int,
    biases: Sequence[Tensor],
    weights: Sequence[Tensor],
    edges: Sequence[Edge],
) -> Tensor:
    """Total input ``b_t + sum_m x_m W_mt`` to layer ``target``, shape ``(B, n_target)``.

    ``sigmoid`` of it is ``p(x_target = 1 | all other units)``, unit by unit; only the layers
    coupled to ``target`` need to be present in ``states``.
    """
    logits = None
    for edge, weight in zip(edges, weights):
        if target in edge:
            source, matrix = coupling_input(edge, weight, target)
            # addmm adds the bias (or the inputs so far) inside the matrix product.
            logits = torch.addmm(biases[target] if logits is None else logits, states[source], matrix)
    if logits is None:  # no coupling touches the layer; batch of one when no state is given
        first = next(iter(states.values() if isinstance(states, Mapping) else states), None)
        logits = biases[target].expand(1 if first is None else first.shape[0], -1)
    return logits


def update_layer(
    states: States,
    target: int,
    biases: Sequence[Tensor],
    weights: Sequence[Tensor],
    edges: Sequence[Edge],
    transform: Callable[[Tensor], Tensor],
    observed: tuple[Tensor, Tensor] | None = None,
    *,
    unitwise: bool = False,
) -> Tensor:
    """New state ``(B, n_target)`` of layer ``target``: ``transform`` of each unit's total input.

    ``transform`` maps logits to new values: ``torch.sigmoid`` for a mean-field update, a
    Bernoulli draw for a Gibbs update. By default every unit is updated at once from the current
    states, right when the layer has no lateral coupling (its units are then independent given
    the other layers). With ``unitwise`` and a lateral coupling (``W`` symmetric, zero diagonal)
    the units are updated one at a time in index order, each from the newest values of the
    others; the lateral input is kept up to date with one rank-one correction per unit, so a
    sweep costs about one ``(B, n) @ (n, n)`` product and never modifies a tensor in place
    (autograd can differentiate it). Only the layers coupled to ``target`` (``target`` itself
    included when it has a lateral coupling) need to be in ``states``.

    ``observed = (mask, values)``, both ``(B, n_target)``: units where ``mask`` is True keep
    ``values`` instead of being updated (clamped units of a partly observed layer).
    """

    def keep_observed(new: Tensor, columns: slice | int = slice(None)) -> Tensor:
        return new if observed is None else torch.where(observed[0][:, columns], observed[1][:, columns], new)

    lateral = next((w for edge, w in zip(edges, weights) if edge == (target, target)), None)
    if lateral is None or not unitwise:
        return keep_observed(transform(layer_logits(states, target, biases, weights, edges)))
    others = [(edge, w) for edge, w in zip(edges, weights) if edge != (target, target)]
    logits = layer_logits(states, target, biases, [w for _, w in others], [edge for edge, _ in others])
    current = states[target]
    lateral_input = current @ lateral
    columns = []
    for j in range(current.shape[1]):
        new = keep_observed(transform(logits[:, j] + lateral_input[:, j]), j)
        lateral_input = lateral_input + (new - current[:, j])[:, None] * lateral[j]
        columns.append(new)
    return torch.stack(columns, dim=1)


def pair_energy(edge: Edge, weight: Tensor, states: States) -> Tensor:
    """Energy ``(B,)`` of one coupling: ``-x_a W x_b^T``, or ``-1/2 x W x^T`` when lateral."""
    a, b = edge
    term = ((states[a] @ weight) * states[b]).sum(-1)
    return -0.5 * term if a == b else -term


def energy(
    states: States, biases: Sequence[Tensor], weights: Sequence[Tensor], edges: Sequence[Edge]
) -> Tensor:
    """Energy ``E(x) = -sum_l b_l.x_l - sum_couplings x_a^T W x_b`` of full joint states, ``(B,)``."""
    total = -sum(states[i] @ bias for i, bias in enumerate(biases))
    for edge, weight in zip(edges, weights):
        total = total + pair_energy(edge, weight, states)
    return total


def marginal_free_energy(
    given: Mapping[int, Tensor],
    biases: Sequence[Tensor],
    weights: Sequence[Tensor],
    edges: Sequence[Edge],
    summed_logits: Mapping[int, Tensor] | None = None,
) -> Tensor:
    """Free energy ``(B,)`` of the ``given`` layers' states with every other layer summed out.

    ``F = E(given alone) - sum_k sum_j softplus(logits_kj)`` over summed-out layers ``k``,
    exact only when no coupling joins two summed-out layers (a lateral coupling counts); the
    caller checks that. ``summed_logits`` passes the layers' ``layer_logits`` when already
    computed.
    """
    total = -sum(x @ biases[i] for i, x in given.items())
    for edge, weight in zip(edges, weights):
        if edge[0] in given and edge[1] in given:
            total = total + pair_energy(edge, weight, given)
    for k in range(len(biases)):
        if k not in given:
            logits = (
                layer_logits(given, k, biases, weights, edges) if summed_logits is None else summed_logits[k]
            )
            total = total - softplus(logits).sum(-1)
    return total


def pair_mean(x_a: Tensor, x_b: Tensor, sample_weights: Tensor | None = None) -> Tensor:
    """Average outer product ``<x_a^T x_b>`` over the batch, ``(n_a, n_b)``.

    With ``sample_weights`` ``(B,)`` (summing to one) it is the weighted sum instead.
    """
    if sample_weights is None:
        # The 1/B inside the product (beta=0: the zero input is never read) saves a pass over (n_a, n_b).
        return torch.addmm(x_a.new_zeros(()), x_a.mT, x_b, beta=0, alpha=1.0 / x_a.shape[0])
    return (x_a * sample_weights[:, None]).mT @ x_b


def base_rate_logits(data: Tensor, pseudocount: float) -> Tensor:
    """Log-odds ``(n,)`` (float64) of the smoothed base rates of ``data`` ``(B, n)``:
    ``p_i = (sum_b v_bi + pseudocount) / (B + 2 pseudocount)``."""
    counts = data.detach().to(torch.float64).sum(0)
    return torch.logit((counts + pseudocount) / (data.shape[0] + 2 * pseudocount))


def bernoulli(logits: Tensor, generator: torch.Generator | Uniforms) -> Tensor:
    """Draw binary units with ``p(x = 1) = sigmoid(logits)``; same shape and dtype as ``logits``.

    The one place Gibbs updates draw Bernoulli units (see :func:`sample_bernoulli`).
    """
    return sample_bernoulli(torch.sigmoid(logits), generator)


# torch's uniform_ draws float32 on the grid k / 2^24 and float64 on k / 2^53 (checked in
# tests/test_bernoulli.py); other dtypes use torch.bernoulli.
_UNIFORM_GRID = {torch.float32: 2.0**-24, torch.float64: 2.0**-53}


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
    """
    source = generator if isinstance(generator, Uniforms) else None
    generator = generator.generator if source is not None else generator
    grid = _UNIFORM_GRID.get(probabilities.dtype)
    if grid is None:
        return torch.bernoulli(probabilities, generator=generator)
    if source is not None and source.dtype == probabilities.dtype:
        uniform = source.take(probabilities.shape)
    else:
        uniform = _uniform(probabilities.shape, probabilities.dtype, generator)
    return _threshold(probabilities, uniform, grid, generator)


class Uniforms:
    """Uniforms on [0, 1) drawn from ``generator`` in blocks and handed out in order.

    One block for all the draws of a Gibbs sweep (or of many annealing steps) costs one call, filled
    by two threads when large, instead of one call per layer. ``take`` draws a new block of
    ``max(block_size, needed)`` when the current one runs out (its rest is dropped), so the
    numbers depend only on the sequence of requests.
    """

    def __init__(self, generator: torch.Generator, dtype: torch.dtype, block_size: int) -> None:
        self.generator, self.dtype, self.block_size = generator, dtype, block_size
        self._block, self._used = torch.empty(0, dtype=dtype), 0

    def take(self, shape: Sequence[int]) -> Tensor:
        """The next uniforms, a fresh ``shape`` view the caller may overwrite."""
        count = math.prod(shape)
        if self._used + count > self._block.numel():
            self._block = _uniform((max(self.block_size, count),), self.dtype, self.generator)
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


def _uniform(shape: Sequence[int], dtype: torch.dtype, generator: torch.Generator) -> Tensor:
    """Uniforms on [0, 1) of ``shape`` from ``generator`` (and, when large, a generator seeded
    from it), on torch's grid for ``dtype``."""
    out = torch.empty(shape, dtype=dtype)
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


def _threshold(probabilities: Tensor, uniform: Tensor, grid: float, generator: torch.Generator) -> Tensor:
    """``sample_bernoulli`` given the uniforms (overwritten with ``p - u``)."""
    difference = torch.sub(probabilities, uniform, out=uniform)
    on = torch.ge(difference, grid, out=torch.empty_like(probabilities))  # written as 0.0 / 1.0
    # Units in the grid cell of their probability are rare (probability ``grid`` each): they are the
    # ones counted by ``difference > 0`` but not by ``on``. Sums of 0/1 count exactly (in float32 below
    # 2^24 units) and are far cheaper than count_nonzero or building the cell's mask every time.
    positive = torch.gt(difference, 0.0, out=torch.empty_like(probabilities))
    exact = None if positive.numel() < 2**24 else torch.float64
    if float(positive.sum(dtype=exact)) != float(on.sum(dtype=exact)):
        cell = (difference > 0) & (difference < grid)
        fraction = difference[cell].to(torch.float64) / grid
        draws = torch.rand(fraction.shape, dtype=torch.float64, generator=generator) < fraction
        on[cell] = draws.to(on.dtype)
    return on


def bernoulli_log_probability(x: Tensor, probabilities: Tensor) -> Tensor:
    """``sum_j log p(x_j)`` per row ``(B,)``, float64, of binary ``x`` under independent units with
    ``p(x_j = 1) = probabilities`` (both ``(B, n)``)."""
    x, p = x.to(torch.float64), probabilities.to(torch.float64)
    return (torch.xlogy(x, p) + torch.xlogy(1.0 - x, 1.0 - p)).sum(-1)
