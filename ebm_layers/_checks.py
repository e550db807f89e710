"""One place that validates what users pass in, so every public entry point fails the same way.

Every check raises before anything is modified: a rejected call leaves parameters,
particles and optimizer state untouched.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Sequence

import torch
from torch import Tensor

__all__ = [
    "check_batch",
    "check_binary_batch",
    "check_count",
    "check_data",
    "check_example_index",
    "check_index",
    "check_model",
    "check_range",
    "check_real",
    "check_size",
    "check_states",
]


def _whole_number(name: str, value: object) -> int:
    """Return ``value`` as an int after checking it is an integer (bools refused)."""
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise TypeError(f"{name} must be an int, got {value!r} ({type(value).__name__})")
    return int(value)


def check_size(name: str, value: object) -> int:
    """Return ``value`` as an int after checking it is a positive whole number."""
    value = _whole_number(name, value)
    if value <= 0:
        raise ValueError(f"{name} must be positive, got {value}")
    return value


def check_count(name: str, value: object) -> int:
    """Return ``value`` as an int after checking it is a whole number >= 0."""
    value = _whole_number(name, value)
    if value < 0:
        raise ValueError(f"{name} must be >= 0, got {value}")
    return value


def check_real(name: str, value: object) -> float:
    """Return ``value`` as a float after checking it is a real number (bools refused)."""
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise TypeError(f"{name} must be a number, got {value!r} ({type(value).__name__})")
    return float(value)


def check_range(name: str, value: object, low: float, high: float = math.inf, *, closed: str = "[)") -> float:
    """Return ``value`` as a float after checking it is a real number in the interval from ``low``
    to ``high``; ``closed`` gives its ends as brackets: ``"[)"`` (default), ``"[]"``, ``"()"``, ``"(]"``.
    An infinite ``high`` is never included: the value must be finite."""
    value = check_real(name, value)
    above = value >= low if closed[0] == "[" else value > low
    below = value <= high if closed[1] == "]" and high < math.inf else value < high
    if not (above and below):
        high_text = "inf" if high == math.inf else f"{high:g}"
        raise ValueError(f"{name} must lie in {closed[0]}{low:g}, {high_text}{closed[1]}, got {value}")
    return value


def check_positive_real(name: str, value: object) -> float:
    """Return ``value`` as a float after checking it is a positive, finite real number."""
    return check_range(name, value, 0.0, closed="()")


def check_index(name: str, value: object, count: int | None = None) -> int:
    """Return ``value`` as an int after checking it indexes one of ``count`` layers (any >= 0 if None)."""
    value = _whole_number(name, value)
    if count is None:
        if value < 0:
            raise ValueError(f"{name} must be a layer index >= 0, got {value}")
    elif not 0 <= value < count:
        raise ValueError(
            f"{name} must be a layer index in 0..{count - 1}, got {value}"
            if count
            else f"{name}={value} but there are no layers"
        )
    return value


def check_model(model: object) -> None:
    """Raise ``TypeError`` unless ``model`` is an :class:`~ebm_layers.model.EnergyModel`."""
    from .model.energy_model import EnergyModel  # imported here: the model module itself uses these checks

    if not isinstance(model, EnergyModel):
        raise TypeError(f"model must be an EnergyModel, got {type(model).__name__}")


def check_batch(
    name: str,
    x: object,
    width: int,
    *,
    dtype: torch.dtype | None = None,
    batch: int | None = None,
    support: tuple[float, float] | None = (0.0, 1.0),
) -> Tensor:
    """Check a batch of states or data: a ``(B, width)`` tensor, ``B > 0``, finite, within
    ``support`` (``(low, high)``, default [0, 1]; ``None``: any finite value).

    Binary states and Bernoulli means are both accepted. Binary data kept as ``bool`` or an
    integer dtype (``uint8``...) is cast to ``dtype`` (default: torch's default dtype) and
    returned; a floating tensor must already have ``dtype`` (the model's), as torch modules expect.
    ``batch`` (the batch size of other tensors passed with this one) is enforced when given.
    """
    if not isinstance(x, Tensor):
        raise TypeError(f"{name} must be a torch.Tensor, got {type(x).__name__}")
    if x.is_complex():
        raise TypeError(f"{name} must hold real values, got {x.dtype}")
    if not x.is_floating_point():  # bool or integer: binary data as people keep it
        x = x.to(torch.get_default_dtype() if dtype is None else dtype)
    if dtype is not None and x.dtype != dtype:
        raise TypeError(
            f"{name} has dtype {x.dtype} but the model's parameters are {dtype}; "
            "convert one of them with .to()"
        )
    if x.ndim != 2:
        raise ValueError(f"{name} must be 2-D (batch, {width}), got shape {tuple(x.shape)}")
    if x.shape[1] != width:
        raise ValueError(f"{name} must have {width} columns, got shape {tuple(x.shape)}")
    if x.shape[0] == 0:
        raise ValueError(f"{name} is an empty batch (shape {tuple(x.shape)})")
    if batch is not None and x.shape[0] != batch:
        raise ValueError(f"{name} has batch size {x.shape[0]}, expected {batch} like the others")
    values = x.detach()
    low, high = (float(m) for m in values.aminmax())  # one pass; NaN propagates into both
    bottom, top = (-math.inf, math.inf) if support is None else support
    if not (bottom <= low and high <= top and math.isfinite(low) and math.isfinite(high)):
        finite = torch.isfinite(values)
        if not bool(finite.all()):
            raise ValueError(f"{name} holds {int((~finite).sum())} non-finite values (NaN or Inf)")
        what = " (binary states or Bernoulli means)" if support == (0.0, 1.0) else ""
        raise ValueError(f"{name} must lie in [{bottom:g}, {top:g}]{what}, got values from {low} to {high}")
    return x


def check_data(
    name: str,
    x: object,
    width: int,
    *,
    dtype: torch.dtype,
    batch: int | None = None,
    support: tuple[float, float] | None = (0.0, 1.0),
) -> Tensor:
    """:func:`check_batch` for the conveniences (``fit``, ``pretrain``, ``evaluate``): also numpy
    arrays (anything with ``__array__``) and floating data of another precision, cast to ``dtype``."""
    if not isinstance(x, Tensor) and hasattr(x, "__array__"):
        x = torch.as_tensor(x)
    if isinstance(x, Tensor) and x.is_floating_point() and x.dtype != dtype:
        x = x.to(dtype)
    return check_batch(name, x, width, dtype=dtype, batch=batch, support=support)


def check_binary_batch(name: str, x: object, width: int, *, dtype: torch.dtype | None = None) -> Tensor:
    """Check a batch of binary data: :func:`check_batch`, and every value exactly 0 or 1."""
    x = check_batch(name, x, width, dtype=dtype)
    other = (x.detach() != 0) & (x.detach() != 1)
    if bool(other.any()):
        raise ValueError(
            f"{name} must be binary (every value 0 or 1), got {int(other.sum())} other values, "
            f"such as {float(x.detach()[other][0])}"
        )
    return x


def check_states(
    name: str,
    states: object,
    sizes: Sequence[int],
    dtype: torch.dtype,
    supports: Sequence[tuple[float, float] | None] | None = None,
) -> list[Tensor]:
    """Check one ``(B, n_i)`` tensor per layer, all with the same batch size, each within its
    layer's support (default [0, 1]); return them as a list."""
    if isinstance(states, Tensor) or not isinstance(states, Sequence):
        raise TypeError(
            f"{name} must be a list of {len(sizes)} tensors (one per layer), got {type(states).__name__}"
        )
    if len(states) != len(sizes):
        raise ValueError(f"{name} must hold {len(sizes)} tensors (one per layer), got {len(states)}")
    batch, checked = None, []
    for i, (x, width) in enumerate(zip(states, sizes)):
        support = (0.0, 1.0) if supports is None else supports[i]
        checked.append(check_batch(f"{name}[{i}]", x, width, dtype=dtype, batch=batch, support=support))
        batch = x.shape[0]
    return checked


def check_example_index(name: str, index: object, num_examples: int, batch: int) -> Tensor:
    """Check a ``(batch,)`` integer tensor of example indices in ``0..num_examples - 1``."""
    if not isinstance(index, Tensor):
        raise TypeError(f"{name} must be a torch.Tensor of example indices, got {type(index).__name__}")
    if index.dtype.is_floating_point or index.dtype.is_complex or index.dtype == torch.bool:
        raise TypeError(f"{name} must have an integer dtype, got {index.dtype}")
    if tuple(index.shape) != (batch,):
        raise ValueError(
            f"{name} must have shape ({batch},), one index per example, got {tuple(index.shape)}"
        )
    low, high = int(index.min()), int(index.max())
    if low < 0 or high >= num_examples:
        raise ValueError(f"{name} must lie in 0..{num_examples - 1}, got values from {low} to {high}")
    return index
