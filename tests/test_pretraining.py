"""Greedy layer-wise pretraining: tied copies, composition, and every layer in use afterwards.

Sources of the checks: the recipe of "Deep Boltzmann Machines" (AISTATS 2009) and "An Efficient
Learning Procedure for Deep Boltzmann Machines" (Neural Computation, 2012) for what is composed
how; the conditionals of an RBM with two tied copies of a layer written out by hand
(mathematics); "layers in use" as the spread of the hidden marginals across examples (common
practice, no source).
"""

from __future__ import annotations

import pytest
import torch
from torch.utils.data import DataLoader, TensorDataset

import ebm_layers as el
from ebm_layers.model import functional as F
from ebm_layers.training import pretraining
from ebm_layers.training.pretraining import DEFAULT_PRETRAIN_EPOCHS
from ebm_layers.training.pretraining import _free as free
from tests.helpers import assert_unchanged, binarised_digits, snapshot


def random_data(rows: int, columns: int, seed: int) -> torch.Tensor:
    generator = torch.Generator().manual_seed(seed)
    return torch.bernoulli(torch.full((rows, columns), 0.3), generator=generator)


@pytest.fixture(scope="module")
def pretrained():
    g = torch.Generator().manual_seed(0)
    model = el.dbm(6, 5, 4, 3, generator=g)
    data = random_data(40, 6, seed=1)
    results = el.pretrain(model, data, epochs=2, batch_size=8, progress=False, generator=g)
    return model, data, [r.objective.model for r in results]


def test_the_first_and_last_rbms_have_tied_copies(pretrained):
    _, data, stages = pretrained
    assert [s.sizes for s in stages] == [(12, 5), (5, 4), (4, 6)]
    first, _, top = stages
    w = first.couplings[0].weight.detach()
    assert torch.equal(w[:6], w[6:]) and torch.equal(*first.layers[0].bias.detach().chunk(2))
    w = top.couplings[0].weight.detach()
    assert torch.equal(w[:, :3], w[:, 3:]) and torch.equal(*top.layers[1].bias.detach().chunk(2))
    # Two identical copies of v each send v W: the first RBM's hidden units get 2 v W + c.
    single = free(first.couplings[0], "weight")
    with torch.no_grad():
        posterior = el.MeanField(first)(data.repeat(1, 2))[1]
    torch.testing.assert_close(posterior, torch.sigmoid(2 * data @ single + first.layers[1].bias.detach()))


def test_the_chain_is_composed_from_the_rbms(pretrained):
    model, _, (first, middle, top) = pretrained
    weights = [c.weight.detach() for c in model.couplings]
    torch.testing.assert_close(weights[0], free(first.couplings[0], "weight"))
    torch.testing.assert_close(weights[1], 0.5 * middle.couplings[0].weight.detach())  # halved in between
    torch.testing.assert_close(weights[2], free(top.couplings[0], "weight"))
    biases = [layer.bias.detach() for layer in model.layers]
    torch.testing.assert_close(biases[0], free(first.layers[0], "bias"))
    inner = [
        (first.layers[1].bias.detach() + middle.layers[0].bias.detach()) / 2,
        (middle.layers[1].bias.detach() + free(top.layers[0], "bias")) / 2,
    ]
    torch.testing.assert_close(biases[1], inner[0])
    torch.testing.assert_close(biases[2], inner[1])
    torch.testing.assert_close(biases[3], free(top.layers[1], "bias"))


def test_each_rbm_learns_from_the_marginals_of_the_one_below():
    # With no training pass, each RBM's visible biases are the base-rate log-odds of its input:
    # the data, then the doubled-input posterior of the first RBM.
    g = torch.Generator().manual_seed(0)
    model = el.dbm(6, 5, 4, generator=g)
    data = random_data(40, 6, seed=1)
    results = el.pretrain(model, data, epochs=0, progress=False, generator=g)
    first, second = [r.objective.model for r in results]
    torch.testing.assert_close(free(first.layers[0], "bias"), F.base_rate_logits(data, 1.0).float())
    hidden = torch.sigmoid(2 * data @ free(first.couplings[0], "weight") + first.layers[1].bias.detach())
    torch.testing.assert_close(second.layers[0].bias.detach(), F.base_rate_logits(hidden, 1.0).float())


@pytest.fixture(scope="module")
def first_digits() -> torch.Tensor:
    """The first 600 binarised digits (the conftest fixture ``digits`` is the train/test split)."""
    x, _ = binarised_digits()
    return torch.from_numpy(x[:600])


def units_in_use(model: el.EnergyModel, data: torch.Tensor) -> list[float]:
    """Per hidden layer, the share of units whose mean-field marginal varies across examples."""
    with torch.no_grad():
        marginals = el.MeanField(model, init="bottom-up")(data)
    return [float((mu.std(0) > 0.1).float().mean()) for mu in marginals[1:]]


@pytest.mark.slow
def test_pretraining_leaves_every_layer_in_use(first_digits):
    def trained(**options) -> el.EnergyModel:
        g = torch.Generator().manual_seed(0)
        model = el.dbm(64, 40, 20, generator=g)
        el.fit(model, first_digits, progress=False, generator=g, **options)
        return model

    # Measured: 0.82 and 1.0 of the units vary (marginal std > 0.1 across examples).
    used = units_in_use(trained(epochs=0, pretrain_epochs=10), first_digits)
    assert min(used) >= 0.75, used
    # Negative controls: the small initial weights leave every marginal near constant, and as many
    # passes of joint training from them leave the top layer unused (measured: 0.0).
    untrained = el.dbm(64, 40, 20, generator=torch.Generator().manual_seed(0))
    assert max(units_in_use(untrained, first_digits)) == 0
    naive = units_in_use(trained(epochs=10, pretrain_epochs=0), first_digits)
    assert naive[-1] < 0.75, naive


# ---------------------------------------------------------------------------------------------
# fit pretrains fresh deep chains by default.


def test_fit_pretrains_a_fresh_deep_chain_by_default():
    g = torch.Generator().manual_seed(0)
    data = random_data(30, 6, seed=1)
    result = el.fit(el.dbm(6, 5, 4, generator=g), data, epochs=1, batch_size=10, progress=False, generator=g)
    assert [len(h) for h in result.pretraining] == [DEFAULT_PRETRAIN_EPOCHS] * 2
    assert len(result.history) == 1
    assert el.fit(el.rbm(6, 5), data, epochs=1, progress=False).pretraining == []
    off = el.fit(el.dbm(6, 5, 4), data, epochs=1, progress=False, pretrain_epochs=0)
    assert off.pretraining == []
    trained = result.objective.model  # not fresh any more: no pretraining unless asked
    assert el.fit(trained, data, epochs=1, progress=False).pretraining == []
    asked = el.fit(trained, data, epochs=1, progress=False, pretrain_epochs=2)
    assert [len(h) for h in asked.pretraining] == [2, 2]


def test_each_rbm_trains_at_the_learning_rate_asked_for():
    data = random_data(30, 6, seed=1)
    results = el.pretrain(el.dbm(6, 5, 4, 3), data, epochs=4, learning_rate=0.003, progress=False)
    for result in results:  # every RBM: Adam starting at 0.003, decayed linearly over the 4 epochs
        assert isinstance(result.optimizer, torch.optim.Adam)
        rates = [record["learning_rate"] for record in result.history]
        assert rates == pytest.approx([0.003, 0.00225, 0.0015, 0.00075])
    default = el.pretrain(el.dbm(6, 5, 4), data, epochs=1, progress=False)  # negative control
    # fit's own rate for the first RBM, 12-5 with its tied copies: a small RBM
    assert default[0].history[0]["learning_rate"] == pytest.approx(el.training.fit.SMALL_RBM_LEARNING_RATE)


def test_fit_warns_that_a_data_loader_skips_pretraining():
    data = random_data(20, 6, seed=1)
    loader = DataLoader(TensorDataset(data), batch_size=5)
    with pytest.warns(UserWarning, match="greedy pretraining needs tensor data"):
        result = el.fit(el.dbm(6, 5, 4), loader, epochs=1, progress=False)
    assert result.pretraining == []


def test_fit_with_pretraining_is_reproducible_and_resumes_without_pretraining_again(tmp_path):
    def run(epochs, resume=False, checkpoint=None, stop_after=None):
        def interrupt(state):  # as Ctrl-C would, once epoch ``stop_after`` has ended
            if state.event == "epoch" and state.epoch + 1 == stop_after:
                raise KeyboardInterrupt

        g = torch.Generator().manual_seed(3)
        model = el.dbm(6, 5, 4, generator=g)
        result = el.fit(
            model,
            random_data(30, 6, seed=1),
            epochs=epochs,
            batch_size=10,
            pretrain_epochs=3,
            progress=False,
            generator=g,
            checkpoint=checkpoint,
            resume=checkpoint if resume else None,
            callbacks=[interrupt],
        )
        return model, result

    a, result_a = run(2)
    b, _ = run(2)
    assert all(torch.equal(x, y) for x, y in zip(a.state_dict().values(), b.state_dict().values()))
    with pytest.raises(KeyboardInterrupt):
        run(2, checkpoint=tmp_path / "run.pt", stop_after=1)
    resumed, result = run(2, resume=True, checkpoint=tmp_path / "run.pt")
    assert [len(h) for h in result.pretraining] == [3, 3]  # restored from the checkpoint, not re-run
    assert all(torch.equal(x, y) for x, y in zip(a.state_dict().values(), resumed.state_dict().values()))
    assert result.history[-1]["statistics_gap"] == result_a.history[-1]["statistics_gap"]


def _bad_cases():
    data = random_data(20, 6, seed=1)
    lateral = el.EnergyModel(
        [el.BinaryLayer(6), el.BinaryLayer(3), el.BinaryLayer(2)],
        [el.DenseCoupling(0, 1, 6, 3), el.DenseCoupling(1, 2, 3, 2), el.LateralCoupling(2, 2)],
    )
    loader = DataLoader(TensorDataset(data), batch_size=5)
    return [
        (lambda m: el.pretrain(lateral, data, progress=False), ValueError, "chain"),
        (lambda m: el.pretrain(m, data[:, :5], progress=False), ValueError, "data"),
        (lambda m: el.pretrain(m, data, epochs=-1, progress=False), ValueError, "epochs"),
        (lambda m: el.pretrain(m, data, learning_rate=0.0, progress=False), ValueError, "learning_rate"),
        (lambda m: el.pretrain(m, data, learning_rate="fast", progress=False), TypeError, "learning_rate"),
        (
            lambda m: el.pretrain(m, data, learning_rate=float("nan"), progress=False),
            ValueError,
            "learning_rate",
        ),
        (lambda m: el.pretrain("model", data), TypeError, "model must be"),
        (lambda m: el.fit(m, data, pretrain_epochs=-2, progress=False), ValueError, "pretrain_epochs"),
        (lambda m: el.fit(m, data, pretrain_epochs=1.5, progress=False), TypeError, "pretrain_epochs"),
        (lambda m: el.fit(el.rbm(6, 3), data, pretrain_epochs=2, progress=False), ValueError, "three layers"),
        (lambda m: el.fit(m, loader, pretrain_epochs=2, progress=False), ValueError, "tensor data"),
    ]


@pytest.mark.parametrize("case", range(len(_bad_cases())))
def test_bad_pretraining_arguments_change_nothing(case):
    model = el.dbm(6, 4, 2, generator=torch.Generator().manual_seed(0))
    call, error, message = _bad_cases()[case]
    before = snapshot(model)
    with pytest.raises(error, match=message):
        call(model)
    assert_unchanged(model, before)


@pytest.mark.slow
def test_pretrained_features_beat_raw_pixels(digits):
    # A CI-sized version of benchmarks/digits_features.py: one chain trained by fit's defaults on the
    # training images of its first split (no labels), except 10 joint epochs instead of 100 after
    # the default pretraining, then 5-fold cross-validated logistic regression
    # (scikit-learn) over all 1797 images of the bundled 8x8 digits, on the frozen mean-field
    # features against the raw pixels. Cross-validating over every image measures the features with
    # less noise than one split's 540 test images, whose accuracy moves by a point with rounding.
    from sklearn.linear_model import LogisticRegression
    from sklearn.model_selection import StratifiedKFold, cross_val_score

    x, y = binarised_digits()
    train, _ = digits
    g = torch.Generator().manual_seed(0)
    model = el.dbm(64, 100, 50, generator=g)
    el.fit(model, train, epochs=10, progress=False, generator=g)
    with torch.no_grad():
        features = el.FeatureExtractor(model)(torch.from_numpy(x)).numpy()
    folds = StratifiedKFold(5, shuffle=True, random_state=0)

    def accuracy(inputs) -> float:
        return cross_val_score(LogisticRegression(max_iter=5000), inputs, y, cv=folds).mean()

    raw, learned = accuracy(x), accuracy(features)
    # Measured: raw 92.4%, features 93.3% (seeds 0-2: 93.1% to 93.5%; 100 joint epochs: 93.5% to
    # 94.2%; 10 pretraining epochs per RBM instead of 30: 91.3% to 91.8%, below the raw pixels).
    assert learned >= raw + 0.005, (learned, raw)


@pytest.mark.parametrize("copies, dim", [(2, 0), (2, 1), (3, 1)])
def test_tied_copies_pull_statistics_back_as_autograd_does(copies, dim):
    # Source: mathematics (the adjoint of a linear map), checked against torch.autograd.grad.
    tie = pretraining._TiedCopies(copies, dim)
    g = torch.Generator().manual_seed(0)
    free_tensor = torch.randn(4, 3, generator=g, dtype=torch.float64, requires_grad=True)
    statistic = torch.randn(tie(free_tensor).shape, generator=g, dtype=torch.float64)
    (expected,) = torch.autograd.grad(tie(free_tensor), free_tensor, statistic)
    torch.testing.assert_close(tie.pull_back(statistic), expected)
    # Negative control: keeping the first copy's share only is not the adjoint.
    assert not torch.allclose(statistic.chunk(copies, dim=dim)[0], expected)


@pytest.mark.parametrize("visible_copies, hidden_copies", [(2, 1), (1, 2)])
def test_a_tied_stage_has_the_same_statistics_with_and_without_the_shortcut(
    monkeypatch, visible_copies, hidden_copies
):
    # The pull_back shortcut against the generic autograd path of EnergyModel.statistics.
    g = torch.Generator().manual_seed(1)
    stage = el.rbm(5 * visible_copies, 3 * hidden_copies, generator=g, dtype=torch.float64)
    pretraining._tie(stage, visible_copies, hidden_copies)
    states = [torch.rand(7, n, generator=g, dtype=torch.float64) for n in stage.sizes]
    short = stage.statistics(states)
    monkeypatch.delattr(pretraining._TiedCopies, "pull_back")
    generic = stage.statistics(states)
    assert short.keys() == generic.keys() == {name for name, _ in stage.named_parameters()}
    for name in short:
        torch.testing.assert_close(short[name], generic[name])
