"""Statistics: what the positive and negative phases hand to the objective."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from torch import Tensor

from . import functional as F

__all__ = ["Statistics"]


@dataclass
class Statistics:
    """Layer means and coupling pair averages, from data, marginals or particles.

    Attributes:
        means: one ``(n_i,)`` tensor per layer: the average state (or marginal) of each unit.
        pairs: one tensor per coupling, in ``model.couplings`` order: the average of
            ``x_a^T x_b``, shape ``(n_a, n_b)`` (``(n, n)`` for a lateral coupling).
    """

    means: list[Tensor]
    pairs: list[Tensor]

    @classmethod
    def from_states(
        cls,
        states: Sequence[Tensor],
        edges: Sequence[tuple[int, int]],
        sample_weights: Tensor | None = None,
    ) -> Statistics:
        """Averages over a batch of states ``(B, n_i)`` per layer; weighted when ``sample_weights``
        ``(B,)`` (summing to one) is given."""
        if sample_weights is None:
            means = [x.mean(0) for x in states]
        else:
            means = [sample_weights @ x for x in states]
        pairs = [F.pair_mean(states[a], states[b], sample_weights) for a, b in edges]
        return cls(means, pairs)
