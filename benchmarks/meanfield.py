"""Mean field on a deep chain: iterations to converge (colour vs damped parallel), time per call
against the least matrix products such a call needs (the GEMM roofline), and autograd memory of
the implicit vs unrolled backward. Everything is measured side by side in one run.

    python benchmarks/meanfield.py [--sizes 784 500 1000] [--batch 100] [--scale 0.05]
"""

from __future__ import annotations

import argparse

import torch
from timing import best_time

import ebm_layers as el


def peak_graph_bytes(run) -> int:
    """Peak bytes held by autograd graphs (saved tensors) while ``run()`` builds and frees them."""
    live, peak = [0], [0]

    class Held:
        def __init__(self, tensor):
            self.tensor, self.size = tensor, tensor.numel() * tensor.element_size()
            live[0] += self.size
            peak[0] = max(peak[0], live[0])

        def __del__(self):
            live[0] -= self.size

    with torch.autograd.graph.saved_tensors_hooks(Held, lambda held: held.tensor):
        run()
    return peak[0]


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--sizes", type=int, nargs="+", default=[784, 500, 1000])
    parser.add_argument("--batch", type=int, default=100)
    parser.add_argument("--scale", type=float, default=0.05, help="std of the random weights")
    parser.add_argument("--tol", type=float, default=1e-5)
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()

    generator = torch.Generator().manual_seed(args.seed)
    model = el.dbm(*args.sizes, generator=generator)
    with torch.no_grad():
        for coupling in model.couplings:
            coupling.weight.normal_(0.0, args.scale, generator=generator)
        for layer in model.layers[1:]:
            layer.bias.normal_(-1.0, 0.5, generator=generator)
    v = torch.bernoulli(torch.full((args.batch, args.sizes[0]), 0.3), generator=generator)
    print(f"chain {args.sizes}, batch {args.batch}, weights N(0, {args.scale}^2), tol {args.tol:g}")
    print(f"torch {torch.__version__}, {torch.get_num_threads()} threads, float32")

    # The least matrix work of a call: the clamped visible layer's input once, then per update
    # every coupling between free layers once in each direction.
    weights = [w.detach() for w in model.weights()]
    states = [torch.rand(args.batch, n, generator=generator) for n in args.sizes]
    once = best_time(lambda: states[0] @ weights[0])

    def free_products():
        for k, w in enumerate(weights[1:], start=1):
            states[k] @ w
            states[k + 1] @ w.T

    per_update = best_time(free_products)
    print(f"\n{'update':<22}{'iterations':>11}{'ms/call':>9}{'GEMM roofline/call':>20}")
    for name, mf in [
        ("colour", el.MeanField(model, tol=args.tol, max_iter=1000)),
        ("parallel, damping 0.5", el.MeanField(model, update="parallel", tol=args.tol, max_iter=1000)),
        (
            "parallel, damping 0.0",
            el.MeanField(model, update="parallel", damping=0.0, tol=args.tol, max_iter=1000),
        ),
    ]:
        with torch.no_grad():
            seconds = best_time(lambda mf=mf: mf(v))
        roofline = once + mf.iterations * per_update
        note = "" if mf.converged else "  (did not converge)"
        print(f"{name:<22}{mf.iterations:>11}{1e3 * seconds:>9.2f}{roofline / seconds:>20.2f}{note}")

    print(f"\n{'backward':<10}{'tol':>8}{'iterations':>11}{'graph MiB':>11}")
    for backward in ("implicit", "unroll"):
        for tol in (1e-3, 1e-5, 1e-6):
            mf = el.MeanField(model, tol=tol, max_iter=1000, backward=backward)
            peak = peak_graph_bytes(lambda mf=mf: sum(mu.sum() for mu in mf(v)[1:]).backward())
            print(f"{backward:<10}{tol:>8.0e}{mf.iterations:>11}{peak / 2**20:>11.2f}")


if __name__ == "__main__":
    main()
