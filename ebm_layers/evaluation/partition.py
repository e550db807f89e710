"""Partition functions: exact enumeration for small models, annealed importance sampling for the rest."""

from __future__ import annotations

import math
from collections.abc import Callable, Hashable, Sequence
from dataclasses import dataclass, field
from typing import TypeVar

import torch
from torch import Tensor
from torch.autograd.function import once_differentiable
from torch.nn.functional import softplus
from tqdm.auto import tqdm

from .._checks import check_model, check_size
from .._random import resolve_generator
from ..model import functional as F
from ..model.energy_model import EnergyModel
from ..model.parameters import substituted
from ..model.units import has_logits
from ..phases.exact import MAX_STATES, exact_moments
from ..phases.gibbs import gibbs_sweep
from ..phases.mean_field import MeanField

__all__ = [
    "Estimate",
    "ais_log_partition",
    "annealing_schedule",
    "can_reverse_anneal",
    "exact_log_partition",
    "reverse_ais_log_likelihood",
]

T = TypeVar("T")


class _ExactLogPartition(torch.autograd.Function):
    """``log Z`` with the gradient d log Z / d theta = <-dE/d theta>_model, from one enumeration.

    The backward reuses the exact statistics gathered in the forward pass instead of keeping
    every chunk's graph, so memory stays bounded however many states are enumerated.
    """

    @staticmethod
    def forward(ctx, model: EnergyModel, max_states: int, *parameters: Tensor) -> Tensor:
        log_z, stats = exact_moments(model, max_states=max_states)
        ctx.statistics = [stats[name] for name, _ in model.named_parameters()]
        ctx.dtypes = [p.dtype for p in parameters]
        return log_z

    @staticmethod
    @once_differentiable
    def backward(ctx, grad: Tensor):
        # d log Z / d theta = <-dE/d theta>_model: the exact statistics, one per parameter.
        return (None, None, *((grad * s).to(dtype) for s, dtype in zip(ctx.statistics, ctx.dtypes)))


def exact_log_partition(model: EnergyModel, *, max_states: int = MAX_STATES) -> Tensor:
    """Exact ``log Z = log sum_x exp(-E(x))`` by enumeration: a float64 0-d tensor.

    Differentiable with respect to every parameter (its gradient is the exact model statistics).
    Enumerates the smallest set of layers touching every coupling and sums the others out in
    closed form, in chunks; raises ``ValueError`` with the state count when that set has more
    than ``max_states`` states.

    Examples::

        >>> import ebm_layers as el
        >>> model = el.rbm(4, 2)
        >>> with torch.no_grad():
        ...     _ = model.couplings[0].weight.zero_()
        >>> round(el.exact_log_partition(model).item(), 4)  # 6 free units: 6 log 2
        4.1589
    """
    check_model(model)
    parameters = list(model.parameters())
    if torch.is_grad_enabled() and any(p.requires_grad for p in parameters):
        return _ExactLogPartition.apply(model, max_states, *parameters)
    return exact_moments(model, statistics=False, max_states=max_states)[0]


# -- annealed importance sampling -----------------------------------------------------------------

# A bracket of log(mean weight +- BRACKET_WIDTH standard errors): the usual three standard errors
# (common practice, no source).
BRACKET_WIDTH = 3.0


@dataclass
class Estimate:
    """A stochastic estimate of ``log Z`` from annealed importance sampling.

    Attributes:
        log_z: ``log Z_A + log mean(w)``: unbiased in ``Z``, so on average it underestimates
            ``log Z`` (Jensen's inequality) — the log-likelihoods built on it are optimistic.
        stderr: standard error of ``log_z`` from the spread of the weights (delta method).
        lower, upper: ``log Z_A + log(mean(w) -+ 3 standard errors)``; ``lower = -inf`` when the
            spread is too large for the bracket to mean anything (then :attr:`flagged`).
        log_weights: ``(num_chains,)`` float64 log importance weights.
        log_z_base: the base model's exact ``log Z_A``.
        effective_sample_size: ``(sum w)^2 / sum w^2``, between 1 and ``num_chains``.
        num_betas: number of intermediate distributions, both ends included.
    """

    log_z: float
    stderr: float
    lower: float
    upper: float
    log_weights: Tensor = field(repr=False)
    log_z_base: float
    effective_sample_size: float
    num_betas: int

    @classmethod
    def from_log_weights(cls, log_weights: Tensor, log_z_base: float, num_betas: int) -> Estimate:
        count = log_weights.numel()
        log_mean = float(torch.logsumexp(log_weights, 0)) - math.log(count)
        relative = torch.exp(log_weights - log_mean)  # weights over their mean: average 1
        spread = float(relative.std()) / math.sqrt(count) if count > 1 else math.inf
        log_z = log_z_base + log_mean
        lower = log_z + math.log(1.0 - BRACKET_WIDTH * spread) if BRACKET_WIDTH * spread < 1.0 else -math.inf
        return cls(
            log_z=log_z,
            stderr=spread,
            lower=lower,
            upper=log_z + math.log1p(BRACKET_WIDTH * spread),
            log_weights=log_weights,
            log_z_base=log_z_base,
            effective_sample_size=float(count / relative.square().mean()),
            num_betas=num_betas,
        )

    @property
    def flagged(self) -> bool:
        """True when the bracket is meaningless (``lower == -inf``)."""
        return self.lower == -math.inf

    @property
    def warning(self) -> str | None:
        """Plain words on why the estimate should not be trusted, or ``None``."""
        if not self.flagged:
            return None
        return (
            f"the importance weights spread too widely for a bracket (effective sample size "
            f"{self.effective_sample_size:.1f} of {self.log_weights.numel()}): log Z may be far too low; "
            "use more intermediate distributions (num_betas) or chains"
        )

    def __str__(self) -> str:
        lower = "-inf" if self.flagged else f"{self.lower:.3f}"
        return (
            f"log Z = {self.log_z:.3f} +- {self.stderr:.3f} (bracket [{lower}, {self.upper:.3f}], "
            f"effective sample size {self.effective_sample_size:.1f} of {self.log_weights.numel()}, "
            f"{self.num_betas:,} intermediate distributions)"
        )


def annealing_schedule(num_betas: int, kind: str = "linear") -> Tensor:
    """Inverse temperatures ``0 = beta_0 < ... < beta_{K-1} = 1``, float64 ``(num_betas,)``.

    ``"linear"``: evenly spaced. ``"piecewise"``: evenly spaced within [0, 0.5], [0.5, 0.9] and
    [0.9, 1] with 1/15, 4/15 and 10/15 of the steps — denser near 1, the spacing of "On the
    Quantitative Analysis of Deep Belief Networks" (ICML 2008), from memory.
    """
    num_betas = check_size("num_betas", num_betas)
    if num_betas < 2:
        raise ValueError(f"num_betas must be at least 2 (the base and the model), got {num_betas}")
    if kind == "linear":
        return torch.linspace(0.0, 1.0, num_betas, dtype=torch.float64)
    if kind == "piecewise":
        steps = num_betas - 1
        first = max(1, round(steps / 15))
        second = max(1, round(steps * 4 / 15))
        third = steps - first - second
        if third < 1:
            raise ValueError(f"a piecewise schedule needs num_betas >= 4, got {num_betas}")
        pieces = [
            torch.linspace(0.0, 0.5, first + 1, dtype=torch.float64)[:-1],
            torch.linspace(0.5, 0.9, second + 1, dtype=torch.float64)[:-1],
            torch.linspace(0.9, 1.0, third + 1, dtype=torch.float64),
        ]
        return torch.cat(pieces)
    raise ValueError(f"kind must be 'linear' or 'piecewise', got {kind!r}")


# The uniforms of many annealing steps are drawn at once (two threads fill each block).
UNIFORM_BLOCK = 1 << 20


class _AnnealingPath:
    """The path ``E_beta = (1 - beta) E_A + beta E_B`` between a base model ``A`` of independent
    units (the layers alone, under base parameters ``theta_A``; couplings off) and the model ``B``,
    with the layers ``summed`` (one colour class, no lateral couplings) summed out analytically.

    Every layer term is linear in its parameters, so ``E_beta`` has the layers under the
    interpolated parameters ``theta_beta = (1 - beta) theta_A + beta theta_B`` and the couplings
    scaled by ``beta``: a transition is a Gibbs sweep with those parameters at inverse temperature
    ``beta`` (:func:`gibbs_sweep`). Over the kept layers ``K`` the unnormalised log-probability is
    ``log f_beta(x_K) = -U_A(x_K) + beta * g(x_K) + sum_s log_partition_s(beta * u_s; theta_beta)``
    with ``U_A`` the kept layers' base terms, ``g = U_A - U_B - C_K`` (``C_K`` the couplings within
    ``K``) and ``u_s`` the input the kept layers send to summed layer ``s``. The log-partition terms
    are evaluated in float64, so the small per-step differences of a long run keep their digits.
    """

    def __init__(self, model: EnergyModel, base: dict[str, Tensor]) -> None:
        self.model = model
        self.summed = _summed_class(model)
        self.kept = [i for i in range(len(model.sizes)) if i not in self.summed]
        self.target = {name: p.detach() for name, p in model.named_parameters() if name in base}
        self.base = base
        self.wide_model = {name: p.detach().to(torch.float64) for name, p in model.named_parameters()}
        self.wide_base = {name: value.to(torch.float64) for name, value in base.items()}
        self._interpolated: dict[tuple[float, bool], dict[str, Tensor]] = {}
        self._zero_inputs: dict[tuple[int, float], tuple[Tensor, Tensor]] = {}
        with substituted(model, {**self.wide_model, **self.wide_base}):
            self.log_z_base = float(
                sum(layer.log_partition(_zeros(1, layer, torch.float64)).sum() for layer in model.layers)
            )

    def layer_parameters(self, beta: float, wide: bool = False) -> dict[str, Tensor]:
        """The layers' parameters at ``beta`` (in float64 when ``wide``; the last few kept)."""

        def interpolate() -> dict[str, Tensor]:
            target = {name: self.wide_model[name] for name in self.base} if wide else self.target
            base = self.wide_base if wide else self.base
            if beta == 1.0:
                return target
            return {name: (1.0 - beta) * base[name] + beta * value for name, value in target.items()}

        return _recent(self._interpolated, (beta, wide), interpolate)

    def draw_base(self, num_chains: int, generator: torch.Generator) -> list[Tensor | None]:
        """Kept layers drawn from the base model (each layer alone); summed layers are ``None``."""
        states: list[Tensor | None] = [None] * len(self.model.layers)
        dtype = self.model.dtype
        with substituted(self.model, self.base):
            for i in self.kept:
                layer = self.model.layers[i]
                states[i] = layer.sample(_zeros(num_chains, layer, dtype), generator)
        return states

    def terms(self, states: list[Tensor | None]) -> _Terms:
        """What ``log f_beta`` of the current kept states needs at any beta (one product per
        coupling into the summed layers)."""
        model = self.model
        inputs = {s: model.input_or_zeros(states, s) for s in self.summed}
        wide = {i: states[i].to(torch.float64) for i in self.kept}
        with substituted(model, {**self.wide_model, **self.wide_base}):
            base_term = sum(model.layers[i].energy(wide[i]) for i in self.kept)
        with substituted(model, self.wide_model):
            model_term = model.joint_energy(wide)
        return _Terms(inputs, -base_term, base_term - model_term)

    def _log_partitions(self, beta: float, inputs: dict[int, Tensor]) -> Tensor | float:
        """``sum_s log_partition_s(beta * u_s; theta_beta)`` ``(B,)`` in float64 over the summed layers
        ``s`` of ``inputs`` (``{s: u_s}``)."""
        model, total = self.model, 0.0
        with substituted(model, self.layer_parameters(beta, wide=True)):  # only the layers' terms
            for s, u in inputs.items():
                total = total + model.layers[s].log_partition(beta * u.to(torch.float64))
        return total

    def log_f(self, beta: float, terms: _Terms) -> Tensor:
        """``log f_beta`` ``(B,)`` float64 of the states ``terms`` were computed from."""
        return terms.base + beta * terms.shift + self._log_partitions(beta, terms.inputs)

    def log_ratio(self, beta: float, other: float, terms: _Terms) -> Tensor:
        """``log f_beta - log f_other`` ``(B,)`` float64 (the base term cancels)."""
        total, generic = (beta - other) * terms.shift, {}
        for s, u in terms.inputs.items():
            if has_logits(self.model.layers[s]):
                total = total + self._log_partition_change(s, u, beta, other)
            else:
                generic[s] = u
        if generic:
            total = total + self._log_partitions(beta, generic) - self._log_partitions(other, generic)
        return total

    def _log_partition_change(self, s: int, u: Tensor, beta: float, other: float) -> Tensor:
        """``log_partition_s(beta * u; theta_beta) - log_partition_s(other * u; theta_other)`` ``(B,)``
        float64, for a layer of 0/1 units (one with ``logits``).

        Independent 0/1 units have ``logits(input) = input + logits(0)`` and ``log_partition(input) =
        sum_j softplus(logits_j(input)) + c`` with ``c = -sum_j U_j(0)``, and
        ``softplus(a) - softplus(b) = log1p(sigmoid(b) * expm1(a - b))`` (mathematics). The step
        ``a - b = (beta - other) * u + logits_beta(0) - logits_other(0)`` is formed without
        subtracting two large numbers, so the functions keep each term's relative accuracy in the
        model's dtype: a fraction of the cost of two float64 softplus passes on this CPU.
        """
        (offset, constant), (other_offset, other_constant) = (self._zero_input(s, b) for b in (beta, other))
        dtype = self.model.dtype
        step = torch.add((offset - other_offset).to(dtype), u, alpha=beta - other)
        logits = torch.add(other_offset.to(dtype), u, alpha=other)
        change = torch.log1p_(logits.sigmoid_().mul_(step.expm1_()))
        return change.sum(-1, dtype=torch.float64) + (constant - other_constant)

    def _zero_input(self, s: int, beta: float) -> tuple[Tensor, Tensor]:
        """Layer ``s``'s logits ``(1, n)`` and ``c`` ``(1,)`` under no input at ``beta``, float64
        (the last few kept)."""

        def evaluate() -> tuple[Tensor, Tensor]:
            layer = self.model.layers[s]
            zero = torch.zeros(1, layer.size, dtype=torch.float64)
            with substituted(self.model, self.layer_parameters(beta, wide=True)):
                logits = layer.logits(zero).detach()
                return logits, (layer.log_partition(zero) - softplus(logits).sum(-1)).detach()

        return _recent(self._zero_inputs, (s, beta), evaluate)

    def transition(
        self, beta: float, states: list[Tensor | None], terms: _Terms, generator: F.Uniforms
    ) -> None:
        """One Gibbs sweep leaving ``p_beta`` invariant (``beta > 0``): the summed layers drawn
        from their conditional given the kept ones (``terms`` of the current states), then the
        kept layers by colour class."""
        model, parameters = self.model, self.layer_parameters(beta)
        with substituted(model, parameters):
            for s, u in terms.inputs.items():
                layer = model.layers[s]
                source = generator if getattr(layer, "takes_uniform_blocks", False) else generator.generator
                states[s] = layer.sample(beta * u if beta != 1.0 else u, source)
        gibbs_sweep(
            model, states, generator, clamped=self.summed, parameters=parameters, inverse_temperature=beta
        )


def _recent(cache: dict[Hashable, T], key: Hashable, make: Callable[[], T]) -> T:
    """``cache[key]``, made by ``make()`` when missing; only the last few entries are kept (the
    oldest goes first: dicts keep insertion order), as each beta is asked for by two successive
    annealing steps."""
    if key not in cache:
        if len(cache) >= 6:
            del cache[next(iter(cache))]
        cache[key] = make()
    return cache[key]


def _zeros(batch: int, layer, dtype: torch.dtype) -> Tensor:
    return torch.zeros(batch, layer.size, dtype=dtype)


@dataclass
class _Terms:
    inputs: dict[int, Tensor]  # u_s in the model's dtype
    base: Tensor  # -U_A(x_K), (B,) float64
    shift: Tensor  # g(x_K), (B,) float64


def _annealing(
    model: EnergyModel, data, base: str | None, schedule, num_betas: int, generator: torch.Generator | None
) -> tuple[list[float], _AnnealingPath, torch.Generator]:
    """What a forward or reverse run needs: the betas, the path and the generator (all checked)."""
    betas = _check_schedule(schedule, num_betas).tolist()
    return betas, _AnnealingPath(model, _base_parameters(model, data, base)), resolve_generator(generator)


def can_reverse_anneal(model: EnergyModel) -> bool:
    """Whether :func:`reverse_ais_log_likelihood` applies: two colour classes, no lateral couplings
    (the marginal chain on the kept layers is then reversible)."""
    return len(model.schedule.classes) == 2 and not model.schedule.unitwise


def _summed_class(model: EnergyModel) -> tuple[int, ...]:
    """The colour class summed out along the path: the first without observed layers and without
    lateral couplings (the hidden layer of an RBM, the odd layers of a chain); else any class
    without lateral couplings; else none."""
    classes = [c for c in model.schedule.classes if not set(c) & model.schedule.unitwise]
    hidden = [c for c in classes if not set(c) & set(model.observed)]
    return (hidden or classes or [()])[0]


def _base_parameters(model: EnergyModel, data: object, base: str | None) -> dict[str, Tensor]:
    """The base model's layer parameters, keyed like ``model.named_parameters()``: each layer's own
    base (:meth:`EnergyModel.base_parameters`: zero biases), and with ``base="data"`` the observed
    layers fitted to ``data`` (binary units: the log-odds of the base rates)."""
    if base is None:
        base = "uniform" if data is None else "data"
    if base == "uniform":
        return model.base_parameters()
    if base != "data":
        raise ValueError(f"base must be 'data' or 'uniform', got {base!r}")
    if data is None:
        raise ValueError("base='data' needs data= (training data for the base rates); or pass base='uniform'")
    return model.base_parameters(model.clamped(model.checked("data", data, convert=True)))


def _check_schedule(schedule, num_betas: int) -> Tensor:
    if schedule is None or isinstance(schedule, str):
        return annealing_schedule(num_betas, "linear" if schedule is None else schedule)
    betas = torch.as_tensor(schedule, dtype=torch.float64).detach().cpu()
    if betas.ndim != 1 or betas.numel() < 2:
        raise ValueError(
            f"schedule must be a 1-D sequence of at least 2 betas, got shape {tuple(betas.shape)}"
        )
    if betas[0] != 0.0 or betas[-1] != 1.0:
        raise ValueError(f"schedule must run from 0 to 1, got {betas[0].item()} ... {betas[-1].item()}")
    steps = betas[1:] - betas[:-1]
    if not bool((steps > 0).all()):
        k = int(torch.nonzero(steps <= 0)[0])
        raise ValueError(
            f"schedule must increase strictly, got {betas[k].item()} then {betas[k + 1].item()} "
            f"at index {k + 1}"
        )
    return betas


@torch.no_grad()
def ais_log_partition(
    model: EnergyModel,
    *,
    num_chains: int = 100,
    num_betas: int = 10_000,
    data: Tensor | None = None,
    base: str | None = None,
    schedule: str | Sequence[float] | Tensor | None = None,
    generator: torch.Generator | None = None,
    progress: bool = True,
) -> Estimate:
    """Estimate ``log Z`` by annealed importance sampling ("Annealed Importance Sampling", Neal,
    Statistics and Computing, 2001; for RBMs "On the Quantitative Analysis of Deep Belief
    Networks", ICML 2008).

    ``num_chains`` independent runs anneal from a base model of independent units (visible
    biases the log-odds of ``data``'s base rates when ``base="data"``, zero when
    ``base="uniform"``; hidden biases zero; its ``log Z_A`` is exact) to the model along
    ``E_beta = (1 - beta) E_A + beta E_B``. One colour class (the hidden layer of an RBM, the odd
    layers of a chain) is summed out analytically at every step; the others move by Gibbs sweeps
    that leave each intermediate distribution invariant. Log-weights are accumulated in float64.

    Args:
        model: the :class:`EnergyModel`.
        num_chains: number of annealing runs (importance weights).
        num_betas: number of intermediate distributions, both ends included (linear spacing).
        data: ``(N, n_0)`` training data (an observation) for the base model's observed layers
            (``base="data"``: binary units at the base rates, Gaussian units at the data's mean,
            categorical ones at its frequencies).
        base: ``"data"`` or ``"uniform"``; default ``"data"`` when ``data`` is given, else
            ``"uniform"`` (an AIS without data works, usually with a wider bracket).
        schedule: ``"linear"`` (default), ``"piecewise"`` (see :func:`annealing_schedule`), or an
            explicit sequence of betas increasing strictly from 0 to 1 (then it sets the number
            of intermediate distributions and ``num_betas`` is not used).
        generator: the ``torch.Generator`` of every draw.
        progress: show a tqdm bar.

    Returns:
        an :class:`Estimate` with the bracket, standard error and effective sample size.
    """
    check_model(model)
    num_chains = check_size("num_chains", num_chains)
    betas, path, generator = _annealing(model, data, base, schedule, num_betas, generator)
    states = path.draw_base(num_chains, generator)
    log_weights = torch.zeros(num_chains, dtype=torch.float64)
    uniforms = F.Uniforms(generator, model.dtype, UNIFORM_BLOCK)
    with tqdm(total=len(betas) - 1, desc="annealing", unit="beta", disable=not progress, miniters=100) as bar:
        for previous, beta in zip(betas[:-1], betas[1:]):
            terms = path.terms(states)
            log_weights += path.log_ratio(beta, previous, terms)
            if beta < 1.0:
                path.transition(beta, states, terms, uniforms)
            bar.update()
    return Estimate.from_log_weights(log_weights, path.log_z_base, len(betas))


def _start_from_mean_field(
    model: EnergyModel,
    v: Tensor,
    started: Sequence[int],
    states: list[Tensor | None],
    num_chains: int,
    generator: torch.Generator,
) -> Tensor:
    """Draw the ``started`` layers (mutually uncoupled) of the reverse chains; return the
    log-probability ``(B * num_chains,)`` float64 of the draws under the proposal.

    The proposal is each layer's own conditional given the mean-field marginals of its neighbours,
    in float64 (binary units: independent units at the mean-field marginals themselves). Its
    support is every state, as an importance sampler needs.
    """
    marginals, dtype = MeanField(model)(v), model.dtype
    wide = {name: p.detach().to(torch.float64) for name, p in model.named_parameters()}
    log_q = torch.zeros(v.shape[0] * num_chains, dtype=torch.float64)
    with substituted(model, wide):
        source = {j: x.detach().to(torch.float64) for j, x in enumerate(marginals)}
        for i in started:
            layer = model.layers[i]
            input = model.input_or_zeros(source, i).repeat_interleave(num_chains, 0)
            x = layer.sample(input, generator)
            log_q += layer.log_probability(x, input)
            states[i] = x.to(dtype)
    return log_q


@torch.no_grad()
def reverse_ais_log_likelihood(
    model: EnergyModel,
    v: Tensor,
    *,
    num_chains: int = 1,
    num_betas: int = 10_000,
    data: Tensor | None = None,
    base: str | None = None,
    schedule: str | Sequence[float] | Tensor | None = None,
    generator: torch.Generator | None = None,
    progress: bool = True,
) -> Tensor:
    """Conservative per-example estimates of ``log p(v)`` by reverse annealing ("Accurate and
    Conservative Estimates of MRF Log-likelihood using Reverse Annealing", AISTATS 2015).

    Each example starts a chain at the data itself and anneals from the model back to the base
    model of :func:`ais_log_partition` with the same transitions in reverse order. The weight is
    unbiased for the probability that the forward annealing process generates ``v``, so its
    log is on average *below* that log-probability (Jensen's inequality), which approaches
    ``log p(v)`` as ``num_betas`` grows: a conservative counterpart of the optimistic
    ``-F(v) - log Z`` built on forward AIS. Needs a model with two colour classes and no lateral
    couplings (an RBM, a chain, any bipartite layer graph). Layers summed out analytically need
    no start; the other hidden layers (the even layers of a chain) start from the mean-field
    posterior, whose probability enters the weight, so the estimate stays valid.

    Args:
        model: the :class:`EnergyModel`.
        v: ``(B, n_0)`` examples (an observation, see :class:`EnergyModel`).
        num_chains: reverse chains per example (their weights are averaged).
        num_betas, data, base, schedule, generator, progress: as in :func:`ais_log_partition`.

    Returns:
        ``(B,)`` float64 estimates of ``log p(v)``, detached.
    """
    check_model(model)
    v = model.checked("v", v)
    num_chains = check_size("num_chains", num_chains)
    if not can_reverse_anneal(model):
        raise ValueError(
            f"reverse annealing needs two colour classes without lateral couplings (an RBM, a chain), "
            f"got classes {model.schedule.classes} and lateral layers {sorted(model.schedule.unitwise)}"
        )
    betas, path, generator = _annealing(model, data, base, schedule, num_betas, generator)
    if set(path.summed) & set(model.observed):
        raise ValueError(
            f"reverse annealing keeps the observed layers {list(model.observed)}, but every colour "
            f"class without lateral couplings holds one of them (classes {model.schedule.classes})"
        )
    states: list[Tensor | None] = [None] * len(model.sizes)
    for i, x in model.clamped(v.detach()).items():
        states[i] = x.repeat_interleave(num_chains, 0)
    log_weights = torch.zeros(v.shape[0] * num_chains, dtype=torch.float64)
    started = [i for i in path.kept if i not in model.observed]
    if started:
        log_weights -= _start_from_mean_field(model, v, started, states, num_chains, generator)
    terms = path.terms(states)
    log_weights += path.log_f(1.0, terms) - path.log_z_base
    uniforms = F.Uniforms(generator, model.dtype, UNIFORM_BLOCK)
    with tqdm(
        total=len(betas) - 1, desc="reverse annealing", unit="beta", disable=not progress, miniters=100
    ) as bar:
        for beta, lower in zip(betas[:0:-1], betas[-2::-1]):
            path.transition(beta, states, terms, uniforms)
            terms = path.terms(states)
            log_weights += path.log_ratio(lower, beta, terms)
            bar.update()
    per_example = log_weights.view(-1, num_chains)
    return torch.logsumexp(per_example, 1) - math.log(num_chains)
