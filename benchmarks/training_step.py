"""One training step of an RBM with the library (TwoPhaseObjective: mean field + persistent
chains, backward, optimizer step) against a plain torch loop doing the same arithmetic by hand, and
against the step's matrix products alone (the GEMM roofline), measured side by side in one run.
The optimizer is plain SGD by default, as scikit-learn's ``BernoulliRBM`` uses (``--optimizer
adam`` for Adam on both sides). Target: the library's step at least 0.8 of the roofline.

    python benchmarks/training_step.py [--sizes 784 500] [--batch 100] [--particles 100] [--optimizer sgd]
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
    parser.add_argument("--sizes", type=int, nargs=2, default=[784, 500])
    parser.add_argument("--batch", type=int, default=100)
    parser.add_argument("--particles", type=int, default=100)
    parser.add_argument("--optimizer", choices=["sgd", "adam"], default="sgd")
    parser.add_argument("--repeats", type=int, default=20)
    args = parser.parse_args()
    n_visible, n_hidden = args.sizes
    g = torch.Generator().manual_seed(0)
    data = torch.bernoulli(torch.full((args.batch, n_visible), 0.3), generator=g)
    print(f"RBM {n_visible}-{n_hidden}, batch {args.batch}, {args.particles} particles, one sweep per step")
    threads = torch.get_num_threads()
    print(f"torch {torch.__version__}, {threads} threads, float32, optimizer {args.optimizer}")
    optimizer_class = torch.optim.SGD if args.optimizer == "sgd" else torch.optim.Adam

    model = el.rbm(n_visible, n_hidden, generator=g)
    sampler = el.PersistentSampler(model, num_particles=args.particles, generator=g)
    objective = el.TwoPhaseObjective(model, el.MeanField(model), sampler)
    optimizer = optimizer_class(model.parameters(), lr=1e-3)

    def library_step():
        loss = objective(data)
        optimizer.zero_grad()
        loss.backward()
        optimizer.step()

    # The same learning rule written directly: positive statistics from the hidden probabilities,
    # one block Gibbs sweep of the particles, gradients set by hand, the same optimizer.
    weight = torch.randn(n_visible, n_hidden, generator=g) * 0.01
    visible_bias, hidden_bias = torch.zeros(n_visible), torch.zeros(n_hidden)
    parameters = [visible_bias, hidden_bias, weight]
    plain_optimizer = optimizer_class(parameters, lr=1e-3)
    particles = torch.bernoulli(torch.full((args.particles, n_visible), 0.5), generator=g)
    fantasy_hidden = torch.bernoulli(torch.full((args.particles, n_hidden), 0.5), generator=g)

    def plain_step():
        nonlocal particles, fantasy_hidden
        hidden = torch.sigmoid(torch.addmm(hidden_bias, data, weight))
        particles = torch.bernoulli(
            torch.sigmoid(torch.addmm(visible_bias, fantasy_hidden, weight.T)), generator=g
        )
        fantasy_hidden = torch.bernoulli(
            torch.sigmoid(torch.addmm(hidden_bias, particles, weight)), generator=g
        )
        weight.grad = particles.T @ fantasy_hidden / args.particles - data.T @ hidden / args.batch
        visible_bias.grad = particles.mean(0) - data.mean(0)
        hidden_bias.grad = fantasy_hidden.mean(0) - hidden.mean(0)
        plain_optimizer.step()

    # The least matrix work of a step: the data's hidden input, its pair average, a sweep (hidden
    # and visible draws: two products), and the particles' pair average.
    hidden = torch.rand(args.batch, n_hidden)
    some_hidden = torch.rand(args.particles, n_hidden)

    def products():
        data @ weight
        data.T @ hidden
        some_hidden @ weight.T
        particles @ weight
        particles.T @ some_hidden

    timings = {
        "GEMMs only": best_time(products, args.repeats),
        "plain torch loop": best_time(plain_step, args.repeats),
        "ebm_layers objective": best_time(library_step, args.repeats),
    }
    roofline = timings["GEMMs only"]
    print(f"\n{'':<22}{'ms/step':>9}{'GEMM roofline/step':>20}")
    for name, seconds in timings.items():
        print(f"{name:<22}{1e3 * seconds:>9.3f}{roofline / seconds:>20.2f}")
    ratio = timings["ebm_layers objective"] / timings["plain torch loop"]
    print(f"\nobjective / plain torch loop: {ratio:.2f}")


if __name__ == "__main__":
    main()
