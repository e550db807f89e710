"""Model metrics against brute-force enumeration, direct formulas and a reference library.

The ground truth is ``tests/reference.py``: ``brute_force`` enumerates every joint state from the
energy formula alone, ``visible_marginal`` gives every visible vector with its exact log p(v), and
``exact_log_marginal`` the exact log p(v) of given rows.
"""

from __future__ import annotations

import math
import re
from types import SimpleNamespace

import numpy as np
import pytest
import torch
from sklearn.neural_network import BernoulliRBM
from torch import Tensor

import ebm_layers as el
from ebm_layers.evaluation import metrics
from ebm_layers.evaluation.partition import ais_log_partition
from tests.helpers import assert_close, assert_unchanged, close, snapshot
from tests.reference import (
    CLOSED_FORM,
    SHAPES,
    brute_force,
    build,
    exact_log_marginal,
    randomize,
    visible_marginal,
)

DEEP = ["chain3", "chain4", "skip", "hidden_lateral_chain"]  # no closed-form free energy


def sizes_of(shape: str) -> tuple[int, ...]:
    """Layer sizes of a test model of ``shape``: at most 12 units, so enumeration stays cheap."""
    num_layers, _ = SHAPES[shape]
    return (4, 3, 3, 2)[:num_layers]


def exact_log_p(model: el.EnergyModel, lateral_factor: float = 1.0) -> tuple[Tensor, Tensor, Tensor]:
    """Exact enumeration (mathematics): every visible vector, its log p(v), and log Z."""
    ref = brute_force(model, lateral_factor)
    v, log_p = visible_marginal(ref, -ref.energy)
    return v, log_p, ref.log_z


# -- log_likelihood --------------------------------------------------------------------------


@pytest.mark.parametrize("shape", CLOSED_FORM)
def test_every_method_is_exact_on_closed_form_models(shape):
    model = randomize(build(shape, sizes_of(shape)), seed=1)
    v, log_p, log_z = exact_log_p(model)
    result = el.log_likelihood(model, v, log_z)
    assert (result.method, result.label, result.log_z_estimated) == ("exact", "exact", False)
    assert result.values.dtype == torch.float64 and result.log_z == log_z.item()
    # exact enumeration (mathematics): log p(v) = log sum_h exp(-E(v, h)) - log Z, for every v.
    assert_close(result.values, log_p)
    assert result.mean == pytest.approx(log_p.mean().item(), rel=1e-12)
    # Mathematics: given v the hidden units are independent here, so mean field finds the exact
    # posterior (the bound is tight), and importance sampling has nothing left to draw.
    for method in ("mean-field", "importance"):
        assert_close(el.log_likelihood(model, v, log_z, method=method, num_samples=3).values, log_p)


@pytest.mark.parametrize("shape", DEEP)
def test_mean_field_bound_below_and_importance_estimate_near_exact(shape):
    model = randomize(build(shape, sizes_of(shape)), seed=2)
    v, log_p, log_z = exact_log_p(model)
    bound = el.log_likelihood(model, v, log_z, method="mean-field")
    assert (bound.method, bound.label) == ("mean-field", "lower bound (mean field)")
    # exact enumeration (mathematics), Jensen's inequality: the bound never exceeds log p(v).
    gaps = log_p - bound.values
    assert gaps.min() >= -1e-9, f"bound above log p(v) by {-gaps.min().item():.3g}"
    estimate = el.log_likelihood(
        model, v, log_z, method="importance", num_samples=2000, generator=torch.Generator().manual_seed(0)
    )
    assert estimate.label == "estimate (importance sampling, mean-field proposal): low on average"
    # exact enumeration (mathematics): the estimate lands much nearer log p(v) than the bound
    # (measured: mean errors 0.0013-0.0043 against mean gaps 0.055-0.20, 34 to 53 times smaller).
    error = (estimate.values - log_p).abs().mean()
    assert error < gaps.mean() / 10, (
        f"importance error {error.item():.3g}, mean-field gap {gaps.mean().item():.3g}"
    )


@pytest.mark.parametrize("shape", DEEP)
def test_deep_models_get_the_exact_log_likelihood_where_enumeration_is_cheap(shape):
    model = randomize(build(shape, sizes_of(shape)), seed=2)
    v, log_p, log_z = exact_log_p(model)
    # exact enumeration (mathematics): brute force over every joint state against the per-example
    # enumeration of the fewest hidden units with the rest summed out in closed form.
    result = el.log_likelihood(model, v, log_z)
    assert (result.method, result.label) == ("exact", "exact")
    assert_close(result.values, log_p)
    assert_close(el.exact_log_likelihood(model, v), log_p)
    # negative control: the mean-field value (the method "auto" chose before) is below it.
    assert (el.log_likelihood(model, v, log_z, method="mean-field").values < log_p - 1e-6).any()


def test_exact_free_energy_of_a_deep_model_is_differentiable():
    model = randomize(build("chain3", sizes_of("chain3")), seed=4)
    v = torch.bernoulli(
        torch.full((3, 4), 0.5, dtype=torch.float64), generator=torch.Generator().manual_seed(0)
    )
    weight = model.couplings[1].weight
    (grad,) = torch.autograd.grad(el.exact_free_energy(model, v).sum(), weight)
    # Central differences (mathematics), float64.
    expected = torch.zeros_like(grad)
    with torch.no_grad():
        for index in np.ndindex(*weight.shape):
            values = []
            for step in (1e-6, -1e-6):
                weight[index] += step
                values.append(float(el.exact_free_energy(model, v).sum()))
                weight[index] -= step
            expected[index] = (values[0] - values[1]) / 2e-6
    torch.testing.assert_close(grad, expected, rtol=1e-6, atol=1e-8)
    assert float(grad.abs().max()) > 0.01


def test_the_chain_of_the_issue_is_cheap_to_evaluate_exactly():
    # A 64-20-10 chain: 2^20 states for log Z, 2^10 per example for F(v).
    model = el.dbm(64, 20, 10, generator=torch.Generator().manual_seed(0))
    assert el.posterior_states(model) == 2**10
    data = torch.bernoulli(torch.full((6, 64), 0.3), generator=torch.Generator().manual_seed(1))
    report = el.evaluate(model, data, reverse=False, progress=False)
    assert report.log_z_source == "exact (enumeration)"
    assert report.train.log_likelihood_label == "exact" and report.train.importance_log_likelihood is None
    exact = float(el.exact_log_likelihood(model, data).detach().mean())
    assert report.train.log_likelihood == pytest.approx(exact)


def test_labels_say_bound_only_where_the_number_is_one():
    # Jensen's inequality (mathematics): forward AIS's log Z is low on average, the log of an
    # unbiased estimate of p(v) is low on average; a mean-field value is a bound only with an
    # exact log Z; reverse AIS is low on average for the annealing process's distribution ("Accurate
    # and Conservative Estimates of MRF Log-likelihood using Reverse Annealing", AISTATS 2015).
    assert metrics.LABELS == {
        ("exact", False): "exact",
        ("exact", True): "estimate: exact free energy minus an AIS log Z, so high on average",
        ("mean-field", False): "lower bound (mean field)",
        ("mean-field", True): "mean-field value minus an AIS log Z: not a bound, its error has no known sign",
        ("importance", False): "estimate (importance sampling, mean-field proposal): low on average",
        ("importance", True): "estimate: importance sampling (low on average) minus an AIS log Z (which "
        "pushes it up): its error has no known sign",
    }
    for key, text in [*metrics.LABELS.items(), ("reverse", metrics.REVERSE_LABEL)]:
        claims_a_bound = "bound" in text.replace("not a bound", "")
        assert claims_a_bound == (key == ("mean-field", False)), text
    assert (
        "not a bound" in metrics.REVERSE_LABEL
        and "annealing process's own distribution" in metrics.REVERSE_LABEL
    )


def test_bound_check_catches_an_entropy_counted_twice(monkeypatch):
    model = randomize(build("chain3", sizes_of("chain3")), seed=2)
    v, log_p, log_z = exact_log_p(model)
    # negative control: doubling H(q) (a plausible slip) pushes the "bound" above the exact
    # log p(v) (exact enumeration, mathematics), so the comparison above would fail. A wrong
    # entropy sign would not be caught this way: it only lowers the values.
    entropy = metrics._entropy
    monkeypatch.setattr(metrics, "_entropy", lambda model, mu: 2 * entropy(model, mu))
    assert (el.log_likelihood(model, v, log_z, method="mean-field").values > log_p).any()


@pytest.mark.parametrize("shape", ["chain3", "hidden_lateral_chain"])
def test_importance_estimate_is_unbiased_in_probability(shape, monkeypatch):
    model = randomize(build(shape, (3, 3, 3)), seed=3, scale=1.0)
    v, log_p, log_z = exact_log_p(model)  # all 8 visible vectors
    runs = 4000

    def ratios() -> Tensor:
        """p_hat(v) / p(v) of ``runs`` independent one-draw estimates per v, ``(8, runs)``."""
        estimate = el.log_likelihood(
            model,
            v.repeat_interleave(runs, dim=0),
            log_z,
            method="importance",
            num_samples=1,
            generator=torch.Generator().manual_seed(4),
        )
        return torch.exp(estimate.values.view(len(v), runs) - log_p[:, None])

    def largest_z(ratio: Tensor) -> float:
        """Largest |z| over v of the mean ratio against 1."""
        return ((ratio.mean(1) - 1) / (ratio.std(1) / math.sqrt(runs))).abs().max().item()

    # exact enumeration (mathematics): E_q[f(v, h) / q(h)] = sum_h f(v, h), so the mean of
    # exp(estimate) matches p(v); z-test per v, 8 tests at |z| < 4 (measured: max |z| 2.0 and 2.7).
    ratio = ratios()
    assert largest_z(ratio) < 4
    # negative control: p_hat 5% too high is rejected (measured: max |z| 62 and 10) ...
    assert largest_z(1.05 * ratio) > 4
    # ... and so is the estimate with log q(h) left out of the weights (measured: 1084 and 658).
    monkeypatch.setattr(el.BinaryLayer, "log_probability", lambda layer, x, input: 0.0)
    assert largest_z(ratios()) > 4


def test_log_z_forms_and_labels():
    model = randomize(build("chain3", sizes_of("chain3")), seed=5)
    v, _, log_z = exact_log_p(model)
    as_float = el.log_likelihood(model, v, log_z.item())
    for given in (log_z, el.exact_log_partition(model)):  # 0-d tensors, the second with autograd
        result = el.log_likelihood(model, v, given)
        assert not result.log_z_estimated and torch.equal(result.values, as_float.values)
    estimated = el.log_likelihood(model, v, SimpleNamespace(log_z=log_z.item()))
    assert estimated.log_z_estimated and torch.equal(estimated.values, as_float.values)
    assert estimated.label == "estimate: exact free energy minus an AIS log Z, so high on average"
    generator = torch.Generator().manual_seed(0)
    annealed = ais_log_partition(
        model, num_chains=10, num_betas=50, base="uniform", generator=generator, progress=False
    )
    from_estimate = el.log_likelihood(model, v, annealed)
    assert from_estimate.log_z_estimated and from_estimate.log_z == annealed.log_z
    assert not as_float.values.requires_grad


def test_importance_is_repeatable_and_leaves_a_float32_model_alone():
    model64 = randomize(build("chain4", sizes_of("chain4")), seed=6)
    model = model64.to(torch.float32)
    v = torch.bernoulli(torch.full((5, 4), 0.5), generator=torch.Generator().manual_seed(0))
    before = snapshot(model)

    def estimate(seed: int) -> Tensor:
        generator = torch.Generator().manual_seed(seed)
        return el.log_likelihood(model, v, 3.0, method="importance", generator=generator).values

    first = estimate(7)
    assert first.dtype == torch.float64 and torch.equal(first, estimate(7))
    assert not torch.equal(first, estimate(8))
    torch.manual_seed(9)
    unseeded = el.log_likelihood(model, v, 3.0, method="importance").values
    torch.manual_seed(9)
    assert torch.equal(unseeded, el.log_likelihood(model, v, 3.0, method="importance").values)
    el.log_likelihood(model, v, 3.0, method="mean-field")
    assert_unchanged(model, before)
    assert model.dtype == torch.float32


# -- pseudo_log_likelihood --------------------------------------------------------------------


def enumerated_pseudo_log_likelihood(log_p: Tensor, n_visible: int) -> Tensor:
    """Exact enumeration (mathematics): sum_i log p(v) - log(p(v) + p(v with unit i flipped)).

    ``log_p`` is indexed by visible vector, unit 0 the most significant bit, so flipping unit i
    flips bit n_visible - 1 - i of the index.
    """
    rows = torch.arange(len(log_p))
    total = torch.zeros_like(log_p)
    for i in range(n_visible):
        flipped = log_p[rows ^ (1 << (n_visible - 1 - i))]
        total = total + log_p - torch.logaddexp(log_p, flipped)
    return total


@pytest.mark.parametrize("shape", CLOSED_FORM)
def test_pseudo_log_likelihood_matches_enumeration(shape):
    model = randomize(build(shape, sizes_of(shape)), seed=10)
    v, log_p, _ = exact_log_p(model)
    pll = el.pseudo_log_likelihood(model, v)
    assert pll.dtype == torch.float64 and not pll.requires_grad
    # exact enumeration (mathematics)
    assert_close(pll, enumerated_pseudo_log_likelihood(log_p, model.sizes[0]))
    # float32 parameters, computed in float64: only their rounding separates the two.
    assert_close(el.pseudo_log_likelihood(model.float(), v.float()), pll, rtol=1e-5, atol=1e-5)


def test_pseudo_log_likelihood_sees_the_lateral_half():
    model = randomize(build("semi_restricted", (4, 3)), seed=11)
    v, log_p, _ = exact_log_p(model)
    pll = el.pseudo_log_likelihood(model, v)
    assert_close(pll, enumerated_pseudo_log_likelihood(log_p, 4))  # exact enumeration (mathematics)
    # negative control: the enumeration of a lateral term without its 1/2 disagrees.
    _, doubled, _ = exact_log_p(model, lateral_factor=2.0)
    assert not close(pll, enumerated_pseudo_log_likelihood(doubled, 4))


def test_pseudo_log_likelihood_matches_scikit_learn_when_every_unit_is_alike():
    # Reference library: sklearn.neural_network.BernoulliRBM.score_samples, which returns n_0
    # times log p(v_i | v_-i) for one randomly chosen unit i, its fitted attributes set directly.
    # With identical visible units (equal biases, equal weight rows) and constant data every unit
    # gives the same conditional, so its value is the full sum whichever unit it picks.
    generator = torch.Generator().manual_seed(12)
    model = el.rbm(6, 4, dtype=torch.float64)
    row, hidden_bias = torch.randn(2, 4, generator=generator, dtype=torch.float64)
    with torch.no_grad():
        model.couplings[0].weight.copy_(row.expand(6, -1))
        model.layers[0].bias.fill_(-0.3)
        model.layers[1].bias.copy_(hidden_bias)
    v = torch.tensor([[0.0] * 6, [1.0] * 6], dtype=torch.float64)
    reference = BernoulliRBM(n_components=4, random_state=0)
    reference.components_ = model.couplings[0].weight.detach().numpy().T.copy()
    reference.intercept_hidden_ = model.layers[1].bias.detach().numpy().copy()
    reference.intercept_visible_ = model.layers[0].bias.detach().numpy().copy()
    pll = el.pseudo_log_likelihood(model, v).numpy()
    np.testing.assert_allclose(pll, reference.score_samples(v.numpy()), rtol=1e-12)
    # negative control: once the units differ, one scaled flip no longer equals the full sum.
    with torch.no_grad():
        model.layers[0].bias[0] = 2.0
    reference.intercept_visible_ = model.layers[0].bias.detach().numpy().copy()
    assert not np.allclose(el.pseudo_log_likelihood(model, v).numpy(), reference.score_samples(v.numpy()))


# -- reconstruction_error and free_energy_gap ------------------------------------------------


def test_reconstruction_error_of_an_rbm_is_the_two_step_formula():
    model = randomize(build("rbm", (5, 4)), seed=13)
    v = torch.rand(6, 5, generator=torch.Generator().manual_seed(0), dtype=torch.float64)  # means allowed
    weight, visible_bias, hidden_bias = (p.detach() for p in (model.couplings[0].weight, *model.biases()))
    # common practice, no source: hidden probabilities given v, then visible probabilities given them.
    hidden = torch.sigmoid(hidden_bias + v @ weight)
    expected = (v - torch.sigmoid(visible_bias + hidden @ weight.T)).square().sum(1)
    assert_close(el.reconstruction_error(model, v), expected)


def test_reconstruction_error_without_weights_is_distance_to_the_visible_rates():
    model = el.dbm(5, 4, 3, generator=torch.Generator().manual_seed(0))
    with torch.no_grad():
        for coupling in model.couplings:
            coupling.weight.zero_()
        model.layers[0].bias.copy_(torch.linspace(-2, 2, 5))
    v = torch.bernoulli(torch.full((4, 5), 0.5), generator=torch.Generator().manual_seed(1))
    error = el.reconstruction_error(model, v)
    assert error.dtype == torch.float32 and not error.requires_grad
    # Mathematics: without couplings the reconstruction is sigmoid(b_v) whatever the hidden layers do.
    expected = (v - torch.sigmoid(model.layers[0].bias.detach())).square().sum(1)
    torch.testing.assert_close(error, expected)


def test_free_energy_gap():
    model = randomize(build("semi_restricted", (4, 3)), seed=14)
    data = torch.bernoulli(
        torch.full((7, 4), 0.5, dtype=torch.float64), generator=torch.Generator().manual_seed(0)
    )
    assert el.free_energy_gap(model, data, data) == 0.0
    # Mathematics: with no couplings F(v) = -b.v - sum_j softplus(c_j), so F(0) - F(1) = sum_i b_i.
    plain = el.rbm(4, 3, dtype=torch.float64)
    with torch.no_grad():
        plain.couplings[0].weight.zero_()
        plain.layers[0].bias.copy_(torch.tensor([0.5, 1.0, -0.25, 2.0]))
    ones, zeros = torch.ones(3, 4, dtype=torch.float64), torch.zeros(2, 4, dtype=torch.float64)
    assert el.free_energy_gap(plain, ones, zeros) == pytest.approx(3.25, rel=1e-12)
    assert el.free_energy_gap(plain, zeros, ones) == pytest.approx(-3.25, rel=1e-12)


def test_mean_field_free_energy_gap_is_exact_on_an_rbm_and_a_bound_gap_on_a_chain():
    # Mathematics: an RBM's posterior over the hidden layer factorises, so the mean-field free
    # energy equals the exact one and the two gaps agree.
    rbm = randomize(build("rbm", (5, 4)), seed=15, scale=1.5)
    train, test = (
        torch.bernoulli(
            torch.full((9, 5), 0.4, dtype=torch.float64), generator=torch.Generator().manual_seed(s)
        )
        for s in (2, 3)
    )
    exact = el.free_energy_gap(rbm, train, test, method="exact")
    assert el.free_energy_gap(rbm, train, test, method="mean-field") == pytest.approx(exact, abs=1e-9)
    assert el.free_energy_gap(rbm, train, test) == exact
    # A chain has no closed form: "auto" gives the mean-field gap, which is the difference of the
    # mean-field bounds that log_likelihood reports (log Z cancels).
    chain = randomize(build("chain3", (5, 3, 2)), seed=16, scale=1.5)
    bounds = [el.log_likelihood(chain, x, 0.0, method="mean-field").mean for x in (train, test)]
    assert el.free_energy_gap(chain, train, test) == pytest.approx(bounds[0] - bounds[1], abs=1e-12)
    # Negative control: the exact free energies (brute-force enumeration) give a different gap here.
    exact_chain = [float(exact_log_marginal(chain, x).mean()) for x in (train, test)]
    assert abs((exact_chain[0] - exact_chain[1]) - (bounds[0] - bounds[1])) > 1e-3


# -- bad input --------------------------------------------------------------------------------

V = torch.ones(2, 6)
BINARY_V = torch.tensor([[0.0, 1.0, 1.0, 0.0, 1.0, 0.0]])

# (id, call on a chain model 6-4-3, exception type, fragment of the message)
BAD_CALLS = [
    ("model not a model", lambda m: el.log_likelihood(m.layers[0], V, 0.0), TypeError, "model must be"),
    ("unknown method", lambda m: el.log_likelihood(m, V, 0.0, method="bogus"), ValueError, "'bogus'"),
    (
        "exact free energy beyond max_states",
        lambda m: el.exact_free_energy(m, V, max_states=4),
        ValueError,
        "more than max_states=4",
    ),
    ("no samples", lambda m: el.log_likelihood(m, V, 0.0, num_samples=0), ValueError, "num_samples"),
    ("fractional samples", lambda m: el.log_likelihood(m, V, 0.0, num_samples=2.5), TypeError, "num_samples"),
    ("v wrong width", lambda m: el.log_likelihood(m, torch.ones(2, 5), 0.0), ValueError, "v must have 6"),
    ("v above 1", lambda m: el.log_likelihood(m, 2 * V, 0.0), ValueError, "v must lie in [0, 1]"),
    ("v float64", lambda m: el.log_likelihood(m, V.double(), 0.0), TypeError, "v has dtype"),
    ("log_z text", lambda m: el.log_likelihood(m, V, "1.0"), TypeError, "log_z must be a number"),
    ("log_z NaN", lambda m: el.log_likelihood(m, V, math.nan), ValueError, "log_z must be finite"),
    ("log_z vector", lambda m: el.log_likelihood(m, V, torch.zeros(2)), ValueError, "log_z must be a number"),
    (
        "estimate infinite",
        lambda m: el.log_likelihood(m, V, SimpleNamespace(log_z=math.inf)),
        ValueError,
        "log_z.log_z must be finite",
    ),
    (
        "generator not a generator",
        lambda m: el.log_likelihood(m, V, 0.0, method="importance", generator=0),
        TypeError,
        "generator",
    ),
    ("pll: v not binary", lambda m: el.pseudo_log_likelihood(m, 0.5 * V), ValueError, "v must be binary"),
    ("pll: without closed form", lambda m: el.pseudo_log_likelihood(m, BINARY_V), ValueError, "closed-form"),
    (
        "pll: v not a tensor",
        lambda m: el.pseudo_log_likelihood(m, [[0.0] * 6]),
        TypeError,
        "v must be a torch",
    ),
    (
        "reconstruction: v NaN",
        lambda m: el.reconstruction_error(m, torch.full((1, 6), math.nan)),
        ValueError,
        "v holds 6 non-finite",
    ),
    (
        "gap: train wrong width",
        lambda m: el.free_energy_gap(m, torch.ones(2, 5), V),
        ValueError,
        "train must",
    ),
    ("gap: test negative", lambda m: el.free_energy_gap(m, V, -V), ValueError, "test must lie"),
    (
        "gap: exact without closed form",
        lambda m: el.free_energy_gap(m, V, V, method="exact"),
        ValueError,
        "closed-form",
    ),
    ("gap: unknown method", lambda m: el.free_energy_gap(m, V, V, method="bound"), ValueError, "method must"),
]


@pytest.mark.parametrize(
    ("call", "error", "fragment"), [c[1:] for c in BAD_CALLS], ids=[c[0] for c in BAD_CALLS]
)
def test_bad_input_is_refused_and_changes_nothing(call, error, fragment):
    model = el.dbm(6, 4, 3, generator=torch.Generator().manual_seed(0))
    before = snapshot(model)
    with pytest.raises(error, match=re.escape(fragment)):
        call(model)
    assert_unchanged(model, before)
