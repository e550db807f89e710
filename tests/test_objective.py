"""TwoPhaseObjective and DataParticles: the gradient is the learning rule, and nothing more.

Sources of the checks:

- the gradient of the average negative log-likelihood, mean F(v) + log Z, by autograd through
  ``el.exact_log_partition`` and the closed-form free energy (mathematics; both checked against
  brute-force enumeration in ``tests/test_exact.py``);
- exact posterior averages by enumerating every hidden state of each example
  (``brute_force`` of ``tests/reference.py``, mathematics);
- Monte-Carlo error: z-scores of averages over independent chains, standard errors from the
  spread of the chains (common practice, no source).

Every random draw uses a seeded ``torch.Generator``; the margins are quoted beside the checks.
"""

from __future__ import annotations

import pytest
import torch
from torch import Tensor
from torch.utils._python_dispatch import TorchDispatchMode

import ebm_layers as el
from tests.helpers import assert_unchanged, binary, closed_form_models, objective_gradient, snapshot
from tests.reference import brute_force, build, randomize

F64 = torch.float64
Z_BOUND = 4.5  # about 40 entries per check: a |z| above 4.5 by chance has probability below 3e-4


def likelihood_gradient(model: el.EnergyModel, v: Tensor) -> list[Tensor]:
    """Autograd of the average negative log-likelihood mean F(v) + log Z (mathematics)."""
    model.zero_grad()
    (model.free_energy(v).mean() + el.exact_log_partition(model)).backward()
    return [p.grad.clone() for p in model.parameters()]


# ---------------------------------------------------------------------------------------------
# Exact phases give the exact gradient.


@pytest.mark.parametrize("name", ["rbm", "visible_lateral"])
def test_exact_phases_give_the_likelihood_gradient(name):
    # Mean field is exact for these models (the hidden units are independent given v).
    model = closed_form_models()[name]
    v = binary((7, 5), seed=2)
    objective = el.TwoPhaseObjective(model, el.MeanField(model, tol=1e-13), el.ExactStatistics(model))
    for got, expected in zip(objective_gradient(objective, v), likelihood_gradient(model, v)):
        torch.testing.assert_close(got, expected, rtol=1e-10, atol=1e-12)


def test_lateral_gradient_needs_the_half():
    """Negative control: without the 1/2 of the lateral energy term the gradient is wrong."""
    model = closed_form_models()["visible_lateral"]
    v = binary((7, 5), seed=2)
    objective = el.TwoPhaseObjective(model, el.MeanField(model, tol=1e-13), el.ExactStatistics(model))
    lateral = next(k for k, (a, b) in enumerate(model.edges) if a == b)
    free = model.couplings[lateral].parametrizations.weight.original
    objective_gradient(objective, v)
    half = free.grad.clone()
    likelihood_gradient(model, v)
    torch.testing.assert_close(half, free.grad)
    assert (2 * half - free.grad).abs().max() > 1e-2


def test_loss_gradient_is_minus_the_statistics_difference_on_a_deep_chain():
    """Any phases: d loss / d b = -(data - model) means, d loss / d W = -(data - model) pairs."""
    model = randomize(build("chain3", (4, 3, 2)), seed=3, scale=1.0)
    v = binary((6, 4), seed=4)
    mean_field, exact = el.MeanField(model, tol=1e-12), el.ExactStatistics(model)
    objective = el.TwoPhaseObjective(model, mean_field, exact)
    gradients = objective_gradient(objective, v)
    data, fantasy = mean_field.statistics(v), exact.statistics()
    names = [name for name, _ in model.named_parameters()]
    assert sorted(data) == sorted(fantasy) == sorted(names)
    expected = [fantasy[name] - data[name] for name in names]
    for got, want in zip(gradients, expected):
        torch.testing.assert_close(got, want, rtol=1e-12, atol=1e-14)


class _MatrixProducts(TorchDispatchMode):
    """Count the matrix products torch runs (aten mm / addmm / bmm / addbmm / baddbmm)."""

    NAMES = {"mm", "addmm", "bmm", "addbmm", "baddbmm"}

    def __init__(self):
        super().__init__()
        self.count = 0

    def __torch_dispatch__(self, func, types, args=(), kwargs=None):
        self.count += func.__name__.split(".")[0] in self.NAMES
        return func(*args, **(kwargs or {}))


@pytest.mark.parametrize("shape", [(20, 10), (20, 10, 5)])
def test_the_surrogate_adds_no_matrix_product(shape):
    """Forward and backward of the loss cost exactly the matrix products of the two phases."""
    g = torch.Generator().manual_seed(0)
    model = el.dbm(*shape, generator=g)
    v = binary((8, shape[0]), seed=1, dtype=torch.float32)
    sampler = el.PersistentSampler(model, num_particles=16, generator=g)
    mean_field = el.MeanField(model)
    with _MatrixProducts() as phases:
        mean_field.statistics(v)
        sampler.statistics()
    objective = el.TwoPhaseObjective(model, el.MeanField(model), el.PersistentSampler(model, 16, generator=g))
    with _MatrixProducts() as training:
        objective(v).backward()
    assert training.count == phases.count > 0


# ---------------------------------------------------------------------------------------------
# Sampled phases: within Monte-Carlo error of the exact gradient.


def sampled_gradient_z(model: el.EnergyModel, reference: el.EnergyModel) -> float:
    """max |z| of the sampled objective gradient against ``reference``'s exact gradient."""
    v = binary((9, model.sizes[0]), seed=5)
    g = torch.Generator().manual_seed(6)
    sampler = el.PersistentSampler(model, num_particles=20_000, generator=g)
    sampler.sample(1, burn_in=200, progress=False)
    objective = el.TwoPhaseObjective(model, el.MeanField(model, tol=1e-13), sampler)
    sampled = objective_gradient(objective, v)
    exact = el.TwoPhaseObjective(reference, el.MeanField(reference, tol=1e-13), el.ExactStatistics(reference))
    expected = objective_gradient(exact, v)
    # Standard errors from the spread of the independent chains (the gradient is minus a data
    # term, fixed, plus the chains' average).
    states = sampler.particles
    spreads = [x.std(0) for x in states]
    for a, b in model.edges:
        products = states[a][:, :, None] * states[b][:, None, :]
        spreads.append(products.std(0) * (0.5 if a == b else 1.0))
    names = [name for name, _ in model.named_parameters()]
    z = []
    for name, got, want, spread in zip(names, sampled, expected, spreads):
        error = spread / sampler.num_particles**0.5
        if "original" in name:  # the free lateral matrix: its gradient is the symmetric one folded up
            error = (2 * error).triu(1)
        mask = error > 0
        z.append(((got - want)[mask] / error[mask]).abs().max())
    return float(torch.stack(z).max())


@pytest.mark.parametrize("name", ["rbm", "visible_lateral"])
def test_sampled_gradient_is_within_monte_carlo_error(name):
    model = closed_form_models()[name]
    z = sampled_gradient_z(model, model)
    assert z < Z_BOUND  # measured: 1.6 (rbm), 2.4 (visible lateral)


def test_sampled_gradient_check_catches_a_wrong_model():
    """Negative control: against a model with one weight moved by 0.5 the same check fails."""
    model = closed_form_models()["rbm"]
    other = closed_form_models()["rbm"]
    with torch.no_grad():
        other.couplings[0].weight[0, 0] += 0.5
    assert sampled_gradient_z(model, other) > Z_BOUND  # measured: 13.8


# ---------------------------------------------------------------------------------------------
# DataParticles: the posterior of each example, persistently.


def exact_posterior_statistics(model: el.EnergyModel, v: Tensor) -> tuple[list[Tensor], list[Tensor]]:
    """Per example: E[x_l | v] per layer and E[x_a^T x_b | v] per coupling, by enumeration."""
    ref = brute_force(model)
    means, pairs = [], []
    for row in v:
        match = (ref.states[0] == row).all(1)
        p = ref.prob * match
        p = p / p.sum()
        means.append([p @ x for x in ref.states])
        pairs.append([(ref.states[a] * p[:, None]).T @ ref.states[b] for a, b in model.edges])
    return means, pairs


def data_particle_z(model: el.EnergyModel, *, scramble: bool = False) -> float:
    """max |z| of DataParticles' statistics of 4 distinct examples (each copied 1,500 times, one
    chain per copy) against their exact posterior averages, after 30 visits."""
    patterns = binary((4, model.sizes[0]), seed=7)
    copies = 1_500
    v = patterns.repeat_interleave(copies, 0)
    index = torch.arange(len(v))
    g = torch.Generator().manual_seed(8)
    particles = el.DataParticles(model, num_examples=len(v), generator=g)
    for _ in range(30):
        if scramble:  # a bookkeeping bug: every example continues another example's chain
            with torch.no_grad():
                particles.states_1.copy_(particles.states_1[torch.randperm(len(v), generator=g)])
        particles.statistics(v, index)
    states = [v] + [getattr(particles, f"states_{i}").to(F64) for i in range(1, len(model.sizes))]
    exact_means, _ = exact_posterior_statistics(model, patterns)
    z = []
    for p in range(len(patterns)):
        rows = slice(p * copies, (p + 1) * copies)
        for layer in range(1, len(model.sizes)):
            x = states[layer][rows]
            error = x.std(0) / copies**0.5
            mask = error > 0
            z.append(((x.mean(0) - exact_means[p][layer])[mask] / error[mask]).abs().max())
    return float(torch.stack(z).max())


@pytest.mark.parametrize("shape, sizes", [("rbm", (4, 3)), ("chain3", (4, 3, 2))])
def test_data_particles_sample_the_exact_posterior(shape, sizes):
    model = randomize(build(shape, sizes), seed=9, scale=1.5)
    assert data_particle_z(model) < Z_BOUND  # measured: 0.96 (rbm), 1.5 (chain)


def test_data_particle_check_catches_chains_swapped_between_examples():
    """Negative control: on the deep chain, continuing another example's chain is caught."""
    model = randomize(build("chain3", (4, 3, 2)), seed=9, scale=1.5)
    assert data_particle_z(model, scramble=True) > Z_BOUND  # measured: 9.8


def test_data_particle_statistics_are_those_of_the_stored_states():
    model = randomize(build("chain3", (4, 3, 2)), seed=10, scale=1.0)
    particles = el.DataParticles(model, num_examples=5, sweeps=2, generator=torch.Generator().manual_seed(0))
    v = binary((3, 4), seed=11)
    index = torch.tensor([4, 0, 2])
    stats = particles.statistics(v, index)
    states = [v, particles.states_1[index].to(F64), particles.states_2[index].to(F64)]
    expected = model.statistics(states)
    assert stats.keys() == expected.keys()
    for name, want in expected.items():
        torch.testing.assert_close(stats[name], want)
    assert particles.states_1.dtype == torch.uint8


def test_data_particles_resume_bit_identically():
    model = randomize(build("chain3", (4, 3, 2)), seed=12, scale=1.0)
    v, index = binary((6, 4), seed=13), torch.arange(6)
    first = el.DataParticles(model, num_examples=6, generator=torch.Generator().manual_seed(1))
    first.statistics(v, index)
    saved = {k: x.clone() for k, x in first.state_dict().items()}
    expected = first.statistics(v, index)
    second = el.DataParticles(model, num_examples=6, generator=torch.Generator().manual_seed(99))
    second.load_state_dict(saved)
    got = second.statistics(v, index)
    couplings = [name for name in expected if name.startswith("couplings.")]
    assert couplings and got.keys() == expected.keys()
    for name in couplings:
        assert torch.equal(got[name], expected[name])


# ---------------------------------------------------------------------------------------------
# Options: sparsity target, weight-decay groups; monitors.


def test_sparsity_adds_cost_times_deviation_to_the_hidden_gradient():
    # The hidden-bias term of "A Practical Guide to Training Restricted Boltzmann Machines"
    # (UTML TR 2010-003, 2010), section 11: cost * (q - p) with q the running hidden mean.
    model = closed_form_models()["rbm"]
    v = binary((7, 5), seed=2)
    plain = el.TwoPhaseObjective(model, el.MeanField(model, tol=1e-13), el.ExactStatistics(model))
    sparse = el.TwoPhaseObjective(
        model,
        el.MeanField(model, tol=1e-13),
        el.ExactStatistics(model),
        sparsity_target=0.1,
        sparsity_cost=0.3,
        sparsity_decay=0.8,
    )
    base = objective_gradient(plain, v)
    got = objective_gradient(sparse, v)
    hidden_mean = el.MeanField(model).statistics(v)["layers.1.bias"]
    running = 0.8 * 0.1 + 0.2 * hidden_mean
    torch.testing.assert_close(sparse.sparsity_mean_1, running)
    deviation = 0.3 * (running - 0.1)
    visible_mean = v.mean(0)
    torch.testing.assert_close(got[0], base[0])  # visible bias: untouched
    torch.testing.assert_close(got[1], base[1] + deviation)
    torch.testing.assert_close(got[2], base[2] + torch.outer(visible_mean, deviation))


def test_sparsity_target_lowers_hidden_activity():
    def mean_activity(**options) -> float:
        g = torch.Generator().manual_seed(0)
        model = el.rbm(20, 10, generator=g)
        data = binary((200, 20), seed=1, dtype=torch.float32)
        objective = el.TwoPhaseObjective(
            model, el.MeanField(model), el.PersistentSampler(model, 50, generator=g), **options
        )
        optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
        for start in range(0, 200, 10):
            optimizer.zero_grad()
            objective(data[start : start + 10]).backward()
            optimizer.step()
        return float(el.MeanField(model).statistics(data)["layers.1.bias"].mean())

    plain, sparse = mean_activity(), mean_activity(sparsity_target=0.05, sparsity_cost=1.0)
    assert sparse < plain - 0.2  # measured: 0.11 vs 0.54


@pytest.mark.parametrize("kind", ["lateral", "shared bias", "learned std"])
def test_weight_decay_groups_decay_weights_only(kind, lateral_model):
    model = {
        "lateral": lambda: lateral_model,
        "shared bias": lambda: el.EnergyModel(
            [el.BinaryLayer(36), el.share_bias_by_channel(el.BinaryLayer(32), 2)],
            [el.Conv2dCoupling(0, 1, (1, 6, 6), 2, 3)],
        ),
        "learned std": lambda: el.EnergyModel(
            [el.GaussianLayer(4, learn_std=True), el.BinaryLayer(3)], [el.DenseCoupling(0, 1, 4, 3)]
        ),
    }[kind]()
    groups = el.weight_decay_groups(model, 0.1)
    ids = [id(p) for group in groups for p in group["params"]]
    assert sorted(ids) == sorted(id(p) for p in model.parameters())  # each exactly once
    before = {name: p.detach().clone() for name, p in model.named_parameters()}
    optimizer = torch.optim.SGD(groups, lr=0.5)  # every group's tensors are leaves
    for p in model.parameters():
        p.grad = torch.zeros_like(p)
    optimizer.step()
    for name, p in model.named_parameters():
        factor = 1.0 if name.startswith("layers.") else 1 - 0.5 * 0.1
        torch.testing.assert_close(p.detach(), factor * before[name])


def test_monitors_report_gaps_free_energies_and_iterations():
    model = closed_form_models()["rbm"]
    v = binary((7, 5), seed=2)
    sampler = el.PersistentSampler(model, num_particles=30, generator=torch.Generator().manual_seed(0))
    mean_field = el.MeanField(model)
    objective = el.TwoPhaseObjective(model, mean_field, sampler)
    assert objective.last is None
    data = mean_field.statistics(v)
    objective(v)
    last = objective.last
    fantasy = model.statistics(sampler.particles)
    gap = data["couplings.0.weight"] - fantasy["couplings.0.weight"]
    assert last.pair_gaps[0] == pytest.approx(float(gap.pow(2).mean().sqrt()))
    assert last.statistics_gap == pytest.approx(last.pair_gaps[0])
    hidden_gap = data["layers.1.bias"] - fantasy["layers.1.bias"]
    assert last.mean_gaps[1] == pytest.approx(float(hidden_gap.pow(2).mean().sqrt()))
    with torch.no_grad():
        data_free_energy, particle_free_energy = (
            model.free_energy(x).mean().item() for x in (v, sampler.particles[0])
        )
    assert last.data_free_energy == pytest.approx(data_free_energy)
    assert last.particle_free_energy == pytest.approx(particle_free_energy)
    assert last.mean_field_iterations == mean_field.iterations == 1


def test_monitors_without_closed_form_free_energy():
    model = el.dbm(4, 3, 2, generator=torch.Generator().manual_seed(0))
    objective = el.TwoPhaseObjective(model, el.MeanField(model), el.ExactStatistics(model))
    objective(binary((3, 4), seed=0, dtype=torch.float32))
    assert objective.last.data_free_energy is None and objective.last.particle_free_energy is None
    assert objective.last.mean_field_iterations >= 1


def test_plain_objective_has_no_extra_state():
    model = el.rbm(6, 3)
    objective = el.TwoPhaseObjective(model)
    assert isinstance(objective.positive, el.MeanField) and isinstance(
        objective.negative, el.PersistentSampler
    )
    assert not any(name.startswith("sparsity") for name in objective.state_dict())
    assert "max_weight=10000" in repr(objective)


# ---------------------------------------------------------------------------------------------
# Divergence guard.


def test_divergence_guard_stops_sgd_before_the_weights_overflow():
    g = torch.Generator().manual_seed(0)
    model = el.rbm(16, 8, generator=g)
    data = binary((40, 16), seed=3, dtype=torch.float32)
    sampler = el.PersistentSampler(model, num_particles=20, generator=g)
    objective = el.TwoPhaseObjective(model, el.MeanField(model), sampler)
    optimizer = torch.optim.SGD(model.parameters(), lr=3e4)
    steps = 0
    with pytest.raises(FloatingPointError, match="learning rate is too high"):
        for steps in range(1, 20):
            optimizer.zero_grad()
            before = snapshot(objective)
            objective(data[(steps % 4) * 10 : (steps % 4 + 1) * 10]).backward()
            optimizer.step()
    assert steps <= 5  # measured: the bound trips at the 3rd call
    assert_unchanged(objective, before)  # the refused call advanced no particle and wrote nothing
    assert all(bool(torch.isfinite(p).all()) for p in model.parameters())
    assert max(float(w.detach().abs().max()) for w in model.weights()) > objective.max_weight


def test_divergence_guard_names_a_non_finite_parameter():
    model = el.rbm(6, 3)
    objective = el.TwoPhaseObjective(model)
    with torch.no_grad():
        model.layers[1].bias[0] = float("nan")
    with pytest.raises(FloatingPointError, match=r"layers\.1\.bias holds non-finite"):
        objective(binary((2, 6), seed=0, dtype=torch.float32))
    assert all(p.grad is None for p in model.parameters())


def test_fit_stops_a_diverging_run_with_the_guard():
    g = torch.Generator().manual_seed(0)
    model = el.rbm(16, 8, generator=g)
    optimizer = torch.optim.SGD(model.parameters(), lr=3e4)
    with pytest.raises(FloatingPointError, match="max_weight"):
        el.fit(
            model,
            binary((40, 16), seed=3, dtype=torch.float32),
            optimizer=optimizer,
            epochs=3,
            progress=False,
            generator=g,
        )
    assert all(bool(torch.isfinite(p).all()) for p in model.parameters())


# ---------------------------------------------------------------------------------------------
# Bad input: a clear error, nothing changed.


def _objective_cases():
    other = el.rbm(6, 3)
    return [
        # Any object with .model and .statistics is a phase; these have neither.
        (
            lambda m: el.TwoPhaseObjective(m, positive=3),
            TypeError,
            "positive must be a phase: an object with",
        ),
        (
            lambda m: el.TwoPhaseObjective(m, negative=torch.nn.Linear(6, 3)),
            TypeError,
            r"negative must be a phase: an object with \.model and \.statistics\(v, \*\*kwargs\), got Linear",
        ),
        (lambda m: el.TwoPhaseObjective(m, positive=el.MeanField(other)), ValueError, "another model"),
        (lambda m: el.TwoPhaseObjective(m, negative=el.ExactStatistics(other)), ValueError, "another model"),
        (lambda m: el.TwoPhaseObjective("model"), TypeError, "model must be"),
        (lambda m: el.TwoPhaseObjective(m, sparsity_target=1.5), ValueError, "sparsity_target"),
        (
            lambda m: el.TwoPhaseObjective(m, sparsity_target=0.1, sparsity_cost=-1),
            ValueError,
            "sparsity_cost",
        ),
        (lambda m: el.TwoPhaseObjective(m, sparsity_decay=1.0), ValueError, "sparsity_decay"),
        (lambda m: el.TwoPhaseObjective(m, max_weight=0), ValueError, "max_weight"),
        (lambda m: el.weight_decay_groups(m, -1.0), ValueError, "weight_decay"),
        (lambda m: el.weight_decay_groups(m.couplings[0], 1.0), TypeError, "model must be"),
    ]


@pytest.mark.parametrize("case", range(len(_objective_cases())))
def test_bad_objective_arguments(case):
    model = el.rbm(6, 3)
    build_it, error, message = _objective_cases()[case]
    before = snapshot(model)
    with pytest.raises(error, match=message):
        build_it(model)
    assert_unchanged(model, before)


def _call_cases():
    v = binary((4, 6), seed=0, dtype=torch.float32)
    return [
        ("mean_field", (v,), {"index": torch.arange(4)}, ValueError, "only used with DataParticles"),
        ("mean_field", (v.double(),), {}, TypeError, "dtype"),
        ("mean_field", (v[:, :5],), {}, ValueError, "6 columns"),
        ("particles", (v,), {}, ValueError, "index is required"),
        ("particles", (v,), {"index": torch.arange(4.0)}, TypeError, "integer dtype"),
        ("particles", (v,), {"index": torch.arange(3)}, ValueError, r"shape \(4,\)"),
        ("particles", (v,), {"index": torch.tensor([0, 1, 2, 10])}, ValueError, r"0\.\.9"),
        ("particles", (v,), {"index": torch.tensor([0, 1, 2, -1])}, ValueError, r"0\.\.9"),
    ]


@pytest.mark.parametrize("case", range(len(_call_cases())))
def test_bad_objective_calls_change_nothing(case):
    kind, args, kwargs, error, message = _call_cases()[case]
    g = torch.Generator().manual_seed(0)
    model = el.rbm(6, 3, generator=g)
    positive = el.MeanField(model) if kind == "mean_field" else el.DataParticles(model, 10, generator=g)
    objective = el.TwoPhaseObjective(model, positive, el.PersistentSampler(model, 8, generator=g))
    optimizer = torch.optim.Adam(model.parameters())
    before, optimizer_before = snapshot(objective), repr(optimizer.state_dict())
    with pytest.raises(error, match=message):
        objective(*args, **kwargs)
    assert_unchanged(objective, before)
    assert repr(optimizer.state_dict()) == optimizer_before
    assert objective.last is None


def test_data_particles_refuse_bad_arguments():
    model = el.rbm(6, 3)
    with pytest.raises(ValueError, match="num_examples must be positive"):
        el.DataParticles(model, 0)
    with pytest.raises(TypeError, match="sweeps must be an int"):
        el.DataParticles(model, 5, sweeps=1.5)
    with pytest.raises(TypeError, match="model must be"):
        el.DataParticles("model", 5)
