"""TwoPhaseObjective: data statistics and model statistics turned into gradients for any optimizer."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import torch
from torch import Tensor, nn

from .._checks import check_batch, check_model, check_real
from ..model.energy_model import EnergyModel
from ..model.statistics import Statistics
from ..phases.exact import ExactStatistics
from ..phases.gibbs import DataParticles, PersistentSampler
from ..phases.mean_field import MeanField
from .distributed import on_any_rank, rank_average

__all__ = ["Monitors", "TwoPhaseObjective", "weight_decay_groups"]


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
        positive: MeanField | DataParticles | None = None,
        negative: PersistentSampler | ExactStatistics | None = None,
        *,
        sparsity_target: float | None = None,
        sparsity_cost: float = 0.1,
        sparsity_decay: float = 0.9,
        centering: bool = False,
        offset_decay: float = 0.99,
        data: Tensor | None = None,
        max_weight: float = 1e4,
    ) -> None:
        super().__init__()
        check_model(model)
        positive = MeanField(model) if positive is None else positive
        negative = PersistentSampler(model) if negative is None else negative
        for name, phase, kinds in (
            ("positive", positive, (MeanField, DataParticles)),
            ("negative", negative, (PersistentSampler, ExactStatistics)),
        ):
            if not isinstance(phase, kinds):
                expected = " or ".join(kind.__name__ for kind in kinds)
                raise TypeError(f"{name} must be a {expected}, got {type(phase).__name__}")
            if phase.model is not model:
                raise ValueError(f"{name} belongs to another model than the one given; build it from `model`")
        if sparsity_target is not None:
            sparsity_target = check_real("sparsity_target", sparsity_target)
            if not 0.0 < sparsity_target < 1.0:
                raise ValueError(f"sparsity_target must lie strictly between 0 and 1, got {sparsity_target}")
        sparsity_cost = check_real("sparsity_cost", sparsity_cost)
        if not 0.0 <= sparsity_cost < math.inf:
            raise ValueError(f"sparsity_cost must be >= 0 and finite, got {sparsity_cost}")
        sparsity_decay = check_real("sparsity_decay", sparsity_decay)
        if not 0.0 <= sparsity_decay < 1.0:
            raise ValueError(f"sparsity_decay must lie in [0, 1), got {sparsity_decay}")
        if not isinstance(centering, bool):
            raise TypeError(f"centering must be True or False, got {centering!r}")
        if centering and sparsity_target is not None:
            raise ValueError(
                f"sparsity_target={sparsity_target} with centering=True is not supported: the sparsity "
                "term is written for the ordinary parametrisation; use one or the other"
            )
        if data is not None and not centering:
            raise ValueError("data= sets the centering offsets; it needs centering=True")
        offset_decay = check_real("offset_decay", offset_decay)
        if not 0.0 <= offset_decay <= 1.0:
            raise ValueError(f"offset_decay must lie in [0, 1], got {offset_decay}")
        max_weight = check_real("max_weight", max_weight)
        if not 0.0 < max_weight:
            raise ValueError(f"max_weight must be positive, got {max_weight}")
        self.model, self.positive, self.negative = model, positive, negative
        self.sparsity_target, self.sparsity_cost, self.sparsity_decay = (
            sparsity_target,
            sparsity_cost,
            sparsity_decay,
        )
        self.centering, self.offset_decay = centering, offset_decay
        self.max_weight = max_weight
        if centering:
            for i, n in enumerate(model.sizes):
                self.register_buffer(f"offset_{i}", torch.full((n,), 0.5, dtype=model.dtype))
        # Whether the offsets are still the default start (fit then starts them from its data).
        self.offsets_unset = centering and data is None
        if data is not None:
            self.init_offsets(data)
        if sparsity_target is not None:
            for i, n in enumerate(model.sizes[1:], start=1):
                self.register_buffer(
                    f"sparsity_mean_{i}", torch.full((n,), sparsity_target, dtype=model.dtype)
                )
        self.last: Monitors | None = None
        # Set by wrap_distributed: running buffers are then averaged over the ranks, and the
        # divergence guard decides on all ranks together.
        self.process_group = None

    def forward(self, v: Tensor, index: Tensor | None = None) -> Tensor:
        """The surrogate loss of batch ``v`` ``(B, n_0)`` (``index`` ``(B,)`` with DataParticles)."""
        model = self.model
        with_index = isinstance(self.positive, DataParticles)
        if with_index and index is None:
            raise ValueError("index is required with DataParticles: pass objective(v, index=idx)")
        if not with_index and index is not None:
            raise ValueError("index is only used with DataParticles; MeanField needs no index")
        self.check_parameters()
        if isinstance(v, Tensor) and not (v.is_floating_point() or v.is_complex()):
            v = v.to(model.dtype)  # binary data kept as bool or uint8
        data = self.positive.statistics(v, index) if with_index else self.positive.statistics(v)
        fantasy = self.negative.statistics()
        difference = Statistics(
            [d - m for d, m in zip(data.means, fantasy.means)],
            [d - m for d, m in zip(data.pairs, fantasy.pairs)],
        )
        coefficients, running = self._coefficients(difference, data, fantasy)
        # Linear in the parameters: d loss / d theta = -coefficient, an elementwise backward.
        loss = -sum(_dot(b, c) for b, c in zip(model.biases(), coefficients.means))
        for w, c, (a, b) in zip(model.weights(), coefficients.pairs, model.edges):
            loss = loss - _dot(w, c) * (0.5 if a == b else 1.0)
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
        particles = getattr(self.negative, "particles", None)
        self.last = Monitors(
            difference=difference,
            data=v.detach(),
            particles=None if particles is None else particles[0],
            model=model,
            mean_field_iterations=getattr(self.positive, "iterations", None),
        )
        return loss

    def check_parameters(self) -> None:
        """The divergence guard on the parameters: all finite, weights within ``max_weight``.

        Raises ``FloatingPointError`` naming the parameter; ``fit`` also calls it after every epoch.
        """
        for name, parameter in self.model.named_parameters():
            low, high = parameter.detach().aminmax()  # one pass; NaN propagates through both
            largest = max(-float(low), float(high))
            if not math.isfinite(largest):
                raise FloatingPointError(f"parameter {name} holds non-finite values: {_LIKELY_CAUSE}")
            if not name.endswith("bias") and largest > self.max_weight:
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
        if self.process_group is not None and (self.centering or self.sparsity_target is not None):
            # The running buffers follow the statistics of all ranks' data and particles together.
            pooled = rank_average([*data.means, *fantasy.means], self.process_group)
            data = Statistics(pooled[: len(data.means)], data.pairs)
            fantasy = Statistics(pooled[len(data.means) :], fantasy.pairs)
        if self.centering:
            offsets = self.offsets
            coefficients = _centered(difference, offsets, self.model.edges)
            rate = 1.0 - self.offset_decay
            for c, d, m in zip(offsets, data.means, fantasy.means):
                running.append((c, c + rate * ((d + m) / 2 - c)))
        if self.sparsity_target is None:
            return coefficients, running
        means, pairs = list(coefficients.means), list(coefficients.pairs)
        deviation = {}
        for i in range(1, len(means)):
            buffer = getattr(self, f"sparsity_mean_{i}")
            mean = self.sparsity_decay * buffer + (1.0 - self.sparsity_decay) * data.means[i]
            running.append((buffer, mean))
            deviation[i] = self.sparsity_cost * (mean - self.sparsity_target)
            means[i] = means[i] - deviation[i]
        for k, (a, b) in enumerate(self.model.edges):
            if a == b:
                continue
            if b in deviation:
                pairs[k] = pairs[k] - torch.outer(data.means[a], deviation[b])
            if a in deviation:
                pairs[k] = pairs[k] - torch.outer(deviation[a], data.means[b])
        return Statistics(means, pairs), running

    @torch.no_grad()
    def init_offsets(self, data: Tensor) -> None:
        """Start the visible offsets at the mean of ``data`` ``(N, n_0)`` (the hidden ones stay at
        0.5), as "How to Center Deep Boltzmann Machines" (JMLR 2016) recommends."""
        if not self.centering:
            raise ValueError("init_offsets needs an objective built with centering=True")
        data = check_batch("data", data, self.model.sizes[0], dtype=self.model.dtype)
        self.offset_0.copy_(data.mean(0))
        self.offsets_unset = False

    @property
    def offsets(self) -> list[Tensor]:
        """The centering offsets, one ``(n_i,)`` buffer per layer (empty without ``centering``)."""
        if not self.centering:
            return []
        return [getattr(self, f"offset_{i}") for i in range(len(self.model.layers))]

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


def _centered(difference: Statistics, offsets: Sequence[Tensor], edges) -> Statistics:
    """The centered learning rule in ordinary coordinates.

    A coupling's coefficient is the difference of centered covariances
    ``<(x_a - c_a)^T (x_b - c_b)>``: ``D - c_a^T dm_b - dm_a^T c_b`` with ``D`` the pair and
    ``dm`` the mean differences. The centered bias coefficient is ``dm`` itself; since the ordinary
    bias is ``b = b' - W c_b`` (summed over neighbours), a step ``dW`` of the weights moves it by
    ``-dW c_b``, so each bias coefficient loses ``G c_b`` for every coupling, with ``G`` the weight
    change per unit step. For a lateral coupling that change is ``G`` without its diagonal: the
    free upper triangle's gradient is the whole off-diagonal coefficient (the 1/2 of the energy
    term counted twice) and the diagonal stays zero.
    """
    means = list(difference.means)
    pairs = []
    for (a, b), pair in zip(edges, difference.pairs):
        dm_a, dm_b, c_a, c_b = difference.means[a], difference.means[b], offsets[a], offsets[b]
        centered = pair - torch.outer(c_a, dm_b) - torch.outer(dm_a, c_b)
        pairs.append(centered)
        if a == b:
            means[a] = means[a] - (centered - torch.diag(centered.diagonal())) @ c_a
        else:
            means[a] = means[a] - centered @ c_b
            means[b] = means[b] - centered.mT @ c_a
    return Statistics(means, pairs)


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
        """Root mean square of data minus model means, per layer."""
        return [_rms(d) for d in self.difference.means]

    @property
    def pair_gaps(self) -> list[float]:
        """Root mean square of data minus model pair averages, per coupling."""
        return [_rms(d) for d in self.difference.pairs]

    @property
    def statistics_gap(self) -> float:
        """Root mean square of the pair differences of every coupling together: it shrinks as the
        model's statistics approach the data's (the learning rule's fixed point)."""
        squares = sum(float(d.square().sum()) for d in self.difference.pairs)
        return math.sqrt(squares / max(1, sum(d.numel() for d in self.difference.pairs)))

    @property
    def data_free_energy(self) -> float | None:
        """Mean free energy of the batch under the model's *current* parameters (``None`` when the
        model has no closed-form free energy)."""
        return _mean_free_energy(self.model, self.data)

    @property
    def particle_free_energy(self) -> float | None:
        """Mean free energy of the particles' visible states, as :attr:`data_free_energy`."""
        return None if self.particles is None else _mean_free_energy(self.model, self.particles)


def _rms(x: Tensor) -> float:
    return float(x.square().mean().sqrt())


@torch.no_grad()
def _mean_free_energy(model: EnergyModel, v: Tensor) -> float | None:
    if not model.has_free_energy:
        return None
    return float(model.free_energy(v.to(model.dtype)).mean())


def weight_decay_groups(model: EnergyModel, weight_decay: float) -> list[dict]:
    """Optimizer parameter groups that decay weights only, not biases.

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
    weight_decay = check_real("weight_decay", weight_decay)
    if not 0.0 <= weight_decay < math.inf:
        raise ValueError(f"weight_decay must be >= 0 and finite, got {weight_decay}")
    weights = [p for c in model.couplings for p in c.parameters()]
    biases = [layer.bias for layer in model.layers]
    return [{"params": weights, "weight_decay": weight_decay}, {"params": biases, "weight_decay": 0.0}]
