"""One block Gibbs sweep of a 784-500-1000 chain against its matrix products alone (the GEMM
roofline) and against a plain torch loop, measured side by side in one run.

A sweep of a chain draws the odd layers from the even ones, then the even layers from the odd
ones: four matrix products, and one Bernoulli draw per unit. The timed sweeps include every random
number. Ratio = time of the four products alone / time of the sweep (1.0 would be the roofline;
the target is 0.85).

    python benchmarks/sweep.py [--sizes 784 500 1000] [--particles 100 1000] [--threads 2]
"""

from __future__ import annotations

import argparse

import torch
from timing import best_time

import ebm_layers as el


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--sizes", type=int, nargs=3, default=[784, 500, 1000])
    parser.add_argument("--particles", type=int, nargs="+", default=[100, 1000])
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--repeats", type=int, default=20)
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    g = torch.Generator().manual_seed(0)
    model = el.dbm(*args.sizes, generator=g)
    print(
        f"chain {'-'.join(map(str, args.sizes))}, float32; torch {torch.__version__}, {args.threads} threads"
    )
    print(
        f"{'particles':>9}  {'products ms':>11}  {'sweep ms':>8}  {'ratio':>5}  {'plain loop ms':>13}  "
        f"{'plain ratio':>11}  {'unit updates/s':>14}"
    )
    for num_particles in args.particles:
        roofline, sweep, plain = measure(model, num_particles, args.repeats, g)
        updates = num_particles * sum(args.sizes) / sweep
        print(
            f"{num_particles:>9}  {roofline * 1e3:>11.2f}  {sweep * 1e3:>8.2f}  {roofline / sweep:>5.2f}  "
            f"{plain * 1e3:>13.2f}  {roofline / plain:>11.2f}  {updates:>14.3g}",
            flush=True,
        )


def measure(model: el.EnergyModel, num_particles: int, repeats: int, g: torch.Generator):
    """Best times (s) of the four products, the sampler's sweep and a plain torch sweep."""
    first, second = (w.detach() for w in model.weights())
    biases = [b.detach() for b in model.biases()]
    sampler = el.PersistentSampler(model, num_particles=num_particles, generator=g)
    v, h1, h2 = (x.clone() for x in sampler.particles)

    def products():
        torch.mm(v, first)
        torch.mm(h2, second.T)
        torch.mm(h1, first.T)
        torch.mm(h1, second)

    def plain_sweep():  # the same sweep written directly with torch.bernoulli
        nonlocal v, h1, h2
        logits = torch.addmm(biases[1], v, first).addmm_(h2, second.T)
        h1 = torch.bernoulli(torch.sigmoid(logits), generator=g)
        v = torch.bernoulli(torch.sigmoid(torch.addmm(biases[0], h1, first.T)), generator=g)
        h2 = torch.bernoulli(torch.sigmoid(torch.addmm(biases[2], h1, second)), generator=g)

    return best_time(products, repeats), best_time(sampler, repeats), best_time(plain_sweep, repeats)


if __name__ == "__main__":
    main()
