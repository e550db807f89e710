"""Annealed importance sampling: forward estimates of log Z and reverse (conservative) estimates of
log p(v), against exact enumeration.

Sources of the checks:

- exact log Z and log p(v): ``el.exact_log_partition`` (checked against brute force in
  test_exact.py) and ``brute_force`` / ``exact_log_marginal`` of ``tests/reference.py`` (every
  joint state, mathematics);
- unbiasedness: the mean importance weight of AIS is an unbiased estimate of Z / Z_A ("Annealed
  Importance Sampling", Neal, Statistics and Computing, 2001), and the reverse weight is unbiased
  for the probability that the forward annealing process generates v ("Accurate and
  Conservative Estimates of MRF Log-likelihood using Reverse Annealing", AISTATS 2015); checked by
  z-scores over many independent runs (common practice, no source);
- the distribution of the forward process, computed exactly here by multiplying the transition
  matrices of a tiny RBM over its visible states (mathematics);
- Gibbs' inequality (mathematics): averaged over data drawn from p, log q(v) <= log p(v) for any q.

Every random draw uses a seeded ``torch.Generator``; measured margins are quoted beside the checks.
"""

from __future__ import annotations

import copy
import functools
import itertools
import math

import numpy as np
import pytest
import torch
from torch import Tensor

import ebm_layers as el
from ebm_layers.evaluation import partition
from ebm_layers.evaluation.partition import ais_log_partition, annealing_schedule, reverse_ais_log_likelihood
from tests import helpers
from tests.helpers import assert_unchanged, seeded, snapshot
from tests.reference import brute_force, build, exact_log_marginal, randomize

F64 = torch.float64
Z_BOUND = 4.5


# The data of this file: every unit on with probability 0.4.
binary = functools.partial(helpers.binary, p=0.4)


@torch.no_grad()
def exact_log_z(model: el.EnergyModel) -> float:
    return float(el.exact_log_partition(model))


# ---------------------------------------------------------------------------------------------
# Forward AIS against exact log Z.

TINY = [
    ("rbm", (5, 3)),
    ("backwards", (4, 3)),
    ("hidden_star", (4, 3, 2)),
    ("uncoupled_layer", (4, 3, 2)),
    ("chain3", (4, 3, 2)),
    ("chain4", (3, 3, 2, 2)),
    ("skip", (3, 2, 3)),
    ("semi_restricted", (5, 3)),
    ("hidden_lateral_chain", (2, 4, 2)),
    ("pairwise", (6,)),
]


@pytest.mark.parametrize("shape, sizes", TINY)
def test_exact_log_z_lies_in_the_bracket_on_tiny_models(shape, sizes):
    model = randomize(build(shape, sizes), seed=1, scale=1.0)
    exact = exact_log_z(model)
    data = binary((50, sizes[0]), seed=2)
    estimate = ais_log_partition(
        model, num_chains=200, num_betas=500, data=data, generator=seeded(3), progress=False
    )
    assert estimate.lower <= exact <= estimate.upper, (estimate, exact)
    assert abs(estimate.log_z - exact) < 4 * estimate.stderr + 1e-3  # measured: within 1.4 standard errors
    assert estimate.log_weights.dtype == F64 and estimate.log_weights.shape == (200,)


def trained(sizes: tuple[int, ...], train: Tensor, epochs: int, pretrain_epochs: int | None = None):
    """Some model trained on the digits (fit's defaults but the epochs): AIS is what is tested."""
    g = seeded(0)
    model = el.dbm(*sizes, generator=g)
    el.fit(model, train, epochs=epochs, pretrain_epochs=pretrain_epochs, progress=False, generator=g)
    return model


@pytest.mark.slow
def test_default_ais_is_within_five_hundredths_of_a_nat_on_a_digits_rbm(digits):
    train, _ = digits
    model = trained((64, 16), train, epochs=10)
    exact = exact_log_z(model)
    with pytest.warns(UserWarning, match="constant units"):  # the digits have always-off pixels
        estimate = ais_log_partition(model, data=train, generator=seeded(1), progress=False)
    # Measured: error -0.002, bracket width 0.023, effective sample size 99.9 of 100.
    assert abs(estimate.log_z - exact) < 0.05
    assert estimate.lower <= exact <= estimate.upper


@pytest.mark.slow
def test_default_ais_is_within_a_tenth_of_a_nat_on_a_digits_chain(digits):
    """64-20-10: exact by enumerating the 2^20 states of the middle layer."""
    train, _ = digits
    model = trained((64, 20, 10), train, epochs=5, pretrain_epochs=2)
    exact = exact_log_z(model)
    with pytest.warns(UserWarning, match="constant units"):
        estimate = ais_log_partition(model, data=train, generator=seeded(1), progress=False)
    # Measured: -0.0001, bracket width 0.024 (30 pretraining and 10 joint epochs: -0.001, 0.024).
    assert abs(estimate.log_z - exact) < 0.1
    assert estimate.lower <= exact <= estimate.upper


# ---------------------------------------------------------------------------------------------
# Unbiasedness in Z with few intermediate distributions.


def mean_weight_z(model: el.EnergyModel, num_betas: int, data: Tensor, seed: int) -> float:
    """z-score of the mean importance weight of 20,000 runs against the exact Z / Z_A."""
    estimate = ais_log_partition(
        model, num_chains=20_000, num_betas=num_betas, data=data, generator=seeded(seed), progress=False
    )
    ratio = torch.exp(estimate.log_weights - (exact_log_z(model) - estimate.log_z_base))
    return float((ratio.mean() - 1.0) / (ratio.std() / math.sqrt(ratio.numel())))


UNBIASED = [("rbm", (4, 3), 2), ("rbm", (4, 3), 5), ("chain3", (3, 3, 2), 3), ("chain3", (3, 3, 2), 20)]


@pytest.mark.parametrize("shape, sizes, num_betas", UNBIASED)
def test_mean_weight_is_unbiased_for_z(shape, sizes, num_betas):
    model = randomize(build(shape, sizes), seed=4, scale=1.5)
    z = mean_weight_z(model, num_betas, binary((40, sizes[0]), seed=5), seed=6)
    assert abs(z) < Z_BOUND  # measured: |z| <= 1.4


def test_unbiasedness_check_catches_transitions_at_the_wrong_temperature(monkeypatch):
    """Negative control: transitions that leave the model (beta = 1), not p_beta, invariant."""
    model = randomize(build("chain3", (3, 3, 2)), seed=4, scale=1.5)
    right = partition._AnnealingPath.transition
    monkeypatch.setattr(
        partition._AnnealingPath, "transition", lambda self, beta, *args: right(self, 1.0, *args)
    )
    z = mean_weight_z(model, 3, binary((40, 3), seed=5), seed=6)
    assert abs(z) > Z_BOUND  # measured: 40


# ---------------------------------------------------------------------------------------------
# Reverse annealing.


def forward_process_distribution(model: el.EnergyModel, betas: list[float], base: Tensor) -> Tensor:
    """The exact probability of every visible vector (``itertools.product`` order) under the
    forward annealing process of a two-class model with the odd layers summed out: the kept
    (even) layers drawn from the base, then at every beta_1 .. beta_K the odd layers from their
    conditional and the even layers from theirs. Conditionals come from the brute-force joint
    table of E_beta = (1 - beta) E_A + beta E_B (mathematics), not from the library."""
    ref = brute_force(model)
    odd = [i for i in range(len(model.sizes)) if i % 2]
    columns = [list(range(sum(model.sizes[:i]), sum(model.sizes[: i + 1]))) for i in range(len(model.sizes))]
    kept_columns = [c for i, cols in enumerate(columns) if i not in odd for c in cols]
    summed_columns = [c for i in odd for c in columns[i]]

    def code(bits: Tensor) -> Tensor:
        return (bits * 2 ** torch.arange(bits.shape[1] - 1, -1, -1, dtype=F64)).sum(1).long()

    kept, summed = code(ref.x[:, kept_columns]), code(ref.x[:, summed_columns])
    base_all = torch.zeros(ref.x.shape[1], dtype=F64)
    base_all[columns[0]] = base.to(F64)
    energy_a = -(ref.x @ base_all)

    def table(beta: float) -> Tensor:  # log f_beta over (kept state, summed state)
        logs = torch.empty(2 ** len(kept_columns), 2 ** len(summed_columns), dtype=F64)
        logs[kept, summed] = -((1 - beta) * energy_a + beta * ref.energy)
        return logs

    probability = torch.softmax(torch.logsumexp(table(0.0), 1), 0)  # the base over kept states
    for beta in betas[1:]:
        logs = table(beta)
        summed_given_kept = torch.softmax(logs, 1)
        kept_given_summed = torch.softmax(logs, 0).T
        probability = probability @ summed_given_kept @ kept_given_summed
    # Visible vectors are the leading bits of the kept code: sum out the other kept layers.
    return probability.view(2 ** model.sizes[0], -1).sum(1)


def reverse_weight_z(model: el.EnergyModel, data: Tensor) -> float:
    """max |z| over every visible vector of the mean reverse weight (20,000 runs each) against the
    exact probability that the forward process generates it."""
    betas = [0.0, 0.3, 0.7, 1.0]
    base = partition._base_parameters(model, data, "data")["layers.0.bias"]
    q = forward_process_distribution(model, betas, base)
    n_v = model.sizes[0]
    states = torch.tensor(list(itertools.product((0.0, 1.0), repeat=n_v)), dtype=F64)
    runs = 20_000
    estimates = reverse_ais_log_likelihood(
        model, states.repeat(runs, 1), data=data, schedule=betas, generator=seeded(9), progress=False
    )
    weights = torch.exp(estimates).view(runs, 2**n_v)
    return float(((weights.mean(0) - q) / (weights.std(0) / math.sqrt(runs))).abs().max())


@pytest.mark.parametrize("shape, sizes", [("rbm", (3, 2)), ("chain3", (3, 2, 2))])
def test_reverse_weights_are_unbiased_for_the_forward_process(shape, sizes):
    # On the chain the kept hidden layer starts from the mean-field posterior, whose probability
    # enters the weight: the estimate must stay unbiased.
    model = randomize(build(shape, sizes), seed=7, scale=1.5)
    assert reverse_weight_z(model, binary((40, 3), seed=8)) < Z_BOUND  # measured: 1.4 (rbm), 2.6 (chain)


def test_reverse_check_catches_a_start_whose_probability_is_left_out(monkeypatch):
    """Negative control: without the mean-field start's log-probability the chain's weights are biased."""
    monkeypatch.setattr(el.BinaryLayer, "log_probability", lambda layer, x, input: 0.0)
    model = randomize(build("chain3", (3, 2, 2)), seed=7, scale=1.5)
    assert reverse_weight_z(model, binary((40, 3), seed=8)) > Z_BOUND  # measured: 62


def test_reverse_check_catches_transitions_at_the_wrong_temperature(monkeypatch):
    """Negative control, as for the forward weights."""
    model = randomize(build("rbm", (3, 2)), seed=7, scale=1.5)
    right = partition._AnnealingPath.transition
    monkeypatch.setattr(
        partition._AnnealingPath, "transition", lambda self, beta, *args: right(self, 1.0, *args)
    )
    assert reverse_weight_z(model, binary((40, 3), seed=8)) > Z_BOUND  # measured: 116


def test_reverse_is_below_and_forward_above_the_exact_log_likelihood():
    model = randomize(build("rbm", (5, 3)), seed=11, scale=1.5)
    ref = brute_force(model)
    # Test data drawn from the model itself: then by Gibbs' inequality any other distribution
    # has a lower average log-probability, so the reverse estimate is below on average.
    rows = torch.multinomial(ref.prob, 300, replacement=True, generator=seeded(12))
    v = ref.states[0][rows]
    exact = float(exact_log_marginal(model, v).mean())
    data = binary((100, 5), seed=13)
    # Few intermediate distributions and one chain per run, so that both biases are clear.
    reverse = [
        float(
            reverse_ais_log_likelihood(
                model, v, num_betas=5, data=data, generator=seeded(run), progress=False
            ).mean()
        )
        for run in range(10)
    ]
    runs = ais_log_partition(
        model, num_chains=3_000, num_betas=5, data=data, generator=seeded(14), progress=False
    )
    log_z_per_run = runs.log_z_base + runs.log_weights  # each chain is a run with one chain
    with torch.no_grad():
        forward = float((-model.free_energy(v)).mean()) - float(log_z_per_run.mean())
    assert np.mean(reverse) < exact < forward  # measured: reverse -0.30 and forward +0.33 from exact


# ---------------------------------------------------------------------------------------------
# Schedules, the estimate's bookkeeping, warnings.


def test_annealing_schedules():
    linear = annealing_schedule(11)
    torch.testing.assert_close(linear, torch.linspace(0, 1, 11, dtype=F64))
    piecewise = annealing_schedule(151, "piecewise")
    assert piecewise.shape == (151,) and piecewise[0] == 0 and piecewise[-1] == 1
    assert bool((piecewise[1:] > piecewise[:-1]).all())
    # 1/15 of the steps below 0.5, 10/15 above 0.9 ("On the Quantitative Analysis of Deep
    # Belief Networks", ICML 2008, from memory).
    assert int((piecewise < 0.5).sum()) == 10 and int((piecewise > 0.9).sum()) == 100


def test_estimate_bookkeeping_and_the_flag():
    log_weights = torch.tensor([0.0, math.log(3.0)], dtype=F64)
    estimate = partition.Estimate.from_log_weights(log_weights, log_z_base=1.0, num_betas=5)
    assert estimate.log_z == pytest.approx(1.0 + math.log(2.0))
    assert estimate.effective_sample_size == pytest.approx(16.0 / 10.0)  # (1 + 3)^2 / (1 + 9)
    # relative weights 0.5 and 1.5: standard error 0.5; the bracket's lower end is meaningless.
    assert estimate.stderr == pytest.approx(0.5)
    assert estimate.flagged and estimate.lower == -math.inf and "too widely" in estimate.warning
    assert estimate.upper == pytest.approx(estimate.log_z + math.log(2.5))
    assert "-inf" in str(estimate)


def test_too_few_intermediate_distributions_are_flagged_on_a_hard_model():
    model = randomize(build("rbm", (8, 4)), seed=14, scale=4.0)
    estimate = ais_log_partition(
        model, num_chains=50, num_betas=2, base="uniform", generator=seeded(15), progress=False
    )
    assert estimate.flagged and estimate.warning is not None


def test_constant_units_are_clipped_with_a_warning():
    model = randomize(build("rbm", (4, 2)), seed=16, scale=1.0)
    data = binary((20, 4), seed=17)
    data[:, 0] = 0.0
    with pytest.warns(UserWarning, match="1 of 4 units have base rates outside"):
        estimate = ais_log_partition(
            model, num_chains=10, num_betas=10, data=data, generator=seeded(18), progress=False
        )
    assert math.isfinite(estimate.log_z)


def test_float32_model_accumulates_in_float64(digits):
    train, _ = digits
    model = el.rbm(64, 8, generator=seeded(0))
    with pytest.warns(UserWarning, match="constant units"):
        estimate = ais_log_partition(
            model, num_chains=10, num_betas=50, data=train, generator=seeded(1), progress=False
        )
    assert model.dtype == torch.float32 and estimate.log_weights.dtype == F64


@pytest.mark.parametrize("step", [1e-6, 1e-4, 1e-2])
def test_float32_models_keep_the_small_differences_of_one_annealing_step(step):
    """One step's log ratio of a float32 model against the same model in float64: the summed
    layers' log-partition terms are evaluated in float64, so the difference keeps its digits
    (float64 keeps about 1e-16 of each term, far more than float32 keeps here; mathematics)."""
    model = el.rbm(50, 500, generator=seeded(int(-math.log10(step)) + 100))
    with torch.no_grad():
        model.couplings[0].weight.mul_(300.0)  # inputs of a few units, as in a trained model
    wide = copy.deepcopy(model).double()
    base = partition._base_parameters(model, None, "uniform")
    narrow_path = partition._AnnealingPath(model, base)
    wide_path = partition._AnnealingPath(wide, partition._base_parameters(wide, None, "uniform"))
    states = narrow_path.draw_base(50, seeded(3))
    narrow = narrow_path.terms(states)
    ours = narrow_path.log_ratio(0.5, 0.5 - step, narrow)
    reference = wide_path.log_ratio(
        0.5, 0.5 - step, wide_path.terms([None if x is None else x.double() for x in states])
    )
    assert ours.dtype == F64
    error = float(((ours - reference) / reference.abs()).abs().max())
    tolerance = 1e-5
    assert error < tolerance  # measured: at most 2e-8
    if step <= 1e-4:  # the size of one step of a 10,000-beta run
        # Negative control: subtracting float32 log-partition values loses the difference's digits
        # (measured: 8e-4 at a step of 1e-4, 0.13 at 1e-6).
        hidden, u = model.layers[1], narrow.inputs[1]
        with torch.no_grad():
            naive = hidden.log_partition(0.5 * u) - hidden.log_partition((0.5 - step) * u)
        naive = naive.double() + step * narrow.shift
        assert float(((naive - reference) / reference.abs()).abs().max()) > 10 * tolerance


class ShiftedBinaryLayer(el.BinaryLayer):
    """0/1 units whose own energy is not zero at x = 0: ``U(x) = -b . x + k . (1 - x)``, ``k`` learned."""

    def __init__(self, size: int) -> None:
        super().__init__(size, dtype=F64)
        self.shift = torch.nn.Parameter(torch.zeros(size, dtype=F64))

    def energy(self, x: Tensor) -> Tensor:
        return super().energy(x) + (1 - x) @ self.shift

    def logits(self, input: Tensor) -> Tensor:
        return input + self.bias + self.shift

    def log_partition(self, input: Tensor) -> Tensor:
        return (torch.nn.functional.softplus(self.logits(input)) - self.shift).sum(-1)

    def base_parameters(self, data: Tensor | None = None) -> dict[str, Tensor]:
        return {**super().base_parameters(data), "shift": torch.zeros_like(self.shift.detach())}


def test_log_ratio_of_0_1_layers_equals_the_difference_of_log_partitions():
    """The step's log ratio for layers of 0/1 units (``logits(input) = input + logits(0)``, the
    log-partition a sum of softplus terms plus ``-sum U_j(0)``) against the plain difference of the
    layer's own float64 log-partitions (mathematics), with a layer whose ``U(0)`` is not zero and
    moves along the path; negative control: the same without the ``-sum U_j(0)`` terms."""
    model = el.EnergyModel(
        [el.BinaryLayer(6, dtype=F64), ShiftedBinaryLayer(5)], [el.DenseCoupling(0, 1, 6, 5, dtype=F64)]
    )
    with torch.no_grad():
        for parameter in model.parameters():
            parameter.normal_(0.0, 1.0, generator=seeded(30))
    path = partition._AnnealingPath(model, partition._base_parameters(model, None, "uniform"))
    with torch.no_grad():
        terms = path.terms(path.draw_base(40, seeded(31)))
        ours = path.log_ratio(0.6, 0.5, terms)
        log_partitions = path._log_partitions(0.6, terms.inputs) - path._log_partitions(0.5, terms.inputs)
        reference = 0.1 * terms.shift + log_partitions
        assert torch.allclose(ours, reference, rtol=1e-10, atol=1e-12)
        # Negative control: the constant is the shift's interpolated sum, 0.1 * sum(k) here.
        constant = path._zero_input(1, 0.6)[1] - path._zero_input(1, 0.5)[1]
        assert abs(float(constant) + 0.1 * float(model.layers[1].shift.sum())) < 1e-12
        assert not torch.allclose(ours - constant, reference, rtol=1e-6)


def test_same_seed_same_estimate():
    model = randomize(build("chain3", (4, 3, 2)), seed=19, scale=1.0)
    data = binary((30, 4), seed=20)
    first, second = (
        ais_log_partition(model, num_chains=20, num_betas=30, data=data, generator=seeded(21), progress=False)
        for _ in range(2)
    )
    assert torch.equal(first.log_weights, second.log_weights)


# ---------------------------------------------------------------------------------------------
# Bad input: a clear error, the model untouched.


def _cases():
    data = binary((10, 5), seed=0)
    nan = data.clone()
    nan[0, 0] = float("nan")
    return [
        ({"num_chains": 0, "data": data}, ValueError, "num_chains"),
        ({"num_betas": 1, "data": data}, ValueError, "num_betas"),
        ({"schedule": [0.0, 0.5, 0.4, 1.0], "data": data}, ValueError, "increase strictly, got 0.5 then 0.4"),
        ({"schedule": [0.1, 0.5, 1.0], "data": data}, ValueError, "from 0 to 1"),
        ({"schedule": [0.0, 0.5, 0.9], "data": data}, ValueError, "from 0 to 1"),
        ({"schedule": "cubic", "data": data}, ValueError, "kind"),
        ({"data": data[:, :4]}, ValueError, "5 columns"),
        ({"data": nan}, ValueError, "non-finite"),
        ({"data": data * 2}, ValueError, r"\[0, 1\]"),
        ({"base": "model", "data": data}, ValueError, "base must be"),
        ({"base": "data"}, ValueError, "base='data' needs data"),
    ]


@pytest.mark.parametrize("case", range(len(_cases())))
def test_bad_ais_arguments(case):
    options, error, message = _cases()[case]
    model = randomize(build("rbm", (5, 3)), seed=0, scale=1.0)
    before = snapshot(model)
    with pytest.raises(error, match=message):
        ais_log_partition(model, progress=False, **options)
    assert_unchanged(model, before)


def test_ais_without_data_starts_from_uniform_units():
    # exact enumeration (mathematics) as the reference: AIS without data= works, from base="uniform".
    model = randomize(build("rbm", (5, 3)), seed=0, scale=1.0)
    estimate = ais_log_partition(
        model, num_betas=500, progress=False, generator=torch.Generator().manual_seed(0)
    )
    same = ais_log_partition(
        model, num_betas=500, base="uniform", progress=False, generator=torch.Generator().manual_seed(0)
    )
    assert estimate.log_z == same.log_z
    assert abs(estimate.log_z - float(el.exact_log_partition(model).detach())) < 0.05


def test_reverse_refuses_models_it_cannot_reverse():
    model = randomize(build("skip", (3, 2, 3)), seed=0, scale=1.0)
    with pytest.raises(ValueError, match="two colour classes"):
        reverse_ais_log_likelihood(model, binary((2, 3), seed=0), base="uniform", progress=False)
    lateral = randomize(build("semi_restricted", (4, 2)), seed=0, scale=1.0)
    with pytest.raises(ValueError, match="lateral"):
        reverse_ais_log_likelihood(lateral, binary((2, 4), seed=0), base="uniform", progress=False)


@pytest.mark.parametrize(
    "options, error, message",
    [
        ({"v": binary((3, 4), seed=0)}, ValueError, "5 columns"),
        ({"v": binary((3, 5), seed=0) + 0.5}, ValueError, r"\[0, 1\]"),
        ({"v": binary((3, 5), seed=0), "num_chains": 0}, ValueError, "num_chains"),
        ({"v": binary((3, 5), seed=0), "num_betas": 1}, ValueError, "num_betas"),
        ({"v": binary((3, 5), seed=0), "base": "flat"}, ValueError, "base must be"),
    ],
)
def test_bad_reverse_arguments(options, error, message):
    model = randomize(build("rbm", (5, 3)), seed=0, scale=1.0)
    before = snapshot(model)
    options.setdefault("base", "uniform")
    with pytest.raises(error, match=message):
        reverse_ais_log_likelihood(model, progress=False, **options)
    assert_unchanged(model, before)
