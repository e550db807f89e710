"""Small models, exactly: declare binary energy models, compute exact quantities by enumeration
(log Z, free energies, likelihoods, model statistics), compare chains and mean field with them,
and train an RBM in your own torch loop or with fit().

Run from the repository root: ``python examples/small_models.py``.
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

    # Model statistics two ways for the RBM: persistent Gibbs chains against exact enumeration.
    sampler = el.PersistentSampler(model, num_particles=20_000, sweeps=50, generator=generator)
    sampled, exact = sampler.statistics(), el.ExactStatistics(model).statistics()
    print("\nhidden unit means under the RBM (20,000 persistent chains after 50 sweeps vs exact):")
    print(f"  chains {[round(m, 3) for m in sampled['layers.1.bias'].tolist()]}")
    print(f"  exact  {[round(m, 3) for m in exact['layers.1.bias'].tolist()]}")
    gap = float((sampled["couplings.0.weight"] - exact["couplings.0.weight"]).abs().max())
    print(f"  largest gap over all pair averages: {gap:.4f} (one standard error <= {0.5 / 20_000**0.5:.4f})")

    # Data statistics of a 3-layer chain by mean field: colour-ordered vs damped parallel updates.
    deep = el.dbm(6, 4, 3, generator=generator, dtype=torch.float64)
    with torch.no_grad():
        for coupling in deep.couplings:
            coupling.weight.normal_(0.0, 1.5, generator=generator)
    print("\nmean field on a 6-4-3 chain, visible layer clamped to the three rows above:")
    for update in ("colour", "parallel"):
        mf = el.MeanField(deep, update=update, tol=1e-10, max_iter=1000)
        with torch.no_grad():
            marginals = mf(visible)
        print(
            f"  {update:<8} {mf.iterations:>3} updates, residual {mf.residual:.1e}, "
            f"top layer {[round(m, 3) for m in marginals[2][0].tolist()]} ..."
        )

    # Learning: the three rows above, each copied 100 times with 5% of the bits flipped.
    data = visible.float().repeat(100, 1)
    data = (data + torch.bernoulli(torch.full_like(data, 0.05), generator=generator)) % 2
    learner = el.rbm(6, 4, generator=generator)
    before = el.exact_log_likelihood(learner, data).mean().item()
    # Your own loop: mean field gives the data statistics, persistent chains the model's; the
    # objective's gradient is minus their difference, for any torch optimizer.
    sampler = el.PersistentSampler(learner, num_particles=100, generator=generator)
    objective = el.TwoPhaseObjective(learner, el.MeanField(learner), sampler)
    optimizer = torch.optim.Adam(learner.parameters(), lr=0.01)
    for _ in range(20):
        for batch in data[torch.randperm(len(data), generator=generator)].split(10):
            loss = objective(batch)
            optimizer.zero_grad()
            loss.backward()
            optimizer.step()
    with torch.no_grad():
        own_loop = el.exact_log_likelihood(learner, data).mean().item()
    # The same in one call, with measured defaults (and checkpoints, callbacks, a progress bar).
    fitted = el.rbm(6, 4, generator=generator)
    el.fit(fitted, data, epochs=20, progress=False, generator=generator)
    with torch.no_grad():
        with_fit = el.exact_log_likelihood(fitted, data).mean().item()
    print("\ntraining a 6-4 RBM on 300 noisy copies of the three rows (exact log p(v) per row):")
    print(f"  untrained {before:.3f}   own loop, 20 epochs {own_loop:.3f}   fit, 20 epochs {with_fit:.3f}")


if __name__ == "__main__":
    main()
