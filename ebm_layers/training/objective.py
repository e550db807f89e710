"""TwoPhaseObjective: data statistics and model statistics turned into gradients for any optimizer."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Protocol, runtime_checkable

import torch
from torch import Tensor, nn

from .._buffers import buffer_family, register_buffer_family
from .._checks import check_model, check_range
from ..evaluation.prediction import check_discriminative, log_conditional
from ..model.couplings import DenseCoupling, LateralCoupling
from ..model.energy_model import EnergyModel
from ..model.statistics import Statistics
from ..model.units import BinaryLayer
from ..phases.defaults import default_negative, default_positive
from .distributed import on_any_rank, rank_average

__all__ = ["Monitors", "Phase", "TwoPhaseObjective", "weight_decay_groups"]


@runtime_checkable
class Phase(Protocol):
    """What the objective asks of a phase: its model, and statistics of a batch.

    ``statistics(v, **kwargs)`` returns :class:`Statistics` (keyed like the model's parameters); the
    negative phase receives the batch too (contrastive divergence starts from it) and may ignore
    it. Optional: ``after_step(difference)``, called with the data-minus-model Statistics once the
    divergence guard has accepted a step.
    """

    model: EnergyModel

    def statistics(self, v: Tensor, **kwargs) -> Statistics: ...


class TwoPhaseObjective(nn.Module):
    r"""The maximum-likelihood learning rule of a Boltzmann machine as a loss for any torch loop.

    ``loss = objective(v)`` gathers the positive (data) statistics of the batch and the negative
    (model) statistics, then returns a surrogate whose gradient with respect to every bias and
    weight is exactly minus their difference:
    :math:`-(\langle x_l\rangle_{data} - \langle x_l\rangle_{model})` for a bias :math:`b_l`,
    :math:`-(\langle x_a^\top x_b\rangle_{data} - \langle x_a^\top x_b\rangle_{model})` for a weight
    (half of it for a lateral weight, whose energy term carries 1/2). That is the gradient of the
    average negative log-likelihood when both phases are exact, so ``loss.backward()`` followed by
    any ``torch.optim`` step, scheduler or gradient clipping performs the learning rule.

    The surrogate is linear in the parameters with the detached differences as coefficients:
    its backward is elementwise and costs no matrix product. **Its value is not a progress
    measure** (it is not the log-likelihood and can move either way while the model improves);
    watch :attr:`last` instead.

    Args:
        model: the :class:`EnergyModel` to train; registered as a submodule.
        positive: the data phase, a :class:`MeanField` (default ``MeanField(model)``) or
            :class:`DataParticles` (then call ``objective(v, index=idx)``).
        negative: the model phase, a :class:`PersistentSampler` (default
            ``PersistentSampler(model)``) or :class:`ExactStatistics`.
        sparsity_target: off by default. A target mean activation ``p`` of every hidden unit: a
            running average ``q`` of each hidden unit's data mean is kept (``sparsity_decay``)
            and ``sparsity_cost * (q - p)`` is added to the gradient of its bias and, times the
            data mean of the units on the other side, of the dense weights into it ("A Practical
            Guide to Training Restricted Boltzmann Machines", UTML TR 2010-003, 2010, section 11).
            Lateral weights get no sparsity term.
        sparsity_cost, sparsity_decay: the strength of that term and the decay of the running average.
        centering: off by default. Train in the centered parametrisation: the energy is written
            with every unit shifted by an offset, :math:`-\sum_l b'_l \cdot (x_l - c_l) - \sum
            (x_a - c_a) W (x_b - c_b)^\top`, whose likelihood gradient is better conditioned
            ("Deep Boltzmann Machines and the Centering Trick", Neural Networks: Tricks of the
            Trade, 2012; "How to Center Deep Boltzmann Machines", JMLR 2016). The weight gradient
            becomes the difference of centered covariances and every bias gradient loses
            ``W``-gradient times the offsets of its neighbours, so the step is the centered one
            mapped back onto the ordinary ``bias``/``weight``: the model (and sampler, mean field,
            AIS, enumeration) keeps its ordinary energy and never sees the offsets. That is the
            centered step for gradient descent (SGD, with or without momentum); an adaptive
            optimizer such as Adam rescales bias and weight gradients separately, so the bias
            compensation no longer matches the weight step (on a 64-100-50 chain it made every
            hidden unit stick; see DEVELOPERS.md): use SGD with centering.
            Sparsity is refused with centering (its term is written for the ordinary
            parametrisation), and so is weight decay in :func:`~ebm_layers.train.fit`: an
            optimizer decays the ordinary parameters, not the centered ones (a decay of ``W``
            moves the centered biases); in your own loop, leave ``weight_decay`` at zero.
        offset_decay: the offsets ``c`` are running means, updated after every step towards the
            average of the data and model means (as the JMLR paper recommends):
            ``c <- offset_decay * c + (1 - offset_decay) * (data mean + model mean) / 2``;
            ``1.0`` keeps them fixed.
        data: with ``centering``, training data ``(N, n_0)``: the visible offsets start at its
            mean (:meth:`init_offsets`; ``fit`` does this with its own data when not given).
        discriminative_layer: an observed layer (a label layer) whose exact conditional given the
            other observed layers is also trained: ``discriminative_weight`` times the mean of
            ``-log p(x_layer | the others)`` (:func:`conditional_log_likelihood`) is added to the
            loss, by autograd: the hybrid objective of "Classification using Discriminative
            Restricted Boltzmann Machines" (ICML 2008), there with the generative part weighted
            instead (the same up to the learning rate). Needs a closed-form free energy and a
            layer that lists its states.
        discriminative_weight: the weight of that term (default 1).
        max_weight: divergence guard. Before the statistics of a step are used, every parameter
            must be finite and every weight at most ``max_weight`` in magnitude, and the statistics
            and loss must be finite; otherwise ``FloatingPointError`` is raised before any gradient
            is written, so no non-finite value ever reaches the weights.

    Shape:
        - ``objective(v, index=None)``: ``v`` ``(B, n_0)``, ``index`` ``(B,)`` example indices
          (only with :class:`DataParticles`); returns a 0-d tensor.

    Attributes:
        last: the :class:`Monitors` of the latest call (``None`` before the first).
        sparsity_mean_<i>: buffer ``(n_i,)``, the running hidden means ``q`` (with ``sparsity_target``).
        offset_<i>: buffer ``(n_i,)`` of every layer, the centering offsets ``c`` (with
            ``centering``), starting at 0.5 (the visible ones at the data's mean when known).

    Examples::

        >>> import ebm_layers as el
        >>> g = torch.Generator().manual_seed(0)
        >>> model = el.rbm(6, 3, generator=g)
        >>> sampler = el.PersistentSampler(model, generator=g)
        >>> objective = el.TwoPhaseObjective(model, el.MeanField(model), sampler)
        >>> optimizer = torch.optim.SGD(model.parameters(), lr=0.1)
        >>> v = torch.bernoulli(torch.full((8, 6), 0.5), generator=g)
        >>> loss = objective(v)
        >>> loss.backward(); optimizer.step()
        >>> objective.last.pair_gaps[0] > 0
        True
    """

    def __init__(
        self,
        model: EnergyModel,
        positive: Phase | None = None,
        negative: Phase | None = None,
        *,
        sparsity_target: float | None = None,
        sparsity_cost: float = 0.1,
        sparsity_decay: float = 0.9,
        centering: bool = False,
        offset_decay: float = 0.99,
        data: Tensor | None = None,
        max_weight: float = 1e4,
        discriminative_layer: int | None = None,
        discriminative_weight: float = 1.0,
    ) -> None:
        super().__init__()
        check_model(model)
        positive = default_positive(model) if positive is None else positive
        negative = default_negative(model) if negative is None else negative
        for name, phase in (("positive", positive), ("negative", negative)):
            if not callable(getattr(phase, "statistics", None)) or not hasattr(phase, "model"):
                raise TypeError(
                    f"{name} must be a phase: an object with .model and .statistics(v, **kwargs), "
                    f"got {type(phase).__name__}"
                )
            if phase.model is not model:
                raise ValueError(f"{name} belongs to another model than the one given; build it from `model`")
        if centering or sparsity_target is not None:
            _check_built_in(model, "centering" if centering else "sparsity_target")
        if sparsity_target is not None:
            sparsity_target = check_range("sparsity_target", sparsity_target, 0.0, 1.0, closed="()")
        sparsity_cost = check_range("sparsity_cost", sparsity_cost, 0.0)
        sparsity_decay = check_range("sparsity_decay", sparsity_decay, 0.0, 1.0)
        if not isinstance(centering, bool):
            raise TypeError(f"centering must be True or False, got {centering!r}")
        if centering and sparsity_target is not None:
            raise ValueError(
                f"sparsity_target={sparsity_target} with centering=True is not supported: the sparsity "
                "term is written for the ordinary parametrisation; use one or the other"
            )
        if data is not None and not centering:
            raise ValueError("data= sets the centering offsets; it needs centering=True")
        offset_decay = check_range("offset_decay", offset_decay, 0.0, 1.0, closed="[]")
        max_weight = check_range("max_weight", max_weight, 0.0, closed="()")
        discriminative_weight = check_range("discriminative_weight", discriminative_weight, 0.0)
        if discriminative_layer is not None:
            discriminative_layer = check_discriminative(model, discriminative_layer)
        self.discriminative_layer, self.discriminative_weight = discriminative_layer, discriminative_weight
        self.model, self.positive, self.negative = model, positive, negative
        self.sparsity_target, self.sparsity_cost, self.sparsity_decay = (
            sparsity_target,
            sparsity_cost,
            sparsity_decay,
        )
        self.centering, self.offset_decay = centering, offset_decay
        self.max_weight = max_weight
        if centering:
            register_buffer_family(
                self, "offset", [torch.full((n,), 0.5, dtype=model.dtype) for n in model.sizes]
            )
        # Whether the offsets are still the default start (fit then starts them from its data).
        self.offsets_unset = centering and data is None
        if data is not None:
            self.init_offsets(data)
        if sparsity_target is not None:
            means = [torch.full((n,), sparsity_target, dtype=model.dtype) for n in model.sizes[1:]]
            register_buffer_family(self, "sparsity_mean", means, start=1)
        self.last: Monitors | None = None
        # Set by wrap_distributed: running buffers are then averaged over the ranks, and the
        # divergence guard decides on all ranks together.
        self.process_group = None

    def forward(self, v: Tensor, **kwargs) -> Tensor:
        """The surrogate loss of batch ``v`` ``(B, n_0)``; keyword arguments go to both phases
        (``index=`` for :class:`DataParticles`)."""
        model = self.model
        parameters = dict(model.named_parameters())
        self.check_parameters(parameters)
        if not isinstance(v, Tensor) or not v.is_floating_point():
            # One tensor per observed layer (joined once for both phases), binary data kept as bool
            # or uint8, class labels: checked and converted here.
            v = model.checked("v", v)
        data = self.positive.statistics(v, **kwargs)
        fantasy = self.negative.statistics(v, **kwargs)
        difference = data - fantasy
        coefficients, running = self._coefficients(difference, data, fantasy)
        # Linear in the parameters: d loss / d theta = -coefficient, an elementwise backward.
        loss = -sum(_dot(parameters[name], c) for name, c in coefficients.items())
        if self.discriminative_layer is not None and self.discriminative_weight > 0:
            conditional = log_conditional(model, model.checked("v", v), self.discriminative_layer)
            loss = loss - self.discriminative_weight * conditional.mean()
        # Any non-finite statistic makes the loss non-finite (NaN and Inf propagate through it).
        finite = bool(torch.isfinite(loss))
        if self.process_group is not None and on_any_rank(not finite, self.process_group):
            raise FloatingPointError(
                f"the statistics or the loss are not finite on {'this' if not finite else 'another'} rank "
                f"({loss.item()} here): {_LIKELY_CAUSE}"
            )
        if not finite:
            raise FloatingPointError(
                f"the statistics or the loss are not finite ({loss.item()}): {_LIKELY_CAUSE}"
            )
        with torch.no_grad():  # only now that the step is accepted
            for buffer, value in running:
                buffer.copy_(value)
        self.offsets_unset = False
        for phase in (self.positive, self.negative):
            after_step = getattr(phase, "after_step", None)
            if after_step is not None:
                after_step(difference)
        particles = getattr(self.negative, "particles", None)
        self.last = Monitors(
            difference=difference,
            data=v.detach(),
            particles=None if particles is None else particles[0],
            model=model,
            mean_field_iterations=getattr(self.positive, "iterations", None),
        )
        return loss

    def check_parameters(self, parameters: dict[str, Tensor] | None = None) -> None:
        """The divergence guard on the parameters: all finite, weights within ``max_weight``.

        Raises ``FloatingPointError`` naming the parameter; ``fit`` also calls it after every epoch.
        ``parameters`` passes ``dict(model.named_parameters())`` when the caller has it.
        """
        parameters = dict(self.model.named_parameters()) if parameters is None else parameters
        for name, parameter in parameters.items():
            low, high = parameter.detach().aminmax()  # one pass; NaN propagates through both
            largest = max(-float(low), float(high))
            if not math.isfinite(largest):
                raise FloatingPointError(f"parameter {name} holds non-finite values: {_LIKELY_CAUSE}")
            if name.startswith("couplings.") and largest > self.max_weight:
                raise FloatingPointError(
                    f"{name} reached |w| = {largest:.4g}, above max_weight={self.max_weight:g}: "
                    f"{_LIKELY_CAUSE}"
                )

    @torch.no_grad()
    def _coefficients(
        self, difference: Statistics, data: Statistics, fantasy: Statistics
    ) -> tuple[Statistics, list[tuple[Tensor, Tensor]]]:
        """The gradient coefficients of the step (``difference`` with the centering and sparsity
        terms when they are on), and the new values of the running buffers as ``(buffer, value)``
        pairs, copied in only once the step is accepted."""
        running = []
        coefficients = difference
        layers = range(len(self.model.layers))
        if self.process_group is not None and (self.centering or self.sparsity_target is not None):
            # The running buffers follow the statistics of all ranks' data and particles together.
            names = [f"layers.{i}.bias" for i in layers]
            pooled = rank_average([data[n] for n in names] + [fantasy[n] for n in names], self.process_group)
            data = Statistics({**data, **dict(zip(names, pooled[: len(names)]))})
            fantasy = Statistics({**fantasy, **dict(zip(names, pooled[len(names) :]))})
        if self.centering:
            offsets = self.offsets
            coefficients = _centered(self.model, difference, offsets)
            rate = 1.0 - self.offset_decay
            for i, c in zip(layers, offsets):
                d, m = data[f"layers.{i}.bias"], fantasy[f"layers.{i}.bias"]
                running.append((c, c + rate * ((d + m) / 2 - c)))
        if self.sparsity_target is None:
            return coefficients, running
        coefficients = Statistics(coefficients)
        deviation = {}
        means = buffer_family(self, "sparsity_mean", len(layers) - 1, start=1)
        for i, buffer in zip(layers[1:], means):
            mean = self.sparsity_decay * buffer + (1.0 - self.sparsity_decay) * data[f"layers.{i}.bias"]
            running.append((buffer, mean))
            deviation[i] = self.sparsity_cost * (mean - self.sparsity_target)
            coefficients[f"layers.{i}.bias"] = coefficients[f"layers.{i}.bias"] - deviation[i]
        for k, (a, b) in enumerate(self.model.edges):
            if a == b:
                continue
            name = f"couplings.{k}.weight"
            if b in deviation:
                coefficients[name] = coefficients[name] - torch.outer(data[f"layers.{a}.bias"], deviation[b])
            if a in deviation:
                coefficients[name] = coefficients[name] - torch.outer(deviation[a], data[f"layers.{b}.bias"])
        return coefficients, running

    @torch.no_grad()
    def init_offsets(self, data: Tensor) -> None:
        """Start the observed layers' offsets at the mean of ``data`` ``(N, n_0)`` (the hidden ones stay at
        0.5), as "How to Center Deep Boltzmann Machines" (JMLR 2016) recommends."""
        if not self.centering:
            raise ValueError("init_offsets needs an objective built with centering=True")
        data = self.model.checked("data", data)
        for i, x in self.model.clamped(data).items():
            getattr(self, f"offset_{i}").copy_(x.mean(0))
        self.offsets_unset = False

    @property
    def offsets(self) -> list[Tensor]:
        """The centering offsets, one ``(n_i,)`` buffer per layer (empty without ``centering``)."""
        if not self.centering:
            return []
        return buffer_family(self, "offset", len(self.model.layers))

    def extra_repr(self) -> str:
        options = [f"max_weight={self.max_weight:g}"]
        if self.centering:
            options.append(f"centering=True, offset_decay={self.offset_decay}")
        if self.sparsity_target is not None:
            options.append(
                f"sparsity_target={self.sparsity_target}, sparsity_cost={self.sparsity_cost}, "
                f"sparsity_decay={self.sparsity_decay}"
            )
        return ", ".join(options)


def _check_built_in(model: EnergyModel, option: str) -> None:
    """Centering and sparsity are written for binary layers with dense or lateral couplings."""
    for i, layer in enumerate(model.layers):
        if not isinstance(layer, BinaryLayer):
            raise ValueError(
                f"{option} works with BinaryLayer units; layers[{i}] is a {type(layer).__name__}"
            )
    for k, coupling in enumerate(model.couplings):
        if not isinstance(coupling, DenseCoupling | LateralCoupling):
            raise ValueError(
                f"{option} works with DenseCoupling and LateralCoupling; couplings[{k}] is a "
                f"{type(coupling).__name__}"
            )


def _centered(model: EnergyModel, difference: Statistics, offsets: Sequence[Tensor]) -> Statistics:
    """The centered learning rule in ordinary coordinates.

    A coupling's coefficient is the difference of centered covariances
    ``<(x_a - c_a)^T (x_b - c_b)>``: ``D - c_a^T dm_b - dm_a^T c_b`` with ``D`` the pair and
    ``dm`` the mean differences. The centered bias coefficient is ``dm`` itself; since the ordinary
    bias is ``b = b' - W c_b`` (summed over neighbours), a step ``dW`` of the weights moves it by
    ``-dW c_b``, so each bias coefficient loses ``G c_b`` for every coupling, with ``G`` the weight
    change per unit step (zero outside a mask). A lateral coupling's statistic is the strict upper
    triangle of its free matrix: its weight change is that triangle mirrored, diagonal zero.
    """
    out = Statistics(difference)
    means = {i: difference[f"layers.{i}.bias"] for i in range(len(model.layers))}
    for k, (coupling, (a, b)) in enumerate(zip(model.couplings, model.edges)):
        (name, pair), *_ = difference.of_module(f"couplings.{k}").items()
        if a == b:
            pair = pair + pair.mT  # the full symmetric average x^T x, diagonal zero
        centered = pair - torch.outer(offsets[a], means[b]) - torch.outer(means[a], offsets[b])
        if coupling.mask is not None:
            centered = centered * coupling.mask
        if a == b:
            centered = centered - torch.diag(centered.diagonal())
            out[f"couplings.{k}.{name}"] = centered.triu(1)
            out[f"layers.{a}.bias"] = out[f"layers.{a}.bias"] - centered @ offsets[a]
        else:
            out[f"couplings.{k}.{name}"] = centered
            out[f"layers.{a}.bias"] = out[f"layers.{a}.bias"] - centered @ offsets[b]
            out[f"layers.{b}.bias"] = out[f"layers.{b}.bias"] - centered.mT @ offsets[a]
    return out


def _dot(parameter: Tensor, coefficient: Tensor) -> Tensor:
    """``sum(parameter * coefficient)`` in one pass without a temporary (0-d)."""
    return torch.dot(parameter.reshape(-1), coefficient.reshape(-1))


_LIKELY_CAUSE = (
    "training is diverging, most likely because the learning rate is too high "
    "(lower it, or clip gradients); the parameters were not updated by this step"
)


@dataclass
class Monitors:
    """What to watch while training, from one call of a :class:`TwoPhaseObjective` (all detached).

    Attributes:
        difference: data minus model :class:`Statistics` of the step (without sparsity term).
        data: the batch ``(B, n_0)``.
        particles: the fantasy particles' visible states ``(P, n_0)`` (``None`` for exact statistics).
        model: the model, for the free energies.
        mean_field_iterations: iterations the positive phase used (``None`` without mean field).
    """

    difference: Statistics = field(repr=False)
    data: Tensor = field(repr=False)
    particles: Tensor | None = field(repr=False)
    model: EnergyModel = field(repr=False)
    mean_field_iterations: int | None

    @property
    def mean_gaps(self) -> list[float]:
        """Root mean square of data minus model statistics of each layer's parameters, per layer
        (binary layers: of the means)."""
        return [_rms(self.difference.of_module(f"layers.{i}")) for i in range(len(self.model.layers))]

    @property
    def pair_gaps(self) -> list[float]:
        """Root mean square of data minus model statistics of each coupling's parameters, per
        coupling (dense couplings: of the pair averages)."""
        return [_rms(self.difference.of_module(f"couplings.{k}")) for k in range(len(self.model.couplings))]

    @property
    def statistics_gap(self) -> float:
        """Root mean square of the coupling differences together: it shrinks as the model's
        statistics approach the data's (the learning rule's fixed point)."""
        return _rms({name: d for name, d in self.difference.items() if name.startswith("couplings.")})

    @property
    def data_free_energy(self) -> float | None:
        """Mean free energy of the batch under the model's *current* parameters (``None`` when the
        model has no closed-form free energy)."""
        return _mean_free_energy(self.model, self.data)

    @property
    def particle_free_energy(self) -> float | None:
        """Mean free energy of the particles' visible states, as :attr:`data_free_energy`."""
        return None if self.particles is None else _mean_free_energy(self.model, self.particles)


def _rms(entries: dict[str, Tensor]) -> float:
    """Root mean square over every entry of the tensors (0 when there are none)."""
    squares = sum(float(x.square().sum()) for x in entries.values())
    return math.sqrt(squares / max(1, sum(x.numel() for x in entries.values())))


@torch.no_grad()
def _mean_free_energy(model: EnergyModel, v: Tensor) -> float | None:
    if not model.has_free_energy:
        return None
    return float(model.free_energy(v.to(model.dtype)).mean())


def weight_decay_groups(model: EnergyModel, weight_decay: float) -> list[dict]:
    """Optimizer parameter groups that decay the couplings' weights only, not the layers' parameters
    (biases, a Gaussian layer's learned ``log_std``).

    ``torch.optim``'s ``weight_decay`` applies to every parameter of a group, biases included;
    pass ``weight_decay_groups(model, 1e-4)`` instead of ``model.parameters()`` to decay only the
    coupling weights (L2 weight-cost on weights alone: common practice, "A Practical Guide to
    Training Restricted Boltzmann Machines", UTML TR 2010-003, 2010, section 10).

    Examples::

        >>> import ebm_layers as el
        >>> groups = weight_decay_groups(el.dbm(6, 4, 2), 1e-4)
        >>> [len(g["params"]) for g in groups], [g["weight_decay"] for g in groups]
        ([2, 3], [0.0001, 0.0])
    """
    check_model(model)
    weight_decay = check_range("weight_decay", weight_decay, 0.0)
    weights = list(model.couplings.parameters())
    decayed = {id(p) for p in weights}
    # Every other parameter: the layers' biases (the free tensors behind shared ones), learned
    # standard deviations, and anything a layer of one's own holds.
    others = [p for p in model.parameters() if id(p) not in decayed]
    return [{"params": weights, "weight_decay": weight_decay}, {"params": others, "weight_decay": 0.0}]
