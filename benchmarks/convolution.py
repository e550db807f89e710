"""One block Gibbs sweep of a convolutional RBM against its two convolutions alone (the roofline of a
sweep), measured side by side in one run.

The model: ``size`` x ``size`` one-channel images joined to ``maps`` feature maps by ``kernel``-square
filters (``Conv2dCoupling``). A sweep draws the feature maps from the images (``conv2d``) and the
images from the maps (``conv_transpose2d``), one exact Bernoulli draw per unit. Ratio = time of the
two convolutions alone / time of the sweep (1.0 would be the roofline).

    python benchmarks/convolution.py [--size 48] [--maps 32] [--kernel 7] [--particles 10 100] [--threads 2]
"""

from __future__ import annotations

import argparse

import torch
from timing import best_time
from torch.nn import functional as F

import ebm_layers as el


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--size", type=int, default=48, help="image side (one channel)")
    parser.add_argument("--maps", type=int, default=32)
    parser.add_argument("--kernel", type=int, default=7)
    parser.add_argument("--particles", type=int, nargs="+", default=[10, 100, 1000])
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--repeats", type=int, default=10)
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    g = torch.Generator().manual_seed(0)
    coupling = el.Conv2dCoupling(0, 1, (1, args.size, args.size), args.maps, args.kernel)
    n_visible, n_maps = args.size * args.size, args.maps * coupling.out_shape[1] * coupling.out_shape[2]
    model = el.EnergyModel([el.BinaryLayer(n_visible), el.BinaryLayer(n_maps)], [coupling])
    model.reset_parameters(g)
    print(
        f"convolutional RBM {n_visible} -> {args.maps} maps {coupling.out_shape[1]}x{coupling.out_shape[2]} "
        f"({n_maps} units, {coupling.weight.numel()} weights); float32, torch {torch.__version__}, "
        f"{args.threads} threads"
    )
    header = ["particles", "convs ms", "sweep ms", "ratio", "unit updates/s"]
    print("  ".join(f"{name:>{max(len(name), 9)}}" for name in header))
    for num_particles in args.particles:
        roofline, sweep = measure(model, num_particles, args.repeats, g)
        updates = num_particles * (n_visible + n_maps) / sweep
        print(
            f"{num_particles:>9}  {roofline * 1e3:>9.2f}  {sweep * 1e3:>9.2f}  {roofline / sweep:>9.2f}  "
            f"{updates:>14.3g}",
            flush=True,
        )


def measure(
    model: el.EnergyModel, num_particles: int, repeats: int, g: torch.Generator
) -> tuple[float, float]:
    """Best times (s) of the two convolutions alone and of the sampler's sweep."""
    coupling = model.couplings[0]
    sampler = el.PersistentSampler(model, num_particles=num_particles, generator=g)
    v, h = (x.clone() for x in sampler.particles)
    weight = coupling.weight.detach()

    def convolutions() -> None:
        F.conv2d(v.view(-1, *coupling.in_shape), weight)
        F.conv_transpose2d(h.view(-1, *coupling.out_shape), weight)

    with torch.no_grad():
        return best_time(convolutions, repeats), best_time(sampler, repeats)


if __name__ == "__main__":
    main()
