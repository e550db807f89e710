"""Your own unit type and coupling type, mixed with built-in ones, without editing the library.

python examples/custom_modules.py      # about 20 s; writes out/custom_modules_samples.png

The marking scans are read as spins (+1 ink, -1 paper) by a unit type defined here, joined to
binary hidden units by a coupling of rank 16 defined here (W = left @ right.T, never formed). Each
class defines only what ``el.UnitLayer`` and ``el.Coupling`` ask for; fit, mean field, Gibbs
sampling and annealed importance sampling use them as they are.
"""

import argparse

import torch
from torch import Tensor, nn

import ebm_layers as el


class SpinLayer(el.UnitLayer):
    """Units in {-1, +1} with energy ``-b.s``: ``P(s = +1 | input) = sigmoid(2 (b + input))``."""

    support = (-1.0, 1.0)

    def __init__(self, size: int) -> None:
        super().__init__()
        self.size = size
        self.bias = nn.Parameter(torch.zeros(size))

    def energy(self, x: Tensor) -> Tensor:
        return -(x @ self.bias)

    def mean(self, input: Tensor) -> Tensor:
        return torch.tanh(input + self.bias)

    def sample(self, input: Tensor, generator: torch.Generator) -> Tensor:
        return 2.0 * torch.bernoulli(torch.sigmoid(2.0 * (input + self.bias)), generator=generator) - 1.0

    def log_partition(self, input: Tensor) -> Tensor:
        field = input + self.bias
        return torch.logaddexp(field, -field).sum(-1)

    def entropy(self, mean: Tensor) -> Tensor:
        up = (1.0 + mean) / 2.0
        return -(torch.xlogy(up, up) + torch.xlogy(1.0 - up, 1.0 - up)).sum(-1)


class LowRankCoupling(el.Coupling):
    """Weights ``left @ right.T`` of rank ``rank`` between layers ``a`` and ``b``."""

    def __init__(self, a: int, b: int, n_a: int, n_b: int, rank: int, generator: torch.Generator) -> None:
        super().__init__()
        self.a, self.b = a, b
        self.left = nn.Parameter(0.1 * torch.randn(n_a, rank, generator=generator))
        self.right = nn.Parameter(0.1 * torch.randn(n_b, rank, generator=generator))

    def input_to(self, target: int, x: Tensor) -> Tensor:
        if target == self.b:
            return (x @ self.left) @ self.right.T
        return (x @ self.right) @ self.left.T

    def energy(self, x_a: Tensor, x_b: Tensor) -> Tensor:
        return -((x_a @ self.left) * (x_b @ self.right)).sum(-1)


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--examples", type=int, default=2000)
    parser.add_argument("--epochs", type=int, default=10)
    parser.add_argument("--hidden", type=int, default=64)
    parser.add_argument("--num-betas", type=int, default=2000)
    args = parser.parse_args()

    g = torch.Generator().manual_seed(0)
    scans, _ = el.datasets.parts_markings(args.examples + 500, generator=g)
    spins = 2.0 * scans - 1.0  # ink +1, paper -1
    train, test = spins[: args.examples], spins[args.examples :]
    model = el.EnergyModel(
        [SpinLayer(144), el.BinaryLayer(args.hidden)],
        [LowRankCoupling(0, 1, 144, args.hidden, rank=16, generator=g)],
    )
    print(model)
    el.fit(model, train, epochs=args.epochs, progress=False, generator=g)

    estimate = el.ais_log_partition(
        model, num_chains=100, num_betas=args.num_betas, generator=g, progress=False
    )
    with torch.no_grad():
        test_log_likelihood = float((-model.free_energy(test)).mean()) - estimate.log_z
    print(f"AIS: {estimate}")
    print(f"held-out log-likelihood per scan: {test_log_likelihood:.2f} nats (optimistic: log Z from AIS)")
    sampler = el.PersistentSampler(model, num_particles=64, generator=g)
    samples = sampler.sample(64, burn_in=500, progress=False)[0]
    print("saved", el.save_image_grid("out/custom_modules_samples.png", (samples + 1) / 2, (12, 12)))


if __name__ == "__main__":
    main()
