"""Diagnostics of persistent chains: how fast scalar traces decorrelate (integrated autocorrelation
time, effective sample size, between- vs within-chain variance), and which modes samples cover
(the share of samples in each mode, and how often particles switch mode)."""

from __future__ import annotations

import copy
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import torch
from torch import Tensor
from tqdm.auto import tqdm

from .._checks import check_size
from .._random import resolve_generator
from ..phases.gibbs import PersistentSampler

__all__ = [
    "ModeOccupancy",
    "ModeTracker",
    "autocorrelation_time",
    "effective_sample_size",
    "mode_occupancy",
    "mixing_during_learning",
    "mode_switching_rate",
    "nearest_template",
    "potential_scale_reduction",
    "sampler_traces",
]

Assignment = Callable[[Tensor], Tensor]


def nearest_template(templates: Tensor) -> Assignment:
    """An assignment function for :func:`mode_occupancy`: each row goes to the template nearest
    to it in squared distance.

    Args:
        templates: ``(K, n)`` one template per mode (for example each mode's mean image).

    Returns:
        ``assign(x)``: ``(B, n)`` rows to ``(B,)`` int64 mode indices in ``[0, K)``.
    """
    if not isinstance(templates, Tensor) or templates.ndim != 2 or templates.shape[0] == 0:
        shape = tuple(templates.shape) if isinstance(templates, Tensor) else type(templates).__name__
        raise ValueError(f"templates must be a non-empty (K, n) tensor, got {shape}")
    templates = templates.detach()

    def assign(x: Tensor) -> Tensor:
        if x.ndim != 2 or x.shape[1] != templates.shape[1]:
            raise ValueError(f"rows must have {templates.shape[1]} columns, got shape {tuple(x.shape)}")
        return torch.cdist(x.to(templates.dtype), templates).argmin(1)

    return assign


@dataclass
class ModeOccupancy:
    """The share of samples, and of data, that an assignment function puts in each mode.

    Attributes:
        names: one name per mode.
        sample_shares: ``(K,)`` float64 shares of the samples, summing to 1.
        data_shares: ``(K,)`` float64 shares of the data, or ``None`` without data.
        num_samples, num_data: how many rows each share is over (``num_data`` is 0 without data).
    """

    names: tuple[str, ...]
    sample_shares: Tensor
    data_shares: Tensor | None
    num_samples: int
    num_data: int

    @property
    def missing(self) -> tuple[str, ...]:
        """Modes that hold data (or, without data, any mode) but no sample."""
        reference = self.data_shares if self.data_shares is not None else torch.ones_like(self.sample_shares)
        pairs = zip(self.names, self.sample_shares, reference)
        return tuple(name for name, share, expected in pairs if expected > 0 and share == 0)

    @property
    def total_variation(self) -> float | None:
        """Half the summed absolute difference of the two share vectors, in [0, 1] (``None``
        without data): 0 when samples fill the modes as the data do."""
        if self.data_shares is None:
            return None
        return 0.5 * float((self.sample_shares - self.data_shares).abs().sum())

    def __str__(self) -> str:
        width = max(len("mode"), *(len(n) for n in self.names))
        header = f"{'mode':<{width}}  {'samples':>8}"
        lines = [header + (f"  {'data':>8}" if self.data_shares is not None else "")]
        for k, name in enumerate(self.names):
            line = f"{name:<{width}}  {100 * float(self.sample_shares[k]):7.1f}%"
            if self.data_shares is not None:
                line += f"  {100 * float(self.data_shares[k]):7.1f}%"
            lines.append(line)
        summary = f"{self.num_samples} samples"
        if self.data_shares is not None:
            summary += f", {self.num_data} data rows; total variation {self.total_variation:.3f}"
        summary += "; missing modes: " + (", ".join(self.missing) if self.missing else "none")
        return "\n".join([*lines, summary])


def mode_occupancy(
    samples: Tensor,
    assign: Assignment,
    *,
    data: Tensor | None = None,
    names: Sequence[str] | None = None,
    num_modes: int | None = None,
) -> ModeOccupancy:
    """Share of ``samples`` (and of ``data``) that ``assign`` puts in each mode.

    With several modes in the data, persistent chains or a sampler that cover only some of them
    show it here: compare ``sample_shares`` with ``data_shares`` (the same assignment applied to
    the data, so that its errors affect both alike).

    Args:
        samples: ``(B, n)`` samples (visible states of particles, or anything ``assign`` takes).
        assign: maps ``(B, n)`` rows to ``(B,)`` integer modes in ``[0, K)``: for example
            :func:`nearest_template`, a trained classifier's predictions, or k-means labels.
        data: ``(N, n)`` data to compare with (optional).
        names: the modes' names (``K`` of them).
        num_modes: ``K`` when ``names`` is not given (default: largest mode seen, plus one).

    Returns:
        a :class:`ModeOccupancy`; ``str()`` of it is an aligned table.
    """
    if not callable(assign):
        raise TypeError(f"assign must be callable, got {type(assign).__name__}")
    if names is not None:
        names = tuple(str(name) for name in names)
        if num_modes is not None and num_modes != len(names):
            raise ValueError(f"num_modes={num_modes} disagrees with {len(names)} names")
        num_modes = len(names)
    elif num_modes is not None:
        num_modes = check_size("num_modes", num_modes)
    modes = {"samples": _modes("samples", samples, assign)}
    if data is not None:
        modes["data"] = _modes("data", data, assign)
    largest = max(int(m.max()) if m.numel() else -1 for m in modes.values())
    if num_modes is None:
        num_modes = largest + 1
    elif largest >= num_modes:
        raise ValueError(f"assign returned mode {largest}, outside [0, {num_modes})")
    names = names or tuple(f"mode {k}" for k in range(num_modes))
    shares = {key: torch.bincount(m, minlength=num_modes).double() / m.numel() for key, m in modes.items()}
    return ModeOccupancy(
        names=names,
        sample_shares=shares["samples"],
        data_shares=shares.get("data"),
        num_samples=modes["samples"].numel(),
        num_data=modes["data"].numel() if "data" in modes else 0,
    )


def _modes(name: str, rows: Tensor, assign: Assignment) -> Tensor:
    """``assign(rows)`` checked: ``(B,)`` non-negative int64."""
    if not isinstance(rows, Tensor) or rows.ndim != 2 or rows.shape[0] == 0:
        shape = tuple(rows.shape) if isinstance(rows, Tensor) else type(rows).__name__
        raise ValueError(f"{name} must be a non-empty (B, n) tensor, got {shape}")
    with torch.no_grad():
        modes = torch.as_tensor(assign(rows.detach()))
    if modes.shape != (rows.shape[0],) or modes.dtype.is_floating_point or modes.dtype == torch.bool:
        raise ValueError(
            f"assign must return ({rows.shape[0]},) integer modes for {name}, "
            f"got shape {tuple(modes.shape)} and dtype {modes.dtype}"
        )
    if modes.numel() and int(modes.min()) < 0:
        raise ValueError(f"assign returned a negative mode ({int(modes.min())}) for {name}")
    return modes.long()


# -- scalar traces --------------------------------------------------------------------------------


def _check_trace(trace: Tensor, minimum: int = 4) -> Tensor:
    """``trace`` as a float64 ``(T, C)`` tensor (a ``(T,)`` trace is one chain)."""
    if not isinstance(trace, Tensor):
        raise TypeError(f"trace must be a torch.Tensor, got {type(trace).__name__}")
    trace = trace.detach().to(torch.float64)
    trace = trace[:, None] if trace.ndim == 1 else trace
    if trace.ndim != 2 or trace.shape[0] < minimum or trace.shape[1] == 0:
        raise ValueError(
            f"trace must be (T, C) with T >= {minimum} records and C >= 1 chains, got {tuple(trace.shape)}"
        )
    if not bool(torch.isfinite(trace).all()):
        raise ValueError("trace holds non-finite values")
    return trace


def _autocovariance(trace: Tensor) -> Tensor:
    """Autocovariance ``(T, C)`` of each chain at lags 0..T-1 (each around its own mean; divided by
    T, the usual biased estimate that keeps the sequence positive definite), by FFT."""
    length = trace.shape[0]
    centred = trace - trace.mean(0)
    spectrum = torch.fft.rfft(centred, n=2 * length, dim=0)
    return torch.fft.irfft(spectrum * spectrum.conj(), n=2 * length, dim=0)[:length] / length


def _initial_positive_sequence(autocovariance: Tensor) -> Tensor:
    """``tau = -1 + 2 sum_m Gamma_m / gamma_0`` per column with ``Gamma_m = gamma_2m + gamma_2m+1``
    summed while positive and made non-increasing: Geyer's initial monotone sequence estimator
    ("Practical Markov Chain Monte Carlo", Statistical Science, 1992)."""
    length = autocovariance.shape[0] // 2 * 2
    pairs = autocovariance[:length].reshape(length // 2, 2, -1).sum(1)  # (M, C): Gamma_m
    positive = torch.cumprod((pairs > 0).to(pairs.dtype), dim=0)  # 1 until the first Gamma_m <= 0
    monotone = torch.cummin(pairs.clamp_min(0.0), dim=0).values
    variance = -autocovariance[0] + 2 * (monotone * positive).sum(0)
    tau = (variance / autocovariance[0]).clamp_min(1.0 / autocovariance.shape[0])
    return torch.where(autocovariance[0] > 0, tau, 1.0)  # a constant chain: tau = 1


def autocorrelation_time(trace: Tensor, *, pooled: bool = False) -> Tensor:
    """Integrated autocorrelation time of each chain's scalar trace, in records.

    ``tau = 1 + 2 sum_k rho_k``: a chain of ``T`` records carries about ``T / tau`` independent
    samples' worth of information. Estimated by Geyer's initial monotone sequence ("Practical
    Markov Chain Monte Carlo", Statistical Science, 1992). A constant chain gets ``tau = 1``. Chains
    that each sit in their own mode can look fast-mixing here: check
    :func:`potential_scale_reduction` too.

    Args:
        trace: ``(T, C)`` ``C`` chains of ``T`` records each (or ``(T,)``, one chain).
        pooled: one value from the chains' averaged autocovariance instead of one per chain.

    Returns:
        ``(C,)`` float64 (``pooled``: a 0-d tensor).
    """
    trace = _check_trace(trace)
    autocovariance = _autocovariance(trace)
    if pooled:
        return _initial_positive_sequence(autocovariance.mean(1, keepdim=True))[0]
    return _initial_positive_sequence(autocovariance)


def effective_sample_size(trace: Tensor, *, pooled: bool = False) -> Tensor:
    """``T / tau`` per chain (``pooled``: ``C T / tau`` from the averaged autocovariance), float64."""
    trace = _check_trace(trace)
    tau = autocorrelation_time(trace, pooled=pooled)
    return trace.numel() / tau if pooled else trace.shape[0] / tau


def potential_scale_reduction(trace: Tensor) -> float:
    """Between- against within-chain variance of a scalar trace ``(T, C)``, ``C >= 2`` chains:
    ``sqrt(((T - 1) / T W + B / T) / W)`` ("Inference from Iterative Simulation Using Multiple
    Sequences", Statistical Science, 1992). Near 1 when the chains sample the same distribution;
    well above 1 (say 1.1) when they have not mixed, e.g. each stuck in its own mode."""
    trace = _check_trace(trace)
    length, chains = trace.shape
    if chains < 2:
        raise ValueError(f"potential_scale_reduction needs at least 2 chains, got {chains}")
    within = trace.var(0).mean()
    between = length * trace.mean(0).var()
    if within == 0:
        return 1.0 if between == 0 else float("inf")
    return float((((length - 1) / length * within + between / length) / within).sqrt())


@torch.no_grad()
def sampler_traces(
    sampler: PersistentSampler, num_records: int, *, progress: bool = True
) -> dict[str, Tensor]:
    """Advance ``sampler`` ``num_records`` times (``sampler.sweeps`` sweeps each) and record scalar
    traces of every particle: ``"energy"``, ``"free_energy"`` (when the model has a closed form)
    and ``"mean_<i>"`` (the mean state of layer ``i``). Each is a ``(num_records, P)`` float64
    tensor, ready for :func:`autocorrelation_time`. The particles stay advanced."""
    if not isinstance(sampler, PersistentSampler):
        raise TypeError(f"sampler must be a PersistentSampler, got {type(sampler).__name__}")
    num_records = check_size("num_records", num_records)
    model = sampler.model
    records: dict[str, list[Tensor]] = {}
    for _ in tqdm(range(num_records), desc="tracing", unit="record", disable=not progress):
        states = sampler()
        values = {"energy": model.energy(states)}
        if model.has_free_energy:
            values["free_energy"] = model.free_energy(states[0])
        values.update({f"mean_{i}": x.mean(1) for i, x in enumerate(states)})
        for name, value in values.items():
            records.setdefault(name, []).append(value.to(torch.float64))
    return {name: torch.stack(values) for name, values in records.items()}


# -- modes over time ------------------------------------------------------------------------------


def mode_switching_rate(modes: Tensor) -> float:
    """Share of particles whose mode changes from one record to the next, averaged over records:
    ``modes`` is ``(T, P)`` integer modes of ``P`` particles at ``T >= 2`` successive records."""
    if not isinstance(modes, Tensor) or modes.ndim != 2 or modes.shape[0] < 2:
        shape = tuple(modes.shape) if isinstance(modes, Tensor) else type(modes).__name__
        raise ValueError(f"modes must be a (T, P) tensor with T >= 2 records, got {shape}")
    return float((modes[1:] != modes[:-1]).double().mean())


class ModeTracker:
    """A :func:`fit` callback that follows the persistent particles' modes during training.

    After every batch it assigns the particles' visible states to modes (``assign``, as in
    :func:`mode_occupancy`) and counts the particles that changed mode since the previous batch;
    after every epoch it appends to :attr:`history` a record with ``epoch``, ``shares`` (the
    particles' share per mode at the epoch's end, a list) and ``switching_rate`` (mean share of
    particles changing mode per update during the epoch).
    """

    def __init__(self, assign: Assignment, num_modes: int) -> None:
        if not callable(assign):
            raise TypeError(f"assign must be callable, got {type(assign).__name__}")
        self.assign, self.num_modes = assign, check_size("num_modes", num_modes)
        self.history: list[dict] = []
        self._previous: Tensor | None = None
        self._switches: list[float] = []

    def __call__(self, state) -> None:
        particles = getattr(state.objective.negative, "particles", None)
        if particles is None:
            raise ValueError("ModeTracker needs persistent particles (a PersistentSampler negative phase)")
        if state.event == "batch":
            modes = _modes("particles", particles[0], self.assign)
            if self._previous is not None:
                self._switches.append(float((modes != self._previous).double().mean()))
            self._previous = modes
            return
        modes = (
            self._previous if self._previous is not None else _modes("particles", particles[0], self.assign)
        )
        shares = torch.bincount(modes, minlength=self.num_modes).double() / modes.numel()
        rate = sum(self._switches) / len(self._switches) if self._switches else 0.0
        self.history.append({"epoch": state.epoch + 1, "shares": shares.tolist(), "switching_rate": rate})
        self._switches = []

    def series(self) -> dict[str, list[tuple[int, float]]]:
        """The switching rate per epoch, as an ``extra`` series for
        :func:`~ebm_layers.viz.save_training_plot` (the optional picture)."""
        return {
            "particles' mode switches per update": [(r["epoch"], r["switching_rate"]) for r in self.history]
        }


def mixing_during_learning(
    objective,
    optimizer: torch.optim.Optimizer,
    data: Tensor,
    assign: Assignment,
    *,
    updates: int = 100,
    snapshots: int = 3,
    batch_size: int = 10,
    generator: torch.Generator | None = None,
    progress: bool = True,
) -> list[dict]:
    """How much faster persistent particles switch modes while the weights learn than with the
    same weights frozen.

    For each of ``snapshots`` successive stretches of training: copy the model and the particles,
    then (a) train ``updates`` steps of ``objective`` with ``optimizer`` on shuffled batches of
    ``data``, recording the particles' modes after every update, and (b) from the copied
    particles, run the frozen copy's chains for as many updates of the sampler (the same sweeps
    each), recording their modes. The learning run continues from where (a) ended, so the
    snapshots follow training. Every record holds ``learning`` and ``frozen`` (modes switched per
    particle and update, :func:`mode_switching_rate`), their ``ratio``, and the ``(updates + 1, P)``
    mode sequences ``learning_modes`` and ``frozen_modes``. The frozen run never touches
    ``objective``'s parameters or particles.

    Args:
        objective: a :class:`~ebm_layers.objective.TwoPhaseObjective` with a persistent sampler.
        optimizer: the optimizer over the model's parameters (it is stepped).
        data: ``(N, n_0)`` training data.
        assign: rows to modes, as in :func:`mode_occupancy`.
        updates, snapshots, batch_size: as above.
        generator: the generator of the shuffling and of the frozen copies' chains.
        progress: show a tqdm bar over the snapshots.
    """
    sampler = objective.negative
    if not isinstance(sampler, PersistentSampler):
        raise TypeError(f"objective.negative must be a PersistentSampler, got {type(sampler).__name__}")
    if not isinstance(optimizer, torch.optim.Optimizer):
        raise TypeError(f"optimizer must be a torch.optim.Optimizer, got {type(optimizer).__name__}")
    data = sampler.model.checked("data", data)
    updates, snapshots = check_size("updates", updates), check_size("snapshots", snapshots)
    batch_size = check_size("batch_size", batch_size)
    generator = resolve_generator(generator)
    records = []
    for snapshot in tqdm(range(snapshots), desc="snapshots", unit="snapshot", disable=not progress):
        frozen = _frozen_copy(sampler, generator)
        learning_modes = [_modes("particles", sampler.particles[0], assign)]
        order = torch.randint(0, data.shape[0], (updates, batch_size), generator=generator)
        for rows in order:
            loss = objective(data[rows])
            optimizer.zero_grad()
            loss.backward()
            optimizer.step()
            learning_modes.append(_modes("particles", sampler.particles[0], assign))
        frozen_modes = [_modes("particles", frozen.particles[0], assign)]
        for _ in range(updates):
            frozen_modes.append(_modes("particles", frozen()[0], assign))
        learning_modes, frozen_modes = torch.stack(learning_modes), torch.stack(frozen_modes)
        learning, still = mode_switching_rate(learning_modes), mode_switching_rate(frozen_modes)
        records.append(
            {
                "snapshot": snapshot,
                "learning": learning,
                "frozen": still,
                "ratio": learning / still if still > 0 else float("inf"),
                "learning_modes": learning_modes,
                "frozen_modes": frozen_modes,
            }
        )
    return records


def _frozen_copy(sampler: PersistentSampler, generator: torch.Generator) -> PersistentSampler:
    """A sampler on a detached copy of ``sampler``'s model, holding copies of its particles and
    drawing from a generator seeded from ``generator``."""
    model = copy.deepcopy(sampler.model).requires_grad_(False)
    seed = int(torch.randint(0, 2**62, (), generator=generator))
    frozen = PersistentSampler(
        model,
        num_particles=sampler.num_particles,
        sweeps=sampler.sweeps,
        generator=torch.Generator().manual_seed(seed),
    )
    with torch.no_grad():
        for mine, theirs in zip(frozen.particles, sampler.particles):
            mine.copy_(theirs)
    return frozen
