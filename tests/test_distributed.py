"""Data-parallel training over torch.distributed (gloo, two processes on this machine).

Sources of the checks:

- equivalence: with equal shards, the average of the ranks' gradients is the gradient of one
  process given both shards and both particle sets, since every statistic is a mean (mathematics);
  the one-process reference here recomputes the data phase itself and takes the particles the
  ranks drew;
- resume: bit-identical continuation (common practice, no source);
- failure: a rank that raises must stop the run with its error (common practice, no source).

Every group of processes runs under a deadline and is terminated when it passes it.
"""

from __future__ import annotations

import contextlib
import datetime
import io
import os
import runpy
import time
from pathlib import Path

import pytest
import torch
import torch.distributed as dist
import torch.multiprocessing as mp

import ebm_layers as el
from ebm_layers.model.statistics import Statistics
from tests.helpers import assert_unchanged, forkserver, snapshot

pytestmark = pytest.mark.skipif(not dist.is_available(), reason="this torch build has no torch.distributed")

WORLD = 2
DEADLINE = 90.0  # seconds for one group of processes, start-up included


def run_ranks(worker, *args, deadline: float = DEADLINE) -> None:
    """Run ``worker(rank, *args)`` on ``WORLD`` new processes; terminate them past the deadline.

    The processes come from the fork server of tests/helpers.py, which has imported torch and the
    library once: fresh processes, as spawned ones, without the imports' start-up time each.
    """
    forkserver()  # the server's preload list, set before it starts
    context = mp.start_processes(worker, args=args, nprocs=WORLD, join=False, start_method="forkserver")
    ends = time.monotonic() + deadline
    try:
        while not context.join(timeout=max(0.1, ends - time.monotonic())):
            if time.monotonic() > ends:
                raise TimeoutError(f"the distributed run did not finish within {deadline} s")
    finally:
        for process in context.processes:
            if process.is_alive():
                process.terminate()
                process.join(5)


def join_group(rank: int, folder: str) -> None:
    torch.set_num_threads(1)
    dist.init_process_group(
        "gloo",
        init_method=f"file://{folder}/rendezvous",
        rank=rank,
        world_size=WORLD,
        timeout=datetime.timedelta(seconds=60),
    )


# -- the averaged gradient is the gradient of one process with both shards ------------------------

STEPS, SHARD = 5, 4


def equivalence_setup() -> tuple[el.EnergyModel, torch.Tensor]:
    model = el.dbm(6, 4, 3, generator=torch.Generator().manual_seed(0), dtype=torch.float64)
    with torch.no_grad():
        for coupling in model.couplings:
            coupling.weight.mul_(8.0)  # far from independence, so the mean field iterates
    data = torch.bernoulli(torch.full((STEPS * WORLD * SHARD, 6), 0.4, dtype=torch.float64),
                           generator=torch.Generator().manual_seed(1))  # fmt: skip
    return model, data


def make_objective(model: el.EnergyModel, sampler: el.PersistentSampler) -> el.TwoPhaseObjective:
    # Centering on: its offsets are running buffers that must follow all ranks' statistics.
    mean_field = el.MeanField(model, tol=1e-13, max_iter=2000)
    return el.TwoPhaseObjective(model, mean_field, sampler, centering=True, offset_decay=0.9)


def equivalence_worker(rank: int, folder: str) -> None:
    join_group(rank, folder)
    model, data = equivalence_setup()
    sampler = el.PersistentSampler(model, num_particles=3, generator=el.rank_generator(7))
    objective = make_objective(model, sampler)
    wrapped = el.wrap_distributed(objective)
    optimizer = torch.optim.SGD(model.parameters(), lr=0.05, momentum=0.5)
    record = []
    for step in range(STEPS):
        start = (step * WORLD + rank) * SHARD
        loss = wrapped(data[start : start + SHARD])
        optimizer.zero_grad()
        loss.backward()
        particles = [x.clone() for x in sampler.particles]
        gradients = [p.grad.clone() for p in model.parameters()]
        optimizer.step()
        parameters = [p.detach().clone() for p in model.parameters()]
        record.append((particles, gradients, parameters, [c.clone() for c in objective.offsets]))
    torch.save(record, Path(folder) / f"rank{rank}.pt")
    dist.destroy_process_group()


def reference_step(objective, sampler, shards: torch.Tensor, particles: list[torch.Tensor]) -> None:
    """One process: the data phase on ``shards``, the model phase from the given ``particles``."""
    sampler.statistics = lambda v=None, **kwargs: objective.model.statistics(particles)
    objective(shards).backward()


@pytest.mark.slow
def test_distributed_gradient_and_parameters_equal_one_process_with_both_shards(tmp_path):
    run_ranks(equivalence_worker, str(tmp_path))
    ranks = [torch.load(tmp_path / f"rank{r}.pt", weights_only=True) for r in range(WORLD)]
    model, data = equivalence_setup()
    sampler = el.PersistentSampler(model, num_particles=WORLD * 3, generator=torch.Generator().manual_seed(9))
    objective = make_objective(model, sampler)
    optimizer = torch.optim.SGD(model.parameters(), lr=0.05, momentum=0.5)
    for step in range(STEPS):
        shards = data[step * WORLD * SHARD : (step + 1) * WORLD * SHARD]
        particles = [torch.cat(layer) for layer in zip(*(r[step][0] for r in ranks))]
        optimizer.zero_grad()
        reference_step(objective, sampler, shards, particles)
        for r in ranks:
            _, gradients, _, _ = r[step]
            for ours, theirs in zip(gradients, (p.grad for p in model.parameters())):
                torch.testing.assert_close(ours, theirs, rtol=0, atol=1e-12)
        optimizer.step()
        for r in ranks:
            _, _, parameters, offsets = r[step]
            for ours, theirs in zip(parameters, model.parameters()):
                torch.testing.assert_close(ours, theirs.detach(), rtol=0, atol=1e-12)
            for ours, theirs in zip(offsets, objective.offsets):
                torch.testing.assert_close(ours, theirs, rtol=0, atol=1e-12)
    # The ranks drew their own particles: no broadcast made them equal.
    assert not torch.equal(ranks[0][-1][0][0], ranks[1][-1][0][0])
    # Negative control: one rank's shard and particles alone give another gradient.
    model, data = equivalence_setup()
    sampler = el.PersistentSampler(model, num_particles=3, generator=torch.Generator().manual_seed(9))
    alone = make_objective(model, sampler)
    reference_step(alone, sampler, data[:SHARD], ranks[0][0][0])
    difference = max(float((p.grad - g).abs().max()) for p, g in zip(model.parameters(), ranks[0][0][1]))
    assert difference > 1e-3


def labelled_setup() -> tuple[el.EnergyModel, tuple[torch.Tensor, torch.Tensor]]:
    """A Gaussian scan layer and a label layer, both observed, joined through one hidden layer."""
    model = el.EnergyModel(
        [el.GaussianLayer(5, learn_std=True), el.BinaryLayer(4), el.CategoricalLayer(1, 3)],
        [el.DenseCoupling(0, 1, 5, 4), el.DenseCoupling(1, 2, 4, 3)],
        observed=(0, 2),
    ).double()
    model.reset_parameters(torch.Generator().manual_seed(2))
    g = torch.Generator().manual_seed(3)
    data = torch.randn(STEPS * WORLD * SHARD, 5, dtype=torch.float64, generator=g)
    labels = torch.randint(0, 3, (len(data),), generator=g)
    return model, (data, labels)


def labelled_objective(model: el.EnergyModel, sampler: el.PersistentSampler) -> el.TwoPhaseObjective:
    # The hybrid objective: the discriminative term's gradient is averaged over the ranks too.
    return el.TwoPhaseObjective(
        model, el.MeanField(model), sampler, discriminative_layer=2, discriminative_weight=2.0
    )


def labelled_worker(rank: int, folder: str) -> None:
    join_group(rank, folder)
    model, (data, labels) = labelled_setup()
    sampler = el.PersistentSampler(model, num_particles=3, generator=el.rank_generator(7))
    wrapped = el.wrap_distributed(labelled_objective(model, sampler))
    optimizer = torch.optim.SGD(model.parameters(), lr=0.05)
    record = []
    for step in range(2):
        start = (step * WORLD + rank) * SHARD
        loss = wrapped((data[start : start + SHARD], labels[start : start + SHARD]))
        optimizer.zero_grad()
        loss.backward()
        record.append(([x.clone() for x in sampler.particles], [p.grad.clone() for p in model.parameters()]))
        optimizer.step()
    torch.save(record, Path(folder) / f"rank{rank}.pt")
    dist.destroy_process_group()


@pytest.mark.slow
def test_distributed_observations_of_two_layers_and_the_hybrid_term_average_like_one_process(tmp_path):
    run_ranks(labelled_worker, str(tmp_path))
    ranks = [torch.load(tmp_path / f"rank{r}.pt", weights_only=True) for r in range(WORLD)]
    model, (data, labels) = labelled_setup()
    sampler = el.PersistentSampler(model, num_particles=WORLD * 3, generator=torch.Generator().manual_seed(9))
    objective = labelled_objective(model, sampler)
    optimizer = torch.optim.SGD(model.parameters(), lr=0.05)
    for step in range(2):
        rows = slice(step * WORLD * SHARD, (step + 1) * WORLD * SHARD)
        particles = [torch.cat(layer) for layer in zip(*(r[step][0] for r in ranks))]
        optimizer.zero_grad()
        reference_step(objective, sampler, (data[rows], labels[rows]), particles)
        for r in ranks:
            for ours, theirs in zip(r[step][1], (p.grad for p in model.parameters())):
                torch.testing.assert_close(ours, theirs, rtol=0, atol=1e-12)
        optimizer.step()


# -- fit(distributed=True): rank-local particles, bit-identical resume ---------------------------


AIDS = (None, "fast-weights", "replica-exchange")


def fit_worker(rank: int, folder: str) -> None:
    """For every mixing aid, in its own subfolder: a whole run, a run stopped after epoch 2, and
    that run resumed. One group of processes serves all the aids (one start-up, not three)."""
    join_group(rank, folder)
    data = torch.bernoulli(torch.full((120, 10), 0.3), generator=torch.Generator().manual_seed(3))

    def train(out: Path, aid, checkpoint: str, resume: str | None = None, stop_after: int | None = None):
        def interrupt(state: el.FitState) -> None:  # as if the run had been killed after an epoch
            state.stop = state.event == "epoch" and state.epoch + 1 == stop_after

        model = el.rbm(10, 6, generator=torch.Generator().manual_seed(4))
        return el.fit(
            model,
            data,
            epochs=3,
            batch_size=10,
            progress=False,
            checkpoint=out / checkpoint,
            resume=resume,
            callbacks=[interrupt],
            distributed=True,
            mixing_aid=aid,
            generator=torch.Generator().manual_seed(5),
        )

    for aid in AIDS:
        out = Path(folder) / str(aid)
        out.mkdir(exist_ok=True)
        for tag, result in (
            ("whole", train(out, aid, "whole.pt")),
            ("part", train(out, aid, "part.pt", stop_after=2)),
            ("resumed", train(out, aid, "resumed.pt", resume=str(out / "part.pt"))),
        ):
            state = {k: v.clone() for k, v in result.objective.state_dict().items()}
            torch.save(state, out / f"{tag}{rank}.pt")
    dist.destroy_process_group()


@pytest.fixture(scope="module")
def fitted_ranks(tmp_path_factory) -> Path:
    """The folder of ``fit_worker``'s runs on two ranks, one subfolder per mixing aid."""
    folder = tmp_path_factory.mktemp("fit")
    run_ranks(fit_worker, str(folder), deadline=len(AIDS) * DEADLINE)  # one group, three aids' runs
    return folder


@pytest.mark.parametrize("aid", AIDS)
def test_distributed_fit_keeps_rank_particles_and_resumes_each_rank_bit_identically(fitted_ranks, aid):
    folder = fitted_ranks / str(aid)
    load = lambda name: torch.load(folder / name, weights_only=True)  # noqa: E731
    for rank in range(WORLD):
        whole, resumed = load(f"whole{rank}.pt"), load(f"resumed{rank}.pt")
        assert whole.keys() == resumed.keys()
        for key in whole:
            assert torch.equal(whole[key], resumed[key]), (rank, key)
    first, second = load("whole0.pt"), load("whole1.pt")
    assert torch.equal(first["model.couplings.0.weight"], second["model.couplings.0.weight"])
    assert not torch.equal(first["negative.particles_0"], second["negative.particles_0"])
    assert not torch.equal(first["negative.generator_state"], second["negative.generator_state"])
    checkpoint = el.load_checkpoint(folder / "whole.pt")
    assert len(checkpoint["ranks"]) == WORLD and checkpoint["epoch"] == 3
    for rank in range(WORLD):
        assert torch.equal(
            checkpoint["ranks"][rank]["negative.particles_0"], load(f"whole{rank}.pt")["negative.particles_0"]
        )
    # Negative control: a resume that ignored the per-rank states would give rank 1 rank 0's particles.
    assert not torch.equal(
        checkpoint["ranks"][0]["negative.particles_0"], checkpoint["ranks"][1]["negative.particles_0"]
    )


# -- a rank that fails stops the run --------------------------------------------------------------


def diverging_worker(rank: int, folder: str) -> None:
    join_group(rank, folder)
    model = el.rbm(8, 4, generator=torch.Generator().manual_seed(0))
    sampler = el.PersistentSampler(model, num_particles=5, generator=el.rank_generator(1))
    objective = el.TwoPhaseObjective(model, el.MeanField(model), sampler)
    if rank == 1:  # this rank's model statistics turn non-finite at the third step
        honest, calls = sampler.statistics, []

        def poisoned(v=None, **kwargs) -> Statistics:
            calls.append(1)
            stats = honest(v, **kwargs)
            # From the third call on, the layers' statistics (the means) turn NaN.
            return Statistics(
                {
                    name: s * float("nan") if len(calls) >= 3 and name.startswith("layers.") else s
                    for name, s in stats.items()
                }
            )

        sampler.statistics = poisoned
    wrapped = el.wrap_distributed(objective)
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
    data = torch.bernoulli(torch.full((4, 8), 0.5), generator=torch.Generator().manual_seed(2))
    try:
        for _ in range(10):
            loss = wrapped(data)
            optimizer.zero_grad()
            loss.backward()
            optimizer.step()
    except FloatingPointError as error:
        (Path(folder) / f"raised{rank}.txt").write_text(str(error))
        raise


def test_distributed_divergence_on_one_rank_stops_every_rank_with_the_error(tmp_path):
    started = time.monotonic()
    with pytest.raises(mp.ProcessRaisedException, match="FloatingPointError"):
        run_ranks(diverging_worker, str(tmp_path))
    assert time.monotonic() - started < DEADLINE
    # Both ranks raised the guard's error themselves (rank 0 was not left waiting in an all-reduce).
    assert "not finite on this rank" in (tmp_path / "raised1.txt").read_text()
    assert "not finite on another rank" in (tmp_path / "raised0.txt").read_text()


def failing_worker(rank: int, folder: str) -> None:
    join_group(rank, folder)
    model = el.rbm(8, 4, generator=torch.Generator().manual_seed(0))
    wrapped = el.wrap_distributed(el.TwoPhaseObjective(model))
    data = torch.full((4, 8), float("nan") if rank == 1 else 0.5)  # rank 1 gets bad data
    try:
        wrapped(data).backward()
    except Exception as error:
        (Path(folder) / f"error{rank}.txt").write_text(f"{type(error).__name__}: {error}")
        raise


def test_distributed_run_stops_when_one_rank_raises_any_error(tmp_path):
    started = time.monotonic()
    # Which rank's error the launcher reports first is a race: rank 0, waiting in the guard's
    # all-reduce, may fail with "connection closed" as rank 1 exits. Rank 1's own error is
    # recorded by the worker.
    with pytest.raises(mp.ProcessRaisedException):
        run_ranks(failing_worker, str(tmp_path))
    assert time.monotonic() - started < 30  # well before the process group's own timeout
    assert (tmp_path / "error1.txt").read_text().startswith("ValueError: v holds")


def example_worker(rank: int, folder: str) -> None:
    os.environ.update(RANK=str(rank), LOCAL_RANK=str(rank), WORLD_SIZE=str(WORLD))  # as torchrun would
    example = runpy.run_path(str(Path(__file__).resolve().parents[1] / "examples" / "distributed.py"))
    arguments = ["--epochs", "1", "--no-progress", "--out", folder, "--init-method", f"file://{folder}/meet"]
    with contextlib.redirect_stdout(io.StringIO()) as printed:
        example["main"](arguments)
    (Path(folder) / f"printed{rank}.txt").write_text(printed.getvalue())


def test_distributed_example_runs_on_two_ranks(tmp_path):
    # A smoke test (common practice, no source): the example trains on two ranks and rank 0 prints
    # every rank's line; the ranks share their parameters.
    run_ranks(example_worker, str(tmp_path))
    table = (tmp_path / "printed0.txt").read_text().splitlines()
    assert table[0].startswith("2 ranks") and len(table) == 5
    assert len({line.split()[1] for line in table[2:4]}) == 1  # the same sum of weights on both ranks
    assert (tmp_path / "printed1.txt").read_text() == ""
    assert (tmp_path / "distributed.pt").exists()


def test_distributed_helpers_need_an_initialised_process_group():
    if dist.is_initialized():
        pytest.skip("a process group is already initialised in this process")
    with pytest.raises(ValueError, match="init_process_group"):
        el.wrap_distributed(el.TwoPhaseObjective(el.rbm(4, 2)))
    with pytest.raises(ValueError, match="init_process_group"):
        el.fit(el.rbm(4, 2), torch.ones(4, 4), epochs=1, distributed=True, progress=False)
    with pytest.raises(TypeError, match="distributed must be True or False"):
        el.fit(el.rbm(4, 2), torch.ones(4, 4), epochs=1, distributed="yes", progress=False)
    with pytest.raises(TypeError, match="objective must be a TwoPhaseObjective"):
        el.wrap_distributed(el.rbm(4, 2))


@pytest.fixture
def world_of_one(tmp_path):
    """A process group of this process alone (gloo), for the checks that need one."""
    if dist.is_initialized():
        pytest.skip("a process group is already initialised in this process")
    dist.init_process_group("gloo", init_method=f"file://{tmp_path}/meet", rank=0, world_size=1)
    try:
        yield
    finally:
        dist.destroy_process_group()


def test_distributed_fit_refuses_what_it_cannot_shard(world_of_one, tmp_path):
    data = torch.bernoulli(torch.full((20, 6), 0.5), generator=torch.Generator().manual_seed(0))
    model = el.rbm(6, 3, generator=torch.Generator().manual_seed(1))
    before = snapshot(model)
    particles = el.DataParticles(model, num_examples=20)
    with pytest.raises(ValueError, match="needs MeanField for the data phase"):
        el.fit(
            model, data, objective=el.TwoPhaseObjective(model, particles), distributed=True, progress=False
        )
    loader = torch.utils.data.DataLoader(data, batch_size=5, shuffle=True)
    with pytest.raises(ValueError, match="needs a DistributedSampler, got RandomSampler"):
        el.fit(model, loader, distributed=True, progress=False)
    el.fit(model, data, epochs=1, checkpoint=tmp_path / "plain.pt", progress=False)  # not distributed
    after_plain = snapshot(model)
    with pytest.raises(ValueError, match="holds the particles of 0 ranks, this run has 1"):
        el.fit(model, data, epochs=2, resume=tmp_path / "plain.pt", distributed=True, progress=False)
    assert_unchanged(model, after_plain)
    assert not all(torch.equal(a, b) for a, b in zip(before.values(), after_plain.values()))
    with pytest.raises(TypeError, match="seed must be an int"):
        el.rank_generator(1.5)
    # On one rank the distributed path trains like any other run and keeps the objective usable.
    result = el.fit(model, data, epochs=1, distributed=True, progress=False)
    assert result.objective.process_group is None and len(result.history) == 1
