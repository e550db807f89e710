"""Greedy layer-wise pretraining of a deep chain from a stack of RBMs with tied copies."""

from __future__ import annotations

from typing import TYPE_CHECKING

import torch
from torch import Tensor, nn
from torch.nn.utils import parametrize

from .._checks import check_count, check_model
from .._random import resolve_generator
from ..model.energy_model import EnergyModel, bias_from_data, rbm
from ..model.gaussian import GaussianLayer
from ..model.units import BinaryLayer
from ..phases.mean_field import MeanField

if TYPE_CHECKING:
    from .fit import FitResult

__all__ = ["can_pretrain", "pretrain"]

# Measured by benchmarks/digits_features.py (see DEVELOPERS.md): passes over the data per RBM.
DEFAULT_PRETRAIN_EPOCHS = 30


def pretrain(
    model: EnergyModel,
    data: Tensor,
    *,
    epochs: int = DEFAULT_PRETRAIN_EPOCHS,
    batch_size: int | None = None,
    learning_rate: float | None = None,
    progress: bool = True,
    generator: torch.Generator | None = None,
) -> list[FitResult]:
    """Initialise a chain ``n_0 - n_1 - ... - n_L`` from RBMs trained one above the other.

    The recipe of "Deep Boltzmann Machines" (AISTATS 2009) and "An Efficient Learning Procedure
    for Deep Boltzmann Machines" (Neural Computation, 2012). In the chain every inner layer gets
    input from both sides, while an RBM sees only one; so the first RBM has two tied copies of its
    visible layer (its hidden units get the bottom-up input twice), the last has two tied copies
    of its hidden layer (its visible units get the top-down input twice), and RBMs in between are
    plain, their weights halved when composed. Each RBM is trained with :func:`fit` (its defaults,
    ``epochs`` passes) on the hidden marginals the RBM below gives the data. Composed: weights
    as trained (halved in between), visible biases from the first RBM, top biases from the last,
    and an inner layer's biases the average of its two RBMs' (each inner conditional is half of
    each RBM's). A two-layer chain (an RBM) needs no pretraining and is left unchanged.

    Args:
        model: a chain as built by :func:`dbm` (dense couplings ``k, k + 1`` only); its
            parameters are overwritten in place.
        data: ``(N, n_0)`` training data: binary or Bernoulli means, or real values (standardised)
            when layer 0 is a :class:`GaussianLayer`.
        epochs: passes over the data for each RBM.
        batch_size: batch size of each RBM's :func:`fit` (default: fit's).
        learning_rate: Adam's starting learning rate for each RBM, decayed as in
            :func:`default_optimizer` (default: fit's for an RBM). On the demo data a lower rate
            than the default gave RBMs whose own samples cover the data's modes better
            (``benchmarks/learning_rate.py``); on the 8x8 digits the default did best.
        progress: show one tqdm bar per RBM.
        generator: the ``torch.Generator`` behind every RBM's initial weights, particles and
            shuffling.

    Returns:
        the :class:`FitResult` of each RBM, bottom first (their ``history`` shows how they trained).

    Examples::

        >>> import ebm_layers as el
        >>> g = torch.Generator().manual_seed(0)
        >>> model = el.dbm(6, 5, 4, generator=g)
        >>> data = torch.bernoulli(torch.full((40, 6), 0.3), generator=g)
        >>> results = pretrain(model, data, epochs=2, progress=False, generator=g)
        >>> len(results), len(results[0].history)
        (2, 2)
    """
    from .fit import default_optimizer, fit  # fit pretrains by default: imported here (cycle)

    check_model(model)
    if not can_pretrain(model):
        raise ValueError(
            "pretrain needs a chain of binary layers (layer 0 binary or Gaussian) and dense couplings "
            f"(k, k + 1) as built by dbm(), got {model.extra_repr()}"
        )
    data = model.checked("data", data, convert=True)
    epochs = check_count("epochs", epochs)
    generator = resolve_generator(generator)
    last = len(model.couplings) - 1
    if last == 0:
        return []
    results, stages, x = [], [], data.detach()
    for k in range(last + 1):
        visible_copies = 2 if k == 0 else 1
        hidden_copies = 2 if k == last else 1
        n_visible, n_hidden = model.sizes[k], model.sizes[k + 1]
        stage = rbm(
            n_visible * visible_copies, n_hidden * hidden_copies, generator=generator, dtype=model.dtype
        )
        if k == 0 and isinstance(model.layers[0], GaussianLayer):
            stage = _gaussian_stage(stage, model.layers[0], visible_copies)
        _tie(stage, visible_copies, hidden_copies)
        _init_visible_bias(stage, x)
        stage_data = x.repeat(1, visible_copies)
        optimizer, scheduler = default_optimizer(stage, epochs, learning_rate)
        results.append(
            fit(
                stage,
                stage_data,
                epochs=epochs,
                batch_size=batch_size,
                optimizer=optimizer,
                scheduler=scheduler,
                progress=progress,
                generator=generator,
                pretrain_epochs=0,
                stage=f"pretraining RBM {k + 1}/{last + 1}",
            )
        )
        stages.append(stage)
        if k < last:
            with torch.no_grad():
                x = MeanField(stage)(stage_data)[1][:, :n_hidden]
    _compose(model, stages)
    return results


class _TiedCopies(nn.Module):
    """Parametrization: ``copies`` copies of a free tensor stacked along ``dim``."""

    def __init__(self, copies: int, dim: int) -> None:
        super().__init__()
        self.copies, self.dim = copies, dim

    def forward(self, free: Tensor) -> Tensor:
        return torch.cat([free] * self.copies, dim=self.dim)

    def right_inverse(self, tensor: Tensor) -> Tensor:
        return tensor.chunk(self.copies, dim=self.dim)[0]

    def pull_back(self, statistic: Tensor) -> Tensor:
        """The adjoint of ``forward``: a statistic of the copies summed into one of the free tensor."""
        return torch.stack(statistic.chunk(self.copies, dim=self.dim)).sum(0)


def can_pretrain(model: EnergyModel) -> bool:
    """Whether :func:`pretrain` applies: a chain as :func:`dbm` builds (layer 0 observed alone, unmasked
    dense couplings ``(k, k + 1)``), its layer 0 binary or Gaussian, every other layer binary."""
    return model.is_binary_chain(visible=(BinaryLayer, GaussianLayer))


def _gaussian_stage(stage: EnergyModel, visible: GaussianLayer, copies: int) -> EnergyModel:
    """``stage`` with a Gaussian visible layer like ``visible`` (``copies`` copies of its units)."""
    layer = GaussianLayer(
        stage.sizes[0], std=visible.initial_std, learn_std=visible.learn_std, dtype=stage.dtype
    )
    with torch.no_grad():
        layer.log_std.copy_(visible.log_std.detach().repeat(copies))
    return EnergyModel([layer, stage.layers[1]], [stage.couplings[0]])


def _tie(stage: EnergyModel, visible_copies: int, hidden_copies: int) -> None:
    """Make ``stage``'s layers ``copies`` tied copies of one layer (weights and layer parameters shared)."""
    coupling = stage.couplings[0]
    for copies, layer, dim in ((visible_copies, stage.layers[0], 0), (hidden_copies, stage.layers[1], 1)):
        if copies > 1:
            for name, _ in list(layer.named_parameters()):
                parametrize.register_parametrization(layer, name, _TiedCopies(copies, 0))
            parametrize.register_parametrization(coupling, "weight", _TiedCopies(copies, dim))


def _free(module: nn.Module, name: str) -> Tensor:
    """The tensor an optimizer updates behind ``module.<name>`` (parametrized or not), detached."""
    if parametrize.is_parametrized(module, name):
        return getattr(module.parametrizations, name).original.detach()
    return getattr(module, name).detach()


@torch.no_grad()
def _init_visible_bias(stage: EnergyModel, x: Tensor) -> None:
    """The visible biases of a stage from its (single-copy) input ``x``, as
    :meth:`EnergyModel.init_visible_bias_from` does for an ordinary model (binary units: the base
    rates' log-odds; Gaussian units: the mean)."""
    _free(stage.layers[0], "bias").copy_(bias_from_data(stage.layers[0], x))


@torch.no_grad()
def _compose(model: EnergyModel, stages: list[EnergyModel]) -> None:
    """Write the trained stages into the chain ``model`` (see :func:`pretrain`)."""
    last = len(stages) - 1
    for k, stage in enumerate(stages):
        scale = 0.5 if 0 < k < last else 1.0
        model.couplings[k].weight.copy_(scale * _free(stage.couplings[0], "weight"))
    for name, parameter in model.layers[0].named_parameters():  # the bias, and a learned log_std
        parameter.copy_(_free(stages[0].layers[0], name))
    model.layers[-1].bias.copy_(_free(stages[-1].layers[1], "bias"))
    for k in range(1, len(model.layers) - 1):
        below, above = _free(stages[k - 1].layers[1], "bias"), _free(stages[k].layers[0], "bias")
        model.layers[k].bias.copy_((below + above) / 2)
