"""The layer graph: which layers can be updated together, and which can be summed out.

Layers are vertices and couplings edges (``(a, b)``, with ``a == b`` for a lateral coupling).
Two questions about it recur everywhere: a colouring into classes of mutually uncoupled
layers (Gibbs sampling and mean field update a class at once), and a set of layers whose
removal leaves only uncoupled, lateral-free layers (those can be summed out in closed form).
"""

from __future__ import annotations

from collections.abc import Collection, Sequence
from dataclasses import dataclass
from itertools import combinations

__all__ = [
    "UpdateSchedule",
    "check_schedule",
    "colour_classes",
    "first_coupled_pair",
    "is_chain",
    "smallest_cover",
]

Edge = tuple[int, int]


@dataclass(frozen=True)
class UpdateSchedule:
    """How block Gibbs sampling and mean field visit the layers.

    Attributes:
        classes: colour classes in update order; no dense coupling joins two layers of one
            class, so a class is updated at once given the others. Layer 0 is in the first.
        unitwise: layers with a lateral coupling; their units depend on each other and are
            updated one unit at a time.
    """

    classes: tuple[tuple[int, ...], ...]
    unitwise: frozenset[int]


def check_schedule(schedule: object, num_layers: int, edges: Sequence[Edge]) -> None:
    """Raise unless ``schedule`` makes block Gibbs sampling and colour-ordered mean field correct.

    Every layer must be in exactly one class, no dense coupling may join two layers of one class
    (they would be updated together from each other's old values), and every layer with a lateral
    coupling must be updated unit by unit. Classes may come in any order, and a class may be
    split further.
    """
    if not isinstance(schedule, UpdateSchedule):
        raise TypeError(f"schedule must be an UpdateSchedule, got {type(schedule).__name__}")
    listed = [layer for layers in schedule.classes for layer in layers]
    if sorted(listed) != list(range(num_layers)):
        raise ValueError(
            f"schedule.classes must hold every layer 0..{num_layers - 1} exactly once, got {schedule.classes}"
        )
    position = {layer: c for c, layers in enumerate(schedule.classes) for layer in layers}
    for a, b in edges:
        if a == b and a not in schedule.unitwise:
            raise ValueError(f"layer {a} has lateral couplings, so schedule.unitwise must contain it")
        if a != b and position[a] == position[b]:
            raise ValueError(
                f"layers {a} and {b} are coupled, so schedule.classes must not put them in one class"
            )


def colour_classes(num_layers: int, edges: Sequence[Edge]) -> tuple[tuple[int, ...], ...]:
    """The fewest classes of mutually uncoupled layers (lateral couplings ignored).

    Among colourings with that many classes, layers are given the lowest class they can take
    in index order, so a chain splits into even and odd layers. Exhaustive search: layer
    graphs have a handful of vertices.
    """
    neighbours: list[set[int]] = [set() for _ in range(num_layers)]
    for a, b in edges:
        if a != b:
            neighbours[a].add(b)
            neighbours[b].add(a)

    def assign(colours: list[int], count: int) -> bool:
        layer = len(colours)
        if layer == num_layers:
            return True
        for colour in range(count):
            if all(colours[m] != colour for m in neighbours[layer] if m < layer):
                colours.append(colour)
                if assign(colours, count):
                    return True
                colours.pop()
        return False

    for count in range(1, num_layers + 1):
        colours: list[int] = []
        if assign(colours, count):
            return tuple(
                tuple(layer for layer in range(num_layers) if colours[layer] == c) for c in range(count)
            )
    raise AssertionError("a graph with n vertices always has an n-colouring")


def first_coupled_pair(edges: Sequence[Edge], kept: Collection[int]) -> int | None:
    """Index of the first coupling with neither end in ``kept`` (None if there is none).

    The layers outside ``kept`` can be summed out in closed form exactly when there is none.
    """
    for k, (a, b) in enumerate(edges):
        if a not in kept and b not in kept:
            return k
    return None


def is_chain(num_layers: int, edges: Sequence[Edge]) -> bool:
    """Whether the couplings are exactly ``(k, k + 1)`` for consecutive layers, in order (a :func:`dbm`)."""
    return list(edges) == [(k, k + 1) for k in range(num_layers - 1)]


def smallest_cover(sizes: Sequence[int], edges: Sequence[Edge]) -> tuple[int, ...]:
    """The set of layers with the fewest units in total that touches every coupling.

    Enumerating the states of these layers and summing the others out in closed form is the
    cheapest exact sum over the model's states (``2 ** sum(sizes[cover])`` terms). Ties go to
    fewer layers, then to lower indices.
    """
    layers = range(len(sizes))
    best: tuple[int, ...] | None = None
    for count in range(len(sizes) + 1):
        for cover in combinations(layers, count):
            if first_coupled_pair(edges, cover) is None and (
                best is None or sum(sizes[i] for i in cover) < sum(sizes[i] for i in best)
            ):
                best = cover
    assert best is not None  # all layers always cover every coupling
    return best
