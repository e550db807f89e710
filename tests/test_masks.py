"""Fixed masks on dense and lateral couplings: masked weights stay exactly zero, statistics are
masked, and a masked lateral layer is drawn one colour class of mutually uncoupled units at a time
(a lattice in two classes), leaving the exact distribution invariant."""

import pytest
import torch

import ebm_layers as el
from tests.helpers import lattice_mask, total_variation_after_one_sweep

F64 = torch.float64


def lattice_model(seed: int = 0) -> el.EnergyModel:
    """A fully visible 3 x 3 lattice of binary units (a pairwise model), float64."""
    model = el.EnergyModel(
        [el.BinaryLayer(9, dtype=F64)], [el.LateralCoupling(0, 9, mask=lattice_mask(3, 3), dtype=F64)]
    )
    g = torch.Generator().manual_seed(seed)
    with torch.no_grad():
        model.layers[0].bias.copy_(torch.randn(9, dtype=F64, generator=g) * 0.5)
        free = model.couplings[0].parametrizations.weight.original
        free.copy_(torch.randn(9, 9, dtype=F64, generator=g) * 0.8)
    return model


def test_a_lattice_is_drawn_in_two_colour_classes():
    classes = lattice_model().couplings[0].unit_classes()
    assert [c.tolist() for c in classes] == [[0, 2, 4, 6, 8], [1, 3, 5, 7]]  # a checkerboard
    # Without a mask every unit is its own class (one unit at a time).
    assert len(el.LateralCoupling(0, 9).unit_classes()) == 9


def test_colour_class_sweeps_leave_the_lattice_distribution_invariant():
    model = lattice_model()
    distance, noise = total_variation_after_one_sweep(model, 60_000, seed=1)
    assert distance < 1.5 * noise  # measured: about 1.0 x noise


def test_drawing_coupled_units_together_is_caught(monkeypatch):
    # Negative control: one class holding every unit draws neighbours at once from stale states.
    model = lattice_model()
    monkeypatch.setattr(model.couplings[0], "unit_classes", lambda: [torch.arange(9)])
    distance, noise = total_variation_after_one_sweep(model, 60_000, seed=1)
    assert distance > 5 * noise


def test_masked_weights_stay_exactly_zero_through_adam_and_weight_decay():
    g = torch.Generator().manual_seed(2)
    mask = torch.rand(6, 4, generator=g) < 0.5
    model = el.EnergyModel([el.BinaryLayer(6), el.BinaryLayer(4)], [el.DenseCoupling(0, 1, 6, 4, mask=mask)])
    model.reset_parameters(g)
    assert not model.couplings[0].weight.detach()[~mask].any()
    data = torch.bernoulli(torch.full((30, 6), 0.4), generator=g)
    sampler = el.PersistentSampler(model, num_particles=20, generator=g)
    objective = el.TwoPhaseObjective(model, el.MeanField(model), sampler)
    optimizer = torch.optim.AdamW(model.parameters(), lr=0.05, weight_decay=0.1)
    for _ in range(20):
        optimizer.zero_grad()
        objective(data).backward()
        optimizer.step()
    weight = model.couplings[0].weight.detach()
    assert not weight[~mask].any() and weight[mask].abs().min() > 0


def test_masked_statistics_and_exact_gradient():
    g = torch.Generator().manual_seed(3)
    mask = torch.rand(5, 3, generator=g) < 0.6
    model = el.EnergyModel(
        [el.BinaryLayer(5, dtype=F64), el.BinaryLayer(3, dtype=F64)],
        [el.DenseCoupling(0, 1, 5, 3, mask=mask, dtype=F64)],
    )
    with torch.no_grad():
        for parameter in model.parameters():
            parameter.copy_(torch.randn(parameter.shape, dtype=F64, generator=g))
    v = torch.bernoulli(torch.full((8, 5), 0.5, dtype=F64), generator=g)
    objective = el.TwoPhaseObjective(model, el.MeanField(model), el.ExactStatistics(model))
    objective(v).backward()
    ours = [p.grad.clone() for p in model.parameters()]
    model.zero_grad()
    # Autograd of the exact average negative log-likelihood: free energy plus log Z (mathematics,
    # log Z by the library's enumeration, checked against brute force in test_exact.py).
    (model.free_energy(v).mean() + el.exact_log_partition(model)).backward()
    for mine, reference in zip(ours, model.parameters()):
        torch.testing.assert_close(mine, reference.grad, rtol=1e-10, atol=1e-12)
    free_gradient = ours[-1]
    assert not free_gradient[~mask].any()


@pytest.mark.parametrize(
    "build, message",
    [
        (lambda: el.DenseCoupling(0, 1, 3, 2, mask=torch.ones(3, 2)), "mask must be a bool tensor"),
        (lambda: el.DenseCoupling(0, 1, 3, 2, mask=torch.ones(2, 3, dtype=torch.bool)), "mask must have"),
        (
            lambda: el.LateralCoupling(0, 3, mask=torch.tensor([[0, 1, 0], [0, 0, 0], [0, 0, 0]]).bool()),
            "symmetric",
        ),
    ],
)
def test_bad_masks_are_refused(build, message):
    with pytest.raises((TypeError, ValueError), match=message):
        build()


def test_assigning_a_weight_outside_the_mask_is_refused():
    mask = torch.tensor([[True, False], [False, True]])
    coupling = el.DenseCoupling(0, 1, 2, 2, mask=mask)
    before = coupling.weight.detach().clone()
    with pytest.raises(ValueError, match="zero outside its mask"):
        coupling.weight = torch.ones(2, 2)
    assert torch.equal(coupling.weight.detach(), before)
