"""fit(): learning on real data, checkpoints that resume bit-identically and survive a crash,
callbacks, progress, and bad input.

Sources of the checks:

- scikit-learn's bundled 8x8 digits (``sklearn.datasets.load_digits``), binarised at >= 8, split
  with ``train_test_split(test_size=0.3, random_state=0, stratify=y)``; the base-rate model's
  log-likelihood is computed here with numpy from the smoothed pixel rates (mathematics), the
  RBM's exactly with ``el.exact_log_likelihood`` (checked against brute force in test_exact.py).
- Bit-identical resume: an uninterrupted run is the reference (common practice, no source).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time
import warnings
from pathlib import Path

import numpy as np
import pytest
import torch
from torch.utils.data import DataLoader, TensorDataset

import ebm_layers as el
from tests.helpers import assert_unchanged, snapshot


def base_rate_log_likelihood(train: np.ndarray, test: np.ndarray) -> float:
    """Mean log-likelihood of independent pixels with rates (count + 1) / (N + 2) (mathematics)."""
    rates = (train.sum(0) + 1.0) / (len(train) + 2.0)
    return float((test * np.log(rates) + (1 - test) * np.log1p(-rates)).sum(1).mean())


def test_fit_learns_the_digits(digits):
    train, test = digits
    base_rate = base_rate_log_likelihood(train.numpy().astype(np.float64), test.numpy().astype(np.float64))
    assert base_rate == pytest.approx(-25.1, abs=0.05)  # the reference figure
    g = torch.Generator().manual_seed(0)
    model = el.rbm(64, 16, generator=g)
    el.fit(model, train, epochs=10, progress=False, generator=g)
    with torch.no_grad():
        log_likelihood = float(el.exact_log_likelihood(model, test).mean())
    # Measured: -20.3 after 10 epochs with the defaults (about -18.1 after 100), 4.8 nats above
    # the base rate.
    assert log_likelihood > base_rate + 4.0


def interrupt_after(stop_after: int | None):
    """A callback that interrupts training (as Ctrl-C would) once epoch ``stop_after`` has ended."""

    def interrupt(state: el.FitState) -> None:
        if state.event == "epoch" and state.epoch + 1 == stop_after:
            raise KeyboardInterrupt

    return interrupt


def small_run(tmp_path: Path, *, epochs: int, stop_after: int | None = None, resume: bool = False):
    """fit a 12-6 RBM on random binary data with a checkpoint; raise after epoch ``stop_after``."""
    tmp_path.mkdir(exist_ok=True)
    g = torch.Generator().manual_seed(0)
    data = torch.bernoulli(torch.full((60, 12), 0.3), generator=torch.Generator().manual_seed(1))
    model = el.rbm(12, 6, generator=g)

    result = el.fit(
        model,
        data,
        epochs=epochs,
        batch_size=8,
        validation=data[:20],
        progress=False,
        generator=g,
        checkpoint=tmp_path / "run.pt",
        resume=tmp_path / "run.pt" if resume else None,
        callbacks=[interrupt_after(stop_after)],
    )
    return model, result


def assert_same_run(first, second) -> None:
    (_, result_a), (_, result_b) = first, second
    state_a, state_b = result_a.objective.state_dict(), result_b.objective.state_dict()
    assert state_a.keys() == state_b.keys()
    for name, value in state_a.items():
        assert torch.equal(value, state_b[name]), name
    drop = lambda history: [{k: v for k, v in r.items() if k != "seconds"} for r in history]  # noqa: E731
    assert drop(result_a.history) == drop(result_b.history)
    assert repr(result_a.optimizer.state_dict()) == repr(result_b.optimizer.state_dict())


def test_resume_after_an_interruption_is_bit_identical(tmp_path):
    uninterrupted = small_run(tmp_path / "a", epochs=4)
    with pytest.raises(KeyboardInterrupt):
        small_run(tmp_path / "b", epochs=4, stop_after=2)
    assert el.load_checkpoint(tmp_path / "b" / "run.pt")["epoch"] == 2
    resumed = small_run(tmp_path / "b", epochs=4, resume=True)
    assert [r["epoch"] for r in resumed[1].history] == [1, 2, 3, 4]
    assert_same_run(uninterrupted, resumed)
    # The particles and the parameters moved in the resumed epochs (the check is not vacuous).
    fresh = small_run(tmp_path / "c", epochs=2)
    assert not torch.equal(fresh[0].couplings[0].weight, resumed[0].couplings[0].weight)


@pytest.mark.filterwarnings("ignore:a fresh deep chain is trained from its random weights")
def test_resume_with_a_data_loader_and_data_particles(tmp_path):
    def run(folder: Path, stop_after=None, resume=False):
        folder.mkdir(exist_ok=True)
        g = torch.Generator().manual_seed(0)
        data = torch.bernoulli(torch.full((40, 10), 0.4), generator=torch.Generator().manual_seed(2))
        model = el.dbm(10, 6, 4, generator=g)
        objective = el.TwoPhaseObjective(
            model, el.DataParticles(model, 40, generator=g), el.PersistentSampler(model, 16, generator=g)
        )
        optimizer = torch.optim.SGD(model.parameters(), lr=0.05, momentum=0.9)
        scheduler = torch.optim.lr_scheduler.StepLR(optimizer, step_size=1, gamma=0.7)
        loader = DataLoader(
            TensorDataset(data, torch.arange(40)),
            batch_size=8,
            shuffle=True,
            generator=torch.Generator().manual_seed(3),
        )

        result = el.fit(
            model,
            loader,
            objective=objective,
            optimizer=optimizer,
            scheduler=scheduler,
            epochs=3,
            progress=False,
            checkpoint=folder / "run.pt",
            resume=folder / "run.pt" if resume else None,
            callbacks=[interrupt_after(stop_after)],
        )
        return model, result

    uninterrupted = run(tmp_path / "a")
    with pytest.raises(KeyboardInterrupt):
        run(tmp_path / "b", stop_after=1)
    assert_same_run(uninterrupted, run(tmp_path / "b", resume=True))


KILLED_WRITER = textwrap.dedent(
    """
    import sys, time, torch
    import ebm_layers as el
    from ebm_layers.training import fit as train

    path, ready = sys.argv[1], sys.argv[2]
    data = torch.bernoulli(torch.full((30, 8), 0.5), generator=torch.Generator().manual_seed(0))
    model = el.rbm(8, 4, generator=torch.Generator().manual_seed(0))
    el.fit(model, data, epochs=1, progress=False, checkpoint=path, generator=torch.Generator().manual_seed(0))

    def stall(obj, handle, *args, **kwargs):
        handle.write(b"half a checkpoint")
        handle.flush()
        open(ready, "w").close()
        time.sleep(120)

    train.torch.save = stall  # the next checkpoint hangs mid-write until the process is killed
    el.fit(model, data, epochs=2, progress=False, checkpoint=path, resume=path,
           generator=torch.Generator().manual_seed(0))
    """
)


def test_a_process_killed_while_writing_leaves_the_last_good_checkpoint(tmp_path):
    path, ready = tmp_path / "run.pt", tmp_path / "ready"
    script = tmp_path / "writer.py"
    script.write_text(KILLED_WRITER)
    process = subprocess.Popen([sys.executable, str(script), str(path), str(ready)])
    try:
        deadline = time.monotonic() + 60
        while not ready.exists():
            assert process.poll() is None, "the writer exited early"
            assert time.monotonic() < deadline, "the writer never reached the second checkpoint"
            time.sleep(0.05)
        os.kill(process.pid, signal.SIGKILL)
        process.wait(timeout=10)
    finally:
        if process.poll() is None:
            process.kill()
            process.wait()
    state = el.load_checkpoint(path)  # loads: the half-written file never replaced it
    assert state["epoch"] == 1
    assert any(p.name.endswith(".tmp") for p in tmp_path.iterdir())  # the torn write stayed aside


def test_a_failed_write_removes_its_temporary_file(tmp_path, monkeypatch):
    path = tmp_path / "state.pt"
    el.save_checkpoint({"format": "ebm_layers.fit/1", "epoch": 1}, path)

    def fail(obj, handle, *args, **kwargs):
        handle.write(b"partial")
        raise OSError("disk full")

    monkeypatch.setattr(torch, "save", fail)
    with pytest.raises(OSError, match="disk full"):
        el.save_checkpoint({"format": "ebm_layers.fit/1", "epoch": 2}, path)
    assert [p.name for p in tmp_path.iterdir()] == ["state.pt"]
    assert el.load_checkpoint(path)["epoch"] == 1


def test_callbacks_see_batches_and_epochs_and_can_stop():
    events = []

    def record(state: el.FitState) -> None:
        events.append((state.event, state.epoch, state.step))
        if state.event == "epoch" and state.epoch == 1:
            state.stop = True

    data = torch.bernoulli(torch.full((20, 6), 0.5), generator=torch.Generator().manual_seed(0))
    result = el.fit(el.rbm(6, 3), data, epochs=5, batch_size=10, callbacks=[record], progress=False)
    assert events == [
        ("batch", 0, 1),
        ("batch", 0, 2),
        ("epoch", 0, 2),
        ("batch", 1, 3),
        ("batch", 1, 4),
        ("epoch", 1, 4),
    ]
    assert len(result.history) == 2
    record = result.history[-1]
    rate = el.training.fit.SMALL_RBM_LEARNING_RATE  # fit's starting rate for a small RBM
    assert record["learning_rate"] == pytest.approx(rate * (1 - 1 / 5))  # linear decay over 5 epochs
    assert record["mean_field_iterations"] == 1 and record["free_energy_gap"] is None


def test_a_callback_can_stop_in_the_middle_of_an_epoch(tmp_path):
    steps = []

    def stop_at_third_batch(state: el.FitState) -> None:
        steps.append(state.step)
        state.stop = state.event == "batch" and state.step == 3

    data = torch.bernoulli(torch.full((20, 6), 0.5), generator=torch.Generator().manual_seed(0))
    path = tmp_path / "run.pt"
    result = el.fit(
        el.rbm(6, 3),
        data,
        epochs=5,
        batch_size=10,
        callbacks=[stop_at_third_batch],
        progress=False,
        checkpoint=path,
    )
    assert steps == [1, 2, 2, 3]  # batch, batch, epoch 1 end, then the stopping batch
    assert len(result.history) == 1 and el.load_checkpoint(path)["epoch"] == 1


def test_progress_bar_shows_epochs_and_gaps(capsys):
    data = torch.bernoulli(torch.full((20, 6), 0.5), generator=torch.Generator().manual_seed(0))
    el.fit(el.rbm(6, 3), data, epochs=2, batch_size=10, validation=data[:5], progress=True)
    shown = capsys.readouterr().err
    assert "epoch 2/2" in shown and "gap=" in shown and "held_out_dF=" in shown
    el.fit(el.rbm(6, 3), data, epochs=2, batch_size=10, progress=False)
    assert capsys.readouterr().err == ""


def test_fit_sets_a_fresh_models_visible_bias_only():
    data = torch.bernoulli(torch.full((20, 6), 0.8), generator=torch.Generator().manual_seed(0))
    model = el.rbm(6, 3)
    el.fit(model, data, epochs=0, progress=False)
    expected = torch.logit((data.sum(0) + 1) / (len(data) + 2))
    torch.testing.assert_close(model.layers[0].bias.detach(), expected)
    with torch.no_grad():
        model.layers[0].bias.fill_(0.25)
    el.fit(model, data, epochs=0, progress=False)
    assert bool((model.layers[0].bias == 0.25).all())


def _fit_cases():
    data = torch.bernoulli(torch.full((20, 6), 0.5), generator=torch.Generator().manual_seed(0))
    loader = DataLoader(TensorDataset(data), batch_size=5)
    other = el.rbm(6, 3)
    return [
        ({"data": data[:, :5]}, ValueError, "6 columns"),
        ({"data": data, "epochs": -1}, ValueError, "epochs"),
        ({"data": data, "batch_size": 0}, ValueError, "batch_size"),
        ({"data": loader, "batch_size": 5}, ValueError, "DataLoader"),
        ({"data": data, "validation": data[:, :3]}, ValueError, "validation"),
        ({"data": data, "callbacks": print}, TypeError, "callbacks"),
        ({"data": data, "callbacks": [1]}, TypeError, r"callbacks\[0\]"),
        ({"data": data, "objective": el.TwoPhaseObjective(other)}, ValueError, "another model"),
        ({"data": data, "optimizer": "adam"}, TypeError, "optimizer"),
        ({"data": data, "resume": "/nonexistent/run.pt"}, FileNotFoundError, "run.pt"),
    ]


@pytest.mark.parametrize("case", range(len(_fit_cases())))
def test_bad_fit_arguments_change_nothing(case):
    options, error, message = _fit_cases()[case]
    model = el.rbm(6, 3)
    before = snapshot(model)
    with pytest.raises(error, match=message):
        el.fit(model, progress=False, **options)
    assert_unchanged(model, before)


def test_resume_refuses_a_file_that_is_not_a_checkpoint(tmp_path):
    torch.save({"weights": torch.zeros(2)}, tmp_path / "other.pt")
    model = el.rbm(6, 3)
    before = snapshot(model)
    data = torch.bernoulli(torch.full((20, 6), 0.5), generator=torch.Generator().manual_seed(0))
    with pytest.raises(ValueError, match="not a checkpoint written by fit"):
        el.fit(model, data, resume=tmp_path / "other.pt", progress=False)
    assert_unchanged(model, before)


def test_fit_in_float64_with_data_particles_on_tensor_data():
    g = torch.Generator().manual_seed(0)
    data = torch.bernoulli(torch.full((30, 8), 0.4, dtype=torch.float64), generator=g)
    model = el.dbm(8, 5, 3, generator=g, dtype=torch.float64)
    particles = el.DataParticles(model, num_examples=30, generator=g)
    objective = el.TwoPhaseObjective(model, particles, el.PersistentSampler(model, 10, generator=g))
    stored = particles.states_1.clone()
    result = el.fit(model, data, objective=objective, epochs=2, batch_size=7, progress=False, generator=g)
    assert model.dtype == torch.float64 and objective.negative.particles[0].dtype == torch.float64
    assert not torch.equal(stored, particles.states_1)  # every example's chain was advanced
    assert [r["mean_field_iterations"] for r in result.history] == [None, None]
    with pytest.raises(ValueError, match="DataParticles hold 30 examples but data has 20"):
        el.fit(model, data[:20], objective=objective, epochs=1, progress=False)


def test_checkpointing_with_an_unseeded_shuffling_loader_warns(tmp_path):
    data = torch.bernoulli(torch.full((20, 6), 0.5), generator=torch.Generator().manual_seed(0))
    loader = DataLoader(TensorDataset(data), batch_size=5, shuffle=True)
    with pytest.warns(UserWarning, match="shuffles without a generator"):
        el.fit(el.rbm(6, 3), loader, epochs=1, checkpoint=tmp_path / "run.pt", progress=False)
    seeded = DataLoader(TensorDataset(data), batch_size=5, shuffle=True, generator=torch.Generator())
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        el.fit(el.rbm(6, 3), seeded, epochs=1, checkpoint=tmp_path / "run.pt", progress=False)


@pytest.mark.parametrize(
    ("aid", "kind"),
    [
        ("auto", el.ReplicaExchangeSampler),  # a small RBM: see the next test
        (None, el.PersistentSampler),
        ("fast-weights", el.FastWeightsSampler),
        ("replica-exchange", el.ReplicaExchangeSampler),
    ],
)
def test_fit_selects_a_mixing_aid(aid, kind):
    g = torch.Generator().manual_seed(0)
    data = torch.bernoulli(torch.full((30, 6), 0.3), generator=g)
    result = el.fit(el.rbm(6, 3, generator=g), data, epochs=1, mixing_aid=aid, progress=False, generator=g)
    assert type(result.objective.negative) is kind and len(result.history) == 1


@pytest.mark.parametrize(
    ("sizes", "small"),
    [((6, 3), True), ((32, 100), True), ((33, 16), False), ((16, 101), False), ((6, 5, 4), False)],
)
def test_fit_defaults_follow_the_size_of_the_model(sizes, small):
    # The small-RBM rule measured by benchmarks/defaults.py: 0.03 with replica exchange against one
    # hotter copy and 2 sweeps per batch; beyond it, plain chains at 0.01 (0.001 for a deep model).
    g = torch.Generator().manual_seed(0)
    model = el.rbm(*sizes, generator=g) if len(sizes) == 2 else el.dbm(*sizes, generator=g)
    data = torch.bernoulli(torch.full((20, sizes[0]), 0.3), generator=g)
    result = el.fit(model, data, epochs=1, progress=False, generator=g, pretrain_epochs=0)
    negative = result.objective.negative
    rate = result.history[0]["learning_rate"]
    if small:
        assert type(negative) is el.ReplicaExchangeSampler
        assert (negative.num_replicas, negative.sweeps, rate) == (2, 2, 0.03)
        expected = el.model.functional.base_rate_logits(data, pseudocount=1.0).float()
        torch.testing.assert_close(negative.base_bias, expected)  # towards the data's base rates
    else:
        assert type(negative) is el.PersistentSampler and negative.sweeps == 1
        assert rate == (0.001 if len(sizes) > 2 else 0.01)


def test_fit_refuses_an_unknown_mixing_aid_or_one_beside_an_objective():
    model = el.rbm(6, 3)
    before = snapshot(model)
    with pytest.raises(ValueError, match="mixing_aid must be one of"):
        el.fit(model, torch.ones(4, 6), epochs=1, mixing_aid="tempering", progress=False)
    with pytest.raises(ValueError, match="mixing_aid and negative choose the default objective"):
        el.fit(
            model,
            torch.ones(4, 6),
            epochs=1,
            objective=el.TwoPhaseObjective(model),
            mixing_aid="fast-weights",
        )
    assert_unchanged(model, before)


def _rates(result) -> list[float]:
    return [record["learning_rate"] for record in result.history]


def test_resume_with_more_epochs_goes_on_decaying_from_the_last_rate(tmp_path):
    # Before the fix the default decay kept its old end, and epochs 3-5 ran at rate 0.0.
    finished = small_run(tmp_path, epochs=2)
    trained = finished[0].couplings[0].weight.detach().clone()
    model, result = small_run(tmp_path, epochs=5, resume=True)
    rates = _rates(result)
    # Epoch 2 ran at r * (1 - 1/2); the rest decays linearly to zero at epoch 5 (mathematics).
    r = el.training.fit.SMALL_RBM_LEARNING_RATE  # fit's starting rate for the small RBM
    torch.testing.assert_close(rates, [r * k for k in (1, 1 / 2, 3 / 8, 2 / 8, 1 / 8)])
    assert not torch.equal(model.couplings[0].weight, trained)
    # Interrupted at 2 of 4 and resumed with 6: the same rule from epoch 2's rate r * 3/4.
    with pytest.raises(KeyboardInterrupt):
        small_run(tmp_path / "b", epochs=4, stop_after=2)
    _, result = small_run(tmp_path / "b", epochs=6, resume=True)
    torch.testing.assert_close(_rates(result)[2:], [r * 3 / 4 * k / 5 for k in (4, 3, 2, 1)])


def test_a_scheduler_that_ends_before_the_last_epoch_warns():
    data = torch.bernoulli(torch.full((20, 6), 0.5), generator=torch.Generator().manual_seed(0))
    model = el.rbm(6, 3)
    optimizer = torch.optim.Adam(model.parameters(), lr=0.01)
    scheduler = torch.optim.lr_scheduler.LinearLR(optimizer, 1.0, 0.0, total_iters=2)
    with pytest.warns(UserWarning, match="learning rate is 0 at epoch 3 of 4"):
        el.fit(model, data, epochs=4, optimizer=optimizer, scheduler=scheduler, progress=False)
    with warnings.catch_warnings():  # negative control: a schedule that spans the run is silent
        warnings.simplefilter("error")
        optimizer, scheduler = el.default_optimizer(model, 4)
        el.fit(model, data, epochs=4, optimizer=optimizer, scheduler=scheduler, progress=False)


def test_pretraining_never_overwrites_a_trained_model_and_shows_as_its_own_stage(capsys):
    data = torch.bernoulli(torch.full((40, 6), 0.4), generator=torch.Generator().manual_seed(0))
    trained = el.dbm(6, 4, 3, generator=torch.Generator().manual_seed(1))
    with torch.no_grad():  # trained weights, visible biases still zero (the case fit used to re-pretrain)
        for coupling in trained.couplings:
            coupling.weight.normal_(0.0, 1.0, generator=torch.Generator().manual_seed(2))
    loaded = el.dbm(6, 4, 3)
    loaded.load_state_dict(trained.state_dict())
    assert not loaded.untrained() and not bool(loaded.layers[0].bias.any())
    result = el.fit(loaded, data, epochs=0, progress=False)
    assert result.pretraining == []
    assert all(torch.equal(a, b) for a, b in zip(loaded.state_dict().values(), trained.state_dict().values()))
    # Negative control: an untrained chain (a dtype round trip keeps it so) is pretrained, and the
    # progress output and the history show the stages.
    fresh = el.dbm(6, 4, 3, generator=torch.Generator().manual_seed(3)).double().float()
    assert fresh.untrained()
    result = el.fit(fresh, data, epochs=1, pretrain_epochs=1, batch_size=10, progress=True)
    assert not fresh.untrained()
    assert [h[0]["stage"] for h in result.pretraining] == ["pretraining RBM 1/2", "pretraining RBM 2/2"]
    assert result.history[0]["stage"] == "training"
    shown = capsys.readouterr().err
    assert "pretraining RBM 1/2: epoch 1/1" in shown and "training: epoch 1/1" in shown


def test_calling_a_model_gives_its_free_energy_or_the_energy_of_states():
    model = el.rbm(6, 4, generator=torch.Generator().manual_seed(0))
    v = torch.bernoulli(torch.full((5, 6), 0.5), generator=torch.Generator().manual_seed(1))
    h = torch.bernoulli(torch.full((5, 4), 0.5), generator=torch.Generator().manual_seed(2))
    assert torch.equal(model(v), model.free_energy(v))
    assert torch.equal(model([v, h]), model.energy([v, h]))
    model(v).sum().backward()  # differentiable, like any module's output
    assert model.couplings[0].weight.grad is not None
    with pytest.raises(ValueError, match="no closed-form free energy"):
        el.dbm(6, 4, 3)(v)
