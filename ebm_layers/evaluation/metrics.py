"""Model metrics: how well a model explains data.

``log_likelihood`` reports log p(v) exactly, as a mean-field lower bound or as an
importance-sampled estimate, and says which; ``pseudo_log_likelihood`` needs no partition
function; ``reconstruction_error`` and ``free_energy_gap`` are monitors of training.
"""

from __future__ import annotations

import math
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass

import torch
from torch import Tensor

from .._checks import check_binary_batch, check_model, check_real, check_size
from .._random import resolve_generator
from ..model.energy_model import EnergyModel
from ..model.graph import smallest_cover
from ..model.parameters import substituted
from ..model.units import UnitLayer
from ..phases.exact import MAX_STATES, joint_states
from ..phases.mean_field import MeanField
from .partition import (
    Estimate,
    ais_log_partition,
    can_reverse_anneal,
    exact_log_partition,
    reverse_ais_log_likelihood,
)

__all__ = [
    "Evaluation",
    "LogLikelihood",
    "SplitMetrics",
    "evaluate",
    "exact_free_energy",
    "exact_log_likelihood",
    "free_energy_gap",
    "log_likelihood",
    "posterior_states",
    "pseudo_log_likelihood",
    "reconstruction_error",
]

METHODS = ("auto", "exact", "mean-field", "importance")
# What each kind of number is, in plain words: with log Z exact, and with log Z estimated by forward
# AIS (which underestimates log Z on average, Jensen's inequality, so it pushes a log-likelihood up).
# "Bound" only where the number is one.
LABELS = {
    ("exact", False): "exact",
    ("exact", True): "estimate: exact free energy minus an AIS log Z, so high on average",
    ("mean-field", False): "lower bound (mean field)",
    ("mean-field", True): "mean-field value minus an AIS log Z: not a bound, its error has no known sign",
    ("importance", False): "estimate (importance sampling, mean-field proposal): low on average",
    ("importance", True): (
        "estimate: importance sampling (low on average) minus an AIS log Z (which pushes it up): "
        "its error has no known sign"
    ),
}
REVERSE_LABEL = (
    "reverse AIS: low on average for the annealing process's own distribution, which nears the "
    "model's as num_betas grows; usually below the model's log-likelihood, but not a bound on it"
)
# method="auto" enumerates a deep model's hidden states per example up to this many (a 64-20-10 chain
# needs 2^10); beyond, the mean-field bound.
CHEAP_POSTERIOR_STATES = 2**12
# Mean field for metrics runs to a residual near the dtype's resolution (float64: 1e-6).
MEAN_FIELD_TOL = 1e-6
MEAN_FIELD_MAX_ITER = 1000
# Elements of one chunk of sampled or flipped copies; bounds memory (float64: 8 MiB).
_CHUNK_ELEMENTS = 2**20


@dataclass(frozen=True)
class LogLikelihood:
    """Per-example log-likelihoods and what kind of number they are.

    Attributes:
        values: ``(B,)`` float64, detached.
        method: ``"exact"``, ``"mean-field"`` or ``"importance"``.
        log_z: the log partition function that was subtracted.
        log_z_estimated: True when ``log_z`` came from an estimate (an object with a ``log_z``
            attribute, such as a sampling estimate of the partition function).
    """

    values: Tensor
    method: str
    log_z: float
    log_z_estimated: bool

    @property
    def mean(self) -> float:
        """Average of ``values`` over the examples."""
        return float(self.values.mean())

    @property
    def label(self) -> str:
        """What ``values`` are, in plain words (for reports and plot legends): ``"bound"`` only
        where they are one, and the direction of their error where it is known."""
        return LABELS[self.method, self.log_z_estimated]


def _check_log_z(log_z: object) -> tuple[float, bool]:
    """``log_z`` as a finite float, and whether it is an estimate (an object with ``.log_z``)."""
    estimated = hasattr(log_z, "log_z")
    name, value = ("log_z.log_z", log_z.log_z) if estimated else ("log_z", log_z)
    if isinstance(value, Tensor):
        if value.ndim != 0:
            raise ValueError(f"{name} must be a number or a 0-d tensor, got shape {tuple(value.shape)}")
        value = value.item()
    value = check_real(name, value)
    if not math.isfinite(value):
        raise ValueError(f"{name} must be finite, got {value}")
    return value, estimated


@torch.no_grad()
def log_likelihood(
    model: EnergyModel,
    v: Tensor,
    log_z: float | Tensor | object,
    *,
    method: str = "auto",
    num_samples: int = 100,
    generator: torch.Generator | None = None,
) -> LogLikelihood:
    r"""Per-example ``log p(v)``: exact, a mean-field lower bound, or an importance-sampled estimate.

    - ``"exact"``: ``-F(v) - log Z`` with the exact free energy (:func:`exact_free_energy`: closed
      form, or the hidden states enumerated per example); ``ValueError`` when that needs more
      than ``MAX_STATES`` states per example.
    - ``"mean-field"``: the variational bound
      :math:`\log p(v) \ge -E(v, \mu) + H(q) - \log Z` with ``q`` the factorised posterior of
      mean-field marginals ``mu`` (the energy is multilinear, so ``E`` at the marginals is the
      expected energy under ``q``; ``H`` sums the hidden layers' entropies, ``UnitLayer.entropy``).
    - ``"importance"``: ``logmeanexp_i [-F(v, h_i) - log q(h_i)] - log Z`` over ``num_samples``
      draws ``h_i`` from ``q``. Only the hidden layers needed to make the rest summable are
      drawn (the fewest states: for binary units, the fewest units); the others are summed out
      in closed form, so an RBM needs no draw and gets the exact value. ``exp`` of it is
      unbiased for ``p(v)``, so in expectation it lies below ``log p(v)`` (Jensen), and usually
      much closer to it than the bound.
    - ``"auto"`` (default): ``"exact"`` when the model has a closed-form free energy or needs at
      most ``CHEAP_POSTERIOR_STATES`` (2^12) states per example, else ``"mean-field"``.

    ``result.label`` says what the values are; with ``log_z`` estimated by AIS an exact or
    mean-field value becomes an estimate (see ``LABELS``).

    Mean field and sampling run in float64 (the parameters of a float32 model cast for the
    computation); the model itself is not changed. Values are detached;
    :func:`exact_log_likelihood` is differentiable.

    Args:
        model: the :class:`EnergyModel`.
        v: data within the visible layer's support ([0, 1] for binary units), the model's dtype.
        log_z: ``log Z``: a number, a 0-d tensor, or an estimate object with a ``log_z``
            attribute (then the result is flagged ``log_z_estimated``).
        method: ``"auto"``, ``"exact"``, ``"mean-field"`` or ``"importance"``.
        num_samples: draws per example for ``"importance"``.
        generator: draws of ``"importance"`` (``None``: a private generator seeded from the
            global RNG); unused by the other methods.

    Shape:
        - ``v``: ``(B, n_0)``.
        - Returns a :class:`LogLikelihood` with ``values`` ``(B,)`` float64.

    Examples::

        >>> import ebm_layers as el
        >>> model = el.dbm(6, 4, 3, generator=torch.Generator().manual_seed(0))
        >>> result = el.log_likelihood(model, torch.ones(2, 6), el.exact_log_partition(model))
        >>> result.values.shape, result.label
        (torch.Size([2]), 'exact')
    """
    check_model(model)
    if method not in METHODS:
        raise ValueError(f"method must be one of {METHODS}, got {method!r}")
    num_samples = check_size("num_samples", num_samples)
    v = model.checked("v", v)
    log_z, estimated = _check_log_z(log_z)
    if method == "auto":
        method = "exact" if posterior_states(model) <= CHEAP_POSTERIOR_STATES else "mean-field"
    if method == "exact":
        log_f = -exact_free_energy(model, v)
    else:
        generator = resolve_generator(generator) if method == "importance" else None
        (log_f,) = _variational_log_f(model, v, (method,), num_samples, generator)
    return LogLikelihood(log_f - log_z, method, log_z, estimated)


@contextmanager
def _in_float64(model: EnergyModel) -> Iterator[None]:
    """Within the block ``model`` computes in float64: its parameters cast (differentiably, so
    gradients reach a float32 model's own parameters); the model itself is not changed."""
    with substituted(model, {name: p.to(torch.float64) for name, p in model.named_parameters()}):
        yield


@torch.no_grad()
def _variational_log_f(
    model: EnergyModel, v: Tensor, methods: Sequence[str], num_samples: int, generator: torch.Generator | None
) -> list[Tensor]:
    """``(B,)`` float64 estimates of ``-F(v)`` for each of ``methods`` (``"mean-field"``,
    ``"importance"``) from one mean-field run, computed in float64."""
    with _in_float64(model):
        marginals = _mean_field(model, v.to(torch.float64))
        return [
            _mean_field_bound(model, marginals)
            if method == "mean-field"
            else _importance_estimate(model, marginals, num_samples, generator)
            for method in methods
        ]


def _mean_field(model: EnergyModel, v: Tensor) -> list[Tensor]:
    """Mean-field marginals of every layer given ``v``, iterated to near the dtype's resolution."""
    tol = max(MEAN_FIELD_TOL, 100 * torch.finfo(model.dtype).eps)
    return MeanField(model, tol=tol, max_iter=MEAN_FIELD_MAX_ITER)(v)


def _entropy(model: EnergyModel, marginals: Sequence[Tensor]) -> Tensor:
    """Entropy ``(B,)`` of the factorised ``q`` over the hidden layers with means ``marginals``: the
    sum of each hidden layer's ``entropy``."""
    return sum(model.layers[i].entropy(marginals[i]) for i in model.hidden)


def _expected_energy(model: EnergyModel, marginals: Sequence[Tensor]) -> Tensor:
    """``E_q[E(v, h)]`` ``(B,)`` under the factorised ``q`` over the hidden layers with means ``marginals``.

    Every coupling is linear in each of its layers' states and ``q`` makes them independent (a
    lateral term has no diagonal, so it never multiplies a unit by itself): the couplings' expected
    energy is their energy at the marginals. Each hidden layer adds its own ``expected_energy``
    (its energy at the mean for units whose term is linear, such as binary ones).
    """
    total = sum(model.layers[i].energy(marginals[i]) for i in model.observed)
    for i in model.hidden:
        total = total + model.layers[i].expected_energy(marginals[i])
    for coupling, (a, b) in zip(model.couplings, model.edges):
        total = total + coupling.energy(marginals[a], marginals[b])
    return total


def _mean_field_bound(model: EnergyModel, marginals: list[Tensor]) -> Tensor:
    """``-E_q[E(v, h)] + H(q)`` ``(B,)``: the lower bound on ``-F(v)`` of the factorised ``q``."""
    return -_expected_energy(model, marginals) + _entropy(model, marginals)


def _state_bits(layer: UnitLayer) -> float:
    """``log2`` of the number of states of ``layer``; infinite for a unit type that does not list them."""
    return math.log2(layer.num_states) if hasattr(layer, "num_states") else math.inf


def _joint_state_count(model: EnergyModel, layers: Sequence[int]) -> int | float:
    """Number of joint states of ``layers`` (``math.inf`` when one does not list its states)."""
    if not all(hasattr(model.layers[i], "num_states") for i in layers):
        return math.inf
    return math.prod(model.layers[i].num_states for i in layers)


def _sampled_layers(model: EnergyModel) -> tuple[int, ...]:
    """The hidden layers to draw or enumerate, fewest states first, so that the others sum out given
    them and v.

    It is the smallest cover of the couplings with the observed layers counted as free (v is always
    given), each layer weighed by ``log2`` of its number of states (binary units: its number of
    units); a layer that does not list its states weighs infinitely, so it is summed out where it can be.
    """
    observed = model.observed
    bits = [0.0 if i in observed else _state_bits(layer) for i, layer in enumerate(model.layers)]
    return tuple(i for i in smallest_cover(bits, model.edges) if i not in observed)


def _importance_estimate(
    model: EnergyModel, marginals: list[Tensor], num_samples: int, generator: torch.Generator
) -> Tensor:
    """``logmeanexp_i [-F(v, h_i) - log q(h_i)]`` ``(B,)`` with ``h_i`` drawn from the proposal ``q``.

    The proposal draws each sampled layer from its own conditional given the input that the
    mean-field marginals of its neighbours send it (through a lateral coupling its own marginals
    too), every unit independently of the others and of the other sampled layers. At the mean-field
    fixed point ``mu = mean(input(mu))``, so this is the factorised ``q`` with exactly the mean-field
    marginals; for binary units, independent Bernoulli units with ``p(h_j = 1) = mu_j``, since there
    ``mu_j = sigmoid(b_j + input_j)``. Built from the finite input rather than from the marginals,
    it gives every state a positive probability even where a marginal has rounded to 0 or 1, so
    ``exp`` of the estimate stays unbiased for ``p(v)``.
    """
    sampled = _sampled_layers(model)
    inputs = {i: model.input_or_zeros(marginals, i) for i in sampled}
    num_samples = num_samples if sampled else 1  # nothing to draw: every weight is exp(-F(v))
    v = {i: marginals[i] for i in model.observed}
    batch = marginals[0].shape[0]
    per_chunk = max(1, _CHUNK_ELEMENTS // (batch * sum(model.sizes)))
    log_weights = [
        _log_weights(model, v, inputs, min(per_chunk, num_samples - start), generator)
        for start in range(0, num_samples, per_chunk)
    ]
    return torch.logsumexp(torch.cat(log_weights, dim=1), dim=1) - math.log(num_samples)


def _log_weights(
    model: EnergyModel,
    v: dict[int, Tensor],
    inputs: dict[int, Tensor],
    count: int,
    generator: torch.Generator,
) -> Tensor:
    """``-F(v, h) - log q(h)`` ``(B, count)`` for ``count`` draws ``h`` per example (``v`` the observed
    layers' data)."""
    given = {i: x.repeat_interleave(count, dim=0) for i, x in v.items()}
    log_q = 0.0
    for i, input in inputs.items():
        input = input.repeat_interleave(count, dim=0)
        layer = model.layers[i]
        given[i] = layer.sample(input, generator)
        log_q = log_q + layer.log_probability(given[i], input)
    log_f = -model.summed_free_energy(given)
    return (log_f - log_q).view(-1, count)


def exact_log_likelihood(model: EnergyModel, v: Tensor, *, max_states: int = MAX_STATES) -> Tensor:
    """Exact ``log p(v) = -F(v) - log Z`` per example, float64 ``(B,)``, differentiable.

    ``F(v)`` is the closed-form free energy where it exists; otherwise (a deep model) the hidden
    layers that make the rest summable given ``v`` are enumerated for every example
    (:func:`exact_free_energy`). ``ValueError`` when either sum needs more than ``max_states`` states.
    """
    check_model(model)
    return -exact_free_energy(model, v, max_states=max_states) - exact_log_partition(
        model, max_states=max_states
    )


def exact_free_energy(model: EnergyModel, v: Tensor, *, max_states: int = MAX_STATES) -> Tensor:
    """Exact free energy ``F(v) = -log sum_h exp(-E(v, h))`` ``(B,)`` in float64, differentiable.

    In closed form where the model has one; otherwise the fewest hidden states that make the other
    layers summable given ``v`` (:func:`posterior_states`) are enumerated per example, the others
    summed out in closed form (their ``log_partition``), in chunks with a log-sum-exp.
    ``ValueError`` when that needs more than ``max_states`` states per example, or the states of a
    layer whose unit type does not list them.
    """
    check_model(model)
    v = model.checked("v", v)
    layers = _sampled_layers(model)
    total = _joint_state_count(model, layers)
    if math.isinf(total):
        missing = [i for i in layers if not hasattr(model.layers[i], "num_states")]
        raise ValueError(
            f"the exact free energy of this model enumerates the states of layers {missing} per "
            "example, whose unit types do not list them (no num_states); use the mean-field or "
            "importance-sampled log-likelihood instead"
        )
    if total > max_states:
        raise ValueError(
            f"the exact free energy of this model enumerates {total:,} states of layers {list(layers)} "
            f"per example, more than max_states={max_states:,}"
        )
    batch = v.shape[0]
    rows = max(1, min(total, _CHUNK_ELEMENTS // (batch * sum(model.sizes))))
    parts = []
    with _in_float64(model):
        v = v.to(torch.float64)
        for start in range(0, total, rows):
            stop = min(start + rows, total)
            given = {i: x.repeat_interleave(stop - start, dim=0) for i, x in model.clamped(v).items()}
            for i, states in joint_states(model, layers, start, stop).items():
                given[i] = states.to(torch.float64).repeat(batch, 1)
            log_f = -model.summed_free_energy(given)
            parts.append(torch.logsumexp(log_f.view(batch, stop - start), dim=1))
    return -torch.logsumexp(torch.stack(parts, dim=1), dim=1)


def posterior_states(model: EnergyModel) -> int | float:
    """States per example that :func:`exact_free_energy` enumerates (1 with a closed form;
    ``math.inf`` when a layer it would have to enumerate does not list its states)."""
    check_model(model)
    return _joint_state_count(model, _sampled_layers(model))


def _flip_refusal(model: EnergyModel) -> str | None:
    """Why :func:`pseudo_log_likelihood` cannot flip the visible units of ``model`` (``None``: it can).

    It needs one observed layer, layer 0, every unit of which takes the values 0 and 1 whatever the
    others do: a discrete layer whose states are every binary vector.
    """
    if model.observed != (0,):
        return (
            "pseudo_log_likelihood flips the units of one visible layer, layer 0; this model observes "
            f"layers {list(model.observed)}"
        )
    layer = model.layers[0]
    name = type(layer).__name__
    if not hasattr(layer, "num_states"):
        return (
            f"pseudo_log_likelihood needs a discrete visible layer (a unit type that lists its states "
            f"with num_states); layer 0 is a {name}, which does not"
        )
    if layer.support != (0.0, 1.0) or layer.num_states != 2**layer.size:
        return (
            "pseudo_log_likelihood flips one visible unit at a time, so layer 0 must hold binary units "
            f"(support (0, 1), every 0/1 vector a state: 2^{layer.size} states); it is a {name} with "
            f"support {layer.support} and {layer.num_states:,} states"
        )
    return None


@torch.no_grad()
def pseudo_log_likelihood(model: EnergyModel, v: Tensor) -> Tensor:
    r"""Pseudo-log-likelihood :math:`\sum_i \log p(v_i \mid v_{-i})` of binary data, float64.

    Every visible unit is flipped in turn (not one random unit per example), under the visible
    marginal ``p(v)``: :math:`\log p(v_i \mid v_{-i}) = -\log(1 + e^{F(v) - F(v^{(i)})})`
    with :math:`v^{(i)}` the data with unit ``i`` flipped. Needs no partition function. Only
    for models with a closed-form free energy (no two non-visible units coupled; visible
    lateral couplings are fine) and a visible layer of binary units, else ``ValueError``.
    Couplings are linear in each layer's state, so flipping unit ``i`` moves each hidden input by
    what the unit alone sends (``+-W[i, :]`` for a dense coupling), and the cost is one
    ``(B, n_0, n_k)`` ``log_partition`` per hidden layer ``k``, taken in chunks. Detached.

    Args:
        model: the :class:`EnergyModel`.
        v: binary data (every value 0 or 1), the model's dtype.

    Shape:
        - ``v``: ``(B, n_0)``.
        - Returns ``(B,)`` float64.

    Examples::

        >>> import ebm_layers as el
        >>> model = el.rbm(5, 3)
        >>> with torch.no_grad():
        ...     _ = model.couplings[0].weight.zero_()
        >>> el.pseudo_log_likelihood(model, torch.ones(2, 5))  # independent fair units: 5 log(1/2)
        tensor([-3.4657, -3.4657], dtype=torch.float64)
    """
    check_model(model)
    refusal = _flip_refusal(model)
    if refusal is not None:
        raise ValueError(refusal)
    v = check_binary_batch("v", v, model.sizes[0], dtype=model.dtype)
    model.check_summable({0})
    with _in_float64(model):
        changes = _flip_changes(model, v.to(torch.float64))
    # Two values per unit: p(v_i | v_-i) = 1 / (1 + exp(change of -F when unit i flips)).
    return -torch.logaddexp(torch.zeros_like(changes), changes).sum(-1)


def _flip_changes(model: EnergyModel, v: Tensor) -> Tensor:
    """Change ``(B, n_0)`` of ``-F(v) = -U_0(v) - C_lateral(v) + sum_k log_partition_k(input_k(v))``
    when visible unit ``i`` alone flips, for every ``i``; every non-visible layer is coupled to
    layer 0 alone.

    The visible unit term is evaluated on the flipped copies (any ``U_0``), in chunks of copies.
    The couplings are linear in each end, so a flip ``d_i e_i`` (``d_i = +-1``) moves a hidden
    input by ``d_i`` times what unit ``i`` alone sends, and moves a lateral term
    ``C(x, x)`` by ``-d_i input_i(v) + C(e_i, e_i)`` (bilinear, and ``input = -dC/dx``).
    """
    batch, n = v.shape
    flips = 1 - 2 * v  # +1 turns a unit on, -1 turns it off
    units = torch.eye(n, dtype=v.dtype)  # row i: unit i alone on
    # Hidden layers: their input given v, and what each visible unit alone sends them (n, n_k).
    hidden = {}
    for k in range(1, len(model.layers)):
        input = model.layer_input({0: v}, k)
        if input is not None:  # an uncoupled layer adds a constant
            hidden[k] = (input, model.layer_input({0: units}, k), model.layers[k].log_partition(input))
    visible = model.layers[0]
    own = visible.energy(v)
    rows = max(1, _CHUNK_ELEMENTS // max([n, *(model.sizes[k] for k in hidden)]))
    steps = flips.reshape(-1)
    parts = []
    for start in range(0, batch * n, rows):
        index = torch.arange(start, min(start + rows, batch * n))
        example, unit = index // n, index % n
        step = steps[index]
        flipped = v[example]
        flipped[torch.arange(len(index)), unit] += step
        change = own[example] - visible.energy(flipped)
        for k, (input, sent, log_partition) in hidden.items():
            moved = input[example] + step[:, None] * sent[unit]
            change = change + model.layers[k].log_partition(moved) - log_partition[example]
        parts.append(change)
    changes = torch.cat(parts).view(batch, n)
    lateral = model.lateral_coupling(0)
    if lateral is not None:
        changes = changes + flips * lateral.input_to(0, v) - lateral.energy(units, units)
    return changes


@torch.no_grad()
def reconstruction_error(model: EnergyModel, v: Tensor) -> Tensor:
    """Squared error between data and its mean-field reconstruction, summed per example.

    The hidden marginals come from mean field with ``v`` clamped; the reconstruction is the
    visible layer's conditional mean given the input they send (binary units:
    ``p(v_i = 1 | those marginals)``; with visible lateral couplings, given the other data units
    too). A common monitor of training, not a likelihood: it measures how well one pass
    reproduces the data, not how probable the model finds it.

    Args:
        model: the :class:`EnergyModel`.
        v: data within the visible layer's support ([0, 1] for binary units), the model's dtype.

    Shape:
        - ``v``: ``(B, n_0)``.
        - Returns ``(B,)`` in the model's dtype, detached.

    Examples::

        >>> import ebm_layers as el
        >>> model = el.rbm(4, 2)
        >>> with torch.no_grad():
        ...     _ = model.couplings[0].weight.zero_()
        >>> el.reconstruction_error(model, torch.ones(1, 4))  # 4 (1 - sigmoid(0))^2
        tensor([1.])
    """
    check_model(model)
    v = model.checked("v", v)
    marginals = _mean_field(model, v)
    error = 0.0
    for i, x in model.clamped(v).items():
        error = error + (x - model.layers[i].mean(model.input_or_zeros(marginals, i))).square().sum(-1)
    return error


@torch.no_grad()
def free_energy_gap(model: EnergyModel, train: Tensor, test: Tensor, *, method: str = "auto") -> float:
    """Mean free energy of ``test`` minus that of ``train``, in float64.

    On held-out data from the training distribution it stays near zero while the model
    generalises, and grows when the model overfits the training set; no partition function is
    needed (it cancels). Common practice: "A Practical Guide to Training Restricted Boltzmann
    Machines" (Hinton, UTML TR 2010-003, 2010), section 6.

    Args:
        model: the :class:`EnergyModel`.
        train, test: data within the visible layer's support ([0, 1] for binary units), the
            model's dtype.
        method: ``"exact"``: the closed-form free energy (``ValueError`` for a model without
            one); ``"mean-field"``: the mean-field free energy ``E_q[E] - H(q)``, an upper bound
            on ``F(v)`` that is exact for an RBM; ``"auto"`` (default): exact where a closed form
            exists, else mean field (then it is a gap between bounds, fine as a trend).

    Shape:
        - ``train``: ``(B_train, n_0)``; ``test``: ``(B_test, n_0)``.
        - Returns a float.

    Examples::

        >>> import ebm_layers as el
        >>> model = el.rbm(4, 2, generator=torch.Generator().manual_seed(0))
        >>> el.free_energy_gap(model, torch.ones(3, 4), torch.ones(5, 4))
        0.0
    """
    check_model(model)
    train = model.checked("train", train)
    test = model.checked("test", test)
    if method not in ("auto", "exact", "mean-field"):
        raise ValueError(f"method must be 'auto', 'exact' or 'mean-field', got {method!r}")
    if method == "exact" or (method == "auto" and model.has_free_energy):
        model.check_summable(model.observed)
        train_mean, test_mean = (float(exact_free_energy(model, x).mean()) for x in (train, test))
    else:
        train_mean, test_mean = (
            -float(_variational_log_f(model, x, ("mean-field",), 1, None)[0].mean()) for x in (train, test)
        )
    return test_mean - train_mean


# Enumerate log Z exactly in evaluate() up to this many states (about a second); beyond, use AIS.
EVALUATE_EXACT_STATES = 2**20


@dataclass(frozen=True)
class SplitMetrics:
    """The metrics of one data set in an :class:`Evaluation` (means over its examples, in nats).

    Attributes:
        log_likelihood: mean ``log p(v)``: exact where the free energy is cheap to compute exactly
            (a closed form, or at most 2^12 hidden states per example), else the mean-field
            value; ``log_likelihood_label`` says what kind of number it is.
        log_likelihood_label: what that number is, in plain words.
        importance_log_likelihood: where it is not exact, the importance-sampled estimate with
            the mean-field proposal (closer than the mean-field value); else ``None``.
        importance_label: what that number is, in plain words, or ``None``.
        conservative_log_likelihood: mean reverse-annealing estimate (low on average) over
            ``conservative_examples`` examples, or ``None`` when not computed for this set or not
            available for the model.
        conservative_examples: how many examples reverse annealing ran on (a random subset of at
            most ``reverse_examples``), or ``None``.
        conservative_gap: the closest log-likelihood estimate (exact, or importance-sampled)
            minus the conservative one, on those same examples, or ``None``.
        pseudo_log_likelihood: mean pseudo-log-likelihood (``None`` without closed-form free
            energy, for a visible layer of other than binary units, or for non-binary data).
        reconstruction_error: mean squared reconstruction error per example.
    """

    log_likelihood: float
    log_likelihood_label: str
    importance_log_likelihood: float | None
    importance_label: str | None
    conservative_log_likelihood: float | None
    conservative_examples: int | None
    conservative_gap: float | None
    pseudo_log_likelihood: float | None
    reconstruction_error: float


@dataclass(frozen=True)
class Evaluation:
    """How good a model is, in nats: the report of :func:`evaluate`; ``print`` it for a table.

    Attributes:
        log_z: the log partition function used.
        log_z_source: ``"exact (enumeration)"``, ``"forward AIS"`` or ``"given"``.
        estimate: the AIS :class:`~ebm_layers.partition.Estimate` (``None`` unless estimated here).
        train, test: :class:`SplitMetrics` of the training data and of the held-out data (``None``
            without it).
        free_energy_gap: mean free energy of test minus train (``None`` when undefined).
        warnings: plain-words cautions about the numbers above (printed with the table).
    """

    log_z: float
    log_z_source: str
    estimate: Estimate | None
    train: SplitMetrics
    test: SplitMetrics | None
    free_energy_gap: float | None
    warnings: tuple[str, ...]

    def __str__(self) -> str:
        splits = [("train", self.train)] + ([("test", self.test)] if self.test is not None else [])
        detail = f", bracket [{self.estimate.lower:.3f}, {self.estimate.upper:.3f}]" if self.estimate else ""
        lines = [f"log Z = {self.log_z:.3f} ({self.log_z_source}{detail})"]
        lines.append(f"{'nats per example':<34}" + "".join(f"{name:>10}" for name, _ in splits))
        rows = [
            ("log-likelihood (1)", "log_likelihood"),
            ("importance-sampled estimate (2)", "importance_log_likelihood"),
            ("reverse AIS (3)", "conservative_log_likelihood"),
            ("pseudo-log-likelihood", "pseudo_log_likelihood"),
            ("reconstruction error", "reconstruction_error"),
        ]
        for title, attribute in rows:
            values = [getattr(split, attribute) for _, split in splits]
            if any(value is not None for value in values):
                lines.append(
                    f"{title:<34}" + "".join(f"{'-':>10}" if x is None else f"{x:>10.3f}" for x in values)
                )
        for name, split in splits:
            if split.conservative_gap is not None:
                which = "(1)" if split.importance_log_likelihood is None else "(2)"
                lines.append(
                    f"gap {which} - (3) on {name}: {split.conservative_gap:.3f} "
                    f"(over the {split.conservative_examples} examples of (3))"
                )
        if self.free_energy_gap is not None:
            lines.append(f"free energy gap, test - train: {self.free_energy_gap:.3f}")
        lines.append(f"(1) {self.train.log_likelihood_label}")
        if self.train.importance_label is not None:
            lines.append(f"(2) {self.train.importance_label}")
        for name, split in splits:
            if split.conservative_examples is not None:
                lines.append(f"(3) on {split.conservative_examples} {name} examples, {REVERSE_LABEL}")
        lines.extend(f"WARNING: {text}" for text in self.warnings)
        return "\n".join(lines)


def _report_log_z(
    model: EnergyModel,
    data: Tensor,
    log_z,
    num_chains: int,
    num_betas: int,
    generator: torch.Generator,
    progress: bool,
) -> tuple[float | Tensor | Estimate, str, Estimate | None]:
    """The ``log Z`` of :func:`evaluate`'s report, where it comes from, and the AIS estimate if one
    was run: ``log_z`` as given, else exact by enumeration when cheap, else forward AIS."""
    if log_z is not None:
        return log_z, "given", None
    cover = smallest_cover([_state_bits(layer) for layer in model.layers], model.edges)
    if _joint_state_count(model, cover) <= EVALUATE_EXACT_STATES:
        return float(exact_log_partition(model)), "exact (enumeration)", None
    estimate = ais_log_partition(
        model, num_chains=num_chains, num_betas=num_betas, data=data, generator=generator, progress=progress
    )
    return estimate, "forward AIS", estimate


@torch.no_grad()
def evaluate(
    model: EnergyModel,
    data: Tensor,
    *,
    test: Tensor | None = None,
    log_z: float | Tensor | Estimate | None = None,
    num_chains: int = 100,
    num_betas: int = 10_000,
    reverse: bool = True,
    reverse_examples: int = 500,
    generator: torch.Generator | None = None,
    progress: bool = True,
) -> Evaluation:
    """Every metric of ``model`` on its training ``data`` and held-out ``test`` data, in one report.

    ``log Z`` is exact when at most 2^20 states need enumerating, else estimated by forward AIS
    (:func:`~ebm_layers.partition.ais_log_partition` with ``data`` for the base rates,
    ``num_chains``, ``num_betas``), unless given as ``log_z``. The free energy ``F(v)`` is exact
    where that is cheap (a closed form, or at most 2^12 hidden states per example enumerated, as
    for a 64-20-10 chain); otherwise the report gives the mean-field value and an
    importance-sampled estimate (100 draws from the mean-field posterior per example). Each row
    is labelled with what kind of number it is (``LABELS``): with an exact ``log Z`` the
    mean-field value is a lower bound; with an AIS ``log Z`` (low on average) nothing is a bound.
    With ``reverse`` (and a model it applies to), reverse annealing on ``test`` (or on ``data``
    without test data) gives a value low on average for the annealing process's distribution, on a
    random subset of at most ``reverse_examples`` examples since it costs a whole annealing run
    per example; the report shows it and its gap to the best estimate on that subset: a small gap
    between the two annealing directions is the evidence that both are close. Printing the result
    gives an aligned table with warnings.

    Args:
        model: the :class:`EnergyModel`.
        data: ``(N, n_0)`` training data.
        test: ``(M, n_0)`` held-out data.
        log_z: a known ``log Z`` (number, 0-d tensor or AIS estimate) to use instead.
        num_chains, num_betas: AIS settings (reverse annealing uses ``num_betas`` too).
        reverse: compute the reverse-annealing estimate.
        reverse_examples: run it on at most this many examples (drawn at random with ``generator``).
        generator: the ``torch.Generator`` of every draw.
        progress: show tqdm bars for the annealing runs.

    Returns:
        an :class:`Evaluation`.
    """
    check_model(model)
    data = model.checked("data", data, convert=True)
    if test is not None:
        test = model.checked("test", test, convert=True)
    reverse_examples = check_size("reverse_examples", reverse_examples)
    generator = resolve_generator(generator)
    log_z, source, estimate = _report_log_z(model, data, log_z, num_chains, num_betas, generator, progress)
    log_z_value, estimated = _check_log_z(log_z)
    cautions = [] if estimate is None or estimate.warning is None else [estimate.warning]
    closed_form = model.has_free_energy
    flippable = _flip_refusal(model) is None
    exact = posterior_states(model) <= CHEAP_POSTERIOR_STATES
    reversible = can_reverse_anneal(model)
    target = data if test is None else test

    def metrics_of(x: Tensor) -> SplitMetrics:
        if exact:
            likelihood = best = log_likelihood(model, x, log_z, method="exact")
        else:  # the bound and the importance estimate from one mean-field run
            bound, importance = _variational_log_f(model, x, ("mean-field", "importance"), 100, generator)
            likelihood = LogLikelihood(bound - log_z_value, "mean-field", log_z_value, estimated)
            best = LogLikelihood(importance - log_z_value, "importance", log_z_value, estimated)
        conservative = examples = gap = None
        if reverse and reversible and x is target:
            subset = torch.randperm(len(x), generator=generator)[:reverse_examples]
            low = reverse_ais_log_likelihood(
                model, x[subset], num_betas=num_betas, data=data, generator=generator, progress=progress
            )
            conservative, examples = float(low.mean()), len(subset)
            gap = float(best.values[subset].mean()) - conservative
        binary = bool(((x == 0) | (x == 1)).all())
        return SplitMetrics(
            log_likelihood=likelihood.mean,
            log_likelihood_label=likelihood.label,
            importance_log_likelihood=None if exact else best.mean,
            importance_label=None if exact else best.label,
            conservative_log_likelihood=conservative,
            conservative_examples=examples,
            conservative_gap=gap,
            pseudo_log_likelihood=float(pseudo_log_likelihood(model, x).mean())
            if closed_form and flippable and binary
            else None,
            reconstruction_error=float(reconstruction_error(model, x).mean()),
        )

    train_metrics = metrics_of(data)
    test_metrics = None if test is None else metrics_of(test)
    gap = free_energy_gap(model, data, test) if closed_form and test is not None else None
    return Evaluation(log_z_value, source, estimate, train_metrics, test_metrics, gap, tuple(cautions))
