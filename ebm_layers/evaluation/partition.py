"""Partition functions: exact enumeration for small models, annealed importance sampling for the rest."""

from __future__ import annotations

import math
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field

import torch
from torch import Tensor
from torch.autograd.function import once_differentiable
from torch.nn.functional import softplus
from tqdm.auto import tqdm

from .._checks import check_batch, check_model, check_size
from .._random import resolve_generator
from ..model import functional as F
from ..model.energy_model import EnergyModel
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


class _ExactLogPartition(torch.autograd.Function):
    """``log Z`` with the gradient d log Z / d theta = <-dE/d theta>_model, from one enumeration.

    The backward reuses the exact statistics gathered in the forward pass instead of keeping
    every chunk's graph, so memory stays bounded however many states are enumerated.
    """

    @staticmethod
    def forward(ctx, model: EnergyModel, max_states: int, *parameters: Tensor) -> Tensor:
        log_z, ctx.stats = exact_moments(model, max_states=max_states)
        ctx.edges, ctx.dtypes = model.edges, [p.dtype for p in parameters]
        return log_z

    @staticmethod
    @once_differentiable
    def backward(ctx, grad: Tensor):
        stats = ctx.stats
        # -E contains b.x, x_a W x_b^T, and 1/2 x L x^T for a lateral L (taken entrywise).
        pair_grads = [p * 0.5 if a == b else p for p, (a, b) in zip(stats.pairs, ctx.edges)]
        grads = [grad * g for g in stats.means + pair_grads]
        return (None, None, *(g.to(dtype) for g, dtype in zip(grads, ctx.dtypes)))


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
    parameters = [*model.biases(), *model.weights()]
    if torch.is_grad_enabled() and any(p.requires_grad for p in parameters):
        return _ExactLogPartition.apply(model, max_states, *parameters)
    return exact_moments(model, statistics=False, max_states=max_states)[0]


# -- annealed importance sampling -----------------------------------------------------------------

# A bracket of log(mean weight +- BRACKET_WIDTH standard errors): the usual three standard errors
# (common practice, no source).
BRACKET_WIDTH = 3.0
# Base rates of the data are clipped to [RATE_CLIP, 1 - RATE_CLIP]: a unit constant in the data
# would otherwise get an infinite base bias.
RATE_CLIP = 1e-3


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
    """The path ``E_beta = (1 - beta) E_A + beta E_B`` between independent units (``A``, biases
    ``a``) and the model (``B``), with the layers ``summed`` (one colour class, no lateral
    couplings) summed out analytically.

    ``E_beta = beta * E'`` where ``E'`` is the model's energy with biases ``b + (1 - beta) / beta * a``,
    so a transition is a Gibbs sweep of the model at inverse temperature ``beta`` with those biases.
    Over the kept layers ``K`` the unnormalised log-probability is
    ``log f_beta(x_K) = a.x_K + beta * g(x_K) + sum_s sum_j softplus(beta * u_sj + (1 - beta) a_sj)``
    with ``g = (b - a).x_K - (couplings within K)`` and ``u_s = b_s + input_s(x_K)``.
    """

    def __init__(self, model: EnergyModel, base_biases: list[Tensor]) -> None:
        self.model = model
        self.summed = _summed_class(model)
        self.kept = [i for i in range(len(model.sizes)) if i not in self.summed]
        self.base_biases = base_biases
        self.biases = [b.detach() for b in model.biases()]
        self.weights = [w.detach() for w in model.weights()]
        wide = torch.float64
        self.base64 = [a.to(wide) for a in base_biases]
        self.shift64 = [(b.to(wide) - a) for b, a in zip(self.biases, self.base64)]
        self.kept_couplings = [
            (edge, w.to(wide))
            for edge, w in zip(model.edges, self.weights)
            if edge[0] in self.kept and edge[1] in self.kept
        ]
        self.log_z_base = float(sum(softplus(a).sum() for a in self.base64))

    def draw_base(self, num_chains: int, generator: torch.Generator) -> list[Tensor | None]:
        """Kept layers drawn from the base model (independent units); summed layers are ``None``."""
        states: list[Tensor | None] = [None] * len(self.biases)
        for i in self.kept:
            probabilities = torch.sigmoid(self.base_biases[i]).expand(num_chains, -1)
            states[i] = torch.bernoulli(probabilities, generator=generator)
        return states

    def terms(self, states: list[Tensor | None]) -> _Terms:
        """What ``log f_beta`` of the current kept states needs at any beta (one product per
        coupling into the summed layers)."""
        inputs = {
            s: F.layer_logits(states, s, self.biases, self.weights, self.model.edges) for s in self.summed
        }
        wide = {i: states[i].to(torch.float64) for i in self.kept}
        shift = sum(wide[i] @ self.shift64[i] for i in self.kept)
        for edge, weight in self.kept_couplings:
            shift = shift - F.pair_energy(edge, weight, wide)
        return _Terms(wide, shift, inputs)

    def _summed_logits(self, beta: float, s: int, u: Tensor) -> Tensor:
        """``beta * u_s + (1 - beta) * a_s``: the logits of summed layer ``s`` at ``beta``."""
        return u if beta == 1.0 else beta * u + (1.0 - beta) * self.base_biases[s]

    def log_f(self, beta: float, terms: _Terms) -> Tensor:
        """``log f_beta`` ``(B,)`` float64 of the states ``terms`` were computed from."""
        total = sum(terms.wide[i] @ self.base64[i] for i in self.kept) + beta * terms.shift
        for s, u in terms.inputs.items():
            total = total + softplus(self._summed_logits(beta, s, u).to(torch.float64)).sum(-1)
        return total

    def log_ratio(self, beta: float, other: float, terms: _Terms) -> Tensor:
        """``log f_beta - log f_other`` ``(B,)`` float64: the ``a.x_K`` term cancels.

        Per summed unit ``softplus(x) - softplus(x + e)`` with ``x`` the logit at ``beta`` and
        ``e = (other - beta)(u - a)``, computed by :func:`_softplus_drop` in the model's dtype
        without the cancellation of subtracting two softplus values. Keeps the summed layers'
        probabilities at ``beta`` in ``terms`` for a transition at the same ``beta``.
        """
        total = (beta - other) * terms.shift
        terms.beta, terms.probabilities = beta, {}
        for s, u in terms.inputs.items():
            x = self._summed_logits(beta, s, u)
            probability = torch.sigmoid(x)
            terms.probabilities[s] = probability
            total = total + _softplus_drop(x, (other - beta) * (u - self.base_biases[s]), probability)
        return total

    def transition(
        self, beta: float, states: list[Tensor | None], terms: _Terms, generator: F.Uniforms
    ) -> None:
        """One Gibbs sweep leaving ``p_beta`` invariant (``beta > 0``): the summed layers drawn
        from their conditional given the kept ones (``terms`` of the current states), then the
        kept layers by colour class."""
        for s, u in terms.inputs.items():
            if terms.beta == beta:
                states[s] = F.sample_bernoulli(terms.probabilities[s], generator)
            else:
                states[s] = F.bernoulli(self._summed_logits(beta, s, u), generator)
        tilted = [b + ((1.0 - beta) / beta) * a for b, a in zip(self.biases, self.base_biases)]
        gibbs_sweep(
            self.model, states, generator, clamped=self.summed, biases=tilted, inverse_temperature=beta
        )


# _softplus_drop uses log1p / expm1 while |e| stays below this (the argument of log1p then stays
# above e^-1 - 1, far from -1); beyond it the plain float64 difference is accurate enough.
_DROP_LIMIT = 1.0


def _softplus_drop(x: Tensor, e: Tensor, probability: Tensor) -> Tensor:
    """``sum_j softplus(x_j) - softplus(x_j + e_j)`` per row ``(B,)`` float64, given
    ``probability = sigmoid(x)``.

    The identity ``softplus(x) - softplus(x + e) = -log1p(sigmoid(x) * expm1(e))`` (from memory;
    it is ``log((1 + e^x) / (1 + e^(x + e)))`` rearranged) keeps every operation's relative
    accuracy, so even float32 gives the small per-step differences of a long annealing run to
    about 1e-7 of their size, where subtracting two float32 softplus values would lose all of it.
    """
    low, high = torch.aminmax(e)
    if max(-float(low), float(high)) <= _DROP_LIMIT:
        return torch.log1p(probability * torch.expm1(e)).sum(-1, dtype=torch.float64).neg_()
    x, e = x.to(torch.float64), e.to(torch.float64)
    return (softplus(x) - softplus(x + e)).sum(-1)


@dataclass
class _Terms:
    wide: dict[int, Tensor]  # the kept states in float64
    shift: Tensor  # g(x_K), (B,) float64
    inputs: dict[int, Tensor]  # u_s in the model's dtype
    beta: float | None = None  # the beta of ``probabilities``, set by log_ratio
    probabilities: dict[int, Tensor] = field(default_factory=dict)  # the summed layers' at ``beta``


def _annealing(
    model: EnergyModel, data, base: str | None, schedule, num_betas: int, generator: torch.Generator | None
) -> tuple[list[float], _AnnealingPath, torch.Generator]:
    """What a forward or reverse run needs: the betas, the path and the generator (all checked)."""
    betas = _check_schedule(schedule, num_betas).tolist()
    return betas, _AnnealingPath(model, _base_biases(model, data, base)), resolve_generator(generator)


def can_reverse_anneal(model: EnergyModel) -> bool:
    """Whether :func:`reverse_ais_log_likelihood` applies: two colour classes, no lateral couplings
    (the marginal chain on the kept layers is then reversible)."""
    return len(model.schedule.classes) == 2 and not model.schedule.unitwise


def _summed_class(model: EnergyModel) -> tuple[int, ...]:
    """The colour class summed out along the path: the first without layer 0 and without lateral
    couplings (the hidden layer of an RBM, the odd layers of a chain); else any class without
    lateral couplings; else none."""
    classes = [c for c in model.schedule.classes if not set(c) & model.schedule.unitwise]
    hidden = [c for c in classes if 0 not in c]
    return (hidden or classes or [()])[0]


def _base_biases(model: EnergyModel, data: Tensor | None, base: str | None) -> list[Tensor]:
    """Biases of the base model: visible log-odds of the data's base rates (or zero), hidden zero."""
    biases = [torch.zeros_like(b.detach()) for b in model.biases()]
    if base is None:
        base = "uniform" if data is None else "data"
    if base == "uniform":
        return biases
    if base != "data":
        raise ValueError(f"base must be 'data' or 'uniform', got {base!r}")
    if data is None:
        raise ValueError("base='data' needs data= (training data for the base rates); or pass base='uniform'")
    data = check_batch("data", data, model.sizes[0])
    rates = data.detach().to(torch.float64).mean(0)
    clipped = rates.clamp(RATE_CLIP, 1.0 - RATE_CLIP)
    outside = int((clipped != rates).sum())
    if outside:
        warnings.warn(
            f"{outside} visible units have base rates outside [{RATE_CLIP}, {1 - RATE_CLIP}] in data "
            "(constant units); clipped for the base model",
            stacklevel=5,  # the caller of ais_log_partition (behind _annealing and the no_grad wrapper)
        )
    biases[0] = torch.logit(clipped).to(biases[0].dtype)
    return biases


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
        data: ``(N, n_0)`` training data for the base rates (``base="data"``).
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


# Mean-field proposal probabilities are kept inside [PROPOSAL_CLIP, 1 - PROPOSAL_CLIP] so that
# every hidden state can be proposed (an importance sampler needs full support).
PROPOSAL_CLIP = 1e-3


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
        v: ``(B, n_0)`` binary examples.
        num_chains: reverse chains per example (their weights are averaged).
        num_betas, data, base, schedule, generator, progress: as in :func:`ais_log_partition`.

    Returns:
        ``(B,)`` float64 estimates of ``log p(v)``, detached.
    """
    check_model(model)
    v = check_batch("v", v, model.sizes[0], dtype=model.dtype)
    num_chains = check_size("num_chains", num_chains)
    if not can_reverse_anneal(model):
        raise ValueError(
            f"reverse annealing needs two colour classes without lateral couplings (an RBM, a chain), "
            f"got classes {model.schedule.classes} and lateral layers {sorted(model.schedule.unitwise)}"
        )
    betas, path, generator = _annealing(model, data, base, schedule, num_betas, generator)
    states: list[Tensor | None] = [None] * len(model.sizes)
    states[0] = v.detach().repeat_interleave(num_chains, 0)
    log_weights = torch.zeros(states[0].shape[0], dtype=torch.float64)
    started = [i for i in path.kept if i != 0]
    if started:
        marginals = MeanField(model)(v)
        for i in started:
            probabilities = (
                marginals[i].clamp(PROPOSAL_CLIP, 1.0 - PROPOSAL_CLIP).repeat_interleave(num_chains, 0)
            )
            states[i] = torch.bernoulli(probabilities, generator=generator)
            log_weights -= F.bernoulli_log_probability(states[i], probabilities)
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
