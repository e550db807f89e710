"""fit(): a small training loop around TwoPhaseObjective, with progress, callbacks and atomic checkpoints.

Everything here is reachable from a user's own loop: ``fit`` only builds a
:class:`TwoPhaseObjective`, an optimizer and a scheduler, and calls ``objective(v)``,
``loss.backward()`` and ``optimizer.step()`` batch after batch.
"""

from __future__ import annotations

import copy
import logging
import math
import os
import time
import warnings
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import torch
import torch.distributed as dist
from torch import Tensor, nn
from torch.utils.data import DataLoader, DistributedSampler, RandomSampler
from tqdm.auto import tqdm

from .._checks import check_count, check_model, check_positive_real, check_size
from .._random import resolve_generator
from ..evaluation.metrics import free_energy_gap
from ..model.energy_model import EnergyModel
from ..phases.contrastive_divergence import ContrastiveDivergence
from ..phases.fast_weights import FastWeightsSampler
from ..phases.gibbs import DataParticles, PersistentSampler
from ..phases.mean_field import MeanField
from ..phases.replica_exchange import ReplicaExchangeSampler
from .distributed import current_world, rank_generator, rank_states, wrap_distributed
from .objective import TwoPhaseObjective
from .pretraining import DEFAULT_PRETRAIN_EPOCHS, can_pretrain, pretrain

__all__ = ["FitResult", "FitState", "default_optimizer", "fit", "load_checkpoint", "save_checkpoint"]

logger = logging.getLogger(__name__)

# fit's defaults, chosen by benchmarks/digits_rbm.py (see DEVELOPERS.md for the figures).
DEFAULT_EPOCHS = 100
DEFAULT_BATCH_SIZE = 10
DEFAULT_LEARNING_RATE = 0.01
# Joint training of a deep model (two hidden layers or more), measured on pretrained 64-100-50 chains by
# benchmarks/digits_features.py: 0.01 undoes the pretraining and leaves the top layer unused.
DEFAULT_DEEP_LEARNING_RATE = 0.001
DEFAULT_NUM_PARTICLES = 100
DEFAULT_SWEEPS = 1
# Small RBMs, measured by benchmarks/defaults.py (four data sets of 16-20 visible units with exact
# likelihoods, and the digits at 32, 48 and 64 pixels): they do best at a higher rate, where plain
# chains lose modes and replica exchange with one hotter copy keeps them. More than 100 hidden units
# and the sampler costs over 2x plain chains per epoch.
SMALL_RBM_VISIBLE = 32
SMALL_RBM_HIDDEN = 100
SMALL_RBM_LEARNING_RATE = 0.03
SMALL_RBM_REPLICAS = 2
SMALL_RBM_SWEEPS = 2

_CHECKPOINT_FORMAT = "ebm_layers.fit/1"


@dataclass
class FitState:
    """What a callback sees: ``callback(state)`` runs after every batch (``event == "batch"``) and
    after every epoch (``event == "epoch"``, once the epoch's checkpoint is written).

    Set ``state.stop = True`` to end training: after a batch, ``fit`` returns at once (the
    unfinished epoch gets no history record, scheduler step or checkpoint); after an epoch, it
    returns once that epoch is recorded and checkpointed.

    Attributes:
        event: ``"batch"`` or ``"epoch"``.
        epoch: index of the current epoch, from 0 (``history`` records count from 1).
        step: batches trained so far, over all epochs.
        objective, optimizer, scheduler: what ``fit`` trains with; ``objective.last`` holds the
            monitors of the latest batch.
        history: the records of the finished epochs (see :class:`FitResult`).
    """

    event: str
    epoch: int
    step: int
    objective: TwoPhaseObjective
    optimizer: torch.optim.Optimizer
    scheduler: object | None
    history: list[dict]
    stop: bool = False


@dataclass
class FitResult:
    """What :func:`fit` returns: the pieces it trained with and one record per epoch.

    ``history[e]`` holds ``stage`` (``fit``'s ``stage``: ``"training"`` by default), ``epoch``
    (1-based), ``learning_rate``, ``statistics_gap`` (mean over the epoch's batches of
    :attr:`Monitors.statistics_gap`), ``free_energy_gap`` (mean free energy of the validation data
    minus that of as many training examples, see :func:`free_energy_gap`: the mean-field free
    energy for a model without a closed form; ``None`` without validation data; it grows when the
    model overfits), ``mean_field_iterations`` (mean over batches, ``None`` without mean field)
    and ``seconds``. ``pretraining`` holds the history of each RBM of the greedy pretraining
    (bottom first, stages ``"pretraining RBM k/L"``; empty without pretraining).
    """

    objective: TwoPhaseObjective
    optimizer: torch.optim.Optimizer
    scheduler: object | None
    history: list[dict] = field(default_factory=list)
    pretraining: list[list[dict]] = field(default_factory=list)


def fit(
    model: EnergyModel,
    data: Tensor | DataLoader,
    *,
    objective: TwoPhaseObjective | None = None,
    optimizer: torch.optim.Optimizer | None = None,
    scheduler: object | None = None,
    epochs: int = DEFAULT_EPOCHS,
    batch_size: int | None = None,
    validation: Tensor | None = None,
    callbacks: Sequence[Callable[[FitState], None]] = (),
    progress: bool = True,
    checkpoint: str | os.PathLike | None = None,
    resume: str | os.PathLike | None = None,
    generator: torch.Generator | None = None,
    pretrain_epochs: int | None = None,
    distributed: bool = False,
    mixing_aid: str | None = "auto",
    negative: str = "persistent",
    stage: str = "training",
) -> FitResult:
    """Train ``model`` on ``data`` for ``epochs`` passes with the two-phase learning rule.

    With no other argument this uses defaults measured by ``benchmarks/digits_rbm.py`` (RBMs),
    ``benchmarks/defaults.py`` (small RBMs) and ``benchmarks/digits_features.py`` (deep chains):
    mean field started from a bottom-up pass for the data phase; 100 persistent chains advanced one
    sweep per batch for the model phase; batches of 10; Adam at learning rate 0.01 (0.001 for a
    deep model, two hidden layers or more), decayed linearly towards zero over ``epochs`` (see
    :func:`default_optimizer`). A small RBM (at most ``SMALL_RBM_VISIBLE`` = 32 visible and
    ``SMALL_RBM_HIDDEN`` = 100 hidden units) starts at 0.03 instead, and its 100 chains take two
    sweeps per batch with replica exchange against one hotter copy each (``mixing_aid="auto"``).
    With tensor data, an untrained model's
    (:meth:`EnergyModel.untrained`: every weight as built) all-zero observed biases are first set
    from the data (binary units: the log-odds of the base rates; Gaussian: the mean; categorical:
    the log frequencies; :meth:`EnergyModel.init_visible_bias_from`), and an
    untrained deep chain (three layers or more, as built by :func:`dbm`) is first pretrained
    greedily from RBMs (:func:`pretrain`, ``DEFAULT_PRETRAIN_EPOCHS`` passes per RBM, with a
    progress bar and history of their own, ``FitResult.pretraining``), then trained jointly for
    ``epochs`` passes. A trained, loaded or already pretrained model is never pretrained again.

    Args:
        model: the :class:`EnergyModel`.
        data: a ``(N, n_0)`` tensor (shuffled every epoch with ``generator``), with several
            observed layers one tensor per observed layer (a tuple ``(X, Y)`` or a dict, see
            :class:`EnergyModel`), or a ``DataLoader`` yielding ``(B, n_0)`` tensors (joined
            observations, or dicts ``{layer: batch}``) or tuples whose first item is the batch (with
            :class:`DataParticles`, tuples ``(v, index)``). For a bit-identical resume, give a
            shuffling loader its own ``generator``: its state is saved in checkpoints.
        objective: a :class:`TwoPhaseObjective` of ``model`` (default: built as above).
        optimizer: any ``torch.optim`` optimizer over the model's parameters (default: as above;
            another starting rate with the same decay: ``default_optimizer(model, epochs, rate)``
            for ``optimizer`` and ``scheduler``).
        scheduler: a learning-rate scheduler stepped once per epoch (default: the decay above
            with the default optimizer; none with your own optimizer).
        epochs: number of passes over the data, counted from the start (resuming at epoch k
            runs ``epochs - k`` more). Resuming with the ``epochs`` of the interrupted run gives
            the uninterrupted run bit for bit; with another number, the default schedule goes on
            from the rate of the last epoch trained and decays linearly to zero at the new last
            epoch (epoch ``j`` at ``last rate * (epochs - j) / (epochs - k + 1)``). Your own
            scheduler is loaded as saved: when its rate reaches zero before the last epoch,
            ``fit`` warns.
        batch_size: batch size for tensor data (default ``DEFAULT_BATCH_SIZE``).
        validation: held-out ``(M, n_0)`` data for the free-energy gap of every epoch.
        callbacks: callables run after every batch and every epoch, see :class:`FitState`.
        progress: show a tqdm bar with the statistics gap (and the free-energy gap).
        checkpoint: write a checkpoint to this path after every epoch, atomically (a temporary
            file, then a rename), holding model, phases (particles, generator states), optimizer,
            scheduler, epoch, history and the shuffling generator.
        resume: continue from this checkpoint, bit-identically with an uninterrupted run given
            the same arguments.
        generator: the ``torch.Generator`` behind the default sampler, the shuffling and the
            pretraining.
        pretrain_epochs: passes over the data for each RBM of :func:`pretrain` before joint
            training; ``0`` turns pretraining off. Default: ``DEFAULT_PRETRAIN_EPOCHS`` for an
            untrained deep chain with tensor data, else none. Never when resuming (the checkpoint
            holds the pretrained and jointly trained model); an interrupted pretraining starts over.
        distributed: train data-parallel on the ranks of the initialised ``torch.distributed``
            process group (launch every rank with the same arguments, e.g. by ``torchrun``). The
            objective is wrapped by :func:`wrap_distributed`; each rank takes its share of every
            epoch through a ``DistributedSampler`` (tensor data; a ``DataLoader`` must bring its
            own), so ``batch_size`` is per rank; the default sampler's particles are seeded from
            ``generator`` and the rank (:func:`rank_generator`). Checkpoints are written by rank 0
            and hold every rank's particles and generators, so ``resume`` continues each rank
            bit-identically (with the same number of ranks). Pretraining, when it runs, is repeated
            identically on every rank. Callbacks run on every rank and must decide ``stop`` alike.
        mixing_aid: the default objective's model phase: ``"auto"`` (the default: as above,
            replica exchange for a small RBM, else plain persistent chains), ``None`` (plain
            persistent chains whatever the model; at a small RBM's default rate of 0.03 they lost
            modes on strongly multimodal data), ``"fast-weights"`` (:class:`FastWeightsSampler`:
            fast steps the size of the optimizer's, decay 0.95) or ``"replica-exchange"``
            (:class:`ReplicaExchangeSampler`, 10 temperatures towards the data's base rates); see
            ``benchmarks/mixing.py`` for what each did on the demo data, ``benchmarks/defaults.py``
            on small data sets.
        negative: the default objective's model phase: ``"persistent"`` (persistent chains, with
            ``mixing_aid``) or ``"contrastive-divergence"`` (:class:`ContrastiveDivergence`, CD-1:
            chains restarted at each batch, one sweep; ``mixing_aid`` must stay ``"auto"``).
        stage: the name of this run in the progress bar and in every history record
            (:func:`pretrain` names its RBMs ``"pretraining RBM k/L"``).

    Returns:
        a :class:`FitResult`. Raises ``FloatingPointError`` (the divergence guard of
        :class:`TwoPhaseObjective`) when training diverges.
    """
    check_model(model)
    epochs = check_count("epochs", epochs)
    loader = data if isinstance(data, DataLoader) else None
    if loader is not None:
        if batch_size is not None:
            raise ValueError(f"batch_size={batch_size} is set by the DataLoader; leave it None")
    else:
        data = model.checked("data", data, convert=True)
        batch_size = DEFAULT_BATCH_SIZE if batch_size is None else check_size("batch_size", batch_size)
    if validation is not None:
        validation = model.checked("validation", validation, convert=True)
    callbacks = _check_callbacks(callbacks)
    generator = resolve_generator(generator)
    if not isinstance(distributed, bool):
        raise TypeError(f"distributed must be True or False, got {distributed!r}")
    rank, world = current_world() if distributed else (0, 1)
    objective = _objective_of(
        model, objective, negative, mixing_aid, generator, distributed, rank, data, loader
    )
    default_schedule = optimizer is None and scheduler is None
    optimizer, scheduler = _optimizer_of(model, objective, optimizer, scheduler, epochs)
    with_index = isinstance(objective.positive, DataParticles)
    _check_sharding(objective, data, loader, distributed, with_index)
    shuffling = _shuffling(loader, generator, checkpoint is not None or resume is not None)
    pretrain_epochs = _pretrain_epochs(pretrain_epochs, model, loader, resume)

    result = FitResult(objective, optimizer, scheduler)
    start = 0
    if resume is not None:
        ranks = (rank, world) if distributed else None
        start, planned, last_rates = _resume(resume, result, shuffling, ranks)
        if default_schedule and planned not in (None, epochs) and start < epochs:
            result.scheduler = _continued_decay(optimizer, last_rates, start, epochs)
    elif pretrain_epochs:
        logger.info(
            "fit: pretraining the untrained chain %s greedily (%d RBMs x %d epochs) before %d joint epochs",
            "-".join(map(str, model.sizes)), len(model.couplings), pretrain_epochs, epochs,
        )  # fmt: skip
        stages = pretrain(
            model, data, epochs=pretrain_epochs, batch_size=batch_size, progress=progress, generator=generator
        )
        result.pretraining = [stage.history for stage in stages]
    elif loader is None and model.untrained() and _zero_observed_biases(model):
        model.init_visible_bias_from(data)
    if resume is None and loader is None and objective.centering and objective.offsets_unset:
        objective.init_offsets(data)

    shares = None  # with distributed tensor data: this rank's share of every epoch
    if distributed and loader is None:
        shares = DistributedSampler(data, world, rank, seed=generator.initial_seed(), drop_last=True)
    run = _Run(
        model, objective, data, loader, batch_size, validation, callbacks, shuffling, shares, with_index,
        rank, distributed, checkpoint, stage, epochs,
    )  # fmt: skip
    try:
        _train(run, result, start, progress)
    finally:
        objective.process_group = None
    return result


@dataclass
class _Run:
    """What the epoch loop of one :func:`fit` call works with, once checked and wired."""

    model: EnergyModel
    objective: TwoPhaseObjective
    data: Tensor | None
    loader: DataLoader | None
    batch_size: int | None
    validation: Tensor | None
    callbacks: list
    shuffling: torch.Generator | None
    shares: DistributedSampler | None
    with_index: bool
    rank: int
    distributed: bool
    checkpoint: str | os.PathLike | None
    stage: str
    epochs: int


def _objective_of(
    model: EnergyModel,
    objective,
    negative: str,
    mixing_aid,
    generator,
    distributed: bool,
    rank: int,
    data,
    loader,
) -> TwoPhaseObjective:
    """The given objective, checked, or the default one (bottom-up mean field, the chosen negative phase)."""
    if negative not in NEGATIVE_PHASES:
        raise ValueError(f"negative must be one of {NEGATIVE_PHASES}, got {negative!r}")
    if negative == "contrastive-divergence" and mixing_aid != "auto":
        raise ValueError(f"mixing_aid={mixing_aid!r} is for persistent chains, not negative={negative!r}")
    if objective is None:
        particle_generator = rank_generator(generator.initial_seed(), rank) if distributed else generator
        if negative == "contrastive-divergence":
            sampler = ContrastiveDivergence(model, steps=1, generator=particle_generator)
        else:
            sampler = _default_sampler(
                model, mixing_aid, particle_generator, data if loader is None else None
            )
        return TwoPhaseObjective(model, MeanField(model, init="bottom-up"), sampler)
    if not isinstance(objective, TwoPhaseObjective):
        raise TypeError(f"objective must be a TwoPhaseObjective, got {type(objective).__name__}")
    if mixing_aid != "auto" or negative != "persistent":
        raise ValueError(
            "mixing_aid and negative choose the default objective's sampler; with your own objective, "
            "build it in"
        )
    if objective.model is not model:
        raise ValueError("objective belongs to another model than the one given")
    return objective


def _optimizer_of(model: EnergyModel, objective: TwoPhaseObjective, optimizer, scheduler, epochs: int):
    """The given optimizer and scheduler, checked against the objective, or the defaults."""
    if optimizer is None:
        optimizer, default_scheduler = default_optimizer(model, epochs)
        scheduler = default_scheduler if scheduler is None else scheduler
    elif not isinstance(optimizer, torch.optim.Optimizer):
        raise TypeError(f"optimizer must be a torch.optim.Optimizer, got {type(optimizer).__name__}")
    decays = [group.get("weight_decay", 0.0) for group in optimizer.param_groups]
    if objective.centering and any(decays):
        raise ValueError(
            f"weight_decay={max(decays)} with a centering objective: the optimizer decays the ordinary "
            "parameters, not the centered ones the learning rule steps in; train centered models "
            "without weight decay"
        )
    if objective.centering and not isinstance(optimizer, torch.optim.SGD):
        warnings.warn(
            f"centering maps gradients, which is exact for SGD; {type(optimizer).__name__} rescales "
            "bias and weight gradients separately and can make training collapse (see the "
            "TwoPhaseObjective docstring): prefer torch.optim.SGD with centering",
            stacklevel=3,
        )
    return optimizer, scheduler


def _shuffling(
    loader: DataLoader | None, generator: torch.Generator, resumable: bool
) -> torch.Generator | None:
    """The generator that shuffles the batches (the loader's own, or one drawn from ``generator``);
    warns when a resumable run's loader shuffles without one."""
    if loader is None:
        return _child_generator(generator)
    if resumable and loader.generator is None:
        if isinstance(loader.sampler, RandomSampler) and loader.sampler.generator is None:
            warnings.warn(
                "the DataLoader shuffles without a generator of its own, so a resumed run will not see "
                "the batches of an uninterrupted one; pass DataLoader(..., generator=torch.Generator())",
                stacklevel=3,
            )
    return loader.generator


def _check_sharding(objective: TwoPhaseObjective, data, loader, distributed: bool, with_index: bool) -> None:
    """Data particles and distributed runs: what each needs of the data."""
    if distributed and with_index:
        raise ValueError("distributed=True needs MeanField for the data phase, not DataParticles")
    if distributed and loader is not None and not isinstance(loader.sampler, DistributedSampler):
        raise ValueError(
            "with distributed=True a DataLoader needs a DistributedSampler, "
            f"got {type(loader.sampler).__name__}"
        )
    if with_index and loader is None and objective.positive.num_examples != data.shape[0]:
        raise ValueError(
            f"the DataParticles hold {objective.positive.num_examples} examples but data has {data.shape[0]}"
        )


def _train(run: _Run, result: FitResult, start: int, progress: bool) -> None:
    """The epoch loop from epoch ``start``, with a tqdm bar; returns early when a callback stops."""
    if run.loader is not None:
        batches_per_epoch = _length(run.loader)
    else:
        rows = run.data.shape[0] if run.shares is None else len(run.shares)
        batches_per_epoch = math.ceil(rows / run.batch_size)
    total = None if batches_per_epoch is None else batches_per_epoch * (run.epochs - start)
    step = start * (batches_per_epoch or 0)
    runner = wrap_distributed(run.objective) if run.distributed else run.objective
    warned_zero_rate = False
    with tqdm(total=total, unit="batch", disable=not progress or run.rank != 0, dynamic_ncols=True) as bar:
        for epoch in range(start, run.epochs):
            bar.set_description(f"{run.stage}: epoch {epoch + 1}/{run.epochs}")
            if not warned_zero_rate and all(group["lr"] == 0 for group in result.optimizer.param_groups):
                warned_zero_rate = True
                warnings.warn(
                    f"the learning rate is 0 at epoch {epoch + 1} of {run.epochs}: the scheduler ended "
                    "before the last epoch, so the remaining epochs leave the parameters as they are "
                    "(resuming with more epochs? give fit a scheduler that spans them)",
                    stacklevel=3,
                )
            step, record = _train_epoch(run, result, runner, epoch, step, bar)
            if record is None:
                return  # stopped mid-epoch: no record, scheduler step or checkpoint for it
            if _end_epoch(run, result, epoch, step, record, bar):
                return


def _train_epoch(run: _Run, result: FitResult, runner, epoch: int, step: int, bar) -> tuple[int, dict | None]:
    """One pass over the data; returns the step count and the epoch's record (``None`` when a
    callback stopped the run)."""
    objective, optimizer = run.objective, result.optimizer
    began = time.perf_counter()
    gaps, iterations, seen, seen_rows = [], [], [], 0
    for sampler in (run.shares, getattr(run.loader, "sampler", None)):
        if isinstance(sampler, DistributedSampler):
            sampler.set_epoch(epoch)
    for v, index in _batches(run.data, run.loader, run.batch_size, run.shuffling, run.with_index, run.shares):
        if not isinstance(v, Tensor):  # a loader's dict of observed layers: joined once
            v = run.model.checked("batch", v, convert=True)
        loss = runner(v, index=index) if run.with_index else runner(v)
        optimizer.zero_grad(set_to_none=True)
        loss.backward()
        optimizer.step()
        step += 1
        monitors = objective.last
        gaps.append(monitors.statistics_gap)
        iterations.append(monitors.mean_field_iterations)
        if run.validation is not None and seen_rows < len(run.validation):
            seen.append(v.detach())
            seen_rows += len(v)
        bar.update()
        bar.set_postfix(gap=f"{gaps[-1]:.4f}", refresh=False)
        if run.callbacks and _run(
            run.callbacks,
            FitState("batch", epoch, step, objective, optimizer, result.scheduler, result.history),
        ):
            return step, None
    objective.check_parameters()
    return step, {
        "stage": run.stage,
        "epoch": epoch + 1,
        "learning_rate": optimizer.param_groups[0]["lr"],
        "statistics_gap": sum(gaps) / max(1, len(gaps)),
        "free_energy_gap": _free_energy_gap(run.model, run.validation, seen),
        "mean_field_iterations": None if None in iterations else sum(iterations) / max(1, len(iterations)),
        "seconds": time.perf_counter() - began,
    }


def _end_epoch(run: _Run, result: FitResult, epoch: int, step: int, record: dict, bar) -> bool:
    """Record the epoch, step the scheduler, write the checkpoint, run the epoch callbacks;
    returns whether a callback stopped the run."""
    result.history.append(record)
    rates = [group["lr"] for group in result.optimizer.param_groups]
    if result.scheduler is not None:
        result.scheduler.step()
    if run.checkpoint is not None:
        state = _checkpoint_state(result, epoch + 1, run.shuffling, run.epochs, rates)
        if run.distributed:  # every rank's particles and generators, written by rank 0
            state["ranks"] = rank_states(run.objective)
        if run.rank == 0:
            save_checkpoint(state, run.checkpoint)
        if run.distributed:
            dist.barrier()
    if record["free_energy_gap"] is not None:
        bar.set_postfix(gap=f"{record['statistics_gap']:.4f}", held_out_dF=f"{record['free_energy_gap']:.3f}")
    state = FitState("epoch", epoch, step, run.objective, result.optimizer, result.scheduler, result.history)
    return _run(run.callbacks, state)


MIXING_AIDS = ("auto", None, "fast-weights", "replica-exchange")
NEGATIVE_PHASES = ("persistent", "contrastive-divergence")


def _default_sampler(
    model: EnergyModel, mixing_aid: str | None, generator: torch.Generator, data: Tensor | None
) -> PersistentSampler:
    """The default objective's negative phase: persistent chains, with ``mixing_aid`` if any."""
    options = dict(num_particles=DEFAULT_NUM_PARTICLES, sweeps=DEFAULT_SWEEPS, generator=generator)
    if mixing_aid == "auto" and _is_small_rbm(model):
        options["sweeps"] = SMALL_RBM_SWEEPS
        return ReplicaExchangeSampler(model, **options, num_replicas=SMALL_RBM_REPLICAS, data=data)
    if mixing_aid in ("auto", None):
        return PersistentSampler(model, **options)
    if mixing_aid == "fast-weights":
        return FastWeightsSampler(model, **options)
    if mixing_aid == "replica-exchange":
        return ReplicaExchangeSampler(model, **options, data=data)
    raise ValueError(f"mixing_aid must be one of {MIXING_AIDS}, got {mixing_aid!r}")


def _zero_observed_biases(model: EnergyModel) -> bool:
    """Whether every observed layer has a bias, still zero (the data may then set it)."""
    biases = [getattr(model.layers[i], "bias", None) for i in model.observed]
    return all(isinstance(b, nn.Parameter) and not bool(b.detach().any()) for b in biases)


def _is_small_rbm(model: EnergyModel) -> bool:
    """An RBM with at most ``SMALL_RBM_VISIBLE`` visible and ``SMALL_RBM_HIDDEN`` hidden units."""
    visible, hidden = model.sizes[0], model.sizes[-1]
    return (
        model.is_binary_chain()
        and len(model.layers) == 2
        and visible <= SMALL_RBM_VISIBLE
        and hidden <= SMALL_RBM_HIDDEN
    )


def default_optimizer(
    model: EnergyModel, epochs: int, learning_rate: float | None = None
) -> tuple[torch.optim.Optimizer, torch.optim.lr_scheduler.LRScheduler]:
    """``fit``'s default optimizer and scheduler: Adam at ``learning_rate`` (default
    ``SMALL_RBM_LEARNING_RATE`` for a small RBM, see :func:`fit`, ``DEFAULT_DEEP_LEARNING_RATE``
    for two hidden layers or more, else ``DEFAULT_LEARNING_RATE``), decayed linearly towards zero over
    ``epochs`` (epoch ``e`` runs at ``1 - e / epochs`` of it)."""
    learning_rate = (
        _default_learning_rate(model)
        if learning_rate is None
        else check_positive_real("learning_rate", learning_rate)
    )
    optimizer = torch.optim.Adam(model.parameters(), lr=learning_rate)
    scheduler = torch.optim.lr_scheduler.LinearLR(
        optimizer, start_factor=1.0, end_factor=0.0, total_iters=max(1, epochs)
    )
    return optimizer, scheduler


def _default_learning_rate(model: EnergyModel) -> float:
    """The starting rate for ``model``: see :func:`default_optimizer`."""
    if _is_small_rbm(model):
        return SMALL_RBM_LEARNING_RATE
    # A label layer does not make a model deep: hidden layers count.
    return DEFAULT_DEEP_LEARNING_RATE if len(model.hidden) > 1 else DEFAULT_LEARNING_RATE


def save_checkpoint(state: dict, path: str | os.PathLike) -> None:
    """``torch.save(state)`` to ``path`` atomically: written to a temporary file in the same folder,
    synced, then renamed over ``path``; a crash mid-write leaves the previous file intact.
    Missing parent folders are created."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    temporary = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    try:
        with open(temporary, "wb") as handle:
            torch.save(state, handle)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(temporary, path)
    except BaseException:
        temporary.unlink(missing_ok=True)
        raise


def load_checkpoint(path: str | os.PathLike) -> dict:
    """Read a checkpoint written by :func:`fit` (tensors and plain values only)."""
    state = torch.load(Path(path), weights_only=True)
    if not isinstance(state, dict) or state.get("format") != _CHECKPOINT_FORMAT:
        raise ValueError(f"{path} is not a checkpoint written by fit (format {_CHECKPOINT_FORMAT})")
    return state


def _checkpoint_state(
    result: FitResult, epochs_done: int, shuffling: torch.Generator | None, epochs: int, rates: list[float]
) -> dict:
    return {
        "format": _CHECKPOINT_FORMAT,
        "epoch": epochs_done,
        "epochs": epochs,  # the planned length, for a resume that asks for another
        "learning_rates": rates,  # each parameter group's rate in the last epoch trained
        "objective": result.objective.state_dict(),
        "optimizer": result.optimizer.state_dict(),
        "scheduler": None if result.scheduler is None else result.scheduler.state_dict(),
        "shuffling": None if shuffling is None else shuffling.get_state(),
        "history": result.history,
        "pretraining": result.pretraining,
    }


def _resume(
    path, result: FitResult, shuffling: torch.Generator | None, ranks: tuple[int, int] | None
) -> tuple[int, int | None, list[float] | None]:
    """Load checkpoint ``path`` into ``result`` (with ``ranks = (rank, world size)``, also this
    rank's own buffers); returns the number of epochs done, the number the run that wrote it
    planned and each parameter group's learning rate in its last epoch (both ``None`` in a
    checkpoint of an older version: its schedule then continues as saved)."""
    state = load_checkpoint(path)
    if ranks is not None and len(state.get("ranks", ())) != ranks[1]:
        raise ValueError(
            f"resume={str(path)!r} holds the particles of {len(state.get('ranks', ()))} ranks, "
            f"this run has {ranks[1]}: resume with as many ranks as the run that wrote it"
        )
    if (state["scheduler"] is None) != (result.scheduler is None):
        raise ValueError(
            f"resume={str(path)!r} was written with a different scheduler setting than this call"
        )
    # load_state_dict may fail half-way (a checkpoint of another model): put everything back then.
    saved = [copy.deepcopy(result.objective.state_dict()), copy.deepcopy(result.optimizer.state_dict())]
    try:
        result.objective.load_state_dict(state["objective"])
        if ranks is not None:
            result.objective.load_state_dict(state["ranks"][ranks[0]], strict=False)
        result.optimizer.load_state_dict(state["optimizer"])
        if result.scheduler is not None:
            result.scheduler.load_state_dict(state["scheduler"])
    except Exception:
        result.objective.load_state_dict(saved[0])
        result.optimizer.load_state_dict(saved[1])
        raise
    if shuffling is not None and state["shuffling"] is not None:
        shuffling.set_state(state["shuffling"])
    result.history.extend(state["history"])
    result.pretraining = state.get("pretraining", [])
    return state["epoch"], state.get("epochs"), state.get("learning_rates")


def _continued_decay(
    optimizer: torch.optim.Optimizer, last_rates: list[float], done: int, epochs: int
) -> torch.optim.lr_scheduler.LinearLR:
    """The default schedule of a resumed run that asks for another number of epochs: from each
    group's rate in the last epoch trained, linearly down to zero at the new last epoch (epoch
    ``j`` runs at ``last * (epochs - j) / (epochs - done + 1)``). With the planned number of
    epochs that is the uninterrupted schedule itself, ``lr * (1 - j / epochs)``."""
    for group, rate in zip(optimizer.param_groups, last_rates):
        group["lr"] = rate
    remaining = epochs - done
    return torch.optim.lr_scheduler.LinearLR(
        optimizer, start_factor=remaining / (remaining + 1), end_factor=0.0, total_iters=remaining
    )


def _batches(
    data, loader, batch_size, shuffling, with_index, shares=None
) -> Iterable[tuple[Tensor, Tensor | None]]:
    """One epoch of ``(v, index)`` batches (``index`` None unless data-specific particles need it);
    with ``shares`` (a ``DistributedSampler`` over tensor data) only this rank's rows, in its order."""
    if loader is None:
        order = (
            torch.randperm(data.shape[0], generator=shuffling)
            if shares is None
            else torch.tensor(list(shares))
        )
        for start in range(0, len(order), batch_size):
            index = order[start : start + batch_size]
            yield data[index], index if with_index else None
        return
    for batch in loader:
        if isinstance(batch, Mapping):  # {observed layer: (B, n_i)}, joined by the caller
            batch = (batch, None)
        if isinstance(batch, Tensor):
            if with_index:
                raise ValueError("with DataParticles the DataLoader must yield (v, index) tuples")
            yield batch, None
        else:
            yield batch[0], batch[1] if with_index else None


def _free_energy_gap(model: EnergyModel, validation: Tensor | None, seen: list[Tensor]) -> float | None:
    """Held-out minus training mean free energy on as many examples of each (``None`` if undefined)."""
    if validation is None or not seen:
        return None
    training = torch.cat(seen)[: len(validation)]
    return free_energy_gap(model, training, validation[: len(training)])


def _pretrain_epochs(pretrain_epochs: int | None, model: EnergyModel, loader, resume) -> int:
    """Passes per RBM of the greedy pretraining this call runs (0: none)."""
    deep_chain = len(model.layers) > 2 and can_pretrain(model)
    if pretrain_epochs is None:
        fresh = deep_chain and resume is None and model.untrained()
        if fresh and loader is not None:
            warnings.warn(
                "a fresh deep chain is trained from its random weights: greedy pretraining needs tensor "
                "data, not a DataLoader (without it the upper layers tend to stay unused); call "
                "pretrain(model, tensor) first, or pass the data as a tensor",
                stacklevel=3,
            )
        return DEFAULT_PRETRAIN_EPOCHS if fresh and loader is None else 0
    pretrain_epochs = check_count("pretrain_epochs", pretrain_epochs)
    if pretrain_epochs and not deep_chain:
        raise ValueError(
            f"pretrain_epochs={pretrain_epochs} needs a chain of three layers or more as built by dbm(), "
            f"got sizes {list(model.sizes)} and edges {list(model.edges)}"
        )
    if pretrain_epochs and loader is not None:
        raise ValueError(f"pretrain_epochs={pretrain_epochs} needs tensor data, not a DataLoader")
    return 0 if resume is not None else pretrain_epochs


def _child_generator(generator: torch.Generator) -> torch.Generator:
    seed = int(torch.randint(0, 2**62, (), dtype=torch.int64, generator=generator))
    return torch.Generator().manual_seed(seed)


def _length(loader: DataLoader) -> int | None:
    try:
        return len(loader)
    except TypeError:
        return None


def _check_callbacks(callbacks) -> list:
    if callable(callbacks) or not isinstance(callbacks, Sequence):
        raise TypeError(f"callbacks must be a list of callables, got {type(callbacks).__name__}")
    for i, callback in enumerate(callbacks):
        if not callable(callback):
            raise TypeError(f"callbacks[{i}] must be callable, got {type(callback).__name__}")
    return list(callbacks)


def _run(callbacks, state: FitState) -> bool:
    for callback in callbacks:
        callback(state)
    return state.stop
