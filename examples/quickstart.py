"""Quickstart: declare small binary energy models and compute exact quantities by enumeration.

Run from the repository root: ``python examples/quickstart.py``.
"""

import torch

import ebm_layers as el


def main() -> None:
    generator = torch.Generator().manual_seed(0)

    # A restricted Boltzmann machine with 6 visible and 4 hidden units, weights N(0, 1).
    model = el.rbm(6, 4, generator=generator, dtype=torch.float64)
    with torch.no_grad():
        model.couplings[0].weight.normal_(0.0, 1.0, generator=generator)
    log_z = el.exact_log_partition(model)
    print(model)
    print(f"exact log partition function: {log_z.item():.6f}")

    visible = torch.tensor([[1, 1, 1, 0, 0, 0], [0, 0, 0, 1, 1, 1], [1, 0, 1, 0, 1, 0]], dtype=torch.float64)
    hidden = torch.tensor([[1, 0, 0, 1], [0, 1, 1, 0], [1, 1, 1, 1]], dtype=torch.float64)
    with torch.no_grad():
        energies = model.energy([visible, hidden])
        free_energies = model.free_energy(visible)
        log_likelihoods = el.exact_log_likelihood(model, visible)
    print(f"\n{'visible v':>20} {'hidden h':>14} {'E(v, h)':>9} {'F(v)':>9} {'log p(v)':>9}")
    for v, h, e, f, ll in zip(visible, hidden, energies, free_energies, log_likelihoods):
        print(f"{str(v.int().tolist()):>20} {str(h.int().tolist()):>14} {e:9.3f} {f:9.3f} {ll:9.3f}")

    # The same library handles any layered graph: a 3-layer chain with lateral couplings
    # among its visible units, summed exactly over all 2^(5+3+2) = 1024 joint states.
    chain = el.EnergyModel(
        layers=[el.BinaryLayer(5), el.BinaryLayer(3), el.BinaryLayer(2)],
        couplings=[el.DenseCoupling(0, 1, 5, 3), el.DenseCoupling(1, 2, 3, 2), el.LateralCoupling(0, 5)],
    )
    chain.reset_parameters(generator)
    print(f"\n{chain.extra_repr()}")
    print(f"update classes {chain.schedule.classes}, unit-by-unit layers {sorted(chain.schedule.unitwise)}")
    print(f"exact log partition function: {el.exact_log_partition(chain).item():.6f}")


if __name__ == "__main__":
    main()
