"""PersistentSampler: its chains sample the model's Boltzmann distribution, and its bookkeeping.

Sources of the checks:

- exact enumeration (mathematics): the distribution p(x) = exp(-E(x)) / Z over every joint state
  of a model with at most 8 units, computed by ``brute_force`` of ``tests/reference.py`` from the energy
  formula alone (all units stacked, E(x) = -b.x - 1/2 x J x^T), without the library's code.
- the total-variation bound: the chains' empirical distribution must be about as close to p as
  the same number of exact independent draws (``torch.multinomial``) is; common practice, no
  source. Per-unit marginals are compared by z-scores; common practice, no source.
- Rao-Blackwellised statistics: replacing a binary draw by its conditional probability keeps
  the expectation and cannot raise the variance (law of total variance, mathematics);
  ``el.ExactStatistics`` gives the exact expectations.

Every random draw uses an explicit seeded ``torch.Generator``, so every outcome is fixed; the
margins of the statistical checks are printed (``pytest -s``) and quoted in the comments.
"""

from __future__ import annotations

import io
import math
from dataclasses import dataclass

import pytest
import torch
from torch import Tensor

import ebm_layers as el
from tests.helpers import assert_unchanged, snapshot
from tests.reference import Reference, brute_force, build, randomize

# ---------------------------------------------------------------------------------------------
# Stationarity: the chains against exact enumeration.

NUM_PARTICLES = 50_000
# The exact kernels of one sweep of these models (products of single-unit Gibbs kernels in schedule
# order, computed while writing the tests) bring a uniform start within 1e-11 of p in total
# variation after 40 sweeps, far below the sampling noise (about 0.02 with 50,000 particles).
SWEEPS = 40
IID_REPLICATES = 5
TV_FACTOR, TV_SLACK = 2.0, 0.01
Z_BOUND = 5.0

# name: (shape in SHAPES of tests/reference.py, layer sizes, seed of the parameters, coupling to double)
MODELS = {
    "rbm": ("rbm", (5, 3), 0, None),
    "chain": ("chain3", (3, 3, 2), 1, None),
    # couplings (0, 1), (1, 2), (0, 2): three colour classes; the skip coupling (0, 2) is doubled.
    "skip": ("skip", (3, 2, 3), 2, 2),
    # the visible layer has lateral couplings, the hidden layer is coupled to it.
    "visible_lateral": ("semi_restricted", (5, 3), 3, None),
    # chain 0-1-2 whose middle layer (the last colour class) has lateral couplings, doubled.
    "hidden_lateral": ("hidden_lateral_chain", (2, 4, 2), 0, 2),
}


def make_model(name: str) -> el.EnergyModel:
    """A float64 model with biases and weights from N(0, 1.5^2), so that no energy term is negligible.

    The coupling that a negative control below mishandles is doubled, so that its mistake is large.
    """
    shape, sizes, seed, strong = MODELS[name]
    model = randomize(build(shape, sizes), seed=seed, scale=1.5)
    assert model.dtype == torch.float64 and sum(model.sizes) <= 8
    if strong is not None:
        coupling = model.couplings[strong]
        with torch.no_grad():
            if coupling.a == coupling.b:
                coupling.weight = 2.0 * coupling.weight  # through the parametrization's right_inverse
            else:
                coupling.weight.mul_(2.0)
    return model


def run_chains(model: el.EnergyModel, *, through_statistics: bool = False) -> list[Tensor]:
    """The particles after ``SWEEPS`` sweeps from a uniform start, one ``(P, n_i)`` tensor per layer.

    By default one call of ``sampler()`` runs every sweep; ``through_statistics`` instead calls
    ``statistics()`` of a ``probabilities=True`` sampler once per sweep, so that every sweep ends
    with the Rao-Blackwellised last class.
    """
    generator = torch.Generator().manual_seed(7)
    if through_statistics:
        sampler = el.PersistentSampler(
            model, num_particles=NUM_PARTICLES, sweeps=1, generator=generator, probabilities=True
        )
        for _ in range(SWEEPS):
            sampler.statistics()
        return sampler.particles
    sampler = el.PersistentSampler(model, num_particles=NUM_PARTICLES, sweeps=SWEEPS, generator=generator)
    return sampler()


def state_codes(x: Tensor) -> Tensor:
    """Joint states ``(B, N)`` as integers, unit 0 the most significant bit (the row order of
    ``brute_force``)."""
    n = x.shape[1]
    return (x.long() << torch.arange(n - 1, -1, -1)).sum(1)


def is_binary(x: Tensor) -> bool:
    return bool(((x == 0) | (x == 1)).all())


def total_variation(counts: Tensor, prob: Tensor) -> float:
    return 0.5 * float((counts / counts.sum() - prob).abs().sum())


@dataclass
class Comparison:
    """How far the particles' empirical distribution is from the exact one."""

    tv: float  # total variation between the particles and p
    tv_iid: float  # mean total variation of the same number of exact independent draws
    max_z: float  # largest |z| of a unit's empirical mean against its exact marginal

    @property
    def tv_bound(self) -> float:
        return TV_FACTOR * self.tv_iid + TV_SLACK

    def tv_within_bound(self) -> bool:
        return self.tv <= self.tv_bound

    def __str__(self) -> str:
        return (
            f"TV {self.tv:.4f} vs bound {self.tv_bound:.4f} (ratio {self.tv / self.tv_bound:.2f}; "
            f"exact draws {self.tv_iid:.4f}), max |z| {self.max_z:.2f}"
        )


def compare_with_enumeration(particles: list[Tensor], ref: Reference) -> Comparison:
    """The one check of the stationarity tests and of their negative controls."""
    x = torch.cat(particles, dim=1)
    assert x.shape == (NUM_PARTICLES, ref.x.shape[1]) and is_binary(x)
    counts = torch.bincount(state_codes(x), minlength=len(ref.prob)).double()
    # Exact enumeration (mathematics) gives p; the bound is the total variation that as many
    # exact independent draws reach (common practice, no source), averaged over replicates.
    generator = torch.Generator().manual_seed(2024)
    tv_iid = [
        total_variation(
            torch.bincount(
                torch.multinomial(ref.prob, NUM_PARTICLES, replacement=True, generator=generator),
                minlength=len(ref.prob),
            ).double(),
            ref.prob,
        )
        for _ in range(IID_REPLICATES)
    ]
    # Exact enumeration (mathematics): marginal p(x_g = 1) of every unit; z-score with the
    # binomial standard error of independent particles (common practice, no source).
    marginal = ref.prob @ ref.x
    z = (x.mean(0) - marginal).abs() / torch.sqrt(marginal * (1 - marginal) / NUM_PARTICLES)
    return Comparison(total_variation(counts, ref.prob), sum(tv_iid) / len(tv_iid), float(z.max()))


@pytest.mark.parametrize(
    ("name", "through_statistics"),
    [(name, False) for name in MODELS] + [("hidden_lateral", True)],
)
def test_chains_sample_the_exact_distribution(name, through_statistics):
    model = make_model(name)
    comparison = compare_with_enumeration(
        run_chains(model, through_statistics=through_statistics), brute_force(model)
    )
    print(f"\n{name} (through statistics: {through_statistics}): {comparison}")
    # exact enumeration (mathematics) with the total-variation bound (common practice, no source).
    # Measured ratios TV / bound: 0.36-0.44 for these six runs; max |z| 1.3-2.6.
    assert comparison.tv_within_bound(), str(comparison)
    assert comparison.max_z < Z_BOUND, str(comparison)


@pytest.mark.parametrize(
    ("name", "schedule", "through_statistics"),
    [
        # Coupled layers 0 and 2 in one class: both are drawn from the states before the class
        # update, a parallel update of coupled layers that does not leave p invariant.
        ("skip", el.UpdateSchedule(classes=((0, 2), (1,)), unitwise=frozenset()), False),
        # The lateral layer missing from ``unitwise``: its units are drawn all at once from the
        # layer's old state, through sampler() and through the Rao-Blackwellised last class.
        ("hidden_lateral", el.UpdateSchedule(classes=((0, 2), (1,)), unitwise=frozenset()), False),
        ("hidden_lateral", el.UpdateSchedule(classes=((0, 2), (1,)), unitwise=frozenset()), True),
    ],
    ids=["skip-coupled-layers-in-one-class", "lateral-layer-drawn-at-once", "lateral-through-statistics"],
)
def test_wrong_schedule_fails_the_same_check(name, schedule, through_statistics):
    """Negative controls: wrong samplers of the same models fail the stationarity check."""
    model = make_model(name)
    assert model.schedule != schedule
    with pytest.raises(ValueError, match="schedule"):
        model.schedule = schedule  # the model refuses a wrong schedule ...
    model._schedule = schedule  # ... so the control bypasses the check on purpose
    comparison = compare_with_enumeration(
        run_chains(model, through_statistics=through_statistics), brute_force(model)
    )
    print(f"\n{name} with a wrong schedule: {comparison}")
    # exact enumeration (mathematics): measured ratios TV / bound 5.5 (skip) and 4.9 (lateral, either path).
    assert not comparison.tv_within_bound(), str(comparison)


# ---------------------------------------------------------------------------------------------
# probabilities=True: Rao-Blackwellised statistics.


def flat(stats: el.Statistics) -> Tensor:
    """Every mean and pair average of ``stats`` in one vector (entries in the order of their keys)."""
    return torch.cat([stats[name].flatten() for name in sorted(stats)])


@pytest.mark.parametrize("name", ["rbm", "chain"])
def test_rao_blackwellised_statistics_match_exact_statistics(name):
    model = make_model(name)
    last = model.schedule.classes[-1]
    assert last == (1,)  # both models end a sweep with layer 1, which every coupling touches
    num_particles = 20_000
    generator = torch.Generator().manual_seed(11)
    sampler = el.PersistentSampler(
        model, num_particles=num_particles, sweeps=SWEEPS, generator=generator, probabilities=True
    )
    stats = sampler.statistics()
    states = sampler.particles

    # Mathematics: the layer-1 entries are averages of p(x_1 = 1 | the other layers) at the final
    # states (layer 1 is drawn last, so the other layers have not moved since), the others of
    # the binary states.
    conditional = model.conditional_mean(states, 1)
    assert bool(((conditional > 0) & (conditional < 1)).all())
    expected = [conditional if i in last else x for i, x in enumerate(states)]
    by_hand = el.Statistics(
        {f"layers.{i}.bias": x.mean(0) for i, x in enumerate(expected)}
        | {
            f"couplings.{k}.weight": expected[a].T @ expected[b] / num_particles
            for k, (a, b) in enumerate(model.edges)
        }
    )
    assert sorted(stats) == sorted(by_hand)
    torch.testing.assert_close(flat(stats), flat(by_hand), rtol=1e-12, atol=1e-12)

    # el.ExactStatistics (itself checked against exact enumeration in tests/test_exact.py): z-scores
    # with the binomial standard error of binary states, an upper bound for the Rao-Blackwellised
    # ones (law of total variance, mathematics). Common practice, no source.
    exact_stats = el.ExactStatistics(model).statistics()
    assert sorted(exact_stats) == sorted(stats)
    exact = flat(exact_stats)
    z = (flat(stats) - exact).abs() / torch.sqrt(exact * (1 - exact) / num_particles)
    print(f"\n{name}: max |z| {float(z.max()):.4f} at {int(z.argmax())} over {z.numel()} statistics")
    assert float(z.max()) < Z_BOUND  # measured: 0.88 for both models

    # negative control: the same particles' binary statistics are different numbers.
    binary = model.statistics(states)
    assert not torch.allclose(flat(binary), flat(stats))


def test_rao_blackwellised_statistics_have_lower_variance():
    """Twin samplers with one seed draw identical particles; only ``probabilities`` differs."""
    model = make_model("rbm")
    twins = {
        rao_blackwell: el.PersistentSampler(
            model,
            num_particles=200,
            sweeps=SWEEPS,  # burn-in for the first call
            generator=torch.Generator().manual_seed(13),
            probabilities=rao_blackwell,
        )
        for rao_blackwell in (False, True)
    }
    estimates: dict[bool, list[Tensor]] = {flag: [] for flag in twins}
    for flag, sampler in twins.items():
        sampler()
        sampler.sweeps = 2
        for _ in range(500):
            estimates[flag].append(sampler.statistics()["couplings.0.weight"].flatten())
    assert all(torch.equal(a, b) for a, b in zip(twins[False].particles, twins[True].particles))
    calls = {flag: torch.stack(values) for flag, values in estimates.items()}
    ratio = float(calls[True].var(0).sum() / calls[False].var(0).sum())

    # Exact enumeration (mathematics): per particle, the binary pair x_v h has variance q (1 - q),
    # the Rao-Blackwellised x_v p(h = 1 | v) a smaller one (law of total variance); their ratio,
    # summed over the entries, is what the variances across calls estimate.
    ref = brute_force(model)
    v = ref.states[0]
    conditional = model.conditional_mean(ref.states, 1).detach()
    per_particle = {
        flag: (v[:, :, None] * (conditional if flag else ref.states[1])[:, None, :]).flatten(1)
        for flag in twins
    }
    q = ref.prob @ per_particle[False]
    expected = float(((ref.prob @ per_particle[True] ** 2) - q**2).sum() / (q * (1 - q)).sum())
    print(f"\nvariance ratio Rao-Blackwellised / binary: {ratio:.3f} (exact {expected:.3f})")
    assert expected < 0.7
    # Halfway between the exact ratio and 1 (common practice, no source): measured 0.59, exact 0.58.
    assert ratio < (1 + expected) / 2

    # Both estimate the same expectation, el.ExactStatistics; a call's standard error is below
    # sqrt(0.25 / 200) = 0.035, the average over 500 calls is far closer (measured: within 0.002).
    exact = el.ExactStatistics(model).statistics()["couplings.0.weight"].flatten()
    for flag in twins:
        torch.testing.assert_close(calls[flag].mean(0), exact, rtol=0, atol=0.01)


# ---------------------------------------------------------------------------------------------
# Determinism, state_dict, dtype.


def small_sampler(seed: int, model_seed: int = 0, **kwargs) -> el.PersistentSampler:
    """A sampler of a float32 RBM 6-3 with generators seeded ``seed`` (sampler) and ``model_seed``."""
    model = el.rbm(6, 3, generator=torch.Generator().manual_seed(model_seed))
    with torch.no_grad():
        model.couplings[0].weight.mul_(100.0)  # weights of order 1, so the chains move visibly
    kwargs = {"num_particles": 32, "sweeps": 2, **kwargs}
    return el.PersistentSampler(model, generator=torch.Generator().manual_seed(seed), **kwargs)


def run(sampler: el.PersistentSampler, calls: int = 3) -> list[Tensor]:
    """The particles after each of ``calls`` calls, copied, all layers of a call concatenated."""
    return [torch.cat(sampler(), dim=1).clone() for _ in range(calls)]


def identical(first: list[Tensor], second: list[Tensor]) -> bool:
    return len(first) == len(second) and all(torch.equal(a, b) for a, b in zip(first, second))


def test_same_seed_same_particles():
    reference = run(small_sampler(seed=5))
    assert identical(run(small_sampler(seed=5)), reference)
    # negative control: another seed gives other particles.
    assert not identical(run(small_sampler(seed=6)), reference)
    # generator=None: a private generator seeded from the global RNG, so torch.manual_seed repeats it.
    unseeded = []
    with torch.random.fork_rng():  # the global RNG is restored afterwards
        for _ in range(2):
            torch.manual_seed(3)
            model = el.rbm(6, 3, generator=torch.Generator().manual_seed(0))
            unseeded.append(run(el.PersistentSampler(model, num_particles=32, sweeps=2)))
    assert identical(*unseeded)


def test_state_dict_resumes_bit_identically():
    original = small_sampler(seed=1)
    run(original, calls=2)
    buffer = io.BytesIO()
    torch.save(original.state_dict(), buffer)
    keys = set(original.state_dict())
    assert {"particles_0", "particles_1", "generator_state"} <= keys
    assert {"model.layers.0.bias", "model.couplings.0.weight"} <= keys
    assert original.state_dict()["generator_state"].dtype == torch.uint8
    expected = run(original, calls=4)

    # A sampler of a freshly built model with other weights and another seed.
    resumed = small_sampler(seed=2, model_seed=9)
    control = small_sampler(seed=2, model_seed=9)
    assert not torch.equal(resumed.model.couplings[0].weight, original.model.couplings[0].weight)
    buffer.seek(0)
    resumed.load_state_dict(torch.load(buffer))
    assert torch.equal(resumed.model.couplings[0].weight, original.model.couplings[0].weight)
    assert identical(run(resumed, calls=4), expected)
    # negative control: without the load, the same construction continues differently.
    assert not identical(run(control, calls=4), expected)


def test_loading_without_a_generator_state_keeps_the_generator():
    sampler = small_sampler(seed=5)
    run(sampler, calls=3)
    advanced = sampler.generator.get_state()
    weights_only = {f"model.{k}": v for k, v in sampler.model.state_dict().items()}
    sampler.load_state_dict(weights_only, strict=False)
    assert torch.equal(sampler.generator.get_state(), advanced)  # not rewound to an old saved state
    # negative control: a state_dict that brings a generator state does set it.
    saved = sampler.state_dict()
    run(sampler, calls=1)
    sampler.load_state_dict(saved)
    assert torch.equal(sampler.generator.get_state(), advanced)


@pytest.mark.parametrize(
    "convert", [lambda s: s.to(torch.float64), lambda s: s.double()], ids=["to", "double"]
)
def test_dtype_conversion_moves_particles(convert):
    sampler = small_sampler(seed=4, probabilities=True)
    before = [x.clone() for x in sampler.particles]
    assert all(x.dtype == torch.float32 for x in before)
    assert convert(sampler) is sampler
    assert sampler.model.dtype == torch.float64
    assert all(x.dtype == torch.float64 for x in sampler.particles)
    assert all(torch.equal(x, y.double()) for x, y in zip(sampler.particles, before))
    assert sampler.generator_state.dtype == torch.uint8  # not a floating buffer: left alone
    # The sampler keeps working, in float64.
    states = sampler()
    assert all(x.dtype == torch.float64 and is_binary(x) for x in states)
    stats = sampler.statistics()
    assert sorted(stats) == ["couplings.0.weight", "layers.0.bias", "layers.1.bias"]
    assert all(t.dtype == torch.float64 for t in stats.values())
    sampler.reset()
    assert all(x.dtype == torch.float64 for x in sampler.particles)
    assert all(x.dtype == torch.float64 for x in sampler.sample(40, burn_in=1, thin=1, progress=False))


# ---------------------------------------------------------------------------------------------
# sample(), reset(), init.


@pytest.mark.parametrize("num_samples", [3, 7, 17])
def test_sample_records_every_thin_sweeps_after_burn_in(num_samples):
    sampler = small_sampler(seed=8, num_particles=7, sweeps=1)
    twin = small_sampler(seed=8, num_particles=7, sweeps=1)
    samples = sampler.sample(num_samples, burn_in=5, thin=3, progress=False)
    assert [tuple(x.shape) for x in samples] == [(num_samples, 6), (num_samples, 3)]
    assert all(is_binary(x) and x.dtype == torch.float32 for x in samples)

    # The twin advanced sweep by sweep: burn_in sweeps, then the particles every thin sweeps.
    for _ in range(5):
        twin()
    recorded = []
    for _ in range(math.ceil(num_samples / 7)):
        for _ in range(3):
            twin()
        recorded.append([x.clone() for x in twin.particles])
    expected = [torch.cat(layer)[:num_samples] for layer in zip(*recorded)]
    assert identical(samples, expected)
    assert identical(sampler.particles, twin.particles)  # the chains stay advanced
    # negative control: the twin's states one sweep later are other states.
    twin()
    assert not identical(sampler.particles, twin.particles)


def test_reset_redraws_the_particles():
    sampler = small_sampler(seed=10)
    before = [x.clone() for x in sampler.particles]
    sampler.reset()
    assert not identical(sampler.particles, before)
    assert all(is_binary(x) for x in sampler.particles)


def test_reset_restarts_visible_particles_at_binary_init_data():
    generator = torch.Generator().manual_seed(12)
    data = torch.bernoulli(torch.full((32, 6), 0.5), generator=generator)
    sampler = small_sampler(seed=12, init=data)
    run(sampler, calls=2)
    assert not torch.equal(sampler.particles[0], data)  # the chains moved away
    data_copy = data.clone()
    data.zero_()  # the sampler kept its own copy of init
    hidden = sampler.particles[1].clone()
    sampler.reset()
    assert torch.equal(sampler.particles[0], data_copy)
    assert not torch.equal(sampler.particles[1], hidden)  # the hidden particles are redrawn too


def test_init_binary_data_is_the_start():
    data = torch.bernoulli(torch.full((32, 6), 0.5), generator=torch.Generator().manual_seed(14))
    sampler = small_sampler(seed=14, init=data)
    assert torch.equal(sampler.particles[0], data)  # before any sweep
    assert is_binary(sampler.particles[1])
    # float32 data on a float64 model: the particles take the model's dtype.
    model = make_model("rbm")
    sampler = el.PersistentSampler(
        model, num_particles=4, init=torch.eye(4, 5), generator=torch.Generator().manual_seed(0)
    )
    assert sampler.particles[0].dtype == torch.float64
    assert torch.equal(sampler.particles[0], torch.eye(4, 5, dtype=torch.float64))


def test_init_probabilities_give_bernoulli_draws():
    num_particles = 20_000
    rates = torch.tensor([0.05, 0.2, 0.5, 0.7, 0.9, 0.99])
    sampler = small_sampler(seed=16, num_particles=num_particles, init=rates.expand(num_particles, 6))
    visible, hidden = sampler.particles
    assert is_binary(visible) and is_binary(hidden)
    # Bernoulli(rates) per column, uniform hidden units: z-scores with the binomial standard
    # error (common practice, no source).
    for x, p in ((visible, rates), (hidden, torch.full((3,), 0.5))):
        z = (x.mean(0) - p).abs() / torch.sqrt(p * (1 - p) / num_particles)
        assert float(z.max()) < Z_BOUND
    # negative control: the columns are told apart from each other at this sample size.
    assert bool((visible.mean(0).diff() > 0).all())


def test_uniform_init_draws_every_layer_uniformly():
    num_particles = 20_000
    sampler = small_sampler(seed=18, num_particles=num_particles)
    for x in sampler.particles:
        # Bernoulli(1/2): z-score with the binomial standard error (common practice, no source).
        z = (x.mean(0) - 0.5).abs() / math.sqrt(0.25 / num_particles)
        assert is_binary(x) and float(z.max()) < Z_BOUND


# ---------------------------------------------------------------------------------------------
# Bad input: a TypeError / ValueError naming the argument, and nothing changed.

NAN_ROW = torch.tensor([[float("nan")] + [0.0] * 5])

# (id, keyword arguments replacing the good ones, exception type, fragment of the message)
CONSTRUCTION_CASES = [
    ("num_particles 0", {"num_particles": 0}, ValueError, "num_particles must be positive"),
    ("num_particles -1", {"num_particles": -1}, ValueError, "num_particles must be positive"),
    ("num_particles 2.5", {"num_particles": 2.5}, TypeError, "num_particles must be an int"),
    ("num_particles True", {"num_particles": True}, TypeError, "num_particles must be an int"),
    ("sweeps 0", {"sweeps": 0}, ValueError, "sweeps must be positive"),
    ("sweeps 1.0", {"sweeps": 1.0}, TypeError, "sweeps must be an int"),
    ("init wrong width", {"init": torch.ones(4, 5)}, ValueError, "init must have 6 columns"),
    ("init wrong number of rows", {"init": torch.ones(5, 6)}, ValueError, "init has batch size 5"),
    ("init 1-D", {"init": torch.ones(6)}, ValueError, "init must be 2-D"),
    ("init NaN", {"init": NAN_ROW.expand(4, 6)}, ValueError, "init holds 4 non-finite"),
    ("init above 1", {"init": torch.full((4, 6), 1.5)}, ValueError, "init must lie in [0, 1]"),
    ("init negative", {"init": torch.full((4, 6), -0.1)}, ValueError, "init must lie in [0, 1]"),
    (
        "init integer values above 1",
        {"init": torch.full((4, 6), 3, dtype=torch.uint8)},
        ValueError,
        "init must lie in [0, 1]",
    ),
    ("init a list", {"init": [[1.0] * 6] * 4}, TypeError, "init must be a torch.Tensor"),
    ("init unknown string", {"init": "zeros"}, ValueError, "init must be 'uniform'"),
    ("model a layer", {"model": el.BinaryLayer(6)}, TypeError, "model must be an EnergyModel"),
    ("model None", {"model": None}, TypeError, "model must be an EnergyModel"),
    ("generator a seed", {"generator": 1234}, TypeError, "generator must be a torch.Generator"),
    ("probabilities 1", {"probabilities": 1}, TypeError, "probabilities must be a bool"),
    ("probabilities 'yes'", {"probabilities": "yes"}, TypeError, "probabilities must be a bool"),
]


@pytest.mark.parametrize(
    "overrides, error, fragment", [c[1:] for c in CONSTRUCTION_CASES], ids=[c[0] for c in CONSTRUCTION_CASES]
)
def test_bad_construction_raises_and_changes_nothing(overrides, error, fragment):
    model = el.rbm(6, 3, generator=torch.Generator().manual_seed(0))
    generator = torch.Generator().manual_seed(0)
    before, generator_before = snapshot(model), generator.get_state()
    arguments = {"model": model, "num_particles": 4, "generator": generator, **overrides}
    with pytest.raises(error) as caught:
        el.PersistentSampler(**arguments)
    assert fragment in str(caught.value)
    assert_unchanged(model, before)
    assert torch.equal(generator.get_state(), generator_before)  # nothing was drawn


# (id, call on a sampler, exception type(s), fragment of the message)
CALL_CASES = [
    ("num_samples 0", lambda s: s.sample(0, progress=False), ValueError, "num_samples must be positive"),
    ("num_samples -3", lambda s: s.sample(-3, progress=False), ValueError, "num_samples must be positive"),
    ("num_samples 2.5", lambda s: s.sample(2.5, progress=False), TypeError, "num_samples must be an int"),
    ("burn_in -1", lambda s: s.sample(5, burn_in=-1, progress=False), ValueError, "burn_in"),
    ("burn_in 1.5", lambda s: s.sample(5, burn_in=1.5, progress=False), TypeError, "burn_in"),
    ("burn_in True", lambda s: s.sample(5, burn_in=True, progress=False), TypeError, "burn_in"),
    ("thin 0", lambda s: s.sample(5, burn_in=1, thin=0, progress=False), ValueError, "thin must be positive"),
    (
        "thin True",
        lambda s: s.sample(5, burn_in=1, thin=True, progress=False),
        TypeError,
        "thin must be an int",
    ),
]


@pytest.mark.parametrize("call, error, fragment", [c[1:] for c in CALL_CASES], ids=[c[0] for c in CALL_CASES])
def test_bad_call_raises_and_changes_nothing(call, error, fragment):
    sampler = small_sampler(seed=20)
    run(sampler, calls=1)
    before = snapshot(sampler)  # model, particles and the generator's state
    with pytest.raises(error) as caught:
        call(sampler)
    assert fragment in str(caught.value)
    assert_unchanged(sampler, before)
    # negative control: a good call changes the snapshot (the particles and the generator).
    sampler.sample(5, burn_in=1, thin=1, progress=False)
    with pytest.raises(AssertionError):
        assert_unchanged(sampler, before)
