"""Openness, tested the way a user would: a unit type and a coupling type defined here, outside
the package, from the documented protocols alone (``el.UnitLayer``, ``el.Coupling``), mixed with
built-in modules in one model, go through every algorithm of the library.

The user's classes define only what the protocols list: the spin layer has no ``statistics`` and
no ``initial_states`` (the library's generic defaults are used), the low-rank coupling has no
``weight`` and no ``statistics``. Every expected value below comes from brute-force enumeration
written here from the mathematics, not from the library.
"""

import itertools
import math

import pytest
import torch
from torch import Tensor, nn

import ebm_layers as el

F64 = torch.float64


class SpinLayer(el.UnitLayer):
    """``n`` units in {-1, +1} with energy ``-b.s``: ``p(s | input)`` has ``P(s = 1) = sigmoid(2 a)``,
    ``a = b + input``, mean ``tanh(a)``, log-partition ``sum log(2 cosh a)`` (mathematics)."""

    support = (-1.0, 1.0)

    def __init__(self, size: int) -> None:
        super().__init__()
        self.size = size
        self.bias = nn.Parameter(torch.zeros(size, dtype=F64))

    def energy(self, x: Tensor) -> Tensor:
        return -(x * self.bias).sum(-1)

    def mean(self, input: Tensor) -> Tensor:
        return torch.tanh(input + self.bias)

    def sample(self, input: Tensor, generator: torch.Generator) -> Tensor:
        up = torch.sigmoid(2.0 * (input + self.bias))
        return 2.0 * torch.bernoulli(up, generator=generator) - 1.0

    def log_partition(self, input: Tensor) -> Tensor:
        field = input + self.bias
        return torch.logaddexp(field, -field).sum(-1)

    def entropy(self, mean: Tensor) -> Tensor:
        up = (1.0 + mean) / 2.0
        return -(torch.xlogy(up, up) + torch.xlogy(1.0 - up, 1.0 - up)).sum(-1)

    @property
    def num_states(self) -> int:
        return 2**self.size

    def states(self, start: int, stop: int) -> Tensor:
        codes = torch.arange(start, stop)[:, None] >> torch.arange(self.size)
        return 2.0 * (codes & 1).to(F64) - 1.0


class LowRankCoupling(el.Coupling):
    """Weights ``W = left @ right.T`` of rank ``r`` between layers ``a`` and ``b``: energy
    ``-x_a W x_b^T`` without ever forming ``W``."""

    def __init__(self, a: int, b: int, n_a: int, n_b: int, rank: int) -> None:
        super().__init__()
        self.a, self.b = a, b
        self.left = nn.Parameter(torch.zeros(n_a, rank, dtype=F64))
        self.right = nn.Parameter(torch.zeros(n_b, rank, dtype=F64))

    def input_to(self, target: int, x: Tensor) -> Tensor:
        if target == self.b:
            return (x @ self.left) @ self.right.T
        return (x @ self.right) @ self.left.T

    def energy(self, x_a: Tensor, x_b: Tensor) -> Tensor:
        return -((x_a @ self.left) * (x_b @ self.right)).sum(-1)


class WrongSpinLayer(SpinLayer):
    """Negative control: draws with ``P(s = 1) = sigmoid(a)``, forgetting the factor 2."""

    def sample(self, input: Tensor, generator: torch.Generator) -> Tensor:
        up = torch.sigmoid(input + self.bias)
        return 2.0 * torch.bernoulli(up, generator=generator) - 1.0


RING = torch.tensor([[0, 1, 0, 1], [1, 0, 1, 0], [0, 1, 0, 1], [1, 0, 1, 0]], dtype=torch.bool)


def mixed_model(seed: int = 0, layer: type[SpinLayer] = SpinLayer) -> el.EnergyModel:
    """Spins (4) and binary units (3) joined by a rank-2 coupling; the spins also laterally coupled
    on a ring (a built-in masked coupling: two colour classes)."""
    model = el.EnergyModel(
        [layer(4), el.BinaryLayer(3, dtype=F64)],
        [LowRankCoupling(0, 1, 4, 3, rank=2), el.LateralCoupling(0, 4, mask=RING, dtype=F64)],
    )
    g = torch.Generator().manual_seed(seed)
    with torch.no_grad():
        for parameter in model.parameters():
            parameter.copy_(torch.randn(parameter.shape, dtype=F64, generator=g) * 0.7)
    return model


def explicit_energy(model: el.EnergyModel, s: Tensor, h: Tensor) -> Tensor:
    """``-b_s.s - b_h.h - s (L R^T) h - 1/2 s M s`` with every matrix written out (mathematics)."""
    spins, hidden = model.layers
    low_rank, lateral = model.couplings
    weight = low_rank.left @ low_rank.right.T
    ring = lateral.weight
    return -(s @ spins.bias) - (h @ hidden.bias) - ((s @ weight) * h).sum(-1) - 0.5 * ((s @ ring) * s).sum(-1)


def every_state(model: el.EnergyModel) -> tuple[Tensor, Tensor]:
    """Every joint state: spins and binary units, ``(128, 4)`` and ``(128, 3)``."""
    rows = list(
        itertools.product(
            (-1.0, 1.0), (-1.0, 1.0), (-1.0, 1.0), (-1.0, 1.0), (0.0, 1.0), (0.0, 1.0), (0.0, 1.0)
        )
    )
    table = torch.tensor(rows, dtype=F64)
    return table[:, :4], table[:, 4:]


def exact_probabilities(model: el.EnergyModel) -> Tensor:
    s, h = every_state(model)
    with torch.no_grad():
        return torch.softmax(-explicit_energy(model, s, h), 0)


def spin_data(count: int, seed: int) -> Tensor:
    g = torch.Generator().manual_seed(seed)
    return 2.0 * torch.bernoulli(torch.full((count, 4), 0.6, dtype=F64), generator=g) - 1.0


def test_energy_and_conditionals_match_brute_force():
    model = mixed_model()
    s, h = every_state(model)
    with torch.no_grad():
        torch.testing.assert_close(model.energy([s, h]), explicit_energy(model, s, h), rtol=1e-12, atol=1e-12)
        energy = explicit_energy(model, s, h)
        # p(h_j = 1 | s): the binary units are independent given the spins (brute force over h).
        given = torch.sigmoid(
            model.layers[1].bias + s @ (model.couplings[0].left @ model.couplings[0].right.T)
        )
        torch.testing.assert_close(model.conditional_mean([s, h], 1), given, rtol=1e-12, atol=1e-12)
        # E[s_i | everything else] from the two energies with s_i flipped (brute force).
        for i in range(4):
            up, down = s.clone(), s.clone()
            up[:, i], down[:, i] = 1.0, -1.0
            p_up = torch.sigmoid(explicit_energy(model, down, h) - explicit_energy(model, up, h))
            torch.testing.assert_close(
                model.conditional_mean([s, h], 0)[:, i], 2 * p_up - 1, rtol=1e-12, atol=1e-12
            )
        assert energy.shape == (128,)


def test_free_energy_and_log_partition_match_brute_force():
    model = mixed_model()
    s, h = every_state(model)
    with torch.no_grad():
        log_z = torch.logsumexp(-explicit_energy(model, s, h), 0)
        torch.testing.assert_close(el.exact_log_partition(model), log_z, rtol=1e-12, atol=1e-12)
        v = spin_data(6, seed=1)
        rows = [(s == row).all(1) for row in v]
        marginal = torch.stack([torch.logsumexp(-explicit_energy(model, s[r], h[r]), 0) for r in rows])
        torch.testing.assert_close(-model.free_energy(v), marginal, rtol=1e-12, atol=1e-12)


def gibbs_total_variation(model: el.EnergyModel, count: int, seed: int) -> float:
    """Start ``count`` chains at exact draws, take one sweep, return the total variation between
    the chains' joint states and the exact distribution."""
    p = exact_probabilities(model)
    g = torch.Generator().manual_seed(seed)
    index = torch.multinomial(p, count, replacement=True, generator=g)
    s, h = every_state(model)
    sampler = el.PersistentSampler(model, num_particles=count, generator=g)
    sampler.particles_0, sampler.particles_1 = s[index].clone(), h[index].clone()
    after = sampler()
    codes = ((after[0] > 0).long() * torch.tensor([1, 2, 4, 8])).sum(1) + 16 * (
        after[1].long() * torch.tensor([1, 2, 4])
    ).sum(1)
    # every_state lists spins in the leading (slowest) positions: map the codes to its row order.
    order = ((s > 0).long() * torch.tensor([1, 2, 4, 8])).sum(1) + 16 * (
        h.long() * torch.tensor([1, 2, 4])
    ).sum(1)
    counts = torch.bincount(codes, minlength=128).to(F64)[order]
    return 0.5 * float((counts / count - p).abs().sum())


def monte_carlo_total_variation(model: el.EnergyModel, count: int) -> float:
    """Expected total variation of ``count`` exact draws: ``sum sqrt(2 p (1 - p) / (pi count)) / 2``
    (the mean absolute deviation of each count, normal approximation; from memory)."""
    p = exact_probabilities(model)
    return float((torch.sqrt(2 * p * (1 - p) / (math.pi * count))).sum() / 2)


def test_gibbs_sweeps_leave_the_exact_distribution_invariant():
    model = mixed_model()
    assert [c.tolist() for c in model.couplings[1].unit_classes()] == [[0, 2], [1, 3]]
    count = 40_000
    noise = monte_carlo_total_variation(model, count)
    assert gibbs_total_variation(model, count, seed=3) < 1.5 * noise  # measured: about 1.0 x noise
    # Negative control: a spin layer whose draws forget the factor 2 moves the distribution.
    wrong = mixed_model(layer=WrongSpinLayer)
    assert gibbs_total_variation(wrong, count, seed=3) > 5 * noise


def test_objective_gradient_with_exact_statistics_is_the_exact_likelihood_gradient():
    model = mixed_model()
    v = spin_data(12, seed=2)
    objective = el.TwoPhaseObjective(model, el.MeanField(model), el.ExactStatistics(model))
    objective(v).backward()
    ours = {name: p.grad.clone() for name, p in model.named_parameters()}
    model.zero_grad()
    # Autograd of the exact average negative log-likelihood (free energy plus log Z, mathematics).
    s, h = every_state(model)
    log_z = torch.logsumexp(-explicit_energy(model, s, h), 0)
    rows = [(s == row).all(1) for row in v]
    nll = -torch.stack([torch.logsumexp(-explicit_energy(model, s[r], h[r]), 0) for r in rows]).mean() + log_z
    nll.backward()
    for name, parameter in model.named_parameters():
        torch.testing.assert_close(ours[name], parameter.grad, rtol=1e-9, atol=1e-10, msg=name)


def test_ais_brackets_the_exact_log_partition():
    model = mixed_model()
    exact = float(el.exact_log_partition(model))
    g = torch.Generator().manual_seed(4)
    estimate = el.ais_log_partition(model, num_chains=200, num_betas=500, generator=g, progress=False)
    assert estimate.lower <= exact <= estimate.upper, (estimate, exact)
    assert estimate.upper - estimate.lower < 0.2


def test_mean_field_converges_to_the_fixed_point_of_a_deeper_mixed_model():
    model = el.EnergyModel(
        [SpinLayer(4), el.BinaryLayer(3, dtype=F64), SpinLayer(2)],
        [LowRankCoupling(0, 1, 4, 3, rank=2), el.DenseCoupling(1, 2, 3, 2, dtype=F64)],
    )
    g = torch.Generator().manual_seed(5)
    with torch.no_grad():
        for parameter in model.parameters():
            parameter.copy_(torch.randn(parameter.shape, dtype=F64, generator=g))
    v = spin_data(5, seed=6)
    mf = el.MeanField(model, tol=1e-12, max_iter=500)
    _, middle, top = mf(v)
    assert mf.converged
    # The fixed-point equations, written out (mathematics).
    low_rank, dense = model.couplings
    with torch.no_grad():
        weight = low_rank.left @ low_rank.right.T
        expected_middle = torch.sigmoid(model.layers[1].bias + v @ weight + top @ dense.weight.T)
        expected_top = torch.tanh(model.layers[2].bias + middle @ dense.weight)
    torch.testing.assert_close(middle, expected_middle, rtol=0, atol=1e-10)
    torch.testing.assert_close(top, expected_top, rtol=0, atol=1e-10)


@pytest.mark.parametrize("negative", ["persistent", "contrastive-divergence"])
def test_fit_trains_the_mixed_model(negative):
    model = mixed_model()
    before = {name: p.detach().clone() for name, p in model.named_parameters()}
    data = spin_data(40, seed=7)
    g = torch.Generator().manual_seed(8)
    result = el.fit(model, data, epochs=2, batch_size=10, progress=False, generator=g, negative=negative)
    assert len(result.history) == 2
    for name, parameter in model.named_parameters():
        assert torch.isfinite(parameter).all(), name
        assert not torch.equal(parameter.detach(), before[name]), name
    # Masked-out lateral weights stay exactly zero through Adam's steps.
    assert not model.couplings[1].weight.detach()[~RING].any()


def test_initial_particles_come_from_the_layers_own_sample():
    model = mixed_model()
    sampler = el.PersistentSampler(model, num_particles=500, generator=torch.Generator().manual_seed(9))
    spins = sampler.particles[0]
    assert set(spins.unique().tolist()) == {-1.0, 1.0}  # never a 0/1 assumption


class CountingPhase:
    """A negative phase written by a user: no base class, just ``.model``, ``.statistics`` and the
    optional ``after_step`` hook. Model statistics from chains restarted at the batch (one sweep)."""

    def __init__(self, model: el.EnergyModel, generator: torch.Generator) -> None:
        self.model, self.generator = model, generator
        self.seen_batches: list[int] = []
        self.steps: list[el.Statistics] = []

    def statistics(self, v: Tensor, **kwargs) -> el.Statistics:
        self.seen_batches.append(v.shape[0])
        states = [v, *(layer.initial_states(v.shape[0], self.generator) for layer in self.model.layers[1:])]
        el.phases.gibbs.gibbs_sweep(self.model, states, self.generator)
        return self.model.statistics(states)

    def after_step(self, difference: el.Statistics) -> None:
        self.steps.append(difference)


def test_a_phase_of_ones_own_gets_the_batch_and_the_accepted_steps():
    model = mixed_model()
    phase = CountingPhase(model, torch.Generator().manual_seed(10))
    objective = el.TwoPhaseObjective(model, el.MeanField(model), phase)
    optimizer = torch.optim.SGD(model.parameters(), lr=0.01)
    for _ in range(3):
        optimizer.zero_grad()
        objective(spin_data(7, seed=11)).backward()
        optimizer.step()
    assert phase.seen_batches == [7, 7, 7] and len(phase.steps) == 3
    assert set(phase.steps[0]) == {name for name, _ in model.named_parameters()}
    # A step the divergence guard refuses is not reported to the hook.
    with torch.no_grad():
        model.couplings[0].left.fill_(float("nan"))
    with pytest.raises(FloatingPointError):
        objective(spin_data(7, seed=12))
    assert len(phase.steps) == 3
