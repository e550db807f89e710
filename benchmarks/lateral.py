"""Gibbs sweeps of fully visible pairwise models (a binary layer with a lateral coupling) against lean
plain-torch loops doing the same draws, measured side by side in one run, one thread.

1. A dense lateral layer (every unit coupled to every other, drawn one unit at a time). The plain
   loop draws the sweep's uniforms at once and keeps the input up to date with one rank-one
   correction per unit (its draws ``u < p`` are not corrected on the uniform's grid; ours are).
   The library's generic class-by-class update (``EnergyModel.update_layer``, what every sweep used
   before the fast path) is printed for reference.
2. A lattice (masked lateral coupling, four neighbours each, two colour classes). The plain
   checkerboard draws each colour class from the other by one dense product with the weights
   between the two classes; a second plain loop uses a gathered product over the four neighbours.

Ratio = library sweep time / plain loop time (the targets: at most 1.5 for both models). Times are
medians of ``--rounds`` rounds, each the best of ``--repeats`` sweeps, the contenders alternating.

    python benchmarks/lateral.py [--units 64] [--chains 400] [--side 32] [--lattice-chains 100]
"""

from __future__ import annotations

import argparse
import statistics

import torch
from timing import best_time

import ebm_layers as el


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--units", type=int, default=64, help="units of the dense lateral layer")
    parser.add_argument("--chains", type=int, default=400, help="chains of the dense model")
    parser.add_argument("--side", type=int, default=32, help="lattice side (side^2 units)")
    parser.add_argument("--lattice-chains", type=int, default=100)
    parser.add_argument("--repeats", type=int, default=10, help="sweeps per round (best kept)")
    parser.add_argument("--rounds", type=int, default=7, help="rounds (median kept)")
    args = parser.parse_args()
    torch.set_num_threads(1)
    print(f"float32, torch {torch.__version__}, 1 thread; medians of {args.rounds} rounds")
    dense(args.units, args.chains, args.repeats, args.rounds)
    lattice(args.side, args.lattice_chains, args.repeats, args.rounds)


def compare(contenders: dict[str, callable], repeats: int, rounds: int) -> dict[str, float]:
    """Median over rounds of each contender's best time (s), the contenders alternating."""
    times: dict[str, list[float]] = {name: [] for name in contenders}
    for _ in range(rounds):
        for name, run in contenders.items():
            times[name].append(best_time(run, repeats))
    return {name: statistics.median(values) for name, values in times.items()}


def report(title: str, times: dict[str, float], units: int, reference: str) -> None:
    print(title)
    for name, seconds in times.items():
        ratio = times["library sweep"] / seconds
        note = f"library / this {ratio:5.2f}" if name != "library sweep" else ""
        target = "  (target <= 1.5)" if name == reference else ""
        print(f"  {name:<34} {seconds * 1e3:8.3f} ms  {seconds / units * 1e6:7.2f} us/unit  {note}{target}")


def dense(n: int, chains: int, repeats: int, rounds: int) -> None:
    g = torch.Generator().manual_seed(0)
    model = el.EnergyModel([el.BinaryLayer(n)], [el.LateralCoupling(0, n)])
    model.reset_parameters(g)
    with torch.no_grad():
        model.couplings[0].weight = model.couplings[0].weight * 30  # weights of a trained model's size
        model.layers[0].bias.normal_(0.0, 0.5, generator=g)
    sampler = el.PersistentSampler(model, num_particles=chains, generator=g)
    weight, bias = model.couplings[0].weight.detach(), model.layers[0].bias.detach()
    x = sampler.particles[0].clone()

    def plain() -> None:
        uniform = torch.rand(chains, n, generator=g)
        input = x @ weight
        for j in range(n):
            new = (uniform[:, j] < torch.sigmoid(bias[j] + input[:, j])).to(x.dtype)
            change = new - x[:, j]
            x[:, j] = new
            input.add_(change[:, None] * weight[j])

    def generic() -> None:
        states = list(sampler.particles)
        model.update_layer(states, 0, lambda layer, input: layer.sample(input, g))

    with torch.no_grad():
        times = compare(
            {"library sweep": sampler, "plain loop (rank-one)": plain, "generic update_layer": generic},
            repeats,
            rounds,
        )
    report(f"dense lateral layer: {n} units, {chains} chains", times, n, "plain loop (rank-one)")


def lattice_mask(side: int) -> torch.Tensor:
    """Four-neighbour lattice (no wrap-around) of ``side`` x ``side`` units, row-major."""
    index = torch.arange(side * side).view(side, side)
    mask = torch.zeros(side * side, side * side, dtype=torch.bool)
    for a, b in ((index[:, :-1], index[:, 1:]), (index[:-1, :], index[1:, :])):
        mask[a.flatten(), b.flatten()] = True
        mask[b.flatten(), a.flatten()] = True
    return mask


def lattice(side: int, chains: int, repeats: int, rounds: int) -> None:
    g = torch.Generator().manual_seed(1)
    n = side * side
    mask = lattice_mask(side)
    model = el.EnergyModel([el.BinaryLayer(n)], [el.LateralCoupling(0, n, mask=mask)])
    model.reset_parameters(g)
    with torch.no_grad():
        model.couplings[0].weight = model.couplings[0].weight * 40
    sampler = el.PersistentSampler(model, num_particles=chains, generator=g)
    weight, bias = model.couplings[0].weight.detach(), model.layers[0].bias.detach()
    row, column = torch.arange(n) // side, torch.arange(n) % side
    classes = [torch.nonzero((row + column) % 2 == c).flatten() for c in (0, 1)]
    blocks = [weight[classes[1 - c]][:, classes[c]].contiguous() for c in (0, 1)]
    degree = int(mask.sum(1).max())
    order = torch.sort(mask.to(torch.int8), dim=1, descending=True, stable=True).indices[:, :degree]
    near = [
        torch.where(mask[classes[c]].gather(1, order[classes[c]]), order[classes[c]], classes[c][:, None])
        for c in (0, 1)
    ]
    near_weights = [weight[classes[c]].gather(1, near[c]) for c in (0, 1)]
    x = sampler.particles[0].clone()

    def checkerboard() -> None:
        uniform = torch.rand(chains, n, generator=g)
        for c in (0, 1):
            logits = bias[classes[c]] + x[:, classes[1 - c]] @ blocks[c]
            x[:, classes[c]] = (uniform[:, classes[c]] < torch.sigmoid(logits)).to(x.dtype)

    def gathered() -> None:
        uniform = torch.rand(chains, n, generator=g)
        for c in (0, 1):
            logits = bias[classes[c]] + (x[:, near[c]] * near_weights[c]).sum(-1)
            x[:, classes[c]] = (uniform[:, classes[c]] < torch.sigmoid(logits)).to(x.dtype)

    with torch.no_grad():
        times = compare(
            {
                "library sweep": sampler,
                "plain checkerboard (dense blocks)": checkerboard,
                "plain checkerboard (gathered)": gathered,
            },
            repeats,
            rounds,
        )
    report(
        f"lattice: {side}x{side} units, 4 neighbours, {chains} chains",
        times,
        n,
        "plain checkerboard (dense blocks)",
    )


if __name__ == "__main__":
    main()
