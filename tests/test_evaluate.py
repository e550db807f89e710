"""evaluate(): the report agrees with the metrics it gathers and says what its numbers are.

Sources: the metric functions themselves (each checked against enumeration in test_metrics.py
and test_partition.py); exact enumeration (mathematics) through ``el.exact_log_partition``.
"""

from __future__ import annotations

import functools

import pytest
import torch

import ebm_layers as el
from tests import helpers
from tests.helpers import assert_unchanged, snapshot
from tests.reference import build, randomize

# The data of this file: every unit on with probability 0.4.
binary = functools.partial(helpers.binary, p=0.4)


def test_exact_report_of_a_small_rbm():
    model = randomize(build("rbm", (6, 3)), seed=0, scale=1.0)
    train, test = binary((40, 6), seed=1), binary((20, 6), seed=2)
    report = el.evaluate(
        model, train, test=test, num_betas=200, progress=False, generator=torch.Generator().manual_seed(3)
    )
    assert report.log_z_source == "exact (enumeration)" and report.estimate is None
    assert report.log_z == pytest.approx(float(el.exact_log_partition(model).detach()))
    exact_test = el.exact_log_likelihood(model, test).mean().item()
    assert report.test.log_likelihood == pytest.approx(exact_test)
    assert report.test.log_likelihood_label == "exact"
    assert report.test.importance_log_likelihood is None
    assert report.train.conservative_log_likelihood is None  # reverse annealing runs on the test set
    assert report.test.conservative_examples == 20
    assert abs(report.test.conservative_log_likelihood - exact_test) < 0.1  # measured: 0.01
    assert report.test.conservative_gap == pytest.approx(exact_test - report.test.conservative_log_likelihood)
    assert report.test.pseudo_log_likelihood == pytest.approx(
        float(el.pseudo_log_likelihood(model, test).mean())
    )
    assert report.test.reconstruction_error == pytest.approx(
        float(el.reconstruction_error(model, test).mean())
    )
    assert report.free_energy_gap == pytest.approx(el.free_energy_gap(model, train, test))
    table = str(report)
    for text in (
        "exact (enumeration)",
        "log-likelihood (1)",
        "reverse AIS (3)",
        "gap (1) - (3) on test",
    ):
        assert text in table


def test_report_with_an_ais_estimate_labels_it_and_warns_when_flagged():
    # A 2^22-state cover: too many to enumerate in evaluate(), so log Z comes from AIS.
    g = torch.Generator().manual_seed(0)
    model = el.rbm(24, 22, generator=g, dtype=torch.float64)
    with torch.no_grad():
        model.couplings[0].weight.normal_(0.0, 2.0, generator=g)
    data = binary((30, 24), seed=4)
    report = el.evaluate(model, data, num_chains=20, num_betas=2, reverse=False, progress=False, generator=g)
    assert report.log_z_source == "forward AIS" and report.estimate.flagged
    assert (
        report.train.log_likelihood_label
        == "estimate: exact free energy minus an AIS log Z, so high on average"
    )
    assert report.warnings == (report.estimate.warning,)
    assert "WARNING: the importance weights spread too widely" in str(report)
    assert report.test is None and report.free_energy_gap is None


def test_report_of_a_deep_chain_has_the_importance_estimate():
    # 2^13 hidden states per example: more than evaluate enumerates, so mean field and sampling.
    model = randomize(build("chain3", (5, 14, 13)), seed=5, scale=1.0)
    train, test = binary((30, 5), seed=6), binary((10, 5), seed=7)
    report = el.evaluate(
        model, train, test=test, num_betas=100, progress=False, generator=torch.Generator().manual_seed(8)
    )
    exact = el.exact_log_partition(model).item()
    assert report.log_z == pytest.approx(exact)
    assert report.test.log_likelihood_label == "lower bound (mean field)"
    # The importance estimate is above the mean-field bound here (measured: by 0.085).
    assert report.test.importance_log_likelihood > report.test.log_likelihood
    assert report.test.pseudo_log_likelihood is None and report.free_energy_gap is None
    assert (
        report.test.importance_label == "estimate (importance sampling, mean-field proposal): low on average"
    )
    assert "(2) estimate (importance sampling" in str(report)


def test_reverse_annealing_runs_on_a_bounded_subset_and_the_gap_on_the_same_examples():
    model = randomize(build("rbm", (6, 3)), seed=0, scale=1.0)
    train, test = binary((40, 6), seed=1), binary((30, 6), seed=2)
    g = torch.Generator().manual_seed(4)
    report = el.evaluate(
        model, train, test=test, num_betas=100, reverse_examples=7, progress=False, generator=g
    )
    assert report.test.conservative_examples == 7
    # The subset is the first draw of the generator after evaluate's own seeding: recompute it.
    subset = torch.randperm(30, generator=torch.Generator().manual_seed(4))[:7]
    exact_subset = el.exact_log_likelihood(model, test[subset]).mean().item()
    assert report.test.conservative_gap == pytest.approx(
        exact_subset - report.test.conservative_log_likelihood
    )
    assert "(3) on 7 test examples, reverse AIS: low on average" in str(report)


def test_given_log_z_is_used():
    model = randomize(build("rbm", (4, 2)), seed=9, scale=1.0)
    data = binary((10, 4), seed=10)
    report = el.evaluate(model, data, log_z=3.5, reverse=False, progress=False)
    assert report.log_z == 3.5 and report.log_z_source == "given"


@pytest.mark.parametrize(
    "options, error, message",
    [
        ({"data": binary((5, 3), seed=0)}, ValueError, "4 columns"),
        ({"data": binary((5, 4), seed=0), "test": binary((5, 4), seed=0) * float("nan")}, ValueError, "test"),
        ({"data": binary((5, 4), seed=0), "log_z": float("inf")}, ValueError, "log_z"),
        ({"data": "data"}, TypeError, "data"),
        ({"data": binary((5, 4), seed=0), "reverse_examples": 0}, ValueError, "reverse_examples"),
    ],
)
def test_bad_evaluate_arguments(options, error, message):
    model = randomize(build("rbm", (4, 2)), seed=9, scale=1.0)
    before = snapshot(model)
    with pytest.raises(error, match=message):
        el.evaluate(model, progress=False, **options)
    assert_unchanged(model, before)
