"""Predicting one observed layer from the others: exact free-energy comparison, or mean field."""

from __future__ import annotations

from collections.abc import Mapping

import torch
from torch import Tensor

from .._checks import check_index, check_model
from ..model.energy_model import EnergyModel
from ..model.units import resting_mean
from ..phases.mean_field import MeanField

__all__ = ["PREDICT_EXACT_STATES", "check_discriminative", "conditional_log_likelihood", "predict"]

# predict() compares free energies exactly up to this many states of the predicted layer.
PREDICT_EXACT_STATES = 2**12


def predict(model: EnergyModel, given: object, layer: int, *, method: str = "auto") -> Tensor:
    """The expected state ``E[x_layer | given]`` ``(B, n_layer)`` of observed ``layer`` given the other
    observed layers (class probabilities for a one-group :class:`CategoricalLayer` label layer).

    - ``"exact"``: every state ``y`` of ``layer`` is scored by the free energy ``F(given, y)`` with
      the hidden layers summed out in closed form, and ``p(y | given) = softmax(-F)``
      ("Classification using Discriminative Restricted Boltzmann Machines", ICML 2008). Needs a
      closed-form free energy (no two hidden units coupled) and a layer that lists its states.
    - ``"mean-field"``: ``layer`` is treated as missing data and inferred with the hidden layers
      (:class:`MeanField`); an approximation, for any graph and unit type.
    - ``"auto"`` (default): exact where it applies and the layer has at most
      ``PREDICT_EXACT_STATES`` states, else mean field.

    Args:
        model: the :class:`EnergyModel` (with ``layer`` among ``model.observed``).
        given: the other observed layers' data: a dict ``{layer: (B, n_i)}``, a tuple in the
            order of ``model.observed`` without ``layer``, or one tensor when only one remains.
        layer: the observed layer to predict.
        method: ``"auto"``, ``"exact"`` or ``"mean-field"``.

    Returns:
        ``(B, n_layer)`` in the model's dtype, detached.
    """
    v, missing = _completed(model, given, layer)
    method = _method(model, layer, method)
    with torch.no_grad():
        if method == "exact":
            scores, states = _log_conditionals(model, v, layer)
            return scores.softmax(-1) @ states
        return MeanField(model)(v, missing=missing)[layer].detach()


def conditional_log_likelihood(model: EnergyModel, v: object, layer: int) -> Tensor:
    """Exact ``log p(x_layer | the other observed layers)`` ``(B,)`` of full observations ``v``,
    differentiable (the discriminative objective of "Classification using Discriminative Restricted
    Boltzmann Machines", ICML 2008; add it to the generative one for their hybrid, see
    :class:`TwoPhaseObjective`). Needs what :func:`predict`'s ``"exact"`` needs."""
    check_model(model)
    layer = check_discriminative(model, layer)
    return log_conditional(model, model.checked("v", v), layer)


def log_conditional(model: EnergyModel, v: Tensor, layer: int) -> Tensor:
    """:func:`conditional_log_likelihood` of a checked, joined observation ``v`` and a checked
    ``layer``, without the checks (the objective calls it on every step)."""
    scores, states = _log_conditionals(model, v, layer)
    observed = model.clamped(v)[layer]
    # Each observed state's row in the list of states (one-hot or binary data: an exact match).
    match = (observed[:, None, :] - states[None]).abs().sum(-1) < 1e-6
    if not bool(match.any(1).all()):
        raise ValueError(f"v[{layer}] must hold states of layer {layer} (not probabilities)")
    return (scores * match).sum(-1) - scores.logsumexp(-1)


def check_discriminative(model: EnergyModel, layer: object) -> int:
    """``layer`` as an int after checking that its exact conditional given the other observed layers
    exists (:func:`conditional_log_likelihood`); ``ValueError`` saying why not otherwise."""
    layer = _check_observed_layer(model, layer)
    _method(model, layer, "exact")
    return layer


def _log_conditionals(model: EnergyModel, v: Tensor, layer: int) -> tuple[Tensor, Tensor]:
    """``-F(v with layer set to y_k)`` ``(B, K)`` for every state ``y_k`` of ``layer``, and the states
    ``(K, n_layer)``."""
    states = model.layers[layer].states(0, model.layers[layer].num_states).to(model.dtype)
    count, batch = states.shape[0], v.shape[0]
    given = {i: x.repeat_interleave(count, dim=0) for i, x in model.clamped(v).items() if i != layer}
    given[layer] = states.repeat(batch, 1)
    return -model.summed_free_energy(given).view(batch, count), states


def _method(model: EnergyModel, layer: int, method: str) -> str:
    """The method :func:`predict` uses; ``ValueError`` when ``"exact"`` is asked for and cannot be."""
    if method not in ("auto", "exact", "mean-field"):
        raise ValueError(f"method must be 'auto', 'exact' or 'mean-field', got {method!r}")
    states = getattr(model.layers[layer], "num_states", None)
    why = None
    if states is None:
        why = f"layer {layer} ({type(model.layers[layer]).__name__}) does not list its states"
    elif not model.has_free_energy:
        why = "the model has no closed-form free energy (two hidden units are coupled)"
    elif method == "auto" and states > PREDICT_EXACT_STATES:
        why = f"layer {layer} has {states:,} states"
    if method == "exact" and why is not None:
        raise ValueError(f"the exact conditional of layer {layer} is not available: {why}; use mean field")
    return "mean-field" if method == "mean-field" or why is not None else "exact"


def _check_observed_layer(model: EnergyModel, layer: object) -> int:
    layer = check_index("layer", layer, len(model.layers))
    if layer not in model.observed:
        raise ValueError(f"layer must be an observed layer {list(model.observed)}, got {layer}")
    if len(model.observed) < 2:
        raise ValueError(f"predicting layer {layer} needs another observed layer to predict it from")
    return layer


def _completed(model: EnergyModel, given: object, layer: int) -> tuple[Tensor, Tensor]:
    """The observation with ``layer`` filled by a placeholder (its mean under zero input), joined, and
    the ``missing`` mask of ``layer``'s columns."""
    check_model(model)
    layer = _check_observed_layer(model, layer)
    others = [i for i in model.observed if i != layer]
    if isinstance(given, Mapping):
        if set(given) != set(others):
            raise ValueError(
                f"given must map the observed layers {others} to their data, got keys {sorted(given)}"
            )
        parts = dict(given)
    elif isinstance(given, (tuple, list)):
        if len(given) != len(others):
            raise ValueError(f"given must hold one tensor per observed layer {others}, got {len(given)}")
        parts = dict(zip(others, given))
    elif len(others) == 1:
        parts = {others[0]: given}
    else:
        raise TypeError(
            f"given must be a dict or tuple of the observed layers {others}, got {type(given).__name__}"
        )
    first = model.checked(f"given[{others[0]}]", parts[others[0]], others[0], convert=True)
    parts[layer] = resting_mean(model.layers[layer], first.shape[0], model.dtype)
    v = model.checked("given", parts, convert=True)
    missing = torch.zeros(v.shape, dtype=torch.bool)
    model.clamped(missing)[layer].fill_(True)  # a view of the layer's columns
    return v, missing
